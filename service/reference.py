"""/docs: the OpenAPI document as one readable page, rendered here with no asset from
the internet. Per operation: what it does, its scope, parameters, request fields (type,
default, description with limits), statuses, and an example request and answer."""

from __future__ import annotations

import html
import json
from functools import cache
from typing import Any

from .openapi import document

STYLE = """
body { font-family: system-ui, sans-serif; margin: 2rem auto; max-width: 72rem; color: #222;
       line-height: 1.4; padding: 0 1rem; }
nav ul { columns: 2; font-size: 0.9rem; } h2 { margin-top: 2.5rem; font-size: 1.2rem; }
h3 { font-size: 1rem; margin-bottom: 0.3rem; }
table { border-collapse: collapse; font-size: 0.88rem; margin: 0.3rem 0; }
td, th { border: 1px solid #ccc; padding: 0.25rem 0.5rem; vertical-align: top; text-align: left; }
th { background: #f3f3f3; } code { font-size: 0.9em; }
pre { background: #f6f6f6; padding: 0.6rem; overflow-x: auto; font-size: 0.82rem; }
.method { display: inline-block; min-width: 4.5rem; font-weight: 700; }
.operation { border-top: 2px solid #ddd; }
"""
SCHEMA_REF = "#/components/schemas/"
BASE_URL = "http://127.0.0.1:8000"


def anchor(method: str, path: str) -> str:
    return method + path.replace("/", "-").replace("{", "").replace("}", "").replace(".", "-")


def _code(value: Any) -> str:
    return f"<code>{html.escape(json.dumps(value))}</code>"


def type_text(schema: dict[str, Any]) -> str:
    """A JSON schema in words, nested body types linked to their tables."""
    if "$ref" in schema:
        name = schema["$ref"].removeprefix(SCHEMA_REF)
        return f'<a href="#schema-{name}">{name}</a>'
    if "anyOf" in schema:
        return " or ".join(type_text(option) for option in schema["anyOf"])
    if "enum" in schema:
        return "one of " + ", ".join(f"<code>{html.escape(str(v))}</code>" for v in schema["enum"])
    kind = schema.get("type", "any")
    if kind == "array":
        return f"array of {type_text(schema.get('items', {}))}"
    return html.escape(str(kind))


def fields_table(schema: dict[str, Any]) -> str:
    required = set(schema.get("required", ()))
    rows = []
    for name, field in schema.get("properties", {}).items():
        default = "required" if name in required else (
            _code(field["default"]) if "default" in field else "optional")
        rows.append(f"<tr><td><code>{html.escape(name)}</code></td><td>{type_text(field)}</td>"
                    f"<td>{default}</td><td>{html.escape(field.get('description', ''))}</td></tr>")
    return ("<table><tr><th>field</th><th>type</th><th>default</th><th>description</th></tr>"
            + "".join(rows) + "</table>")


def _schema_of(content: dict[str, Any]) -> dict[str, Any]:
    return next(iter(content.values()))["schema"]


def _parameters(item: dict[str, Any]) -> str:
    if not item["parameters"]:
        return ""
    rows = "".join(
        f"<tr><td><code>{html.escape(p['name'])}</code></td><td>{p['in']}</td>"
        f"<td>{type_text(p['schema'])}</td><td>{'required' if p['required'] else 'optional'}"
        f"</td><td>{html.escape(_parameter_text(p))}</td></tr>"
        for p in item["parameters"])
    return ("<h3>Parameters</h3><table><tr><th>name</th><th>in</th><th>type</th><th>default</th>"
            f"<th>description</th></tr>{rows}</table>")


def _parameter_text(parameter: dict[str, Any]) -> str:
    pattern = parameter["schema"].get("pattern")
    return parameter.get("description") or (f"matches {pattern}" if pattern else "")


def _request(method: str, path: str, item: dict[str, Any]) -> str:
    """The request body's fields and an example curl command."""
    body = item.get("requestBody")
    command = f"curl -s -X {method.upper()} '{BASE_URL}{path}'"
    text = ""
    if body is not None:
        schema = _schema_of(body["content"])
        name = schema["$ref"].removeprefix(SCHEMA_REF)
        text = (f'<h3>Request body: <a href="#schema-{name}">{name}</a></h3>'
                f"<p>JSON or MessagePack (<code>Content-Type</code>).</p>"
                + fields_table(document()["components"]["schemas"][name]))
        example = json.dumps(body["content"]["application/json"]["example"])
        command += f" -H 'Content-Type: application/json' \\\n  -d '{example}'"
    return text + f"<h3>Example request</h3><pre>{html.escape(command)}</pre>"


def _answers(item: dict[str, Any]) -> str:
    rows = []
    for status, answer in item["responses"].items():
        schema = _schema_of(answer["content"])
        media = next(iter(answer["content"]))
        rows.append(f"<tr><td>{status}</td><td>{html.escape(answer['description'])}</td>"
                    f"<td>{type_text(schema)} (<code>{html.escape(media)}</code>)</td></tr>")
    success = next(iter(item["responses"].values()))["content"]
    shown = next(iter(success.values()))["example"]
    text = shown if isinstance(shown, str) else json.dumps(shown, indent=2)
    return ("<h3>Answers</h3><table><tr><th>status</th><th>meaning</th><th>body</th></tr>"
            + "".join(rows) + f"</table><h3>Example answer</h3><pre>{html.escape(text)}</pre>")


def operation_section(path: str, method: str, item: dict[str, Any], example_path: str) -> str:
    scope = item.get("description", "No API key needed.")
    return (f'<section class="operation" id="{anchor(method, path)}">'
            f'<h2><span class="method">{method.upper()}</span><code>{html.escape(path)}</code>'
            f"</h2><p>{html.escape(item['summary'])} {html.escape(scope)}</p>"
            + _parameters(item) + _request(method, example_path, item) + _answers(item)
            + "</section>")


@cache
def reference_page() -> bytes:
    from .examples import EXAMPLES

    spec = document()
    sections, links = [], []
    for path, methods in spec["paths"].items():
        for method, item in methods.items():
            sections.append(operation_section(path, method, item,
                                              EXAMPLES[(method, path)].path))
            links.append(f'<li><a href="#{anchor(method, path)}"><b>{method.upper()}</b> '
                         f"<code>{html.escape(path)}</code></a></li>")
    schemas = "".join(
        f'<section id="schema-{name}"><h3>{name}</h3>'
        f"<p>{html.escape(schema.get('description', ''))}</p>"
        + (fields_table(schema) if "properties" in schema else "") + "</section>"
        for name, schema in spec["components"]["schemas"].items())
    info = spec["info"]
    page = f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><link rel="icon" href="data:,">
<title>mixscore API</title><style>{STYLE}</style></head><body>
<h1>mixscore {html.escape(info["version"])} API</h1>
<p>{html.escape(info["description"])} Send keys as
<code>Authorization: Bearer msk.&lt;id&gt;.&lt;secret&gt;</code>. The same document as
OpenAPI 3.1: <a href="/openapi.json">/openapi.json</a>. Limits are the
<code>MIXSCORE_MAX_*</code> settings, shown with their defaults.</p>
<nav><ul>{"".join(links)}</ul></nav>
{"".join(sections)}
<h2 id="schemas">Body types</h2>{schemas}
</body></html>
"""
    return page.encode()

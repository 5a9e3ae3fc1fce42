"""Decoding errors that teach: the allowed values of an enum, the closest known field
for an unknown one, and ``null`` for a ``NaN`` written into JSON.

msgspec says what is wrong and where (``$.structure[1]``); the body's own type says
what would have been right, so the hint is read from it with ``msgspec.inspect``.
"""

from __future__ import annotations

import difflib
import re
from typing import Any

import msgspec.inspect as mi

_TOKENS = re.compile(r"\.([^.\[\]]+)|\[(\d+)\]")
_UNKNOWN = re.compile(r"^Object contains unknown field `(.*)`$")
_MALFORMED_AT = re.compile(r"\(byte (\d+)\)$")
#: Words JavaScript and Python write for non-finite floats, which JSON has no place for.
_INFINITE = "infinite values are not accepted (null marks a missing value)"
_NOT_JSON = {b"nan": "send null for a missing value", b"infinity": _INFINITE,
             b"-infinity": _INFINITE, b"inf": _INFINITE, b"-inf": _INFINITE}


def _options(kind: mi.Type) -> tuple[mi.Type, ...]:
    while isinstance(kind, mi.Metadata):  # a field's description wraps its type
        kind = kind.type
    return kind.types if isinstance(kind, mi.UnionType) else (kind,)


def _type_at(body_type: Any, path: str) -> mi.Type | None:
    """The type the decoder expected at ``path`` (``.structure[1]``, ``.components.min``)."""
    kind: mi.Type | None = mi.type_info(body_type)
    for name, index in _TOKENS.findall(path):
        assert kind is not None
        kind = _step(kind, name, index)
        if kind is None:
            return None
    return kind


def _step(kind: mi.Type, name: str, index: str) -> mi.Type | None:
    for option in _options(kind):
        if name and isinstance(option, mi.StructType):
            for item in option.fields:
                if item.encode_name == name:
                    return item.type
        if index and isinstance(option, mi.ListType):
            return option.item_type
    return None


def enum_hint(body_type: Any, path: str) -> str:
    """``; allowed: a, b, c`` for a Literal at ``path``, else nothing."""
    kind = _type_at(body_type, path)
    for option in _options(kind) if kind is not None else ():
        if isinstance(option, mi.LiteralType):
            return "; allowed: " + ", ".join(str(value) for value in option.values)
    return ""


def unknown_field(body_type: Any, path: str, reason: str) -> tuple[str, str] | None:
    """(field path, message) for an unknown field, with the closest known name; None when
    ``reason`` is about something else."""
    match = _UNKNOWN.match(reason)
    kind = _type_at(body_type, path) if match else None
    if match is None or kind is None:
        return None
    known = [item.encode_name for option in _options(kind)
             if isinstance(option, mi.StructType) for item in option.fields]
    name = match.group(1)
    close = closest(name, known)
    suggestion = f"did you mean `{close}`? " if close else ""
    where = f"{path}.{name}".lstrip(".")
    return where, f"is not a field here; {suggestion}known fields: {', '.join(known)}"


def closest(name: str, known: list[str]) -> str | None:
    """The known name ``name`` was most likely meant to be, if one is close enough."""
    found = difflib.get_close_matches(name, known, n=1, cutoff=0.75)
    return found[0] if found else None


def malformed_json_hint(body: bytes, message: str) -> str:
    """``; <why>`` when the byte msgspec stopped at starts NaN or Infinity, else nothing."""
    match = _MALFORMED_AT.search(message)
    if match is None:
        return ""
    at = int(match.group(1))
    for start in (at, at - 1):  # msgspec may stop at the sign of -Infinity or after it
        word = re.match(rb"-?[A-Za-z]+", body[max(start, 0):max(start, 0) + 16])
        if word and word.group().lower() in _NOT_JSON:
            text = word.group().decode()
            return f"; `{text}` is not JSON: {_NOT_JSON[word.group().lower()]}"
    return ""

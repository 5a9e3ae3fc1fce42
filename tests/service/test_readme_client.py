"""The README's client example runs as written against a real server and fit worker."""

from __future__ import annotations

import contextlib
import io
import re
from pathlib import Path

from service.embedded import EmbeddedRedis

from .servers import api_process, worker_process

README = Path(__file__).resolve().parents[2] / "README.md"


def test_the_readme_client_example_runs(redis_server: EmbeddedRedis) -> None:
    blocks = re.findall(r"```python\n(.*?)```", README.read_text(), flags=re.DOTALL)
    example = next(block for block in blocks if "service.client" in block)
    with api_process(redis_server.url, "readme-client") as url, \
            worker_process(redis_server.url, "readme-client"):
        printed = io.StringIO()
        with contextlib.redirect_stdout(printed):
            exec(compile(example.replace("http://127.0.0.1:8000", url), "README.md", "exec"), {})
    lines = printed.getvalue().splitlines()
    assert lines[-1] == "model 'no-such-model' does not exist"
    rare = int(lines[-2].split()[0])
    assert 0 < rare < 200, lines[-2]
    assert any(line.startswith("succeeded") for line in lines)

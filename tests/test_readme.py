"""The README as a newcomer uses it. Every ``sh`` and ``python`` block, in order, goes
into one shell script, run as if pasted into one terminal against a live `mixscore up`
(the stack `make up` starts); every ``# -> text`` comment must be found in what its block
printed, and every ``text`` block in the output of the block before it.

In expected text ``…`` stands for anything on one line, and a ``text`` line that is
``...`` for lines left out. A block preceded by ``<!-- readme-test: skip, why -->``
is not run; the reasons are listed by the test. The stack listens on a free port: the
script's ``127.0.0.1:8000`` and the default port become it, and ``.venv/bin/`` the
environment running the tests.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
import time
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import pytest

from service.embedded import free_port

from .service.servers import up_process

ROOT = Path(__file__).resolve().parents[1]
README = ROOT / "README.md"
FENCE = re.compile(r"(?:<!-- readme-test: (?P<note>[^>]*?) -->\n)?```(?P<lang>\w*)\n(?P<body>.*?)"
                   r"^```$", re.DOTALL | re.MULTILINE)
EXPECTED = re.compile(r"# -> (.*)$", re.MULTILINE)
MARK = "@@readme-block-{}@@"
STACK_WAIT_S = 180
SCRIPT_LIMIT_S = 600


@dataclass(frozen=True)
class Block:
    number: int
    lang: str
    body: str
    note: str
    line: int


def blocks() -> list[Block]:
    text = README.read_text()
    return [Block(i, m["lang"], m["body"], m["note"] or "", text.count("\n", 0, m.start()) + 1)
            for i, m in enumerate(FENCE.finditer(text))]


def pattern(expected: str) -> re.Pattern[str]:
    return re.compile(".*?".join(re.escape(part) for part in expected.split("…")))


def script(runnable: list[Block], port: int) -> str:
    """One bash script: each block after a marker line, Python blocks fed to Python."""
    parts = ["set -euo pipefail"]
    for block in runnable:
        parts.append(f"echo; echo {MARK.format(block.number)}")  # after output with no newline
        body = block.body
        if block.lang == "python":
            body = f"python - <<'PYTHON_BLOCK'\n{body}PYTHON_BLOCK"
        parts.append(body.replace("127.0.0.1:8000", f"127.0.0.1:{port}")
                     .replace(".venv/bin/", f"{Path(sys.executable).parent}/"))
    return "\n".join(parts) + "\n"


def outputs(printed: str) -> dict[int, str]:
    found = re.split(r"\n@@readme-block-(\d+)@@\n", "\n" + printed)
    return {int(number): text for number, text in zip(found[1::2], found[2::2], strict=True)}


def check_expected(block: Block, output: str) -> None:
    """Each ``# -> `` fragment in the block is found in its output, in order."""
    at = 0
    for expected in EXPECTED.findall(block.body):
        match = pattern(expected.strip()).search(output, at)
        assert match, f"README.md line {block.line}: {expected!r} not in:\n{output}"
        at = match.end()


def check_shown(block: Block, output: str) -> None:
    """Each line of a ``text`` block is a line of the output, in order ('...' skips)."""
    lines = output.splitlines()
    at = 0
    for shown in block.body.splitlines():
        if shown == "...":
            continue
        wanted = re.compile(pattern(shown).pattern + "$")
        while at < len(lines) and not wanted.match(lines[at]):
            at += 1
        assert at < len(lines), f"README.md line {block.line}: {shown!r} not in:\n{output}"
        at += 1


@pytest.fixture(scope="module")
def stack(tmp_path_factory: pytest.TempPathFactory) -> Iterator[int]:
    """`mixscore up` with its demo model, as `make up` runs it; its port once it serves."""
    port = free_port()
    with up_process(tmp_path_factory.mktemp("readme") / "data", port=port) as (process, _):
        seen: list[str] = []
        deadline = time.monotonic() + STACK_WAIT_S
        while not any("demo model 'wind-farm': serving version" in line for line in seen):
            assert process.poll() is None and time.monotonic() < deadline, "".join(seen)
            seen.append(process.stdout.readline())  # type: ignore[union-attr]
        yield port


def test_every_block_runs_as_written(stack: int) -> None:
    missing = [tool for tool in ("curl", "wrk") if shutil.which(tool) is None]
    if missing and os.environ.get("CI"):
        pytest.fail(f"CI installs {', '.join(missing)} (.ci/run); missing")
    if missing:
        pytest.skip(f"the README's blocks need {', '.join(missing)}: apt-get install "
                    f"{' '.join(missing)}")
    found = blocks()
    skipped = [b for b in found if b.note.startswith("skip")]
    runnable = [b for b in found if b.lang in ("sh", "python") and b not in skipped]
    assert all(b.lang in ("sh", "python", "text") for b in found), "a block with no language"
    environment = {**os.environ, "MIXSCORE_PORT": str(stack),
                   "PATH": f"{Path(sys.executable).parent}:{os.environ['PATH']}"}
    run = subprocess.run(["bash", "-c", script(runnable, stack)], cwd=ROOT, env=environment,
                         capture_output=True, text=True, timeout=SCRIPT_LIMIT_S)
    printed = outputs(run.stdout)
    last = max(printed, default=-1)
    failed = next((b for b in found if b.number == last), None)
    assert run.returncode == 0, (
        f"README.md line {failed.line if failed else '?'}: the block failed\n"
        f"{printed.get(last, '')}\n{run.stderr[-3000:]}")
    for block in found:
        if block in runnable:
            check_expected(block, printed[block.number])
        elif block.lang == "text":
            previous = found[block.number - 1]
            assert previous in runnable, f"README.md line {block.line}: output of what?"
            check_shown(block, printed[previous.number])
    print("\nREADME blocks run:", len(runnable), "; not run:",
          [f"line {b.line}: {b.note}" for b in skipped])

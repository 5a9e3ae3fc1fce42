"""The README's example runs as written."""

from __future__ import annotations

import re
from pathlib import Path

README = Path(__file__).resolve().parents[2] / "README.md"


def test_the_readme_python_example_runs() -> None:
    section = README.read_text().split("## The core by example", 1)[1]
    block = re.search(r"```python\n(.*?)```", section, flags=re.DOTALL)
    assert block, "README.md has no core example"
    namespace: dict[str, object] = {}
    exec(compile(block.group(1), str(README), "exec"), namespace)
    tail = namespace["result"].quantiles.tail_fraction(  # type: ignore[attr-defined]
        namespace["model"].log_density(namespace["points"]))  # type: ignore[attr-defined]
    assert tail[2] < 0.001 < tail[0]
    assert namespace["choice"].best.mixture.components == 2  # type: ignore[attr-defined]

"""The README's example runs as written."""

from __future__ import annotations

import re
from pathlib import Path

README = Path(__file__).resolve().parents[2] / "README.md"


def test_the_readme_python_example_runs() -> None:
    blocks = re.findall(r"```python\n(.*?)```", README.read_text(), flags=re.DOTALL)
    assert blocks, "README.md has no python example"
    namespace: dict[str, object] = {}
    for block in blocks:
        exec(compile(block, str(README), "exec"), namespace)
    tail = namespace["result"].quantiles.tail_fraction(  # type: ignore[attr-defined]
        namespace["model"].log_density(namespace["points"]))  # type: ignore[attr-defined]
    assert tail[2] < 0.001 < tail[0]
    assert namespace["choice"].best.mixture.components == 2  # type: ignore[attr-defined]

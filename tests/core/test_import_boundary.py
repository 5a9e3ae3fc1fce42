"""core/ stays pure: it imports only numpy, scipy and the standard library."""

from __future__ import annotations

import ast
import sys
from pathlib import Path

CORE = Path(__file__).resolve().parents[2] / "core"
ALLOWED_THIRD_PARTY = {"numpy", "scipy"}
# Standard-library modules that do I/O or networking have no place in core/.
FORBIDDEN_STDLIB = {"io", "os.path", "socket", "subprocess", "asyncio", "http", "urllib",
                    "logging", "pathlib", "shutil", "sqlite3", "pickle", "json"}


def imported_modules(path: Path) -> set[str]:
    names: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.Import):
            names.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
            names.add(node.module)
    return names


def test_core_imports_only_numpy_scipy_and_pure_standard_library() -> None:
    for path in sorted(CORE.glob("*.py")):
        for name in imported_modules(path):
            top = name.split(".")[0]
            if top in sys.stdlib_module_names or top == "__future__":
                assert name not in FORBIDDEN_STDLIB and top not in FORBIDDEN_STDLIB, (path, name)
            else:
                assert top in ALLOWED_THIRD_PARTY, f"{path.name} imports {name}"

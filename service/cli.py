"""The ``mixscore`` command."""

from __future__ import annotations

import argparse
from importlib.metadata import version


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(
        prog="mixscore",
        description="Probabilistic scoring with Gaussian mixture models, served over HTTP.",
    )
    parser.add_argument("--version", action="version", version=f"mixscore {version('mixscore')}")
    parser.parse_args(argv)
    parser.print_help()
    return 0

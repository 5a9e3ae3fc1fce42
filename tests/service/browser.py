"""Pages opened in a real browser: Debian's chromium, driven by Playwright."""

from __future__ import annotations

import os
import shutil
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

import pytest

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
ARTEFACTS = Path(__file__).resolve().parents[2] / "artifacts"  # ignored by git


@contextmanager
def opened(url: str, screenshot: str) -> Iterator[tuple[Any, list[str]]]:
    """The page at ``url`` and what went wrong while it loaded: console errors, page errors
    and requests to any other origin. A full-page screenshot lands in artifacts/."""
    if CHROMIUM is None:
        if os.environ.get("CI"):
            pytest.fail("CI installs Debian's chromium (.ci/run); it is missing")
        pytest.skip("needs Debian's chromium: apt-get install chromium")
    from playwright.sync_api import sync_playwright

    origin = urlsplit(url).netloc
    problems: list[str] = []
    with sync_playwright() as playwright:
        browser = playwright.chromium.launch(executable_path=CHROMIUM, args=["--no-sandbox"])
        try:
            page = browser.new_page(viewport={"width": 1280, "height": 1000})
            page.on("console", lambda m: m.type == "error" and problems.append(m.text))
            page.on("pageerror", lambda error: problems.append(f"pageerror: {error}"))
            page.on("request", lambda r: _elsewhere(r.url, origin) and problems.append(
                f"request to {r.url}"))
            answer = page.goto(url)
            assert answer is not None and answer.status == 200
            yield page, problems
            ARTEFACTS.mkdir(exist_ok=True)
            page.screenshot(path=str(ARTEFACTS / screenshot), full_page=True)
        finally:
            browser.close()


def _elsewhere(url: str, origin: str) -> bool:
    parts = urlsplit(url)
    return parts.scheme in ("http", "https") and parts.netloc != origin


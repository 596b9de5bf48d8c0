"""The demo book in a real browser: headless Chromium (Debian's package) driven by Playwright.

Skips with a message when no Chromium is installed; fails instead when WAVEBOOK_REQUIRE_BROWSER=1
(as in .ci/run). Screenshots go to test-artifacts/ (ignored by git) for a person to look at.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from browser import ARTIFACTS, chromium
from pipeline.commands.demo import DEMO_SPEC, copy_demo
from pipeline.runner import run_study


@pytest.fixture(scope="module")
def demo_book(tmp_path_factory: pytest.TempPathFactory) -> Path:
    folder = copy_demo(tmp_path_factory.mktemp("demo") / "study")
    return run_study(folder / DEMO_SPEC, quiet=True)


@pytest.fixture(scope="module")
def browser():
    with chromium() as context:
        yield context


def test_book_opens_without_console_errors(browser, demo_book: Path) -> None:
    page = browser.new_page()
    errors: list[str] = []
    page.on("console", lambda m: errors.append(m.text) if m.type == "error" else None)
    page.on("pageerror", lambda e: errors.append(str(e)))
    page.goto(demo_book.as_uri())
    assert page.locator("table").count() > 0
    assert errors == []
    ARTIFACTS.mkdir(exist_ok=True)
    page.screenshot(path=str(ARTIFACTS / "book-cover.png"))

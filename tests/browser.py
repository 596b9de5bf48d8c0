"""Headless Chromium for the book's browser tests, driven by Playwright for Python.

The browser is Debian's `chromium` package at /usr/bin/chromium (or WAVEBOOK_CHROMIUM): Playwright's
own browser download is never used. Without a Chromium the tests skip with a message saying how to
get one; with WAVEBOOK_REQUIRE_BROWSER=1 (set by .ci/run) they fail instead.
"""

from __future__ import annotations

import os
import shutil
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import pytest

CHROMIUM = Path(os.environ.get("WAVEBOOK_CHROMIUM", "/usr/bin/chromium"))
ARGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
]
ARTIFACTS = Path(__file__).resolve().parents[1] / "test-artifacts"


def unavailable(reason: str) -> None:
    """Skip the calling test, or fail it when WAVEBOOK_REQUIRE_BROWSER=1."""
    if os.environ.get("WAVEBOOK_REQUIRE_BROWSER") == "1":
        pytest.fail(f"browser tests required (WAVEBOOK_REQUIRE_BROWSER=1) but {reason}")
    pytest.skip(f"browser tests skipped: {reason} (install Debian's chromium: apt-get install chromium)")


@contextmanager
def chromium() -> Iterator[object]:
    """A Playwright BrowserContext on the system Chromium with a fresh profile folder (Playwright
    passes it as --user-data-dir), closed and removed afterwards."""
    if not CHROMIUM.is_file():
        unavailable(f"no Chromium at {CHROMIUM}")
    try:
        from playwright.sync_api import sync_playwright
    except ImportError:
        unavailable("the playwright package is not installed")
    profile = tempfile.mkdtemp(prefix="wavebook-chromium-")
    try:
        with sync_playwright() as driver:
            browser = driver.chromium.launch_persistent_context(
                profile, executable_path=str(CHROMIUM), args=ARGS, headless=True
            )
            try:
                yield browser
            finally:
                browser.close()
    finally:
        shutil.rmtree(profile, ignore_errors=True)

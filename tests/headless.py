"""The browser set-up of the page tests: Debian's ``chromium`` driven by Playwright's Python package
through ``executable_path`` (Playwright's own browser download is never used).

Locally a test skips, with the reason, when chromium or playwright is missing; under ``.ci/run``
(``TIKHON_CI_FULL=1``) a missing browser is a failure.
"""

from __future__ import annotations

import os
import shutil

import pytest

CHROMIUM = shutil.which("chromium") or "/usr/bin/chromium"
ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
        "--disable-background-networking", "--disable-component-update", "--disable-sync"]
WAIT_MS = 180_000  # readiness waits (they fail only if the page never gets there), not timed assertions


def browser_or_skip() -> None:
    missing = None
    if not os.path.exists(CHROMIUM):
        missing = f"chromium is not installed at {CHROMIUM} (apt-get install -y chromium)"
    try:
        from playwright.sync_api import sync_playwright  # noqa: F401
    except ImportError:
        missing = missing or "the playwright Python package is not installed (pip install -e '.[test]')"
    if missing:
        if os.environ.get("TIKHON_CI_FULL"):
            pytest.fail(f"the browser test must run under .ci/run but {missing}")
        pytest.skip(missing)

"""Real-browser fixtures: Debian's chromium driven by Playwright, a real JupyterLab per module.

Never downloads a browser: Playwright launches /usr/bin/chromium (``scripts/setup-browser``
installs it). Without it every test here is skipped with that reason.
"""

from __future__ import annotations

from pathlib import Path

import pytest

CHROMIUM = Path("/usr/bin/chromium")
# Keep chromium off every network but loopback, and quiet.
CHROMIUM_ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync", "--no-first-run",
                 "--disable-dev-shm-usage"]


def pytest_collection_modifyitems(items):
    for item in items:
        if Path(str(item.fspath)).parent == Path(__file__).parent:
            item.add_marker(pytest.mark.browser)
            if not CHROMIUM.exists():
                item.add_marker(pytest.mark.skip(
                    reason="needs Debian's chromium at /usr/bin/chromium "
                           "(run scripts/setup-browser)"))


@pytest.fixture(scope="module")
def browser():
    from playwright.sync_api import sync_playwright

    with sync_playwright() as pw:
        chromium = pw.chromium.launch(executable_path=str(CHROMIUM), args=CHROMIUM_ARGS)
        try:
            yield chromium
        finally:
            chromium.close()

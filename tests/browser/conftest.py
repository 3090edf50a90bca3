"""Real-browser fixtures: Debian's chromium driven by Playwright, a real JupyterLab per module.

Never downloads a browser: Playwright launches /usr/bin/chromium (``scripts/setup-browser``
installs it). Without it every test here is skipped with that reason.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "server"))

from jupyter_launch import RunningJupyter  # noqa: E402

CHROMIUM = Path("/usr/bin/chromium")
# Keep chromium off every network but loopback and quiet (see /work/shared/LAB.md).
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


def start_lab(work: Path, desk_root: Path, **settings) -> RunningJupyter:
    """A JupyterLab with the announcements pop-up disabled and a fast poller."""
    labconfig = work / "config" / "labconfig"
    labconfig.mkdir(parents=True, exist_ok=True)
    (labconfig / "page_config.json").write_text(json.dumps({"disabledExtensions": {
        "@jupyterlab/apputils-extension:announcements": True}}))
    return RunningJupyter(work, desk_root, app="lab",
                          jobdesk_settings={"poll_interval": 0.5, **settings})


def open_sidebar(page, jp: RunningJupyter, path: str = "lab") -> None:
    page.goto(jp.url(f"{path}?reset&token={jp.token}"))
    tab = page.locator('.jp-SideBar [data-id="jobdesk-sidebar"]')
    tab.wait_for(timeout=60_000)
    if "lm-mod-current" not in (tab.get_attribute("class") or ""):
        tab.click()
    page.locator("#jobdesk-sidebar").wait_for(state="visible", timeout=30_000)

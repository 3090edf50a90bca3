"""Helpers of the browser tests: start a JupyterLab for a test, open the Job desk panel."""

from __future__ import annotations

import json
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "server"))

from jupyter_launch import RunningJupyter  # noqa: E402


def start_lab(work: Path, desk_root: Path, **settings) -> RunningJupyter:
    """A JupyterLab with the announcements pop-up disabled and a fast poller."""
    labconfig = work / "config" / "labconfig"
    labconfig.mkdir(parents=True, exist_ok=True)
    # exposeAppInBrowser: tests switch the theme through the app's own command.
    (labconfig / "page_config.json").write_text(json.dumps({"exposeAppInBrowser": True,
                                                            "disabledExtensions": {
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

"""The "TAP services" sidebar in a real JupyterLab, in a real browser, over the metadata of a
real service: pick the service, open a table, read its columns, search, insert a query.

The lab loads THIS checkout's bundle (jobdesk/labextension, built with ``npm run build`` in
labextension/): tests/server/jupyter_launch.py links it into the lab's JUPYTER_DATA_DIR, so an
installed copy of the extension elsewhere on the machine is not what is tested.  Skipped when it is not built.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from lab_helpers import start_lab
from jobdesk.desk import Desk
from jobdesk.localtap import serve

BUNDLE = Path(__file__).resolve().parents[2] / "jobdesk" / "labextension"
NOTEBOOK = "browse.ipynb"


@pytest.fixture(scope="module")
def tap(tmp_path_factory):
    with serve(state=tmp_path_factory.mktemp("tap"), rows=300) as tap:
        yield tap


@pytest.fixture(scope="module")
def slow_tap(tmp_path_factory):
    with serve(state=tmp_path_factory.mktemp("slow"), rows=300, exec_delay=120) as tap:
        yield tap


@pytest.fixture(scope="module")
def lab(tmp_path_factory, tap):
    if not (BUNDLE / "package.json").exists():
        pytest.skip("the lab extension is not built here (cd labextension && npm run build)")
    work = tmp_path_factory.mktemp("lab")
    notebook = {"cells": [{"cell_type": "code", "execution_count": None, "metadata": {},
                           "outputs": [], "source": "import jobdesk"}],
                "metadata": {"kernelspec": {"name": "python3", "display_name": "Python 3",
                                            "language": "python"}},
                "nbformat": 4, "nbformat_minor": 5}
    (work / "notebooks").mkdir(parents=True)
    (work / "notebooks" / NOTEBOOK).write_text(json.dumps(notebook))
    Desk(work / "desk").tables(tap.url)                  # the desk knows this service
    # RunningJupyter links this checkout's bundle ahead of any installed copy.
    with start_lab(work, work / "desk") as jp:
        yield jp


def test_browse_a_service_and_insert_a_starter_query(lab, browser, tap):
    context = browser.new_context(viewport={"width": 1280, "height": 820})
    page = context.new_page()
    try:
        page.goto(lab.url(f"lab/tree/{NOTEBOOK}?reset&token={lab.token}"))
        tab = page.locator('.jp-SideBar [data-id="jobdesk-services"]')
        tab.wait_for(timeout=60_000)
        tab.click()
        panel = page.locator("#jobdesk-services")
        panel.wait_for(state="visible", timeout=30_000)
        assert panel.locator("select option").first.text_content() == tap.url.rstrip("/")
        table = panel.locator(".jd-sv-table", has_text="orrery.visits")
        table.wait_for(timeout=30_000)
        table.click()
        mag = panel.locator(".jd-sv-grid tr", has_text="mag_sigma")
        mag.wait_for(timeout=30_000)
        assert "stat.error;phot.mag" in mag.text_content()      # the service's UCD
        page.locator(".jp-Notebook .jp-CodeCell").first.wait_for(timeout=60_000)
        page.locator(".jp-Notebook .jp-CodeCell").first.click()
        panel.get_by_role("button", name="Insert query").click()
        cell = page.locator(".jp-Notebook .jp-CodeCell").nth(1)
        cell.wait_for(timeout=30_000)
        text = cell.locator(".cm-content").text_content()
        assert "FROM orrery.visits" in text and "desk.check(service, adql)" in text

        panel.get_by_role("button", name="‹ Tables").click()
        panel.get_by_placeholder("search tables and columns").fill("parallax")
        hit = panel.locator(".jd-sv-hits .jd-sv-table", has_text="orrery.sources.parallax_sigma")
        hit.wait_for(timeout=30_000)
    finally:
        context.close()


def test_the_estimate_shows_beside_a_running_job(lab, browser, slow_tap):
    desk = Desk(lab.desk_root)
    adql = "SELECT orrery_id FROM orrery.sources WHERE ra < 180 ORDER BY orrery_id"
    job = desk.submit(slow_tap.url, adql, estimate=True)
    rows = job.record["estimate"]["rows"]
    context = browser.new_context(viewport={"width": 1280, "height": 820})
    page = context.new_page()
    try:
        page.goto(lab.url(f"lab?reset&token={lab.token}"))
        tab = page.locator('.jp-SideBar [data-id="jobdesk-sidebar"]')
        tab.wait_for(timeout=60_000)
        if "lm-mod-current" not in (tab.get_attribute("class") or ""):
            tab.click()
        row = page.locator(f'#jobdesk-sidebar .jd-row[data-job-id="{job.id}"]')
        row.wait_for(timeout=30_000)
        assert row.locator(".jd-rows").text_content() == f"≈ {rows:,} rows"
    finally:
        context.close()
        desk.abort(job.id)

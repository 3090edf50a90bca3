"""A release re-run in the sidebar, in a real JupyterLab in a real browser.

An analysis of two steps runs on the embedded service's first release and is re-run on its
second (orrery_r2) through the library; the sidebar's "Re-runs" view then shows the re-run step
by step, and each step's link opens the comparison report the REST API serves.
"""

from __future__ import annotations

import pytest
import requests

from lab_helpers import open_sidebar, start_lab
from jobdesk.desk import Desk
from jobdesk.localtap import serve

STEPS = ("SELECT orrery_id, ra, dec, mag_lime FROM orrery.sources WHERE dec > 40 "
         "ORDER BY orrery_id",
         "SELECT orrery_id, class_label FROM orrery.sources WHERE mag_lime < 15 "
         "ORDER BY orrery_id")
RELEASE = {"orrery.sources": "orrery_r2.sources", "class_label": "source_class"}


@pytest.fixture(scope="module")
def lab(tmp_path_factory):
    work = tmp_path_factory.mktemp("lab")
    with start_lab(work, work / "desk") as jp:
        yield jp


def test_rerun_progress_and_its_reports(browser, lab, tmp_path):
    with serve(state=tmp_path / "tap", rows=2000) as tap:
        desk = Desk(lab.desk_root, wait_window=2)
        with desk.analysis("north-field"):
            for adql in STEPS:
                desk.submit(tap.url, adql).wait(timeout=60, progress=False)
        plan = desk.rerun("north-field", rename=RELEASE)
        plan.wait(timeout=120)
        assert [s["state"] for s in plan.steps] == ["done", "done"]

        context = browser.new_context(viewport={"width": 1280, "height": 820})
        page = context.new_page()
        try:
            open_sidebar(page, lab)
            page.get_by_role("button", name="Re-runs").click()
            view = page.locator("#jobdesk-analyses-area .jp-jobdesk-analyses")
            section = view.locator('section[data-analysis="north-field"]')
            section.wait_for(timeout=30_000)
            assert "2 steps" in section.locator("h3").inner_text()
            title = section.locator(".jp-jobdesk-rerun-title")
            title.wait_for(timeout=30_000)
            assert f"north-field → {plan.into}: 2 of 2 steps done" == title.inner_text()
            links = section.get_by_role("link", name="open comparison report")
            assert links.count() == 2
            # The link is the REST API's report of that step: old job against new job.
            href = links.first.get_attribute("href")
            old, new = plan.steps[0]["old_job"], plan.steps[0]["new_job"]
            assert href.endswith(f"/jobdesk/api/compare/{old}/{new}/report")
            report = requests.get(href, headers=lab.auth, timeout=60)
            assert report.status_code == 200 and "text/html" in report.headers["Content-Type"]
            # The page's counts are those of the library's own comparison.
            counts = desk.compare(old, new)
            assert str(counts.added) in report.text and str(counts.removed) in report.text
        finally:
            context.close()

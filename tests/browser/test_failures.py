"""What the sidebar shows when something went wrong, in a real JupyterLab in a real browser.

A record whose service is silent says so ("service unreachable for N s, retrying"), a record that
never reached its service reads UNREACHED, and a failed job's details show the service's message,
our hint and the next steps, which work: send again (a new job of the same query), edit in a
notebook (the query's code lands in a cell), forget.

The lab loads this checkout's sidebar bundle (jobdesk/labextension, built with
``cd labextension && npm run build``) ahead of any installed copy (see tests/server/jupyter_launch.py).
"""

from __future__ import annotations

import json
import socket
from pathlib import Path

import pytest

from lab_helpers import open_sidebar, start_lab
from jobdesk import Desk, ServiceUnreachable, phases
from jobdesk.localtap import serve

BUNDLE = Path(__file__).resolve().parents[2] / "jobdesk" / "labextension"
NOTEBOOK = "fix.ipynb"
REFUSED = "SELECT nothing FROM orrery.no_such_table"


def _dead_url() -> str:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return f"http://127.0.0.1:{s.getsockname()[1]}/tap"


@pytest.fixture(scope="module")
def lab(tmp_path_factory):
    if not (BUNDLE / "package.json").exists():
        pytest.skip("the sidebar bundle is not built here (cd labextension && npm run build)")
    work = tmp_path_factory.mktemp("lab")
    notebook = {"cells": [{"cell_type": "code", "execution_count": None, "metadata": {},
                           "outputs": [], "source": "# fix the query here"}],
                "metadata": {"kernelspec": {"name": "python3", "display_name": "Python 3",
                                            "language": "python"}},
                "nbformat": 4, "nbformat_minor": 5}
    (work / "notebooks").mkdir(parents=True)
    (work / "notebooks" / NOTEBOOK).write_text(json.dumps(notebook))
    # RunningJupyter links this checkout's bundle ahead of any installed copy.
    with start_lab(work, work / "desk") as jp:
        yield jp


@pytest.fixture(scope="module")
def page(browser, lab):
    context = browser.new_context(viewport={"width": 1400, "height": 900})
    page = context.new_page()
    yield page
    context.close()


def row(page, job_id: str):
    return page.locator(f'#jobdesk-sidebar .jd-row[data-job-id="{job_id}"]')


def test_unreachable_and_failed_jobs_say_so_and_offer_next_steps(lab, page, tmp_path):
    desk = Desk(lab.desk_root, attempts=1, send_tries=50)
    with pytest.raises(ServiceUnreachable):
        desk.submit(_dead_url(), "SELECT TOP 1 orrery_id FROM orrery.sources ORDER BY orrery_id -- silent",
                    label="a silent service")
    silent = desk.jobs()[0]
    gone = Desk(lab.desk_root, attempts=1, send_tries=1)
    with pytest.raises(ServiceUnreachable):
        gone.submit(_dead_url(), "SELECT TOP 2 orrery_id FROM orrery.sources ORDER BY orrery_id -- gone",
                    label="never reached")
    never = [j for j in desk.jobs() if j.record.get("label") == "never reached"][0]
    assert never.phase == phases.UNREACHED

    with serve(state=tmp_path / "tap", rows=500, exec_delay=0.5) as tap:
        failed = desk.submit(tap.url, REFUSED, label="a query the service refuses")
        with pytest.raises(Exception):
            failed.wait(timeout=60, progress=False)
        assert failed.phase == phases.ERROR

        open_sidebar(page, lab, f"lab/tree/{NOTEBOOK}")
        # the silent service: said at once, with the retry
        row(page, silent.id).wait_for(timeout=30_000)
        page.wait_for_function(
            "id => (document.querySelector(`.jd-row[data-job-id=\"${id}\"]`) || {})"
            ".innerText?.includes('service unreachable for')", arg=silent.id, timeout=30_000)
        assert "retrying" in row(page, silent.id).inner_text()
        # the record that never reached its service
        assert row(page, never.id).get_attribute("data-phase") == "UNREACHED"
        assert "never reached the service" in row(page, never.id).inner_text()

        # the failed job's details: the service's message, our hint, the next steps
        row(page, failed.id).focus()
        page.keyboard.press("Enter")
        details = page.locator(f"#jobdesk-job-{failed.id}")
        details.locator(".jd-trouble").wait_for(timeout=30_000)
        message = details.locator(".jd-service-message").inner_text()
        assert "no_such_table" in message  # the service's own words
        assert details.locator(".jd-hint").inner_text().startswith("What to do:")
        for name in ("Send again", "Edit in a notebook", "Forget", "Pin", "Edit label…"):
            assert details.get_by_role("button", name=name).count() >= 1, name

        # edit in a notebook: the query's code goes into the open notebook
        page.get_by_role("tab", name=NOTEBOOK).first.click()
        page.locator(".jp-Notebook .jp-CodeCell").first.click()
        page.get_by_role("tab", name="a query the service refuses").first.click()
        details.get_by_role("button", name="Edit in a notebook").click()
        page.get_by_role("tab", name=NOTEBOOK).first.click()
        inserted = page.locator(".jp-Notebook .jp-CodeCell").nth(1)
        inserted.get_by_text("no_such_table").wait_for(timeout=20_000)
        assert "refresh=True" in inserted.inner_text()

        # send again: a new job of the same query (the service refuses it again)
        page.get_by_role("tab", name="a query the service refuses").first.click()
        before = {j.id for j in desk.jobs(limit=None)}
        details.get_by_role("button", name="Send again").click()
        page.wait_for_function(
            "n => document.querySelectorAll('#jobdesk-sidebar .jd-row').length > n",
            arg=len(before), timeout=30_000)
        new = [j for j in desk.jobs(limit=None) if j.id not in before]
        assert len(new) == 1 and new[0].record["adql"] == REFUSED
        # "Send again" opens the new job's details: let that happen before going back to the
        # old job, or it would come to the front over the old one's details mid-step.
        page.locator(f"#jobdesk-job-{new[0].id}").wait_for(timeout=30_000)

        # forget: after the confirmation the record is gone (its details come back to the front)
        row(page, failed.id).focus()
        page.keyboard.press("Enter")
        details.get_by_role("button", name="Forget").click()
        page.locator(".jp-Dialog").get_by_role("button", name="Forget").click()
        row(page, failed.id).wait_for(state="detached", timeout=30_000)
        assert failed.id not in {j.id for j in desk.jobs(limit=None)}

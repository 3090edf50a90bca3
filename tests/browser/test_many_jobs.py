"""The sidebar over an index of 10,000 jobs: it shows one page and pages on with "more".

Also measures (figures, printed, never asserted): the REST list latency of the first page and
the time from opening JupyterLab to the first page of rows in the sidebar.
"""

from __future__ import annotations

import hashlib
import statistics
import time

import pytest
import requests

from lab_helpers import open_sidebar, start_lab
from jobdesk.index import Index

JOBS = 10_000
PHASES = ["COMPLETED"] * 6 + ["ERROR", "ABORTED", "EXECUTING", "QUEUED"]


@pytest.fixture(scope="module")
def big_lab(tmp_path_factory):
    work = tmp_path_factory.mktemp("big")
    index = Index(work / "desk" / "index.sqlite")
    t0 = 1_700_000_000.0
    for i in range(JOBS):
        index.insert({
            "id": hashlib.sha256(f"many {i}".encode()).hexdigest()[:16],
            "key": hashlib.sha256(f"key {i}".encode()).hexdigest(),
            "service": f"http://tap{i % 3}.example.invalid/tap",
            "adql": f"SELECT TOP {i} * FROM orrery.sources", "label": f"seeded {i:05d}",
            "phase": PHASES[i % len(PHASES)], "created": t0 + i, "rows": i * 3,
            "result_bytes": i * 100, "truncated": int(i % 50 == 0), "layer": "personal"})
    # Poller off: the seeded services are invented and never contacted.
    with start_lab(work, work / "desk", poll_interval=0) as jp:
        yield jp


def test_ten_thousand_jobs_page_in_the_sidebar(big_lab, browser, capsys):
    jp = big_lab
    latencies = []
    for _ in range(20):
        t = time.perf_counter()
        answer = requests.get(jp.url("jobdesk/api/jobs?limit=100"), headers=jp.auth, timeout=30)
        latencies.append((time.perf_counter() - t) * 1000)
        assert answer.status_code == 200
    page_body = answer.json()
    assert page_body["total"] == JOBS and len(page_body["jobs"]) == 100

    context = browser.new_context(viewport={"width": 1280, "height": 820})
    page = context.new_page()
    t = time.perf_counter()
    open_sidebar(page, jp)
    rows = page.locator("#jobdesk-sidebar .jd-row")
    rows.first.wait_for(timeout=60_000)
    to_rows = time.perf_counter() - t
    page.wait_for_function(
        "document.querySelectorAll('#jobdesk-sidebar .jd-row').length === 100")
    assert "10,000 jobs" in page.locator("#jobdesk-sidebar .jd-summary").inner_text()
    assert page.locator("#jobdesk-sidebar .jd-row").first.get_attribute("data-job-id") == \
        page_body["jobs"][0]["id"]

    t = time.perf_counter()
    page.get_by_role("button", name="Show 100 more").click()
    page.wait_for_function(
        "document.querySelectorAll('#jobdesk-sidebar .jd-row').length === 200")
    more = time.perf_counter() - t

    t = time.perf_counter()
    page.locator("#jobdesk-sidebar .jd-search").fill("seeded 04242")
    page.wait_for_function(
        "document.querySelectorAll('#jobdesk-sidebar .jd-row').length === 1")
    search = time.perf_counter() - t
    context.close()

    with capsys.disabled():
        print(f"\n[figures] {JOBS} jobs: REST first page (100 rows) median "
              f"{statistics.median(latencies):.1f} ms, max {max(latencies):.1f} ms over 20; "
              f"lab open to first sidebar rows {to_rows:.2f} s; next page {more * 1000:.0f} ms; "
              f"search to one row {search * 1000:.0f} ms (includes the 250 ms typing pause)")

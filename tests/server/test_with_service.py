"""The REST API and the poller against real jobs on the embedded TAP service.

Jobs are submitted through the library (as a kernel would), on the same desk root the server
reads; the server's answers are checked against the service's own view of its jobs.
"""

from __future__ import annotations

import os
import subprocess
import sys
import time

import pytest
import requests

from jobdesk.desk import Desk
from jobdesk.localtap import serve
from jupyter_launch import RunningJupyter

QUERY = ("SELECT TOP 7 orrery_id, ra, dec, mag_lime FROM orrery.sources "
         "ORDER BY orrery_id")


@pytest.fixture(scope="module")
def quick_tap(tmp_path_factory):
    with serve(state=tmp_path_factory.mktemp("tap"), rows=500, exec_delay=0.5) as tap:
        yield tap


@pytest.fixture(scope="module")
def slow_tap(tmp_path_factory):
    with serve(state=tmp_path_factory.mktemp("slowtap"), rows=500, exec_delay=30) as tap:
        yield tap


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    work = tmp_path_factory.mktemp("server")
    with RunningJupyter(work, work / "desk", jobdesk_settings={"poll_interval": 0.5}) as jp:
        yield jp


@pytest.fixture
def desk(server):
    return Desk(server.desk_root, wait_window=2)


def _until(predicate, timeout=60.0, step=0.2):
    """Poll until ``predicate()`` is truthy (bounded); return its last value."""
    end = time.monotonic() + timeout
    value = predicate()
    while not value and time.monotonic() < end:
        time.sleep(step)
        value = predicate()
    return value


def _job(server, job_id) -> dict:
    """The job's row as the list endpoint shows it (free text matches a job id exactly)."""
    page = requests.get(server.url("jobdesk/api/jobs"), params={"text": job_id},
                        headers=server.auth, timeout=30).json()
    return next(job for job in page["jobs"] if job["id"] == job_id)


def test_abort_reaches_the_service(server, desk, slow_tap):
    job = desk.submit(slow_tap.url, QUERY + " -- abort me", label="to abort")
    assert _until(lambda: desk.job(job.id).record.get("job_url"))
    answer = requests.post(server.url(f"jobdesk/api/jobs/{job.id}/abort"), headers=server.auth,
                           timeout=30)
    assert answer.status_code == 200, answer.text
    assert answer.json()["job"]["phase"] == "ABORTED"
    # The service's own job document says ABORTED (UWS 1.1 §2.2.3.1: POST PHASE=ABORT).
    service_phase = requests.get(desk.job(job.id).record["job_url"] + "/phase", timeout=30)
    assert service_phase.text.strip() == "ABORTED"


def test_preview_snippet_and_details_of_a_finished_job(server, desk, quick_tap):
    job = desk.submit(quick_tap.url, QUERY, label="seven sources").wait(timeout=60, progress=False)
    preview = requests.get(server.url(f"jobdesk/api/jobs/{job.id}/preview?rows=3"),
                           headers=server.auth, timeout=30)
    assert preview.status_code == 200, preview.text
    body = preview.json()
    assert [c["name"] for c in body["columns"]] == ["orrery_id", "ra", "dec", "mag_lime"]
    assert next(c for c in body["columns"] if c["name"] == "ra")["unit"] == "deg"
    assert len(body["rows"]) == 3 and body["total_rows"] == 7
    assert body["bytes"] == job.record["result_bytes"]

    details = requests.get(server.url(f"jobdesk/api/jobs/{job.id}"), headers=server.auth,
                           timeout=30).json()
    assert details["provenance"], details.get("provenance_missing")
    assert [h["phase"] for h in details["history"]][-1] == "COMPLETED"

    snippet = requests.get(server.url(f"jobdesk/api/jobs/{job.id}/snippet"),
                           headers=server.auth, timeout=30).json()["snippet"]
    run = subprocess.run([sys.executable, "-c", snippet + "\nprint(len(table), table.colnames)"],
                         capture_output=True, text=True, timeout=120,
                         env={**os.environ, "JOBDESK_HOME": str(server.desk_root)})
    assert run.returncode == 0, run.stderr
    assert run.stdout.startswith("7 ['orrery_id', 'ra', 'dec', 'mag_lime']")


def test_poller_finishes_a_job_whose_kernel_died(server, quick_tap):
    # A "kernel" submits and exits without waiting; the server's poller must finish the job.
    code = ("import sys; from jobdesk.desk import Desk; "
            "job = Desk(sys.argv[1]).submit(sys.argv[2], sys.argv[3], label='orphan'); "
            "print(job.id)")
    run = subprocess.run([sys.executable, "-c", code, str(server.desk_root), quick_tap.url,
                          QUERY + " -- orphaned"], capture_output=True, text=True, timeout=120)
    assert run.returncode == 0, run.stderr
    job_id = run.stdout.strip().splitlines()[-1]
    finished = _until(lambda: (_job(server, job_id)["phase"] == "COMPLETED"
                               and _job(server, job_id)["parquet_sha256"]), timeout=90)
    assert finished, _job(server, job_id)
    assert _job(server, job_id)["rows"] == 7


def test_cache_counts_results_once_not_their_files(server, desk, quick_tap):
    before = requests.get(server.url("jobdesk/api/cache"), headers=server.auth, timeout=30).json()
    # A query of its own (a comment alone would be the same cache key as another test's).
    desk.submit(quick_tap.url, QUERY.replace("TOP 7", "TOP 11"), label="counted").wait(
        timeout=60, progress=False)
    after = requests.get(server.url("jobdesk/api/cache"), headers=server.auth, timeout=30).json()
    # One more result: its VOTable and its Parquet copy are two more files, one more result.
    assert after["entries"] - before["entries"] == 2
    assert after["results"] - before["results"] == 1
    assert after["layers"][0]["results"] == after["results"]


def test_quicklook_of_a_finished_job(server, desk, quick_tap):
    import xml.etree.ElementTree as ET

    import numpy as np

    job = desk.submit(quick_tap.url, "SELECT orrery_id, ra, dec, mag_lime FROM orrery.sources "
                      "WHERE dec > 0", label="north").wait(timeout=60, progress=False)
    api = server.url(f"jobdesk/api/jobs/{job.id}/quicklook")
    about = requests.get(api, headers=server.auth, timeout=30)
    assert about.status_code == 200, about.text
    assert about.json()["sky"] == {"ra": "ra", "dec": "dec"}
    assert "mag_lime" in [c["name"] for c in about.json()["numeric"]]
    sky = requests.get(api + "/sky", headers=server.auth, timeout=60)
    assert sky.status_code == 200 and sky.headers["Content-Type"].startswith("image/svg+xml")
    root = ET.fromstring(sky.text)
    title = root.find("{http://www.w3.org/2000/svg}title").text
    assert f"{job.record['rows']:,} sources" in title
    # The axis unit is the service's own FIELD unit (localtap declares ra in deg).
    assert "ra [deg]" in sky.text
    hist = requests.get(api + "/histogram", params={"column": "mag_lime"}, headers=server.auth,
                        timeout=60)
    assert hist.status_code == 200 and "mag_lime [mag]" in hist.text
    # The bars' heights follow numpy.histogram of the same column read through astropy.
    column = job.table()["mag_lime"]
    values = np.ma.filled(np.ma.asarray(column, dtype=float), np.nan)
    counts, _ = np.histogram(values[np.isfinite(values)], bins=60)
    assert f"fullest bin {int(counts.max()):,} rows" in hist.text
    bad = requests.get(api + "/histogram", params={"column": "nope"}, headers=server.auth,
                       timeout=30)
    assert bad.status_code == 409 and "nope" in bad.json()["message"]
    # Cached by checksum: the image file exists under the desk root.
    assert list((server.desk_root / "quicklook").rglob(f"{job.record['parquet_sha256']}-sky-*"))

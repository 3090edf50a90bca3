"""What the independent server (DaCHS) actually does, measured over plain HTTP and pyvo.

These pin the behaviours jobdesk has to cope with (docs/interop.md lists them beside localtap's):
if a DaCHS upgrade changes one, the test says which, and the job manager's assumptions get
re-checked.  They talk to the server directly, never through jobdesk.
"""

from __future__ import annotations

import os
import re
import signal
import time
from xml.etree import ElementTree as ET

import pytest
import pyvo
from astropy.table import Table

from interop_support import SLOW, TABLE, TAP_URL, server_jobs_with

UWS = "{http://www.ivoa.net/xml/UWS/v1.0}"


def create(http, query: str, files=None, **params) -> str:
    r = http.post(f"{TAP_URL}/async", data={"LANG": "ADQL", "QUERY": query, **params},
                  files=files, allow_redirects=False, timeout=30)
    assert r.status_code == 303, r.text[:300]   # UWS 1.1 §2.2.3.1: 303 to the new job
    return r.headers["Location"]


def job_doc(http, job_url: str, **params) -> ET.Element:
    r = http.get(job_url, params=params or None, timeout=60)
    assert r.status_code == 200
    return ET.fromstring(r.content)


def phase_of(doc: ET.Element) -> str:
    return doc.find(f"{UWS}phase").text


def run(http, job_url: str) -> None:
    http.post(f"{job_url}/phase", data={"PHASE": "RUN"}, allow_redirects=False, timeout=30)


def wait_for(http, job_url: str, phases: set[str], limit: int = 60) -> str:
    for _ in range(limit):
        phase = phase_of(job_doc(http, job_url, WAIT="2"))
        if phase in phases:
            return phase
    raise AssertionError(f"{job_url} never reached {phases}")


def query_statuses(body: bytes) -> list[str]:
    """Every QUERY_STATUS INFO value, in document order (DALI 1.1 §4.4: the last one counts)."""
    return re.findall(rb'<INFO name="QUERY_STATUS" value="(\w+)"', body)


# --- job creation ----------------------------------------------------------------------------


def test_creation_ignores_phase_runid_executionduration_and_destruction(http, marker):
    job = create(http, f"SELECT TOP 1 obj_id, '{marker}' AS m FROM {TABLE}", PHASE="RUN",
                 RUNID=marker, EXECUTIONDURATION="17", DESTRUCTION="2031-01-01T00:00:00Z")
    time.sleep(1.5)   # give a (non-)started job time to move; no timing is asserted
    doc = job_doc(http, job)
    assert phase_of(doc) == "PENDING"                      # PHASE=RUN at creation ignored
    assert doc.find(f"{UWS}runId") is None                 # RUNID dropped, not even an empty element
    assert doc.find(f"{UWS}executionDuration").text == "600"   # the server default (gavo.rc)
    assert not doc.find(f"{UWS}destruction").text.startswith("2031")
    assert doc.get("version") == "1.1"                     # UWS 1.1 §3: version attribute present
    assert doc.find(f"{UWS}ownerId").get("{http://www.w3.org/2001/XMLSchema-instance}nil") == "true"
    # ... and the sub-resources do take them afterwards (UWS 1.1 §2.2.3.4, §2.2.3.5)
    http.post(f"{job}/executionduration", data={"EXECUTIONDURATION": "17"}, timeout=30)
    http.post(f"{job}/destruction", data={"DESTRUCTION": "2031-01-01T00:00:00Z"}, timeout=30)
    assert http.get(f"{job}/executionduration", timeout=30).text == "17"
    assert http.get(f"{job}/destruction", timeout=30).text.startswith("2031-01-01")
    http.delete(job, allow_redirects=False, timeout=30)


def test_job_url_is_not_under_the_async_endpoint(http, marker):
    job = create(http, f"SELECT TOP 1 '{marker}' AS m FROM {TABLE}")
    # The Location points at DaCHS's own run path; the async endpoint serves the job as well.
    assert not job.startswith(f"{TAP_URL}/async/")
    job_id = job.rstrip("/").rsplit("/", 1)[1]
    assert phase_of(job_doc(http, f"{TAP_URL}/async/{job_id}")) == "PENDING"
    http.delete(job, allow_redirects=False, timeout=30)


def test_second_run_of_an_executing_job_sends_it_to_error(http, marker):
    job = create(http, f"SELECT TOP 40 obj_id, '{marker}' AS m FROM {SLOW}")
    run(http, job)
    assert wait_for(http, job, {"EXECUTING", "COMPLETED", "ERROR"}) == "EXECUTING"
    run(http, job)   # a blind repeat, as a naive client would send
    phase = wait_for(http, job, {"ERROR", "COMPLETED", "ABORTED"})
    assert phase == "ERROR"
    assert b"No transition from EXECUTING to QUEUED" in http.get(f"{job}/error", timeout=30).content
    http.delete(job, allow_redirects=False, timeout=30)


# --- WAIT (UWS 1.1 §2.2.1.2) -----------------------------------------------------------------


def test_wait_blocks_until_the_phase_changes(http, marker):
    job = create(http, f"SELECT TOP 12 obj_id, '{marker}' AS m FROM {SLOW}")   # ~3 s of rows
    run(http, job)
    assert wait_for(http, job, {"EXECUTING", "COMPLETED"}) == "EXECUTING"
    # Without blocking the answer would be EXECUTING at once; a blocking WAIT answers the change.
    assert phase_of(job_doc(http, job, WAIT="60")) == "COMPLETED"


def test_wait_with_a_phase_that_no_longer_holds_answers_at_once(http, marker):
    job = create(http, f"SELECT TOP 1 '{marker}' AS m FROM {TABLE}")
    # UWS 1.1 §2.2.1.2: with PHASE=X the server returns immediately if the job is not in X.
    # The job stays PENDING, so a blocking answer would also say PENDING: the difference is
    # only visible as time, which we do not assert; we check the answer is the job document.
    doc = job_doc(http, job, WAIT="1", PHASE="EXECUTING")
    assert phase_of(doc) == "PENDING"
    http.delete(job, allow_redirects=False, timeout=30)


def test_non_integer_wait_is_an_error_document_with_status_200(http, marker):
    job = create(http, f"SELECT TOP 1 '{marker}' AS m FROM {TABLE}")
    r = http.get(job, params={"WAIT": "2.5"}, timeout=30)
    assert r.status_code == 200
    assert query_statuses(r.content) == [b"ERROR"]
    assert b"invalid literal for int()" in r.content
    http.delete(job, allow_redirects=False, timeout=30)


# --- results, overflow and errors --------------------------------------------------------------


def test_overflow_is_flagged_when_rows_equal_maxrec(http):
    # DALI 1.1 §4.4.1 asks for OVERFLOW only when rows were cut; DaCHS cannot tell here.
    r = http.post(f"{TAP_URL}/sync", data={"LANG": "ADQL", "RESPONSEFORMAT": "votable/td",
                  "QUERY": f"SELECT obj_id FROM {TABLE} WHERE obj_id <= 5", "MAXREC": "5"},
                  timeout=60)
    assert r.content.count(b"<TR>") == 5
    assert query_statuses(r.content) == [b"OK", b"OVERFLOW"]
    # pyvo, the independent reference client, reads the last status the same way
    result = pyvo.dal.TAPService(TAP_URL).run_sync(
        f"SELECT obj_id FROM {TABLE} WHERE obj_id <= 5", maxrec=5)
    assert len(result) == 5 and result.query_status == "OVERFLOW"


def test_top_above_maxrec_returns_one_row_more_than_maxrec(http):
    r = http.post(f"{TAP_URL}/sync", data={"LANG": "ADQL", "RESPONSEFORMAT": "votable/td",
                  "QUERY": f"SELECT TOP 10 obj_id FROM {TABLE} ORDER BY obj_id", "MAXREC": "5"},
                  timeout=60)
    assert r.content.count(b"<TR>") == 6     # MAXREC + 1, flagged OVERFLOW
    assert query_statuses(r.content)[-1] == b"OVERFLOW"


def test_csv_results_cannot_carry_overflow(http):
    r = http.post(f"{TAP_URL}/sync", data={"LANG": "ADQL", "RESPONSEFORMAT": "csv",
                  "QUERY": f"SELECT obj_id FROM {TABLE}", "MAXREC": "5"}, timeout=60)
    assert r.headers["Content-Type"].startswith("text/csv")
    assert r.text.split() == ["obj_id", "1", "2", "3", "4", "5"]   # TAP 1.1 §2.7.2: no flag


@pytest.mark.parametrize("query, message", [
    ("SELEKT obj_id FROM driftcat.objects",
     "Field query: Could not parse your query: Expected \"SELECT\", found 'S'  (at char 0), (line:1, col:1)"),
    ("SELECT nosuchcol FROM driftcat.objects",
     "Field query: No such field known: column 'nosuchcol' could not be located in table metadata"),
])
def test_query_errors_sync_and_async(http, query, message):
    r = http.post(f"{TAP_URL}/sync", data={"LANG": "ADQL", "QUERY": query}, timeout=60)
    assert r.status_code == 200                      # DALI 1.1 §4.4: error document, HTTP 200
    assert query_statuses(r.content) == [b"ERROR"]
    assert message.encode() in r.content
    with pytest.raises(pyvo.dal.DALQueryError) as err:   # pyvo turns it into its query error
        pyvo.dal.TAPService(TAP_URL).run_sync(query)
    assert message in str(err.value)

    job = create(http, query)                            # accepted at creation ...
    run(http, job)
    assert wait_for(http, job, {"ERROR", "COMPLETED"}) == "ERROR"   # ... fails after RUN
    summary = job_doc(http, job).find(f"{UWS}errorSummary")
    assert summary.get("type") == "fatal" and summary.get("hasDetail") == "false"
    assert summary.find(f"{UWS}message").text == message
    detail = http.get(f"{job}/error", timeout=30)        # yet a detail document is served
    assert query_statuses(detail.content) == [b"ERROR"] and message.encode() in detail.content
    # the result of an ERROR job answers 200 with an error VOTable, not 404
    res = http.get(f"{job}/results/result", timeout=30)
    assert res.status_code == 200 and b"File not found" in res.content
    http.delete(job, allow_redirects=False, timeout=30)


def test_result_of_a_pending_job_is_an_error_document_with_status_200(http, marker):
    job = create(http, f"SELECT TOP 1 '{marker}' AS m FROM {TABLE}")
    res = http.get(f"{job}/results/result", timeout=30)
    assert res.status_code == 200 and query_statuses(res.content) == [b"ERROR"]
    listing = ET.fromstring(http.get(f"{job}/results", timeout=30).content)
    assert list(listing) == []
    http.delete(job, allow_redirects=False, timeout=30)


# --- abort and delete ------------------------------------------------------------------------


def test_aborted_job_lists_a_partial_result_marked_error(http, marker):
    job = create(http, f"SELECT TOP 200 obj_id, '{marker}' AS m FROM {SLOW}")
    run(http, job)
    assert wait_for(http, job, {"EXECUTING"}) == "EXECUTING"
    time.sleep(6.0)   # let the query start streaming rows (process start-up takes seconds)
    http.post(f"{job}/phase", data={"PHASE": "ABORT"}, allow_redirects=False, timeout=30)
    assert wait_for(http, job, {"ABORTED", "ERROR", "COMPLETED"}) == "ABORTED"
    doc = job_doc(http, job)
    assert doc.find(f"{UWS}errorSummary") is None
    hrefs = [r.get("{http://www.w3.org/1999/xlink}href") for r in doc.iter(f"{UWS}result")]
    assert len(hrefs) == 1     # a result is listed although the job was aborted ...
    body = http.get(hrefs[0], timeout=30).content
    # ... and it is either empty or an incomplete table whose last status says ERROR,
    # depending on where the abort caught the writer (both seen here)
    assert body == b"" or query_statuses(body)[-1] == b"ERROR"
    http.delete(job, allow_redirects=False, timeout=30)


def _taprun_pids(job_id: str) -> list[int]:
    """Processes DaCHS runs a TAP job in (``gavo ... taprun -- <job id>``), read from /proc."""
    pids = []
    for entry in os.listdir("/proc"):
        if entry.isdigit():
            try:
                with open(f"/proc/{entry}/cmdline", "rb") as f:
                    args = f.read().split(b"\0")
            except OSError:
                continue
            if b"taprun" in args and job_id.encode() in args:
                pids.append(int(entry))
    return pids


@pytest.mark.skipif(not os.path.isdir("/proc") or os.environ.get("JOBDESK_INTEROP_URL") is not None,
                    reason="looks at the server's processes: needs the server on this machine")
def test_delete_of_an_executing_job_does_not_stop_it(http, marker):
    job = create(http, f"SELECT TOP 60 obj_id, '{marker}' AS m FROM {SLOW}")   # ~15 s of rows
    job_id = job.rstrip("/").rsplit("/", 1)[1]
    run(http, job)
    assert wait_for(http, job, {"EXECUTING"}) == "EXECUTING"
    for _ in range(300):   # the worker shows up a few seconds after the phase says EXECUTING
        if _taprun_pids(job_id):
            break
        time.sleep(0.1)
    assert len(_taprun_pids(job_id)) == 1
    r = http.delete(job, allow_redirects=False, timeout=30)
    assert r.status_code == 303 and r.headers["Location"].endswith("/async")   # UWS 1.1 §2.2.3.3
    assert http.get(job, timeout=30).status_code == 404     # the job is gone from the service ...
    time.sleep(2.0)   # let a kill, if there were one, land; no timing is asserted
    left = _taprun_pids(job_id)
    assert len(left) == 1                                   # ... but its query still runs
    for pid in left:   # clean up behind the server: we started that job
        try:
            os.kill(pid, signal.SIGTERM)
        except OSError:
            pass


# --- job list (UWS 1.1 §2.2.2.1) -------------------------------------------------------------


def test_job_list_filters_and_bare_entries(http, marker):
    jobs = [create(http, f"SELECT TOP 1 '{marker}-{i}' AS m FROM {TABLE}") for i in range(3)]
    listing = http.get(f"{TAP_URL}/async", params={"LAST": "2"}, timeout=30)
    refs = ET.fromstring(listing.content).findall(f"{UWS}jobref")
    assert len(refs) == 2
    # entries carry id, href and phase only: no runId, no creationTime, no ownerId
    assert {child.tag for ref in refs for child in ref} == {f"{UWS}phase"}
    pending = http.get(f"{TAP_URL}/async", params={"PHASE": "PENDING"}, timeout=30)
    assert {r.get("id") for r in ET.fromstring(pending.content)} >= {j.rsplit("/", 1)[1] for j in jobs}
    future = http.get(f"{TAP_URL}/async", params={"AFTER": "2100-01-01T00:00:00Z"}, timeout=30)
    assert ET.fromstring(future.content).findall(f"{UWS}jobref") == []
    assert sorted(server_jobs_with(http, marker)) == sorted(jobs)
    for job in jobs:
        http.delete(job, allow_redirects=False, timeout=30)


# --- uploads and capabilities ------------------------------------------------------------------


def test_upload_join_sync_and_async_with_pyvo():
    probe = Table({"obj_id": [3, 7, 11, 99999], "tag": ["p", "q", "r", "s"]})
    query = ("SELECT u.tag, o.obj_id, o.mag_blue FROM TAP_UPLOAD.probe AS u "
             f"JOIN {TABLE} AS o ON o.obj_id = u.obj_id ORDER BY o.obj_id")
    service = pyvo.dal.TAPService(TAP_URL)
    sync = service.run_sync(query, uploads={"probe": probe}).to_table()
    assert list(sync["obj_id"]) == [3, 7, 11] and list(sync["tag"]) == ["p", "q", "r"]
    job = service.submit_job(query, uploads={"probe": probe})
    try:
        job.run()
        job.wait(timeout=60)
        assert job.phase == "COMPLETED"
        table = job.fetch_result().to_table()
        assert list(table["obj_id"]) == [3, 7, 11]
    finally:
        job.delete()


def test_capabilities_describe_tap_1_1_but_not_the_software(http):
    caps = pyvo.dal.TAPService(TAP_URL).capabilities
    tap = [c for c in caps if c.standardid and c.standardid.lower().startswith("ivo://ivoa.net/std/tap")]
    assert len(tap) == 1
    assert [i.version for i in tap[0].interfaces] == ["1.1"]
    raw = http.get(f"{TAP_URL}/capabilities", timeout=30)
    assert b"<retentionPeriod><default>172800</default></retentionPeriod>" in raw.content
    assert b'<outputLimit><default unit="row">20000</default>' in raw.content
    assert b"DaCHS" not in raw.content           # no software identity in VOSI capabilities ...
    assert raw.headers["Server"].startswith("DaCHS/2.7")   # ... only in the HTTP Server header

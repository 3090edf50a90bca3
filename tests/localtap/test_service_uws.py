"""UWS 1.1 behaviour of the job resources, over real HTTP against a real job store."""

from __future__ import annotations

import threading
import time
from datetime import datetime, timedelta, timezone
from pathlib import Path

from lxml import etree

UWS = "{http://www.ivoa.net/xml/UWS/v1.0}"
XSI_NIL = "{http://www.w3.org/2001/XMLSchema-instance}nil"
SCHEMAS = Path(__file__).parent / "schemas"
QUERY = "SELECT TOP 5 orrery_id, ra, dec FROM orrery.sources"


class _LocalXlink(etree.Resolver):
    def resolve(self, url, pubid, context):
        if "xlink" in url.lower():
            return self.resolve_filename(str(SCHEMAS / "xlink-minimal.xsd"), context)
        return None


def _uws_schema() -> etree.XMLSchema:
    parser = etree.XMLParser()
    parser.resolvers.add(_LocalXlink())
    return etree.XMLSchema(etree.parse(str(SCHEMAS / "UWS-1.1-PR-20151116.xsd"), parser))


SCHEMA = _uws_schema()


def validate(document: bytes) -> etree._Element:
    """Validate against the saved UWS 1.1 PR schema; creationTime (REC addition, see the schema
    file's comment) is checked for form and then removed before validation."""
    root = etree.fromstring(document)
    for element in root.iter(f"{UWS}creationTime"):
        datetime.fromisoformat(element.text.replace("Z", "+00:00"))
        element.getparent().remove(element)
    SCHEMA.assertValid(root)
    return etree.fromstring(document)


def create(http, base, **params):
    data = {"LANG": "ADQL", "QUERY": QUERY, **params}
    response = http.post(f"{base}/async", data=data, allow_redirects=False)
    assert response.status_code == 303   # UWS 1.1 §2.2.3.1: creation answers 303 + Location
    return response.headers["Location"]


def phase(http, job_url) -> str:
    return http.get(f"{job_url}/phase").text


def run_and_wait(http, job_url, timeout=30):
    http.post(f"{job_url}/phase", data={"PHASE": "RUN"})
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        doc = etree.fromstring(http.get(job_url, params={"WAIT": "5"}).content)
        if doc.findtext(f"{UWS}phase") not in ("PENDING", "QUEUED", "EXECUTING"):
            return doc
    raise AssertionError("job did not finish")


def test_job_document_validates_in_every_phase(shared_tap, http):
    job_url = create(http, shared_tap.url, RUNID="schema-check")
    pending = validate(http.get(job_url).content)
    assert pending.get("version") == "1.1"          # UWS 1.1 §2.2: version attribute
    assert pending.findtext(f"{UWS}phase") == "PENDING"
    assert pending.findtext(f"{UWS}runId") == "schema-check"
    assert pending.find(f"{UWS}ownerId").get(XSI_NIL) == "true"
    assert pending.find(f"{UWS}creationTime") is not None
    params = {p.get("id"): p.text for p in pending.iter(f"{UWS}parameter")}
    assert params["query"] == QUERY and params["lang"] == "ADQL"

    done = run_and_wait(http, job_url)
    validate(etree.tostring(done))
    assert done.findtext(f"{UWS}phase") == "COMPLETED"
    result = done.find(f"{UWS}results/{UWS}result")
    assert result.get("id") == "result"   # TAP 1.1 §2.2: the result is named "result"
    href = result.get("{http://www.w3.org/1999/xlink}href")
    body = http.get(href)
    assert int(result.get("size")) == len(body.content) == int(body.headers["Content-Length"])
    validate(http.get(f"{job_url}/results").content)
    validate(http.get(f"{job_url}/parameters").content)


def test_error_job_has_summary_and_error_document(shared_tap, http):
    job_url = create(http, shared_tap.url, QUERY="SELEKT 1")
    doc = run_and_wait(http, job_url)
    validate(etree.tostring(doc))
    assert doc.findtext(f"{UWS}phase") == "ERROR"
    summary = doc.find(f"{UWS}errorSummary")
    # UWS 1.1 §2.2.3: errorSummary type transient|fatal, hasDetail, message
    assert summary.get("type") == "fatal" and summary.get("hasDetail") == "true"
    assert "line 1" in summary.findtext(f"{UWS}message")
    error = http.get(f"{job_url}/error")
    assert b'value="ERROR"' in error.content and b"line 1" in error.content


def test_job_list_filters(tap_factory, http):
    tap = tap_factory()
    first = create(http, tap.url, RUNID="a")
    time.sleep(0.01)
    marker = datetime.now(timezone.utc)
    time.sleep(0.01)
    second = create(http, tap.url, RUNID="b")
    run_and_wait(http, second)

    def ids(**params):
        root = validate(http.get(f"{tap.url}/async", params=params).content)
        assert root.get("version") == "1.1"
        return [ref.get("id") for ref in root.iter(f"{UWS}jobref")]

    first_id, second_id = first.rsplit("/", 1)[1], second.rsplit("/", 1)[1]
    assert ids() == [first_id, second_id]
    # UWS 1.1 §2.2.2.1: PHASE (repeatable), AFTER (ISO 8601), LAST (newest first)
    assert ids(PHASE="PENDING") == [first_id]
    assert ids(PHASE=["PENDING", "COMPLETED"]) == [first_id, second_id]
    assert ids(AFTER=marker.strftime("%Y-%m-%dT%H:%M:%S.%fZ")) == [second_id]
    assert ids(LAST="1") == [second_id]
    assert ids(last="2") == [second_id, first_id]   # DALI 1.1 §3.1: names case-insensitive
    root = etree.fromstring(http.get(f"{tap.url}/async").content)
    entry = root.find(f"{UWS}jobref")
    assert entry.findtext(f"{UWS}runId") == "a" and entry.find(f"{UWS}creationTime") is not None
    assert http.get(f"{tap.url}/async", params={"LAST": "x"}).status_code == 400


def test_wait_blocks_until_the_phase_changes(tap_factory, http):
    tap = tap_factory(exec_delay=30)
    job_url = create(http, tap.url)
    http.post(f"{job_url}/phase", data={"PHASE": "RUN"})
    got = {}

    def waiter():
        doc = etree.fromstring(http.get(job_url, params={"WAIT": "-1"}).content)
        got["phase"] = doc.findtext(f"{UWS}phase")

    # wait until EXECUTING, then a WAIT=-1 must still be blocked when we abort
    for _ in range(200):
        if phase(http, job_url) == "EXECUTING":
            break
        time.sleep(0.02)
    thread = threading.Thread(target=waiter)
    thread.start()
    for _ in range(200):   # the waiter is registered when the server has counted its WAIT
        if tap.stats()["wait_requests"] >= 1:
            break
        time.sleep(0.02)
    assert thread.is_alive()   # UWS 1.1 §2.2.1.2: blocks while EXECUTING
    http.post(f"{job_url}/phase", data={"PHASE": "ABORT"})
    thread.join(20)
    assert not thread.is_alive() and got["phase"] == "ABORTED"   # returns on the change


def test_wait_with_phase_returns_at_once_when_phase_differs(tap_factory, http):
    tap = tap_factory(exec_delay=30)
    job_url = create(http, tap.url)
    # PENDING is not QUEUED: UWS 1.1 §2.2.1.2 says return immediately
    doc = etree.fromstring(http.get(job_url, params={"WAIT": "30", "PHASE": "QUEUED"}).content)
    assert doc.findtext(f"{UWS}phase") == "PENDING"
    # a finished job never blocks
    http.post(f"{job_url}/phase", data={"PHASE": "ABORT"})
    doc = etree.fromstring(http.get(job_url, params={"WAIT": "-1"}).content)
    assert doc.findtext(f"{UWS}phase") == "ABORTED"
    # WAIT must be an integer
    assert http.get(job_url, params={"WAIT": "soon"}).status_code == 400


def test_wait_times_out_with_the_unchanged_document(tap_factory, http):
    tap = tap_factory(exec_delay=30, max_wait=1)
    job_url = create(http, tap.url, PHASE="RUN")   # PHASE=RUN at creation queues the job
    for _ in range(200):
        if phase(http, job_url) == "EXECUTING":
            break
        time.sleep(0.02)
    doc = etree.fromstring(http.get(job_url, params={"WAIT": "-1"}).content)  # capped by max_wait
    assert doc.findtext(f"{UWS}phase") == "EXECUTING"
    http.post(f"{job_url}/phase", data={"PHASE": "ABORT"})


def test_delete_answers_303_to_the_job_list(shared_tap, http):
    job_url = create(http, shared_tap.url)
    response = http.delete(job_url, allow_redirects=False)
    assert response.status_code == 303   # UWS 1.1 §2.2.3.2
    assert response.headers["Location"] == f"{shared_tap.url}/async"
    assert http.get(job_url).status_code == 404
    other = create(http, shared_tap.url)
    response = http.post(other, data={"ACTION": "DELETE"}, allow_redirects=False)
    assert response.status_code == 303 and http.get(other).status_code == 404


def test_settable_sub_resources(shared_tap, http):
    job_url = create(http, shared_tap.url)
    when = (datetime.now(timezone.utc) + timedelta(hours=2)).replace(microsecond=0)
    stamp = when.strftime("%Y-%m-%dT%H:%M:%SZ")
    assert http.post(f"{job_url}/destruction", data={"DESTRUCTION": stamp},
                     allow_redirects=False).status_code == 303
    assert http.get(f"{job_url}/destruction").text.startswith(stamp[:-1])
    http.post(f"{job_url}/executionduration", data={"EXECUTIONDURATION": "42"})
    assert http.get(f"{job_url}/executionduration").text == "42"
    http.post(f"{job_url}/runId", data={"RUNID": "renamed"})
    assert http.get(f"{job_url}/runId").text == "renamed"
    assert http.get(f"{job_url}/quote").status_code == 200
    assert http.get(f"{job_url}/owner").text == ""
    assert http.post(f"{job_url}/phase", data={"PHASE": "FLY"}).status_code == 400
    assert http.post(f"{job_url}/executionduration",
                     data={"EXECUTIONDURATION": "-1"}).status_code == 400


def test_execution_duration_is_enforced(tap_factory, http):
    tap = tap_factory(exec_delay=30)
    job_url = create(http, tap.url)
    http.post(f"{job_url}/executionduration", data={"EXECUTIONDURATION": "1"})
    doc = run_and_wait(http, job_url)
    assert doc.findtext(f"{UWS}phase") == "ERROR"
    assert "execution time limit" in doc.findtext(f"{UWS}errorSummary/{UWS}message")


def test_abort_stops_queued_and_executing_jobs(tap_factory, http):
    tap = tap_factory(exec_delay=30, max_running=1)
    running = create(http, tap.url, PHASE="RUN")
    queued = create(http, tap.url, PHASE="RUN")
    for _ in range(200):
        if phase(http, running) == "EXECUTING":
            break
        time.sleep(0.02)
    assert phase(http, queued) == "QUEUED"   # --max-running 1 keeps the second one queued
    for job_url in (queued, running):
        http.post(f"{job_url}/phase", data={"PHASE": "ABORT"})
        assert phase(http, job_url) == "ABORTED"
    assert not (tap.state / "jobs" / running.rsplit("/", 1)[1] / "result.xml").exists()


def test_parameter_names_are_case_insensitive(shared_tap, http):
    # DALI 1.1 §3.1: names case-insensitive, values case-sensitive, unknown ones ignored
    job_url = create(http, shared_tap.url, **{"lang": "ADQL", "Query": QUERY, "FoO": "bar"})
    doc = run_and_wait(http, job_url)
    assert doc.findtext(f"{UWS}phase") == "COMPLETED"
    response = http.get(f"{shared_tap.url}/sync",
                        params={"lAnG": "ADQL", "qUeRy": QUERY, "rEsPoNsEfOrMaT": "csv"})
    assert response.text.splitlines()[0] == "orrery_id,ra,dec"


def test_result_download_supports_ranges(shared_tap, http):
    job_url = create(http, shared_tap.url)
    run_and_wait(http, job_url)
    url = f"{job_url}/results/result"
    whole = http.get(url).content
    part = http.get(url, headers={"Range": "bytes=100-"})
    assert part.status_code == 206   # RFC 9110 §14.4: Content-Range on 206
    assert part.headers["Content-Range"] == f"bytes 100-{len(whole) - 1}/{len(whole)}"
    assert part.content == whole[100:]
    tail = http.get(url, headers={"Range": "bytes=-10"})
    assert tail.content == whole[-10:]
    assert http.get(url, headers={"Range": f"bytes={len(whole)}-"}).status_code == 416


def test_destruction_sweep_removes_job_and_result(tmp_path, tap_factory, http):
    state = tmp_path / "state"
    tap = tap_factory(state, destruction=1, sweep_interval=0.1)
    job_url = create(http, tap.url)
    job_id = job_url.rsplit("/", 1)[1]
    assert (state / "jobs" / job_id).is_dir()
    deadline = time.monotonic() + 20
    while http.get(job_url).status_code != 404 and time.monotonic() < deadline:
        time.sleep(0.1)
    assert http.get(job_url).status_code == 404
    assert not (state / "jobs" / job_id).exists()
    assert tap.stats()["jobs_destroyed"] >= 1


def test_jobs_and_results_survive_a_restart(tmp_path, tap_factory, http):
    state = tmp_path / "state"
    tap = tap_factory(state)
    done_url = create(http, tap.url, RUNID="keep")
    run_and_wait(http, done_url)
    before = http.get(f"{done_url}/results/result").content
    done_path = done_url.split("/tap", 1)[1]
    tap.stop()
    again = tap_factory(state)
    done_url = again.url + done_path
    doc = etree.fromstring(http.get(done_url).content)
    assert doc.findtext(f"{UWS}phase") == "COMPLETED" and doc.findtext(f"{UWS}runId") == "keep"
    assert http.get(f"{done_url}/results/result").content == before


def test_executing_job_is_marked_error_after_a_restart(tmp_path, tap_factory, http):
    state = tmp_path / "state"
    tap = tap_factory(state, exec_delay=60)
    job_url = create(http, tap.url, PHASE="RUN")
    for _ in range(200):
        if phase(http, job_url) == "EXECUTING":
            break
        time.sleep(0.02)
    path = job_url.split("/tap", 1)[1]
    tap.stop()
    again = tap_factory(state)
    doc = etree.fromstring(http.get(again.url + path).content)
    assert doc.findtext(f"{UWS}phase") == "ERROR"
    assert "restarted" in doc.findtext(f"{UWS}errorSummary/{UWS}message")

"""Fault settings that imitate other servers' legal (or common) behaviours, each against the
default behaviour it replaces.  docs/localtap.md ("Imitating other servers") lists them; the
server behaviours were measured on DaCHS 2.7 (docs/interop.md)."""

from __future__ import annotations

import threading
import time

import pytest
from lxml import etree

from jobdesk.localtap import command_line
from jobdesk.localtap.__main__ import build_parser
from jobdesk.localtap.faults import FAULT_NAMES, LIKE_DACHS, FaultSettings

from test_service_uws import UWS, create, phase, run_and_wait, validate

VOT = "{http://www.ivoa.net/xml/VOTable/v1.3}"
TOP = "SELECT TOP {n} orrery_id FROM orrery.sources ORDER BY orrery_id"
ACTIVE = ("PENDING", "QUEUED", "EXECUTING")


def query_statuses(body: bytes) -> tuple[list[str], int]:
    """Values of every QUERY_STATUS INFO in document order, and the number of rows (TABLEDATA)."""
    root = etree.fromstring(body)
    statuses = [e.get("value") for e in root.iter() if isinstance(e.tag, str)
                and e.tag.endswith("INFO") and e.get("name") == "QUERY_STATUS"]
    rows = sum(1 for e in root.iter() if isinstance(e.tag, str) and e.tag.endswith("}TR"))
    return statuses, rows


def sync(http, base, query, **params):
    return http.post(f"{base}/sync", data={"LANG": "ADQL", "QUERY": query, **params})


def until(predicate, timeout=30.0):
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        value = predicate()
        if value:
            return value
        time.sleep(0.05)
    raise AssertionError("condition not reached")


def executing(http, job_url):
    http.post(f"{job_url}/phase", data={"PHASE": "RUN"})
    until(lambda: phase(http, job_url) == "EXECUTING")


# --- the setting list itself --------------------------------------------------------------------


def test_every_setting_has_a_command_line_flag_and_the_profile_uses_known_names():
    defaults = FaultSettings()
    parser = build_parser()
    for name in FAULT_NAMES:
        value = getattr(defaults, name)
        probe = (not value) if isinstance(value, bool) else (7 if value is None else value + 1)
        args = parser.parse_args(command_line(state="s", rows=1, port=0, **{name: probe})[3:])
        assert getattr(args, name) == probe, name
    assert set(LIKE_DACHS) <= set(FAULT_NAMES)


# --- overflow ------------------------------------------------------------------------------------


def test_overflow_only_when_rows_were_cut_unless_overflow_at_maxrec(tap_factory, http):
    tap = tap_factory()
    # DALI 1.1 §4.4.1: OVERFLOW after the table means rows were cut; the last status counts.
    assert query_statuses(sync(http, tap.url, TOP.format(n=5), MAXREC="5").content) == (["OK"], 5)
    assert query_statuses(sync(http, tap.url, TOP.format(n=6), MAXREC="5").content) \
        == (["OK", "OVERFLOW"], 5)
    tap.configure(overflow_at_maxrec=True)
    assert query_statuses(sync(http, tap.url, TOP.format(n=5), MAXREC="5").content) \
        == (["OK", "OVERFLOW"], 5)
    assert query_statuses(sync(http, tap.url, TOP.format(n=4), MAXREC="5").content) == (["OK"], 4)
    job_url = create(http, tap.url, QUERY=TOP.format(n=3), MAXREC="3")
    assert run_and_wait(http, job_url).findtext(f"{UWS}phase") == "COMPLETED"
    assert query_statuses(http.get(f"{job_url}/results/result").content) == (["OK", "OVERFLOW"], 3)
    assert tap.stats()["jobs"][-1]["overflow"] is True


# --- job creation and RUNID -----------------------------------------------------------------------


def test_ignore_runid_drops_it_everywhere(tap_factory, http):
    tap = tap_factory()
    kept = create(http, tap.url, RUNID="keep-me-41")
    assert validate(http.get(kept).content).findtext(f"{UWS}runId") == "keep-me-41"
    tap.configure(ignore_runid=True)
    job_url = create(http, tap.url, RUNID="drop-me-42")
    doc = validate(http.get(job_url).content)
    assert doc.find(f"{UWS}runId") is None          # UWS 1.1 §2.1.5: runId is optional
    assert http.get(f"{job_url}/runId").text == ""
    answer = http.post(f"{job_url}/runId", data={"RUNID": "later-43"}, allow_redirects=False)
    assert answer.status_code == 303                 # accepted as usual, then forgotten
    assert http.get(job_url).content.count(b"runId") == 0
    listing = etree.fromstring(http.get(f"{tap.url}/async").content)
    assert not list(listing.iter(f"{UWS}runId"))


def test_settings_in_the_creating_post_are_used_or_ignored(tap_factory, http):
    tap = tap_factory(exec_delay=30)
    when = "2099-01-02T03:04:05.000Z"
    job_url = create(http, tap.url, PHASE="RUN", EXECUTIONDURATION="42", DESTRUCTION=when)
    doc = validate(http.get(job_url).content)
    # UWS 1.1 §2.2.3.1: PHASE=RUN at creation queues the job; the settings apply to it.
    assert doc.findtext(f"{UWS}phase") in ("QUEUED", "EXECUTING")
    assert doc.findtext(f"{UWS}executionDuration") == "42"
    assert doc.findtext(f"{UWS}destruction") == when
    assert doc.find(f"{UWS}parameters/{UWS}parameter[@id='executionduration']") is None
    http.post(f"{job_url}/phase", data={"PHASE": "ABORT"})
    tap.configure(ignore_run_at_creation=True)
    job_url = create(http, tap.url, PHASE="RUN", EXECUTIONDURATION="42", DESTRUCTION=when)
    # WAIT with PHASE=PENDING returns at once if the job has left PENDING (UWS 1.1 §2.2.1.2).
    doc = validate(http.get(job_url, params={"WAIT": "1", "PHASE": "PENDING"}).content)
    assert doc.findtext(f"{UWS}phase") == "PENDING"
    assert doc.findtext(f"{UWS}executionDuration") == "600"
    assert doc.findtext(f"{UWS}destruction") != when


def test_second_run_errors_sends_an_executing_job_to_error(tap_factory, http):
    tap = tap_factory(exec_delay=30)
    calm = create(http, tap.url)
    executing(http, calm)
    http.post(f"{calm}/phase", data={"PHASE": "RUN"})
    assert phase(http, calm) == "EXECUTING"          # default: a repeated RUN changes nothing
    tap.configure(second_run_errors=True)
    job_url = create(http, tap.url)
    executing(http, job_url)
    assert http.post(f"{job_url}/phase", data={"PHASE": "RUN"}, allow_redirects=False) \
        .status_code == 303
    doc = validate(http.get(job_url).content)
    assert doc.findtext(f"{UWS}phase") == "ERROR"
    assert "EXECUTING" in doc.findtext(f"{UWS}errorSummary/{UWS}message")
    job_id = job_url.rsplit("/", 1)[1]
    until(lambda: job_id not in tap.stats()["running"])   # its worker was stopped
    http.post(f"{calm}/phase", data={"PHASE": "ABORT"})


# --- error answers ------------------------------------------------------------------------------


def test_sync_errors_200_keeps_the_error_document(tap_factory, http):
    tap = tap_factory()
    bad = "SELECT no_such_col_q FROM orrery.sources"
    plain = sync(http, tap.url, bad)
    assert plain.status_code == 400
    tap.configure(sync_errors_200=True)
    answer = sync(http, tap.url, bad)
    assert answer.status_code == 200
    assert query_statuses(answer.content)[0] == ["ERROR"]   # DALI 1.1 §4.4
    assert "no_such_col_q" in answer.text and answer.text == plain.text


def test_error_body_200_for_missing_results_and_errors(tap_factory, http):
    tap = tap_factory()
    job_url = create(http, tap.url)
    assert http.get(f"{job_url}/results/result").status_code == 404
    assert http.get(f"{job_url}/error").status_code == 404
    tap.configure(error_body_200=True)
    result = http.get(f"{job_url}/results/result")
    assert result.status_code == 200
    assert query_statuses(result.content)[0] == ["ERROR"]
    error = http.get(f"{job_url}/error")
    assert (error.status_code, error.content) == (200, b"")
    assert etree.fromstring(http.get(f"{job_url}/results").content).find(f"{UWS}result") is None


def test_has_detail_false_still_serves_the_detail(tap_factory, http):
    tap = tap_factory(has_detail_false=True)
    job_url = create(http, tap.url, QUERY="SELECT nope_col_z FROM orrery.sources")
    doc = run_and_wait(http, job_url)
    validate(etree.tostring(doc))
    summary = doc.find(f"{UWS}errorSummary")
    assert summary.get("hasDetail") == "false"
    detail = http.get(f"{job_url}/error")
    assert detail.status_code == 200
    assert query_statuses(detail.content)[0] == ["ERROR"]
    assert "nope_col_z" in detail.text


# --- job list and WAIT ----------------------------------------------------------------------------


def test_sparse_job_list_entries_carry_the_phase_only(tap_factory, http):
    tap = tap_factory()
    create(http, tap.url, RUNID="listed-7")
    full = validate(http.get(f"{tap.url}/async").content)
    assert {_local(c.tag) for c in full.find(f"{UWS}jobref")} >= {"phase", "runId", "creationTime"}
    tap.configure(sparse_job_list=True)
    sparse = validate(http.get(f"{tap.url}/async").content)
    refs = sparse.findall(f"{UWS}jobref")
    assert refs and all([_local(c.tag) for c in ref] == ["phase"] for ref in refs)
    assert all(ref.get("id") and ref.get("{http://www.w3.org/1999/xlink}href") for ref in refs)


def test_wait_granularity_checks_on_a_schedule(tap_factory, http):
    tap = tap_factory()
    job_url = create(http, tap.url)
    before = tap.stats()["wait_checks"]
    assert validate(http.get(job_url, params={"WAIT": "2"}).content).findtext(f"{UWS}phase") \
        == "PENDING"
    assert tap.stats()["wait_checks"] - before == 1      # event driven: one look, at the end
    tap.configure(wait_granularity=0.5)
    before = tap.stats()["wait_checks"]
    assert validate(http.get(job_url, params={"WAIT": "2"}).content).findtext(f"{UWS}phase") \
        == "PENDING"
    assert tap.stats()["wait_checks"] - before >= 3      # a look every 0.5 s over 2 s
    answers = []
    waiter = threading.Thread(target=lambda: answers.append(
        http.get(job_url, params={"WAIT": "30"}).content))
    waiter.start()
    until(lambda: tap.stats()["wait_requests"] >= 3)
    http.post(f"{job_url}/phase", data={"PHASE": "RUN"})
    waiter.join(60)
    assert etree.fromstring(answers[0]).findtext(f"{UWS}phase") != "PENDING"


# --- DELETE and ABORT -------------------------------------------------------------------------


def test_delete_keeps_running_forgets_the_job_but_not_its_worker(tap_factory, http):
    tap = tap_factory(exec_delay=2, delete_keeps_running=True)
    job_url = create(http, tap.url)
    executing(http, job_url)
    job_id = job_url.rsplit("/", 1)[1]
    assert http.delete(job_url, allow_redirects=False).status_code == 303  # UWS 1.1 §2.2.3.3
    assert http.get(job_url).status_code == 404
    assert job_id in tap.stats()["running"]               # the worker was not stopped
    until(lambda: job_id not in tap.stats()["running"])   # ... and ends on its own
    assert http.get(job_url).status_code == 404


def test_delete_stops_an_executing_job_by_default(tap_factory, http):
    tap = tap_factory(exec_delay=30)
    job_url = create(http, tap.url)
    executing(http, job_url)
    job_id = job_url.rsplit("/", 1)[1]
    http.delete(job_url, allow_redirects=False)
    until(lambda: job_id not in tap.stats()["running"], timeout=10)


def test_aborted_lists_result_leaves_a_result_that_is_no_table(tap_factory, http):
    tap = tap_factory(exec_delay=30)
    quiet = create(http, tap.url)
    executing(http, quiet)
    http.post(f"{quiet}/phase", data={"PHASE": "ABORT"})
    assert validate(http.get(quiet).content).find(f"{UWS}results/{UWS}result") is None
    tap.configure(aborted_lists_result=True)
    job_url = create(http, tap.url)
    executing(http, job_url)
    http.post(f"{job_url}/phase", data={"PHASE": "ABORT"})
    doc = validate(http.get(job_url).content)
    assert doc.findtext(f"{UWS}phase") == "ABORTED"
    listed = doc.find(f"{UWS}results/{UWS}result")
    assert listed is not None and listed.get("id") == "result"
    body = http.get(listed.get("{http://www.w3.org/1999/xlink}href"))
    assert body.status_code == 200
    assert query_statuses(body.content) == (["ERROR"], 0)


def _local(tag) -> str:
    return tag.rsplit("}", 1)[-1]


@pytest.mark.parametrize("name", sorted(LIKE_DACHS))
def test_profile_settings_round_trip_through_the_faults_endpoint(tap_factory, name):
    tap = tap_factory()
    assert tap.configure(**{name: LIKE_DACHS[name]})[name] == LIKE_DACHS[name]

"""jobdesk.remote against the embedded TAP service over real HTTP, with its fault settings.

Nothing here is mocked: every test talks HTTP to a ``jobdesk.localtap`` server on a free
loopback port.  Where a test needs to see the requests themselves it adds a response hook to a
real ``requests.Session``; where it needs an answer to go missing it mounts a transport adapter
that really sends the request and then drops the answer (the way a broken connection would).
"""

from __future__ import annotations

import hashlib
import io
import socket
import threading
import traceback
from datetime import UTC, datetime, timedelta
from email.utils import format_datetime
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from urllib.parse import parse_qs, urlsplit

import pytest

import jobdesk
import requests
from astropy.io import votable
from astropy.table import Table
from requests.adapters import HTTPAdapter

from jobdesk import remote as remote_mod
from jobdesk.errors import (
    BadServiceURL,
    JobFailed,
    JobLost,
    ServiceRefused,
    ServiceResponseInvalid,
    ServiceUnreachable,
    UploadInvalid,
)
from jobdesk.localtap import serve
from jobdesk.localtap.faults import LIKE_DACHS
from jobdesk.remote import Remote

TABLE = "orrery.sources"   # the invented catalogue localtap generates
QUERY = f"SELECT TOP 50 * FROM {TABLE}"
SECRET = "tok-3f9a1c77e2b54d0d"  # an invented bearer token


# --- fixtures ----------------------------------------------------------------------------------


@pytest.fixture
def tap():
    with serve(rows=500) as service:
        yield service


class Recorder:
    """Keeps (method, path, query) of every answer a session receives: a real response hook."""

    def __init__(self, session: requests.Session):
        self.seen: list[tuple[str, str, dict]] = []
        session.hooks["response"].append(self._hook)

    def _hook(self, response, *args, **kwargs):
        parts = urlsplit(response.request.url)
        self.seen.append((response.request.method, parts.path, parse_qs(parts.query)))

    def count(self, method: str | None = None, suffix: str | None = None, param: str | None = None):
        return sum(1 for m, path, query in self.seen
                   if (method is None or m == method) and (suffix is None or path.endswith(suffix))
                   and (param is None or param in query))


def make_remote(tap, session=None, **kw) -> Remote:
    kw.setdefault("attempts", 3)
    kw.setdefault("max_backoff", 0.05)  # keep retry pauses short in tests
    kw.setdefault("timeout", 15.0)
    return Remote(tap.url, session, **kw)


def run_to_end(remote: Remote, adql: str = QUERY, **kw):
    job = remote.create(adql, **kw)
    remote.run(job)
    return job, remote.wait(job, deadline=_deadline(60))


def _deadline(seconds: float) -> float:
    import time
    return time.monotonic() + seconds


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _serving(handler: type[BaseHTTPRequestHandler]):
    """A fixture's body: serve ``handler`` on a free loopback port, yield its /tap URL, stop."""
    server = ThreadingHTTPServer(("127.0.0.1", 0), handler)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    yield f"http://127.0.0.1:{server.server_address[1]}/tap"
    server.shutdown()
    server.server_close()


def _iso(moment: datetime) -> str:
    return moment.astimezone(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


# --- the job's life ------------------------------------------------------------------------------


def test_create_run_wait_and_download_a_result(tap, tmp_path):
    remote = make_remote(tap)
    job = remote.create(QUERY, maxrec=40, run_id="life-1")
    assert job.startswith(tap.url + "/async/")
    first = remote.status(job)
    assert first.phase == "PENDING"            # UWS 1.1 §2.1.3: created, not yet run
    assert first.uws_version == "1.1"          # UWS 1.1 §2.2.1: version attribute on <job>
    assert first.run_id == "life-1"
    assert first.parameters["QUERY"] == QUERY  # TAP 1.1 §2.3: parameters echoed in the job
    assert first.parameters["MAXREC"] == "40"

    remote.run(job)
    seen: list[str] = []
    final = remote.wait(job, deadline=_deadline(60), on_status=lambda s: seen.append(s.phase))
    assert final.phase == "COMPLETED"
    assert seen and seen[-1] == "COMPLETED"
    assert final.result_url
    assert final.creation_time and final.end_time

    got = remote.download(final.result_url, tmp_path / "r.vot")
    body = got.path.read_bytes()
    assert got.bytes == len(body) > 0
    assert got.sha256 == hashlib.sha256(body).hexdigest()
    assert got.content_type and "votable" in got.content_type.lower()
    table = Table.read(io.BytesIO(body), format="votable")
    assert len(table) == 40                    # MAXREC honoured (TAP 1.1 §2.3.6)


def test_uploads_go_as_multipart_parts_and_can_be_queried(tap, tmp_path):
    mine = Table({"ident": [3, 1, 4, 1, 5], "weight": [0.5, 1.5, 2.5, 3.5, 4.5]})
    buffer = io.BytesIO()
    votable.from_table(mine).to_xml(buffer)
    remote = make_remote(tap)
    job, final = run_to_end(remote, "SELECT ident, weight FROM TAP_UPLOAD.mine ORDER BY weight",
                            uploads={"mine": buffer.getvalue()})
    assert final.phase == "COMPLETED", final.error_summary
    table = Table.read(remote.download(final.result_url, tmp_path / "u.vot").path,
                       format="votable")
    assert list(table["ident"]) == [3, 1, 4, 1, 5]


def test_upload_names_must_be_adql_identifiers(tap):
    remote = make_remote(tap)
    with pytest.raises(UploadInvalid):
        remote.create(QUERY, uploads={"two words": b"<VOTABLE/>"})
    assert remote.requests == 0


def test_requests_per_job_with_blocking_wait(tap, tmp_path):
    tap.configure(exec_delay=2.0)
    session = requests.Session()
    seen = Recorder(session)
    remote = make_remote(tap, session)
    job, final = run_to_end(remote)
    remote.download(final.result_url, tmp_path / "r.vot")
    assert final.phase == "COMPLETED"
    statuses = seen.count("GET", param=None) - 1  # every GET but the result
    # UWS 1.1 §2.2.1.2: one blocking WAIT carries the job across EXECUTING -> COMPLETED.
    assert seen.count("GET", param="WAIT") >= 1
    assert statuses <= 3
    assert remote.requests == len(seen.seen) == 2 + statuses + 1   # create, run, statuses, result


def test_polling_fallback_when_the_document_has_no_version(tap, tmp_path):
    tap.configure(exec_delay=2.0, no_wait=True)
    session = requests.Session()
    seen = Recorder(session)
    remote = make_remote(tap, session, max_backoff=5.0)
    job, final = run_to_end(remote)
    assert final.phase == "COMPLETED"
    assert final.uws_version is None           # UWS 1.0 job documents carry no version
    assert seen.count(param="WAIT") == 0       # detected, not configured: never sent WAIT
    # Doubling from 0.2 s covers 2 s of execution only after several readings.
    assert seen.count("GET", suffix=urlsplit(job).path) >= 4


def test_a_1_1_service_that_returns_wait_at_once_is_polled_instead(tap):
    tap.configure(exec_delay=1.5, max_wait=0)  # version 1.1 but WAIT cut to nothing
    session = requests.Session()
    seen = Recorder(session)
    remote = make_remote(tap, session, max_backoff=5.0)
    job, final = run_to_end(remote)
    assert final.phase == "COMPLETED"
    assert final.uws_version == "1.1"
    assert seen.count(param="WAIT") == 1       # tried once, then fell back to polling


def test_abort_stops_a_running_job(tap):
    tap.configure(exec_delay=30.0)
    remote = make_remote(tap)
    job = remote.create(QUERY)
    remote.run(job)
    remote.abort(job)
    final = remote.wait(job, deadline=_deadline(20))
    assert final.phase == "ABORTED"            # UWS 1.1 §2.1.3


def test_delete_does_not_fetch_the_job_list(tap):
    session = requests.Session()
    seen = Recorder(session)
    remote = make_remote(tap, session)
    job = remote.create(QUERY)
    remote.delete(job)
    # UWS 1.1 §2.2.3.3: DELETE answers 303 to the job list; it is not followed.
    assert not any(m == "GET" and path.rstrip("/").endswith("/async") for m, path, _ in seen.seen)
    assert remote.requests == 2
    with pytest.raises(JobLost):
        remote.status(job)
    remote.delete(job)                         # already gone: nothing to do, no error


def test_run_is_not_repeated_after_a_lost_answer(tap):
    """The first RUN reaches the service but its answer is lost; the retry must not resend it."""

    class LoseFirstRunAnswer(HTTPAdapter):
        # Swaps the transport for one that really sends, then drops the answer once.
        lost = 0

        def send(self, request, **kw):
            response = super().send(request, **kw)
            if request.method == "POST" and request.url.endswith("/phase") and not self.lost:
                self.lost += 1
                response.close()
                raise requests.exceptions.ConnectionError("answer lost on the way back")
            return response

    tap.configure(exec_delay=3.0)
    session = requests.Session()
    session.mount("http://", LoseFirstRunAnswer())
    seen = Recorder(session)
    remote = make_remote(tap, session)
    job = remote.create(QUERY)
    remote.run(job)
    posts = [path for m, path, _ in seen.seen if m == "POST" and path.endswith("/phase")]
    assert posts == []                         # the only RUN's answer never arrived
    assert remote.status(job).phase in ("QUEUED", "EXECUTING")
    assert remote.wait(job, deadline=_deadline(30)).phase == "COMPLETED"


# --- retries and failures ----------------------------------------------------------------------


def test_503s_are_retried_then_succeed(tap):
    remote = make_remote(tap, attempts=4)
    job = remote.create(QUERY)
    before = remote.requests
    tap.configure(fail_first=2)
    assert remote.status(job).phase == "PENDING"
    assert remote.requests - before == 3       # two refusals, then the answer


def test_429s_are_retried(tap):
    remote = make_remote(tap, attempts=3)
    tap.configure(status_429=2)
    job = remote.create(QUERY)
    assert remote.requests == 3
    assert remote.status(job).phase == "PENDING"


def test_refusals_beyond_the_attempts_raise_naming_the_service(tap):
    remote = make_remote(tap, attempts=3)
    tap.configure(fail_first=10)
    with pytest.raises(ServiceRefused) as caught:
        remote.create(QUERY)
    assert caught.value.status == 503
    assert tap.url in str(caught.value)
    assert "what to do" in str(caught.value)
    assert remote.requests == 3


def test_a_closed_port_is_unreachable_after_the_attempts():
    url = f"http://127.0.0.1:{_free_port()}/tap"
    remote = Remote(url, attempts=2, max_backoff=0.01, timeout=2.0)
    with pytest.raises(ServiceUnreachable) as caught:
        remote.status(url + "/async/nothing")
    assert url in str(caught.value)
    assert remote.requests == 2


def test_a_transient_failure_while_waiting_is_not_fatal(tap):
    tap.configure(exec_delay=1.0)
    remote = make_remote(tap, attempts=2)
    job = remote.create(QUERY)
    remote.run(job)
    remote.status(job)
    tap.configure(fail_first=3)                # more than one reading's worth of attempts
    assert remote.wait(job, deadline=_deadline(30)).phase == "COMPLETED"


def test_wait_returns_the_last_status_at_the_deadline(tap):
    tap.configure(exec_delay=30.0)
    remote = make_remote(tap)
    job = remote.create(QUERY)
    remote.run(job)
    status = remote.wait(job, deadline=_deadline(1.5))
    assert status.phase in ("QUEUED", "EXECUTING")
    remote.abort(job)


def test_a_known_status_starts_with_a_blocking_read(tap):
    tap.configure(exec_delay=1.5)
    session = requests.Session()
    seen = Recorder(session)
    remote = make_remote(tap, session)
    job = remote.create(QUERY)
    remote.run(job)
    first = remote.status(job)
    before = len(seen.seen)
    final = remote.wait(job, known=first)
    assert final.phase == "COMPLETED"
    reads = seen.seen[before:]
    # UWS 1.1 §2.2.1.2: with the phase already known, every read blocks (no plain read first).
    assert reads and all("WAIT" in {k.upper() for k in query} for _, _, query in reads)


def _reads(seen: Recorder, job: str) -> list[str | None]:
    """The PHASE of every read of the job document (None for a plain read), in order."""
    path = urlsplit(job).path
    return [query.get("PHASE", [None])[0] for m, p, query in seen.seen if m == "GET" and p == path]


def test_after_run_one_blocking_read_waits_out_the_queue(tap):
    # UWS 1.1 §2.2.3.5: RUN "typically" leaves the job QUEUED; §2.2.1.2: WAIT with PHASE=QUEUED
    # then returns when it starts, so the first read already shows it EXECUTING (a plain read
    # would have said QUEUED and cost a second read to see it start).
    tap.configure(queue_delay=1.0, exec_delay=1.0)
    session = requests.Session()
    seen = Recorder(session)
    remote = make_remote(tap, session)
    job = remote.create(QUERY)
    remote.run(job)
    phases_seen: list[str] = []
    final = remote.wait(job, deadline=_deadline(30), expect="QUEUED",
                        on_status=lambda s: phases_seen.append(s.phase))
    assert final.phase == "COMPLETED"
    assert phases_seen == ["EXECUTING", "COMPLETED"]
    assert _reads(seen, job) == ["QUEUED", "EXECUTING"]
    assert remote.requests == 2 + 2             # create, run, the two reads


def test_a_wrong_guess_costs_no_more_than_a_plain_read(tap):
    tap.configure(exec_delay=1.5)               # no queue: EXECUTING at once after RUN
    session = requests.Session()
    seen = Recorder(session)
    remote = make_remote(tap, session)
    job = remote.create(QUERY)
    remote.run(job)
    final = remote.wait(job, deadline=_deadline(30), expect="QUEUED")
    assert final.phase == "COMPLETED"
    # §2.2.1.2: "must return immediately ... if the PHASE is not in specified state".
    assert _reads(seen, job) == ["QUEUED", "EXECUTING"]


def test_a_guess_sent_to_a_uws_1_0_service_is_answered_at_once_then_polled(tap):
    tap.configure(exec_delay=1.0, no_wait=True)
    session = requests.Session()
    seen = Recorder(session)
    remote = make_remote(tap, session, max_backoff=2.0)
    job = remote.create(QUERY)
    remote.run(job)
    final = remote.wait(job, deadline=_deadline(30), expect="QUEUED")
    assert final.phase == "COMPLETED" and final.uws_version is None
    # UWS 1.1 §2.2.1.2: a 1.0 server answers at once; the version seen, WAIT is not sent again.
    assert seen.count(param="WAIT") == 1
    assert len(_reads(seen, job)) >= 2


@pytest.fixture
def wait_refusing_service():
    """A real HTTP server whose job refuses any WAIT parameter with 400 (as a strict UWS 1.0
    server might) and otherwise answers a finished UWS 1.0 job document: localtap never
    refuses WAIT, so this one is needed to show the first read falling back to a plain one."""

    class Strict(BaseHTTPRequestHandler):
        def do_GET(self):
            strict = "WAIT" in parse_qs(urlsplit(self.path).query)
            body = (b"unknown parameter WAIT" if strict else
                    b'<job xmlns="http://www.ivoa.net/xml/UWS/v1.0"><jobId>j</jobId>'
                    b"<phase>COMPLETED</phase></job>")
            self.send_response(400 if strict else 200)
            self.send_header("Content-Type", "text/plain" if strict else "text/xml")
            self.send_header("Content-Length", str(len(body)))
            self.end_headers()
            self.wfile.write(body)

        def log_message(self, *args):
            pass

    yield from _serving(Strict)


def test_a_refused_guess_is_followed_by_a_plain_read(wait_refusing_service):
    remote = Remote(wait_refusing_service, attempts=2, max_backoff=0.01, timeout=5.0)
    job = wait_refusing_service + "/async/j"
    assert remote.wait(job, deadline=_deadline(10), expect="QUEUED").phase == "COMPLETED"
    assert remote.requests == 2                 # the refused guess, then the plain read
    with pytest.raises(ServiceRefused):         # without a guess a refusal still counts
        remote.status(job, wait=5, phase="QUEUED")


def test_an_unknown_job_is_lost(tap):
    remote = make_remote(tap)
    with pytest.raises(JobLost):
        remote.status(tap.url + "/async/no-such-job")
    job = remote.create(QUERY)
    tap.configure(lose_jobs=True)
    with pytest.raises(JobLost):
        remote.run(job)


def test_garbage_instead_of_a_job_document_is_invalid(tap, tmp_path):
    remote = make_remote(tap)
    job, final = run_to_end(remote, fmt="csv")
    with pytest.raises(ServiceResponseInvalid) as caught:
        remote.status(final.result_url)         # CSV text where a job document should be
    assert "not readable XML" in str(caught.value)
    with pytest.raises(ServiceResponseInvalid):
        remote.status(tap.url + "/capabilities")   # XML, but not a UWS job


def test_bad_url_is_refused_at_once():
    with pytest.raises(BadServiceURL):
        Remote("ftp://example.invalid/tap")


# --- errors of the query -----------------------------------------------------------------------


def test_error_detail_carries_the_service_message_verbatim(tap):
    remote = make_remote(tap)
    job, final = run_to_end(remote, f"SELECT no_such_column_xq FROM {TABLE}")
    assert final.phase == "ERROR"
    assert final.error_summary                 # UWS 1.1 §2.2.1: errorSummary/message
    detail = remote.error_detail(job)
    # Read the same error document with an independent VOTable parser (astropy).
    raw = requests.get(job + "/error", timeout=10)
    parsed = votable.parse(io.BytesIO(raw.content))
    infos = [i for i in parsed.resources[0].infos if i.name == "QUERY_STATUS"]
    assert infos and infos[-1].value == "ERROR"     # DALI 1.1 §4.4
    assert detail == infos[-1].content.strip()      # the service's words, ends trimmed only
    assert "no_such_column_xq" in detail


# --- downloads ---------------------------------------------------------------------------------


@pytest.fixture
def big_result(tap, tmp_path):
    """A finished job with a result of some 100 kB, and the sha256 of a clean download."""
    remote = make_remote(tap)
    job, final = run_to_end(remote, f"SELECT * FROM {TABLE}")
    clean = remote.download(final.result_url, tmp_path / "clean.vot")
    assert clean.bytes > 20_000
    return final.result_url, clean


@pytest.mark.parametrize("cut", [0, 1, 4096, 20_000])
def test_a_dropped_download_resumes_or_restarts_to_the_same_bytes(tap, tmp_path, big_result, cut):
    url, clean = big_result
    tap.configure(drop_result_after=cut, drop_result_times=2)
    sent_before = tap.stats()["result_bytes_sent"]
    remote = make_remote(tap, attempts=5)
    progress: list[int] = []
    got = remote.download(url, tmp_path / "again.vot", on_progress=progress.append)
    assert got.sha256 == clean.sha256
    assert got.bytes == clean.bytes
    assert hashlib.sha256(got.path.read_bytes()).hexdigest() == clean.sha256
    assert remote.requests == 3                 # two cut answers, then the rest
    assert progress and progress[-1] == clean.bytes
    # The job result advertises Accept-Ranges, so every byte travelled once (RFC 9110 §14.2).
    assert tap.stats()["result_bytes_sent"] - sent_before == clean.bytes


def test_a_dropped_download_without_ranges_restarts_from_zero(tap, tmp_path):
    # localtap serves /sync answers without Accept-Ranges; each answer is generated anew.
    url = (f"{tap.url}/sync?LANG=ADQL&QUERY=SELECT+*+FROM+{TABLE}+ORDER+BY+orrery_id")
    cut = 7000
    tap.configure(drop_result_after=cut, drop_result_times=2)
    sent_before = tap.stats()["result_bytes_sent"]
    remote = make_remote(tap, attempts=4)
    got = remote.download(url, tmp_path / "sync.vot")
    body = got.path.read_bytes()
    assert got.sha256 == hashlib.sha256(body).hexdigest()
    assert len(Table.read(io.BytesIO(body), format="votable")) == 500
    assert remote.requests == 3
    assert tap.stats()["result_bytes_sent"] - sent_before == got.bytes + 2 * cut


def test_a_download_that_always_breaks_gives_up_and_leaves_no_file(tap, tmp_path, big_result):
    url, clean = big_result
    tap.configure(drop_result_after=5000, drop_result_times=None)
    remote = make_remote(tap, attempts=3)
    dest = tmp_path / "never.vot"
    assert clean.bytes > 3 * 5000              # three pieces of 5000 bytes cannot make the file
    with pytest.raises(ServiceUnreachable) as caught:
        remote.download(url, dest)
    assert tap.url in str(caught.value)
    assert remote.requests == 3
    assert not dest.exists()


@pytest.mark.parametrize("cut", [4096, 20_000])
def test_early_writeback_leaves_a_resumed_download_byte_for_byte(tap, tmp_path, big_result,
                                                                 monkeypatch, cut):
    url, clean = big_result
    monkeypatch.setattr(remote_mod, "WRITEBACK_STEP", 4096)   # ask for writeback very often
    tap.configure(drop_result_after=cut, drop_result_times=2)
    remote = make_remote(tap, attempts=5)
    got = remote.download(url, tmp_path / "wb.vot")
    assert got.sha256 == clean.sha256 == hashlib.sha256(got.path.read_bytes()).hexdigest()
    assert got.bytes == clean.bytes == got.path.stat().st_size
    assert remote.requests == 3                 # two cut answers, then the rest


def test_early_writeback_and_a_restart_from_zero_give_the_whole_file(tap, tmp_path, monkeypatch):
    # /sync answers have no Accept-Ranges: a cut answer makes the file start again (truncated).
    monkeypatch.setattr(remote_mod, "WRITEBACK_STEP", 4096)
    url = f"{tap.url}/sync?LANG=ADQL&QUERY=SELECT+*+FROM+{TABLE}+ORDER+BY+orrery_id"
    tap.configure(drop_result_after=30_000, drop_result_times=1)
    got = make_remote(tap, attempts=3).download(url, tmp_path / "sync.vot")
    body = got.path.read_bytes()
    assert len(body) == got.bytes and got.sha256 == hashlib.sha256(body).hexdigest()
    assert len(Table.read(io.BytesIO(body), format="votable")) == 500


def test_a_body_cut_short_of_its_length_is_still_detected(tap, tmp_path, big_result, monkeypatch):
    url, clean = big_result
    monkeypatch.setattr(remote_mod, "WRITEBACK_STEP", 4096)
    tap.configure(drop_result_after=clean.bytes - 10, drop_result_times=1)  # 10 bytes short
    remote = make_remote(tap, attempts=1)       # one try: no resume to make up for it
    with pytest.raises(ServiceUnreachable) as caught:
        remote.download(url, tmp_path / "short.vot")
    assert "broke off" in str(caught.value)     # the Content-Length was not reached
    assert not (tmp_path / "short.vot").exists()


def test_a_lost_result_is_reported_as_lost(tap, tmp_path, big_result):
    url, _ = big_result
    tap.configure(lose_jobs=True)
    with pytest.raises(JobLost):
        make_remote(tap).download(url, tmp_path / "x.vot")
    assert not (tmp_path / "x.vot").exists()


# --- orphan recovery ---------------------------------------------------------------------------


def test_find_rediscovers_a_job_by_run_id(tap):
    remote = make_remote(tap)
    before = _iso(datetime.now(UTC) - timedelta(seconds=2))
    wanted = remote.create(QUERY, run_id="orphan-7c1")
    other = remote.create(QUERY, run_id="someone-else")
    newer = remote.create(QUERY + " ", run_id="orphan-7c1")
    found = remote.find(run_id="orphan-7c1", after=before)
    assert found == [newer, wanted] or set(found) == {newer, wanted}
    assert other not in found
    later = _iso(datetime.now(UTC) + timedelta(hours=1))
    assert remote.find(run_id="orphan-7c1", after=later) == []   # UWS 1.1 §2.2.2.1 AFTER


def test_find_matches_the_exact_query_when_run_id_was_dropped(tap):
    remote = make_remote(tap)
    before = _iso(datetime.now(UTC) - timedelta(seconds=2))
    adql = f"SELECT TOP 3 * FROM {TABLE} -- orphan probe 51"
    job = remote.create(adql)                  # as if the service had dropped RUNID
    remote.create(adql + "\n")
    assert remote.find(run_id="never-given", after=before, adql=adql) == [job]


# --- credentials -------------------------------------------------------------------------------


def test_session_secrets_never_appear_in_errors(tap, tmp_path):
    session = requests.Session()
    session.headers["Authorization"] = f"Bearer {SECRET}"
    session.cookies.set("visit", SECRET + "-cookie")
    remote = make_remote(tap, session, attempts=2)
    caught: list[BaseException] = []

    job = remote.create(QUERY)
    tap.configure(fail_first=5)
    with pytest.raises(ServiceRefused) as refused:
        remote.status(job)
    caught.append(refused.value)
    tap.configure(fail_first=0)
    with pytest.raises(JobLost) as lost:
        remote.status(job + "-missing")
    caught.append(lost.value)
    with pytest.raises(ServiceResponseInvalid) as invalid:
        remote.status(tap.url + "/capabilities")
    caught.append(invalid.value)
    dead = Remote(f"http://127.0.0.1:{_free_port()}/tap", session, attempts=1, timeout=2.0)
    with pytest.raises(ServiceUnreachable) as unreachable:
        dead.create(QUERY)
    caught.append(unreachable.value)

    for exc in caught:
        text = "".join(traceback.format_exception(exc)) + repr(exc) + repr(vars(exc))
        assert SECRET not in text


@pytest.fixture
def echoing_service():
    """A real HTTP server that echoes the request headers in its error answers, the way some
    misconfigured proxies and debug pages do; localtap never echoes headers, so this one is
    needed to show the scrubbing at work."""

    class Echo(BaseHTTPRequestHandler):
        def do_GET(self):
            status = 503 if self.path.endswith("/busy") else 400
            body = "bad request; you sent:\n" + str(self.headers)
            self.send_response(status)
            self.send_header("Content-Type", "text/plain")
            self.send_header("Retry-After", "0")
            self.end_headers()
            self.wfile.write(body.encode())

        def log_message(self, *args):
            pass

    yield from _serving(Echo)


def test_echoed_credentials_are_scrubbed_from_messages(echoing_service):
    session = requests.Session()
    session.headers["Authorization"] = f"Bearer {SECRET}"
    session.headers["X-Api-Key"] = SECRET + "-key"
    remote = Remote(echoing_service, session, attempts=2, max_backoff=0.01, timeout=5.0)
    for path, kind in (("/async/j1", ServiceRefused), ("/async/busy", ServiceRefused)):
        with pytest.raises(kind) as caught:
            remote.status(echoing_service + path)
        text = "".join(traceback.format_exception(caught.value))
        assert "you sent" in text               # the service's own words are kept ...
        assert SECRET not in text               # ... but not what the session carries
    assert remote.requests == 1 + 2             # 400: no retry; 503: both attempts


def test_retry_after_is_honoured_but_capped():
    remote = Remote("http://127.0.0.1:9/tap", max_backoff=4.0)
    # RFC 9110 §10.2.3: the service says how long to wait; a cap keeps a kernel responsive.
    assert remote._retry_pause(remote_mod._RetryableStatus(503, "", 2.0), 1) == 2.0
    assert remote._retry_pause(remote_mod._RetryableStatus(429, "", 600.0), 1) == 4.0
    pauses = [remote._retry_pause(None, n) for n in range(1, 8)]
    assert all(0.2 <= p <= 4.0 for p in pauses) and pauses[-1] == 4.0


# --- parsing and small rules (no server needed) ------------------------------------------------

UWS_1_0_JOB = b"""<?xml version="1.0"?>
<uws:job xmlns:uws="http://www.ivoa.net/xml/UWS/v1.0" xmlns:xlink="http://www.w3.org/1999/xlink">
  <uws:jobId>j1</uws:jobId>
  <uws:phase>EXECUTING</uws:phase>
  <uws:quote xsi:nil="true" xmlns:xsi="http://www.w3.org/2001/XMLSchema-instance"/>
  <uws:parameters><uws:parameter id="query">SELECT 1</uws:parameter></uws:parameters>
  <uws:results>
    <uws:result id="extra" xlink:href="/elsewhere/x"/>
    <uws:result id="result" xlink:href="results/result"/>
  </uws:results>
  <uws:errorSummary type="transient" hasDetail="false"><uws:message>slow disk</uws:message></uws:errorSummary>
</uws:job>"""


def test_a_uws_1_0_document_with_few_elements_is_read():
    status = remote_mod._job_status("http://h/tap/async/j1", UWS_1_0_JOB, "http://h/tap")
    assert status.uws_version is None          # UWS 1.0 schema: no version attribute
    assert status.phase == "EXECUTING"
    assert status.run_id is None and status.creation_time is None
    assert status.parameters == {"QUERY": "SELECT 1"}
    # TAP 1.1 §2.2: the result is named "result"; relative hrefs resolve against the job URL.
    assert status.result_url == "http://h/tap/async/results/result"
    assert (status.error_summary, status.error_type) == ("slow disk", "transient")


def test_entity_expansion_is_refused():
    bomb = (b'<?xml version="1.0"?><!DOCTYPE j [<!ENTITY a "aaaaaaaaaa">'
            b'<!ENTITY b "&a;&a;&a;&a;&a;&a;&a;&a;">]>'
            b'<job xmlns="http://www.ivoa.net/xml/UWS/v1.0"><phase>&b;</phase></job>')
    with pytest.raises(ServiceResponseInvalid):
        remote_mod._job_status("http://h/j", bomb, "http://h")


def test_an_html_page_is_not_a_tap_service_with_its_text_in_detail():
    page = b"<!DOCTYPE html><html><body><p>Sign in<br></body></html>"
    with pytest.raises(ServiceResponseInvalid) as caught:
        remote_mod._job_status("http://h/j", page, "http://h")
    assert isinstance(caught.value, jobdesk.NotATapService)
    assert "not a TAP service" in str(caught.value) and "<" not in caught.value.message
    assert "Sign in" in caught.value.detail


def test_retry_after_takes_seconds_or_an_http_date():
    # RFC 9110 §10.2.3: delay-seconds or an HTTP-date.
    assert remote_mod._retry_after("7") == 7.0
    ahead = format_datetime(datetime.now(UTC) + timedelta(seconds=30), usegmt=True)
    assert 0 < remote_mod._retry_after(ahead) <= 31
    assert remote_mod._retry_after("soon") is None


def test_error_votable_message_reads_the_last_error_info():
    doc = (b'<VOTABLE xmlns="http://www.ivoa.net/xml/VOTable/v1.3"><RESOURCE type="results">'
           b'<INFO name="QUERY_STATUS" value="ERROR">Column  \'zz\'\n not found</INFO>'
           b'</RESOURCE></VOTABLE>')
    # Verbatim: inner spaces and line breaks are the service's, only the ends are trimmed.
    assert remote_mod._error_votable_message(doc) == "Column  'zz'\n not found"
    padded = doc.replace(b">Column", b">\n  Column").replace(b"found<", b"found \n<")
    assert remote_mod._error_votable_message(padded) == "Column  'zz'\n not found"
    assert remote_mod._error_votable_message(b"plain words") is None


def test_a_downloaded_error_document_raises(tmp_path, tap):
    remote = make_remote(tap)
    job, final = run_to_end(remote, f"SELECT nothing_here_q FROM {TABLE}")
    assert final.phase == "ERROR"
    with pytest.raises(JobFailed) as caught:
        remote.download(job + "/error", tmp_path / "e.vot")
    assert "nothing_here_q" in str(caught.value)
    assert not (tmp_path / "e.vot").exists()


def test_public_url_drops_credentials():
    assert remote_mod._public_url("https://me:pw@h.example:8443/tap?key=abc") == \
        "https://h.example:8443/tap"


# --- servers that behave differently but legally (localtap's imitation settings) ---------------
# The behaviours were measured on DaCHS 2.7 (docs/interop.md); localtap imitates each on demand.


def test_whole_job_life_against_the_imitation_profile(tmp_path):
    with serve(rows=500, **LIKE_DACHS) as dachs_like:
        remote = make_remote(dachs_like)
        job, final = run_to_end(remote, QUERY, maxrec=50, run_id="profile-1")
        assert final.phase == "COMPLETED"
        assert final.run_id is None                 # RUNID dropped by the service
        got = remote.download(final.result_url, tmp_path / "p.vot")
        assert len(Table.read(got.path, format="votable")) == 50


def test_run_is_never_sent_twice_where_a_second_run_breaks_the_job(tap):
    """As above, the first RUN's answer is lost; here a second RUN would send the job to ERROR."""

    class LoseFirstRunAnswer(HTTPAdapter):
        runs_sent = 0

        def send(self, request, **kw):
            response = super().send(request, **kw)
            if request.method == "POST" and request.url.endswith("/phase"):
                type(self).runs_sent += 1
                if self.runs_sent == 1:
                    response.close()
                    raise requests.exceptions.ConnectionError("answer lost on the way back")
            return response

    tap.configure(exec_delay=1.0, second_run_errors=True, ignore_run_at_creation=True)
    session = requests.Session()
    session.mount("http://", LoseFirstRunAnswer())
    remote = make_remote(tap, session)
    job = remote.create(QUERY)
    remote.run(job)
    assert LoseFirstRunAnswer.runs_sent == 1
    assert remote.wait(job, deadline=_deadline(30)).phase == "COMPLETED"


def test_find_an_orphan_without_runid_or_listed_details(tap):
    tap.configure(ignore_runid=True, sparse_job_list=True)
    session = requests.Session()
    seen = Recorder(session)
    remote = make_remote(tap, session)
    before = _iso(datetime.now(UTC) - timedelta(seconds=2))
    adql = f"SELECT TOP 3 *  FROM {TABLE} -- orphan  probe 77"   # double spaces are part of it
    job = remote.create(adql, run_id="orphan-77")
    remote.create(" ".join(adql.split()), run_id="orphan-77")   # same words, other spacing
    remote.create(adql.upper(), run_id="orphan-77")             # values are case-sensitive
    # The service lists parameter names in lower case; they match without case (TAP 1.1 §2.3).
    assert b'id="query"' in requests.get(job, timeout=10).content
    found = remote.find(run_id="orphan-77", after=before, adql=adql)
    assert found == [job]
    listings = [q for m, path, q in seen.seen if m == "GET" and path.endswith("/async")]
    assert listings[-1]["LAST"] == [str(remote_mod.FIND_LIMIT)]   # UWS 1.1 §2.2.2.1
    assert listings[-1]["AFTER"] == [before]


def test_find_reads_a_bounded_number_of_job_documents_newest_first(tap):
    tap.configure(ignore_runid=True, sparse_job_list=True)
    session = requests.Session()
    seen = Recorder(session)
    remote = make_remote(tap, session)
    before = _iso(datetime.now(UTC) - timedelta(seconds=2))
    adql = f"SELECT TOP 2 * FROM {TABLE} -- bounded probe"
    wanted = remote.create(adql)
    others = [remote.create(f"SELECT TOP 1 * FROM {TABLE} -- other {i}") for i in range(6)]
    reads_before = len(seen.seen)
    # The wanted job is the oldest of seven: with a bound of 3 it is out of reach ...
    assert remote.find(run_id=None, after=before, adql=adql, limit=3) == []
    job_reads = [p for m, p, _ in seen.seen[reads_before:] if m == "GET" and "/async/" in p]
    assert len(job_reads) == 3
    newest = {urlsplit(u).path for u in others[-3:]}
    assert set(job_reads) == newest                 # LAST=n: the n most recent (UWS 1.1 §2.2.2.1)
    # ... and within a larger bound it is found.
    assert remote.find(run_id=None, after=before, adql=adql, limit=10) == [wanted]


def test_find_skips_jobs_created_before_after(tap):
    tap.configure(sparse_job_list=True, ignore_runid=True)
    remote = make_remote(tap)
    adql = f"SELECT TOP 2 * FROM {TABLE} -- too old"
    remote.create(adql)
    later = _iso(datetime.now(UTC) + timedelta(hours=1))
    assert remote.find(run_id=None, after=later, adql=adql) == []


def test_an_aborted_job_that_lists_a_result_offers_none(tap, tmp_path):
    tap.configure(exec_delay=30, aborted_lists_result=True)
    remote = make_remote(tap)
    job = remote.create(QUERY)
    remote.run(job)
    remote.wait(job, deadline=_deadline(1))
    remote.abort(job)
    final = remote.wait(job, deadline=_deadline(30))
    assert final.phase == "ABORTED"
    listed = requests.get(job + "/results", timeout=10).content
    assert b'id="result"' in listed                 # the service does list one ...
    assert final.result_url is None                 # ... which is never offered for download


def test_error_detail_is_read_although_has_detail_says_false(tap):
    tap.configure(has_detail_false=True, error_body_200=True)
    remote = make_remote(tap)
    job, final = run_to_end(remote, f'SELECT "odd  name_q" FROM {TABLE}')
    assert final.phase == "ERROR"
    assert b'hasDetail="false"' in requests.get(job, timeout=10).content
    detail = remote.error_detail(job)
    raw = requests.get(job + "/error", timeout=10)
    infos = [i for i in votable.parse(io.BytesIO(raw.content)).resources[0].infos
             if i.name == "QUERY_STATUS"]
    assert detail == infos[-1].content.strip()      # DALI 1.1 §4.4: the last QUERY_STATUS
    assert "odd  name_q" in detail                  # two spaces, as the service wrote them
    pending = remote.create(QUERY)                  # its /error: HTTP 200 and an empty body
    assert remote.error_detail(pending) == ""


def test_a_200_error_body_where_a_result_should_be_is_refused(tap, tmp_path):
    tap.configure(error_body_200=True)
    remote = make_remote(tap)
    job, final = run_to_end(remote, f"SELECT missing_col_r FROM {TABLE}")
    assert final.phase == "ERROR"
    with pytest.raises(JobFailed):
        remote.download(job + "/results/result", tmp_path / "r.vot")
    assert not (tmp_path / "r.vot").exists()


@pytest.mark.parametrize("errors_200", [False, True])
def test_sync_error_messages_reach_the_caller_verbatim(tap, tmp_path, errors_200):
    tap.configure(sync_errors_200=errors_200)
    remote = make_remote(tap)
    url = f'{tap.url}/sync?LANG=ADQL&QUERY=SELECT+"two  spaces_q"+FROM+{TABLE}'
    expected = JobFailed if errors_200 else ServiceRefused   # 200 + error VOTable, or HTTP 400
    with pytest.raises(expected) as caught:
        remote.download(url, tmp_path / "s.vot")
    assert "'two  spaces_q'" in str(caught.value)


def test_capabilities_agree_with_the_vosi_document(tmp_path):
    with serve(rows=500, max_rec=1234, destruction=7200, execution_duration=90) as service:
        session = requests.Session()
        seen = Recorder(session)
        remote = make_remote(service, session)
        caps = remote.capabilities()
        answer = requests.get(f"{service.url}/capabilities", timeout=10)
    assert "error" not in caps
    # Read the same document independently (lxml, namespaces spelled out).
    from lxml import etree
    doc = etree.fromstring(answer.content)
    ns = {"xsi": "http://www.w3.org/2001/XMLSchema-instance"}
    tap_cap = doc.xpath("capability[@standardID='ivo://ivoa.net/std/TAP']")  # TAPRegExt 1.0 §2
    assert len(tap_cap) == 1
    cap = tap_cap[0]
    assert caps["standard_id"] == "ivo://ivoa.net/std/TAP"
    # VOSI 1.1 §3.2 / VOResource 1.1: the interface's version attribute; TAPRegExt 1.0 §2.3.
    assert caps["interface_version"] == cap.xpath("interface[@role='std']/@version")[0] == "1.1"
    assert caps["adql_versions"] == [v.strip() for v in
                                     cap.xpath("language[name='ADQL']/version/text()")]
    assert caps["output_limit"] == {"default": 1234, "hard": 1234, "unit": "row"}
    assert int(cap.findtext("outputLimit/default")) == caps["output_limit"]["default"]
    assert caps["retention"]["default"] == int(cap.findtext("retentionPeriod/default")) == 7200
    assert caps["execution_duration"]["default"] == 90
    assert caps["upload_methods"] == cap.xpath("uploadMethod/@ivo-id")
    assert caps["software"] == answer.headers["Server"]   # RFC 9110 §10.2.4
    assert caps["software"].startswith("jobdesk-localtap ")
    assert doc.xpath("//@xsi:type", namespaces=ns)        # a real VOSI document, not a stub
    # Read once: the second call costs no request.
    requests_made = remote.requests
    assert remote.capabilities() == caps and remote.requests == requests_made
    assert seen.count("GET", "/capabilities") == 1


def test_capabilities_never_raise():
    down = Remote(f"http://127.0.0.1:{_free_port()}/tap", attempts=1, timeout=2.0)
    caps = down.capabilities()
    assert "error" in caps and caps["capabilities_url"].endswith("/tap/capabilities")


def test_capabilities_refuse_entity_expansion_and_keep_the_server_name():
    bomb = (b'<?xml version="1.0"?><!DOCTYPE c [<!ENTITY a "aaaaaaaaaa">'
            b'<!ENTITY b "&a;&a;&a;&a;&a;&a;&a;&a;">]>'
            b'<capabilities><capability standardID="&b;"/></capabilities>')

    class Bomb(BaseHTTPRequestHandler):
        def do_GET(self):
            self.send_response(200)
            self.send_header("Content-Type", "text/xml")
            self.send_header("Content-Length", str(len(bomb)))
            self.end_headers()
            self.wfile.write(bomb)

        def version_string(self):
            return "bomb-server 9"

        def log_message(self, *args):
            pass

    # A hostile document needs a server of its own: localtap never sends one.
    server = ThreadingHTTPServer(("127.0.0.1", 0), Bomb)
    threading.Thread(target=server.serve_forever, daemon=True).start()
    try:
        caps = Remote(f"http://127.0.0.1:{server.server_address[1]}/tap").capabilities()
    finally:
        server.shutdown()
        server.server_close()
    assert "error" in caps and "standard_id" not in caps
    assert caps["software"] == "bomb-server 9"

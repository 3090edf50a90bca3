"""What the user sees when something goes wrong (issue: errors seen at once, with a next step).

Each case runs against a real service: the embedded TAP service (stopped, restarted, asked at a
wrong path), a loopback port nothing listens on, and a plain web server answering HTML. Each test
checks the state left in the index, the words of the message, and that nothing is lost.
"""

from __future__ import annotations

import http.server
import io
import subprocess
import sys
import threading
import time
from urllib.parse import urlsplit

import pytest

from jobdesk import (
    Desk, JobAborted, JobNotFound, JobUnreached, NotATapService, QueryEmpty, ServiceRefused,
    ServiceUnreachable, WaitTimeout, phases,
)
from jobdesk import desk as desk_module
from jobdesk import lifecycle
from jobdesk.localtap import serve
from jobdesk.progress import LogProgress

ROWS = 2000
QUERY = "SELECT TOP 5 orrery_id, ra, dec FROM orrery.sources ORDER BY orrery_id"
LIBRARY_WORDS = ("HTTPConnectionPool", "Max retries", "NewConnectionError", "urllib3")


def _free_port() -> int:
    import socket
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture
def fast_retries(monkeypatch):
    # The pause before the next try of an unreachable service (5 s, doubling) is shortened so
    # the test stays short; the logic is the same.
    monkeypatch.setattr(lifecycle, "RETRY_PAUSE", 0.3)


def _no_library_text(text: str) -> None:
    for word in LIBRARY_WORDS:
        assert word not in text, f"library text in the message: {text}"


# --- a port nothing listens on -----------------------------------------------------------------


def test_refused_port_ends_unreached_with_reason_and_next_step(tmp_path, fast_retries):
    url = f"http://127.0.0.1:{_free_port()}/tap"
    desk = Desk(tmp_path / "d", attempts=1, send_tries=2)
    with pytest.raises(ServiceUnreachable) as first:
        desk.submit(url, QUERY)
    assert "connection refused" in first.value.message
    _no_library_text(first.value.message)
    assert first.value.detail and "refused" in first.value.detail.lower()  # raw text kept aside
    [job] = desk.jobs()
    r = job.record
    assert r["phase"] == phases.UNSENT and r["unreachable_since"] and r["next_try"]
    assert "connection refused" in r["last_error"]

    with pytest.raises(JobUnreached) as ended:
        job.wait(progress=False)
    assert job.phase == phases.UNREACHED
    assert "2 tries" in ended.value.message and "resend" in ended.value.hint
    assert not job.record.get("job_url")  # no job was ever made
    # waiting again is immediate: the record is terminal, nothing is retried
    t0 = time.monotonic()
    with pytest.raises(JobUnreached):
        job.wait(progress=False)
    assert time.monotonic() - t0 < 2

    # the command line skips it in `wait` and names the next steps
    run = subprocess.run([sys.executable, "-m", "jobdesk.cli", "--root", str(desk.root), "wait"],
                         capture_output=True, text=True, timeout=60)
    assert run.returncode == 0 and "nothing is running" in run.stdout
    run = subprocess.run([sys.executable, "-m", "jobdesk.cli", "--root", str(desk.root), "list"],
                         capture_output=True, text=True, timeout=60)
    assert "UNREACHED" in run.stdout and f"jobdesk resend {job.id}" in run.stdout

    # once the service is there, "send again" runs the same query as a new job
    with serve(state=tmp_path / "tap", rows=ROWS, port=int(urlsplit(url).port)) as tap:
        assert tap.url.rstrip("/") == url
        again = desk.resend(job.id)
        assert again.id != job.id
        again.wait(timeout=60, progress=False)
        assert len(again.table()) == 5
    assert desk.job(job.id).phase == phases.UNREACHED  # the old record stays, for reference
    assert desk.forget(job.id) and desk.count() == 1


def test_poller_does_not_retry_an_unreachable_service_before_its_next_try(tmp_path, fast_retries):
    url = f"http://127.0.0.1:{_free_port()}/tap"
    desk = Desk(tmp_path / "d", attempts=1, send_tries=5)
    with pytest.raises(ServiceUnreachable):
        desk.submit(url, QUERY)
    requests_before = desk.jobs()[0].record["requests"]
    assert desk.step() == 0
    assert desk.jobs()[0].record["requests"] == requests_before, "retried before next_try"


# --- the service stops while wait() runs --------------------------------------------------------


def test_service_stopped_mid_wait_is_said_and_the_job_is_not_lost(tmp_path):
    state = tmp_path / "tap"
    desk = Desk(tmp_path / "d", attempts=2, wait_window=1, timeout=2)
    desk.drive_slice = 1.5
    tap = serve(state=state, rows=ROWS, exec_delay=4.0)
    service = tap.__enter__()
    port = int(urlsplit(service.url).port)
    try:
        job = desk.submit(service.url, QUERY)
        assert job.phase == phases.SUBMITTED
    finally:
        tap.__exit__(None, None, None)  # the service goes away; its jobs stay in its state

    # with a timeout: WaitTimeout says the service was unreachable, and for how long
    with pytest.raises((WaitTimeout, ServiceUnreachable)) as info:
        job.wait(timeout=6, progress=False)
    assert "unreachable" in str(info.value)
    _no_library_text(info.value.message)
    r = job.record
    assert r["phase"] in phases.ACTIVE and r["job_url"]  # kept, still pointing at the job
    assert r["unreachable_since"] and r["last_error"]

    # without a timeout: waiting goes on, and the progress line says so
    out = io.StringIO()
    shown = LogProgress(job.title, job.id, stream=out)
    desk_module_progress = desk_module._progress
    finished = threading.Event()
    failure: list[BaseException] = []

    def waiter():
        try:
            desk_module._progress = lambda *a, **k: shown
            job.wait()
        except BaseException as exc:  # noqa: BLE001 - reported below
            failure.append(exc)
        finally:
            finished.set()

    thread = threading.Thread(target=waiter, daemon=True)
    try:
        thread.start()
        deadline = time.monotonic() + 20
        while "service unreachable" not in out.getvalue() and time.monotonic() < deadline:
            time.sleep(0.2)
        assert "service unreachable for" in out.getvalue() and "retrying" in out.getvalue()
        assert not finished.is_set(), "wait() gave up although no timeout was given"
        with serve(state=state, rows=ROWS, port=port, exec_delay=0.2):
            assert finished.wait(90), "wait() did not finish once the service was back"
    finally:
        desk_module._progress = desk_module_progress
    # The embedded service stops jobs it was running when it went down and says so: the job
    # ends ERROR with the service's own words; the record, its URL and history are all kept.
    assert not job.record.get("unreachable_since"), "the unreachable state was not cleared"
    if failure:
        assert "restarted" in str(failure[0]) and job.phase == phases.ERROR, failure
        assert job.record["job_url"] and len(job.desk.index.history(job.id)) >= 3
        with serve(state=state, rows=ROWS, port=port, exec_delay=0.2):
            again = desk.resend(job.id).wait(timeout=60, progress=False)
        assert len(again.table()) == 5
    else:
        assert job.phase == phases.COMPLETED and len(job.table()) == 5


# --- wrong path, a web page, an empty query ----------------------------------------------------


@pytest.fixture(scope="module")
def tap(tmp_path_factory):
    with serve(state=tmp_path_factory.mktemp("tap"), rows=ROWS, exec_delay=0.2) as service:
        yield service


def test_wrong_path_404_says_wrong_path(tap, tmp_path):
    desk = Desk(tmp_path / "d", attempts=1)
    with pytest.raises(ServiceRefused) as info:
        desk.submit(tap.url + "/no/such/place", QUERY)
    assert info.value.status == 404
    assert "wrong path" in info.value.hint and "overloaded" not in str(info.value)
    assert "not found" in info.value.message
    [job] = desk.jobs()
    assert job.phase == phases.ERROR and "404" in job.record["error"]


class _Portal(http.server.BaseHTTPRequestHandler):
    """A plain web site: every path answers 200 with an HTML page."""

    PAGE = (b"<!DOCTYPE html><html><head><title>Welcome</title><style>p{}</style></head>"
            b"<body><h1>Welcome to our portal</h1><p>Please sign in.</p></body></html>")

    def _page(self):
        self.send_response(200)
        self.send_header("Content-Type", "text/html; charset=utf-8")
        self.send_header("Content-Length", str(len(self.PAGE)))
        self.end_headers()
        self.wfile.write(self.PAGE)

    do_GET = do_POST = _page

    def log_message(self, *args):
        pass


@pytest.fixture
def portal():
    server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), _Portal)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    yield f"http://127.0.0.1:{server.server_address[1]}/tap"
    server.shutdown()
    server.server_close()


def test_a_web_page_answering_200_is_not_a_tap_service(portal, tmp_path):
    desk = Desk(tmp_path / "d", attempts=1)
    with pytest.raises(NotATapService) as info:
        desk.submit(portal, QUERY)
    text = str(info.value)
    assert "not a TAP service" in text and "login page" in text
    assert "<" not in info.value.message and "Welcome" not in info.value.message
    assert text.count("sign in") <= 1  # the page is not dumped (twice) into the message
    assert "Please sign in." in info.value.detail
    [job] = desk.jobs()
    assert job.phase == phases.ERROR and "not a TAP service" in job.record["error"]


def test_empty_query_is_refused_before_any_request(tap, tmp_path):
    desk = Desk(tmp_path / "d")
    before = tap.stats()["jobs_created"]
    for text in ("", "   \n\t ", "-- only a comment\n  "):
        t0 = time.monotonic()
        with pytest.raises(QueryEmpty) as info:
            desk.submit(tap.url, text)
        assert time.monotonic() - t0 < 1
        assert "empty" in info.value.message and info.value.hint
    assert desk.count() == 0 and tap.stats()["jobs_created"] == before


# --- the user's own abort ----------------------------------------------------------------------


def test_own_abort_ends_wait_quietly_and_table_still_raises(tmp_path, capsys):
    with serve(state=tmp_path / "tap", rows=ROWS, exec_delay=30.0) as tap:
        desk = Desk(tmp_path / "d", wait_window=1)
        job = desk.submit(tap.url, QUERY)
        result: list = []

        def waiter():
            try:
                result.append(job.wait(timeout=60, progress=False))
            except BaseException as exc:  # noqa: BLE001
                result.append(exc)

        thread = threading.Thread(target=waiter)
        thread.start()
        time.sleep(1.0)
        Desk(desk.root).abort(job.id)  # as the card's button does, through the server
        thread.join(30)
        assert not thread.is_alive()
    assert result == [job], result  # no exception
    assert job.phase == phases.ABORTED
    said = capsys.readouterr().out
    assert "aborted at your request" in said and said.count("\n") == 1
    with pytest.raises(JobAborted):
        job.table()


# --- unknown ids -------------------------------------------------------------------------------


def test_unknown_job_id_is_job_not_found_everywhere(tmp_path):
    desk = Desk(tmp_path / "d")
    for call in (desk.job, desk.abort, desk.forget, desk.resend, desk.pin):
        with pytest.raises(JobNotFound) as info:
            call("0123456789abcdef")
        assert "no job '0123456789abcdef'" in info.value.message
        assert isinstance(info.value, KeyError)  # older `except KeyError` code keeps working
    run = subprocess.run([sys.executable, "-m", "jobdesk.cli", "--root", str(desk.root),
                          "show", "nope"], capture_output=True, text=True, timeout=60)
    assert run.returncode == 1
    assert "no job 'nope'" in run.stderr and "Traceback" not in run.stderr

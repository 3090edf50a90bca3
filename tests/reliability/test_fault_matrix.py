"""Fault matrix: every fault ends in the correct result or a typed, clear error, with the desk
root consistent and never a second server job for one submission.

Faults come from two real sources: the embedded service's own fault settings (503/429 with
``Retry-After``, cut downloads, slow answers, forgotten or destroyed jobs, a hard restart) and a
fault proxy in front of it (other statuses, no ``Retry-After``, TCP resets before and after the
service acted, held answers). A full disk is a real, small tmpfs.
"""

from __future__ import annotations

import itertools
import shutil
import threading
import time
from pathlib import Path

import pytest
import requests
from astropy.io.votable import parse_single_table

from jobdesk import Desk, phases
from jobdesk.errors import (
    JobdeskError, JobFailed, JobLost, ServiceError, ServiceUnreachable,
    StorageFull,
)
from jobdesk.localtap import serve, spawn
from reliability_support import FULL, FaultProxy, Rule, check_consistent, server_jobs

ROWS = 3000
_serial = itertools.count(1)


def fresh_query(columns: str = "orrery_id, ra, dec, mag_lime") -> str:
    """A query no other case in this session sends (a different key and a different server job)."""
    return (f"SELECT {columns} FROM orrery.sources WHERE orrery_id > {next(_serial)} "
            f"ORDER BY orrery_id")


@pytest.fixture(scope="module")
def tap(tmp_path_factory):
    with serve(state=tmp_path_factory.mktemp("tap"), rows=ROWS, exec_delay=0.4,
               sweep_interval=0.2) as service:
        yield service


@pytest.fixture
def proxy(tap):
    with FaultProxy(tap.url) as p:
        yield p


def make_desk(root: Path, **options) -> Desk:
    settings = {"wait_window": 2, "attempts": 4, "timeout": 5.0} | options
    return Desk(root, **settings)


def reference_ids(tap, query: str) -> list[int]:
    """The same query answered synchronously (no job): the rows a correct result must hold."""
    answer = requests.post(f"{tap.url}/sync", data={"REQUEST": "doQuery", "LANG": "ADQL",
                                                     "QUERY": query}, timeout=60)
    answer.raise_for_status()
    import io
    return [int(v) for v in parse_single_table(io.BytesIO(answer.content)).array["orrery_id"]]


def outcome(desk: Desk, url: str, query: str, *, timeout: float = 90):
    """Submit and wait; return ("result", job) or ("error", exception)."""
    try:
        job = desk.submit(url, query)
        job.wait(timeout=timeout, progress=False)
        return "result", job
    except JobdeskError as exc:
        return "error", exc


def assert_clear(exc: BaseException) -> None:
    """A typed error with a message and advice."""
    assert isinstance(exc, JobdeskError), f"untyped error: {exc!r}"
    assert exc.message.strip() and exc.hint.strip(), repr(exc)


def assert_correct(tap, job, query: str) -> None:
    assert job.phase == phases.COMPLETED
    assert list(job.table()["orrery_id"]) == reference_ids(tap, query)


# --- status codes and resets at each step of a job ---------------------------------------------

STEPS = {
    "submit": ("POST", r"/tap/async$"),
    "run": ("POST", r"/tap/async/\w+/phase$"),
    "poll": ("GET", r"/tap/async/\w+(\?.*)?$"),
    "download": ("GET", r"/results/result$"),
}
FAULTS = {
    "503+Retry-After": dict(action="status", code=503, retry_after="1"),
    "503": dict(action="status", code=503),
    "502": dict(action="status", code=502),
    "500": dict(action="status", code=500),
    "429": dict(action="status", code=429),
    "429+Retry-After(date)": dict(action="status", code=429,
                                  retry_after="Thu, 01 Jan 1970 00:00:00 GMT"),
    "reset-before": dict(action="reset_before"),
    "reset-after": dict(action="reset_after"),
}
# The CI portion: every step with a gateway error and both resets, and each status once.
CI_FAULTS = ("502", "reset-before", "reset-after")
CI_EXTRA = [("submit", "503+Retry-After"), ("poll", "429"), ("download", "500"),
            ("run", "503")]
MATRIX = [(s, f) for s in STEPS for f in FAULTS
          if FULL or f in CI_FAULTS or (s, f) in CI_EXTRA]


@pytest.mark.parametrize("step,fault", MATRIX, ids=[f"{s}-{f}" for s, f in MATRIX])
def test_transient_fault_at_each_step_gives_the_result(tap, proxy, tmp_path, figures, step, fault):
    with figures.case("faults", f"{fault} at {step}"):
        method, path = STEPS[step]
        rule = proxy.add(Rule(method, path, times=2, **FAULTS[fault]))
        query = fresh_query()
        kind, value = outcome(make_desk(tmp_path / "d"), proxy.url, query)
        assert kind == "result", f"{fault} at {step}: {value!r}"
        assert rule.hits >= 1, "the fault was met"
        assert_correct(tap, value, query)
        assert len(server_jobs(tap, query)) == 1, "exactly one server job"
        check_consistent(tmp_path / "d")


@pytest.mark.parametrize("step", list(STEPS))
def test_a_fault_that_never_ends_is_a_typed_error_then_recovers(tap, proxy, tmp_path, figures,
                                                               monkeypatch, step):
    """A service that keeps refusing: a clear error, the record kept, and the same call works
    once the service is back, still with one server job."""
    with figures.case("faults", f"503 for good at {step}"):
        method, path = STEPS[step]
        proxy.add(Rule(method, path, action="status", code=503, times=None))
        query = fresh_query()
        desk = make_desk(tmp_path / "d", attempts=2)
        desk.drive_slice = 2.0  # shorter slices of waiting: the test stays fast
        kind, value = outcome(desk, proxy.url, query)
        assert kind == "error"
        assert_clear(value)
        assert isinstance(value, ServiceError), repr(value)
        assert "503" in str(value)
        check_consistent(tmp_path / "d")
        proxy.clear()
        again = desk.submit(proxy.url, query)
        first = desk.jobs(text=query)[-1]
        if step != "submit":  # the service has the job: the same record carries on with it
            assert again.id == first.id, f"the record did not survive: {first.record['error']}"
        again.wait(timeout=90, progress=False)
        assert_correct(tap, again, query)
        assert again.record["error"] is None, "a finished job shows no old error"
        assert len(server_jobs(tap, query)) == 1
        check_consistent(tmp_path / "d")


# --- downloads cut at several offsets ----------------------------------------------------------

CUTS = [0, 1, 100, 4096, 65_536, -1] if FULL else [0, 4096, -1]


@pytest.mark.parametrize("cut", CUTS)
def test_download_cut_at_an_offset_resumes_to_the_verified_result(tap, tmp_path, figures, cut):
    query = fresh_query("*")
    size = len(requests.post(f"{tap.url}/sync", data={"LANG": "ADQL", "QUERY": query},
                             timeout=60).content)
    offset = size - 1 if cut == -1 else cut
    with figures.case("faults", f"download cut at byte {offset}"):
        tap.configure(drop_result_after=offset, drop_result_times=2)
        try:
            kind, value = outcome(make_desk(tmp_path / "d"), tap.url, query)
        finally:
            tap.configure(drop_result_after=None, drop_result_times=None)
        assert kind == "result", repr(value)
        assert_correct(tap, value, query)
        assert len(server_jobs(tap, query)) == 1
        check_consistent(tmp_path / "d")


@pytest.mark.parametrize("after", [0, 2000] if not FULL else [0, 1, 2000, 50_000])
def test_download_reset_by_a_gateway_mid_body(tap, proxy, tmp_path, figures, after):
    """The proxy forwards the result, sends ``after`` bytes and resets: resumed or restarted."""
    with figures.case("faults", f"reset mid-download at byte {after}"):
        proxy.add(Rule("GET", r"/results/result$", action="cut", after=after, times=2))
        query = fresh_query()
        kind, value = outcome(make_desk(tmp_path / "d"), proxy.url, query)
        assert kind == "result", repr(value)
        assert_correct(tap, value, query)
        check_consistent(tmp_path / "d")


def test_download_that_always_breaks_is_a_typed_error_and_leaves_nothing(tap, proxy, tmp_path,
                                                                        figures, monkeypatch):
    with figures.case("faults", "every download cut"):
        proxy.add(Rule("GET", r"/results/result$", action="cut", after=500, times=None))
        query = fresh_query()
        desk = make_desk(tmp_path / "d", attempts=2)
        desk.drive_slice = 2.0  # shorter slices of waiting: the test stays fast
        kind, value = outcome(desk, proxy.url, query)
        assert kind == "error"
        assert_clear(value)
        assert isinstance(value, ServiceUnreachable)
        check_consistent(tmp_path / "d")
        proxy.clear()
        job = desk.submit(proxy.url, query).wait(timeout=60, progress=False)
        assert_correct(tap, job, query)
        assert len(server_jobs(tap, query)) == 1
        check_consistent(tmp_path / "d")


# --- slow answers ---------------------------------------------------------------------------------


def test_answers_slower_than_the_timeout_are_a_typed_error_then_the_job_is_found(tap, tmp_path,
                                                                              figures):
    with figures.case("faults", "every answer past the timeout"):
        query = fresh_query()
        desk = make_desk(tmp_path / "d", attempts=2, timeout=0.5)
        tap.configure(slow_response=1.0)
        try:
            kind, value = outcome(desk, tap.url, query)
        finally:
            tap.configure(slow_response=0)
        assert kind == "error"
        assert_clear(value)
        assert isinstance(value, ServiceUnreachable)
        time.sleep(1.5)  # the service handles the requests the client gave up on
        check_consistent(tmp_path / "d")
        job = make_desk(tmp_path / "d").submit(tap.url, query)
        job.wait(timeout=60, progress=False)
        assert_correct(tap, job, query)
        assert len(server_jobs(tap, query)) == 1, "the job created during the timeouts is reused"
        check_consistent(tmp_path / "d")


def test_one_slow_poll_is_retried(tap, proxy, tmp_path, figures):
    with figures.case("faults", "one poll past the timeout"):
        proxy.add(Rule("GET", r"/tap/async/\w+(\?.*)?$", action="delay", seconds=8.0, times=1))
        query = fresh_query()
        kind, value = outcome(make_desk(tmp_path / "d", timeout=1.0, wait_window=1), proxy.url,
                              query)
        assert kind == "result", repr(value)
        assert_correct(tap, value, query)
        assert len(server_jobs(tap, query)) == 1
        check_consistent(tmp_path / "d")


# --- jobs the service forgets, destroys or loses in a restart ---------------------------------


def test_job_destroyed_before_its_result_is_fetched(tap, tmp_path, figures):
    with figures.case("faults", "job destroyed before fetch"):
        query = fresh_query()
        desk = make_desk(tmp_path / "d")
        tap.configure(destruction=1.0)
        try:
            job = desk.submit(tap.url, query)
        finally:
            tap.configure(destruction=86_400)
        deadline = time.monotonic() + 30
        while server_jobs(tap, query) and time.monotonic() < deadline:
            time.sleep(0.2)
        assert not server_jobs(tap, query), "the service destroyed the job"
        with pytest.raises(JobLost) as info:
            job.wait(timeout=30, progress=False)
        assert_clear(info.value)
        assert job.phase == phases.LOST
        check_consistent(tmp_path / "d")
        again = desk.submit(tap.url, query).wait(timeout=60, progress=False)
        assert again.id != job.id
        assert_correct(tap, again, query)
        check_consistent(tmp_path / "d")


def test_service_restarting_mid_job(tmp_path, figures):
    tap = spawn(state=tmp_path / "tap", rows=ROWS, exec_delay=3.0)
    try:
        with figures.case("faults", "service restarted (SIGKILL) mid-job"):
            query = fresh_query()
            desk = make_desk(tmp_path / "d")
            job = desk.submit(tap.url, query)
            deadline = time.monotonic() + 30
            while time.monotonic() < deadline:
                if any(j["phase"] == "EXECUTING" for j in server_jobs(tap, query)):
                    break
                time.sleep(0.1)
            outcome_box: dict = {}

            def waiter():
                try:
                    job.wait(timeout=90, progress=False)
                    outcome_box["result"] = job
                except BaseException as exc:  # noqa: BLE001 - handed to the test thread
                    outcome_box["error"] = exc

            thread = threading.Thread(target=waiter)
            thread.start()
            time.sleep(0.5)  # the waiter is inside a blocking WAIT now
            tap.restart(hard=True)
            thread.join(120)
            assert not thread.is_alive()
            exc = outcome_box.get("error")
            assert isinstance(exc, JobFailed), repr(outcome_box)
            assert_clear(exc)
            assert "restart" in exc.message
            assert job.phase == phases.ERROR
            check_consistent(tmp_path / "d")
            again = desk.submit(tap.url, query).wait(timeout=60, progress=False)
            assert again.id != job.id
            assert_correct(tap, again, query)
            # The stopped job and the one run anew; nothing else.
            assert sorted(j["phase"] for j in server_jobs(tap, query)) == ["COMPLETED", "ERROR"]
            check_consistent(tmp_path / "d")
    finally:
        tap.stop()


# --- a full disk ----------------------------------------------------------------------------------


def fill(disk: Path, leave: int) -> Path:
    """Fill the disk until ``leave`` bytes are free; the filler file is returned."""
    filler = disk / "filler"
    free = shutil.disk_usage(disk).free
    with open(filler, "ab") as fh:
        fh.write(b"\0" * max(0, free - leave))
    return filler


def test_disk_full_during_download(tap, small_disk, tmp_path, figures):
    with figures.case("faults", "disk full during download"):
        query = fresh_query("*")
        root = small_disk / "desk"
        desk = make_desk(root)
        filler = fill(small_disk, 200_000)
        kind, value = outcome(desk, tap.url, query)
        assert kind == "error"
        assert isinstance(value, StorageFull), repr(value)
        assert_clear(value)
        check_consistent(root)
        filler.unlink()
        job = desk.submit(tap.url, query).wait(timeout=60, progress=False)
        assert_correct(tap, job, query)
        assert len(server_jobs(tap, query)) == 1
        check_consistent(root)


def test_disk_full_at_submit(tap, small_disk, figures):
    with figures.case("faults", "disk full at submit"):
        query = fresh_query()
        root = small_disk / "desk"
        desk = make_desk(root)
        filler = fill(small_disk, 0)
        with pytest.raises(JobdeskError) as info:
            desk.submit(tap.url, query).wait(timeout=60, progress=False)
        assert isinstance(info.value, StorageFull), repr(info.value)
        assert_clear(info.value)
        filler.unlink()
        check_consistent(root)
        job = desk.submit(tap.url, query).wait(timeout=60, progress=False)
        assert_correct(tap, job, query)
        assert len(server_jobs(tap, query)) == 1
        check_consistent(root)

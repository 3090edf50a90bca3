"""Crash safety: a client process SIGKILLed at any point of submit, wait, download or publish,
then a fresh process re-submitting, leaves a sound desk and exactly one server job per query.

Kill points are chosen two ways: held exchanges at the fault proxy (the service has created the
job but its answer has not reached the client, i.e. between the job's creation and its record;
RUN held before or after the service saw it; a WAIT held; a download held after some bytes), and
kills after a random delay, which land anywhere (index writes, conversion, commits, publishing).

The clients are forked from a forkserver that has jobdesk imported already (a kill-and-recover
round then takes a fraction of a second instead of two interpreter start-ups).
"""

from __future__ import annotations

import contextlib
import multiprocessing as mp
import os
import random
import signal
import time

import pytest

from jobdesk import Desk, phases
from jobdesk.localtap import spawn
from reliability_support import FULL, FaultProxy, Rule, check_consistent, server_jobs

RUNS = 200 if FULL else 16
WARM_UP = "SELECT TOP 10 orrery_id FROM orrery.sources ORDER BY orrery_id"
SEED = 20240917
ROWS = 2000

# Held exchanges: (name, rule); the client is killed while the proxy holds it.
HELD = [
    ("after intent, before the create reached the service",
     dict(method="POST", path=r"/tap/async$", action="hold_before")),
    ("job created on the service, answer not yet recorded",
     dict(method="POST", path=r"/tap/async$", action="hold")),
    ("RUN not yet at the service",
     dict(method="POST", path=r"/phase$", action="hold_before")),
    ("RUN taken, answer not yet read",
     dict(method="POST", path=r"/phase$", action="hold")),
    ("inside a blocking WAIT",
     dict(method="GET", path=r"/tap/async/\w+\?", action="hold")),
    ("mid-download, 0 bytes",
     dict(method="GET", path=r"/results/result$", action="hold_mid", after=0)),
    ("mid-download, 3000 bytes",
     dict(method="GET", path=r"/results/result$", action="hold_mid", after=3000)),
]


def client(root: str, url: str, query: str, groups: list[str]) -> None:
    """One kernel's cell: submit and wait (killed part-way, or run to the end)."""
    desk = Desk(root, groups=groups or None, wait_window=1, attempts=3, timeout=10)
    job = desk.submit(url, query)
    job.wait(timeout=120, progress=False)
    job.table()


@pytest.fixture(scope="module")
def world(tmp_path_factory):
    work = tmp_path_factory.mktemp("crash")
    tap = spawn(state=work / "tap", rows=ROWS, exec_delay=0.3)
    ctx = mp.get_context("forkserver")
    ctx.set_forkserver_preload(["jobdesk.desk", "reliability_support", "test_crash_safety"])
    try:
        with FaultProxy(tap.url) as proxy:
            yield work, tap, proxy, ctx
    finally:
        tap.stop()


def run_client(ctx, *args, timeout: float = 180) -> int:
    proc = ctx.Process(target=client, args=args)
    proc.start()
    proc.join(timeout)
    if proc.is_alive():
        proc.kill()
        proc.join()
        raise AssertionError("the re-submitting client did not finish")
    return proc.exitcode


def plan(runs: int, span: float) -> list[tuple[str, dict | None, float]]:
    """Every held point first (twice when there is room), then random-delay kills."""
    rng = random.Random(SEED)
    points = [(name, rule, 0.0) for name, rule in HELD]
    if runs >= 4 * len(HELD):
        points += points
    points = points[:runs]
    while len(points) < runs:
        points.append(("after a random delay", None, rng.uniform(0.0, span)))
    return points


@pytest.mark.timeout(3600 if FULL else 300)
def test_kill_anywhere_then_resubmit(world, figures):
    work, tap, proxy, ctx = world
    root = work / "desk"
    group = work / "group"
    groups = [str(group)] if _groups_available() else []
    Desk(root, groups=groups or None)  # the root (and group) exist before the first client
    # How long one clean client takes, so random kills spread over its whole life.
    started = time.monotonic()
    assert run_client(ctx, str(root), proxy.url, WARM_UP, groups) == 0
    span = time.monotonic() - started
    failures = []
    finished_first = 0
    for i, (name, rule_args, delay) in enumerate(plan(RUNS, span)):
        query = (f"SELECT orrery_id, ra, dec FROM orrery.sources WHERE orrery_id % 97 <> {i} "
                 f"ORDER BY orrery_id")
        label = f"run {i}: kill {name}" + (f" ({delay:.2f} s)" if rule_args is None else "")
        try:
            with figures.case("kills", name):
                rule = proxy.add(Rule(times=1, **rule_args)) if rule_args else None
                victim = ctx.Process(target=client, args=(str(root), proxy.url, query, groups))
                victim.start()
                if rule is not None:
                    assert rule.reached.wait(60), f"{label}: the held point was never reached"
                else:
                    time.sleep(delay)
                with contextlib.suppress(ProcessLookupError):
                    os.kill(victim.pid, signal.SIGKILL)
                victim.join(30)
                if victim.exitcode != -signal.SIGKILL:
                    assert victim.exitcode == 0, f"{label}: the client failed by itself"
                    finished_first += 1
                proxy.clear()
                # A fresh process re-submits the same query and must get the one right answer.
                code = run_client(ctx, str(root), proxy.url, query, groups)
                assert code == 0, f"{label}: the re-submitting client failed (exit {code})"
                jobs = server_jobs(tap, query)
                assert len(jobs) == 1, f"{label}: {len(jobs)} server jobs"
                assert jobs[0]["phase"] == "COMPLETED", f"{label}: {jobs[0]}"
                desk = Desk(root)
                records = desk.jobs(text=query, limit=None)
                done = [r for r in records if r.phase == phases.COMPLETED]
                assert len(done) == 1, f"{label}: {[r.record['phase'] for r in records]}"
                assert desk.store.verify(done[0].record["result_sha256"])
                assert desk.store.verify(done[0].record["parquet_sha256"])
                assert done[0].rows == len(done[0].table())
                check_consistent(root)
        except AssertionError as exc:
            failures.append(str(exc).splitlines()[0])
    print(f"crash safety: {RUNS} runs, {RUNS - finished_first} killed mid-way, "
          f"{finished_first} finished before the kill, {len(failures)} failed")
    assert not failures, f"{len(failures)} of {RUNS} runs failed: {failures[:10]}"


def _groups_available() -> bool:
    try:
        from jobdesk.groups import GroupCaches  # noqa: F401
    except ImportError:
        return False
    return True

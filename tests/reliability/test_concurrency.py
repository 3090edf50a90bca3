"""Concurrency: many processes submitting overlapping queries against one index at once.

Each process is a kernel running the same cells in its own order; together they must make
exactly one server job and one record per distinct query, lose nothing, and never show
"database is locked".
"""

from __future__ import annotations

import json
import multiprocessing as mp
import random
import time
import traceback
from pathlib import Path


from jobdesk import Desk, phases
from jobdesk.localtap import spawn
from reliability_support import FULL, check_consistent

PROCESSES, SUBMISSIONS, QUERIES = (8, 200, 20) if FULL else (4, 30, 6)


def queries(n: int) -> list[str]:
    return [f"SELECT orrery_id, mag_lime FROM orrery.sources WHERE orrery_id % {n} = {i} "
            f"ORDER BY orrery_id" for i in range(n)]


def kernel(root: str, url: str, seed: int, start: float, out: str) -> None:
    """Submit SUBMISSIONS times, in a seeded order, starting at ``start`` with the others."""
    rng = random.Random(seed)
    texts = queries(QUERIES)
    seen: dict[str, list] = {"ids": [], "errors": []}
    while time.time() < start:
        time.sleep(0.001)
    try:
        desk = Desk(root, wait_window=2)
        for _ in range(SUBMISSIONS):
            query = rng.choice(texts)
            try:
                job = desk.submit(url, query).wait(timeout=300, progress=False)
                assert len(job.table()) == job.rows
                seen["ids"].append([query, job.id])
            except Exception as exc:  # noqa: BLE001 - reported to the test, which fails on it
                seen["errors"].append("".join(traceback.format_exception(exc)))
    except Exception as exc:  # noqa: BLE001
        seen["errors"].append("".join(traceback.format_exception(exc)))
    Path(out).write_text(json.dumps(seen))


def test_many_processes_one_index(tmp_path, figures, capfd):
    tap = spawn(state=tmp_path / "tap", rows=2000, exec_delay=0.5)
    try:
        root = tmp_path / "desk"
        Desk(root)
        ctx = mp.get_context("forkserver")
        ctx.set_forkserver_preload(["jobdesk.desk", "test_concurrency"])
        start = time.time() + 3.0
        outs = [tmp_path / f"kernel-{n}.json" for n in range(PROCESSES)]
        procs = [ctx.Process(target=kernel, args=(str(root), tap.url, n, start, str(outs[n])))
                 for n in range(PROCESSES)]
        for p in procs:
            p.start()
        for p in procs:
            p.join(900)
        stats = tap.stats()
    finally:
        tap.stop()
    captured = capfd.readouterr()
    results = [json.loads(o.read_text()) for o in outs]
    errors = [e for r in results for e in r["errors"]]
    ids = [pair for r in results for pair in r["ids"]]
    submitted = PROCESSES * SUBMISSIONS
    figures.add("concurrency", f"{PROCESSES} processes x {SUBMISSIONS} submissions over "
                f"{QUERIES} queries", tried=submitted, held=len(ids),
                server_jobs=stats["jobs_created"], distinct_queries=QUERIES)
    assert not errors, errors[:3]
    assert all(p.exitcode == 0 for p in procs)
    assert len(ids) == submitted, "every submission answered"
    # One record per query, whichever process asked first, and one server job each.
    by_query: dict[str, set] = {}
    for query, job_id in ids:
        by_query.setdefault(query, set()).add(job_id)
    assert all(len(v) == 1 for v in by_query.values()), by_query
    assert stats["jobs_created"] == len(by_query) == QUERIES
    assert sorted(j["query"] for j in stats["jobs"]) == sorted(queries(QUERIES))
    desk = Desk(root)
    records = desk.jobs(limit=None)
    assert len(records) == QUERIES
    assert all(r.phase == phases.COMPLETED for r in records)
    check_consistent(root)
    everything = captured.out + captured.err + json.dumps(results)
    assert "database is locked" not in everything
    assert "IndexBusy" not in everything

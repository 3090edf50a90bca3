"""The SQLite index: claims, leases and ordered starts, checked with real processes and files."""

import multiprocessing as mp
import sqlite3
import subprocess
import sys
import time

import pytest
import sqlite_utils

from jobdesk import phases
from jobdesk.index import SCHEMA_VERSION, Index, owner_alive, this_process


def _record(job_id, service="http://svc/tap", phase=phases.UNSENT, **extra):
    return {"id": job_id, "service": service, "phase": phase, "adql": "SELECT 1", **extra}


def _claim_many(path, key, n, out):
    ix = Index(path)
    for i in range(n):
        rec, created = ix.claim(key, _record(f"{mp.current_process().pid}-{i}"),
                                reuse=lambda r: r["phase"] != phases.ERROR)
        out.put((rec["id"], created))


def test_claim_is_atomic_across_processes(tmp_path):
    path = tmp_path / "index.sqlite"
    Index(path)
    ctx = mp.get_context("spawn")  # a fork would copy whatever locks other threads hold
    out = ctx.Queue()
    procs = [ctx.Process(target=_claim_many, args=(path, "k1", 25, out)) for _ in range(6)]
    for p in procs:
        p.start()
    got = [out.get(timeout=60) for _ in range(150)]
    for p in procs:
        p.join(timeout=60)
        assert p.exitcode == 0
    ids = {job_id for job_id, _ in got}
    assert len(ids) == 1, "every claimant must get the one record"
    assert sum(created for _, created in got) == 1
    assert Index(path).count() == 1


def test_rejected_record_gets_a_successor(tmp_path):
    ix = Index(tmp_path / "i.sqlite")
    first, _ = ix.claim("k", _record("a"), reuse=lambda r: True)
    ix.update("a", phase=phases.ERROR, error="boom")
    second, created = ix.claim("k", _record("b"), reuse=lambda r: r["phase"] != phases.ERROR)
    assert created and second["id"] == "b"
    assert [h["phase"] for h in ix.history("a")] == [phases.UNSENT, phases.ERROR]


def test_schema_is_versioned(tmp_path):
    path = tmp_path / "i.sqlite"
    Index(path).close()
    assert sqlite3.connect(path).execute("PRAGMA user_version").fetchone()[0] == SCHEMA_VERSION
    Index(path)  # re-opening migrates nothing and does not fail


def test_records_of_an_older_schema_stay_readable(tmp_path):
    # A v3 index (before the "not yet sent" phase was renamed) with a waiting record in it.
    from jobdesk.index import MIGRATIONS

    path = tmp_path / "i.sqlite"
    db = sqlite_utils.Database(path)
    for step in MIGRATIONS[:3]:
        step(db)
    db.execute("PRAGMA user_version = 3")
    db.execute("INSERT INTO jobs (id, key, service, phase, created, adql) "
               "VALUES ('old', 'k', 'http://svc/tap', 'LOCAL', 1.0, 'SELECT 1')")
    db.execute("INSERT INTO phases (job_id, phase, at) VALUES ('old', 'LOCAL', 1.0)")
    db.conn.commit()
    db.close()
    ix = Index(path)
    assert ix.get("old")["phase"] == phases.UNSENT
    assert [h["phase"] for h in ix.history("old")] == [phases.UNSENT]
    assert [r["id"] for r in ix.unfinished()] == ["old"]


def test_newer_schema_is_refused(tmp_path):
    path = tmp_path / "i.sqlite"
    Index(path).close()
    con = sqlite3.connect(path)
    con.execute(f"PRAGMA user_version = {SCHEMA_VERSION + 5}")
    con.commit()
    con.close()
    with pytest.raises(Exception, match="newer"):
        Index(path)


def test_lease_is_exclusive_until_owner_dies(tmp_path):
    ix = Index(tmp_path / "i.sqlite")
    ix.claim("k", _record("a"), reuse=lambda r: True)
    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                          capture_output=True, text=True).stdout.strip()
    host = this_process().rpartition(":")[0]
    assert ix.take_lease("a", f"{host}:{dead}", 60)
    assert not owner_alive(f"{host}:{dead}")
    assert ix.take_lease("a", "me:1", 60), "a dead owner's lease can be taken over"
    assert not ix.take_lease("a", "other-host:2", 60), "a live (remote) owner keeps it"
    ix.release("a", "me:1")
    assert ix.take_lease("a", "other-host:2", 60)


def test_expired_lease_can_be_taken(tmp_path):
    ix = Index(tmp_path / "i.sqlite")
    ix.claim("k", _record("a"), reuse=lambda r: True)
    assert ix.take_lease("a", "far-host:1", 0.01)
    time.sleep(0.05)
    assert ix.take_lease("a", "far-host:2", 60)


def test_starts_follow_order_and_limit(tmp_path):
    ix = Index(tmp_path / "i.sqlite")
    for n, job_id in enumerate(["a", "b", "c"]):
        ix.claim(f"k{n}", _record(job_id, created=1000.0 + n), reuse=lambda r: True)
    assert not ix.claim_start("b", limit=1, owner="me:1", seconds=60), "b must wait behind a"
    assert ix.claim_start("a", limit=1, owner="me:1", seconds=60)
    ix.update("a", phase=phases.EXECUTING)
    ix.release("a", "me:1")
    assert not ix.claim_start("b", limit=1, owner="me:1", seconds=60), "a holds the only slot"
    ix.update("a", phase=phases.COMPLETED)
    assert ix.claim_start("b", limit=1, owner="me:1", seconds=60)
    assert ix.claim_start("c", limit=2, owner="me:1", seconds=60)


def test_list_filters_and_pages_newest_first(tmp_path):
    ix = Index(tmp_path / "i.sqlite")
    for n in range(30):
        ix.claim(f"k{n}", _record(f"j{n:02d}", created=1000.0 + n, label=f"label {n}",
                                  phase=phases.COMPLETED if n % 3 else phases.ERROR),
                 reuse=lambda r: True)
    page = ix.list(limit=10)
    assert [r["id"] for r in page] == [f"j{n:02d}" for n in range(29, 19, -1)]
    assert [r["id"] for r in ix.list(limit=5, offset=10)] == [f"j{n:02d}" for n in range(19, 14, -1)]
    assert ix.count(phase=phases.ERROR) == 10
    assert {r["id"] for r in ix.list(text="label 2", limit=None)} == {
        "j02", *{f"j{n}" for n in range(20, 30)}}
    assert ix.count(text="100%") == 0, "LIKE wildcards in the search text are literal"


def test_version_changes_on_every_update(tmp_path):
    ix = Index(tmp_path / "i.sqlite")
    ix.claim("k", _record("a"), reuse=lambda r: True)
    v1 = ix.version()
    time.sleep(0.002)
    ix.update("a", rows=3)
    assert ix.version() != v1
    ix.forget("a")
    assert ix.count() == 0 and ix.integrity() == "ok"


def test_unfinished_lists_active_and_unfetched_only(tmp_path):
    ix = Index(tmp_path / "i.sqlite")
    wanted = {"run": phases.EXECUTING, "wait": phases.UNSENT, "todo": phases.COMPLETED}
    done = {"done": phases.COMPLETED, "bad": phases.ERROR}
    for n, (job_id, phase) in enumerate({**wanted, **done}.items()):
        ix.claim(f"k{n}", _record(job_id, phase=phase, created=1000.0 + n), reuse=lambda r: True)
    ix.update("done", parquet_sha256="b" * 64)
    assert {r["id"] for r in ix.unfinished()} == set(wanted)
    assert ix.unfinished(service="http://other/tap") == []

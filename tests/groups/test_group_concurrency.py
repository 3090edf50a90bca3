"""Several processes publishing and reading the same keys at once, on a directory and on S3.

No torn files (every manifest a reader meets parses), no lost manifests (every manifest a
publisher was told it wrote is there), every served object verified.
"""

from __future__ import annotations

import hashlib
import json
import multiprocessing as mp
import os
import secrets
import time
import traceback
import warnings

from jobdesk import Desk
from jobdesk.groups import layout
from jobdesk.groups.layer import GroupLayer
from jobdesk.store import Store

KEYS = [hashlib.sha256(f"concurrent key {i}".encode()).hexdigest() for i in range(4)]
PUBLISHERS, READERS, ROUNDS = 4, 2, 8


def _object(store: Store, data: bytes) -> str:
    tmp = store.temp()
    tmp.write_bytes(data)
    return store.commit(tmp)[0]


def _publisher(group, root, ready, go, out):
    """Publish ROUNDS results: a unique raw object each, a per-key parquet object shared by
    every publisher (so the same object is written by several processes at once)."""
    store = Store(root)
    written = []
    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")
        layer = GroupLayer(group)
        ready.put(os.getpid())
        go.wait()
        for i in range(ROUNDS):
            key = KEYS[i % len(KEYS)]
            raw = os.urandom(30_000) + secrets.token_bytes(8)
            shared = hashlib.sha256(key.encode()).digest() * 20_000
            record = {"id": f"p{os.getpid()}-{i}", "key": key, "service": "http://127.0.0.1/tap",
                      "adql": "SELECT 1", "rows": i, "truncated": 0,
                      "result_sha256": _object(store, raw), "result_bytes": len(raw),
                      "parquet_sha256": _object(store, shared), "finished": time.time()}
            written.append(layer.publish(record, store, publisher=f"p{os.getpid()}@test"))
    out.put({"written": written, "warnings": [str(w.message) for w in seen]})


def _reader(group, root, ready, go, out):
    store = Store(root)
    served = parsed = 0
    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")
        layer = GroupLayer(group)
        ready.put(os.getpid())
        go.wait()
        stop = time.monotonic() + 3
        while time.monotonic() < stop:
            for key in KEYS:
                parsed += sum(1 for _ in layer.manifests(key))
                got = layer.serve(key, store)
                if got is not None:
                    served += 1
                    assert all(store.verify(sha) for sha, _ in got.copies.values())
    out.put({"served": served, "parsed": parsed, "warnings": [str(w.message) for w in seen]})


def _start_together(procs, ready, go):
    for p in procs:
        p.start()
    for _ in procs:
        ready.get(timeout=240)
    go.set()


def test_many_processes_publish_and_read_the_same_keys(tmp_path, place):
    ctx = mp.get_context("spawn")   # fresh interpreters: nothing inherited from pytest's threads
    out, ready, go = ctx.Queue(), ctx.Queue(), ctx.Event()
    group = place.group(readonly=False)
    procs = [ctx.Process(target=_publisher, args=(group, tmp_path / f"pub{i}", ready, go, out))
             for i in range(PUBLISHERS)]
    procs += [ctx.Process(target=_reader, args=(place.group(readonly=True), tmp_path / f"rd{i}",
                                                ready, go, out))
              for i in range(READERS)]
    _start_together(procs, ready, go)
    results = [out.get(timeout=240) for _ in procs]
    for p in procs:
        p.join(30)
        assert p.exitcode == 0
    problems = [w for r in results for w in r["warnings"]]
    assert problems == [], "no torn or unverifiable file was met"
    written = [rel for r in results for rel in r.get("written", [])]
    assert len(written) == len(set(written)) == PUBLISHERS * ROUNDS
    on_storage = place.manifests()
    assert sorted(written) == on_storage, "no lost manifests, no stray ones"
    for rel in on_storage:
        manifest = layout.parse_manifest(place.storage.read(rel), key=rel.split("/")[2])
        for role in layout.ROLES:
            entry = manifest["objects"][role]
            data = place.storage.read(layout.object_path(entry["sha256"]))
            assert hashlib.sha256(data).hexdigest() == entry["sha256"]
            assert len(data) == entry["bytes"]
    readers = [r for r in results if "served" in r]
    assert sum(r["served"] for r in readers) > 0 and sum(r["parsed"] for r in readers) > 0
    assert place.files(layout.TMP) == []


QUERIES = [f"SELECT TOP {n} orrery_id, mag_lime FROM orrery.sources ORDER BY orrery_id"
           for n in (110, 120, 130)]


def _member(root, group, url, ready, go, out):
    desk = Desk(root, groups=[group], wait_window=5)
    ready.put(os.getpid())
    go.wait()
    try:
        with warnings.catch_warnings(record=True) as seen:
            warnings.simplefilter("always")
            answer = {}
            for query in QUERIES:
                job = desk.submit(url, query).wait(progress=False)
                answer[query] = {"layer": job.record["layer"],
                                 "ids": [int(x) for x in job.table()["orrery_id"]],
                                 "verified": desk.store.verify(job.record["parquet_sha256"])}
        out.put(json.dumps({"answer": answer, "warnings": [str(w.message) for w in seen]}))
    except BaseException:
        out.put(json.dumps({"error": traceback.format_exc(), "history": [
            (j.record, desk.index.history(j.id)) for j in desk.jobs(limit=None)]}, default=str))


def test_members_submitting_the_same_queries_at_once(tap, tmp_path, place):
    ctx = mp.get_context("spawn")
    out, ready, go = ctx.Queue(), ctx.Queue(), ctx.Event()
    procs = [ctx.Process(target=_member, args=(tmp_path / f"m{i}", place.group(readonly=False),
                                               tap.url, ready, go, out)) for i in range(4)]
    _start_together(procs, ready, go)
    results = [json.loads(out.get(timeout=240)) for _ in procs]
    for p in procs:
        p.join(30)
    assert [r for r in results if "error" in r] == []
    assert [w for r in results for w in r["warnings"]] == []
    for query in QUERIES:
        answers = [r["answer"][query] for r in results]
        assert all(a["verified"] for a in answers)
        assert len({tuple(a["ids"]) for a in answers}) == 1
        assert len(answers[0]["ids"]) == int(query.split()[2])
    for rel in place.manifests():
        layout.parse_manifest(place.storage.read(rel))
    assert 1 <= len({rel.split("/")[2] for rel in place.manifests()}) == len(QUERIES)

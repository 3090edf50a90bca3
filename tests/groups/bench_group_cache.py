"""Measure (not a test): lookup latency in a group cache of 100,000 manifests, on a directory
and on the S3-speaking server, and the cost of verifying objects per GB.

    python tests/groups/bench_group_cache.py [--manifests 100000] [--gb 1]

Prints figures; asserts only that lookups find what was put there.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import statistics
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).parent))

from group_support import MotoServer, Place  # noqa: E402
from jobdesk.groups import layout  # noqa: E402
from jobdesk.groups.layer import GroupLayer  # noqa: E402
from jobdesk.store import Store  # noqa: E402


def _manifests(n: int):
    """n manifests of invented results (a fixed seed: key i is sha256 of its number)."""
    sha_a, sha_b = "a" * 64, "b" * 64
    now = time.time()
    for i in range(n):
        key = hashlib.sha256(f"bench {i}".encode()).hexdigest()
        record = {"key": key, "service": "http://127.0.0.1/tap", "adql": f"SELECT {i}",
                  "rows": i, "result_sha256": sha_a, "result_bytes": 1, "parquet_sha256": sha_b,
                  "parquet_bytes": 1, "finished": now}
        manifest = layout.build_manifest(record, publisher="bench@host", published=now)
        yield f"{layout.manifest_dir(key)}/{layout.manifest_name(now)}", \
            layout.encode_manifest(manifest), key


def _fill_posix(root: Path, n: int) -> list[str]:
    keys = []
    for rel, data, key in _manifests(n):
        path = root / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(data)   # setup only: the product's own writes fsync
        keys.append(key)
    return keys


def _fill_s3(place: Place, n: int) -> list[str]:
    keys, batch = [], {}
    fs, base = place.storage.fs, place.storage.base
    for rel, data, key in _manifests(n):
        batch[f"{base}/{rel}"] = data
        keys.append(key)
        if len(batch) == 2000:
            fs.pipe(batch)
            batch = {}
    if batch:
        fs.pipe(batch)
    return keys


def _lookups(layer: GroupLayer, keys: list[str], samples: int = 300) -> dict:
    step = max(1, len(keys) // samples)
    hits, misses = [], []
    for key in keys[::step][:samples]:
        t = time.perf_counter()
        found = next(layer.manifests(key), None)
        hits.append(time.perf_counter() - t)
        assert found is not None and found[1]["key"] == key
        absent = hashlib.sha256(key.encode()).hexdigest()
        t = time.perf_counter()
        assert next(layer.manifests(absent), None) is None
        misses.append(time.perf_counter() - t)
    ms = lambda xs: {"median_ms": round(statistics.median(xs) * 1000, 2),  # noqa: E731
                     "p95_ms": round(sorted(xs)[int(len(xs) * 0.95)] * 1000, 2)}
    return {"hit": ms(hits), "miss": ms(misses), "samples": len(hits)}


def _verify_cost(layer: GroupLayer, place: Place, work: Path, size: int) -> dict:
    blob = work / "blob"
    digest = hashlib.sha256()
    with open(blob, "wb") as fh:
        block = os.urandom(1 << 20)
        for i in range(size >> 20):
            chunk = block[:-8] + i.to_bytes(8, "big")
            digest.update(chunk)
            fh.write(chunk)
    sha = digest.hexdigest()
    place.storage.put_file(layout.object_path(sha), blob)
    t = time.perf_counter()
    hashlib.sha256(blob.read_bytes()).hexdigest()
    hash_only = time.perf_counter() - t
    store = Store(work / "personal")
    t = time.perf_counter()
    assert layer.copy_verified(sha, size, store) is not None
    copy_and_verify = time.perf_counter() - t
    gb = size / 1e9
    return {"bytes": size, "sha256_only_s_per_GB": round(hash_only / gb, 2),
            "copy_verified_s_per_GB": round(copy_and_verify / gb, 2)}


def main() -> None:
    p = argparse.ArgumentParser()
    p.add_argument("--manifests", type=int, default=100_000)
    p.add_argument("--gb", type=float, default=1.0)
    p.add_argument("--skip-s3", action="store_true")
    args = p.parse_args()
    size = int(args.gb * 1e9) >> 20 << 20
    figures = {}
    with tempfile.TemporaryDirectory(prefix="jobdesk-bench-") as tmp:
        work = Path(tmp)
        place = Place(str(work / "group"))
        t = time.perf_counter()
        keys = _fill_posix(work / "group", args.manifests)
        figures["posix_fill_s"] = round(time.perf_counter() - t, 1)
        layer = GroupLayer(place.group(readonly=False))
        figures["posix_lookup"] = _lookups(layer, keys)
        figures["posix_verify"] = _verify_cost(layer, place, work, size)
        if not args.skip_s3:
            server = MotoServer()
            try:
                s3 = Place(server.new_bucket(), server.options(), kind="s3")
                t = time.perf_counter()
                keys = _fill_s3(s3, args.manifests)
                figures["s3_fill_s"] = round(time.perf_counter() - t, 1)
                layer = GroupLayer(s3.group(readonly=False))
                figures["s3_lookup"] = _lookups(layer, keys, samples=100)
                figures["s3_verify"] = _verify_cost(layer, s3, work, min(size, 256 << 20))
            finally:
                server.stop()
    figures["manifests"] = args.manifests
    print(json.dumps(figures, indent=1))


if __name__ == "__main__":
    main()

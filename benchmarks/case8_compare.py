"""Case 8: comparing two results of 5,000,000 rows x 14 columns by key, against simply reading
both Parquet files with pyarrow.

The two files are an invented release and its successor (2% of rows removed, 3% added, every
float moved a little, rows shuffled so matching cannot ride on order).  Each side runs in a
process of its own (``_rss_child``) so peak memory growth is its own; the rate ratio is the
pyarrow read time over the compare time (1.0 = as fast as reading both files).
"""

from __future__ import annotations

import json
import sys

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from benchmarks.common import CaseResult, Context, Row, median, run_capture

FLOATS = ("ra", "dec", "pm_ra_cosdec", "pm_dec", "parallax", "parallax_sigma", "mag_cyan",
          "mag_lime", "mag_rose", "cyan_rose")


def _table(ids: np.ndarray, rng: np.random.Generator) -> pa.Table:
    n = len(ids)
    cols = {"orrery_id": pa.array(ids, pa.int64())}
    for name in FLOATS:
        values = rng.normal(10.0, 3.0, n)
        values[rng.random(n) < 0.01] = np.nan
        cols[name] = pa.array(values, pa.float64())
    cols["var_flag"] = pa.array(rng.integers(0, 2, n).astype(np.int16))
    cols["class_label"] = pa.DictionaryArray.from_arrays(
        pa.array(rng.integers(0, 3, n).astype(np.int8)), pa.array(["star", "galaxy", "qso"])
    ).cast(pa.string())
    cols["visits"] = pa.array(rng.integers(0, 50, n).astype(np.int32))
    return pa.table(cols)


def make_files(ctx: Context, rows: int):
    old_path = ctx.cache / f"compare-{rows}-old.parquet"
    new_path = ctx.cache / f"compare-{rows}-new.parquet"
    if old_path.exists() and new_path.exists():
        return old_path, new_path
    rng = np.random.default_rng(20261202)
    ids = 3_100_000 + np.cumsum(rng.integers(1, 4, rows), dtype=np.int64)
    old = _table(ids, rng)
    pq.write_table(old, old_path)
    keep = rng.random(rows) >= 0.02
    extra = ids[-1] + np.cumsum(rng.integers(1, 4, int(rows * 0.03)), dtype=np.int64)
    new_ids = np.concatenate([ids[keep], extra])
    new = _table(new_ids, rng)
    order = rng.permutation(len(new_ids))
    new = new.take(pa.array(order))
    pq.write_table(new, new_path)
    return old_path, new_path


def _child(mode: str, args: dict) -> dict:
    out = run_capture([sys.executable, "-m", "benchmarks._rss_child", mode, json.dumps(args)])
    return json.loads(out.strip().splitlines()[-1])


def run(ctx: Context) -> CaseResult:
    rows = 200_000 if ctx.quick else 5_000_000
    old, new = make_files(ctx, rows)
    args = {"old": str(old), "new": str(new), "key": "orrery_id"}
    reads, compares = [], []
    for _ in range(1 if ctx.quick else 3):              # interleaved: noise hits both alike
        reads.append(_child("read_parquet", args))
        compares.append(_child("compare", args))
    read_s = median([r["seconds"] for r in reads])
    cmp_s = median([c["seconds"] for c in compares])
    growth = max(c["growth_mb"] for c in compares)
    read_growth = max(r["growth_mb"] for r in reads)
    ratio = read_s / cmp_s
    size = f"{rows / 1e6:g}M rows x 14 cols"
    result_rows = [
        Row("case8", f"compare by key, {size}", cmp_s, "s", "pyarrow reads both files", read_s,
            ratio, "the read rate", ">= 0.5x the read rate", ratio >= 0.5),
        Row("case8", f"compare peak memory growth, {size}", growth, "MB",
            "pyarrow reading both files", read_growth,
            growth / read_growth if read_growth else None,
            "the read's growth", "< 500 MB", growth < 500),
    ]
    details = {"rows": rows, "compare": compares, "read": reads,
               "bytes": [old.stat().st_size, new.stat().st_size]}
    return CaseResult(result_rows, details)

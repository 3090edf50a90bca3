"""Case 11: a quick look at a 5,000,000-row result (500,000 with --quick), over REST.

The result is a Parquet file laid out as jobdesk's conversion writes it (row groups of
1,000,000 rows, VOTable units and UCDs in the field metadata), registered in a desk's index as
a completed job. A real Jupyter Server with the jobdesk extension serves it. Measured: the first
sky image and the first histogram (drawn from the file), the peak memory growth of the server
process while drawing them (VmHWM after a reset through /proc/<pid>/clear_refs, proc(5)), and the
same images again (served from the image cache). Baseline for the first image: the naive way,
in this process: read both columns whole with pyarrow, then numpy.histogram2d.
"""

from __future__ import annotations

import hashlib
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import requests

from benchmarks.case5_index_scale import Jupyter
from benchmarks.common import MB, CaseResult, Context, Row, median, repeat, timed
from jobdesk import Desk
from jobdesk.store import stat_stamp

SEED = 7


def build(path: Path, rows: int) -> None:
    """An invented all-sky catalogue slice, written a row group at a time."""
    rng = np.random.default_rng(SEED)
    schema = pa.schema([
        pa.field("orrery_id", pa.int64(), metadata={"datatype": "long", "ucd": "meta.id"}),
        pa.field("ra", pa.float64(), metadata={"datatype": "double", "unit": "deg",
                                               "ucd": "pos.eq.ra;meta.main"}),
        pa.field("dec", pa.float64(), metadata={"datatype": "double", "unit": "deg",
                                                "ucd": "pos.eq.dec;meta.main"}),
        pa.field("mag_lime", pa.float32(), metadata={"datatype": "float", "unit": "mag",
                                                     "ucd": "phot.mag"}),
    ])
    tmp = path.with_suffix(".partial")
    with pq.ParquetWriter(tmp, schema, compression="snappy") as writer:
        done = 0
        while done < rows:
            n = min(1_000_000, rows - done)
            writer.write_table(pa.table({
                "orrery_id": np.arange(done, done + n, dtype=np.int64) + 3_100_001,
                "ra": rng.uniform(0, 360, n),
                "dec": np.degrees(np.arcsin(rng.uniform(-1, 1, n))),
                "mag_lime": rng.normal(18, 1.5, n).astype(np.float32)}, schema=schema))
            done += n
    tmp.rename(path)


def registered_desk(ctx: Context, rows: int) -> tuple[Path, str, Path]:
    cached = ctx.cache / f"quicklook-{rows}.parquet"
    if not cached.exists():
        t, _ = timed(lambda: build(cached, rows))
        ctx.log(f"  built {rows:,}-row Parquet in {t:.1f} s ({cached})")
    root = ctx.work / "case11-desk"
    desk = Desk(root)
    tmp = desk.store.temp(".parquet")
    tmp.write_bytes(cached.read_bytes())
    sha, path = desk.store.commit(tmp)
    job_id = hashlib.sha256(f"case11 {rows}".encode()).hexdigest()[:16]
    now = time.time()
    desk.index.insert({"id": job_id, "key": "7" * 64, "service": "http://tap.bench.invalid/tap",
                       "adql": "SELECT orrery_id, ra, dec, mag_lime FROM orrery.sources",
                       "phase": "COMPLETED", "created": now, "finished": now, "rows": rows,
                       "truncated": 0, "parquet_sha256": sha, "parquet_stat": stat_stamp(path),
                       "result_bytes": path.stat().st_size, "layer": "personal"})
    desk.index.close()
    return root, job_id, path


def _status_kb(pid: int, name: str) -> int:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith(name + ":"):
            return int(line.split()[1])
    raise RuntimeError(f"no {name} for {pid}")


def run(ctx: Context) -> CaseResult:
    rows = 500_000 if ctx.quick else 5_000_000
    root, job_id, path = registered_desk(ctx, rows)
    figures: dict[str, float] = {}
    with Jupyter(ctx.work / "case11-jupyter", root) as jp:
        session = requests.Session()
        session.headers.update(jp.headers)
        base = jp.url(f"jobdesk/api/jobs/{job_id}/quicklook")
        assert session.get(base, timeout=60).json()["sky"] == {"ra": "ra", "dec": "dec"}
        pid = jp.proc.pid

        def first(url, params=None):
            Path(f"/proc/{pid}/clear_refs").write_text("5")  # peak := current RSS
            before = _status_kb(pid, "VmRSS")
            t, answer = timed(lambda: session.get(url, params=params, timeout=600))
            answer.raise_for_status()
            return t, (_status_kb(pid, "VmHWM") - before) * 1024

        figures["sky_first"], figures["sky_mem"] = first(base + "/sky")
        figures["hist_first"], figures["hist_mem"] = first(base + "/histogram",
                                                            {"column": "mag_lime"})
        figures["sky_cached"] = median(repeat(
            lambda: session.get(base + "/sky", timeout=60).raise_for_status(), 20, warmup=1))
        figures["hist_cached"] = median(repeat(
            lambda: session.get(base + "/histogram", params={"column": "mag_lime"},
                                timeout=60).raise_for_status(), 20, warmup=1))

    def naive():
        t = pq.read_table(path, columns=["ra", "dec"])
        return np.histogram2d(t["ra"].to_numpy(), t["dec"].to_numpy(), bins=[240, 120])

    figures["naive"] = median(repeat(naive, 3, warmup=0))
    f = figures
    n = f"{rows / 1e6:g}M rows"
    out = [
        Row("case11", f"quick look, first sky image over REST, {n}", f["sky_first"], "s",
            "read 2 columns whole + numpy.histogram2d", f["naive"], f["sky_first"] / f["naive"],
            "the naive in-process time", "< 2 s", f["sky_first"] < 2.0),
        Row("case11", f"quick look, server peak memory growth (sky), {n}", f["sky_mem"] / MB, "MB",
            None, None, None, None, "< 200 MB", f["sky_mem"] < 200 * MB),
        Row("case11", f"quick look, first histogram over REST, {n}", f["hist_first"], "s",
            "first sky image", f["sky_first"], f["hist_first"] / f["sky_first"],
            "the sky image's time", "< 2 s", f["hist_first"] < 2.0),
        Row("case11", f"quick look, server peak memory growth (histogram), {n}",
            f["hist_mem"] / MB, "MB", None, None, None, None, "< 200 MB",
            f["hist_mem"] < 200 * MB),
        Row("case11", f"quick look, sky image again (image cache), {n}", f["sky_cached"], "s",
            "first sky image", f["sky_first"], f["sky_first"] / f["sky_cached"], "faster",
            "< 20 ms", f["sky_cached"] < 0.020),
        Row("case11", f"quick look, histogram again (image cache), {n}", f["hist_cached"], "s",
            "first histogram", f["hist_first"], f["hist_first"] / f["hist_cached"], "faster",
            "< 20 ms", f["hist_cached"] < 0.020),
    ]
    return CaseResult(out, {"rows": rows, "figures": figures})

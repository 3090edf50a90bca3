"""Case 2: peak memory growth while fetching a large result, jobdesk vs pyvo.

Each client runs in a fresh process (``benchmarks._rss_child``) so its peak RSS is its own.
jobdesk's figure is the whole ``desk.submit(...).wait()``: the streamed download *and* the
streaming VOTable-to-Parquet conversion.  A third process runs ``Remote.download`` alone, to show
what the download part costs by itself.  pyvo re-attaches to the job jobdesk ran and calls
``fetch_result()``, which parses the whole VOTable in memory.
"""

from __future__ import annotations

import json
import sys

from benchmarks.common import MB, CaseResult, Context, Row, run_capture

TARGET_MB = 100


def union_of(copies: int) -> str:
    """``copies`` times the whole catalogue: a big result without a bigger catalogue."""
    return " UNION ALL ".join(["SELECT * FROM orrery.sources"] * copies)


def sizes(ctx: Context) -> list[tuple[str, str, int]]:
    rows = ctx.catalogue_rows
    if ctx.quick:
        return [("2 x 100k rows", union_of(2), 2 * rows)]
    return [("5M rows", union_of(5), 5 * rows)]  # ~1.1 GB; ~7 min with the service's own work


def child(mode: str, **args) -> dict:
    out = run_capture([sys.executable, "-m", "benchmarks._rss_child", mode, json.dumps(args)])
    return json.loads(out.strip().splitlines()[-1])


def run(ctx: Context) -> CaseResult:
    tap = ctx.big_tap()
    rows_out: list[Row] = []
    details: dict = {"sizes": []}
    for i, (label, adql, maxrec) in enumerate(sizes(ctx)):
        ours = child("jobdesk", root=str(ctx.work / f"case2-desk-{i}"), url=tap.url, adql=adql,
                     maxrec=maxrec, fmt="votable")   # TABLEDATA: the conversion's memory
        size_mb = ours["result_bytes"] / MB
        ctx.log(f"  {label}: {size_mb:,.0f} MB VOTable; jobdesk +{ours['growth_mb']:.0f} MB "
                f"in {ours['seconds']:.0f} s")
        ctx.forget_later(ours["job_url"])
        result_url = ours["job_url"] + "/results/result"
        plain = child("download", service=tap.url, result_url=result_url,
                      dest=str(ctx.work / "case2-download.vot"))
        (ctx.work / "case2-download.vot").unlink(missing_ok=True)
        theirs = child("pyvo", job_url=ours["job_url"])
        ctx.log(f"  {label}: download only +{plain['growth_mb']:.0f} MB; "
                f"pyvo +{theirs['growth_mb']:.0f} MB in {theirs['seconds']:.0f} s")
        ctx.shared["largest_result"] = {"url": result_url, "bytes": ours["result_bytes"]}
        what = f"peak RSS growth, submit().wait() incl. Parquet, {size_mb:,.0f} MB VOTable"
        ratio = theirs["growth_mb"] / max(ours["growth_mb"], 1.0)
        rows_out.append(Row("case2", what, ours["growth_mb"], "MB", "pyvo fetch_result()",
                            theirs["growth_mb"], ratio, "less memory", f"< {TARGET_MB} MB",
                            ours["growth_mb"] < TARGET_MB))
        rows_out.append(Row("case2", f"peak RSS growth, Remote.download only, {size_mb:,.0f} MB",
                            plain["growth_mb"], "MB", "pyvo fetch_result()", theirs["growth_mb"],
                            theirs["growth_mb"] / max(plain["growth_mb"], 1.0), "less memory",
                            None, None))
        details["sizes"].append({"label": label, "result_bytes": ours["result_bytes"],
                                 "jobdesk": ours, "download_only": plain, "pyvo": theirs})
    return CaseResult(rows_out, details)

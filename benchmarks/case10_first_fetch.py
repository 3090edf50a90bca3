"""Case 10: the first fetch of a large result, submit to cached table, by result format.

One query (the catalogue several times over), run once per format in a process of its own
(``benchmarks._rss_child``): TABLEDATA, BINARY2, VOParquet, and what jobdesk negotiates by
itself. Each is read against the same work done by hand in the same run: the service's own
execution time (its job document's startTime to endTime) plus ``curl -o`` of the very bytes the
service produced. TABLEDATA's conversion is timed alone on the downloaded file, against the
XML-only path on the same file. pyvo's ``run_async(...).to_table()`` runs the same query on the
same service. Peak memory growth is each child's own (see case 2).
"""

from __future__ import annotations

import shutil
import subprocess
import time
from pathlib import Path

from benchmarks.case2_download_memory import child, union_of
from benchmarks.common import MB, CaseResult, Context, Row, timed
from jobdesk import formats, results, votable_stream
from jobdesk.remote import Remote

FORMATS = {"TABLEDATA": "votable", "BINARY2": "votable/b2", "VOParquet": formats.VOPARQUET,
           "negotiated": None}


def _service_seconds(remote: Remote, job_url: str) -> float:
    status = remote.status(job_url)
    from datetime import datetime

    def t(s):
        return datetime.fromisoformat(s.replace("Z", "+00:00")).timestamp()
    return t(status.end_time) - t(status.start_time)


def run(ctx: Context) -> CaseResult:
    curl = shutil.which("curl")
    if curl is None:
        raise RuntimeError("curl is not installed (apt-get install curl)")
    tap = ctx.big_tap()
    copies = 2 if ctx.quick else 5
    adql = union_of(copies)
    maxrec = copies * ctx.catalogue_rows
    remote = Remote(tap.url)
    rows: list[Row] = []
    details: dict = {"formats": {}}
    seen: dict[str, dict] = {}
    for name, fmt in FORMATS.items():
        # a distinct query text per format: each is a first fetch, none a cache hit
        ours = child("jobdesk", root=str(ctx.work / f"case10-{name}"), url=tap.url,
                     adql=adql + f" -- {name}", maxrec=maxrec, fmt=fmt)
        ctx.forget_later(ours["job_url"])
        url = ours["job_url"] + "/results/result"
        service_s = _service_seconds(remote, ours["job_url"])
        dest = ctx.work / "case10.curl"
        curl_s, _ = timed(lambda: subprocess.run([curl, "-s", "-S", "-f", "-o", str(dest), url],
                                                 check=True))
        dest.unlink(missing_ok=True)
        download_s, _ = timed(lambda: Remote(tap.url).download(url, dest))
        size = ours["result_bytes"]
        conversion_s = max(0.0, ours["fetch_and_convert_s"] - download_s)
        split = {"total_s": ours["seconds"], "service_s": service_s, "download_s": download_s,
                 "conversion_s": conversion_s, "curl_s": curl_s, "bytes": size,
                 "result_fmt": ours["result_fmt"], "growth_mb": ours["growth_mb"]}
        details["formats"][name] = split
        seen[name] = {**split, "file": dest}
        ctx.log(f"  {name}: {size / MB:,.0f} MB, total {ours['seconds']:.1f} s (service "
                f"{service_s:.1f}, download {download_s:.2f}, conversion {conversion_s:.2f}; "
                f"curl {curl_s:.2f}); +{ours['growth_mb']:.0f} MB")
        if name in ("BINARY2", "VOParquet"):
            floor = service_s + curl_s
            rows.append(Row("case10", f"first fetch, {name}, submit to cached table, "
                            f"{size / MB:,.0f} MB", ours["seconds"], "s",
                            "service execution + curl", floor, ours["seconds"] / floor,
                            "that time", "<= 1.5x", ours["seconds"] / floor <= 1.5))
        if name == "TABLEDATA":
            # the conversion alone, on the same bytes: the bulk path against the XML-only path
            src = ctx.work / "case10.vot"
            Remote(tap.url).download(url, src)
            out = ctx.work / "case10.parquet"
            keep = votable_stream._declares_utf8
            bulk_runs, xml_runs = [], []
            for _ in range(3 if ctx.quick else 1):   # alternating: a busy neighbour hits both
                bulk_runs.append(timed(lambda: results.to_parquet(src, out))[0])
                votable_stream._declares_utf8 = lambda head: False
                try:
                    xml_runs.append(timed(lambda: results.to_parquet(src, out))[0])
                finally:
                    votable_stream._declares_utf8 = keep
            bulk_s, xml_s = min(bulk_runs), min(xml_runs)
            src.unlink(missing_ok=True)
            out.unlink(missing_ok=True)
            rate, xml_rate = size / MB / bulk_s, size / MB / xml_s
            details["tabledata_conversion"] = {"bulk_s": bulk_s, "xml_s": xml_s}
            rows.append(Row("case10", f"TABLEDATA conversion to Parquet, {size / MB:,.0f} MB",
                            rate, "MB/s", "XML-only path", xml_rate, rate / xml_rate,
                            "faster", ">= 60 MB/s", rate >= 60))
    theirs = child("pyvo_run", url=tap.url, adql=adql + " -- pyvo", maxrec=maxrec)
    details["pyvo"] = theirs
    best = seen["negotiated"]
    rows.append(Row("case10", "end to end, negotiated, vs pyvo run_async().to_table()",
                    best["total_s"], "s", "pyvo run_async().to_table()", theirs["seconds"],
                    theirs["seconds"] / best["total_s"], "faster", ">= 4x faster",
                    theirs["seconds"] / best["total_s"] >= 4))
    for name in ("negotiated", "TABLEDATA"):
        rows.append(Row("case10", f"peak RSS growth, first fetch, {name}", seen[name]["growth_mb"],
                        "MB", "pyvo run_async().to_table()", theirs["growth_mb"],
                        theirs["growth_mb"] / max(seen[name]["growth_mb"], 1.0), "less memory",
                        "< 100 MB", seen[name]["growth_mb"] < 100))
    return CaseResult(rows, details)

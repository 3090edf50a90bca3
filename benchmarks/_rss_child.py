"""One fetch in a process of its own, reporting its peak memory (for case 2).

``python -m benchmarks._rss_child MODE JSON-ARGS`` prints one JSON line.  The figure is the growth
of the peak resident set over what the process held right after its imports, so what the
libraries themselves weigh is not counted.

The peak is read from ``/proc/self/status`` (``VmHWM``), reset to the current RSS after the
imports by writing 5 to ``/proc/self/clear_refs`` (Linux >= 4.0, proc(5)).  ``ru_maxrss`` is
reported as well but cannot be used for the growth: Linux carries the parent's peak over fork and
exec (getrusage(2)), so a child started by a large parent starts with the parent's peak.
"""

from __future__ import annotations

import json
import resource
import sys
import time


def status_kb(name: str) -> int:
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith(name + ":"):
                return int(line.split()[1])
    raise RuntimeError(f"no {name} in /proc/self/status")


def reset_peak() -> int:
    """Make the peak equal the current RSS; return that RSS (kB)."""
    with open("/proc/self/clear_refs", "w") as f:
        f.write("5")
    return status_kb("VmRSS")


def main() -> None:
    mode, args = sys.argv[1], json.loads(sys.argv[2])
    out: dict = {"mode": mode}
    if mode == "jobdesk":
        from jobdesk import Desk

        base = reset_peak()
        started = time.perf_counter()
        job = Desk(args["root"]).submit(args["url"], args["adql"], maxrec=args["maxrec"],
                                        fmt=args.get("fmt")).wait(progress=False)
        out["seconds"] = time.perf_counter() - started
        record = job.record
        history = {h["phase"]: h["at"] for h in job.desk.index.history(job.id)}
        out.update(job_url=record["job_url"], rows=record["rows"],
                   result_fmt=record.get("result_fmt"), result_url=job.desk.store.path(
                       record["result_sha256"]).as_posix(),
                   result_bytes=record["result_bytes"],
                   # from the service's COMPLETED being seen to the Parquet copy registered:
                   fetch_and_convert_s=(record["finished"] or 0) - history.get("COMPLETED", 0))
    elif mode == "download":
        from jobdesk.remote import Remote

        base = reset_peak()
        started = time.perf_counter()
        got = Remote(args["service"]).download(args["result_url"], args["dest"])
        out["seconds"] = time.perf_counter() - started
        out["result_bytes"] = got.bytes
    elif mode == "pyvo":
        import pyvo

        base = reset_peak()
        started = time.perf_counter()
        result = pyvo.dal.AsyncTAPJob(args["job_url"]).fetch_result()
        out["seconds"] = time.perf_counter() - started
        out["rows"] = len(result)
    elif mode == "metadata":
        from jobdesk import Desk

        desk = Desk(args["root"])
        base = reset_peak()
        started = time.perf_counter()
        out["tables"] = len(desk.tables(args["url"]))
        out["seconds"] = time.perf_counter() - started
    elif mode == "etree":
        import xml.etree.ElementTree as ET

        base = reset_peak()
        started = time.perf_counter()
        root = ET.parse(args["path"]).getroot()
        out["tables"] = sum(1 for e in root.iter() if e.tag == "table")
        out["seconds"] = time.perf_counter() - started
    elif mode == "compare":
        from jobdesk.compare import compare_files

        base = reset_peak()
        started = time.perf_counter()
        result = compare_files(args["old"], args["new"], key=args["key"])
        out["seconds"] = time.perf_counter() - started
        out.update(added=result.added, removed=result.removed, matched=result.matched,
                   changed_rows=result.changed_rows)
    elif mode == "read_parquet":
        import pyarrow.parquet as pq

        base = reset_peak()
        started = time.perf_counter()
        rows = sum(pq.read_table(p).num_rows for p in (args["old"], args["new"]))
        out["seconds"] = time.perf_counter() - started
        out["rows"] = rows
    elif mode == "pyvo_run":
        import pyvo

        base = reset_peak()
        started = time.perf_counter()
        table = pyvo.dal.TAPService(args["url"]).run_async(
            args["adql"], maxrec=args["maxrec"]).to_table()
        out["seconds"] = time.perf_counter() - started
        out["rows"] = len(table)
    else:
        raise SystemExit(f"unknown mode {mode!r}")
    out["baseline_kb"] = base
    out["peak_kb"] = status_kb("VmHWM")
    out["ru_maxrss_kb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    out["growth_mb"] = (out["peak_kb"] - base) / 1024
    print(json.dumps(out), flush=True)


if __name__ == "__main__":
    main()

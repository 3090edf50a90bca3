"""``python -m benchmarks [--quick] [--json PATH] [--only case1,throughput]``

Runs the cases in order, prints one table (case, figure, baseline, ratio, target, met?) and
writes everything, with the machine's description, as JSON.  ``--quick`` uses sizes that finish
in under a minute in total (for CI, to prove the benchmarks still run); without it the sizes
are the ones the targets are stated for.
"""

from __future__ import annotations

import argparse
import importlib
import json
import sys
import time
import traceback
import warnings
from pathlib import Path

from benchmarks.common import CASE_NAMES, CaseResult, Context, machine, table

CASES = {
    "case1": ("case1_cache_hit", "cache hit vs re-fetch vs Parquet floor"),
    "case2": ("case2_download_memory", "peak memory while fetching a large result"),
    "case3": ("case3_throughput", "download throughput vs curl"),
    "case4": ("case4_completion", "completion latency and requests per job"),
    "case5": ("case5_index_scale", "listing and cache-hit submit with 100,000 jobs"),
    "case6": ("case6_keys", "cache keys per second"),
    "case7": ("case7_shaping", "metadata memory, find, tables page, check"),
    "case8": ("case8_compare", "comparing two large results by key vs reading them"),
    "case9": ("case9_rerun", "re-running an analysis of cache hits"),
    "case10": ("case10_first_fetch", "first fetch by result format, split, vs pyvo"),
    "case11": ("case11_quicklook", "quick look of a 5,000,000-row result over REST"),
}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m benchmarks", description=__doc__.splitlines()[2])
    parser.add_argument("--quick", action="store_true", help="small sizes (under a minute)")
    parser.add_argument("--json", type=Path, help="write the results here")
    parser.add_argument("--only", help="comma-separated cases by number or name, "
                                       "e.g. case1,throughput")
    parser.add_argument("--keep", action="store_true", help="keep the run's work directory")
    args = parser.parse_args(argv)

    chosen = list(CASES)
    if args.only:
        by_name = {name: case for case, name in CASE_NAMES.items()}
        chosen = [by_name.get(c.strip(), c.strip()) for c in args.only.split(",") if c.strip()]
        unknown = [c for c in chosen if c not in CASES]
        if unknown:
            known = ", ".join(f"{case} ({CASE_NAMES[case]})" for case in CASES)
            parser.error(f"unknown case(s) {', '.join(unknown)}; known: {known}")

    def log(text: str) -> None:
        print(text, file=sys.stderr, flush=True)

    warnings.simplefilter("ignore")  # truncation/repeatability warnings are not the subject here
    ctx = Context(quick=args.quick, keep=args.keep, log=log)
    report = {"quick": args.quick, "started": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
              "machine": machine(), "cases": {}}
    all_rows = []
    failed = []
    started = time.perf_counter()
    try:
        for name in chosen:
            module_name, title = CASES[name]
            log(f"{name} {CASE_NAMES[name]}: {title}")
            t0 = time.perf_counter()
            try:
                module = importlib.import_module(f"benchmarks.{module_name}")
                result: CaseResult = module.run(ctx)
            except Exception as exc:  # noqa: BLE001 - one broken case must not hide the others
                failed.append(name)
                log(traceback.format_exc())
                report["cases"][name] = {"name": CASE_NAMES[name], "title": title,
                                         "error": f"{type(exc).__name__}: {exc}"}
                continue
            result.seconds = time.perf_counter() - t0
            log(f"  {name} done in {result.seconds:.1f} s")
            all_rows += result.rows
            report["cases"][name] = {"name": CASE_NAMES[name], "title": title,
                                     "seconds": result.seconds,
                                     "rows": [r.to_json() for r in result.rows],
                                     "details": result.details}
    finally:
        ctx.close()
    report["seconds"] = time.perf_counter() - started
    print(table(all_rows))
    print(f"\n{'quick' if args.quick else 'full'} run, {report['seconds']:.0f} s"
          + (f"; FAILED: {', '.join(failed)}" if failed else ""))
    if args.json:
        args.json.parent.mkdir(parents=True, exist_ok=True)
        args.json.write_text(json.dumps(report, indent=2, default=str))
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())

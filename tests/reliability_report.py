"""Run the reliability suite and print its figures.

    python -m tests.reliability_report            # the CI portion (a few minutes)
    python -m tests.reliability_report --full     # the full counts (JOBDESK_RELIABILITY_FULL=1)
    python -m tests.reliability_report --json out.json

The suite (tests/reliability/) appends one JSON line per tried case to a file named by
JOBDESK_RELIABILITY_FIGURES; this module runs pytest on it with that set, adds the lines up by
category and prints: faults tried/survived, kills/clean recoveries, concurrent submissions/server
jobs, fuzz cases/crashes, security probes/refusals, plus the pytest outcome (xfails named).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
import xml.etree.ElementTree as ET  # our own pytest junit file, not outside input
from collections import defaultdict
from pathlib import Path

HERE = Path(__file__).resolve().parent
SUITE = HERE / "reliability"

LABELS = {
    "faults": ("faults tried", "survived"),
    "kills": ("kills", "clean recoveries"),
    "concurrency": ("concurrent submissions", "answered"),
    "fuzz": ("fuzz cases", "without a crash"),
    "security": ("security probes", "refused / held"),
}


def run_suite(*, full: bool, extra: list[str]) -> dict:
    with tempfile.TemporaryDirectory(prefix="jobdesk-reliability-") as tmp:
        figures = Path(tmp) / "figures.jsonl"
        junit = Path(tmp) / "junit.xml"
        env = dict(os.environ, JOBDESK_RELIABILITY_FIGURES=str(figures))
        if full:
            env["JOBDESK_RELIABILITY_FULL"] = "1"
        started = time.monotonic()
        cmd = [sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider", str(SUITE),
               f"--junitxml={junit}", *extra]
        code = subprocess.call(cmd, env=env, cwd=HERE.parent)
        seconds = time.monotonic() - started
        lines = [json.loads(line) for line in figures.read_text().splitlines()] \
            if figures.exists() else []
        outcome = _junit(junit) if junit.exists() else {}
    return {"full": full, "exit_code": code, "seconds": round(seconds, 1),
            "figures": summarise(lines), "pytest": outcome}


def summarise(lines: list[dict]) -> dict:
    out: dict[str, dict] = {}
    by_category: dict[str, list[dict]] = defaultdict(list)
    for line in lines:
        by_category[line["category"]].append(line)
    for category, items in by_category.items():
        tried = sum(i["tried"] for i in items)
        held = sum(i["held"] for i in items)
        entry = {"tried": tried, "held": held, "failed": tried - held,
                 "failed_cases": sorted({i["name"] for i in items if i["held"] < i["tried"]})}
        if category == "concurrency":
            entry["server_jobs"] = sum(i.get("server_jobs", 0) for i in items)
            entry["distinct_queries"] = sum(i.get("distinct_queries", 0) for i in items)
            entry["runs"] = [i["name"] for i in items]
        out[category] = entry
    return out


def _junit(path: Path) -> dict:
    root = ET.parse(path).getroot()
    suites = [root] if root.tag == "testsuite" else list(root)
    counts = {k: sum(int(s.get(k, 0)) for s in suites)
              for k in ("tests", "failures", "errors", "skipped")}
    xfails, skips, failed = [], [], []
    for case in root.iter("testcase"):
        name = f"{case.get('classname', '').rsplit('.', 1)[-1]}::{case.get('name')}"
        skipped = case.find("skipped")
        if skipped is not None:
            (xfails if skipped.get("type") == "pytest.xfail" else skips).append(
                f"{name}: {skipped.get('message', '')}")
        if case.find("failure") is not None or case.find("error") is not None:
            failed.append(name)
    return counts | {"xfailed": xfails, "skipped_cases": skips, "failed_cases": failed}


def render(report: dict) -> str:
    rows = []
    for category, (what, good) in LABELS.items():
        f = report["figures"].get(category)
        if not f:
            rows.append(f"  {what:<24} (not run)")
            continue
        line = f"  {what:<24} {f['tried']:>6}   {good}: {f['held']}"
        if category == "concurrency":
            line += (f"   server jobs: {f['server_jobs']} for {f['distinct_queries']} "
                     f"distinct queries")
        if category == "fuzz":
            line = f"  {what:<24} {f['tried']:>6}   crashes: {f['failed']}"
        if f["failed"] and category != "fuzz":
            line += f"   FAILED: {f['failed']}"
        rows.append(line)
    p = report["pytest"]
    mode = "full counts" if report["full"] else "CI portion"
    text = [f"jobdesk reliability ({mode}, {report['seconds']} s, pytest exit {report['exit_code']})",
            *rows,
            f"  pytest: {p.get('tests', 0)} tests, {p.get('failures', 0)} failed, "
            f"{p.get('errors', 0)} errors, {len(p.get('xfailed', []))} xfailed, "
            f"{len(p.get('skipped_cases', []))} skipped"]
    for name in p.get("xfailed", []):
        text.append(f"    xfail  {name}")
    for name in p.get("skipped_cases", []):
        text.append(f"    skip   {name}")
    for name in p.get("failed_cases", []):
        text.append(f"    FAILED {name}")
    for category, f in report["figures"].items():
        for name in f["failed_cases"]:
            text.append(f"    {category} case that did not hold: {name}")
    return "\n".join(text)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--full", action="store_true",
                        help="the full counts (200 kills, 8x200 submissions, ...)")
    parser.add_argument("--json", metavar="PATH", help="also write the figures as JSON here")
    parser.add_argument("pytest_args", nargs="*", help="extra pytest arguments (after --)")
    args = parser.parse_args(argv)
    report = run_suite(full=args.full or os.environ.get("JOBDESK_RELIABILITY_FULL") == "1",
                       extra=args.pytest_args)
    print()
    print(render(report))
    if args.json:
        Path(args.json).write_text(json.dumps(report, indent=2, sort_keys=True) + "\n")
    return report["exit_code"]


if __name__ == "__main__":
    sys.exit(main())

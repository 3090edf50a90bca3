"""``python -m jobdesk.localtap``: serve the embedded TAP service on 127.0.0.1.

Prints ``jobdesk-localtap serving <base URL>`` on stdout once it listens, so a parent process
can read the port it got (``--port 0`` picks a free one).
"""

from __future__ import annotations

import argparse
import signal
import sys
import threading
from pathlib import Path

from jobdesk.localtap.faults import FaultSettings


def build_parser() -> argparse.ArgumentParser:
    defaults = FaultSettings()
    parser = argparse.ArgumentParser(
        prog="python -m jobdesk.localtap",
        description="A small TAP 1.1 / UWS 1.1 service over an invented synthetic catalogue, "
                    "with fault injection for tests. See docs/localtap.md.")
    add = parser.add_argument
    add("--port", type=int, default=8787, help="TCP port on 127.0.0.1 (0: any free port)")
    add("--state", type=Path, default=Path("localtap-state"),
        help="directory for the catalogue database, jobs and results (kept across restarts)")
    add("--rows", type=int, default=20_000, help="rows of the synthetic catalogue")
    add("--file", type=Path, action="append", default=[],
        help="serve this CSV/Parquet/VOTable file as an extra table (repeatable)")
    add("--exec-delay", type=float, default=defaults.exec_delay,
        help="each async job stays EXECUTING at least this many seconds (abortable)")
    add("--queue-delay", type=float, default=defaults.queue_delay,
        help="each async job stays QUEUED at least this many seconds")
    add("--max-rec", type=int, default=defaults.max_rec, help="default and maximum MAXREC")
    add("--fail-first", type=int, default=defaults.fail_first,
        help="the first N requests get HTTP 503 with Retry-After: 1")
    add("--status-429", type=int, default=defaults.status_429,
        help="the first N requests (after --fail-first) get HTTP 429 with Retry-After: 1")
    add("--drop-result-after", type=int, default=defaults.drop_result_after,
        help="close the connection after this many bytes of each result download")
    add("--drop-result-times", type=int, default=defaults.drop_result_times,
        help="cut only this many downloads (default: every one)")
    add("--no-wait", action="store_true",
        help="behave like a UWS 1.0 service: ignore WAIT, no version attribute")
    add("--destruction", type=float, default=defaults.destruction,
        help="seconds from job creation to its destruction (results deleted)")
    add("--max-running", type=int, default=defaults.max_running,
        help="at most this many jobs EXECUTING; more stay QUEUED")
    add("--slow-response", type=float, default=defaults.slow_response,
        help="delay every /tap answer by this many seconds")
    add("--lose-jobs", action="store_true",
        help="answer 404 for every job document, sub-resource and result (a forgetful service)")
    add("--max-wait", type=float, default=defaults.max_wait,
        help="longest a WAIT request blocks, in seconds")
    add("--execution-duration", type=int, default=defaults.execution_duration,
        help="default executionduration of new jobs in seconds (0: unlimited)")
    add("--sweep-interval", type=float, default=1.0,
        help="seconds between sweeps for jobs past their destruction time")
    return parser


FAULT_ARGS = ("exec_delay", "queue_delay", "max_rec", "fail_first", "status_429",
              "drop_result_after", "drop_result_times", "no_wait", "destruction", "max_running",
              "slow_response", "lose_jobs", "max_wait", "execution_duration")


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    from jobdesk.localtap import LocalTap

    faults = {name: getattr(args, name) for name in FAULT_ARGS}
    tap = LocalTap(state=args.state, rows=args.rows, port=args.port, files=args.file,
                   sweep_interval=args.sweep_interval, **faults)
    print(f"jobdesk-localtap serving {tap.url}", flush=True)

    stop = threading.Event()
    signal.signal(signal.SIGTERM, lambda *_: stop.set())
    signal.signal(signal.SIGINT, lambda *_: stop.set())
    try:
        while not stop.wait(0.2) and tap.alive():
            pass
    finally:
        tap.stop()
    return 0


if __name__ == "__main__":
    sys.exit(main())

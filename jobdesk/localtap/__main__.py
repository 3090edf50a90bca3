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

from jobdesk.localtap.faults import FAULT_NAMES, FaultSettings


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
    # Legal behaviours of other servers (docs/localtap.md, "Imitating other servers").
    add("--overflow-at-maxrec", action="store_true",
        help="flag OVERFLOW whenever rows == MAXREC, even when nothing was cut")
    add("--ignore-runid", action="store_true",
        help="drop RUNID at creation and later; job documents and the list carry no runId")
    add("--ignore-run-at-creation", action="store_true",
        help="ignore PHASE=RUN, EXECUTIONDURATION and DESTRUCTION in the creating POST")
    add("--second-run-errors", action="store_true",
        help="PHASE=RUN on a QUEUED or EXECUTING job sends it to ERROR")
    add("--sync-errors-200", action="store_true",
        help="answer /sync errors with HTTP 200 (the error VOTable unchanged)")
    add("--error-body-200", action="store_true",
        help="result of a job not COMPLETED: HTTP 200 with an error VOTable; "
             "{job}/error of a job not in ERROR: HTTP 200 with an empty body")
    add("--has-detail-false", action="store_true",
        help='errorSummary says hasDetail="false" although {job}/error serves the document')
    add("--sparse-job-list", action="store_true",
        help="job list entries carry the phase only (no runId, ownerId, creationTime)")
    add("--wait-granularity", type=float, default=defaults.wait_granularity,
        help="a WAIT re-checks the phase only every N seconds (0: wakes at the change)")
    add("--delete-keeps-running", action="store_true",
        help="DELETE of an EXECUTING job removes the job but leaves its worker running")
    add("--aborted-lists-result", action="store_true",
        help="an aborted job lists a result (an error VOTable) in its results")
    add("--sweep-interval", type=float, default=1.0,
        help="seconds between sweeps for jobs past their destruction time")
    return parser


FAULT_ARGS = FAULT_NAMES   # every setting has its flag (checked in tests)


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

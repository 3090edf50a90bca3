"""Fault settings of the embedded service, changeable while it runs.

Reliability tests need a service that misbehaves on purpose (slow, overloaded, forgetful, cutting
downloads); every such behaviour is one named setting here, shared by the command line, the
``serve()`` context manager and ``POST /_localtap/faults``.
"""

from __future__ import annotations

import dataclasses
import threading
from dataclasses import dataclass


@dataclass
class FaultSettings:
    """The values; each is documented in docs/localtap.md under the same name."""

    exec_delay: float = 0.0          # every async job stays EXECUTING at least this long (s)
    queue_delay: float = 0.0         # every async job stays QUEUED at least this long (s)
    max_rec: int = 100_000           # default and maximum MAXREC
    fail_first: int = 0              # the next N requests get 503 + Retry-After: 1
    status_429: int = 0              # the next N requests get 429 + Retry-After: 1
    drop_result_after: int | None = None   # close result downloads after this many bytes
    drop_result_times: int | None = None   # ... only this many times (None: every download)
    no_wait: bool = False            # behave like UWS 1.0: ignore WAIT, no version attribute
    destruction: float = 86_400.0    # seconds from creation to destruction of a job
    max_running: int = 4             # jobs beyond this stay QUEUED
    slow_response: float = 0.0       # every /tap answer is delayed this long (s)
    lose_jobs: bool = False          # job documents and sub-resources answer 404
    max_wait: float = 60.0           # the longest a WAIT blocks (s); UWS lets a server cut it
    execution_duration: int = 600    # default executionduration of new jobs (s, 0 = unlimited)
    # Legal behaviours of other servers, imitated so clients are tested against them too
    # (docs/localtap.md, "Imitating other servers"; measured on DaCHS 2.7, docs/interop.md).
    overflow_at_maxrec: bool = False     # OVERFLOW whenever rows == MAXREC, even if nothing was cut
    ignore_runid: bool = False           # RUNID dropped everywhere; no runId element
    ignore_run_at_creation: bool = False  # PHASE/EXECUTIONDURATION/DESTRUCTION at creation dropped
    second_run_errors: bool = False      # RUN on a QUEUED/EXECUTING job sends it to ERROR
    sync_errors_200: bool = False        # /sync error VOTables come with HTTP 200
    error_body_200: bool = False         # result of an unfinished/failed job: 200 + error VOTable;
                                         # {job}/error of a job not in ERROR: 200, empty body
    has_detail_false: bool = False       # errorSummary says hasDetail="false" ({job}/error still served)
    sparse_job_list: bool = False        # job list entries carry the phase only
    wait_granularity: float = 0.0        # WAIT re-checks the phase only every N s (0: at once)
    delete_keeps_running: bool = False   # DELETE of an EXECUTING job leaves its worker running
    aborted_lists_result: bool = False   # an aborted job lists a "result" (an error VOTable)


FAULT_NAMES = tuple(f.name for f in dataclasses.fields(FaultSettings))

# Every imitation at once: the behaviours measured on DaCHS 2.7 (docs/interop.md).
LIKE_DACHS = {"overflow_at_maxrec": True, "ignore_runid": True, "ignore_run_at_creation": True,
              "second_run_errors": True, "sync_errors_200": True, "error_body_200": True,
              "has_detail_false": True, "sparse_job_list": True, "wait_granularity": 1.0,
              "delete_keeps_running": True, "aborted_lists_result": True}


class Faults:
    """Thread-safe holder of the settings plus the one-shot counters that consume them."""

    def __init__(self, **values):
        self._lock = threading.Lock()
        self._settings = FaultSettings()
        self.update(**values)

    def update(self, **values) -> dict:
        """Change settings by name; unknown names raise ``ValueError`` (a typo must not pass)."""
        unknown = sorted(set(values) - set(FAULT_NAMES))
        if unknown:
            raise ValueError(f"unknown fault setting(s): {', '.join(unknown)}; "
                             f"known: {', '.join(FAULT_NAMES)}")
        with self._lock:
            for name, value in values.items():
                setattr(self._settings, name, _coerce(name, value))
            return dataclasses.asdict(self._settings)

    def snapshot(self) -> FaultSettings:
        with self._lock:
            return dataclasses.replace(self._settings)

    def __getattr__(self, name):
        if name in FAULT_NAMES:
            with self._lock:
                return getattr(self._settings, name)
        raise AttributeError(name)

    def take_refusal(self) -> int | None:
        """Consume one forced refusal: returns 503 or 429 while a counter lasts, else None."""
        with self._lock:
            if self._settings.fail_first > 0:
                self._settings.fail_first -= 1
                return 503
            if self._settings.status_429 > 0:
                self._settings.status_429 -= 1
                return 429
            return None

    def take_drop(self) -> int | None:
        """Byte count after which this result download is cut, or None to send it whole."""
        with self._lock:
            limit = self._settings.drop_result_after
            if limit is None:
                return None
            times = self._settings.drop_result_times
            if times is not None:
                if times <= 0:
                    return None
                self._settings.drop_result_times = times - 1
            return int(limit)


def _coerce(name: str, value):
    """Bring JSON / command-line values to the field's type, so 'no_wait': 'false' is False."""
    kind = {f.name: f.type for f in dataclasses.fields(FaultSettings)}[name]
    if value is None:
        if "None" in str(kind):
            return None
        raise ValueError(f"{name} cannot be null")
    if "bool" in str(kind):
        if isinstance(value, str):
            return value.strip().lower() in ("1", "true", "yes", "on")
        return bool(value)
    if "float" in str(kind):
        return float(value)
    number = int(value)
    if number < 0 and name not in ("drop_result_times",):
        raise ValueError(f"{name} must not be negative")
    return number

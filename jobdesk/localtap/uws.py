"""The UWS job store: jobs, their parameters, uploads and result files, persisted under a state
directory so they survive a restart of the service, as a real archive's job store does.

One SQLite file (``jobs.sqlite``) holds the job rows; each job has a directory ``jobs/<id>/`` for
its uploaded tables and its result file. The store knows nothing of HTTP or of execution.
"""

from __future__ import annotations

import json
import secrets
import shutil
import sqlite3
import threading
import time
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path

from jobdesk.localtap.votable_out import xml_attr, xml_text

PENDING, QUEUED, EXECUTING = "PENDING", "QUEUED", "EXECUTING"
COMPLETED, ERROR, ABORTED, ARCHIVED = "COMPLETED", "ERROR", "ABORTED", "ARCHIVED"
FINISHED = frozenset({COMPLETED, ERROR, ABORTED, ARCHIVED})
ACTIVE = frozenset({PENDING, QUEUED, EXECUTING})   # UWS 1.1 §2.2.1.2: WAIT blocks only here

RESTART_MESSAGE = ("the service restarted while this job was executing, so it was stopped; "
                   "submit it again")

_SCHEMA = """
CREATE TABLE IF NOT EXISTS jobs (
    id TEXT PRIMARY KEY,
    run_id TEXT,
    owner TEXT,
    phase TEXT NOT NULL,
    creation_time REAL NOT NULL,
    queued_time REAL,
    start_time REAL,
    end_time REAL,
    execution_duration INTEGER NOT NULL,
    destruction REAL NOT NULL,
    parameters TEXT NOT NULL,
    error_message TEXT,
    error_type TEXT,
    result_file TEXT,
    result_size INTEGER,
    result_type TEXT,
    result_rows INTEGER,
    overflow INTEGER NOT NULL DEFAULT 0
);
CREATE INDEX IF NOT EXISTS jobs_creation ON jobs(creation_time);
"""


@dataclass
class Job:
    id: str
    phase: str
    creation_time: float
    execution_duration: int
    destruction: float
    parameters: dict[str, str] = field(default_factory=dict)   # upper-case name -> value
    run_id: str | None = None
    owner: str | None = None
    queued_time: float | None = None
    start_time: float | None = None
    end_time: float | None = None
    error_message: str | None = None
    error_type: str | None = None
    result_file: str | None = None
    result_size: int | None = None
    result_type: str | None = None
    result_rows: int | None = None
    overflow: bool = False

    @classmethod
    def from_row(cls, row: sqlite3.Row) -> "Job":
        values = dict(row)
        values["parameters"] = json.loads(values["parameters"])
        values["overflow"] = bool(values["overflow"])
        return cls(**values)


def iso(timestamp: float | None) -> str | None:
    """UTC ISO 8601 with a Z, as UWS 1.1 §2.2.3 and DALI 1.1 §3.3.3 use."""
    if timestamp is None:
        return None
    moment = datetime.fromtimestamp(timestamp, tz=timezone.utc)
    return moment.strftime("%Y-%m-%dT%H:%M:%S.") + f"{moment.microsecond // 1000:03d}Z"


def parse_iso(text: str) -> float:
    """Read an ISO 8601 time (DALI 1.1 §3.3.3); no zone means UTC. Raises ValueError."""
    value = text.strip()
    if value.endswith("Z") or value.endswith("z"):
        value = value[:-1] + "+00:00"
    moment = datetime.fromisoformat(value)
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=timezone.utc)
    return moment.timestamp()


class JobStore:
    """Thread-safe persistent store of UWS jobs under ``state_dir``."""

    def __init__(self, state_dir: Path):
        self.state_dir = Path(state_dir)
        self.jobs_dir = self.state_dir / "jobs"
        self.jobs_dir.mkdir(parents=True, exist_ok=True)
        self._lock = threading.RLock()
        self._db = sqlite3.connect(self.state_dir / "jobs.sqlite", check_same_thread=False,
                                   isolation_level=None)
        self._db.row_factory = sqlite3.Row
        self._db.execute("PRAGMA journal_mode=WAL")
        self._db.execute("PRAGMA synchronous=NORMAL")
        self._db.executescript(_SCHEMA)

    def close(self):
        with self._lock:
            self._db.close()

    # --- reading ----------------------------------------------------------------------------

    def get(self, job_id: str) -> Job | None:
        with self._lock:
            row = self._db.execute("SELECT * FROM jobs WHERE id = ?", (job_id,)).fetchone()
        return Job.from_row(row) if row else None

    def list(self, *, phases: set[str] | None = None, after: float | None = None,
             last: int | None = None) -> list[Job]:
        """Job list filters of UWS 1.1 §2.2.2.1; ARCHIVED jobs only when asked for by PHASE."""
        clauses, args = [], []
        if phases:
            clauses.append(f"phase IN ({','.join('?' * len(phases))})")
            args += sorted(phases)
        else:
            clauses.append("phase != ?")
            args.append(ARCHIVED)
        if after is not None:
            clauses.append("creation_time > ?")
            args.append(after)
        sql = "SELECT * FROM jobs WHERE " + " AND ".join(clauses)
        if last is not None:
            # UWS 1.1 §2.2.2.1: LAST=n gives the n most recently created, newest first.
            sql += " ORDER BY creation_time DESC, rowid DESC LIMIT ?"
            args.append(last)
        else:
            sql += " ORDER BY creation_time, rowid"
        with self._lock:
            rows = self._db.execute(sql, args).fetchall()
        return [Job.from_row(r) for r in rows]

    def in_phase(self, *phases: str) -> list[Job]:
        with self._lock:
            rows = self._db.execute(
                f"SELECT * FROM jobs WHERE phase IN ({','.join('?' * len(phases))}) "
                "ORDER BY queued_time, creation_time, rowid", phases).fetchall()
        return [Job.from_row(r) for r in rows]

    def expired(self, now: float) -> list[str]:
        with self._lock:
            rows = self._db.execute("SELECT id FROM jobs WHERE destruction <= ?", (now,)).fetchall()
        return [r["id"] for r in rows]

    def count(self) -> int:
        with self._lock:
            return self._db.execute("SELECT count(*) FROM jobs").fetchone()[0]

    def job_dir(self, job_id: str) -> Path:
        return self.jobs_dir / job_id

    # --- writing ----------------------------------------------------------------------------

    def create(self, parameters: dict[str, str], *, run_id: str | None, destruction_after: float,
               execution_duration: int, owner: str | None = None) -> Job:
        now = time.time()
        job = Job(id=secrets.token_hex(8), phase=PENDING, creation_time=now,
                  execution_duration=execution_duration, destruction=now + destruction_after,
                  parameters=dict(parameters), run_id=run_id, owner=owner)
        self.job_dir(job.id).mkdir(parents=True, exist_ok=True)
        with self._lock:
            self._db.execute(
                "INSERT INTO jobs (id, run_id, owner, phase, creation_time, execution_duration,"
                " destruction, parameters) VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
                (job.id, job.run_id, job.owner, job.phase, job.creation_time,
                 job.execution_duration, job.destruction, json.dumps(job.parameters)))
        return job

    def update(self, job_id: str, *, expect: set[str] | None = None, **values) -> bool:
        """Set columns; with ``expect``, only while the job is in one of those phases.

        Returns whether a row changed, so racing writers (abort vs. completion) cannot both win.
        """
        if "parameters" in values:
            values["parameters"] = json.dumps(values["parameters"])
        if "overflow" in values:
            values["overflow"] = int(bool(values["overflow"]))
        sets = ", ".join(f"{name} = ?" for name in values)
        sql = f"UPDATE jobs SET {sets} WHERE id = ?"
        args = list(values.values()) + [job_id]
        if expect:
            sql += f" AND phase IN ({','.join('?' * len(expect))})"
            args += sorted(expect)
        with self._lock:
            cursor = self._db.execute(sql, args)
        return cursor.rowcount > 0

    def delete(self, job_id: str) -> bool:
        with self._lock:
            cursor = self._db.execute("DELETE FROM jobs WHERE id = ?", (job_id,))
        shutil.rmtree(self.job_dir(job_id), ignore_errors=True)
        return cursor.rowcount > 0

    def recover(self) -> tuple[list[str], list[str]]:
        """After a restart: EXECUTING jobs go to ERROR (their half-written result is gone);
        QUEUED jobs never started, so they are returned to be queued again."""
        now = time.time()
        stopped = [j.id for j in self.in_phase(EXECUTING)]
        for job_id in stopped:
            self.update(job_id, phase=ERROR, end_time=now, error_message=RESTART_MESSAGE,
                        error_type="transient", expect={EXECUTING})
            for partial in self.job_dir(job_id).glob("*.part"):
                partial.unlink(missing_ok=True)
        queued = [j.id for j in self.in_phase(QUEUED)]
        return stopped, queued


# --- UWS 1.1 documents ------------------------------------------------------------------------

UWS_NS = "http://www.ivoa.net/xml/UWS/v1.0"   # UWS 1.1 keeps the 1.0 namespace (§2.2)
_NAMESPACES = (f'xmlns:uws="{UWS_NS}" xmlns:xlink="http://www.w3.org/1999/xlink" '
               'xmlns:xsi="http://www.w3.org/2001/XMLSchema-instance"')


def _x(text) -> str:
    return xml_text(str(text))


def _a(text) -> str:
    return xml_attr(str(text))


def _timed(name: str, value: float | None) -> str:
    if value is None:
        return f'<uws:{name} xsi:nil="true"/>'
    return f"<uws:{name}>{iso(value)}</uws:{name}>"


def _version(uws_1_0: bool) -> str:
    # UWS 1.1 §2.2: the version attribute marks a 1.1 service; 1.0 documents have none.
    return "" if uws_1_0 else ' version="1.1"'


def results_xml(job: Job, job_url: str, *, root: bool) -> str:
    ns = f" {_NAMESPACES}" if root else ""
    # A result only when COMPLETED (UWS 1.1 §2.1.3); an ABORTED job has one only when the
    # ``aborted_lists_result`` fault gave it one.
    if job.phase not in (COMPLETED, ABORTED) or not job.result_file:
        return f"<uws:results{ns}/>"
    href = f"{job_url}/results/result"
    return (f"<uws:results{ns}><uws:result id=\"result\" xlink:type=\"simple\" xlink:href={_a(href)}"
            f" size=\"{job.result_size or 0}\" mime-type={_a(job.result_type or '')}/></uws:results>")


def parameters_xml(job: Job, *, root: bool) -> str:
    ns = f" {_NAMESPACES}" if root else ""
    items = "".join(f"<uws:parameter id={_a(name.lower())}>{_x(value)}</uws:parameter>"
                    for name, value in sorted(job.parameters.items()))
    return f"<uws:parameters{ns}>{items}</uws:parameters>"


def job_xml(job: Job, job_url: str, *, uws_1_0: bool = False, show_run_id: bool = True,
            has_detail: bool = True) -> str:
    """The job document of UWS 1.1 §2.2.3, elements in the schema's order.

    ``show_run_id=False`` leaves out runId (an optional element, §2.1.5); ``has_detail=False``
    says hasDetail="false" although ``{job}/error`` serves the detail (a server-side mistake the
    fault ``has_detail_false`` imitates).
    """
    parts = [f'<?xml version="1.0" encoding="UTF-8"?>\n<uws:job{_version(uws_1_0)} {_NAMESPACES}>',
             f"<uws:jobId>{_x(job.id)}</uws:jobId>"]
    if job.run_id is not None and show_run_id:
        parts.append(f"<uws:runId>{_x(job.run_id)}</uws:runId>")
    parts.append(f"<uws:ownerId>{_x(job.owner)}</uws:ownerId>" if job.owner
                 else '<uws:ownerId xsi:nil="true"/>')
    parts.append(f"<uws:phase>{job.phase}</uws:phase>")
    parts.append('<uws:quote xsi:nil="true"/>')
    if not uws_1_0:
        parts.append(_timed("creationTime", job.creation_time))
    parts.append(_timed("startTime", job.start_time))
    parts.append(_timed("endTime", job.end_time))
    parts.append(f"<uws:executionDuration>{int(job.execution_duration)}</uws:executionDuration>")
    parts.append(_timed("destruction", job.destruction))
    parts.append(parameters_xml(job, root=False))
    parts.append(results_xml(job, job_url, root=False))
    if job.phase == ERROR and job.error_message:
        detail = "true" if has_detail else "false"
        parts.append(f'<uws:errorSummary type="{job.error_type or "fatal"}" hasDetail="{detail}">'
                     f"<uws:message>{_x(job.error_message)}</uws:message></uws:errorSummary>")
    parts.append("</uws:job>\n")
    return "\n".join(parts)


def job_list_xml(jobs: list[Job], list_url: str, *, uws_1_0: bool = False, sparse: bool = False,
                 show_run_id: bool = True) -> str:
    """The job list of UWS 1.1 §2.2.2 with phase, runId, ownerId and creationTime per entry;
    ``sparse`` gives the phase only (the other three are optional, §2.2.2.1)."""
    parts = [f'<?xml version="1.0" encoding="UTF-8"?>\n<uws:jobs{_version(uws_1_0)} {_NAMESPACES}>']
    for job in jobs:
        entry = [f"<uws:jobref id={_a(job.id)} xlink:type=\"simple\" xlink:href={_a(list_url + '/' + job.id)}>",
                 f"<uws:phase>{job.phase}</uws:phase>"]
        if sparse:
            entry.append("</uws:jobref>")
            parts.append("".join(entry))
            continue
        if job.run_id is not None and show_run_id:
            entry.append(f"<uws:runId>{_x(job.run_id)}</uws:runId>")
        entry.append('<uws:ownerId xsi:nil="true"/>' if not job.owner
                     else f"<uws:ownerId>{_x(job.owner)}</uws:ownerId>")
        if not uws_1_0:
            entry.append(_timed("creationTime", job.creation_time))
        entry.append("</uws:jobref>")
        parts.append("".join(entry))
    parts.append("</uws:jobs>\n")
    return "\n".join(parts)

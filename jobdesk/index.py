"""The local SQLite index: one row per job, its phase history, safe for many processes at once.

Kernels, the command line and the Jupyter server process all open the same file. SQLite in WAL
mode lets readers run while one process writes; every read-modify-write (claiming a key, taking
a lease, starting a job under the per-service limit) runs inside ``BEGIN IMMEDIATE`` so two
processes can never both decide to create the same server job. Lock waits are absorbed by the
busy timeout and a bounded retry, so "database is locked" never reaches the user.

The schema is versioned with ``PRAGMA user_version``; ``MIGRATIONS[n]`` upgrades version n to n+1.

Columns of ``jobs`` (see docs/architecture.md, "The index row"): ``created``, ``submitted``,
``started``, ``finished`` and ``updated`` are unix seconds; ``uploads`` and ``warnings`` are
JSON; ``owner``/``lease_until`` name the process currently driving the job (creating it on the
service, waiting on it or downloading its result) and until when.
"""

from __future__ import annotations

import json
import os
import socket
import sqlite3
import threading
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path

import sqlite_utils
from tenacity import retry, retry_if_exception, stop_after_attempt, wait_random_exponential

from jobdesk import phases
from jobdesk.errors import IndexBusy, from_transport
from jobdesk.record import COLUMN_TYPES, JSON_FIELDS, JobRecord

# The jobs table's columns and their SQL types come from the typed record (jobdesk.record).
JOB_COLUMNS: dict[str, type] = COLUMN_TYPES

MIGRATIONS: list[Callable[[sqlite_utils.Database], None]] = []
# added to jobs by a later migration, not by the first
_LATER_COLUMNS = ("estimate", "analysis", "result_fmt", "fetch", "unreachable_since",
                  "last_error", "error_detail", "next_try", "send_tries", "service_started",
                  "service_finished", "software")


def _migration(fn: Callable[[sqlite_utils.Database], None]) -> Callable:
    MIGRATIONS.append(fn)
    return fn


@_migration
def _v0_to_v1(db: sqlite_utils.Database) -> None:
    # Raw statements (sqlite-utils writes the DDL): its table methods commit on their own,
    # which would end the migration's IMMEDIATE transaction early.
    db.execute(db.create_table_sql("jobs", {k: v for k, v in JOB_COLUMNS.items()
                                            if k not in _LATER_COLUMNS}, pk="id",
                                   not_null={"key", "service", "phase", "created"},
                                   defaults={"requests": 0, "layer": "personal"}))
    for cols in (("key", "created"), ("created",), ("phase", "service"), ("updated",)):
        db.execute(f"CREATE INDEX idx_jobs_{'_'.join(cols)} ON jobs ({', '.join(cols)})")
    db.execute(db.create_table_sql("phases", {"job_id": str, "phase": str, "at": float,
                                              "note": str}))
    db.execute("CREATE INDEX idx_phases_job ON phases (job_id, at)")


@_migration
def _v1_to_v2(db: sqlite_utils.Database) -> None:
    # What each service says about itself (VOSI capabilities), read once, cited in provenance.
    db.execute(db.create_table_sql("services", {"service": str, "info": str, "read_at": float},
                                   pk="service"))


@_migration
def _v2_to_v3(db: sqlite_utils.Database) -> None:
    # The server's poller asks every few seconds for the jobs that still need work; finished
    # jobs whose result was never fetched are few among many, so they get an index of their own.
    db.execute("CREATE INDEX idx_jobs_unfetched ON jobs (created) "
               "WHERE phase = 'COMPLETED' AND parquet_sha256 IS NULL")


@_migration
def _v3_to_v4(db: sqlite_utils.Database) -> None:
    # Our own "not yet sent" phase was called LOCAL, a word that also named the local cache
    # and the local service; it is UNSENT now, in the records and in their phase history.
    db.execute("UPDATE jobs SET phase = 'UNSENT' WHERE phase = 'LOCAL'")
    db.execute("UPDATE phases SET phase = 'UNSENT' WHERE phase = 'LOCAL'")


@_migration
def _add_service_metadata(db: sqlite_utils.Database) -> None:
    # What each service publishes about its tables (VOSI tables or TAP_SCHEMA), kept with the
    # time it was read so checks and the sidebar work offline; an FTS5 index for find().
    db.execute(db.create_table_sql("meta_services", {
        "service": str, "read_at": float, "source": str, "tables": int, "columns": int,
        "skipped": str}, pk="service"))
    db.execute(db.create_table_sql("meta_tables", {
        "service": str, "name": str, "schema_name": str, "description": str, "nrows": int,
        "ncols": int, "ord": int, "lname": str, "lshort": str}, pk=("service", "name")))
    db.execute("CREATE INDEX idx_meta_tables_ord ON meta_tables (service, ord)")
    db.execute("CREATE INDEX idx_meta_tables_lname ON meta_tables (service, lname)")
    db.execute("CREATE INDEX idx_meta_tables_lshort ON meta_tables (service, lshort)")
    db.execute(db.create_table_sql("meta_columns", {
        "service": str, "table_name": str, "name": str, "datatype": str, "arraysize": str,
        "xtype": str, "unit": str, "ucd": str, "description": str, "ord": int}))
    db.execute("CREATE INDEX idx_meta_columns_table ON meta_columns (service, table_name, ord)")
    # unicode61 splits on '_' and '.', so "mag" finds mag_blue and phot.mag; names weigh most.
    db.execute("CREATE VIRTUAL TABLE meta_search USING fts5(service UNINDEXED, "
               "table_name UNINDEXED, column_name UNINDEXED, name, description, unit, ucd, "
               "tokenize = 'unicode61 remove_diacritics 2')")
    # The estimate measured before a job was sent (submit(..., estimate=True)), as JSON.
    db.execute("ALTER TABLE jobs ADD COLUMN estimate TEXT")


@_migration
def _add_analyses_and_plans(db: sqlite_utils.Database) -> None:
    # Analyses (named chains of jobs in the order they were submitted; one job may belong to
    # several) and release re-run plans, so a re-run survives kernel restarts like its jobs.
    # ``analysis`` on a job is the first analysis it joined, for listings that group by it.
    # Written to run safely on a file that already has any of these (idempotent).
    if "analysis" not in {row[1] for row in db.execute("PRAGMA table_info(jobs)").fetchall()}:
        db.execute("ALTER TABLE jobs ADD COLUMN analysis TEXT")
    have = {row[0] for row in db.execute("SELECT name FROM sqlite_master").fetchall()}
    if "analysis_steps" not in have:
        db.execute(db.create_table_sql("analysis_steps", {
            "analysis": str, "step": int, "job_id": str, "depends": str, "added": float},
            pk=("analysis", "step")))
        db.execute("CREATE UNIQUE INDEX idx_analysis_steps_job ON analysis_steps "
                   "(analysis, job_id)")
    if "plans" not in have:
        db.execute(db.create_table_sql("plans", {
            "id": str, "analysis": str, "into_name": str, "args": str, "created": float,
            "updated": float, "state": str}, pk="id"))


@_migration
def _add_result_format(db: sqlite_utils.Database) -> None:
    # The RESPONSEFORMAT a job was actually run with: negotiated from the service's capabilities
    # when the user named none (``fmt`` NULL), so it can differ from what was asked.
    # (idempotent, as the migration before it: a file may already have the column)
    if "result_fmt" not in {row[1] for row in db.execute("PRAGMA table_info(jobs)").fetchall()}:
        db.execute("ALTER TABLE jobs ADD COLUMN result_fmt TEXT")


@_migration
def _fetch_progress_column(db: sqlite_utils.Database) -> None:
    # A result being fetched says how far it got (JSON: stage, bytes, total, rows, percent),
    # so the sidebar and other processes can show it (see jobdesk/transfer.py).
    # (idempotent, as the migrations before it: a file may already have the column)
    if "fetch" not in {row[1] for row in db.execute("PRAGMA table_info(jobs)").fetchall()}:
        db.execute("ALTER TABLE jobs ADD COLUMN fetch TEXT")


@_migration
def _sidebar_sort_indexes(db: sqlite_utils.Database) -> None:
    # The sidebar sorts by finish time, size or rows and groups by notebook: with 100,000s of
    # jobs a first page must come from an index walk, not a sort of every row.
    for cols in (("finished",), ("result_bytes",), ("rows",), ("notebook", "created"),
                 ("analysis", "created")):
        db.execute(f"CREATE INDEX IF NOT EXISTS idx_jobs_{'_'.join(cols)} "
                   f"ON jobs ({', '.join(cols)})")


@_migration
def _unreachable_state(db: sqlite_utils.Database) -> None:
    # "The service is unreachable, retrying": since when, the last error in our words and the
    # raw text under it, when the next try is due, and how many times creating the job failed.
    # And the service's own startTime/endTime of the job (UWS 1.1 §2.2.1), for durations that
    # are the service's, not when this side happened to look.
    # (idempotent, as the migrations before it: a file may already have a column)
    have = {row[1] for row in db.execute("PRAGMA table_info(jobs)").fetchall()}
    for name, kind in (("unreachable_since", "FLOAT"), ("last_error", "TEXT"),
                       ("error_detail", "TEXT"), ("next_try", "FLOAT"), ("send_tries", "INTEGER"),
                       ("service_started", "FLOAT"), ("service_finished", "FLOAT")):
        if name not in have:
            db.execute(f"ALTER TABLE jobs ADD COLUMN {name} {kind}")


@_migration
def _typed_records(db: sqlite_utils.Database) -> None:
    # Records are read as typed JobRecords now (jobdesk/record.py). Make every stored row read
    # as one: JSON fields that hold text which is not JSON are cleared (that text is kept in
    # error_detail when the row has none), a phase this version does not know becomes LOST,
    # and ``software`` keeps the versions of the process that fetched a result from now on.
    # (idempotent, as the migrations before it)
    have = {row[1] for row in db.execute("PRAGMA table_info(jobs)").fetchall()}
    if "software" not in have:
        db.execute("ALTER TABLE jobs ADD COLUMN software TEXT")
    for name in JSON_FIELDS:
        if name == "software":
            continue
        db.execute(f"UPDATE jobs SET error_detail = coalesce(error_detail, "
                   f"'unreadable {name} kept by an earlier version: ' || {name}), {name} = NULL "
                   f"WHERE {name} IS NOT NULL AND NOT json_valid({name})")
    known = sorted(phases.UWS_PHASES + (phases.UNSENT, phases.SUBMITTED, phases.LOST,
                                        phases.UNREACHED))
    marks = ",".join("?" * len(known))
    now = time.time()
    db.execute(f"INSERT INTO phases (job_id, phase, at, note) SELECT id, 'LOST', ?, "
               f"'phase ' || phase || ' unknown to this version' FROM jobs "
               f"WHERE phase NOT IN ({marks})", [now, *known])
    db.execute(f"UPDATE jobs SET phase = 'LOST', finished = coalesce(finished, ?) "
               f"WHERE phase NOT IN ({marks})", [now, *known])
    # Numbers some tool stored as text (SQLite keeps any value in any column).
    for name, kind in COLUMN_TYPES.items():
        if kind in (int, float) and name in have:
            sql_type = "INTEGER" if kind is int else "REAL"
            db.execute(f"UPDATE jobs SET {name} = CAST({name} AS {sql_type}) "
                       f"WHERE typeof({name}) = 'text'")


SCHEMA_VERSION = len(MIGRATIONS)
BUSY_TIMEOUT_MS = 30_000


def this_process() -> str:
    """Owner name of the running process: host and pid, so a dead owner on this host is seen."""
    return f"{socket.gethostname()}:{os.getpid()}"


def owner_alive(owner: str | None) -> bool:
    """Whether the process named by ``owner`` may still run (always True for other hosts)."""
    if not owner:
        return False
    host, _, pid = owner.rpartition(":")
    if host != socket.gethostname() or not pid.isdigit():
        return True
    try:
        os.kill(int(pid), 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def _locked(exc: BaseException) -> bool:
    return isinstance(exc, sqlite3.OperationalError) and (
        "locked" in str(exc) or "busy" in str(exc))


_retry_locked = retry(retry=retry_if_exception(_locked), stop=stop_after_attempt(8),
                      wait=wait_random_exponential(multiplier=0.05, max=2.0), reraise=True)


class Index:
    """The SQLite index of one desk root."""

    def __init__(self, path: Path | str):
        self.path = Path(path)
        self.path.parent.mkdir(parents=True, exist_ok=True)
        conn = sqlite3.connect(self.path, timeout=BUSY_TIMEOUT_MS / 1000, isolation_level=None,
                               check_same_thread=False)
        conn.execute(f"PRAGMA busy_timeout = {BUSY_TIMEOUT_MS}")
        conn.execute("PRAGMA journal_mode = WAL")
        conn.execute("PRAGMA synchronous = NORMAL")
        conn.execute("PRAGMA foreign_keys = ON")
        self.db = sqlite_utils.Database(conn)
        self._lock = threading.RLock()
        self._migrate()

    # --- transactions -------------------------------------------------------------------------

    @contextmanager
    def _write(self) -> Iterator[sqlite3.Connection]:
        """An IMMEDIATE transaction: holds the write lock from the first statement."""
        with self._lock:
            conn = self.db.conn
            try:
                _retry_locked(conn.execute)("BEGIN IMMEDIATE")
            except sqlite3.OperationalError as exc:
                raise IndexBusy(f"the jobdesk index at {self.path} stayed locked: {exc}") from exc
            try:
                yield conn
                conn.execute("COMMIT")
            except BaseException as exc:
                if conn.in_transaction:  # SQLite may have rolled back already (disk full)
                    conn.execute("ROLLBACK")
                if isinstance(exc, sqlite3.OperationalError) and not _locked(exc):
                    raise from_transport(exc) from exc  # e.g. a full disk: StorageFull
                raise

    def _migrate(self) -> None:
        with self._write() as conn:
            version = conn.execute("PRAGMA user_version").fetchone()[0]
            if version > SCHEMA_VERSION:
                raise IndexBusy(f"the index at {self.path} has schema {version}, newer than this "
                                f"jobdesk understands ({SCHEMA_VERSION})",
                                hint="upgrade jobdesk, or point JOBDESK_HOME at another root")
            for step in MIGRATIONS[version:]:
                step(self.db)
            conn.execute(f"PRAGMA user_version = {SCHEMA_VERSION}")

    # --- reading ------------------------------------------------------------------------------

    def get(self, job_id: str) -> JobRecord | None:
        with self._lock:
            cur = self.db.execute("SELECT * FROM jobs WHERE id = ?", [job_id])
            rows = _records(cur)
        return rows[0] if rows else None

    def ids_starting(self, prefix: str, *, limit: int = 10) -> list[str]:
        """Job ids that begin with ``prefix`` (a range scan on the primary key), in id order."""
        with self._lock:
            cur = self.db.execute("SELECT id FROM jobs WHERE id >= ? AND id < ? ORDER BY id "
                                  "LIMIT ?", [prefix, prefix + "\U0010ffff", limit])
            return [r[0] for r in cur.fetchall()]

    def history(self, job_id: str) -> list[dict]:
        with self._lock:
            cur = self.db.execute(
                "SELECT phase, at, note FROM phases WHERE job_id = ? ORDER BY at, rowid", [job_id])
            return [dict(zip(("phase", "at", "note"), r)) for r in cur.fetchall()]

    def list(self, *, phase: str | list[str] | None = None, service: str | None = None,
             text: str | None = None, limit: int | None = 50, offset: int = 0,
             sort: str = "created", notebook: str | None = None,
             analysis: str | None = None) -> list[JobRecord]:
        """Records, newest first (or largest first for ``sort`` = ``rows``/``result_bytes``,
        latest finished first for ``finished``); ``notebook=""`` picks jobs with no notebook."""
        where, args = _filters(phase, service, text, notebook, analysis)
        if sort not in SORTS:
            raise ValueError(f"cannot sort by {sort!r}; one of {', '.join(SORTS)}")
        sql = f"SELECT * FROM jobs {where} ORDER BY {sort} DESC, rowid DESC"
        if limit is not None:
            sql += " LIMIT ? OFFSET ?"
            args += [int(limit), int(offset)]
        with self._lock:
            return _records(self.db.execute(sql, args))

    def unfinished(self, *, service: str | None = None) -> list[JobRecord]:
        """Records that still need work: active ones, and finished ones not yet fetched.

        Two indexed reads (never a scan of the finished jobs, which can number 100,000s).
        """
        where, args = ("AND service = ?", [service]) if service else ("", [])
        active = sorted(phases.ACTIVE)
        # INDEXED BY both sides, sorted here: asked to sort, SQLite prefers walking the whole
        # created index to sorting a handful of rows.
        sql = (f"SELECT * FROM jobs INDEXED BY idx_jobs_phase_service "
               f"WHERE phase IN ({','.join('?' * len(active))}) {where} "
               f"UNION ALL SELECT * FROM jobs INDEXED BY idx_jobs_unfetched "
               f"WHERE phase = 'COMPLETED' AND parquet_sha256 IS NULL {where}")
        with self._lock:
            rows = _records(self.db.execute(sql, [*active, *args, *args]))
        return sorted(rows, key=lambda r: r.created)

    def count(self, *, phase: str | list[str] | None = None, service: str | None = None,
              text: str | None = None, notebook: str | None = None,
              analysis: str | None = None) -> int:
        where, args = _filters(phase, service, text, notebook, analysis)
        with self._lock:
            return self.db.execute(f"SELECT count(*) FROM jobs {where}", args).fetchone()[0]

    def result_hashes(self) -> set[str]:
        """The Parquet checksums the records point at: one per result (its VOTable and Parquet
        files are one result), for counting results rather than files."""
        with self._lock:
            rows = self.db.execute("SELECT DISTINCT parquet_sha256 FROM jobs "
                                   "WHERE parquet_sha256 IS NOT NULL").fetchall()
        return {row[0] for row in rows}

    def groups(self, by: str, *, phase: str | list[str] | None = None,
               service: str | None = None, text: str | None = None) -> list[dict]:
        """Jobs per notebook (or analysis): how many, how many cached, and the bytes and rows
        of their cached results, largest cache use first."""
        if by not in GROUPINGS or by not in self.columns():
            return []
        where, args = _filters(phase, service, text)
        sql = (f"SELECT coalesce({by}, '') AS value, count(*) AS jobs, "
               f"sum(parquet_sha256 IS NOT NULL) AS cached, "
               f"coalesce(sum(CASE WHEN parquet_sha256 IS NOT NULL THEN result_bytes END), 0) "
               f"AS bytes, coalesce(sum(CASE WHEN parquet_sha256 IS NOT NULL THEN rows END), 0) "
               f"AS rows FROM jobs {where} GROUP BY 1 ORDER BY bytes DESC, jobs DESC, value")
        with self._lock:
            cur = self.db.execute(sql, args)
            names = [d[0] for d in cur.description]
            return [dict(zip(names, r)) for r in cur.fetchall()]

    def columns(self) -> set[str]:
        """The job table's columns (another branch may add some, e.g. ``analysis``)."""
        with self._lock:
            return {r[1] for r in self.db.execute("PRAGMA table_info(jobs)").fetchall()}

    def version(self) -> str:
        """A cheap token that changes whenever any job row changes (for change feeds)."""
        with self._lock:
            n, last = self.db.execute("SELECT count(*), max(updated) FROM jobs").fetchone()
        return f"{n}:{last or 0:.6f}"

    # --- writing ------------------------------------------------------------------------------

    def find(self, key: str, *, reuse: Callable[[JobRecord], bool]) -> JobRecord | None:
        """The newest record for ``key`` that ``reuse`` accepts, read without taking the write
        lock (the fast path of a cache hit; :meth:`claim` is the atomic one)."""
        with self._lock:
            records = _records(self.db.execute(
                "SELECT * FROM jobs WHERE key = ? ORDER BY created DESC", [key]))
        return next((r for r in records if reuse(r)), None)

    def claim(self, key: str, fields: dict, *,
              reuse: Callable[[JobRecord], bool]) -> tuple[JobRecord, bool]:
        """Return the newest record for ``key`` that ``reuse`` accepts, or insert ``fields``.

        Atomic across processes: of two simultaneous claims of one key, one inserts and the
        other gets that record back.
        """
        with self._write() as conn:
            for record in _records(conn.execute(
                    "SELECT * FROM jobs WHERE key = ? ORDER BY created DESC", [key])):
                if reuse(record):
                    return record, False
            now = time.time()
            record = {**fields, "key": key, "created": fields.get("created", now), "updated": now}
            _insert(conn, "jobs", _encode(record))
            self._log_phase(record["id"], record["phase"], now, "recorded")
        return self.get(record["id"]), True

    def insert(self, fields: dict) -> JobRecord:
        """Insert a record as given (used when importing from a group cache)."""
        now = time.time()
        with self._write() as conn:
            _insert(conn, "jobs", _encode({**fields, "updated": now}))
            self._log_phase(fields["id"], fields["phase"], fields.get("created", now), "imported")
        return self.get(fields["id"])

    def update(self, job_id: str, *, note: str | None = None, **fields) -> JobRecord:
        """Change fields of one record; a phase change is appended to the phase history."""
        with self._write() as conn:
            old = conn.execute("SELECT phase FROM jobs WHERE id = ?", [job_id]).fetchone()
            if old is None:
                raise KeyError(job_id)
            now = time.time()
            if "requests_add" in fields:
                extra = int(fields.pop("requests_add"))
                conn.execute("UPDATE jobs SET requests = coalesce(requests, 0) + ? WHERE id = ?",
                             [extra, job_id])
            fields["updated"] = now
            sets = ", ".join(f"{_column(name)} = ?" for name in fields)
            conn.execute(f"UPDATE jobs SET {sets} WHERE id = ?",
                         [*_encode(fields).values(), job_id])
            if "phase" in fields and fields["phase"] != old[0]:
                self._log_phase(job_id, fields["phase"], now, note)
        return self.get(job_id)

    def take_lease(self, job_id: str, owner: str, seconds: float) -> bool:
        """Become the one process driving this job, if no live process drives it now."""
        with self._write() as conn:
            row = conn.execute("SELECT owner, lease_until FROM jobs WHERE id = ?",
                               [job_id]).fetchone()
            if row is None:
                return False
            holder, until = row
            now = time.time()
            free = (holder is None or holder == owner or (until or 0) < now
                    or not owner_alive(holder))
            if free:
                conn.execute("UPDATE jobs SET owner = ?, lease_until = ? WHERE id = ?",
                             [owner, now + seconds, job_id])
            return free

    def release(self, job_id: str, owner: str, *, requests_add: int = 0) -> None:
        """Give up the lease, adding the HTTP requests made under it in the same transaction."""
        with self._write() as conn:
            if requests_add:
                conn.execute("UPDATE jobs SET requests = coalesce(requests, 0) + ?, updated = ? "
                             "WHERE id = ?", [int(requests_add), time.time(), job_id])
            conn.execute("UPDATE jobs SET owner = NULL, lease_until = NULL "
                         "WHERE id = ? AND owner = ?", [job_id, owner])

    def claim_start(self, job_id: str, *, limit: int | None, owner: str, seconds: float) -> bool:
        """Take the lease to create an UNSENT job on its service, honouring the running limit.

        Jobs start in the order they were recorded: a job may start only while the number of
        jobs already running on its service plus the older UNSENT jobs ahead of it is below
        ``limit``.
        """
        with self._write() as conn:
            row = conn.execute("SELECT service, phase, created, owner, lease_until FROM jobs "
                               "WHERE id = ?", [job_id]).fetchone()
            if row is None or row[1] != phases.UNSENT:
                return False
            service, _, created, holder, until = row
            now = time.time()
            if holder and holder != owner and (until or 0) >= now and owner_alive(holder):
                return False
            if limit is not None:
                running = conn.execute(
                    f"SELECT count(*) FROM jobs WHERE service = ? AND phase IN "
                    f"({','.join('?' * len(phases.RUNNING))})",
                    [service, *sorted(phases.RUNNING)]).fetchone()[0]
                ahead = conn.execute(
                    "SELECT count(*) FROM jobs WHERE service = ? AND phase = ? AND "
                    "(created < ? OR (created = ? AND id < ?))",
                    [service, phases.UNSENT, created, created, job_id]).fetchone()[0]
                if running + ahead >= limit:
                    return False
            conn.execute("UPDATE jobs SET owner = ?, lease_until = ? WHERE id = ?",
                         [owner, now + seconds, job_id])
            return True

    def forget(self, job_id: str) -> bool:
        with self._write() as conn:
            conn.execute("DELETE FROM phases WHERE job_id = ?", [job_id])
            gone = conn.execute("DELETE FROM jobs WHERE id = ?", [job_id]).rowcount
        return bool(gone)

    def service_info(self, service: str) -> dict | None:
        with self._lock:
            row = self.db.execute("SELECT info FROM services WHERE service = ?",
                                  [service]).fetchone()
        return None if row is None else json.loads(row[0])

    def set_service_info(self, service: str, info: dict) -> None:
        with self._write() as conn:
            conn.execute("INSERT OR REPLACE INTO services (service, info, read_at) "
                         "VALUES (?, ?, ?)", [service, json.dumps(info, sort_keys=True),
                                              time.time()])

    # --- service metadata (see jobdesk.metadata) ------------------------------------------------

    def save_metadata(self, service: str, tables, *, source: str, skipped=()) -> dict:
        """Replace what is known of ``service``'s tables by ``tables`` (an iterable of dicts with
        ``name, schema_name, description, nrows`` and ``columns``: a list of column dicts), in
        one transaction, consuming it as it goes (a large tableset is never all in memory)."""
        now = time.time()
        n_tables = n_columns = 0
        with self._write() as conn:
            for name in ("meta_tables", "meta_columns", "meta_search"):
                conn.execute(f"DELETE FROM {name} WHERE service = ?", [service])
            for t in tables:
                columns = t.get("columns") or []
                conn.execute("INSERT OR REPLACE INTO meta_tables (service, name, schema_name, "
                             "description, nrows, ncols, ord, lname, lshort) "
                             "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
                             [service, t["name"], t.get("schema_name"), t.get("description"),
                              t.get("nrows"), len(columns), n_tables, _plain(t["name"]),
                              _plain(t["name"]).rsplit(".", 1)[-1]])
                conn.execute("INSERT INTO meta_search (service, table_name, column_name, name, "
                             "description, unit, ucd) VALUES (?, ?, NULL, ?, ?, NULL, NULL)",
                             [service, t["name"], t["name"], t.get("description") or ""])
                conn.executemany(
                    "INSERT INTO meta_columns (service, table_name, name, datatype, arraysize, "
                    "xtype, unit, ucd, description, ord) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                    [[service, t["name"], c["name"], c.get("datatype"), c.get("arraysize"),
                      c.get("xtype"), c.get("unit"), c.get("ucd"), c.get("description"), i]
                     for i, c in enumerate(columns)])
                conn.executemany(
                    "INSERT INTO meta_search (service, table_name, column_name, name, "
                    "description, unit, ucd) VALUES (?, ?, ?, ?, ?, ?, ?)",
                    [[service, t["name"], c["name"], c["name"], c.get("description") or "",
                      c.get("unit") or "", c.get("ucd") or ""] for c in columns])
                n_tables += 1
                n_columns += len(columns)
            conn.execute("INSERT OR REPLACE INTO meta_services (service, read_at, source, "
                         "tables, columns, skipped) VALUES (?, ?, ?, ?, ?, ?)",
                         [service, now, source, n_tables, n_columns, json.dumps(list(skipped))])
        return {"service": service, "read_at": now, "source": source, "tables": n_tables,
                "columns": n_columns, "skipped": list(skipped)}

    def metadata_info(self, service: str | None = None) -> list[dict]:
        """When each service's metadata was read, from where, and how much (all services
        when ``service`` is None)."""
        sql = "SELECT service, read_at, source, tables, columns, skipped FROM meta_services"
        args: list = []
        if service is not None:
            sql += " WHERE service = ?"
            args.append(service)
        with self._lock:
            cur = self.db.execute(sql + " ORDER BY service", args)
            rows = _dicts(cur)
        for row in rows:
            row["skipped"] = json.loads(row["skipped"] or "[]")
        return rows

    def meta_tables(self, service: str, *, limit: int | None = None, offset: int = 0,
                    names: list[str] | None = None) -> list[dict]:
        sql = ("SELECT name, schema_name, description, nrows, ncols FROM meta_tables "
               "WHERE service = ?")
        args: list = [service]
        if names is not None:
            sql += f" AND name IN ({','.join('?' * len(names))})"
            args += names
        sql += " ORDER BY ord"
        if limit is not None:
            sql += " LIMIT ? OFFSET ?"
            args += [int(limit), int(offset)]
        with self._lock:
            cur = self.db.execute(sql, args)
            return _dicts(cur)

    def meta_table_like(self, service: str, name: str) -> list[dict]:
        """Tables whose full or short name is ``name``, ignoring case (two indexed reads)."""
        low = _plain(name)
        with self._lock:
            cur = self.db.execute(
                "SELECT name, schema_name, description, nrows, ncols FROM meta_tables "
                "WHERE service = ? AND lname = ? UNION SELECT name, schema_name, description, "
                "nrows, ncols FROM meta_tables WHERE service = ? AND lshort = ?",
                [service, low, service, low])
            return _dicts(cur)

    def meta_columns(self, service: str, table: str) -> list[dict]:
        with self._lock:
            cur = self.db.execute(
                "SELECT name, datatype, arraysize, xtype, unit, ucd, description FROM "
                "meta_columns WHERE service = ? AND table_name = ? ORDER BY ord", [service, table])
            return _dicts(cur)

    def meta_find(self, service: str, match: str, *, limit: int = 50) -> list[dict]:
        """Tables and columns whose names, descriptions, units or UCDs match an FTS5 query;
        a hit in a name ranks first (bm25 weights: name 10, description 1, unit 2, ucd 3)."""
        with self._lock:
            cur = self.db.execute(
                "SELECT table_name, column_name, bm25(meta_search, 0, 0, 0, 10, 1, 2, 3) AS rank "
                "FROM meta_search WHERE meta_search MATCH ? AND service = ? "
                "ORDER BY rank LIMIT ?", [match, service, int(limit)])
            return [{"table": t, "column": c, "rank": r} for t, c, r in cur.fetchall()]

    def services(self) -> list[tuple[str, int]]:
        """Every service some job record names, with its number of jobs."""
        with self._lock:
            return [tuple(r) for r in self.db.execute(
                "SELECT service, count(*) FROM jobs GROUP BY service ORDER BY service")]

    def job_durations(self, service: str, *, limit: int = 200) -> list[tuple[float, int | None]]:
        """(seconds from submission to the end, rows) of the latest finished jobs of a service."""
        with self._lock:
            return [tuple(r) for r in self.db.execute(
                "SELECT finished - coalesce(started, submitted), rows FROM jobs "
                "WHERE service = ? AND phase = 'COMPLETED' AND submitted IS NOT NULL "
                "AND finished IS NOT NULL AND job_url IS NOT NULL "
                "ORDER BY finished DESC LIMIT ?", [service, int(limit)]).fetchall()]

    # --- analyses and re-run plans ------------------------------------------------------------

    def add_step(self, analysis: str, job_id: str, depends: dict | None = None) -> int:
        """Append a job to an analysis (once: a repeated submit keeps its first place); the
        step number. ``depends`` maps upload names to the job ids whose results they send."""
        with self._write() as conn:
            row = conn.execute("SELECT step FROM analysis_steps WHERE analysis = ? AND job_id = ?",
                               [analysis, job_id]).fetchone()
            if row is not None:
                return row[0]
            step = conn.execute("SELECT coalesce(max(step), 0) + 1 FROM analysis_steps "
                                "WHERE analysis = ?", [analysis]).fetchone()[0]
            conn.execute("INSERT INTO analysis_steps (analysis, step, job_id, depends, added) "
                         "VALUES (?, ?, ?, ?, ?)",
                         [analysis, step, job_id, json.dumps(depends or {}, sort_keys=True),
                          time.time()])
            conn.execute("UPDATE jobs SET analysis = ?, updated = ? WHERE id = ? "
                         "AND analysis IS NULL", [analysis, time.time(), job_id])
        return step

    def steps(self, analysis: str) -> list[dict]:
        """The analysis's steps in order: {step, job_id, depends, added}."""
        with self._lock:
            rows = self.db.execute("SELECT step, job_id, depends, added FROM analysis_steps "
                                   "WHERE analysis = ? ORDER BY step", [analysis]).fetchall()
        return [{"step": s, "job_id": j, "depends": json.loads(d or "{}"), "added": a}
                for s, j, d, a in rows]

    def analyses(self) -> list[dict]:
        """Every analysis: name, steps, first and last addition, newest first."""
        with self._lock:
            rows = self.db.execute("SELECT analysis, count(*), min(added), max(added) "
                                   "FROM analysis_steps GROUP BY analysis "
                                   "ORDER BY max(added) DESC").fetchall()
        return [{"name": n, "steps": c, "created": lo, "updated": hi} for n, c, lo, hi in rows]

    def save_plan(self, plan_id: str, analysis: str, into: str, args: dict,
                  state: dict) -> None:
        """Insert or replace a re-run plan (its arguments and its steps' state, as JSON)."""
        now = time.time()
        with self._write() as conn:
            conn.execute("INSERT INTO plans (id, analysis, into_name, args, created, updated, "
                         "state) VALUES (?, ?, ?, ?, ?, ?, ?) ON CONFLICT (id) DO UPDATE SET "
                         "state = excluded.state, updated = excluded.updated",
                         [plan_id, analysis, into, json.dumps(args, sort_keys=True), now, now,
                          json.dumps(state, sort_keys=True)])

    def plan(self, plan_id: str) -> dict | None:
        with self._lock:
            cur = self.db.execute("SELECT * FROM plans WHERE id = ?", [plan_id])
            row = cur.fetchone()
            cols = [d[0] for d in cur.description]
        if row is None:
            return None
        out = dict(zip(cols, row))
        out["args"], out["state"] = json.loads(out["args"]), json.loads(out["state"])
        return out

    def plans(self, analysis: str | None = None) -> list[dict]:
        with self._lock:
            ids = [r[0] for r in self.db.execute(
                "SELECT id FROM plans WHERE ? IS NULL OR analysis = ? ORDER BY created DESC",
                [analysis, analysis]).fetchall()]
        return [self.plan(i) for i in ids]

    def integrity(self) -> str:
        with self._lock:
            return self.db.execute("PRAGMA integrity_check").fetchone()[0]

    def close(self) -> None:
        with self._lock:
            self.db.conn.close()

    def _log_phase(self, job_id: str, phase: str, at: float, note: str | None) -> None:
        _insert(self.db.conn, "phases", {"job_id": job_id, "phase": phase, "at": at, "note": note})


def _plain(name: str) -> str:
    """A table name as looked up: lower case, without the quotes some services list it with
    (``"Mixed"."Case"``)."""
    return name.replace('"', "").lower()


def _column(name: str) -> str:
    if name not in JOB_COLUMNS:
        raise KeyError(f"no such job field: {name}")
    return name


def _insert(conn: sqlite3.Connection, table: str, record: dict) -> None:
    names = [_column(n) for n in record] if table == "jobs" else list(record)
    conn.execute(f"INSERT INTO {table} ({', '.join(names)}) VALUES ({', '.join('?' * len(names))})",
                 list(record.values()))


SORTS = ("created", "finished", "rows", "result_bytes")
GROUPINGS = ("notebook", "analysis")


def _filters(phase, service, text, notebook=None, analysis=None) -> tuple[str, list]:
    clauses, args = [], []
    for name, value in (("notebook", notebook), ("analysis", analysis)):
        if value == "":
            clauses.append(f"({name} IS NULL OR {name} = '')")
        elif value is not None:
            clauses.append(f"{name} = ?")
            args.append(value)
    if phase:
        wanted = [phase] if isinstance(phase, str) else list(phase)
        clauses.append(f"phase IN ({','.join('?' * len(wanted))})")
        args += wanted
    if service:
        clauses.append("service = ?")
        args.append(service)
    if text:
        clauses.append("(label LIKE ? ESCAPE '\\' OR adql LIKE ? ESCAPE '\\' OR id = ?)")
        pattern = "%" + text.replace("\\", "\\\\").replace("%", "\\%").replace("_", "\\_") + "%"
        args += [pattern, pattern, text]
    return ("WHERE " + " AND ".join(clauses)) if clauses else "", args


def _dicts(cur) -> list[dict]:
    """The rows a cursor holds, each as {column name: value}."""
    cols = [d[0] for d in cur.description]
    return [dict(zip(cols, r)) for r in cur.fetchall()]


def _records(cur) -> list[JobRecord]:
    """The job rows a cursor holds, as typed records."""
    rows = cur.fetchall()
    if not rows:   # the poller's usual pass: nothing active, nothing more to do
        return []
    return JobRecord.from_rows(tuple(d[0] for d in cur.description), rows)


def _encode(fields: dict) -> dict:
    """Field values as stored: JSON fields as JSON text (text given is checked to be JSON),
    booleans as 0/1."""
    out = dict(fields)
    for name, value in out.items():
        if name in JSON_FIELDS and value is not None:
            if isinstance(value, str):
                json.loads(value)   # ValueError now rather than an unreadable record later
            else:
                out[name] = json.dumps(value, sort_keys=True)
        elif isinstance(value, bool):
            out[name] = int(value)
    return out

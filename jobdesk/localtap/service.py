"""The HTTP face of the embedded service: TAP 1.1 sync/async, UWS 1.1 job resources, VOSI 1.1,
and the out-of-band ``/_localtap`` endpoints tests use to read counters and change faults.

Handlers only parse requests and write answers; queries go to the engine, jobs to the
:class:`~jobdesk.localtap.uws.JobStore`, execution to :class:`JobRunner` (a thread pool, because
the engine blocks).
"""

from __future__ import annotations

import asyncio
import io
import json
import os
import re
import secrets
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Mapping

import tornado.web
from tornado.ioloop import IOLoop, PeriodicCallback
from tornado.iostream import StreamClosedError

from jobdesk.localtap import uws
from jobdesk.localtap.faults import Faults
from jobdesk.localtap.votable_out import (
    CONTENT_TYPES, Stopped, error_document, serialization_for, write_result, xml_attr, xml_text,
)

try:
    from jobdesk import __version__ as _VERSION
except ImportError:  # pragma: no cover - the package always has it
    _VERSION = "0"

SERVER_SOFTWARE = f"jobdesk-localtap {_VERSION}"
VOTABLE_TYPE = "application/x-votable+xml"
_UPLOAD_NAME = re.compile(r"^[A-Za-z][A-Za-z0-9_]*$")
_CHUNK = 64 * 1024
ABORTED_RESULT = "aborted-result.xml"   # what the fault aborted_lists_result leaves behind


class QueryProblem(Exception):
    """Something the client asked for cannot be done; the message says what and how to fix it."""


@dataclass
class QueryPlan:
    query: str
    maxrec: int
    serialization: str
    uploads: dict = field(default_factory=dict)   # name -> astropy Table


# --- parameters ------------------------------------------------------------------------------


def parse_upload_spec(value: str) -> list[tuple[str, str]]:
    """``name,param:part`` pairs; several as repeated values or TAP 1.0's ``a,x;b,y`` (TAP 1.1 §4.5)."""
    pairs = []
    for item in value.split(";"):
        item = item.strip()
        if not item:
            continue
        name, sep, location = item.partition(",")
        if not sep or not name.strip() or not location.strip():
            raise QueryProblem(f"UPLOAD value {item!r} is not 'name,param:part' (TAP 1.1 §4.5)")
        pairs.append((name.strip(), location.strip()))
    return pairs


def plan_query(params: Mapping[str, str], read_part: Callable[[str], bytes | None],
               max_rec: int) -> QueryPlan:
    """Check the TAP parameters of one query and resolve its uploads; raise QueryProblem."""
    lang = params.get("LANG")
    if lang is not None and lang.split("-")[0].upper() != "ADQL":
        raise QueryProblem(f"LANG={lang} is not supported; this service speaks LANG=ADQL only")
    query = params.get("QUERY")
    if query is None or not query.strip():
        raise QueryProblem("no QUERY parameter: give the ADQL text as QUERY=...")
    fmt = params.get("RESPONSEFORMAT", params.get("FORMAT"))
    serialization = serialization_for(fmt)
    if serialization is None:
        raise QueryProblem(f"RESPONSEFORMAT={fmt} is not supported; use votable, "
                           "application/x-votable+xml;serialization=BINARY2 (votable/b2), "
                           "application/vnd.apache.parquet (VOParquet) or csv")
    maxrec = max_rec
    if params.get("MAXREC") not in (None, ""):
        try:
            maxrec = int(params["MAXREC"])
        except ValueError:
            raise QueryProblem(f"MAXREC={params['MAXREC']} is not an integer") from None
        if maxrec < 0:
            raise QueryProblem(f"MAXREC={maxrec} is negative")
        maxrec = min(maxrec, max_rec)   # DALI 1.1 §3.2.2: the service may lower it
    uploads = {}
    for name, location in parse_upload_spec(params.get("UPLOAD", "")):
        if not _UPLOAD_NAME.match(name):
            raise QueryProblem(f"upload name {name!r} is not an ADQL identifier")
        if not location.startswith("param:"):
            raise QueryProblem(f"UPLOAD {name},{location}: uploads by URL are not supported by this "
                               "service (it has no network); send the table inline as param:<part>")
        part = location[len("param:"):]
        data = read_part(part)
        if data is None:
            raise QueryProblem(f"UPLOAD {name},{location}: the request has no part named {part!r}")
        uploads[name] = _read_votable(name, data)
    return QueryPlan(query=query, maxrec=maxrec, serialization=serialization, uploads=uploads)


def _read_votable(name: str, data: bytes):
    from astropy.io.votable import parse_single_table
    try:
        return parse_single_table(io.BytesIO(data)).to_table()
    except Exception as exc:   # astropy raises many types for bad input
        raise QueryProblem(f"upload {name!r} is not a readable VOTable: {exc}") from None


def error_text(exc: BaseException) -> str:
    """The message for an engine error; ADQL errors say where (line/column)."""
    message = getattr(exc, "message", None) or str(exc) or type(exc).__name__
    line, column = getattr(exc, "line", None), getattr(exc, "column", None)
    if line is not None and f"line {line}" not in message:
        where = f"line {line}" + (f", column {column}" if column is not None else "")
        message = f"{message} ({where})"
    return message


def flag_overflow_at_maxrec(result, maxrec: int):
    """Make ``result`` say OVERFLOW whenever it returns MAXREC rows, cut or not.

    DALI 1.1 §4.4.1 asks for OVERFLOW only when rows were cut, and the engine knows whether
    they were, so by default the flag is truthful.  Some servers flag it whenever rows == MAXREC
    (they stop reading there); the fault ``overflow_at_maxrec`` imitates them.
    """
    rows = result.rows

    def counted():
        count = 0
        for row in rows:
            count += 1
            yield row
        if count >= maxrec:
            result.overflow = True

    result.rows = counted()
    return result


def _is_adql_error(exc: BaseException) -> bool:
    return type(exc).__name__ == "AdqlError" or hasattr(exc, "line") and hasattr(exc, "message")


# --- execution -------------------------------------------------------------------------------


class JobRunner:
    """Moves jobs QUEUED -> EXECUTING -> COMPLETED/ERROR on a thread pool, enforcing
    ``max_running``, ``queue_delay``, ``exec_delay``, ``executionduration`` and aborts."""

    def __init__(self, tap: "LocalTapService", workers: int = 16):
        self.tap = tap
        self.pool = ThreadPoolExecutor(max_workers=workers, thread_name_prefix="localtap-job")
        self.cancels: dict[str, threading.Event] = {}
        self.running: set[str] = set()

    def schedule(self):
        """One scheduling pass on the IOLoop: time limits first, then start what may start."""
        store, faults, now = self.tap.store, self.tap.faults, time.time()
        for job_id in list(self.running):
            job = store.get(job_id)
            if job is None or job.phase != uws.EXECUTING:
                continue
            if job.execution_duration > 0 and job.start_time is not None \
                    and now > job.start_time + job.execution_duration:
                message = (f"execution time limit of {job.execution_duration} s exceeded; "
                           "narrow the query or raise executionduration")
                if store.update(job_id, expect={uws.EXECUTING}, phase=uws.ERROR, end_time=now,
                                error_message=message, error_type="fatal"):
                    self.cancels.get(job_id, threading.Event()).set()
                    self.tap.notify(job_id)
        for job in store.in_phase(uws.QUEUED):
            if len(self.running) >= max(faults.max_running, 0):
                break
            if now < (job.queued_time or job.creation_time) + faults.queue_delay:
                continue
            if not store.update(job.id, expect={uws.QUEUED}, phase=uws.EXECUTING, start_time=now):
                continue
            cancel = self.cancels.setdefault(job.id, threading.Event())
            self.running.add(job.id)
            self.tap.notify(job.id)
            self.pool.submit(self._execute, job.id, cancel)

    def cancel(self, job_id: str):
        event = self.cancels.get(job_id)
        if event is not None:
            event.set()

    def _execute(self, job_id: str, cancel: threading.Event):
        tap = self.tap
        job_dir = tap.store.job_dir(job_id)
        partial = job_dir / "result.part"
        try:
            job = tap.store.get(job_id)
            if job is None:
                return
            delay = tap.faults.exec_delay
            if delay > 0 and cancel.wait(delay):
                return
            plan = plan_query(job.parameters, lambda part: _read_saved_part(job_dir, part),
                              tap.faults.max_rec)
            result = tap.engine.execute(plan.query, maxrec=plan.maxrec, uploads=plan.uploads or None)
            if tap.faults.overflow_at_maxrec:
                flag_overflow_at_maxrec(result, plan.maxrec)
            with open(partial, "wb") as out:
                written = write_result(out, result, plan.serialization, infos=tap.infos(plan.query),
                                       should_stop=cancel.is_set)
                out.flush()
                os.fsync(out.fileno())
            if cancel.is_set():
                raise Stopped()
            final = job_dir / {"csv": "result.csv", "parquet": "result.parquet"}.get(
                plan.serialization, "result.xml")
            os.replace(partial, final)
            if not tap.store.update(job_id, expect={uws.EXECUTING}, phase=uws.COMPLETED,
                                    end_time=time.time(), result_file=final.name,
                                    result_size=final.stat().st_size,
                                    result_type=CONTENT_TYPES[plan.serialization],
                                    result_rows=written.rows, overflow=written.overflow):
                final.unlink(missing_ok=True)   # aborted or timed out meanwhile
        except Stopped:
            pass
        except QueryProblem as exc:
            self._fail(job_id, str(exc))
        except Exception as exc:   # the engine's errors, whatever their type
            if _is_adql_error(exc):
                self._fail(job_id, error_text(exc))
            else:
                self._fail(job_id, f"internal error while executing the query: "
                                   f"{type(exc).__name__}: {exc}")
        finally:
            partial.unlink(missing_ok=True)
            if tap.loop is not None:
                tap.loop.add_callback(self._finished, job_id)

    def _fail(self, job_id: str, message: str):
        self.tap.store.update(job_id, expect={uws.EXECUTING}, phase=uws.ERROR, end_time=time.time(),
                              error_message=message, error_type="fatal")

    def _finished(self, job_id: str):
        self.running.discard(job_id)
        self.cancels.pop(job_id, None)
        self.tap.notify(job_id)
        self.schedule()

    def shutdown(self):
        for event in list(self.cancels.values()):
            event.set()
        self.pool.shutdown(wait=False, cancel_futures=True)


def _part_file(job_dir: Path, part: str) -> Path:
    return job_dir / f"part-{part.encode('utf-8').hex()}.vot"


def _read_saved_part(job_dir: Path, part: str) -> bytes | None:
    path = _part_file(job_dir, part)
    return path.read_bytes() if path.exists() else None


# --- the service object ----------------------------------------------------------------------


class LocalTapService:
    """Everything the handlers share: engine, job store, faults, runner, counters, waiters."""

    def __init__(self, *, state_dir: Path, engine, faults: Faults, sweep_interval: float = 1.0):
        self.state_dir = Path(state_dir)
        self.state_dir.mkdir(parents=True, exist_ok=True)
        (self.state_dir / "sync").mkdir(exist_ok=True)
        self.engine = engine
        self.faults = faults
        self.store = uws.JobStore(self.state_dir)
        self.runner = JobRunner(self)
        self.sweep_interval = sweep_interval
        self.started = time.time()
        self.loop: IOLoop | None = None
        self.counters = {"requests": 0, "refused": 0, "jobs_created": 0, "jobs_destroyed": 0,
                         "sync_queries": 0, "result_downloads": 0, "result_bytes_sent": 0,
                         "dropped_downloads": 0, "wait_requests": 0, "wait_checks": 0}
        self.restart_report = {"stopped": [], "requeued": []}
        self._waiters: dict[str, set[asyncio.Future]] = {}
        self._callbacks: list[PeriodicCallback] = []
        self._sync_pool = ThreadPoolExecutor(max_workers=8, thread_name_prefix="localtap-sync")

    def start(self, loop: IOLoop):
        """Recover jobs left by a previous run, then start scheduling and sweeping."""
        self.loop = loop
        stopped, queued = self.store.recover()
        self.restart_report = {"stopped": stopped, "requeued": queued}
        self._callbacks = [PeriodicCallback(self.runner.schedule, 50),
                           PeriodicCallback(self.sweep, max(self.sweep_interval, 0.05) * 1000)]
        for callback in self._callbacks:
            callback.start()

    def stop(self):
        for callback in self._callbacks:
            callback.stop()
        self.runner.shutdown()
        self._sync_pool.shutdown(wait=False, cancel_futures=True)
        self.store.close()

    def infos(self, query: str) -> list[tuple[str, str]]:
        return [("QUERY", query), ("request_date", uws.iso(time.time())),
                ("server_software", SERVER_SOFTWARE)]

    # waiting for phase changes (UWS 1.1 §2.2.1.2) -------------------------------------------

    def notify(self, job_id: str):
        """Wake WAITing requests of this job; call on the IOLoop."""
        for future in self._waiters.pop(job_id, set()):
            if not future.done():
                future.set_result(None)

    async def wait_for_change(self, job_id: str, seconds: float):
        future = asyncio.get_running_loop().create_future()
        self._waiters.setdefault(job_id, set()).add(future)
        try:
            await asyncio.wait_for(future, timeout=seconds)
        except asyncio.TimeoutError:
            pass
        finally:
            waiters = self._waiters.get(job_id)
            if waiters is not None:
                waiters.discard(future)

    # destruction ---------------------------------------------------------------------------

    def sweep(self):
        """Destroy jobs (results, uploads, records) whose destruction time has passed."""
        for job_id in self.store.expired(time.time()):
            self.destroy(job_id)

    def destroy(self, job_id: str):
        self.runner.cancel(job_id)
        if self.store.delete(job_id):
            self.counters["jobs_destroyed"] += 1
        self.notify(job_id)

    def stats(self) -> dict:
        jobs = self.store.list(phases=set(uws.FINISHED | uws.ACTIVE))
        return {**self.counters,
                "server_software": SERVER_SOFTWARE,
                "running": sorted(self.runner.running),
                "restart": self.restart_report,
                "faults": self.faults.update(),
                "jobs": [{"id": j.id, "phase": j.phase, "run_id": j.run_id,
                          "query": j.parameters.get("QUERY"), "rows": j.result_rows,
                          "overflow": j.overflow, "error": j.error_message} for j in jobs]}


# --- handlers --------------------------------------------------------------------------------


class TapHandler(tornado.web.RequestHandler):
    """Base of the /tap handlers: counts requests and applies the request-level faults."""

    def initialize(self, tap: LocalTapService):
        self.tap = tap

    async def prepare(self):
        self.tap.counters["requests"] += 1
        delay = self.tap.faults.slow_response
        if delay > 0:
            await asyncio.sleep(delay)
        status = self.tap.faults.take_refusal()
        if status is not None:
            self.tap.counters["refused"] += 1
            self.set_status(status)
            self.set_header("Retry-After", "1")
            self.set_header("Content-Type", "text/plain; charset=utf-8")
            self.finish("service temporarily unavailable (injected fault); retry after 1 s\n"
                        if status == 503 else "too many requests (injected fault); retry after 1 s\n")

    def set_default_headers(self):
        self.set_header("Server", SERVER_SOFTWARE)

    def params(self) -> dict[str, str]:
        """Parameters from query string and body, names upper-cased (DALI 1.1 §3.1);
        a repeated UPLOAD keeps every value, other repeats keep the first."""
        values: dict[str, str] = {}
        uploads: list[str] = []
        part_names = set(self.request.files)
        for name, raw_values in self.request.arguments.items():
            if name in part_names:
                continue
            key = name.upper()
            decoded = [v.decode("utf-8", "replace") for v in raw_values]
            if key == "UPLOAD":
                uploads += decoded
            elif key not in values:
                values[key] = decoded[0]
        if uploads:
            values["UPLOAD"] = ";".join(uploads)
        # parts referenced by UPLOAD are data, not parameters
        for _, location in _safe_specs(values.get("UPLOAD", "")):
            if location.startswith("param:"):
                for name in list(values):
                    if name == location[6:].upper() and name not in ("QUERY", "LANG", "UPLOAD"):
                        del values[name]
        return values

    def read_part(self, part: str) -> bytes | None:
        files = self.request.files.get(part)
        if files:
            return files[0].body
        values = self.request.body_arguments.get(part)
        if values:
            return values[0]
        return None

    def base_url(self) -> str:
        return f"{self.request.protocol}://{self.request.host}/tap"

    def send_text(self, text: str, *, status: int = 200):
        self.set_status(status)
        self.set_header("Content-Type", "text/plain; charset=utf-8")
        self.finish(text)

    def send_xml(self, text: str, *, status: int = 200, content_type: str = "text/xml"):
        self.set_status(status)
        self.set_header("Content-Type", f"{content_type}; charset=utf-8")
        self.finish(text.encode("utf-8"))

    def send_error_votable(self, message: str, *, status: int = 400):
        self.set_status(status)
        self.set_header("Content-Type", VOTABLE_TYPE)
        self.finish(error_document(message, infos=[("server_software", SERVER_SOFTWARE)]))

    async def send_file(self, path: Path, content_type: str, *, ranges: bool, delete_after=False):
        """Stream a file with Content-Length; Range (RFC 9110 §14) when ``ranges``;
        ``drop_result_after`` cuts the connection mid-body."""
        size = path.stat().st_size
        start, end = 0, size - 1
        header = self.request.headers.get("Range") if ranges else None
        if ranges:
            self.set_header("Accept-Ranges", "bytes")
            stat = path.stat()
            etag = f'"{stat.st_size:x}-{int(stat.st_mtime_ns):x}"'
            self.set_header("ETag", etag)
            if_range = self.request.headers.get("If-Range")
            if header and if_range and if_range != etag:
                header = None
        if header:
            parsed = _parse_range(header, size)
            if parsed is None:
                self.set_status(416)
                self.set_header("Content-Range", f"bytes */{size}")
                self.finish()
                return
            start, end = parsed
            self.set_status(206)
            self.set_header("Content-Range", f"bytes {start}-{end}/{size}")
        self.set_header("Content-Type", content_type)
        self.set_header("Content-Length", str(end - start + 1 if size else 0))
        if self.request.method == "HEAD":
            self.finish()
            return
        self.tap.counters["result_downloads"] += 1
        limit = self.tap.faults.take_drop()
        sent = 0
        try:
            with open(path, "rb") as handle:
                handle.seek(start)
                remaining = end - start + 1 if size else 0
                while remaining > 0:
                    chunk = handle.read(min(_CHUNK, remaining))
                    if not chunk:
                        break
                    if limit is not None and sent + len(chunk) >= limit:
                        chunk = chunk[: max(limit - sent, 0)]
                        self.write(chunk)
                        await self.flush()
                        sent += len(chunk)
                        self.tap.counters["result_bytes_sent"] += len(chunk)
                        self.tap.counters["dropped_downloads"] += 1
                        self.request.connection.stream.close()   # injected fault: cut mid-body
                        self._finished = True   # tornado must not try to finish a closed stream
                        return
                    self.write(chunk)
                    await self.flush()
                    sent += len(chunk)
                    remaining -= len(chunk)
                    self.tap.counters["result_bytes_sent"] += len(chunk)
            self.finish()
        except StreamClosedError:
            pass
        finally:
            if delete_after:
                path.unlink(missing_ok=True)


def _safe_specs(value: str):
    try:
        return parse_upload_spec(value)
    except QueryProblem:
        return []


def _parse_range(header: str, size: int) -> tuple[int, int] | None:
    """One ``bytes=a-b`` / ``a-`` / ``-n`` range; None when unsatisfiable or malformed."""
    match = re.fullmatch(r"\s*bytes\s*=\s*(\d*)\s*-\s*(\d*)\s*", header)
    if not match or (match.group(1) == "" and match.group(2) == ""):
        return None
    first, last = match.groups()
    if first == "":
        length = int(last)
        if length == 0:
            return None
        return max(size - length, 0), size - 1
    start = int(first)
    end = int(last) if last else size - 1
    if start >= size or end < start:
        return None
    return start, min(end, size - 1)


class RootHandler(TapHandler):
    def get(self):
        self.send_text(f"{SERVER_SOFTWARE}: TAP 1.1 service; endpoints sync, async, capabilities, "
                       "availability, tables\n")


class SyncHandler(TapHandler):
    """TAP 1.1 §2.1 synchronous queries; errors are error VOTables with HTTP 400."""

    async def get(self):
        await self._query()

    async def post(self):
        await self._query()

    async def _query(self):
        self.tap.counters["sync_queries"] += 1
        params = self.params()
        try:
            plan = plan_query(params, self.read_part, self.tap.faults.max_rec)
        except QueryProblem as exc:
            self.send_error_votable(str(exc), status=self._client_error_status())
            return
        target = self.tap.state_dir / "sync" / f"{secrets.token_hex(8)}.part"
        try:
            written = await IOLoop.current().run_in_executor(
                self.tap._sync_pool, self._run, plan, target)
        except Exception as exc:
            target.unlink(missing_ok=True)
            if _is_adql_error(exc) or isinstance(exc, QueryProblem):
                self.send_error_votable(error_text(exc), status=self._client_error_status())
            else:
                self.send_error_votable(f"internal error while executing the query: "
                                        f"{type(exc).__name__}: {exc}", status=500)
            return
        del written
        await self.send_file(target, CONTENT_TYPES[plan.serialization], ranges=False,
                             delete_after=True)

    def _client_error_status(self) -> int:
        # DALI 1.1 §4.4: the error document is what counts; 400 by default, 200 with the fault
        # ``sync_errors_200`` (as servers that always answer 200 do).  Internal errors stay 500.
        return 200 if self.tap.faults.sync_errors_200 else 400

    def _run(self, plan: QueryPlan, target: Path):
        result = self.tap.engine.execute(plan.query, maxrec=plan.maxrec,
                                         uploads=plan.uploads or None)
        if self.tap.faults.overflow_at_maxrec:
            flag_overflow_at_maxrec(result, plan.maxrec)
        with open(target, "wb") as out:
            return write_result(out, result, plan.serialization, infos=self.tap.infos(plan.query))


class JobListHandler(TapHandler):
    """UWS 1.1 §2.2.2: list (with PHASE/AFTER/LAST filters) and job creation."""

    def get(self):
        phases: set[str] = set()
        after = last = None
        for name, raw_values in self.request.query_arguments.items():
            key = name.upper()
            values = [v.decode("utf-8", "replace") for v in raw_values]
            if key == "PHASE":
                phases.update(values)
            elif key == "AFTER":
                try:
                    after = uws.parse_iso(values[0])
                except ValueError:
                    self.send_text(f"AFTER={values[0]} is not an ISO 8601 time\n", status=400)
                    return
            elif key == "LAST":
                try:
                    last = int(values[0])
                    if last < 0:
                        raise ValueError
                except ValueError:
                    self.send_text(f"LAST={values[0]} is not a non-negative integer\n", status=400)
                    return
        jobs = self.tap.store.list(phases=phases or None, after=after, last=last)
        faults = self.tap.faults
        self.send_xml(uws.job_list_xml(jobs, f"{self.base_url()}/async", uws_1_0=faults.no_wait,
                                       sparse=faults.sparse_job_list,
                                       show_run_id=not faults.ignore_runid))

    def post(self):
        params = self.params()
        faults = self.tap.faults
        # UWS 1.1 §2.2.3.1: the job's own settings may come with the creating POST; they are job
        # attributes, not query parameters.  The faults drop them, as some servers do.
        run_id = params.pop("RUNID", None)
        phase = params.pop("PHASE", None)
        destruction = params.pop("DESTRUCTION", None)
        duration = params.pop("EXECUTIONDURATION", None)
        if faults.ignore_runid:
            run_id = None
        if faults.ignore_run_at_creation:
            phase = destruction = duration = None
        try:
            when = uws.parse_iso(destruction) if destruction is not None else None
            seconds = int(duration) if duration is not None else faults.execution_duration
            if seconds < 0:
                raise ValueError
        except ValueError:
            return self.send_text(f"DESTRUCTION={destruction} / EXECUTIONDURATION={duration}: "
                                  "need an ISO 8601 time and a non-negative integer of seconds\n",
                                  status=400)
        job = self.tap.store.create(params, run_id=run_id, destruction_after=faults.destruction,
                                    execution_duration=seconds)
        if when is not None:
            self.tap.store.update(job.id, destruction=when)
        job_dir = self.tap.store.job_dir(job.id)
        for _, location in _safe_specs(params.get("UPLOAD", "")):
            if location.startswith("param:"):
                data = self.read_part(location[6:])
                if data is not None:
                    _part_file(job_dir, location[6:]).write_bytes(data)
        self.tap.counters["jobs_created"] += 1
        if phase == "RUN":   # UWS 1.1 §2.2.3.1 allows PHASE=RUN at creation
            self.tap.store.update(job.id, expect={uws.PENDING}, phase=uws.QUEUED,
                                  queued_time=time.time())
            self.tap.runner.schedule()
        self.redirect(f"{self.base_url()}/async/{job.id}", status=303)


class JobHandler(TapHandler):
    """One job: its document (with WAIT), DELETE, and the sub-resources."""

    def job_or_404(self, job_id: str) -> uws.Job | None:
        job = None if self.tap.faults.lose_jobs else self.tap.store.get(job_id)
        if job is None:
            self.send_text(f"no job {job_id} here (it never existed or was destroyed)\n", status=404)
        return job

    def job_url(self, job_id: str) -> str:
        return f"{self.base_url()}/async/{job_id}"

    async def get(self, job_id: str, resource: str | None = None):
        job = self.job_or_404(job_id)
        if job is None:
            return
        if resource is None:
            job = await self._maybe_wait(job)
            if job is None:
                return
            faults = self.tap.faults
            self.send_xml(uws.job_xml(job, self.job_url(job_id), uws_1_0=faults.no_wait,
                                      show_run_id=not faults.ignore_runid,
                                      has_detail=not faults.has_detail_false))
            return
        handlers = {
            "phase": lambda: self.send_text(job.phase),
            "runid": lambda: self.send_text("" if self.tap.faults.ignore_runid
                                            else job.run_id or ""),
            "destruction": lambda: self.send_text(uws.iso(job.destruction) or ""),
            "executionduration": lambda: self.send_text(str(job.execution_duration)),
            "quote": lambda: self.send_text(""),
            "owner": lambda: self.send_text(job.owner or ""),
            "parameters": lambda: self.send_xml(
                '<?xml version="1.0" encoding="UTF-8"?>\n' + uws.parameters_xml(job, root=True)),
            "results": lambda: self.send_xml(
                '<?xml version="1.0" encoding="UTF-8"?>\n'
                + uws.results_xml(job, self.job_url(job_id), root=True)),
            "error": lambda: self._send_job_error(job),
        }
        handler = handlers.get(resource.lower())
        if handler is None:
            self.send_text(f"no resource {resource!r} on a job\n", status=404)
            return
        handler()

    def _send_job_error(self, job: uws.Job):
        if job.phase != uws.ERROR and self.tap.faults.error_body_200:
            self.send_text("")   # fault error_body_200: 200 with an empty body
            return
        if job.phase != uws.ERROR:
            self.send_text(f"job {job.id} is {job.phase}, not ERROR: it has no error\n", status=404)
            return
        self.set_header("Content-Type", VOTABLE_TYPE)
        self.finish(error_document(job.error_message or "unknown error",
                                   infos=[("QUERY", job.parameters.get("QUERY", "")),
                                          ("server_software", SERVER_SOFTWARE)]))

    async def _maybe_wait(self, job: uws.Job) -> uws.Job | None:
        """UWS 1.1 §2.2.1.2: WAIT=n blocks while PENDING/QUEUED/EXECUTING until the phase changes
        (or n seconds, capped by max_wait); PHASE=X returns at once unless the job is in X."""
        args = {k.upper(): v[-1].decode("utf-8", "replace")
                for k, v in self.request.query_arguments.items()}
        if "WAIT" not in args or self.tap.faults.no_wait:
            return job
        try:
            seconds = int(args["WAIT"])
        except ValueError:
            self.send_text(f"WAIT={args['WAIT']} is not an integer (UWS 1.1 §2.2.1.2)\n", status=400)
            return None
        self.tap.counters["wait_requests"] += 1
        if job.phase not in uws.ACTIVE:
            return job
        expected = args.get("PHASE")
        if expected is not None and job.phase != expected:
            return job
        limit = self.tap.faults.max_wait
        budget = limit if seconds < 0 else min(seconds, limit)
        deadline = time.monotonic() + budget
        start_phase = job.phase
        while True:
            remaining = deadline - time.monotonic()
            if remaining <= 0:
                break
            step = self.tap.faults.wait_granularity
            if step > 0:   # fault: look only every ``step`` seconds, as polling servers do
                await asyncio.sleep(min(step, remaining))
            else:
                await self.tap.wait_for_change(job.id, remaining)
            self.tap.counters["wait_checks"] += 1   # how often a WAIT looked at the phase
            current = self.tap.store.get(job.id)
            if current is None or current.phase != start_phase:
                return current if current is not None else job
        return self.tap.store.get(job.id) or job

    def post(self, job_id: str, resource: str | None = None):
        job = self.job_or_404(job_id)
        if job is None:
            return
        params = self.params()
        target = (resource or "").lower()
        if target == "" and params.get("ACTION") == "DELETE":
            return self._delete(job)
        if target in ("", "phase") and "PHASE" in params:
            return self._change_phase(job, params["PHASE"])
        if target in ("", "destruction") and "DESTRUCTION" in params:
            try:
                when = uws.parse_iso(params["DESTRUCTION"])
            except ValueError:
                return self.send_text(f"DESTRUCTION={params['DESTRUCTION']} is not an ISO 8601 "
                                      "time\n", status=400)
            self.tap.store.update(job.id, destruction=when)
            return self.redirect(self.job_url(job.id), status=303)
        if target in ("", "executionduration") and "EXECUTIONDURATION" in params:
            try:
                seconds = int(params["EXECUTIONDURATION"])
                if seconds < 0:
                    raise ValueError
            except ValueError:
                return self.send_text(f"EXECUTIONDURATION={params['EXECUTIONDURATION']} is not a "
                                      "non-negative integer of seconds\n", status=400)
            self.tap.store.update(job.id, execution_duration=seconds)
            return self.redirect(self.job_url(job.id), status=303)
        if target in ("", "runid") and "RUNID" in params:
            if not self.tap.faults.ignore_runid:   # the fault: answered as usual, but dropped
                self.tap.store.update(job.id, run_id=params["RUNID"])
            return self.redirect(self.job_url(job.id), status=303)
        if target == "parameters" or target == "":
            if job.phase != uws.PENDING:
                return self.send_text(f"job {job.id} is {job.phase}: parameters can change only "
                                      "while PENDING\n", status=400)
            merged = dict(job.parameters)
            merged.update({k: v for k, v in params.items() if k not in ("ACTION",)})
            self.tap.store.update(job.id, parameters=merged)
            return self.redirect(self.job_url(job.id), status=303)
        self.send_text(f"nothing to do: POST to {target or 'the job'} needs its parameter\n",
                       status=400)

    def _change_phase(self, job: uws.Job, phase: str):
        store, now = self.tap.store, time.time()
        if phase == "RUN":
            if job.phase == uws.PENDING:
                store.update(job.id, expect={uws.PENDING}, phase=uws.QUEUED, queued_time=now)
                self.tap.notify(job.id)
                self.tap.runner.schedule()
            elif job.phase not in uws.ACTIVE:
                return self.send_text(f"job {job.id} is {job.phase}; it cannot run again — "
                                      "create a new job\n", status=400)
            elif self.tap.faults.second_run_errors:
                # fault: a repeated RUN breaks the job, as on servers with a strict state machine
                message = (f"PHASE=RUN reached job {job.id} while it was {job.phase}: "
                           f"there is no way from {job.phase} back to QUEUED")
                if store.update(job.id, expect={uws.QUEUED, uws.EXECUTING}, phase=uws.ERROR,
                                end_time=now, error_message=message, error_type="fatal"):
                    self.tap.runner.cancel(job.id)
                    self.tap.notify(job.id)
            # else already QUEUED or EXECUTING: RUN changes nothing (never restart a running job)
        elif phase == "ABORT":
            if store.update(job.id, expect=set(uws.ACTIVE), phase=uws.ABORTED, end_time=now):
                self.tap.runner.cancel(job.id)
                if self.tap.faults.aborted_lists_result:
                    self._leave_aborted_result(job)
                self.tap.notify(job.id)
        else:
            return self.send_text(f"PHASE={phase} is not understood; use RUN or ABORT\n",
                                  status=400)
        self.redirect(self.job_url(job.id), status=303)

    def _leave_aborted_result(self, job: uws.Job):
        """Fault ``aborted_lists_result``: the aborted job lists a result that is no table."""
        path = self.tap.store.job_dir(job.id) / ABORTED_RESULT
        body = error_document(f"job {job.id} was aborted before its query finished",
                              infos=[("QUERY", job.parameters.get("QUERY", ""))])
        path.write_bytes(body)
        self.tap.store.update(job.id, result_file=path.name, result_size=len(body),
                              result_type=VOTABLE_TYPE)

    def delete(self, job_id: str, resource: str | None = None):
        if resource is not None:
            return self.send_text("DELETE applies to the job itself\n", status=405)
        job = self.job_or_404(job_id)
        if job is None:
            return
        self._delete(job)

    def _delete(self, job: uws.Job):
        # UWS 1.1 §2.2.3.2: deleting answers 303 to the job list; a running job is stopped first.
        if self.tap.faults.delete_keeps_running and job.phase == uws.EXECUTING:
            # fault: the job is forgotten at once, but its worker runs on to its end
            if self.tap.store.delete(job.id):
                self.tap.counters["jobs_destroyed"] += 1
            self.tap.notify(job.id)
            return self.redirect(f"{self.base_url()}/async", status=303)
        self.tap.store.update(job.id, expect=set(uws.ACTIVE), phase=uws.ABORTED)
        self.tap.destroy(job.id)
        self.redirect(f"{self.base_url()}/async", status=303)


class ResultHandler(TapHandler):
    """The result file, with Content-Length and byte ranges so downloads can resume."""

    async def get(self, job_id: str):
        await self._serve(job_id)

    async def head(self, job_id: str):
        await self._serve(job_id)

    async def _serve(self, job_id: str):
        job = None if self.tap.faults.lose_jobs else self.tap.store.get(job_id)
        if job is None:
            return self.send_text(f"no job {job_id} here\n", status=404)
        listed = job.result_file and (job.phase == uws.COMPLETED or (
            job.phase == uws.ABORTED and job.result_file == ABORTED_RESULT))
        if not listed and self.tap.faults.error_body_200:
            # fault: a non-result answered 200 with an error document, as some servers do
            self.set_header("Content-Type", VOTABLE_TYPE)
            return self.finish(error_document(f"job {job_id} is {job.phase}: no result file"))
        if not listed:
            return self.send_text(f"job {job_id} is {job.phase}: no result\n", status=404)
        path = self.tap.store.job_dir(job_id) / job.result_file
        if not path.exists():
            return self.send_text(f"the result of job {job_id} was destroyed\n", status=404)
        await self.send_file(path, job.result_type or VOTABLE_TYPE, ranges=True)


class AvailabilityHandler(TapHandler):
    def get(self):
        # VOSI 1.1 §3.3
        self.send_xml(
            '<?xml version="1.0" encoding="UTF-8"?>\n'
            '<vosi:availability xmlns:vosi="http://www.ivoa.net/xml/VOSIAvailability/v1.0">\n'
            "<vosi:available>true</vosi:available>\n"
            f"<vosi:upSince>{uws.iso(self.tap.started)}</vosi:upSince>\n"
            f"<vosi:note>{xml_text(SERVER_SOFTWARE)} is accepting queries</vosi:note>\n"
            "</vosi:availability>\n")


class CapabilitiesHandler(TapHandler):
    def get(self):
        self.send_xml(capabilities_xml(self.base_url(), self.tap.faults))


class TablesHandler(TapHandler):
    async def get(self, name: str | None = None):
        tables = await IOLoop.current().run_in_executor(self.tap._sync_pool, self.tap.engine.tables)
        if name is None:
            self.send_xml(tableset_xml(tables))
            return
        # VOSI 1.1 §3.4: {tables}/{name} answers one vs:Table with its columns, 404 if unknown.
        wanted = name   # tornado has already unquoted the path argument
        for table in tables:
            full = table.name if "." in table.name else f"{table.schema}.{table.name}"
            if full.lower() == wanted.lower():
                self.send_xml(table_xml(table, full))
                return
        self.set_status(404)
        self.set_header("Content-Type", "text/plain; charset=utf-8")
        self.finish(f"no table {wanted!r}; GET {self.base_url()}/tables lists them\n")


def capabilities_xml(base: str, faults: Faults) -> str:
    """VOSI 1.1 capabilities with the TAPRegExt 1.0 description of the TAP capability."""
    settings = faults.snapshot()
    geometry = "".join(f"<feature><form>{name}</form></feature>" for name in
                       ("POINT", "CIRCLE", "BOX", "POLYGON", "CONTAINS", "INTERSECTS", "DISTANCE",
                        "AREA", "CENTROID", "COORD1", "COORD2"))
    # The optional ADQL 2.1 features the translator accepts (ADQL 2.1 §4, each group's
    # languageFeatures type; the type URIs are from memory of that section). IN_UNIT, bitwise
    # operators and user-defined functions are refused, so they are not declared.
    adql21 = "".join(
        f'<languageFeatures type="ivo://ivoa.net/std/TAPRegExt#features-adql-{group}">'
        + "".join(f"<feature><form>{form}</form></feature>" for form in forms)
        + "</languageFeatures>"
        for group, forms in (("geo", ("POINT", "CIRCLE", "BOX", "POLYGON", "CONTAINS",
                                      "INTERSECTS", "DISTANCE", "AREA", "CENTROID", "COORD1",
                                      "COORD2")),
                             ("string", ("LOWER", "UPPER", "ILIKE")),
                             ("sets", ("UNION", "EXCEPT", "INTERSECT")),
                             ("common-table", ("WITH",)),
                             ("type", ("CAST",)),
                             ("conditional", ("COALESCE",)),
                             ("offset", ("OFFSET",))))
    accessory = "".join(
        f'<capability standardID="ivo://ivoa.net/std/VOSI#{name}">'
        f'<interface xsi:type="vs:ParamHTTP"><accessURL use="full">{base}/{name}</accessURL>'
        "</interface></capability>\n" for name in ("capabilities", "availability", "tables"))
    return (
        '<?xml version="1.0" encoding="UTF-8"?>\n'
        '<vosi:capabilities xmlns:vosi="http://www.ivoa.net/xml/VOSICapabilities/v1.0" '
        'xmlns:vr="http://www.ivoa.net/xml/VOResource/v1.0" '
        'xmlns:vs="http://www.ivoa.net/xml/VODataService/v1.1" '
        'xmlns:tr="http://www.ivoa.net/xml/TAPRegExt/v1.0" '
        'xmlns:xsi="http://www.w3.org/2001/XMLSchema-instance">\n'
        '<capability standardID="ivo://ivoa.net/std/TAP" xsi:type="tr:TableAccess">\n'
        f'<interface xsi:type="vs:ParamHTTP" role="std" version="1.1">'
        f'<accessURL use="base">{base}</accessURL></interface>\n'
        "<language><name>ADQL</name>"
        '<version ivo-id="ivo://ivoa.net/std/ADQL#v2.0">2.0</version>'
        '<version ivo-id="ivo://ivoa.net/std/ADQL#v2.1">2.1</version>'
        "<description>ADQL translated to SQLite; see the service documentation for what is "
        "not supported</description>"
        f'<languageFeatures type="ivo://ivoa.net/std/TAPRegExt#features-adqlgeo">{geometry}'
        f"</languageFeatures>{adql21}</language>\n"
        '<outputFormat ivo-id="ivo://ivoa.net/std/TAPRegExt#output-votable-td">'
        "<mime>application/x-votable+xml</mime><alias>votable</alias></outputFormat>\n"
        '<outputFormat ivo-id="ivo://ivoa.net/std/TAPRegExt#output-votable-binary2">'
        "<mime>application/x-votable+xml;serialization=BINARY2</mime><alias>votable/b2</alias>"
        "</outputFormat>\n"
        "<outputFormat><mime>application/vnd.apache.parquet</mime><alias>parquet</alias>"
        "</outputFormat>\n"
        "<outputFormat><mime>text/csv;header=present</mime><alias>csv</alias></outputFormat>\n"
        '<uploadMethod ivo-id="ivo://ivoa.net/std/TAPRegExt#upload-inline"/>\n'
        f"<retentionPeriod><default>{int(settings.destruction)}</default></retentionPeriod>\n"
        f"<executionDuration><default>{settings.execution_duration}</default></executionDuration>\n"
        f'<outputLimit><default unit="row">{settings.max_rec}</default>'
        f'<hard unit="row">{settings.max_rec}</hard></outputLimit>\n'
        "</capability>\n" + accessory + "</vosi:capabilities>\n")


def tableset_xml(tables) -> str:
    """VOSI 1.1 tableset (VODataService 1.1 types) from the engine's table descriptions."""
    by_schema: dict[str, list] = {}
    for table in tables:
        by_schema.setdefault(table.schema, []).append(table)
    out = ['<?xml version="1.0" encoding="UTF-8"?>\n'
           '<vosi:tableset xmlns:vosi="http://www.ivoa.net/xml/VOSITables/v1.0" '
           'xmlns:vs="http://www.ivoa.net/xml/VODataService/v1.1" '
           'xmlns:xsi="http://www.w3.org/2001/XMLSchema-instance">']
    for schema, members in by_schema.items():
        out.append(f"<schema><name>{xml_text(schema)}</name>")
        for table in members:
            name = table.name if "." in table.name else f"{schema}.{table.name}"
            out.append(f'<table type="output">{_table_body(table, name)}</table>')
        out.append("</schema>")
    out.append("</vosi:tableset>\n")
    return "\n".join(out)


def table_xml(table, name: str) -> str:
    """VOSI 1.1 §3.4 single-table document: a vosi:table root of type vs:Table."""
    return ('<?xml version="1.0" encoding="UTF-8"?>\n'
            '<vosi:table xmlns:vosi="http://www.ivoa.net/xml/VOSITables/v1.0" '
            'xmlns:vs="http://www.ivoa.net/xml/VODataService/v1.1" '
            'xmlns:xsi="http://www.w3.org/2001/XMLSchema-instance" type="output">'
            + _table_body(table, name) + "</vosi:table>\n")


def _table_body(table, name: str) -> str:
    out = [f"<name>{xml_text(name)}</name>"]
    if table.description:
        out.append(f"<description>{xml_text(table.description)}</description>")
    for column in table.columns:
        out.append(f"<column><name>{xml_text(column.name)}</name>")
        if column.description:
            out.append(f"<description>{xml_text(column.description)}</description>")
        if column.unit:
            out.append(f"<unit>{xml_text(column.unit)}</unit>")
        if column.ucd:
            out.append(f"<ucd>{xml_text(column.ucd)}</ucd>")
        size = column.arraysize or ("*" if column.datatype in ("char", "unicodeChar") else None)
        size_attr = f" arraysize={xml_attr(size)}" if size else ""
        xtype_attr = f" extendedType={xml_attr(column.xtype)}" if column.xtype else ""
        out.append(f'<dataType xsi:type="vs:VOTableType"{size_attr}{xtype_attr}>'
                   f"{xml_text(column.datatype)}</dataType></column>")
    return "\n".join(out)


# --- out-of-band endpoints for tests ---------------------------------------------------------


class StatsHandler(tornado.web.RequestHandler):
    def initialize(self, tap: LocalTapService):
        self.tap = tap

    def get(self):
        self.set_header("Content-Type", "application/json")
        self.finish(json.dumps(self.tap.stats()))


class FaultsHandler(StatsHandler):
    def get(self):
        self.set_header("Content-Type", "application/json")
        self.finish(json.dumps(self.tap.faults.update()))

    def post(self):
        try:
            values = json.loads(self.request.body or b"{}")
            settings = self.tap.faults.update(**values)
        except (ValueError, TypeError) as exc:
            self.set_status(400)
            self.finish(json.dumps({"error": str(exc)}))
            return
        self.set_header("Content-Type", "application/json")
        self.finish(json.dumps(settings))


def make_app(tap: LocalTapService) -> tornado.web.Application:
    job = r"/tap/async/([^/]+)"
    kw = {"tap": tap}
    return tornado.web.Application([
        (r"/tap/?", RootHandler, kw),
        (r"/tap/sync", SyncHandler, kw),
        (r"/tap/async/?", JobListHandler, kw),
        (job + r"/results/result", ResultHandler, kw),
        (job + r"/([A-Za-z]+)", JobHandler, kw),
        (job, JobHandler, kw),
        (r"/tap/availability", AvailabilityHandler, kw),
        (r"/tap/capabilities", CapabilitiesHandler, kw),
        (r"/tap/tables", TablesHandler, kw),
        (r"/tap/tables/([^/]+)", TablesHandler, kw),
        (r"/_localtap/stats", StatsHandler, kw),
        (r"/_localtap/faults", FaultsHandler, kw),
    ], compress_response=False, serve_traceback=False)

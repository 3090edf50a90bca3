"""The REST API under ``/jobdesk/api/``: parse the request, call ``Desk``, serialise the answer.

No logic lives here beyond that: listing, aborting, forgetting, previews and snippets are the
same ``Desk`` calls a kernel makes. Every route is behind Jupyter's own authentication and XSRF
rules (``APIHandler`` + ``tornado.web.authenticated``). Job ids are checked against a strict
pattern before they reach the library, so no request text is ever used as a path.

Desk calls may touch SQLite or the network (abort), so they run on a small thread pool and never
block the server's event loop.

Routes::

    GET    jobs?phase=A,B&service=URL&text=T&notebook=P&analysis=A&sort=S&limit=N&offset=M
                                     {"jobs": [...], "total": n, ...}; S: created (newest
                                     first), finished, rows, size (largest first)
    GET    groups?by=notebook|analysis&phase=..   jobs, cached jobs, bytes, rows per group
    GET    jobs/<id>                 {"job": {...}, "history": [...], "provenance": {...}|null}
    DELETE jobs/<id>                 forget the record               {"forgotten": id}
    PATCH  jobs/<id>                 {"label": "..."}: Desk.set_label {"job": {...}}
    POST   jobs/<id>/abort           abort on the service            {"job": {...}}
    POST   jobs/<id>/resend          Desk.resend: same query, new job {"job": {...}}
    POST   jobs/<id>/pin             {"pinned": bool}: Desk.pin      {"job": {...}, "pinned": b}
    POST   jobs/<id>/export          {"path": "rel/file.fits"}: Job.export, under the server's
                                     root directory             {"written": [...]}
    GET    jobs/<id>/preview?rows=N  columns, first rows, totals     (from the cache, no kernel)
    GET    jobs/<id>/snippet         {"snippet": "python source"}
    GET    jobs/<id>/code            {"code": "python that sends the query again"}
    GET    analyses                  {"analyses": Desk.analyses()}
    GET    analyses/steps?name=NAME  {"name", "jobs": [records in step order], "plans": [...]}
    GET    plans/<id>                a re-run plan: steps, states, failures
    POST   plans/<id>/start          submit the steps that can run now   {"plan": {...}}
    GET    compare/<old>/<new>?key=K Desk.compare(...).as_dict()
    GET    compare/<old>/<new>/report?key=K   the self-contained HTML report (text/html)
    GET    jobs/<id>/quicklook       {"sky": {"ra", "dec"}|null, "numeric": [{"name", "unit"}]}
    GET    jobs/<id>/quicklook/sky   image/svg+xml: source density (cached by result checksum)
    GET    jobs/<id>/quicklook/histogram?column=NAME   image/svg+xml: histogram of one column
    GET    cache                     Desk.cache_summary()
    GET    changes?since=<token>     {"token": t, "changed": bool}; waits while nothing changed
"""

from __future__ import annotations

import asyncio
import json
import re
import threading
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from typing import Any

import tornado.web
from jupyter_server.base.handlers import APIHandler

from jobdesk import phases
from jobdesk.errors import (
    BadServiceURL, JobdeskError, JobNotFound, ResultUnavailable, ServiceError,
)
from jobdesk.index import GROUPINGS, SORTS
from jobdesk.keys import service_id

JOB_ID = re.compile(r"^[0-9a-f]{6,64}$")
KNOWN_PHASES = frozenset(phases.UWS_PHASES) | {phases.UNSENT, phases.SUBMITTED, phases.LOST,
                                               phases.UNREACHED}
MAX_PAGE = 500
MAX_PREVIEW_ROWS = 200


class DeskRunner:
    """One ``Desk`` for the server process and the threads its calls run on."""

    def __init__(self, root: str | None = None, *, settings=None, log=None, threads: int = 4):
        self.settings = settings   # jobdesk.settings.Settings built once for the server, or None
        self.root = str(settings.root) if settings is not None else root
        self.log = log
        self._desk = None
        self._lock = threading.Lock()
        self._pool = ThreadPoolExecutor(max_workers=threads, thread_name_prefix="jobdesk-api")

    @property
    def root_label(self) -> str:
        return self.root or "default (JOBDESK_HOME or the user cache directory)"

    def desk(self):
        with self._lock:
            if self._desk is None:
                from jobdesk.desk import Desk  # imported late: the server starts even if it fails

                self._desk = (Desk(settings=self.settings) if self.settings is not None
                              else Desk(self.root))
            return self._desk

    async def run(self, fn: Callable[..., Any], *args, **kwargs) -> Any:
        """Run ``fn(desk, *args, **kwargs)`` on the pool; the event loop stays free."""
        loop = asyncio.get_running_loop()
        return await loop.run_in_executor(self._pool, lambda: fn(self.desk(), *args, **kwargs))

    def close(self) -> None:
        self._pool.shutdown(wait=False, cancel_futures=True)


def change_token(desk) -> str:
    """The index's cheap "something changed" value (row count and newest update time)."""
    return desk.change_token()


class ChangeFeed:
    """Long-poll support: one look at the change token per interval, however many listeners.

    A listener whose token is stale is answered at once; the others wait until the token
    changes or ``timeout`` passes. Only while someone waits does the feed read the index.
    """

    def __init__(self, runner: DeskRunner, *, timeout: float = 25.0, interval: float = 1.0):
        self.runner = runner
        self.timeout = timeout
        self.interval = interval
        self._token: str | None = None
        self._waiters: dict[asyncio.Future, str] = {}  # listener -> the token it already has
        self._watcher: asyncio.Task | None = None

    async def token(self) -> str:
        self._token = await self.runner.run(change_token)
        return self._token

    async def wait(self, since: str | None) -> str:
        current = await self.token()
        if since != current:
            return current
        waiter = asyncio.get_running_loop().create_future()
        self._waiters[waiter] = current
        if self._watcher is None or self._watcher.done():
            self._watcher = asyncio.ensure_future(self._watch())
        try:
            return await asyncio.wait_for(asyncio.shield(waiter), self.timeout)
        except asyncio.TimeoutError:
            return self._token or current
        finally:
            self._waiters.pop(waiter, None)

    async def _watch(self) -> None:
        while self._waiters:
            await asyncio.sleep(self.interval)
            try:
                token = await self.token()
            except Exception:  # a broken index answers the waiters with the old token
                token = self._token
            for waiter, since in list(self._waiters.items()):
                if token is not None and token != since and not waiter.done():
                    waiter.set_result(token)


class DeskHandler(APIHandler):
    """Shared plumbing: reach the Desk, validate ids, turn our errors into JSON answers."""

    @property
    def runner(self) -> DeskRunner:
        return self.settings["jobdesk_runner"]

    def job_id(self, raw: str) -> str:
        if not JOB_ID.match(raw or ""):
            raise tornado.web.HTTPError(400, reason="not a job id")
        return raw

    def reply(self, payload: Any, status: int = 200) -> None:
        self.set_status(status)
        self.set_header("Content-Type", "application/json")
        self.set_header("Cache-Control", "no-store")
        self.finish(json.dumps(payload, default=str, allow_nan=False))

    async def call(self, fn: Callable[..., Any], *args, **kwargs) -> Any:
        """Run a Desk call; map unknown ids and jobdesk errors to HTTP answers.

        Only our typed not-found errors (``JobNotFound``, ``AnalysisNotFound``,
        ``PlanNotFound``: a ``JobdeskError`` that is also a ``KeyError``) are 404s; a bare
        ``KeyError`` is a bug, answered 500 and logged with its traceback by the server like
        every other unexpected exception."""
        try:
            return await self.runner.run(fn, *args, **kwargs)
        except JobNotFound as exc:
            raise _Answer(404, {"message": exc.message, "hint": exc.hint,
                                "error": "JobNotFound"}) from None
        except JobdeskError as exc:
            if isinstance(exc, KeyError):
                raise _Answer(404, {"message": exc.message, "hint": exc.hint,
                                    "error": type(exc).__name__}) from None
            status = (409 if isinstance(exc, ResultUnavailable)
                      else 502 if isinstance(exc, ServiceError) else 409)
            raise _Answer(status, {"message": exc.message, "hint": exc.hint,
                                   "detail": exc.detail, "error": type(exc).__name__})

    def write_error(self, status_code: int, **kwargs) -> None:
        exc = kwargs.get("exc_info", (None, None, None))[1]
        if isinstance(exc, _Answer):
            self.set_status(exc.status)
            self.finish(json.dumps(exc.payload, default=str))
            return
        super().write_error(status_code, **kwargs)


class _Answer(tornado.web.HTTPError):
    """An error answer whose JSON body is already decided."""

    def __init__(self, status: int, payload: dict):
        super().__init__(status, reason=None)
        self.payload = payload
        self.status = status


def _filters(handler: DeskHandler) -> dict:
    raw = ",".join(handler.get_arguments("phase"))
    wanted = [p.strip().upper() for p in raw.split(",") if p.strip()]
    unknown = [p for p in wanted if p not in KNOWN_PHASES]
    if unknown:
        raise tornado.web.HTTPError(400, reason=f"unknown phase {unknown[0][:20]}")
    service = handler.get_argument("service", None) or None
    if service is not None:
        try:
            service_id(service)
        except BadServiceURL:  # the client's bad filter, not a failing service (502)
            raise tornado.web.HTTPError(400, reason="service must be an http(s) URL") from None
    out = {"phase": wanted or None,
           "service": service,
           "text": (handler.get_argument("text", None) or "").strip() or None}
    for name in GROUPINGS:  # "" asks for the jobs with no notebook (or analysis)
        value = handler.get_argument(name, None)
        if value is not None:
            out[name] = value
    return out


def _sort(handler: DeskHandler) -> str:
    sort = handler.get_argument("sort", "created")
    sort = {"size": "result_bytes", "time": "created", "bytes": "result_bytes"}.get(sort, sort)
    if sort not in SORTS:
        raise tornado.web.HTTPError(400, reason="sort is one of created, finished, rows, size")
    return sort


def _int_arg(handler: DeskHandler, name: str, default: int, low: int, high: int) -> int:
    raw = handler.get_argument(name, None)
    if raw is None or raw == "":
        return default
    try:
        value = int(raw)
    except ValueError:
        raise tornado.web.HTTPError(400, reason=f"{name} must be an integer") from None
    return max(low, min(high, value))


def _list_page(desk, filters: dict, limit: int, offset: int, sort: str = "created") -> dict:
    """One page: its records in one query, the total in one count (and the change token)."""
    jobs = desk.records(**filters, limit=limit, offset=offset, sort=sort)
    return {"jobs": jobs, "total": desk.count(**filters), "limit": limit, "offset": offset,
            "sort": sort, "token": change_token(desk)}


def _groups(desk, by: str, filters: dict) -> dict:
    where = {k: v for k, v in filters.items() if k not in ("notebook", "analysis")}
    return {"by": by, "available": True, "groups": desk.job_groups(by, **where)}


def _details(desk, job_id: str) -> dict:
    job = desk.job(job_id)  # JobNotFound (404) when unknown
    history = job.history()
    try:
        provenance, why = job.provenance(), None
    except JobdeskError as exc:  # no result yet, or it failed: the record still shows
        provenance, why = None, exc.message
    from jobdesk.desk import service_duration, unreachable_note
    failed = job.failure()
    return {"job": job.record, "history": history, "provenance": provenance,
            "provenance_missing": why,
            # What went wrong in our words and what to do next; the service's own message is
            # the record's ``error``.
            "problem": None if failed is None else {
                "error": type(failed).__name__, "message": failed.message, "hint": failed.hint,
                "detail": failed.detail or job.record.get("error_detail")},
            "unreachable": unreachable_note(job.record) or None,
            "service_seconds": service_duration(job.record)}


def _abort(desk, job_id: str) -> dict:
    desk.abort(job_id)
    return {"job": desk.job(job_id).record}


def _forget(desk, job_id: str) -> dict:
    desk.forget(job_id)  # JobNotFound (404) when unknown
    return {"forgotten": job_id}


def _resend(desk, job_id: str) -> dict:
    return {"job": desk.resend(job_id).record, "from": job_id}


def _pin(desk, job_id: str, pinned: bool) -> dict:
    desk.pin(job_id, pinned=pinned)
    return {"job": desk.job(job_id).record, "pinned": pinned}


def _label(desk, job_id: str, label: str | None) -> dict:
    return {"job": desk.set_label(job_id, label).record}


def _export(desk, job_id: str, path) -> dict:
    return {"written": [str(p) for p in desk.job(job_id).export(path, allow_truncated=True)]}


def _body(handler: DeskHandler) -> dict:
    try:
        body = json.loads(handler.request.body or b"{}")
    except ValueError:
        raise tornado.web.HTTPError(400, reason="the body must be JSON") from None
    if not isinstance(body, dict):
        raise tornado.web.HTTPError(400, reason="the body must be a JSON object")
    return body


class JobsHandler(DeskHandler):
    @tornado.web.authenticated
    async def get(self) -> None:
        filters = _filters(self)
        limit = _int_arg(self, "limit", 100, 1, MAX_PAGE)
        offset = _int_arg(self, "offset", 0, 0, 10**9)
        self.reply(await self.call(_list_page, filters, limit, offset, _sort(self)))


class GroupsHandler(DeskHandler):
    @tornado.web.authenticated
    async def get(self) -> None:
        by = self.get_argument("by", "notebook")
        if by not in GROUPINGS:
            raise tornado.web.HTTPError(400, reason="by is notebook or analysis")
        self.reply(await self.call(_groups, by, _filters(self)))


class JobHandler(DeskHandler):
    @tornado.web.authenticated
    async def get(self, raw_id: str) -> None:
        self.reply(await self.call(_details, self.job_id(raw_id)))

    @tornado.web.authenticated
    async def delete(self, raw_id: str) -> None:
        self.reply(await self.call(_forget, self.job_id(raw_id)))

    @tornado.web.authenticated
    async def patch(self, raw_id: str) -> None:
        label = _body(self).get("label")
        if label is not None and (not isinstance(label, str) or len(label) > 500):
            raise tornado.web.HTTPError(400, reason="label must be a string (500 chars at most)")
        self.reply(await self.call(_label, self.job_id(raw_id), (label or "").strip() or None))


class ResendHandler(DeskHandler):
    @tornado.web.authenticated
    async def post(self, raw_id: str) -> None:
        self.reply(await self.call(_resend, self.job_id(raw_id)))


class PinHandler(DeskHandler):
    @tornado.web.authenticated
    async def post(self, raw_id: str) -> None:
        pinned = _body(self).get("pinned", True)
        if not isinstance(pinned, bool):
            raise tornado.web.HTTPError(400, reason="pinned must be true or false")
        self.reply(await self.call(_pin, self.job_id(raw_id), pinned))


class ExportHandler(DeskHandler):
    @tornado.web.authenticated
    async def post(self, raw_id: str) -> None:
        import pathlib

        raw = _body(self).get("path")
        rel = pathlib.PurePosixPath(raw) if isinstance(raw, str) and raw.strip() else None
        if rel is None or rel.is_absolute() or ".." in rel.parts:
            raise tornado.web.HTTPError(400, reason="path must be relative, inside the server's "
                                                    "root directory")
        root = pathlib.Path(self.settings.get("server_root_dir") or ".").expanduser()
        self.reply(await self.call(_export, self.job_id(raw_id), root / rel))


class AbortHandler(DeskHandler):
    @tornado.web.authenticated
    async def post(self, raw_id: str) -> None:
        self.reply(await self.call(_abort, self.job_id(raw_id)))


class PreviewHandler(DeskHandler):
    @tornado.web.authenticated
    async def get(self, raw_id: str) -> None:
        job_id = self.job_id(raw_id)
        rows = _int_arg(self, "rows", 20, 0, MAX_PREVIEW_ROWS)
        self.reply(await self.call(lambda desk: desk.job(job_id).preview(rows=rows)))


class SnippetHandler(DeskHandler):
    @tornado.web.authenticated
    async def get(self, raw_id: str) -> None:
        job_id = self.job_id(raw_id)
        self.reply({"snippet": await self.call(lambda desk: desk.job(job_id).snippet())})


def _analysis_steps(desk, name: str) -> dict:
    return {"name": name, "jobs": [j.record for j in desk.analysis_jobs(name)],
            "plans": next((a["plans"] for a in desk.analyses() if a["name"] == name), [])}


def _compare(desk, old: str, new: str, key: str | None) -> dict:
    summary = desk.compare(old, new, key=key).as_dict()
    return summary


def _compare_report(desk, old: str, new: str, key: str | None) -> str:
    path = desk.root / "reports" / f"{old}-{new}{'-' + key if key else ''}.html"
    desk.compare(old, new, key=key).report(path)
    return path.read_text(encoding="utf-8")


class AnalysesHandler(DeskHandler):
    @tornado.web.authenticated
    async def get(self) -> None:
        self.reply({"analyses": await self.call(lambda desk: desk.analyses())})


class AnalysisStepsHandler(DeskHandler):
    @tornado.web.authenticated
    async def get(self) -> None:
        name = self.get_argument("name", "")
        if not name or len(name) > 200:
            raise tornado.web.HTTPError(400, reason="name the analysis: ?name=NAME")
        self.reply(await self.call(_analysis_steps, name))


class PlanHandler(DeskHandler):
    @tornado.web.authenticated
    async def get(self, raw_id: str) -> None:
        plan_id = self.job_id(raw_id)
        self.reply(await self.call(lambda desk: desk.plan(plan_id).as_dict()))


class PlanStartHandler(DeskHandler):
    @tornado.web.authenticated
    async def post(self, raw_id: str) -> None:
        plan_id = self.job_id(raw_id)
        self.reply({"plan": await self.call(lambda desk: desk.plan(plan_id).start().as_dict())})


class CompareHandler(DeskHandler):
    @tornado.web.authenticated
    async def get(self, raw_old: str, raw_new: str, report: str | None = None) -> None:
        old, new = self.job_id(raw_old), self.job_id(raw_new)
        key = self.get_argument("key", None) or None
        if report:
            page = await self.call(_compare_report, old, new, key)
            self.set_header("Content-Type", "text/html; charset=utf-8")
            self.set_header("Cache-Control", "no-store")
            self.set_header("Content-Security-Policy",
                            "default-src 'none'; style-src 'unsafe-inline'")
            # APIHandler.finish would label the page application/json
            tornado.web.RequestHandler.finish(self, page)
            return
        self.reply(await self.call(_compare, old, new, key))


def _quicklook(desk, job_id: str, kind: str, column: str = "") -> str | dict:
    from jobdesk import quicklook

    path, sha = quicklook.for_job(desk.job(job_id))
    looks = quicklook.QuickLooks(desk.root)
    if kind == "describe":
        return looks.describe(path)
    if kind == "sky":
        return looks.sky(path, sha)
    return looks.histogram(path, sha, column)


class QuickLookHandler(DeskHandler):
    @tornado.web.authenticated
    async def get(self, raw_id: str, kind: str | None = None) -> None:
        job_id = self.job_id(raw_id)
        if kind is None:
            self.reply(await self.call(_quicklook, job_id, "describe"))
            return
        column = ""
        if kind == "histogram":
            column = self.get_argument("column", "")
            if not column:
                raise tornado.web.HTTPError(400, reason="column is required")
        svg = await self.call(_quicklook, job_id, kind, column)
        self.set_header("Content-Type", "image/svg+xml; charset=utf-8")
        self.set_header("Cache-Control", "private, no-cache")
        super(APIHandler, self).finish(svg)  # APIHandler.finish would say application/json


class CodeHandler(DeskHandler):
    @tornado.web.authenticated
    async def get(self, raw_id: str) -> None:
        job_id = self.job_id(raw_id)
        self.reply({"code": await self.call(lambda desk: desk.job(job_id).query_code())})


class CacheHandler(DeskHandler):
    @tornado.web.authenticated
    async def get(self) -> None:
        self.reply(await self.call(lambda desk: desk.cache_summary()))


class ChangesHandler(DeskHandler):
    @tornado.web.authenticated
    async def get(self) -> None:
        since = self.get_argument("since", None)
        feed: ChangeFeed = self.settings["jobdesk_feed"]
        try:
            token = await feed.wait(since)
        except JobdeskError as exc:
            raise _Answer(409, {"message": exc.message, "hint": exc.hint}) from exc
        if self.request.connection.stream.closed():
            return
        self.reply({"token": token, "changed": token != since})


def routes() -> list[tuple[str, type[DeskHandler]]]:
    """Paths (relative to ``<base_url>/jobdesk/api``) and their handlers."""
    one = r"jobs/([^/]+)"
    return [
        (r"jobs", JobsHandler),
        (one, JobHandler),
        (one + r"/abort", AbortHandler),
        (one + r"/resend", ResendHandler),
        (one + r"/pin", PinHandler),
        (one + r"/export", ExportHandler),
        (one + r"/preview", PreviewHandler),
        (one + r"/snippet", SnippetHandler),
        (one + r"/code", CodeHandler),
        (r"analyses", AnalysesHandler),
        (r"analyses/steps", AnalysisStepsHandler),
        (r"plans/([^/]+)", PlanHandler),
        (r"plans/([^/]+)/start", PlanStartHandler),
        (r"compare/([^/]+)/([^/]+?)(/report)?", CompareHandler),
        (one + r"/quicklook", QuickLookHandler),
        (one + r"/quicklook/(sky|histogram)", QuickLookHandler),
        (r"groups", GroupsHandler),
        (r"cache", CacheHandler),
        (r"changes", ChangesHandler),
    ]

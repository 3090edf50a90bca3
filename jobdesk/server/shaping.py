"""REST routes for shaping a query (the sidebar's service browser): parse, call ``Desk``, answer.

Routes (relative to ``<base_url>/jobdesk/api``)::

    GET  services                                  {"services": [{service, read_at, source,
                                                     tables, columns, jobs}]}
    GET  services/tables?service=URL&limit&offset&refresh=1   {"service", "tables": [...]}
    GET  services/columns?service=URL&table=T      {"service", "table", "columns": [...]}
    GET  services/find?service=URL&text=T&limit=N  {"service", "hits": [...]}
    POST check     {"service", "adql"}             {"findings": [...], "errors": n}
    POST estimate  {"service", "adql", "maxrec"?, "format"?, "time_limit"?}   Estimate.to_dict()
    GET  jobs/<id>/estimate                        the estimate of that job's query, now

Reading metadata or estimating may contact the service; those calls run on the runner's pool.
"""

from __future__ import annotations

import json
import warnings

import tornado.web

from jobdesk.errors import BadServiceURL, JobdeskError, ServiceError, UnknownTable
from jobdesk.keys import service_id
from jobdesk.server.handlers import JOB_ID, DeskHandler, _Answer, _int_arg

MAX_ADQL = 200_000   # characters accepted in a check or estimate request


class ShapingHandler(DeskHandler):
    def service(self, value: str | None) -> str:
        if not value:
            raise tornado.web.HTTPError(400, reason="give service=<TAP base URL>")
        try:
            return service_id(value)
        except BadServiceURL:
            raise tornado.web.HTTPError(400, reason="service must be an http(s) URL") from None

    def body(self) -> dict:
        try:
            data = json.loads(self.request.body or b"{}")
        except ValueError:
            raise tornado.web.HTTPError(400, reason="the body must be JSON") from None
        if not isinstance(data, dict) or not isinstance(data.get("adql"), str):
            raise tornado.web.HTTPError(400, reason='give {"service": URL, "adql": text}')
        if len(data["adql"]) > MAX_ADQL:
            raise tornado.web.HTTPError(413, reason="the query is too long")
        return data

    async def shaping_call(self, fn, *args, **kwargs):
        """Like ``call``, but an unknown table is a 404 naming the closest tables, and the
        warnings a Desk call raises (cached metadata used, rows skipped) go into the answer."""
        def quiet(desk, *a, **kw):
            with warnings.catch_warnings(record=True) as seen:
                warnings.simplefilter("always")
                result = fn(desk, *a, **kw)
            return result, [str(w.message) for w in seen]
        try:
            result, said = await self.runner.run(quiet, *args, **kwargs)
        except UnknownTable as exc:
            raise _Answer(404, {"message": exc.message, "suggestions": exc.suggestions,
                                "error": "UnknownTable"}) from None
        except JobdeskError as exc:
            raise _Answer(502 if isinstance(exc, ServiceError) else 409,
                          {"message": exc.message, "hint": exc.hint,
                           "error": type(exc).__name__}) from None
        except ValueError as exc:
            raise _Answer(400, {"message": str(exc)}) from None
        if isinstance(result, dict):
            result["warnings"] = said
        return result


class ServicesHandler(ShapingHandler):
    @tornado.web.authenticated
    async def get(self) -> None:
        self.reply(await self.shaping_call(lambda desk: {"services": desk.known_services()}))


class TablesHandler(ShapingHandler):
    @tornado.web.authenticated
    async def get(self) -> None:
        sid = self.service(self.get_argument("service", None))
        limit = _int_arg(self, "limit", 200, 1, 10_000)
        offset = _int_arg(self, "offset", 0, 0, 10**9)
        refresh = self.get_argument("refresh", "") in ("1", "true")
        self.reply(await self.shaping_call(lambda desk: {
            "service": sid, "tables": desk.tables(sid, refresh=refresh, limit=limit,
                                                  offset=offset),
            "info": (desk.index.metadata_info(sid) or [None])[0]}))


class ColumnsHandler(ShapingHandler):
    @tornado.web.authenticated
    async def get(self) -> None:
        sid = self.service(self.get_argument("service", None))
        table = self.get_argument("table", "")
        if not table or len(table) > 1000:
            raise tornado.web.HTTPError(400, reason="give table=<name>")
        self.reply(await self.shaping_call(lambda desk: {
            "service": sid, "table": table, "columns": desk.columns(sid, table)}))


class FindHandler(ShapingHandler):
    @tornado.web.authenticated
    async def get(self) -> None:
        sid = self.service(self.get_argument("service", None))
        text = self.get_argument("text", "")[:500]
        limit = _int_arg(self, "limit", 50, 1, 500)
        self.reply(await self.shaping_call(lambda desk: {
            "service": sid, "text": text, "hits": desk.find(sid, text, limit=limit)}))


class CheckHandler(ShapingHandler):
    @tornado.web.authenticated
    async def post(self) -> None:
        data = self.body()
        sid = self.service(data.get("service"))

        def run(desk):
            found = desk.check(sid, data["adql"])
            return {"findings": [dict(f.to_dict(), text=str(f)) for f in found],
                    "errors": sum(f.severity == "error" for f in found)}
        self.reply(await self.shaping_call(run))


def _number(value, name: str, kind=int):
    if value is None:
        return None
    try:
        return kind(value)
    except (TypeError, ValueError):
        raise tornado.web.HTTPError(400, reason=f"{name} must be a number") from None


class EstimateHandler(ShapingHandler):
    @tornado.web.authenticated
    async def post(self) -> None:
        data = self.body()
        sid = self.service(data.get("service"))
        maxrec = _number(data.get("maxrec"), "maxrec")
        limit = _number(data.get("time_limit"), "time_limit", float) or 10.0
        fmt = str(data.get("format") or "votable")[:100]
        self.reply(await self.shaping_call(lambda desk: desk.estimate(
            sid, data["adql"], maxrec=maxrec, fmt=fmt, time_limit=min(limit, 60.0)).to_dict()))


class JobEstimateHandler(ShapingHandler):
    @tornado.web.authenticated
    async def get(self, raw_id: str) -> None:
        if not JOB_ID.match(raw_id or ""):
            raise tornado.web.HTTPError(400, reason="not a job id")

        def run(desk):
            try:
                record = desk.job(raw_id).record
            except KeyError:
                raise _Answer(404, {"message": f"no such job: {raw_id}"}) from None
            return desk.estimate(record["service"], record["adql"], maxrec=record.get("maxrec"),
                                 fmt=record.get("fmt") or "votable").to_dict()
        self.reply(await self.shaping_call(run))


def routes() -> list[tuple[str, type[DeskHandler]]]:
    return [
        (r"services", ServicesHandler),
        (r"services/tables", TablesHandler),
        (r"services/columns", ColumnsHandler),
        (r"services/find", FindHandler),
        (r"check", CheckHandler),
        (r"estimate", EstimateHandler),
        (r"jobs/([^/]+)/estimate", JobEstimateHandler),
    ]

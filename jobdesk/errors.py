"""Every error jobdesk raises, grouped by what failed.

Each error says in our words what happened (the service's own message where it has one worth
reading), a ``hint`` that says what to do next, and in ``detail`` the raw text of the library or
page underneath, never as the message. :func:`from_transport` is the single place where
exceptions of the libraries underneath (requests, sqlite3, OSError) become ours.
docs/errors.md lists every class, when it happens and its hint; a test keeps the two in step.
"""

from __future__ import annotations

import errno
import sqlite3

import requests


class JobdeskError(Exception):
    """Base of every error jobdesk raises; ``hint`` says what to do next."""

    hint: str = ""

    def __init__(self, message: str, *, hint: str | None = None, service: str | None = None,
                 detail: str | None = None):
        self.message = message
        if hint is not None:
            self.hint = hint
        self.service = service
        self.detail = detail  # the raw text underneath (library, web page), for a bug report
        super().__init__(message)

    def __str__(self) -> str:
        text = self.message
        if self.service and self.service not in text:
            text = f"{text} [service: {self.service}]"
        if self.hint:
            text = f"{text}\n  what to do: {self.hint}"
        return text


# --- the service -------------------------------------------------------------------------------


class ServiceError(JobdeskError):
    """Talking to a TAP service failed."""


class ServiceUnreachable(ServiceError):
    """No answer: connection refused or reset, DNS failure, or timeouts, after every retry."""

    hint = ("check the service URL and your network; the job record is kept and wait() tries "
            "again, saying when")


class ServiceRefused(ServiceError):
    """The service answered with an HTTP error status (after retries for 5xx and 429).

    The hint follows the status (``STATUS_HINTS``): HTTP itself says what each class means
    (RFC 9110 §15.5.5 404, §15.5.2 401, §15.5.4 403, §15.6 5xx).
    """

    hint = "read the service's message above and fix the request it points at"

    def __init__(self, message: str, *, status: int | None = None, **kw):
        if kw.get("hint") is None and status is not None:
            kw["hint"] = status_hint(status)
        super().__init__(message, **kw)
        self.status = status


# What an HTTP status most likely means for a TAP client, and what to do next.
STATUS_HINTS: dict[str, str] = {
    "404": ("wrong path or job gone: check that the URL is the TAP service's base URL (the one "
            "ending before /async, /sync, /tables); a job the service deleted cannot come back"),
    "401": "credentials: the service wants you to log in; pass a session that carries them",
    "403": ("credentials: the service knows who you are but refuses this; check your account's "
            "rights or the token's scope"),
    "429": "the service asks for fewer requests: wait a while, then call wait() again",
    "5xx": ("service trouble: the service failed on its side; the record is kept, try again "
            "later and tell the service's operators if it lasts"),
}


def status_hint(status: int) -> str:
    if 500 <= status <= 599:
        return STATUS_HINTS["5xx"]
    return STATUS_HINTS.get(str(status), ServiceRefused.hint)


class ServiceResponseInvalid(ServiceError):
    """The service answered with something that is not the document the protocol requires."""

    hint = "the service may be misconfigured or behind a proxy that rewrites answers; check the URL"


class SyncTimeout(ServiceUnreachable):
    """A short synchronous query (an estimate, a metadata query) ran out of its time limit."""

    hint = "raise the time limit, or narrow the query; the long run goes as an async job anyway"


class MetadataUnavailable(ServiceError):
    """No table metadata: the service cannot be read now and nothing is cached."""

    hint = "check the service URL and your network, then call desk.tables(service) again"


class UnknownTable(JobdeskError, KeyError):
    """The service lists no such table (``suggestions`` holds the closest names)."""

    hint = "list the service's tables with desk.tables(service) or `jobdesk tables SERVICE`"

    def __init__(self, message: str, *, suggestions: list[str] | None = None, **kw):
        super().__init__(message, **kw)
        self.suggestions = suggestions or []

    def __str__(self) -> str:
        return JobdeskError.__str__(self)


class NotATapService(ServiceResponseInvalid):
    """A web page came back where a TAP or UWS document was expected."""

    hint = ("this URL is not a TAP service, or a login page is in the way: open it in a browser, "
            "and give the TAP base URL (or log in and pass a session with the credentials)")


class BadServiceURL(ServiceError):
    """The service address cannot be used (not http/https, no host)."""

    hint = "give the TAP service's base URL, e.g. http://127.0.0.1:8787/tap"


# --- the query and the job ---------------------------------------------------------------------


class QueryRejected(JobdeskError):
    """The ADQL was refused, by the local check (``findings`` lists why, with positions) or by
    the service (its own message; a finding too when the message names a spot)."""

    hint = "fix the query where the message points, then submit again"

    def __init__(self, message: str, *, findings: list | None = None, **kw):
        super().__init__(message, **kw)
        self.findings = list(findings or [])


class QueryEmpty(QueryRejected):
    """The query is empty or only whitespace (or comments): refused here, nothing is sent."""

    hint = "write the ADQL to run, e.g. SELECT TOP 10 * FROM some_schema.some_table"


class UploadInvalid(JobdeskError):
    """A table given in ``uploads=`` cannot be sent (bad name or not a table)."""

    hint = "give uploads as {name: astropy Table, pandas DataFrame or VOTable path}, names as ADQL identifiers"


class JobFailed(JobdeskError):
    """The job ended in ERROR or ABORTED; ``summary`` holds the UWS errorSummary message."""

    hint = ("read the service's message; once the cause is fixed send it again: "
            "desk.resend(ID) or `jobdesk resend ID` (same query, new job)")

    def __init__(self, message: str, *, phase: str = "ERROR", summary: str | None = None, **kw):
        super().__init__(message, **kw)
        self.phase = phase
        self.summary = summary


class JobAborted(JobFailed):
    """The job was aborted (by you, a colleague or the service)."""

    hint = "send it again to run it anew: desk.resend(ID) or `jobdesk resend ID`"


class JobLost(JobdeskError):
    """The service no longer knows the job (destroyed or expired) and no result was saved."""

    hint = ("send it again: desk.resend(ID) or `jobdesk resend ID`; the old record stays "
            "for reference")


class JobUnreached(ServiceUnreachable):
    """The job was never created: the service could not be reached in every try (UNREACHED)."""

    hint = ("no job exists on the service; check the URL and your network, then send it again "
            "(jobdesk resend ID, or submit(..., refresh=True)) or forget the record")


class JobNotFound(JobdeskError, KeyError):
    """No record with this job id in this desk (a KeyError too, for older code)."""

    hint = "list the recorded jobs with `jobdesk list` (or desk.jobs()) and use one of their ids"

    def __init__(self, job_id: str, root: object = None, **kw):
        where = f" in {root}" if root is not None else ""
        super().__init__(f"no job {job_id!r}{where}", **kw)
        self.job_id = job_id


class JobIdAmbiguous(JobNotFound):
    """A short job id that begins more than one recorded job id."""

    hint = "give more characters of the id (the candidates are listed above)"

    def __init__(self, prefix: str, candidates: list[str], root: object = None, **kw):
        JobdeskError.__init__(self, f"{prefix!r} begins several job ids: {', '.join(candidates)}",
                              **kw)
        self.job_id = prefix
        self.candidates = candidates


class WaitTimeout(JobdeskError, TimeoutError):
    """``wait(timeout=...)`` ran out before the job finished; the job goes on running."""

    hint = "call wait() again later, or leave it: the job record survives kernel restarts"


# --- analyses, re-runs and comparisons ----------------------------------------------------------


class AnalysisError(JobdeskError):
    """An analysis, a re-run or a comparison cannot be made as asked."""


class AnalysisNotFound(AnalysisError, KeyError):
    """No analysis of that name on this desk."""

    hint = "list them with desk.analyses() or `jobdesk analyses`"

    def __str__(self) -> str:  # KeyError would quote the message
        return JobdeskError.__str__(self)


class PlanNotFound(AnalysisError, KeyError):
    """No re-run plan with this id on this desk (a KeyError too, for older code)."""

    hint = "a plan id comes from desk.rerun(...).id; list an analysis's plans in its steps"

    def __str__(self) -> str:  # KeyError would quote the message
        return JobdeskError.__str__(self)


class RenameInvalid(AnalysisError):
    """A re-run's renames do not fit: a source name no step uses, a target the new release
    lacks, or a name the rewritten queries read that the new release does not have."""

    hint = "fix the rename mapping (old name -> new name) and call rerun() again; nothing ran"

    def __init__(self, message: str, *, problems: list[str] | None = None, **kw):
        super().__init__(message, **kw)
        self.problems = list(problems or [])


class CompareKeyInvalid(AnalysisError):
    """Two results cannot be matched row by row: no key column, or a key that repeats."""

    hint = "name a column whose values are unique in both results: compare(..., key='column')"


# --- results and the cache --------------------------------------------------------------------


class ResultTruncated(JobdeskError):
    """The result was truncated (MAXREC, a service limit, or a time or size limit): incomplete."""

    hint = ("raise maxrec (or narrow the query) and submit again; "
            "pass allow_truncated=True to use the partial rows knowingly")

    def __init__(self, message: str, *, rows: int | None = None, **kw):
        super().__init__(message, **kw)
        self.rows = rows


class ResultUnavailable(JobdeskError):
    """The job has no result yet (still running, or it failed)."""

    hint = "call job.wait() first"


class CacheCorrupt(JobdeskError):
    """A cached file does not match the checksum its record holds; it is never served."""

    hint = "submit again with refresh=True to fetch a fresh copy; the bad file was set aside"


class QuickLookUnavailable(JobdeskError):
    """A quick look cannot be drawn from this result (no position columns, not a number column)."""

    hint = "pick a numeric column from the result's column list"


class PublishRefused(JobdeskError):
    """A result cannot go to a group cache: the layer is read-only or you may not write there."""

    hint = ("ask the group's maintainer for write access, or list the group as read-only "
            "(jobdesk.Group(location, readonly=True)); your own cache is unaffected")


class ExportRefused(JobdeskError):
    """A result cannot be written in the chosen format as it is; nothing was written."""

    hint = "choose another format (VOTable and Parquet hold every type a TAP service returns)"


class ExportTargetExists(ExportRefused):
    """The export would replace an existing file, or a table inside an HDF5 file."""

    hint = "pass overwrite=True to replace it, or choose another path"


class StorageFull(JobdeskError):
    """The disk holding the cache is full or over quota; nothing half-written was kept."""

    hint = ("free space (`jobdesk prune`, or desk.prune(dry_run=False)) or point JOBDESK_HOME "
            "at a larger disk, then wait() again")


class IndexBusy(JobdeskError):
    """The local index stayed locked by another process beyond every retry."""

    hint = "another jobdesk process holds the index for too long; try again"


class ConfigError(JobdeskError):
    """A jobdesk setting is invalid."""

    hint = "fix the setting the message names"


# --- mapping the libraries' exceptions to ours -------------------------------------------------


def from_transport(exc: BaseException, *, service: str | None = None) -> JobdeskError:
    """Turn an exception of requests, sqlite3 or the OS into the matching jobdesk error."""
    if isinstance(exc, JobdeskError):
        return exc
    if isinstance(exc, requests.exceptions.InvalidURL | requests.exceptions.MissingSchema
                  | requests.exceptions.InvalidSchema):
        return BadServiceURL("the service URL cannot be used", service=service,
                             detail=_short(exc))
    if isinstance(exc, requests.exceptions.Timeout):
        return ServiceUnreachable("the service did not answer in time", service=service,
                                  detail=_short(exc))
    if isinstance(exc, requests.exceptions.ConnectionError | requests.exceptions.ChunkedEncodingError):
        return ServiceUnreachable(f"could not reach the service ({connection_cause(exc)})",
                                  service=service, detail=_short(exc))
    if isinstance(exc, requests.exceptions.HTTPError) and exc.response is not None:
        r = exc.response
        return ServiceRefused(f"the service answered HTTP {r.status_code}", status=r.status_code,
                              service=service, detail=_short(r.text))
    if isinstance(exc, OSError) and exc.errno in (errno.ENOSPC, errno.EDQUOT):
        return StorageFull(f"no space left writing the cache: {exc}")
    if isinstance(exc, sqlite3.OperationalError) and "disk is full" in str(exc):
        return StorageFull(f"no space left writing the jobdesk index: {exc}")
    if isinstance(exc, sqlite3.OperationalError) and "locked" in str(exc):
        return IndexBusy(f"the jobdesk index is locked: {exc}")
    return JobdeskError(f"{exc.__class__.__name__}: {exc}", service=service)


def connection_cause(exc: BaseException) -> str:
    """A connection failure in a few plain words, read from the library's text."""
    text = str(exc).lower()
    if "refused" in text:
        return "connection refused: nothing listens at that address and port"
    if "name or service not known" in text or "nodename nor servname" in text \
            or "failed to resolve" in text or "getaddrinfo" in text:
        return "the host name does not resolve"
    if "reset" in text or "aborted" in text or "remotedisconnected" in text \
            or "closed connection" in text:
        return "the connection was cut"
    if "timed out" in text or "timeout" in text:
        return "no answer in time"
    if isinstance(exc, requests.exceptions.ChunkedEncodingError):
        return "the answer broke off"
    return "no connection"


def shorten(text: str, limit: int = 300, *, one_line: bool = False) -> str:
    """``text`` cut to ``limit`` characters (ending "..." when cut): the one shortener for
    messages and details, so every error is cut the same way. ``one_line`` first folds runs of
    whitespace (line breaks included) into single spaces."""
    if one_line:
        text = " ".join(text.split())
    return text if len(text) <= limit else text[: limit - 3] + "..."


def _short(value: object) -> str:
    return shorten(str(value), one_line=True)


# --- warnings ----------------------------------------------------------------------------------


class NotRepeatableWarning(UserWarning):
    """The query may answer differently when run again (TOP without ORDER BY, RAND, ...)."""


class ResultTruncatedWarning(UserWarning):
    """A result was truncated by MAXREC or a service limit: fewer rows than the query selects.

    The warning half of :class:`ResultTruncated` (raised when a truncated result is loaded)."""


class QueryCheckWarning(UserWarning):
    """The local check of a query found something worth a look (the query was sent anyway)."""


class MetadataWarning(UserWarning):
    """Table metadata came from the cache because the service could not be read, or some of
    the service's metadata rows were malformed and skipped."""


class GroupCacheWarning(UserWarning):
    """A group cache entry was skipped (corrupt, unreadable) or a publish failed; work went on."""


class ExportWarning(UserWarning):
    """An export replaced a table that was already in an HDF5 file (``overwrite=True``)."""


# --- old names, kept so user code goes on working -----------------------------------------------

_DEPRECATED = {"TruncatedResultWarning": "ResultTruncatedWarning"}


def deprecated_alias(module: str, name: str, namespace: dict):
    """The object an old public name stands for, with a DeprecationWarning naming the new one
    (the body of a module ``__getattr__``, PEP 562)."""
    new = _DEPRECATED.get(name)
    if new is None:
        raise AttributeError(f"module {module!r} has no attribute {name!r}")
    import warnings
    warnings.warn(f"{module}.{name} is deprecated; use {module}.{new}", DeprecationWarning,
                  stacklevel=3)
    return namespace[new]


def __getattr__(name: str):
    return deprecated_alias(__name__, name, globals())

"""``Desk`` and ``Job``: the public face, and the one place that orchestrates the other parts.

A submission is first *recorded* (an index row keyed by the canonical query), then *created* on
the service under a lease, then *driven*: waited on with UWS 1.1 WAIT or polling, and its result
streamed into the store. Each step leaves the index in a state any other process can pick up
from, so a killed kernel, a second kernel or the Jupyter server's poller simply carries on.
"""

from __future__ import annotations

import datetime as _dt
import os
import socket
import time
import uuid
import warnings
from pathlib import Path

from jobdesk import checks as query_checks
from jobdesk import estimate as cost
from jobdesk import analyses, formats, keys, metadata, phases, provenance, results, transfer
from jobdesk import uploads as upload_tables
from jobdesk.errors import (
    CacheCorrupt, ConfigError, JobAborted, JobdeskError, JobFailed, JobIdAmbiguous, JobLost,
    JobNotFound, JobUnreached, MetadataUnavailable, MetadataWarning, NotRepeatableWarning,
    QueryCheckWarning, QueryEmpty, QueryRejected, SyncTimeout, UnknownTable, ResultTruncated,
    ResultUnavailable, ServiceUnreachable, WaitTimeout, PlanNotFound,
)
from jobdesk.groups import GroupCaches
from jobdesk.index import GROUPINGS, Index, this_process
from jobdesk.lifecycle import (FAILED, REFUSED, USER_ABORT, Lifecycle, seconds_text,
                               transient)
from jobdesk.record import JobRecord
from jobdesk.remote import Remote
from jobdesk.settings import Settings, build as build_settings, default_root
from jobdesk.store import Store

# Settings (a desk's own, from jobdesk.settings) have their defaults there; these two names stay
# for code that imports them.
DEFAULT_RUNNING_LIMIT = Settings.default_limit   # jobs per service at once (common practice)
SEND_TRIES = Settings.send_tries  # tries to create a job before its record ends UNREACHED
UNREACHABLE_SLICES = 3        # with a timeout: consecutive failed slices before wait() gives up


def _seconds(value) -> float | None:
    if value is None:
        return None
    if isinstance(value, _dt.timedelta):
        return value.total_seconds()
    return float(value)


def _has_credentials(session) -> bool:
    if session is None:
        return False
    headers = {k.lower() for k in getattr(session, "headers", {}) or {}}
    return bool(getattr(session, "auth", None) or len(getattr(session, "cookies", []) or [])
                or headers & {"authorization", "cookie", "x-api-key"})


class Desk:
    """One cache root: its index, its store, and the services' sessions of this process."""

    def __init__(self, root: Path | str | None = None, groups=None, *, session=None,
                 scope: str | None = None, limits: dict[str, int] | None = None,
                 wait_window: int | None = None, attempts: int | None = None,
                 timeout: float | None = None, send_tries: int | None = None,
                 settings: Settings | None = None):
        # One settings object (docs/settings.md): defaults < config file < environment <
        # these keywords (None: not given). ``settings=`` hands over one built elsewhere.
        given = {"root": root, "groups": groups, "scope": scope, "limits": limits,
                 "wait_window": wait_window, "attempts": attempts, "timeout": timeout,
                 "send_tries": send_tries}
        self.settings = (build_settings(**given) if settings is None
                         else settings.replace(**given))
        self.root = self.settings.root
        self.root.mkdir(parents=True, exist_ok=True)
        self.index = Index(self.root / "index.sqlite")
        self.store = Store(self.root)
        self.store.clean_temp()
        self.session = session
        self.scope = self.settings.scope
        # service id -> running limit; a service not named gets settings.default_limit
        self.limits = self.settings.running_limits()
        self.owner = this_process()
        # How many times creating a job may fail for want of an answer before the record ends
        # UNREACHED (each try is itself ``attempts`` HTTP tries).
        self.send_tries = self.settings.send_tries
        self._remote_options = {"wait_window": self.settings.wait_window,
                                "attempts": self.settings.attempts,
                                "timeout": self.settings.timeout}
        # Waiting goes in slices of one WAIT window (plus a second, so the window's own read
        # fits), renewing the lease between them; the last status read carries over.
        self.drive_slice = self.settings.wait_window + 1.0
        self._sessions: dict[str, object] = {}
        # lookup order: personal, then these
        self.groups = GroupCaches(self.settings.groups, root=self.root)
        self.lifecycle = Lifecycle(self.index, self.store, self.groups, remote=self._remote,
                                   owner=self.owner, limit_for=self.settings.limit_for,
                                   send_tries=self.send_tries)

    def __repr__(self) -> str:
        return f"Desk({str(self.root)!r})"

    # --- submitting ---------------------------------------------------------------------------

    def submit(self, service, adql: str, *, maxrec: int | None = None, uploads=None,
               label: str | None = None, refresh: bool = False, max_age=None,
               fmt: str | None = None, publish: bool = True, check: bool = True,
               estimate: bool = False, analysis: str | None = None) -> "Job":
        """Run ``adql`` on ``service`` as an async job, or return the job that already did.

        Idempotent: the same query (same key) gives the same job, running or finished, in any
        process. ``refresh=True`` runs it anew; ``max_age`` (seconds or a timedelta) refuses
        cached results older than that.  ``check=True`` checks the query against the cached
        metadata first: errors raise ``QueryRejected`` before any request, warnings show once
        as ``QueryCheckWarning``.  ``estimate=True`` measures the cost first and shows it.
        ``analysis`` (or an enclosing ``desk.analysis(name)``) appends the job to that analysis;
        an upload that is a jobdesk result (a Job, or a table loaded from one) is recorded as a
        dependency on the job that made it.
        ``fmt`` is a RESPONSEFORMAT to insist on; without it the fastest one the service offers
        is used, and the cache key is the default format's.
        """
        if not isinstance(adql, str) or not _meaningful(adql):
            raise QueryEmpty("the query is empty: there is nothing to send")
        name = analysis if analysis is not None else analyses.current()
        sources = analyses.upload_sources(uploads) if name is not None else {}
        rows_given = {k: (None if isinstance(v, Job) else len(v))
                      for k, v in (uploads or {}).items() if k in sources and hasattr(v, "__len__")}
        if uploads:
            uploads = {k: (v.table() if isinstance(v, Job) else v) for k, v in uploads.items()}
        job = self._submit_one(service, adql, maxrec=maxrec, uploads=uploads, label=label,
                               refresh=refresh, max_age=max_age, fmt=fmt, publish=publish,
                               check=check, estimate=estimate)
        if name is not None:
            analyses.check_name(name)
            depends = {}
            for upload, key in sources.items():
                made = self.index.find(key, reuse=lambda r: True)
                # a table cut down from a result is an upload of its own, not that result
                if made is not None and rows_given.get(upload) in (None, made.rows):
                    depends[upload] = made.id
            self.index.add_step(name, job.id, depends)
        return job

    def _submit_one(self, service, adql: str, *, maxrec, uploads, label, refresh, max_age, fmt,
                    publish, check, estimate) -> "Job":
        url, session = self._unwrap(service)
        sid = keys.service_id(url)
        if session is not None:
            self._sessions[sid] = session
        prepared = upload_tables.prepare(uploads)
        scope = self._scope_for(sid)
        digests = {name: sha for name, (_, sha) in prepared.items()}
        key = keys.query_key(sid, adql, maxrec=maxrec, fmt=fmt or formats.DEFAULT,
                             uploads=digests, scope=scope)
        oldest = None if max_age is None else time.time() - _seconds(max_age)

        def reuse(record: JobRecord) -> bool:
            if refresh or record.phase in FAILED:
                return False
            if record.has_result:
                fresh = oldest is None or (record.finished or 0) >= oldest
                here = (self.store.has(record.parquet_sha256)
                        or record.layer in self.groups.names)  # copied on first use
                return fresh and here
            return True  # still running somewhere: share it

        known = None if refresh else self.index.find(key, reuse=reuse)
        if known is not None and self.lifecycle.bring_here(known):  # fast path: no parse, no lock
            _warn_not_repeatable(known.warnings)
            return Job(self, known.id, known)
        if check:      # a hit above sends nothing, so only a query about to be sent is checked
            self._refuse_bad(sid, adql)
        measured = None
        if estimate:
            measured = self.estimate(sid, adql, maxrec=maxrec, fmt=fmt)
            _show_estimate(measured)
        canonical = keys.canonical_adql(adql)
        _warn_not_repeatable(canonical.warnings)

        for name, (data, sha) in prepared.items():
            if not self.store.has(sha):
                tmp = self.store.temp(".upload.vot")
                tmp.write_bytes(data)
                self.store.commit(tmp, sha)
        job_id = uuid.uuid4().hex[:16]
        fields = {
            "id": job_id, "service": sid, "adql": adql, "canonical": canonical.text,
            "maxrec": maxrec, "fmt": fmt, "label": label, "scope": scope, "uploads": digests,
            "phase": phases.UNSENT, "run_id": f"jobdesk-{job_id}",
            "notebook": os.environ.get("JPY_SESSION_NAME"), "user": provenance.current_user(),
            "host": socket.gethostname(), "warnings": list(canonical.warnings),
            "layer": "personal", "requests": 0,
            "estimate": measured.to_dict() if measured is not None else None,
        }
        record, created = self.index.claim(key, fields, reuse=reuse)
        if not created and not self.lifecycle.bring_here(record):
            record, created = self.index.claim(key, fields, reuse=reuse)
        job = Job(self, record.id)
        if created:
            if not publish and self.groups:
                self.groups.opt_out(record.id)
            if refresh or not self.lifecycle.from_groups(record, oldest):
                self.lifecycle.start(record)
        return job

    # --- browsing -----------------------------------------------------------------------------

    def jobs(self, *, phase=None, service=None, text=None, limit: int | None = 50,
             offset: int = 0) -> list["Job"]:
        """Job records, newest first, filtered by phase(s), service URL and free text."""
        service = keys.service_id(service) if service else None
        return [Job(self, r.id, r) for r in self.index.list(
            phase=phase, service=service, text=text, limit=limit, offset=offset)]

    def records(self, *, phase=None, service=None, text=None, limit: int | None = 50,
                offset: int = 0, sort: str = "created", notebook: str | None = None,
                analysis: str | None = None) -> list[dict]:
        """A page of job records as plain dicts, read in one index query (a ``Job`` reads its
        record again on every property, which a list of many jobs cannot afford).

        ``sort`` is one of ``index.SORTS``; ``notebook=""`` / ``analysis=""`` pick the jobs
        with none."""
        service = keys.service_id(service) if service else None
        return [r.as_dict() for r in self.index.list(
            phase=phase, service=service, text=text, limit=limit, offset=offset, sort=sort,
            notebook=notebook, analysis=analysis)]

    def count(self, *, phase=None, service=None, text=None, notebook: str | None = None,
              analysis: str | None = None) -> int:
        """How many records the same filters as :meth:`records` select (one count query)."""
        service = keys.service_id(service) if service else None
        return self.index.count(phase=phase, service=service, text=text, notebook=notebook,
                                analysis=analysis)

    def job_groups(self, by: str, *, phase=None, service=None, text=None) -> list[dict]:
        """Jobs per ``by`` (``notebook`` or ``analysis``; index.GROUPINGS): how many, how many
        cached, their cached bytes and rows, largest first (one grouped query)."""
        if by not in GROUPINGS:
            raise ValueError(f"cannot group jobs by {by!r}; one of {', '.join(GROUPINGS)}")
        service = keys.service_id(service) if service else None
        return self.index.groups(by, phase=phase, service=service, text=text)

    def change_token(self) -> str:
        """A cheap value that changes whenever any record changes (for change feeds)."""
        return self.index.version()

    def job(self, job_id: str) -> "Job":
        record = self.index.get(job_id)
        if record is None:
            raise JobNotFound(job_id, self.root)
        return Job(self, job_id, record)

    def resolve(self, job_id: str) -> str:
        """The full id of the one record whose id is ``job_id`` or begins with it (a short id
        for people typing); ``JobNotFound`` for none, ``JobIdAmbiguous`` for several."""
        if job_id and self.index.get(job_id) is not None:
            return job_id
        found = self.index.ids_starting(job_id, limit=10) if job_id else []
        if not found:
            raise JobNotFound(job_id, self.root)
        if len(found) > 1:
            raise JobIdAmbiguous(job_id, found, self.root)
        return found[0]

    def abort(self, job_id: str) -> "Job":
        """Abort a job on its service (or locally, if it was never created there)."""
        record = self.job(job_id).typed()
        if record.phase in phases.TERMINAL:
            return Job(self, job_id, record)
        if record.job_url:
            remote = self._remote(record.service)
            # Said first, so a process driving the job reads the abort as the user's own.
            self.index.update(job_id, error=USER_ABORT)
            try:
                remote.abort(record.job_url)
            except BaseException:
                self.index.update(job_id, error=record.error)
                raise
            finally:
                self.index.update(job_id, requests_add=remote.requests)
        self.index.update(job_id, phase=phases.ABORTED, finished=time.time(),
                          error=USER_ABORT, note="aborted by the user", next_try=None)
        return self.job(job_id)

    def forget(self, job_id: str) -> bool:
        """Drop a record (its cached files go at the next prune if nothing else uses them)."""
        self.job(job_id)  # JobNotFound for an unknown id
        return self.index.forget(job_id)

    def set_label(self, job_id: str, label: str | None) -> "Job":
        """Give a record a label (None clears it); the label is for people, not in the key."""
        self.job(job_id)
        self.index.update(job_id, label=label)
        return self.job(job_id)

    def resend(self, job_id: str) -> "Job":
        """Send a record's query again as a new job (same query, service, MAXREC, uploads and
        label): the next step after ERROR, ABORTED, LOST or UNREACHED. A run of the same query
        already going on is shared instead."""
        old = self.job(job_id).typed()
        if old.phase not in FAILED:
            return Job(self, job_id, old)
        new_id = uuid.uuid4().hex[:16]
        fields = {name: getattr(old, name) for name in (
            "service", "adql", "canonical", "maxrec", "fmt", "label", "scope", "uploads",
            "warnings", "notebook", "user", "host")}
        fields.update(id=new_id, phase=phases.UNSENT, run_id=f"jobdesk-{new_id}",
                      layer="personal", requests=0)
        record, created = self.index.claim(
            old.key, fields, reuse=lambda r: r.phase in phases.ACTIVE)
        if created:
            self.index.update(job_id, note=f"sent again as {new_id}")
            try:
                self.lifecycle.start(record)
            except JobdeskError as exc:
                if not transient(exc):
                    raise
        return Job(self, record.id)

    def cache_summary(self) -> dict:
        """What the caches hold. ``entries`` counts files; ``results`` counts results (a
        result's VOTable and its Parquet copy are one result; a group's manifest is one)."""
        entries, size = self.store.usage()
        results = sum(1 for sha in self.index.result_hashes() if self.store.has(sha))
        groups = [{**layer, "results": layer.get("entries")} for layer in self.groups.summary()]
        return {"entries": entries, "results": results, "bytes": size, "root": str(self.root),
                "layers": [{"name": "personal", "kind": "personal", "location": str(self.root),
                            "entries": entries, "results": results, "bytes": size}] + groups}

    def publish(self, job_id: str, *, group: str | None = None) -> str:
        """Share a finished, complete result with ``group`` (default: the first read-write
        group cache) now; return where its manifest went. Raises ``PublishRefused``."""
        record = self.job(job_id).typed()
        if not self.lifecycle.bring_here(record):
            raise CacheCorrupt(f"job {job_id}: its result is not in this cache")
        name, rel = self.groups.publish(record.as_dict(), self.store, group=group)
        return f"{name}:{rel}"

    def pin(self, job_id: str, *, pinned: bool = True) -> None:
        """Keep a job's record and files through every ``prune`` (``pinned=False`` unpins)."""
        from jobdesk import eviction
        self.job(job_id)
        eviction.pin(self.root, job_id, pinned=pinned)

    def prune(self, *, max_bytes: int | None = None, older_than=None,
              dry_run: bool = True) -> dict:
        """Shrink the personal cache: drop finished, unpinned records older than ``older_than``
        (seconds or a timedelta), then the oldest until the files fit ``max_bytes``; a record
        goes together with its files, and files another record uses stay. Dry run by default."""
        from jobdesk import eviction
        return eviction.prune(self.index, self.store, self.root, max_bytes=max_bytes,
                              older_than=_seconds(older_than), dry_run=dry_run)

    # --- group caches (see jobdesk.groups) ----------------------------------------------------

    def group_add_to_index(self) -> int:
        """List every group result (newest per key) in this desk's index; return how many."""
        return self.groups.add_to_index(self.index)

    def group_verify(self, group: str | None = None, *, location: str | None = None,
                     hashes: bool = True):
        """Check a group cache's manifests, checksums and modes (``jobdesk.groups.maintain``)."""
        from jobdesk.groups import maintain
        return maintain.verify(self._group_layer(group, location, write=False), hashes=hashes)

    def group_prune(self, group: str | None = None, *, location: str | None = None,
                    older_than=None, dry_run: bool = True):
        """Remove what no manifest of a group cache references (and manifests older than
        ``older_than``, seconds or a timedelta). Dry run by default, as ``prune``."""
        from jobdesk.groups import maintain
        return maintain.prune(self._group_layer(group, location, write=not dry_run),
                              older_than=_seconds(older_than), dry_run=dry_run)

    def _group_layer(self, group: str | None, location: str | None, *, write: bool):
        """The named group cache of this desk (or its only one), or one given by location."""
        from jobdesk.groups import Group
        from jobdesk.groups.layer import GroupLayer
        if location:
            return GroupLayer(Group(location, readonly=not write))
        if group:
            try:
                return self.groups.layer(group)
            except KeyError as exc:
                raise ConfigError(exc.args[0], hint="name one of this desk's group caches, or "
                                  "give its path or URL with --location") from None
        if len(self.groups.layers) != 1:
            raise ConfigError(f"this desk has {len(self.groups.layers)} group caches "
                              f"({self.groups.names}): say which",
                              hint="name the group cache (--group NAME) or give its location "
                                   "(--location PATH_OR_URL)")
        return self.groups.layers[0]

    # --- shaping a query (see jobdesk.metadata, jobdesk.checks, jobdesk.estimate) --------------

    def tables(self, service, *, refresh: bool = False, limit: int | None = None,
               offset: int = 0) -> list[dict]:
        """The service's tables (name, schema_name, description, nrows, ncols), from the index;
        read from the service first when nothing is cached or ``refresh=True``.  When the
        service cannot be read, cached metadata is used with its age in a ``MetadataWarning``."""
        sid = self._metadata(service, refresh=refresh)
        return self.index.meta_tables(sid, limit=limit, offset=offset)

    def columns(self, service, table: str) -> list[dict]:
        """Columns of one table (name, datatype, arraysize, xtype, unit, ucd, description);
        the name is matched exactly, else ignoring case.  ``UnknownTable`` names the closest."""
        sid = self._metadata(service)
        name = self._table_name(sid, table)
        return self.index.meta_columns(sid, name)

    def find(self, service, text: str, *, limit: int = 50) -> list[dict]:
        """Tables and columns whose names, descriptions, units or UCDs hold every word of
        ``text`` (as word prefixes), best first: ``{table, column, unit, ucd, description,
        datatype}`` (``column`` None for a table)."""
        sid = self._metadata(service)
        match = metadata.fts_query(text)
        if match is None:
            return []
        out = []
        for hit in self.index.meta_find(sid, match, limit=limit):
            if hit["column"] is None:
                row = (self.index.meta_tables(sid, names=[hit["table"]]) or [{}])[0]
                out.append({"table": hit["table"], "column": None, "unit": None, "ucd": None,
                            "datatype": None, "description": row.get("description")})
            else:
                col = next((c for c in self.index.meta_columns(sid, hit["table"])
                            if c["name"] == hit["column"]), {})
                out.append({"table": hit["table"], "column": hit["column"],
                            "unit": col.get("unit"), "ucd": col.get("ucd"),
                            "datatype": col.get("datatype"),
                            "description": col.get("description")})
        return out

    def check(self, service, adql: str, *, wide: int = query_checks.WIDE_TABLE,
              huge: int = query_checks.HUGE_TABLE) -> list:
        """Findings (``jobdesk.checks.Finding``) for ``adql`` against the service's metadata;
        metadata is read first if none is cached; without any, only the syntax is checked."""
        sid = keys.service_id(self._unwrap(service)[0])
        try:
            self._metadata(sid)
        except MetadataUnavailable:
            pass
        return query_checks.check(adql, metadata.CachedCatalog(self.index, sid), wide=wide,
                                  huge=huge)

    def estimate(self, service, adql: str, *, maxrec: int | None = None, fmt: str | None = None,
                 time_limit: float = cost.TIME_LIMIT):
        """Predicted rows (a COUNT(*) run synchronously within ``time_limit`` seconds, else a
        TOP-limited sample), bytes in ``fmt`` (by default the format a job would negotiate),
        whether MAXREC or the service's output limit cut it, and a duration range from this
        service's past jobs (``jobdesk.estimate``)."""
        url, session = self._unwrap(service)
        sid = keys.service_id(url)
        if session is not None:
            self._sessions[sid] = session
        bad = query_checks.errors(query_checks.check(adql, None))    # syntax: no request
        if bad:
            raise QueryRejected("the query cannot be estimated: it does not parse\n"
                                + "\n".join(map(str, bad)), findings=bad, service=sid)
        remote = self._remote(sid)
        caps = self.lifecycle.capabilities(sid)
        output = caps.get("output_limit") or {}
        if fmt is None:
            fmt = formats.choose(self.lifecycle.capabilities(sid, output_formats=True))
        try:
            return cost.measure(adql, remote.sync, fmt=fmt, maxrec=maxrec,
                                default_maxrec=output.get("default"),
                                output_limit=output.get("hard"),
                                history=self.index.job_durations(sid), time_limit=time_limit,
                                timeout_error=SyncTimeout)
        except ValueError as exc:
            raise QueryRejected(f"the query cannot be estimated: {exc}", service=sid) from None
        except QueryRejected as exc:
            spot = query_checks.from_service(adql, exc.message)
            if spot is None:
                raise
            raise QueryRejected(f"{exc.message}\n{spot.caret()}", findings=[spot],
                                service=sid) from None

    def known_services(self) -> list[dict]:
        """Every service this desk knows (from its jobs or its cached metadata): ``service``,
        ``jobs``, and when its metadata was read (``read_at``, ``source``, ``tables``,
        ``columns``; None when never)."""
        out = {s: {"service": s, "jobs": n, "read_at": None, "source": None, "tables": None,
                   "columns": None} for s, n in self.index.services()}
        for info in self.index.metadata_info():
            entry = out.setdefault(info["service"], {"service": info["service"], "jobs": 0})
            entry.update({k: info[k] for k in ("read_at", "source", "tables", "columns")})
        return sorted(out.values(), key=lambda e: e["service"])

    def _metadata(self, service, *, refresh: bool = False) -> str:
        """The service id, its metadata cached (read now when missing or ``refresh``)."""
        url, session = self._unwrap(service)
        sid = keys.service_id(url)
        if session is not None:
            self._sessions[sid] = session
        known = self.index.metadata_info(sid)
        if known and not refresh:
            return sid

        def skipped(message: str) -> None:
            warnings.warn(MetadataWarning(f"{sid}: {message}"), stacklevel=4)
        try:
            metadata.refresh(self.index, self._remote(sid), sid, on_skip=skipped)
        except JobdeskError as exc:
            if not known:
                raise MetadataUnavailable(f"no table metadata for {sid}: the service could not "
                                          f"be read ({exc.message}) and none is cached",
                                          service=sid) from exc
            age = time.time() - known[0]["read_at"]
            warnings.warn(MetadataWarning(
                f"{sid} could not be read ({exc.message}); using the metadata cached "
                f"{_age(age)} ago"), stacklevel=3)
        return sid

    def _table_name(self, sid: str, table: str) -> str:
        exact = self.index.meta_tables(sid, names=[table])
        if exact:
            return exact[0]["name"]
        like = self.index.meta_table_like(sid, table)
        if len(like) == 1:
            return like[0]["name"]
        names = [t["name"] for t in self.index.meta_tables(sid)]
        import difflib
        close = difflib.get_close_matches(table.lower(), [n.lower() for n in names], n=3,
                                          cutoff=0.6)
        spelled = {n.lower(): n for n in names}
        suggestions = [spelled[c] for c in close] or [t["name"] for t in like]
        more = f"; did you mean {' or '.join(suggestions)}?" if suggestions else ""
        raise UnknownTable(f"{sid} lists no table {table}{more}", suggestions=suggestions,
                           service=sid)

    def _refuse_bad(self, sid: str, adql: str) -> None:
        """The check before submit: cached metadata only (no request); errors refuse."""
        found = query_checks.check(adql, metadata.CachedCatalog(self.index, sid))
        bad = query_checks.errors(found)
        if bad:
            hint = "fix the query where the caret points; pass check=False to send it anyway"
            known = self.index.metadata_info(sid)
            if known and any(f.code.startswith("unknown-") for f in bad):
                hint += (f" (the service's tables were read {_age(time.time() - known[0]['read_at'])}"
                         " ago; desk.tables(service, refresh=True) reads them again)")
            raise QueryRejected("the query was not sent: the local check found "
                                f"{len(bad)} error(s)\n" + "\n".join(str(f) for f in bad),
                                findings=found, service=sid, hint=hint)
        for f in found:
            if f.code not in ("no-metadata", "top-no-order"):  # the latter: NotRepeatableWarning
                warnings.warn(QueryCheckWarning(str(f)), stacklevel=4)

    # --- analyses, re-runs and comparisons (see jobdesk.analyses, jobdesk.compare) -------------

    def analysis(self, name: str):
        """A context: every ``submit`` inside it (without ``analysis=``) joins analysis ``name``."""
        return analyses.active(name)

    def analyses(self) -> list[dict]:
        """Every analysis on this desk, newest first: name, steps, created, updated, plans."""
        plans: dict[str, list[str]] = {}
        for p in self.index.plans():
            plans.setdefault(p["analysis"], []).append(p["id"])
        return [a | {"plans": plans.get(a["name"], [])} for a in self.index.analyses()]

    def analysis_jobs(self, name: str) -> list["Job"]:
        """The analysis's jobs in step order (a forgotten job is left out)."""
        steps = self.index.steps(name)
        if not steps:
            raise analyses.AnalysisNotFound(
                f"no analysis named {name!r} on this desk ({self.root})")
        return [Job(self, s["job_id"]) for s in steps if self.index.get(s["job_id"])]

    def rerun(self, name: str, *, rename: dict[str, str] | None = None, service=None,
              into: str | None = None) -> "analyses.Plan":
        """Plan a re-run of analysis ``name`` with tables and columns renamed (a new release);
        the same arguments find the same plan again. Nothing runs before ``plan.start()``."""
        url = self._unwrap(service)[0] if service is not None else None
        return analyses.make_plan(self, name, dict(rename or {}), url, into)

    def plan(self, plan_id: str) -> "analyses.Plan":
        """A re-run plan by its id (``PlanNotFound``, a ``KeyError``, when unknown)."""
        record = self.index.plan(plan_id)
        if record is None:
            raise PlanNotFound(f"no re-run plan {plan_id!r} in {self.root}")
        return analyses.Plan(self, record)

    def compare(self, old, new, *, key: str | None = None, tolerance: float = 0.0):
        """Compare two finished results (Jobs or job ids) row by row through ``key`` (default:
        the column whose UCD is ``meta.id;meta.main``); see ``jobdesk.compare``."""
        from jobdesk.compare import compare_files
        old = old if isinstance(old, Job) else self.job(old)
        new = new if isinstance(new, Job) else self.job(new)
        result = compare_files(old.result_path(), new.result_path(), key=key,
                               tolerance=tolerance)
        result.old = {"job": old.id, "provenance": old.provenance()}
        result.new = {"job": new.id, "provenance": new.provenance()}
        return result

    def step(self, *, owner: str | None = None, service: str | None = None) -> int:
        """Advance every job no live process is driving, once, without blocking; return how
        many moved (the Jupyter server's poller calls this; see ``Lifecycle.step``)."""
        return self.lifecycle.step(owner=owner, service=service)

    # --- services -----------------------------------------------------------------------------

    def _unwrap(self, service) -> tuple[str, object]:
        """A URL string, or a pyvo TAPService (its base URL and session are used)."""
        if isinstance(service, str):
            return service, None
        url = getattr(service, "baseurl", None)
        if not url:
            raise TypeError("service must be a TAP base URL or a pyvo TAPService")
        return url, getattr(service, "_session", None)

    def _scope_for(self, sid: str) -> str:
        if self.scope:
            return self.scope
        session = self._sessions.get(sid, self.session)
        return "authenticated" if _has_credentials(session) else "anonymous"

    def _remote(self, service: str) -> Remote:
        return Remote(service, self._sessions.get(service, self.session), **self._remote_options)

class Job:
    """A handle on one index record; every property reads the record afresh."""

    def __init__(self, desk: Desk, job_id: str, record: JobRecord | None = None):
        self.desk = desk
        self.id = job_id
        self._record = record

    def __repr__(self) -> str:
        r = self.typed()
        rows = "" if r.rows is None else f", rows={r.rows}"
        cut = ", TRUNCATED" if r.truncated else ""
        return f"<jobdesk.Job {self.id} {r.phase}{rows}{cut} {self.title!r}>"

    # --- the record ---------------------------------------------------------------------------

    def typed(self) -> JobRecord:
        """The record as the index holds it now (``jobdesk.record.JobRecord``)."""
        record = self.desk.index.get(self.id)
        if record is None:
            raise JobLost(f"job {self.id} was forgotten from this desk",
                          hint="submit the query again")
        self._record = record
        return record

    @property
    def record(self) -> dict:
        """The record as a JSON-safe dict (the REST API's job object)."""
        return self.typed().as_dict()

    @property
    def key(self) -> str:
        return (self._record or self.typed()).key

    @property
    def phase(self) -> str:
        return self.typed().phase

    @property
    def rows(self) -> int | None:
        return self.typed().rows

    @property
    def truncated(self) -> bool | None:
        return self.typed().truncated

    @property
    def title(self) -> str:
        return (self._record or self.typed()).title

    @property
    def ready(self) -> bool:
        return self.typed().has_result

    def history(self) -> list[dict]:
        """The phases this record went through, oldest first (``phase``, ``at``, ``note``)."""
        return self.desk.index.history(self.id)

    # --- waiting ------------------------------------------------------------------------------

    def wait(self, timeout: float | None = None, *, progress: bool = True) -> "Job":
        """Block until the result is cached here; raise the matching error if the job failed.

        Progress shows as a card in a notebook and a line in a terminal; while the service does
        not answer they say so, and when the next try is. Without ``timeout`` waiting goes on
        through an outage; with one, ``WaitTimeout`` says how long the service was unreachable.
        The job itself goes on either way. A job you aborted yourself ends the wait quietly.
        """
        deadline = None if timeout is None else time.monotonic() + timeout
        display = _progress(self.title, self.id) if progress else None
        t0 = time.monotonic()
        unreachable = 0
        record = self.typed()

        def show(phase: str | None = None) -> None:
            if display is not None:
                now = self.desk.index.get(self.id) or record
                # Another process may be fetching: show its figures from the index too.
                fetch = now.fetch or {}
                if fetch.get("stage") == "download":
                    display.transfer(fetch.get("bytes") or 0, fetch.get("total"))
                note = unreachable_note(now.as_dict()) or (
                    transfer.describe(fetch) if fetch.get("stage") == "convert" else "")
                display.update(phase or now.phase, time.monotonic() - t0, now.rows, note=note)

        def shown(status) -> None:
            show(status.phase if status is not None else None)

        def fetched(done: int, total: int | None) -> None:
            if display is not None:
                display.transfer(done, total)
        try:
            while True:
                record = self.typed()
                show()
                if display is not None and display.cancelled \
                        and record.phase not in phases.TERMINAL:
                    self.desk.abort(self.id)
                    continue
                if record.has_result:
                    if display is not None and record.truncated:
                        display.update(record.phase, time.monotonic() - t0, record.rows,
                                       note="truncated: not the full answer (MAXREC or a "
                                            "service limit)")
                    return self
                if record.phase == phases.ABORTED and record.error == USER_ABORT:
                    print(f"jobdesk: job {self.id} was aborted at your request; it has no "
                          f"result (send it again with desk.resend({self.id!r}))")
                    return self
                if record.phase in FAILED:
                    raise self._failure(record)
                if deadline is not None and time.monotonic() >= deadline:
                    raise self._timeout(record, timeout)
                slice_end = time.monotonic() + self.desk.drive_slice
                if deadline is not None:
                    slice_end = min(slice_end, deadline)
                try:
                    if (record.next_try or 0) > time.time():
                        _sleep_until(min(slice_end, time.monotonic() + record.next_try
                                         - time.time()), 1.0)  # ticks the note's countdown
                        continue
                    if not self.desk.lifecycle.advance(record, until=slice_end, on_status=shown,
                                                       on_transfer=fetched):
                        _sleep_until(slice_end, 0.5)  # no slot yet, or another process drives
                    unreachable = 0
                except ServiceUnreachable:
                    if self.typed().phase in FAILED:
                        continue  # it ended UNREACHED: the loop says so
                    unreachable += 1
                    if deadline is not None and unreachable >= UNREACHABLE_SLICES:
                        raise
        finally:
            if display is not None:
                display.close(record.phase)

    def _timeout(self, record: JobRecord, timeout: float) -> WaitTimeout:
        if record.unreachable_since:
            return WaitTimeout(
                f"job {self.id}: the service has been unreachable for "
                f"{seconds_text(time.time() - record.unreachable_since)} ({record.last_error}); "
                f"the record is still {record.phase} and retries at the next wait",
                service=record.service, detail=record.error_detail)
        return WaitTimeout(f"job {self.id} is still {record.phase} after {timeout:g} s",
                           service=record.service)

    def failure(self) -> JobdeskError | None:
        """The error this job ended with (message, hint, detail), or None if it did not fail."""
        record = self.typed()
        if record.phase not in FAILED:
            return None
        return self._failure(record)

    def _failure(self, record: JobRecord) -> JobdeskError:
        message = record.error or f"job {self.id} ended in {record.phase}"
        service = record.service
        if record.phase == phases.UNREACHED:
            return JobUnreached(f"job {self.id}: {message}", service=service,
                                detail=record.error_detail)
        if record.phase == phases.ABORTED:
            return JobAborted(message, phase=phases.ABORTED, service=service)
        if record.phase in (phases.LOST, phases.ARCHIVED):
            return JobLost(f"job {self.id}: {message}", service=service)
        if _looks_like_query_error(message) and REFUSED not in message:
            spot = query_checks.from_service(record.adql, message)
            if spot is not None:
                return QueryRejected(f"{message}\n{spot.caret()}", findings=[spot],
                                     service=service)
            return QueryRejected(message, service=service)
        return JobFailed(message, phase=record.phase, summary=record.error, service=service)

    # --- the result ---------------------------------------------------------------------------

    def result_path(self, *, allow_truncated: bool = False) -> Path:
        """The cached Parquet file of the result, checked against its checksum; raises what
        keeps it from being used (not finished, failed, truncated, a bad copy)."""
        r = self.typed()
        if not r.has_result:
            if r.phase in FAILED:
                raise self._failure(r)
            raise ResultUnavailable(f"job {self.id} has no result yet (phase {r.phase})")
        if r.truncated and not allow_truncated:
            raise ResultTruncated(
                f"job {self.id}: the result was truncated at {r.rows} rows "
                f"(MAXREC={r.maxrec} or a service limit); it is not the full answer",
                rows=r.rows, service=r.service)
        if not self.desk.lifecycle.bring_here(r):  # listed from a group cache, not fetched yet
            raise CacheCorrupt(f"job {self.id}: its files are in group cache {r.layer}, "
                               "which has no good copy or is not configured on this desk")
        r = self.typed()
        try:
            return self.desk.store.checked(r.parquet_sha256, r.parquet_stat)
        except CacheCorrupt:
            self.desk.index.update(self.id, phase=phases.LOST, parquet_sha256=None,
                                   error="cached file failed its checksum; resubmit",
                                   note="cache file corrupt")
            raise

    def table(self, *, allow_truncated: bool = False):
        """The result as an astropy Table (units, UCDs and descriptions kept)."""
        return results.load_table(self.result_path(allow_truncated=allow_truncated))

    def frame(self, *, allow_truncated: bool = False):
        """The result as a pandas DataFrame (units and descriptions in ``.attrs``)."""
        return results.load_frame(self.result_path(allow_truncated=allow_truncated))

    def provenance(self) -> dict:
        """Where this result came from, as a JSON-safe dict (see ``jobdesk.provenance``)."""
        r = self.typed()
        columns = []
        if r.parquet_sha256 and self.desk.store.has(r.parquet_sha256):
            columns = results.columns(self.desk.store.path(r.parquet_sha256))
        prov = provenance.build(r, self.desk.index.history(self.id), columns=columns)
        prov["tables"] = list(keys.canonical_adql(r.adql).tables)
        prov["lookup_order"] = ["personal", *self.desk.groups.names]
        if r.layer not in (None, "personal"):
            prov["group"] = self.desk.groups.served_note(self.id)
            prov["served"] = (prov["group"] or {}).get("account") or f"group cache {r.layer}"
        return prov

    def account(self) -> str:
        """A short plain-text account of how the table was made, for a paper's data section."""
        return provenance.account(self.provenance())

    def export(self, path, *, allow_truncated: bool = False, fmt: str | None = None,
               name: str | None = None, overwrite: bool = False) -> list[Path]:
        """Write the result to ``path`` (FITS, VOTable, Parquet, HDF5, CSV, ECSV by suffix or
        ``fmt``) with its provenance embedded, and a W3C PROV-JSON sidecar that names the
        file's SHA-256. ``name`` is the table's path inside an HDF5 file (default
        ``jobdesk/<job id>``); an existing file or HDF5 table is replaced only with
        ``overwrite=True``. A value the format cannot hold raises ``ExportRefused`` and
        nothing is written (see ``jobdesk.export``)."""
        from jobdesk.export import FORMATS, export
        table = self.table(allow_truncated=allow_truncated)
        kind = (fmt or FORMATS.get(Path(path).suffix.lower()) or "").lower()
        if kind == "hdf5" and name is None:
            name = f"jobdesk/{self.id}"
        return export(table, self.provenance(), path, fmt=fmt, name=name, overwrite=overwrite)

    def snippet(self) -> str:
        """Python that loads this result in a notebook."""
        root = "" if self.desk.root == default_root() else repr(str(self.desk.root))
        opt = "allow_truncated=True" if self.truncated else ""
        return (f"from jobdesk import Desk\n\n"
                f"table = Desk({root}).job({self.id!r}).table({opt})  # {self.title[:60]}\n")

    def query_code(self) -> str:
        """Python that sends this record's query again, to edit in a notebook first."""
        r = self.typed()
        root = "" if self.desk.root == default_root() else repr(str(self.desk.root))
        options = "".join(f", {name}={getattr(r, name)!r}" for name in ("maxrec", "label")
                          if getattr(r, name) is not None)
        quoted = r.adql.strip().replace("\\", "\\\\").replace('"""', '\\"\\"\\"')
        return (f"from jobdesk import Desk\n\n"
                f"job = Desk({root}).submit(\n    {r.service!r},\n    \"\"\"\n{quoted}\n\"\"\"{options},\n"
                f"    refresh=True,\n)\njob.wait()\n")

    def preview(self, rows: int = 20) -> dict:
        """The first rows and the column descriptions, JSON-safe, without loading everything."""
        path = self.result_path(allow_truncated=True)
        return results.preview(path, rows=rows) | {"bytes": self.typed().result_bytes}


def service_duration(record: dict) -> float | None:
    """How long the job ran by the service's own clock (startTime to endTime), if it said."""
    start, end = record.get("service_started"), record.get("service_finished")
    return None if start is None or end is None else max(0.0, end - start)


def unreachable_note(record: dict) -> str:
    """``service unreachable for 40 s, retrying (next try in 5 s)``, or "" when it answers."""
    since = record.get("unreachable_since")
    if not since or record.get("phase") in phases.TERMINAL:
        return ""
    now = time.time()
    text = f"service unreachable for {seconds_text(now - since)}, retrying"
    if record.get("next_try"):
        text += f" (next try in {max(0, round(record['next_try'] - now))} s)"
    return text


def _meaningful(adql: str) -> bool:
    """Whether the text holds anything but whitespace and ADQL comments (ADQL 2.1 §2.1.4:
    ``--`` to the end of the line)."""
    return any(line.split("--", 1)[0].strip() for line in adql.splitlines())


def _warn_not_repeatable(reasons) -> None:
    for reason in reasons:
        warnings.warn(NotRepeatableWarning(
            f"{reason}: a cached answer may differ from a fresh run"), stacklevel=3)


def _age(seconds: float) -> str:
    if seconds < 120:
        return f"{seconds:.0f} s"
    if seconds < 7200:
        return f"{seconds / 60:.0f} min"
    if seconds < 172800:
        return f"{seconds / 3600:.0f} h"
    return f"{seconds / 86400:.0f} days"


def _show_estimate(found) -> None:
    """The estimate where the user looks: a card in a notebook, stderr in a terminal."""
    text = str(found)
    try:
        from IPython import get_ipython
        from IPython.display import display
        if get_ipython() is not None:
            from IPython.display import Pretty
            display(Pretty("estimate before the long run:\n" + text))
            return
    except ImportError:
        pass
    import sys
    print("estimate before the long run:\n" + text, file=sys.stderr)


def _progress(title: str, job_id: str | None = None):
    try:
        from jobdesk.progress import Progress
    except ImportError:  # the display module is optional at run time
        return None
    return Progress.for_environment(title, job_id=job_id)


def _sleep_until(end: float, step: float) -> None:
    time.sleep(max(0.0, min(step, end - time.monotonic())))


def _looks_like_query_error(message: str) -> bool:
    """Whether a job's error text is the service refusing the ADQL itself (common practice,
    no source: services word these differently; these fragments cover the usual ones)."""
    text = message.lower()
    return any(f in text for f in ("adql", "syntax", "parse", "column", "table", "unknown",
                                   "not found", "could not resolve", "no such"))

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

import platformdirs

from jobdesk import checks as query_checks
from jobdesk import estimate as cost
from jobdesk import (analyses, formats, keys, metadata, phases, provenance, results, transfer,
                     voparquet)
from jobdesk import uploads as upload_tables
from jobdesk.errors import (
    BadServiceURL, CacheCorrupt, ConfigError, GroupCacheWarning, JobAborted, JobdeskError, JobFailed,
    JobIdAmbiguous, JobLost, JobNotFound, JobUnreached, MetadataUnavailable, MetadataWarning,
    NotRepeatableWarning,
    QueryCheckWarning, QueryEmpty, QueryRejected, SyncTimeout, UnknownTable, ResultTruncated,
    ResultTruncatedWarning, ResultUnavailable, ServiceRefused, ServiceResponseInvalid,
    ServiceUnreachable, WaitTimeout, PlanNotFound,
)
from jobdesk.groups import GroupCaches
from jobdesk.index import Index, this_process
from jobdesk.remote import Remote
from jobdesk.store import Store, stat_stamp
from jobdesk.transfer import FetchMeter

DEFAULT_RUNNING_LIMIT = 4     # jobs per service at once; common practice, no source
HELD_RETRY = 5.0              # seconds between PHASE=RUN to a HELD job; common practice, no source
LEASE_SECONDS = 60.0          # a driver renews its lease at least this often
UNREACHABLE_SLICES = 3        # with a timeout: consecutive failed slices before wait() gives up
SEND_TRIES = 3                # tries to create a job before its record ends UNREACHED
RETRY_PAUSE = 5.0             # seconds before the 2nd try of an unreachable service, doubling
RETRY_PAUSE_MAX = 60.0        # ... up to this (common practice, no source)
FAILED = frozenset({phases.ERROR, phases.ABORTED, phases.LOST, phases.ARCHIVED,
                    phases.UNREACHED})


def default_root() -> Path:
    return Path(os.environ.get("JOBDESK_HOME") or platformdirs.user_cache_dir("jobdesk"))


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
                 wait_window: int = 30, attempts: int = 5, timeout: float = 30.0,
                 send_tries: int = SEND_TRIES):
        self.root = Path(root) if root is not None else default_root()
        self.root.mkdir(parents=True, exist_ok=True)
        self.index = Index(self.root / "index.sqlite")
        self.store = Store(self.root)
        self.store.clean_temp()
        self.session = session
        self.scope = scope
        self.limits = {keys.service_id(k): v for k, v in (limits or {}).items()}
        self.owner = this_process()
        # How many times creating a job may fail for want of an answer before the record ends
        # UNREACHED (each try is itself ``attempts`` HTTP tries).
        self.send_tries = max(1, int(send_tries))
        self._remote_options = {"wait_window": wait_window, "attempts": attempts,
                                "timeout": timeout}
        # Waiting goes in slices of one WAIT window (plus a second, so the window's own read
        # fits), renewing the lease between them; the last status read carries over.
        self.drive_slice = wait_window + 1.0
        self._last_status: dict[str, object] = {}
        self._held_run: dict[str, float] = {}   # job URL -> when RUN was last sent to it HELD
        self._sessions: dict[str, object] = {}
        self.groups = GroupCaches(groups, root=self.root)  # lookup order: personal, then these

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
                if made is not None and rows_given.get(upload) in (None, made.get("rows")):
                    depends[upload] = made["id"]
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

        def reuse(record: dict) -> bool:
            if refresh or record["phase"] in FAILED:
                return False
            if record["phase"] == phases.COMPLETED and record.get("parquet_sha256"):
                fresh = oldest is None or (record.get("finished") or 0) >= oldest
                here = (self.store.has(record["parquet_sha256"])
                        or record.get("layer") in self.groups.names)  # copied on first use
                return fresh and here
            return True  # still running somewhere: share it

        known = None if refresh else self.index.find(key, reuse=reuse)
        if known is not None and self._copied_here(known):  # the fast path: no parse, no lock
            _warn_not_repeatable(known.get("warnings") or ())
            return Job(self, known["id"], known)
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
        if not created and not self._copied_here(record):
            record, created = self.index.claim(key, fields, reuse=reuse)
        job = Job(self, record["id"])
        if created:
            if not publish and self.groups:
                self.groups.opt_out(record["id"])
            if refresh or not self._from_groups(record, oldest):
                self._try_start(record)
        return job

    # --- browsing -----------------------------------------------------------------------------

    def jobs(self, *, phase=None, service=None, text=None, limit: int | None = 50,
             offset: int = 0) -> list["Job"]:
        """Job records, newest first, filtered by phase(s), service URL and free text."""
        return [Job(self, r["id"], r) for r in self.records(
            phase=phase, service=service, text=text, limit=limit, offset=offset)]

    def records(self, *, phase=None, service=None, text=None, limit: int | None = 50,
                offset: int = 0, sort: str = "created", notebook: str | None = None,
                analysis: str | None = None) -> list[dict]:
        """A page of job records as plain dicts, read in one index query (a ``Job`` reads its
        record again on every property, which a list of many jobs cannot afford).

        ``sort`` is one of ``index.SORTS``; ``notebook=""`` / ``analysis=""`` pick the jobs
        with none."""
        service = keys.service_id(service) if service else None
        return self.index.list(phase=phase, service=service, text=text, limit=limit,
                               offset=offset, sort=sort, notebook=notebook, analysis=analysis)

    def count(self, *, phase=None, service=None, text=None, notebook: str | None = None,
              analysis: str | None = None) -> int:
        """How many records the same filters as :meth:`records` select (one count query)."""
        service = keys.service_id(service) if service else None
        return self.index.count(phase=phase, service=service, text=text, notebook=notebook,
                                analysis=analysis)

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
        record = self.job(job_id).record
        if record["phase"] in phases.TERMINAL:
            return Job(self, job_id, record)
        if record.get("job_url"):
            remote = self._remote(record["service"])
            # Said first, so a process driving the job reads the abort as the user's own.
            self.index.update(job_id, error=USER_ABORT)
            try:
                remote.abort(record["job_url"])
            except BaseException:
                self.index.update(job_id, error=record.get("error"))
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
        old = self.job(job_id).record
        if old["phase"] not in FAILED:
            return Job(self, job_id, old)
        new_id = uuid.uuid4().hex[:16]
        fields = {name: old.get(name) for name in (
            "service", "adql", "canonical", "maxrec", "fmt", "label", "scope", "uploads",
            "warnings", "notebook", "user", "host")}
        fields.update(id=new_id, phase=phases.UNSENT, run_id=f"jobdesk-{new_id}",
                      layer="personal", requests=0)
        record, created = self.index.claim(
            old["key"], fields, reuse=lambda r: r["phase"] in phases.ACTIVE)
        if created:
            self.index.update(job_id, note=f"sent again as {new_id}")
            try:
                self._try_start(record)
            except JobdeskError as exc:
                if not _transient(exc):
                    raise
        return Job(self, record["id"])

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
        record = self.job(job_id).record
        if not self._copied_here(record):
            raise CacheCorrupt(f"job {job_id}: its result is not in this cache")
        name, rel = self.groups.publish(record, self.store, group=group)
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
        caps = self._capabilities(sid)
        output = caps.get("output_limit") or {}
        if fmt is None:
            fmt = formats.choose(self._capabilities(sid, output_formats=True))
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
        result = compare_files(old._result_path(False), new._result_path(False), key=key,
                               tolerance=tolerance)
        result.old = {"job": old.id, "provenance": old.provenance()}
        result.new = {"job": new.id, "provenance": new.provenance()}
        return result

    # --- group caches (see jobdesk.groups) ------------------------------------------------------

    def _from_groups(self, record: dict, oldest: float | None) -> bool:
        """After a personal miss: take the result from the first group cache that has it, or
        join a colleague's running job announced there. True when no new job is needed."""
        if not self.groups or not self.index.take_lease(record["id"], self.owner, LEASE_SECONDS):
            return False
        try:
            served = self.groups.serve(record["key"], self.store, oldest=oldest)
            if served is not None:
                self._record_served(record["id"], served)
                return True
            running = self.groups.running_elsewhere(record["key"])
            if running is not None and running[1]["service"] == record["service"]:
                layer, claim = running
                self.index.update(record["id"], job_url=claim["job_url"],
                                  phase=phases.SUBMITTED, submitted=time.time(),
                                  note=f"joined the job {claim['claimant']} runs, announced in "
                                       f"group cache {layer.name}")
                return True
            return False
        finally:
            self.index.release(record["id"], self.owner)

    def _record_served(self, job_id: str, served) -> None:
        m = served.manifest
        (raw_sha, raw_path), (table_sha, table_path) = (served.copies["votable"],
                                                        served.copies["parquet"])
        self.groups.remember(job_id, served)
        self.index.update(job_id, phase=phases.COMPLETED, layer=served.layer.name,
                          job_url=m.get("job_url"), rows=m["rows"], truncated=0,
                          result_sha256=raw_sha, result_bytes=m["objects"]["votable"]["bytes"],
                          result_stat=stat_stamp(raw_path), parquet_sha256=table_sha,
                          parquet_stat=stat_stamp(table_path), server=m.get("server") or {},
                          submitted=m.get("submitted"),
                          finished=m.get("finished") or m["published_unix"], note=served.account)

    def _copied_here(self, record: dict) -> bool:
        """Whether a finished record's files are in the personal store; a record listed from a
        group cache (``jobdesk group add-to-index``) gets them now, verified, or is marked LOST."""
        if (record["phase"] != phases.COMPLETED or not record.get("parquet_sha256")
                or record.get("layer") in (None, "personal")
                or self.store.has(record["parquet_sha256"])):
            return True
        if record["layer"] not in self.groups.names:
            return False  # that group is not configured on this desk: nothing to judge it by
        served = self.groups.layer(record["layer"]).serve(record["key"], self.store)
        if served is not None:
            self._record_served(record["id"], served)
            return True
        self.index.update(record["id"], phase=phases.LOST, parquet_sha256=None,
                          error=f"group cache {record['layer']} no longer has a good copy",
                          note="group copy unusable")
        return False

    def _publish_quietly(self, job_id: str) -> None:
        """Publish a fresh complete result unless opted out; a failure only warns."""
        if not any(not layer.readonly for layer in self.groups.layers) \
                or self.groups.opted_out(job_id):
            return
        record = self.index.get(job_id)
        if record.get("scope") == "authenticated":
            return  # results seen with credentials stay personal unless scope= names a group
        try:
            self.groups.publish(record, self.store)
        except (JobdeskError, OSError) as exc:
            warnings.warn(GroupCacheWarning(f"job {job_id}: the result stays personal, "
                                            f"publishing failed: {exc}"), stacklevel=4)

    def _announce(self, job_id: str) -> None:
        """Keep this job's claim in the group cache fresh while it runs; drop it after."""
        if self.groups:
            record = self.index.get(job_id)
            if record is not None:
                self.groups.heartbeat(record, running=record["phase"] in phases.ACTIVE)

    def step(self, *, owner: str | None = None, service: str | None = None) -> int:
        """Advance every job no live process is driving, once, without blocking; return count.

        The Jupyter server's poller calls this so that jobs whose kernel died still finish;
        a job waiting for a free slot calls it for its service, so the slot frees even when
        the job holding it has no waiter of its own.
        """
        owner = owner or self.owner
        advanced = 0
        for record in self.index.unfinished(service=service):
            if (record.get("next_try") or 0) > time.time():
                continue  # the service was unreachable; its next try is not due yet
            try:
                if record["phase"] == phases.UNSENT:
                    advanced += self._try_start(record, owner=owner)["phase"] != phases.UNSENT
                elif self.index.take_lease(record["id"], owner, LEASE_SECONDS):
                    try:
                        self._drive(record, deadline=None, once=True)
                        advanced += 1
                    finally:
                        self.index.release(record["id"], owner)
            except JobdeskError:
                continue  # recorded on the job; the next pass tries again where it makes sense
        return advanced

    # --- the work -----------------------------------------------------------------------------

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

    def _try_start(self, record: dict, *, owner: str | None = None) -> dict:
        """Create an UNSENT job on its service if the per-service limit lets it start now."""
        owner = owner or self.owner
        job_id = record["id"]
        limit = self.limits.get(record["service"], DEFAULT_RUNNING_LIMIT)
        if not self.index.claim_start(job_id, limit=limit, owner=owner, seconds=LEASE_SECONDS):
            return self.index.get(job_id) or record
        remote = self._remote(record["service"])
        try:
            job_url = self._find_orphan(record, remote) if record.get("intent") else None
            if job_url is None:
                self.index.update(job_id, intent=time.time())
                sent = {name: self.store.path(sha).read_bytes()
                        for name, sha in (record.get("uploads") or {}).items()}
                fmt = record.get("fmt") or record.get("result_fmt") or \
                    formats.choose(self._capabilities(record["service"], output_formats=True))

                def create(fmt: str) -> str:
                    self.index.update(job_id, result_fmt=fmt)
                    return remote.create(record["adql"], maxrec=record.get("maxrec"), fmt=fmt,
                                         uploads=sent or None, run_id=record["run_id"])
                try:
                    job_url = create(fmt)
                except JobdeskError as exc:
                    if _transient(exc) or not formats.blames_format(str(exc), fmt) or \
                            not self._may_fall_back(record, fmt, str(exc)):
                        raise
                    job_url = create(formats.DEFAULT)
                self.index.update(job_id, job_url=job_url, phase=phases.SUBMITTED,
                                  submitted=time.time(), error=None, note="created on the service",
                                  **_REACHED)
                remote.run(job_url)
                self._announce(job_id)
            else:
                self.index.update(job_id, job_url=job_url, phase=phases.SUBMITTED,
                                  submitted=time.time(), error=None,
                                  note="re-attached after a crash", **_REACHED)
                if remote.status(job_url).phase == phases.PENDING:
                    remote.run(job_url)
        except JobdeskError as exc:
            fresh = self.index.get(job_id) or record
            if _transient(exc) and fresh.get("job_url"):
                self._unreachable(fresh, exc)  # created, only RUN went unanswered
            elif _transient(exc):
                # The service may hold the job (only its answer was lost) or be down a while:
                # the record stays UNSENT, so the next wait, submit or poller pass finds the
                # job by its RUNID (or starts it) instead of making a second one; after
                # ``send_tries`` tries it ends UNREACHED, saying why.
                tries = (fresh.get("send_tries") or 0) + 1
                if tries >= self.send_tries:
                    since = fresh.get("unreachable_since") or time.time()
                    self.index.update(
                        job_id, phase=phases.UNREACHED, finished=time.time(), send_tries=tries,
                        error=f"the service could not be reached in {tries} tries over "
                              f"{_seconds_text(time.time() - since)}: {exc.message}",
                        last_error=exc.message, error_detail=exc.detail, next_try=None,
                        note="never reached the service; no job exists there")
                else:
                    self._unreachable(fresh, exc, send_tries=tries)
            else:
                self.index.update(job_id, phase=phases.ERROR, error=str(exc),
                                  error_detail=exc.detail, finished=time.time(),
                                  note="could not create the job")
            raise
        finally:
            self.index.update(job_id, requests_add=remote.requests)
            self.index.release(job_id, owner)
        return self.index.get(job_id)

    def _unreachable(self, record: dict, exc: JobdeskError, **fields) -> dict:
        """Record that the service did not answer: since when, why, and when the next try is."""
        now = time.time()
        since = record.get("unreachable_since") or now
        tries = fields.get("send_tries") or record.get("send_tries") or 1
        pause = min(RETRY_PAUSE * 2 ** max(0, tries - 1), RETRY_PAUSE_MAX)
        return self.index.update(record["id"], unreachable_since=since, last_error=exc.message,
                                 error_detail=exc.detail, next_try=now + pause,
                                 error=str(exc), note=None, **fields)

    def _find_orphan(self, record: dict, remote: Remote) -> str | None:
        """The server job a killed process created but never recorded, if the service has it."""
        after = provenance.iso(record["intent"] - 120)
        found = remote.find(run_id=record["run_id"], after=after, adql=record["adql"])
        return found[0] if found else None

    def _drive(self, record: dict, *, deadline: float | None, once: bool = False,
               on_status=None, on_transfer=None) -> dict:
        """Wait on the service (up to ``deadline``) and fetch the result once it is COMPLETED;
        ``on_transfer(done_bytes, total_bytes_or_None)`` follows the download."""
        job_id = record["id"]
        remote = self._remote(record["service"])

        ran = False

        def trouble(exc) -> None:
            if isinstance(exc, ServiceUnreachable):
                record.update(self._unreachable(self.index.get(job_id) or record, exc))
                if on_status:
                    on_status(None)

        def seen(status) -> None:
            nonlocal ran
            if record.get("unreachable_since"):
                self.index.update(job_id, **_REACHED)
                record.update(_REACHED)
            if status.phase == phases.PENDING and not ran:
                ran = True  # created, but its RUN was lost or never sent (a crash in between)
                remote.run(record["job_url"])
            fields = {"phase": status.phase}
            began = _unix(status.start_time)
            if began is not None and record.get("started") != began:
                fields["started"] = record["started"] = began    # the service's own startTime
            elif status.phase == phases.EXECUTING and not record.get("started"):
                fields["started"] = record["started"] = time.time()
            for name, value in (("service_started", status.start_time),
                                ("service_finished", status.end_time)):
                when = _unix(value)
                if when is not None and record.get(name) != when:
                    fields[name] = record[name] = when
            if status.phase != record["phase"] or len(fields) > 1:
                self.index.update(job_id, **fields)
                record["phase"] = status.phase
            last_run = self._held_run.get(record["job_url"], 0.0)
            if status.phase == phases.HELD and time.monotonic() - last_run >= HELD_RETRY \
                    and self._slot_free(record):
                # UWS 1.1 §2.1.3: HELD waits for the client to send PHASE=RUN again. A HELD job
                # (recorded as such just above) holds no per-service slot, so it is re-run only
                # when one is free.
                self._held_run[record["job_url"]] = time.monotonic()
                remote.run(record["job_url"])
            if on_status:
                on_status(status)

        try:
            if once or record["phase"] == phases.COMPLETED:
                status = remote.status(record["job_url"])
                seen(status)
            else:
                status = remote.wait(record["job_url"], deadline=deadline, on_status=seen,
                                     known=self._last_status.get(record["job_url"]),
                                     on_trouble=trouble, expect=phases.QUEUED)
            self._last_status[record["job_url"]] = status
            if status.phase == phases.COMPLETED:
                self._fetch(record, status, remote, on_transfer=on_transfer)
            elif status.phase == phases.ERROR:
                message = status.error_summary or ""
                try:
                    detail = remote.error_detail(record["job_url"])
                except JobdeskError:
                    detail = ""
                message = detail or message or "the service reported ERROR without a message"
                fmt = record.get("result_fmt")
                if not (formats.blames_format(message, fmt)
                        and self._may_fall_back(record, fmt, message, again=True)):
                    self.index.update(job_id, phase=phases.ERROR, error=message,
                                      finished=time.time())
            elif status.phase in (phases.ABORTED, phases.ARCHIVED) and not (
                    status.phase == phases.ABORTED
                    and (self.index.get(job_id) or {}).get("error") == USER_ABORT):
                # (an abort from this desk has already said so, in its own words)
                self.index.update(job_id, phase=status.phase, finished=time.time(),
                                  error=status.error_summary or f"the job is {status.phase}")
        except JobLost as exc:
            self.index.update(job_id, phase=phases.LOST, finished=time.time(), error=str(exc),
                              note="the service no longer knows the job")
        except ServiceUnreachable as exc:
            self._unreachable(self.index.get(job_id) or record, exc)
            raise
        finally:
            self.index.update(job_id, requests_add=remote.requests)
            self._announce(job_id)
        return self.index.get(job_id)

    def _slot_free(self, record: dict) -> bool:
        """Whether the per-service limit lets one more of this desk's jobs run now."""
        limit = self.limits.get(record["service"], DEFAULT_RUNNING_LIMIT)
        return self.index.count(phase=sorted(phases.RUNNING), service=record["service"]) < limit

    def _may_fall_back(self, record: dict, fmt: str | None, why: str, *,
                       again: bool = False) -> bool:
        """Once per job, when the service failed on a format jobdesk chose (not the user): note
        it and go on with the default; ``again`` sends the job back to be created anew."""
        if record.get("fmt") or not fmt or fmt == formats.DEFAULT:
            return False
        note = (f"the service failed with RESPONSEFORMAT={fmt} ({why[:200]}); "
                f"retrying once with {formats.DEFAULT}")
        if again:
            # a RUNID of its own, so that orphan recovery never finds the failed job instead
            self.index.update(record["id"], phase=phases.UNSENT, job_url=None, intent=None,
                              run_id=f"{record['run_id']}-default", result_fmt=formats.DEFAULT,
                              error=None, note=note)
        else:
            self.index.update(record["id"], result_fmt=formats.DEFAULT, note=note)
        record["result_fmt"] = formats.DEFAULT
        return True

    def _capabilities(self, service: str, *, output_formats: bool = False) -> dict:
        """The service's VOSI capabilities, read once per service and kept in the index.

        Read through its own Remote so the request is not charged to the job; a failure is
        recorded in the answer and read again next time, never failing the job.
        """
        known = self.index.service_info(service)
        if known is not None and (not output_formats or "output_formats" in known):
            return known
        info = self._remote(service).capabilities()
        if "error" not in info:
            self.index.set_service_info(service, info)
        return info

    def _fetch(self, record: dict, status, remote: Remote, *, on_transfer=None) -> None:
        """Stream the result to disk, make the Parquet copy, register both atomically."""
        job_id = record["id"]
        url = status.result_url or record["job_url"].rstrip("/") + "/results/result"
        raw = self.store.temp(".vot")
        table = self.store.temp(".parquet")
        meter = FetchMeter(lambda fetch: self.index.update(job_id, fetch=fetch))
        try:
            def progress(done: int) -> None:
                meter.bytes(done)
                if on_transfer is not None:
                    on_transfer(done, meter.state["total"])
            got = remote.download(url, raw, on_size=meter.length, on_progress=progress)
            meta = {"jobdesk_key": record["key"], "service": record["service"],
                    "adql": record["adql"], "job_url": record["job_url"]}
            fmt = record.get("result_fmt") or record.get("fmt") or formats.DEFAULT
            if formats.is_csv(fmt):
                summary = results.csv_to_parquet(raw, table, metadata=meta)
            else:
                summary = _cache_copy(raw, table, meta, got.content_type, on_rows=meter.rows)
            if summary.status == "ERROR":
                self.index.update(job_id, phase=phases.ERROR, finished=time.time(),
                                  error=summary.message or "the result document says ERROR")
                return
            raw_sha, raw_path = self.store.commit(raw, got.sha256)
            table_sha, table_path = self.store.commit(table)
        except (ServiceResponseInvalid, BadServiceURL, JobFailed) as exc:
            # Not a result (an error document, broken or hostile bytes, an unusable link):
            # fetching again would meet the same answer, so the job ends here, saying why
            # (unless jobdesk chose the format: then once more with the default).
            if not self._may_fall_back(record, record.get("result_fmt"), exc.message, again=True):
                self.index.update(job_id, phase=phases.ERROR, finished=time.time(),
                                  error=f"job {job_id}: {_REFUSED}: {exc.message}",
                                  note="the result was refused")
            return
        finally:
            raw.unlink(missing_ok=True)
            table.unlink(missing_ok=True)
            if meter.state["bytes"]:
                meter.done()
        truncated = summary.status == "OVERFLOW"
        server = {k: v for k, v in summary.infos.items()
                  if k in ("server_software", "publisher", "request_date", "citation")}
        server["capabilities"] = self._capabilities(record["service"])
        # The service's own job times (UWS 1.1 §2.2.1), for the provenance's start and end.
        server.update({k: v for k, v in (("start_time", status.start_time),
                                         ("end_time", status.end_time)) if v})
        self.index.update(job_id, phase=phases.COMPLETED, finished=time.time(),
                          rows=summary.rows, truncated=int(truncated), result_sha256=raw_sha,
                          result_bytes=got.bytes, result_stat=stat_stamp(raw_path),
                          parquet_sha256=table_sha, parquet_stat=stat_stamp(table_path),
                          server=server, error=None, note="result saved",
                          result_fmt=record.get("result_fmt") or record.get("fmt")
                          or got.content_type)
        if not truncated:
            self._publish_quietly(job_id)
        if truncated:
            warnings.warn(ResultTruncatedWarning(
                f"job {job_id}: the result was truncated at {summary.rows} rows "
                f"(MAXREC={record.get('maxrec')}, or a service limit); it is incomplete"),
                stacklevel=3)


class Job:
    """A handle on one index record; every property reads the record afresh."""

    def __init__(self, desk: Desk, job_id: str, record: dict | None = None):
        self.desk = desk
        self.id = job_id
        self._record = record

    def __repr__(self) -> str:
        r = self.record
        rows = "" if r.get("rows") is None else f", rows={r['rows']}"
        cut = ", TRUNCATED" if r.get("truncated") else ""
        return f"<jobdesk.Job {self.id} {r['phase']}{rows}{cut} {self.title!r}>"

    # --- the record ---------------------------------------------------------------------------

    @property
    def record(self) -> dict:
        record = self.desk.index.get(self.id)
        if record is None:
            raise JobLost(f"job {self.id} was forgotten from this desk",
                          hint="submit the query again")
        self._record = record
        return record

    @property
    def key(self) -> str:
        return (self._record or self.record)["key"]

    @property
    def phase(self) -> str:
        return self.record["phase"]

    @property
    def rows(self) -> int | None:
        return self.record.get("rows")

    @property
    def truncated(self) -> bool | None:
        value = self.record.get("truncated")
        return None if value is None else bool(value)

    @property
    def title(self) -> str:
        r = self._record or self.record
        return r.get("label") or next((ln.strip() for ln in r["adql"].splitlines()
                                       if ln.strip()), "")

    @property
    def ready(self) -> bool:
        r = self.record
        return r["phase"] == phases.COMPLETED and bool(r.get("parquet_sha256"))

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
        record = self.record

        def show(phase: str | None = None) -> None:
            if display is not None:
                now = self.desk.index.get(self.id) or record
                # Another process may be fetching: show its figures from the index too.
                fetch = now.get("fetch") or {}
                if fetch.get("stage") == "download":
                    display.transfer(fetch.get("bytes") or 0, fetch.get("total"))
                note = unreachable_note(now) or (
                    transfer.describe(fetch) if fetch.get("stage") == "convert" else "")
                display.update(phase or now["phase"], time.monotonic() - t0, now.get("rows"),
                               note=note)
        try:
            while True:
                record = self.record
                show()
                if display is not None and display.cancelled \
                        and record["phase"] not in phases.TERMINAL:
                    self.desk.abort(self.id)
                    continue
                if record["phase"] == phases.COMPLETED and record.get("parquet_sha256"):
                    if display is not None and record.get("truncated"):
                        display.update(record["phase"], time.monotonic() - t0, record["rows"],
                                       note="truncated: not the full answer (MAXREC or a "
                                            "service limit)")
                    return self
                if record["phase"] == phases.ABORTED and record.get("error") == USER_ABORT:
                    print(f"jobdesk: job {self.id} was aborted at your request; it has no "
                          f"result (send it again with desk.resend({self.id!r}))")
                    return self
                if record["phase"] in FAILED:
                    raise self._failure(record)
                if deadline is not None and time.monotonic() >= deadline:
                    raise self._timeout(record, timeout)
                slice_end = time.monotonic() + self.desk.drive_slice
                if deadline is not None:
                    slice_end = min(slice_end, deadline)
                try:
                    if (record.get("next_try") or 0) > time.time():
                        _sleep_until(min(slice_end, time.monotonic() + record["next_try"]
                                         - time.time()), 1.0)  # ticks the note's countdown
                        continue
                    if record["phase"] == phases.UNSENT:
                        if self.desk._try_start(record)["phase"] == phases.UNSENT:
                            self.desk.step(service=record["service"])
                            _sleep_until(slice_end, 0.5)
                    elif self.desk.index.take_lease(self.id, self.desk.owner, LEASE_SECONDS):
                        try:
                            def shown(status):
                                show(status.phase if status is not None else None)
                            def fetched(done, total):
                                if display is not None:
                                    display.transfer(done, total)
                            self.desk._drive(record, deadline=slice_end, on_status=shown,
                                             on_transfer=fetched)
                        finally:
                            self.desk.index.release(self.id, self.desk.owner)
                    else:
                        _sleep_until(slice_end, 0.5)  # another process drives it: watch
                    unreachable = 0
                except ServiceUnreachable:
                    if self.record["phase"] in FAILED:
                        continue  # it ended UNREACHED: the loop says so
                    unreachable += 1
                    if deadline is not None and unreachable >= UNREACHABLE_SLICES:
                        raise
        finally:
            if display is not None:
                display.close(record["phase"])

    def _timeout(self, record: dict, timeout: float) -> WaitTimeout:
        since = record.get("unreachable_since")
        if since:
            return WaitTimeout(
                f"job {self.id}: the service has been unreachable for "
                f"{_seconds_text(time.time() - since)} ({record.get('last_error')}); the record "
                f"is still {record['phase']} and retries at the next wait",
                service=record["service"], detail=record.get("error_detail"))
        return WaitTimeout(f"job {self.id} is still {record['phase']} after {timeout:g} s",
                           service=record["service"])

    def failure(self) -> JobdeskError | None:
        """The error this job ended with (message, hint, detail), or None if it did not fail."""
        record = self.record
        if record["phase"] not in FAILED:
            return None
        return self._failure(record)

    def _failure(self, record: dict) -> JobdeskError:
        message = record.get("error") or f"job {self.id} ended in {record['phase']}"
        service = record["service"]
        if record["phase"] == phases.UNREACHED:
            return JobUnreached(f"job {self.id}: {message}", service=service,
                                detail=record.get("error_detail"))
        if record["phase"] == phases.ABORTED:
            return JobAborted(message, phase=phases.ABORTED, service=service)
        if record["phase"] in (phases.LOST, phases.ARCHIVED):
            return JobLost(f"job {self.id}: {message}", service=service)
        if _looks_like_query_error(message) and _REFUSED not in message:
            spot = query_checks.from_service(record["adql"], message)
            if spot is not None:
                return QueryRejected(f"{message}\n{spot.caret()}", findings=[spot],
                                     service=service)
            return QueryRejected(message, service=service)
        return JobFailed(message, phase=record["phase"], summary=record.get("error"),
                         service=service)

    # --- the result ---------------------------------------------------------------------------

    def _result_path(self, allow_truncated: bool) -> Path:
        r = self.record
        if not (r["phase"] == phases.COMPLETED and r.get("parquet_sha256")):
            if r["phase"] in FAILED:
                raise self._failure(r)
            raise ResultUnavailable(f"job {self.id} has no result yet (phase {r['phase']})")
        if r.get("truncated") and not allow_truncated:
            raise ResultTruncated(
                f"job {self.id}: the result was truncated at {r['rows']} rows "
                f"(MAXREC={r.get('maxrec')} or a service limit); it is not the full answer",
                rows=r.get("rows"), service=r["service"])
        if not self.desk._copied_here(r):  # listed from a group cache, not fetched yet
            raise CacheCorrupt(f"job {self.id}: its files are in group cache {r['layer']}, "
                               "which has no good copy or is not configured on this desk")
        r = self.record
        try:
            return self.desk.store.checked(r["parquet_sha256"], r.get("parquet_stat"))
        except CacheCorrupt:
            self.desk.index.update(self.id, phase=phases.LOST, parquet_sha256=None,
                                   error="cached file failed its checksum; resubmit",
                                   note="cache file corrupt")
            raise

    def table(self, *, allow_truncated: bool = False):
        """The result as an astropy Table (units, UCDs and descriptions kept)."""
        return results.load_table(self._result_path(allow_truncated))

    def frame(self, *, allow_truncated: bool = False):
        """The result as a pandas DataFrame (units and descriptions in ``.attrs``)."""
        return results.load_frame(self._result_path(allow_truncated))

    def provenance(self) -> dict:
        """Where this result came from, as a JSON-safe dict (see ``jobdesk.provenance``)."""
        r = self.record
        columns = []
        if r.get("parquet_sha256") and self.desk.store.has(r["parquet_sha256"]):
            columns = results.columns(self.desk.store.path(r["parquet_sha256"]))
        prov = provenance.build(r, self.desk.index.history(self.id), columns=columns)
        prov["tables"] = list(keys.canonical_adql(r["adql"]).tables)
        prov["lookup_order"] = ["personal", *self.desk.groups.names]
        if r.get("layer") not in (None, "personal"):
            prov["group"] = self.desk.groups.served_note(self.id)
            prov["served"] = (prov["group"] or {}).get("account") or f"group cache {r['layer']}"
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
        opt = "allow_truncated=True" if self.record.get("truncated") else ""
        return (f"from jobdesk import Desk\n\n"
                f"table = Desk({root}).job({self.id!r}).table({opt})  # {self.title[:60]}\n")

    def query_code(self) -> str:
        """Python that sends this record's query again, to edit in a notebook first."""
        r = self.record
        root = "" if self.desk.root == default_root() else repr(str(self.desk.root))
        options = "".join(f", {name}={r[name]!r}" for name in ("maxrec", "label")
                          if r.get(name) is not None)
        quoted = r["adql"].strip().replace("\\", "\\\\").replace('"""', '\\"\\"\\"')
        return (f"from jobdesk import Desk\n\n"
                f"job = Desk({root}).submit(\n    {r['service']!r},\n    \"\"\"\n{quoted}\n\"\"\"{options},\n"
                f"    refresh=True,\n)\njob.wait()\n")

    def preview(self, rows: int = 20) -> dict:
        """The first rows and the column descriptions, JSON-safe, without loading everything."""
        path = self._result_path(allow_truncated=True)
        return results.preview(path, rows=rows) | {"bytes": self.record.get("result_bytes")}


def _unix(text: str | None) -> float | None:
    """An ISO 8601 time from a job document as unix seconds; None when absent or unreadable."""
    if not text:
        return None
    try:
        moment = _dt.datetime.fromisoformat(text.strip().replace("Z", "+00:00"))
    except ValueError:
        return None
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=_dt.timezone.utc)   # UWS times are UTC (DALI 1.1 §3.3.3)
    return moment.timestamp()


USER_ABORT = "aborted from jobdesk"  # the error text of a job its user aborted
# Fields that end the "service unreachable" state once the service answers again.
_REACHED = {"unreachable_since": None, "last_error": None, "error_detail": None,
            "next_try": None, "send_tries": 0}


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
    text = f"service unreachable for {_seconds_text(now - since)}, retrying"
    if record.get("next_try"):
        text += f" (next try in {max(0, round(record['next_try'] - now))} s)"
    return text


def _seconds_text(seconds: float) -> str:
    from jobdesk.progress import format_elapsed
    return format_elapsed(seconds)


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


def _transient(exc: JobdeskError) -> bool:
    """Whether a failure may pass by itself: no answer at all, or HTTP 429 / 5xx."""
    status = getattr(exc, "status", None)
    return isinstance(exc, ServiceUnreachable) or (
        isinstance(exc, ServiceRefused) and status is not None and (status == 429 or status >= 500))


def _cache_copy(raw: Path, table: Path, meta: dict, content_type: str | None, *,
                on_rows=None):
    """The cache's Parquet copy of a result, by what the bytes are (the job may have been
    joined from another process, which chose the format); a Content-Type that says otherwise
    is refused rather than guessed at."""
    declared = formats.declared_serialization(content_type)
    if voparquet.is_parquet(raw):
        if "xml" in (content_type or "").lower():
            raise ServiceResponseInvalid(f"the answer declared {content_type} but holds Parquet")
        return voparquet.to_cache(raw, table, metadata=meta)
    summary = results.to_parquet(raw, table, metadata=meta, serialization=declared,
                                 on_rows=on_rows)
    if formats.is_voparquet(content_type) and summary.status != "ERROR":
        raise ServiceResponseInvalid(f"the answer declared {content_type} but holds XML")
    return summary


_REFUSED = "the result was refused"   # our words: never the service refusing the query


def _looks_like_query_error(message: str) -> bool:
    """Whether a job's error text is the service refusing the ADQL itself (common practice,
    no source: services word these differently; these fragments cover the usual ones)."""
    text = message.lower()
    return any(f in text for f in ("adql", "syntax", "parse", "column", "table", "unknown",
                                   "not found", "could not resolve", "no such"))

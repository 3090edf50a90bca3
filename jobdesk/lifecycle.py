"""The life of a job after it is recorded: start it on its service, drive it, fetch its result.

``Desk`` records a submission; from then on this module moves it along, in whichever process
holds its lease (a kernel's ``Job.wait``, the command line, the Jupyter server's poller):

- ``start``   creates an UNSENT job on the service when the per-service limit allows, finding
              the job a killed process created first (by RUNID) instead of making a second one;
- ``drive``   waits on the service (UWS 1.1 WAIT, or polling), re-runs HELD jobs when a slot is
              free, and on COMPLETED ``fetch``es the result into the store;
- ``advance`` one slice of that for a waiter, under the job's lease;
- ``step``    one non-blocking pass over every job no live process drives (the poller's);
- group caches: ``from_groups`` serves a miss from a colleague's result or running job,
  ``bring_here`` copies a result listed from a group cache into the personal store, and a
  finished complete result is published (unless opted out).

Each step leaves the index in a state any other process can carry on from.
"""

from __future__ import annotations

import datetime as _dt
import time
import warnings
from collections.abc import Callable
from pathlib import Path

from jobdesk import formats, phases, provenance, results, voparquet
from jobdesk.errors import (BadServiceURL, GroupCacheWarning, JobdeskError, JobFailed, JobLost,
                            ResultTruncatedWarning, ServiceRefused, ServiceResponseInvalid,
                            ServiceUnreachable)
from jobdesk.index import Index
from jobdesk.record import JobRecord
from jobdesk.remote import Remote
from jobdesk.store import Store, stat_stamp
from jobdesk.transfer import FetchMeter

HELD_RETRY = 5.0              # seconds between PHASE=RUN to a HELD job; common practice, no source
LEASE_SECONDS = 60.0          # a driver renews its lease at least this often
RETRY_PAUSE = 5.0             # seconds before the 2nd try of an unreachable service, doubling
RETRY_PAUSE_MAX = 60.0        # ... up to this (common practice, no source)
FAILED = phases.FAILED
USER_ABORT = "aborted from jobdesk"  # the error text of a job its user aborted
REFUSED = "the result was refused"   # our words: never the service refusing the query
# Fields that end the "service unreachable" state once the service answers again.
REACHED = {"unreachable_since": None, "last_error": None, "error_detail": None,
           "next_try": None, "send_tries": 0}


class Lifecycle:
    """Moves the jobs of one desk through their phases; the only code that talks to services
    about a job once it is recorded."""

    def __init__(self, index: Index, store: Store, groups, *, remote: Callable[[str], Remote],
                 owner: str, limit_for: Callable[[str], int], send_tries: int):
        self.index = index
        self.store = store
        self.groups = groups
        self.remote = remote          # service id -> a Remote with that service's session
        self.owner = owner
        self.limit_for = limit_for    # service id -> how many of its jobs may run at once
        self.send_tries = max(1, int(send_tries))
        self._last_status: dict[str, object] = {}   # job URL -> last JobStatus, across slices
        self._held_run: dict[str, float] = {}       # job URL -> when RUN was last sent HELD

    # --- starting -----------------------------------------------------------------------------

    def start(self, record: JobRecord, *, owner: str | None = None) -> JobRecord:
        """Create an UNSENT job on its service if the per-service limit lets it start now;
        the record as it is afterwards. Raises what creating it raised (the record says why)."""
        owner = owner or self.owner
        job_id = record.id
        if not self.index.claim_start(job_id, limit=self.limit_for(record.service), owner=owner,
                                      seconds=LEASE_SECONDS):
            return self.index.get(job_id) or record
        remote = self.remote(record.service)
        try:
            job_url = self._find_orphan(record, remote) if record.intent else None
            if job_url is None:
                fmt = record.fmt or record.result_fmt or \
                    formats.choose(self.capabilities(record.service, output_formats=True))
                self.index.update(job_id, intent=time.time(), result_fmt=fmt)
                sent = {name: self.store.path(sha).read_bytes()
                        for name, sha in record.uploads.items()}

                def create(fmt: str) -> str:
                    return remote.create(record.adql, maxrec=record.maxrec, fmt=fmt,
                                         uploads=sent or None, run_id=record.run_id)
                try:
                    job_url = create(fmt)
                except JobdeskError as exc:
                    if transient(exc) or not formats.blames_format(str(exc), fmt) or \
                            not self._may_fall_back(record, fmt, str(exc)):
                        raise
                    job_url = create(formats.DEFAULT)
                self.index.update(job_id, job_url=job_url, phase=phases.SUBMITTED,
                                  submitted=time.time(), error=None, note="created on the service",
                                  **REACHED)
                remote.run(job_url)
                self._announce(job_id)
            else:
                self.index.update(job_id, job_url=job_url, phase=phases.SUBMITTED,
                                  submitted=time.time(), error=None,
                                  note="re-attached after a crash", **REACHED)
                if remote.status(job_url).phase == phases.PENDING:
                    remote.run(job_url)
        except JobdeskError as exc:
            self._not_started(self.index.get(job_id) or record, exc)
            raise
        finally:
            self.index.release(job_id, owner, requests_add=remote.requests)
        return self.index.get(job_id)

    def _not_started(self, record: JobRecord, exc: JobdeskError) -> None:
        """Record why creating or starting a job failed, and what happens next."""
        if transient(exc) and record.job_url:
            self._unreachable(record, exc)  # created, only RUN went unanswered
        elif transient(exc):
            # The service may hold the job (only its answer was lost) or be down a while: the
            # record stays UNSENT, so the next wait, submit or poller pass finds the job by its
            # RUNID (or starts it) instead of making a second one; after ``send_tries`` tries
            # it ends UNREACHED, saying why.
            tries = (record.send_tries or 0) + 1
            if tries >= self.send_tries:
                since = record.unreachable_since or time.time()
                self.index.update(
                    record.id, phase=phases.UNREACHED, finished=time.time(), send_tries=tries,
                    error=f"the service could not be reached in {tries} tries over "
                          f"{seconds_text(time.time() - since)}: {exc.message}",
                    last_error=exc.message, error_detail=exc.detail, next_try=None,
                    note="never reached the service; no job exists there")
            else:
                self._unreachable(record, exc, send_tries=tries)
        else:
            self.index.update(record.id, phase=phases.ERROR, error=str(exc),
                              error_detail=exc.detail, finished=time.time(),
                              note="could not create the job")

    def _unreachable(self, record: JobRecord, exc: JobdeskError, **fields) -> JobRecord:
        """Record that the service did not answer: since when, why, and when the next try is."""
        now = time.time()
        tries = fields.get("send_tries") or record.send_tries or 1
        pause = min(RETRY_PAUSE * 2 ** max(0, tries - 1), RETRY_PAUSE_MAX)
        return self.index.update(record.id, unreachable_since=record.unreachable_since or now,
                                 last_error=exc.message, error_detail=exc.detail,
                                 next_try=now + pause, error=str(exc), note=None, **fields)

    def _find_orphan(self, record: JobRecord, remote: Remote) -> str | None:
        """The server job a killed process created but never recorded, if the service has it."""
        after = provenance.iso(record.intent - 120)
        found = remote.find(run_id=record.run_id, after=after, adql=record.adql)
        return found[0] if found else None

    def slot_free(self, service: str) -> bool:
        """Whether the per-service limit lets one more of this desk's jobs run now."""
        return self.index.count(phase=sorted(phases.RUNNING), service=service) \
            < self.limit_for(service)

    # --- driving ------------------------------------------------------------------------------

    def advance(self, record: JobRecord, *, until: float, on_status=None,
                on_transfer=None) -> bool:
        """One slice of waiting for a waiter (``until`` on the monotonic clock): start the job
        if it is UNSENT, else drive it under its lease. False when nothing could be done now
        (no free slot, or another process drives it): the caller watches the index instead.
        Raises ``ServiceUnreachable`` when the service did not answer (the record says so)."""
        if record.phase == phases.UNSENT:
            if self.start(record).phase != phases.UNSENT:
                return True
            self.step(service=record.service)   # frees slots whose jobs have no waiter
            return False
        if not self.index.take_lease(record.id, self.owner, LEASE_SECONDS):
            return False
        remote = self.remote(record.service)
        try:
            self.drive(record, remote, deadline=until, on_status=on_status,
                       on_transfer=on_transfer)
        finally:
            self.index.release(record.id, self.owner, requests_add=remote.requests)
        return True

    def step(self, *, owner: str | None = None, service: str | None = None) -> int:
        """Advance every job no live process is driving, once, without blocking; return count.

        The Jupyter server's poller calls this so that jobs whose kernel died still finish;
        a job waiting for a free slot calls it for its service, so the slot frees even when
        the job holding it has no waiter of its own.
        """
        owner = owner or self.owner
        advanced = 0
        for record in self.index.unfinished(service=service):
            if (record.next_try or 0) > time.time():
                continue  # the service was unreachable; its next try is not due yet
            try:
                if record.phase == phases.UNSENT:
                    advanced += self.start(record, owner=owner).phase != phases.UNSENT
                elif self.index.take_lease(record.id, owner, LEASE_SECONDS):
                    remote = self.remote(record.service)
                    try:
                        self.drive(record, remote, deadline=None, once=True)
                        advanced += 1
                    finally:
                        self.index.release(record.id, owner, requests_add=remote.requests)
            except JobdeskError:
                continue  # recorded on the job; the next pass tries again where it makes sense
        return advanced

    def drive(self, record: JobRecord, remote: Remote, *, deadline: float | None,
              once: bool = False, on_status=None, on_transfer=None) -> JobRecord:
        """Wait on the service (up to ``deadline``, monotonic) and fetch the result once it is
        COMPLETED; ``on_transfer(done_bytes, total_bytes_or_None)`` follows the download.
        The caller holds the job's lease, and adds ``remote.requests`` when it releases it."""
        job_id = record.id
        ran = False

        def trouble(exc) -> None:
            nonlocal record
            if isinstance(exc, ServiceUnreachable):
                record = self._unreachable(self.index.get(job_id) or record, exc)
                if on_status:
                    on_status(None)

        def seen(status) -> None:
            nonlocal ran, record
            fields = {}
            if record.unreachable_since:
                fields.update(REACHED)
            if status.phase == phases.PENDING and not ran:
                ran = True  # created, but its RUN was lost or never sent (a crash in between)
                remote.run(record.job_url)
            began = unix(status.start_time)
            if began is not None and record.started != began:
                fields["started"] = began                   # the service's own startTime
            elif status.phase == phases.EXECUTING and not record.started:
                fields["started"] = time.time()
            for name, value in (("service_started", status.start_time),
                                ("service_finished", status.end_time)):
                when = unix(value)
                if when is not None and getattr(record, name) != when:
                    fields[name] = when
            if status.phase != record.phase or fields:
                record = self.index.update(job_id, phase=status.phase, **fields)
            last_run = self._held_run.get(record.job_url, 0.0)
            if status.phase == phases.HELD and time.monotonic() - last_run >= HELD_RETRY \
                    and self.slot_free(record.service):
                # UWS 1.1 §2.1.3: HELD waits for the client to send PHASE=RUN again. A HELD job
                # (recorded as such just above) holds no per-service slot, so it is re-run only
                # when one is free.
                self._held_run[record.job_url] = time.monotonic()
                remote.run(record.job_url)
            if on_status:
                on_status(status)

        try:
            if once or record.phase == phases.COMPLETED:
                status = remote.status(record.job_url)
                seen(status)
            else:
                status = remote.wait(record.job_url, deadline=deadline, on_status=seen,
                                     known=self._last_status.get(record.job_url),
                                     on_trouble=trouble, expect=phases.QUEUED)
            self._last_status[record.job_url] = status
            if status.phase == phases.COMPLETED:
                self.fetch(record, status, remote, on_transfer=on_transfer)
            elif status.phase == phases.ERROR:
                self._failed_on_service(record, status, remote)
            elif status.phase in (phases.ABORTED, phases.ARCHIVED) and not (
                    status.phase == phases.ABORTED
                    and (self.index.get(job_id) or record).error == USER_ABORT):
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
            self._announce(job_id)
        return self.index.get(job_id)

    def _failed_on_service(self, record: JobRecord, status, remote: Remote) -> None:
        """The service says ERROR: keep its own message (from the error document if it has
        one), unless it failed on a format jobdesk chose: then once more with the default."""
        message = status.error_summary or ""
        try:
            detail = remote.error_detail(record.job_url)
        except JobdeskError:
            detail = ""
        message = detail or message or "the service reported ERROR without a message"
        fmt = record.result_fmt
        if not (formats.blames_format(message, fmt)
                and self._may_fall_back(record, fmt, message, again=True)):
            self.index.update(record.id, phase=phases.ERROR, error=message, finished=time.time())

    def _may_fall_back(self, record: JobRecord, fmt: str | None, why: str, *,
                       again: bool = False) -> bool:
        """Once per job, when the service failed on a format jobdesk chose (not the user): note
        it and go on with the default; ``again`` sends the job back to be created anew."""
        if record.fmt or not fmt or fmt == formats.DEFAULT:
            return False
        note = (f"the service failed with RESPONSEFORMAT={fmt} ({why[:200]}); "
                f"retrying once with {formats.DEFAULT}")
        if again:
            # a RUNID of its own, so that orphan recovery never finds the failed job instead
            self.index.update(record.id, phase=phases.UNSENT, job_url=None, intent=None,
                              run_id=f"{record.run_id}-default", result_fmt=formats.DEFAULT,
                              error=None, note=note)
        else:
            self.index.update(record.id, result_fmt=formats.DEFAULT, note=note)
        return True

    def capabilities(self, service: str, *, output_formats: bool = False) -> dict:
        """The service's VOSI capabilities, read once per service and kept in the index.

        Read through its own Remote so the request is not charged to a job; a failure is
        recorded in the answer and read again next time, never failing the job.
        """
        known = self.index.service_info(service)
        if known is not None and (not output_formats or "output_formats" in known):
            return known
        info = self.remote(service).capabilities()
        if "error" not in info:
            self.index.set_service_info(service, info)
        return info

    # --- fetching -----------------------------------------------------------------------------

    def fetch(self, record: JobRecord, status, remote: Remote, *, on_transfer=None) -> None:
        """Stream the result to disk, make the Parquet copy, register both atomically."""
        job_id = record.id
        url = status.result_url or record.job_url.rstrip("/") + "/results/result"
        raw = self.store.temp(".vot")
        table = self.store.temp(".parquet")
        meter = FetchMeter(lambda fetch: self.index.update(job_id, fetch=fetch))
        fmt = self.index.get(job_id).result_fmt or record.fmt   # a fall-back may have changed it
        try:
            def progress(done: int) -> None:
                meter.bytes(done)
                if on_transfer is not None:
                    on_transfer(done, meter.state["total"])
            got = remote.download(url, raw, on_size=meter.length, on_progress=progress)
            meta = {"jobdesk_key": record.key, "service": record.service,
                    "adql": record.adql, "job_url": record.job_url}
            if formats.is_csv(fmt or formats.DEFAULT):
                summary = results.csv_to_parquet(raw, table, metadata=meta)
            else:
                summary = cache_copy(raw, table, meta, got.content_type, on_rows=meter.rows)
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
            if not self._may_fall_back(record, fmt, exc.message, again=True):
                self.index.update(job_id, phase=phases.ERROR, finished=time.time(),
                                  error=f"job {job_id}: {REFUSED}: {exc.message}",
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
        server["capabilities"] = self.capabilities(record.service)
        # The service's own job times (UWS 1.1 §2.2.1), for the provenance's start and end.
        server.update({k: v for k, v in (("start_time", status.start_time),
                                         ("end_time", status.end_time)) if v})
        self.index.update(job_id, phase=phases.COMPLETED, finished=time.time(),
                          rows=summary.rows, truncated=truncated, result_sha256=raw_sha,
                          result_bytes=got.bytes, result_stat=stat_stamp(raw_path),
                          parquet_sha256=table_sha, parquet_stat=stat_stamp(table_path),
                          server=server, software=provenance.versions(), error=None,
                          note="result saved", result_fmt=fmt or got.content_type)
        if truncated:
            warnings.warn(ResultTruncatedWarning(
                f"job {job_id}: the result was truncated at {summary.rows} rows "
                f"(MAXREC={record.maxrec}, or a service limit); it is incomplete"),
                stacklevel=3)
        else:
            self._publish_quietly(job_id)

    # --- group caches (see jobdesk.groups) ----------------------------------------------------

    def from_groups(self, record: JobRecord, oldest: float | None) -> bool:
        """After a personal miss: take the result from the first group cache that has it, or
        join a colleague's running job announced there. True when no new job is needed."""
        if not self.groups or not self.index.take_lease(record.id, self.owner, LEASE_SECONDS):
            return False
        try:
            served = self.groups.serve(record.key, self.store, oldest=oldest)
            if served is not None:
                self._record_served(record.id, served)
                return True
            running = self.groups.running_elsewhere(record.key)
            if running is not None and running[1]["service"] == record.service:
                layer, claim = running
                self.index.update(record.id, job_url=claim["job_url"],
                                  phase=phases.SUBMITTED, submitted=time.time(),
                                  note=f"joined the job {claim['claimant']} runs, announced in "
                                       f"group cache {layer.name}")
                return True
            return False
        finally:
            self.index.release(record.id, self.owner)

    def _record_served(self, job_id: str, served) -> None:
        m = served.manifest
        (raw_sha, raw_path), (table_sha, table_path) = (served.copies["votable"],
                                                        served.copies["parquet"])
        self.groups.remember(job_id, served)
        self.index.update(job_id, phase=phases.COMPLETED, layer=served.layer.name,
                          job_url=m.get("job_url"), rows=m["rows"], truncated=False,
                          result_sha256=raw_sha, result_bytes=m["objects"]["votable"]["bytes"],
                          result_stat=stat_stamp(raw_path), parquet_sha256=table_sha,
                          parquet_stat=stat_stamp(table_path), server=m.get("server") or {},
                          software=m.get("software"), submitted=m.get("submitted"),
                          finished=m.get("finished") or m["published_unix"], note=served.account)

    def bring_here(self, record: JobRecord) -> bool:
        """Make sure a finished record's files are in the personal store: a record listed from
        a group cache (``jobdesk group add-to-index``) gets them copied now, verified, or is
        marked LOST. True when they are here (or the record has none to bring)."""
        if (not record.has_result or record.layer in (None, "personal")
                or self.store.has(record.parquet_sha256)):
            return True
        if record.layer not in self.groups.names:
            return False  # that group is not configured on this desk: nothing to judge it by
        served = self.groups.layer(record.layer).serve(record.key, self.store)
        if served is not None:
            self._record_served(record.id, served)
            return True
        self.index.update(record.id, phase=phases.LOST, parquet_sha256=None,
                          error=f"group cache {record.layer} no longer has a good copy",
                          note="group copy unusable")
        return False

    def _publish_quietly(self, job_id: str) -> None:
        """Publish a fresh complete result unless opted out; a failure only warns."""
        if not any(not layer.readonly for layer in self.groups.layers) \
                or self.groups.opted_out(job_id):
            return
        record = self.index.get(job_id)
        if record.scope == "authenticated":
            return  # results seen with credentials stay personal unless scope= names a group
        try:
            self.groups.publish(record.as_dict(), self.store)
        except (JobdeskError, OSError) as exc:
            warnings.warn(GroupCacheWarning(f"job {job_id}: the result stays personal, "
                                            f"publishing failed: {exc}"), stacklevel=4)

    def _announce(self, job_id: str) -> None:
        """Keep this job's claim in the group cache fresh while it runs; drop it after."""
        if self.groups:
            record = self.index.get(job_id)
            if record is not None:
                self.groups.heartbeat(record.as_dict(), running=record.phase in phases.ACTIVE)


def transient(exc: JobdeskError) -> bool:
    """Whether a failure may pass by itself: no answer at all, or HTTP 429 / 5xx."""
    status = getattr(exc, "status", None)
    return isinstance(exc, ServiceUnreachable) or (
        isinstance(exc, ServiceRefused) and status is not None and (status == 429 or status >= 500))


def unix(text: str | None) -> float | None:
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


def seconds_text(seconds: float) -> str:
    from jobdesk.progress import format_elapsed
    return format_elapsed(seconds)


def cache_copy(raw: Path, table: Path, meta: dict, content_type: str | None, *, on_rows=None):
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

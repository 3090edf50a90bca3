"""A small UWS 1.1 job service for the tests, written from the standard (IVOA REC 2016-10-24).

It is not jobdesk's embedded service: it exists to make the rarer parts of UWS happen on demand.
What a job does is chosen by a word in its QUERY parameter (the query text is never executed):

- ``hold``      the first PHASE=RUN puts the job in HELD (§2.1.3: "the job is HELD pending
                execution and will not automatically be executed"); the next RUN runs it
                (``hold_thrice``: the first three RUNs hold it)
- ``suspend``   EXECUTING, then SUSPENDED for a while, then EXECUTING again, then COMPLETED
- ``archive``   runs, then is ARCHIVED as it ends: results are gone (§2.1.3)
- ``unknown``   reads UNKNOWN for a moment before running (§2.1.3: "ask again")
- ``fail``      runs, then ERROR with an errorSummary and an error document at {job}/error
- ``cancelled`` runs, then the service itself aborts it (ABORTED)
- ``redirect``  the job URL answers 303 to the job's new home, whose result link is
                relative ("results/result"): it must be resolved against the new home
- ``relocate``  the result link points to another path that answers 302 to the bytes
- ``hostpath``  the result link is host-relative ("/files/<id>.vot")
- anything else runs PENDING -> QUEUED -> EXECUTING -> COMPLETED with an absolute link.

Every job's result is the document given to :class:`UwsServer` (the typed VOTable by default).
The job document carries version="1.1" and the elements of the UWS 1.1 schema in its order.
WAIT (§2.2.1.2) blocks while the phase is PENDING, QUEUED or EXECUTING, up to WAIT seconds,
capped at ``wait_cap`` (a server may return early).
"""

from __future__ import annotations

import threading
import time
import uuid
from datetime import datetime, timezone
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from urllib.parse import parse_qs, urlsplit
from xml.sax.saxutils import escape, quoteattr

UWS_NS = "http://www.ivoa.net/xml/UWS/v1.0"
XLINK_NS = "http://www.w3.org/1999/xlink"
STEP = 0.3                  # seconds each scripted phase lasts
ERROR_MESSAGE = "invented failure: the worker ran out of scratch space"
ACTIVE = ("PENDING", "QUEUED", "EXECUTING")


def _iso(ts: float | None) -> str | None:
    if ts is None:
        return None
    moment = datetime.fromtimestamp(ts, timezone.utc)
    return moment.strftime("%Y-%m-%dT%H:%M:%S.") + f"{moment.microsecond // 1000:03d}Z"


class _Job:
    def __init__(self, job_id: str, params: dict[str, str]):
        self.id = job_id
        self.params = params
        query = params.get("QUERY", "").lower()
        self.script = next((w for w in ("hold", "suspend", "archive", "unknown", "redirect",
                                        "relocate", "hostpath", "fail", "cancelled")
                            if w in query), "plain")
        self.created = time.time()
        self.runs: list[float] = []        # times PHASE=RUN arrived
        self.timeline: list[tuple[float, str]] = [(self.created, "PENDING")]
        self.started: float | None = None
        self.ended: float | None = None
        self.aborted = False

    def phase(self, now: float | None = None) -> str:
        now = time.time() if now is None else now
        current = "PENDING"
        for at, phase in self.timeline:
            if at <= now:
                current = phase
        return current

    def run(self) -> None:
        now = time.time()
        self.runs.append(now)
        if self.phase(now) not in ("PENDING", "HELD"):
            return                          # RUN again to a running job: no change
        holds = 3 if "hold_thrice" in self.params.get("QUERY", "").lower() else 1
        if self.script == "hold" and len(self.runs) <= holds:
            self.timeline = [(self.created, "PENDING"), (now, "QUEUED"), (now + STEP, "HELD")]
            return
        steps = ["QUEUED", "EXECUTING"]
        if self.script == "suspend":
            steps += ["SUSPENDED", "SUSPENDED", "EXECUTING"]
        if self.script == "unknown":
            steps = ["UNKNOWN", *steps]
        # "archive": the results are archived before the client could read them.
        steps.append({"archive": "ARCHIVED", "fail": "ERROR",
                      "cancelled": "ABORTED"}.get(self.script, "COMPLETED"))
        kept = [(at, p) for at, p in self.timeline if at <= now]
        self.timeline = kept + [(now + i * STEP, p) for i, p in enumerate(steps)]
        executing = [at for at, p in self.timeline if p == "EXECUTING"]
        self.started = executing[0] if executing else None
        done = [at for at, p in self.timeline
                if p in ("COMPLETED", "ARCHIVED", "ERROR", "ABORTED")]
        self.ended = done[0] if done else None

    def abort(self) -> None:
        now = time.time()
        if self.phase(now) in ("COMPLETED", "ERROR", "ABORTED", "ARCHIVED"):
            return
        self.timeline = [(at, p) for at, p in self.timeline if at <= now] + [(now, "ABORTED")]
        self.ended = now


class UwsServer:
    """Run the service on a free loopback port; use as a context manager."""

    def __init__(self, result: bytes, *, wait_cap: float = 5.0):
        self.result = result
        self.wait_cap = wait_cap
        self.jobs: dict[str, _Job] = {}
        self.log: list[tuple[str, str]] = []      # (method, path) of every request
        self.queries: list[dict[str, str]] = []   # the query parameters of every GET
        self._lock = threading.Lock()
        self._httpd = ThreadingHTTPServer(("127.0.0.1", 0), self._handler())
        self._httpd.daemon_threads = True
        self._thread = threading.Thread(target=self._httpd.serve_forever, daemon=True)

    @property
    def url(self) -> str:
        host, port = self._httpd.server_address[:2]
        return f"http://{host}:{port}/tap"

    def __enter__(self) -> UwsServer:
        self._thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self._httpd.shutdown()
        self._httpd.server_close()
        self._thread.join(timeout=5)

    def job_for(self, text: str) -> _Job:
        """The one job whose QUERY contains ``text``."""
        found = [j for j in self.jobs.values() if text in j.params.get("QUERY", "")]
        assert len(found) == 1, f"{len(found)} jobs hold {text!r}"
        return found[0]

    # --- documents ------------------------------------------------------------------------

    def job_document(self, job: _Job, home: str) -> bytes:
        phase = job.phase()
        parts = [f"<uws:jobId>{escape(job.id)}</uws:jobId>",
                 '<uws:runId xsi:nil="true"/>' if not job.params.get("RUNID") else
                 f"<uws:runId>{escape(job.params['RUNID'])}</uws:runId>",
                 '<uws:ownerId xsi:nil="true"/>',
                 f"<uws:phase>{phase}</uws:phase>",
                 '<uws:quote xsi:nil="true"/>',
                 f"<uws:creationTime>{_iso(job.created)}</uws:creationTime>"]
        started = job.started if job.started and job.started <= time.time() else None
        ended = job.ended if job.ended and job.ended <= time.time() else None
        parts.append(f"<uws:startTime>{_iso(started)}</uws:startTime>" if started
                     else '<uws:startTime xsi:nil="true"/>')
        parts.append(f"<uws:endTime>{_iso(ended)}</uws:endTime>" if ended
                     else '<uws:endTime xsi:nil="true"/>')
        parts.append("<uws:executionDuration>0</uws:executionDuration>")
        parts.append(f"<uws:destruction>{_iso(job.created + 86400)}</uws:destruction>")
        params = "".join(f"<uws:parameter id={quoteattr(k.lower())}>{escape(v)}</uws:parameter>"
                         for k, v in job.params.items())
        parts.append(f"<uws:parameters>{params}</uws:parameters>")
        links = ""
        if phase == "COMPLETED":
            href = {"redirect": "results/result",
                    "relocate": f"{self.url}/stash/{job.id}",
                    "hostpath": f"/files/{job.id}.vot"}.get(job.script,
                                                              f"{home}/results/result")
            links = (f'<uws:result id="result" xlink:type="simple" xlink:href={quoteattr(href)} '
                     f'mime-type="application/x-votable+xml" size="{len(self.result)}"/>')
        parts.append(f"<uws:results>{links}</uws:results>")
        if phase == "ERROR":
            parts.append('<uws:errorSummary type="fatal" hasDetail="true">'
                         f"<uws:message>{escape(ERROR_MESSAGE)}</uws:message></uws:errorSummary>")
        body = ('<?xml version="1.0" encoding="UTF-8"?>\n'
                f'<uws:job xmlns:uws="{UWS_NS}" xmlns:xlink="{XLINK_NS}" '
                'xmlns:xsi="http://www.w3.org/2001/XMLSchema-instance" version="1.1">'
                + "".join(parts) + "</uws:job>")
        return body.encode("utf-8")

    def job_list(self) -> bytes:
        refs = "".join(
            f'<uws:jobref id="{j.id}" xlink:href="{self.url}/async/{j.id}">'
            f"<uws:phase>{j.phase()}</uws:phase>"
            + (f"<uws:runId>{escape(j.params['RUNID'])}</uws:runId>" if j.params.get("RUNID")
               else "")
            + f"<uws:creationTime>{_iso(j.created)}</uws:creationTime></uws:jobref>"
            for j in self.jobs.values())
        return (f'<?xml version="1.0" encoding="UTF-8"?>\n<uws:jobs xmlns:uws="{UWS_NS}" '
                f'xmlns:xlink="{XLINK_NS}" version="1.1">{refs}</uws:jobs>').encode()

    # --- HTTP -----------------------------------------------------------------------------

    def _handler(self):
        server = self

        class Handler(BaseHTTPRequestHandler):
            protocol_version = "HTTP/1.1"

            def log_message(self, *args) -> None:
                pass

            def _send(self, status: int, body: bytes = b"", ctype: str = "text/xml",
                      headers: dict | None = None) -> None:
                self.send_response(status)
                self.send_header("Content-Type", ctype)
                self.send_header("Content-Length", str(len(body)))
                for k, v in (headers or {}).items():
                    self.send_header(k, v)
                self.end_headers()
                self.wfile.write(body)

            def _form(self) -> dict[str, str]:
                length = int(self.headers.get("Content-Length") or 0)
                raw = self.rfile.read(length).decode("utf-8") if length else ""
                # TAP/DALI: parameter names are case-insensitive (DALI 1.1 §3.1)
                return {k.upper(): v[-1] for k, v in parse_qs(raw, keep_blank_values=True).items()}

            def do_POST(self) -> None:
                path = urlsplit(self.path).path
                server.log.append(("POST", path))
                form = self._form()
                parts = path.split("/")
                with server._lock:
                    if path == "/tap/async":
                        job = _Job(uuid.uuid4().hex[:12], form)
                        server.jobs[job.id] = job
                        if form.get("PHASE", "").upper() == "RUN":
                            job.run()
                        self._send(303, headers={"Location": f"{server.url}/async/{job.id}"})
                        return
                    if len(parts) == 5 and parts[4] == "phase" and parts[3] in server.jobs:
                        job = server.jobs[parts[3]]
                        wanted = form.get("PHASE", "").upper()
                        if wanted == "RUN":
                            job.run()
                        elif wanted == "ABORT":
                            job.abort()
                        else:
                            self._send(400, b"PHASE must be RUN or ABORT", "text/plain")
                            return
                        self._send(303, headers={"Location": f"{server.url}/async/{job.id}"})
                        return
                self._send(404, b"no such resource", "text/plain")

            def do_GET(self) -> None:
                split = urlsplit(self.path)
                path = split.path
                server.log.append(("GET", path))
                query = {k.upper(): v[-1] for k, v in parse_qs(split.query).items()}
                server.queries.append(query)
                parts = path.strip("/").split("/")
                if path == "/tap/async":
                    self._send(200, server.job_list())
                    return
                if len(parts) >= 3 and parts[:2] in (["tap", "async"], ["tap", "moved"]):
                    job = server.jobs.get(parts[2])
                    if job is None:
                        self._send(404, b"no such job", "text/plain")
                        return
                    moved = parts[1] == "moved"
                    if job.script == "redirect" and not moved:
                        rest = "/".join(parts[3:])
                        target = f"{server.url}/moved/{job.id}/" + rest
                        qs = f"?{split.query}" if split.query else ""
                        self._send(303, headers={"Location": target + qs})
                        return
                    rest = parts[3:]
                    if rest in ([], [""]):
                        self._wait(job, query)
                        home = f"{server.url}/{'moved' if moved else 'async'}/{job.id}"
                        self._send(200, server.job_document(job, home))
                    elif rest == ["error"] and job.phase() == "ERROR":
                        # TAP 1.1 §4.4 / DALI 1.1 §4.4: the error document is a VOTable
                        self._send(200, (
                            '<?xml version="1.0" encoding="UTF-8"?><VOTABLE version="1.4" '
                            'xmlns="http://www.ivoa.net/xml/VOTable/v1.3"><RESOURCE type="results">'
                            f'<INFO name="QUERY_STATUS" value="ERROR">{escape(ERROR_MESSAGE)}'
                            "</INFO></RESOURCE></VOTABLE>").encode(), "application/x-votable+xml")
                    elif rest == ["phase"]:
                        self._send(200, job.phase().encode(), "text/plain")
                    elif rest == ["results", "result"] and job.phase() == "COMPLETED":
                        self._result()
                    else:
                        self._send(404, b"no such resource", "text/plain")
                    return
                if len(parts) == 3 and parts[:2] == ["tap", "stash"]:
                    self._send(302, headers={"Location": f"{server.url}/blob/{parts[2]}.vot"})
                    return
                if (len(parts) == 3 and parts[:2] == ["tap", "blob"]) or (
                        len(parts) == 2 and parts[0] == "files"):
                    job = server.jobs.get(parts[-1].removesuffix(".vot"))
                    if job is not None and job.phase() == "COMPLETED":
                        self._result()
                        return
                self._send(404, b"no such resource", "text/plain")

            def do_DELETE(self) -> None:
                path = urlsplit(self.path).path
                server.log.append(("DELETE", path))
                parts = path.strip("/").split("/")
                with server._lock:
                    if len(parts) == 3 and server.jobs.pop(parts[2], None) is not None:
                        self._send(303, headers={"Location": f"{server.url}/async"})
                        return
                self._send(404, b"no such job", "text/plain")

            def _result(self) -> None:
                self._send(200, server.result, "application/x-votable+xml")

            def _wait(self, job: _Job, query: dict[str, str]) -> None:
                """UWS 1.1 §2.2.1.2: block while active, up to WAIT seconds (capped)."""
                if "WAIT" not in query:
                    return
                try:
                    seconds = int(query["WAIT"])
                except ValueError:
                    return
                start_phase = job.phase()
                if start_phase not in ACTIVE:
                    return
                if query.get("PHASE") and query["PHASE"].upper() != start_phase:
                    return
                limit = server.wait_cap if seconds < 0 else min(seconds, server.wait_cap)
                end = time.time() + limit
                while time.time() < end and job.phase() == start_phase:
                    time.sleep(0.05)

        return Handler

"""Shared parts of the reliability suite: a fault-injecting HTTP proxy, consistency checks, figures.

The proxy is a real HTTP server on a loopback port that forwards to the embedded service and can,
for chosen requests, answer an error status, reset the TCP connection before or after the service
saw the request, cut a body after some bytes, or hold the exchange until the test lets it go.
It exists because some faults (a reset after the service acted, a 502 without ``Retry-After``)
are not settings of the service itself; being a real server, the client meets them exactly as it
would meet a flaky network or gateway.
"""

from __future__ import annotations

import contextlib
import http.client
import io
import json
import os
import re
import socket
import struct
import threading
import time
from dataclasses import dataclass, field
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from urllib.parse import urlsplit

from jobdesk.index import Index
from jobdesk.store import Store, sha256_file

FULL = os.environ.get("JOBDESK_RELIABILITY_FULL") == "1"
FIGURES_ENV = "JOBDESK_RELIABILITY_FIGURES"


# --- figures ------------------------------------------------------------------------------------


class Figures:
    """Counts what the suite tried and what held, appended as JSON lines for the report.

    Without ``JOBDESK_RELIABILITY_FIGURES`` the counts are only kept in memory (a plain pytest
    run); ``python -m tests.reliability_report`` sets it and adds the lines up.
    """

    def __init__(self, path: str | None = None):
        self.path = path if path is not None else os.environ.get(FIGURES_ENV)
        self.lines: list[dict] = []

    def add(self, category: str, name: str, *, tried: int = 1, held: int = 1, **extra) -> None:
        line = {"category": category, "name": name, "tried": tried, "held": held, **extra}
        self.lines.append(line)
        if self.path:
            with open(self.path, "a", encoding="utf-8") as fh:
                fh.write(json.dumps(line, sort_keys=True) + "\n")

    @contextlib.contextmanager
    def case(self, category: str, name: str, **extra):
        """One tried case: held when the block ends without an exception."""
        try:
            yield
        except BaseException as exc:
            if not type(exc).__module__.startswith("hypothesis"):
                self.add(category, name, tried=1, held=0, **extra)
            raise  # hypothesis's own control flow (a rejected draw) is not a tried case
        self.add(category, name, tried=1, held=1, **extra)


# --- consistency of a desk root -----------------------------------------------------------------


def check_consistent(root: Path) -> dict:
    """Assert what must hold for any desk root after any fault; return a few counts.

    * ``PRAGMA integrity_check`` is ok;
    * every checksum a record holds names an object in the store whose bytes hash to it;
    * every object in the store hashes to its own name (nothing half-written was renamed in);
    * no temporary file is left in ``tmp/`` (checked after the writers have exited).
    """
    root = Path(root)
    index = Index(root / "index.sqlite")
    try:
        assert index.integrity() == "ok"
        records = index.list(limit=None)
    finally:
        index.close()
    store = Store(root)
    for r in records:
        for name in ("result_sha256", "parquet_sha256"):
            sha = r.get(name)
            if sha:
                assert store.verify(sha), f"record {r['id']} points at a bad {name} {sha}"
        if r.get("parquet_sha256"):
            assert r.get("result_sha256"), f"record {r['id']} has a parquet copy but no result"
    objects = [p for p in (root / "objects").rglob("*") if p.is_file()]
    for obj in objects:
        assert sha256_file(obj) == obj.name, f"object {obj} does not match its name"
    leftovers = sorted(p.name for p in (root / "tmp").iterdir()) if (root / "tmp").exists() else []
    assert not leftovers, f"temporary files left behind: {leftovers}"
    return {"records": len(records), "objects": len(objects)}


def server_jobs(tap, query: str) -> list[dict]:
    """The service's jobs whose QUERY is exactly ``query`` (from ``/_localtap/stats``)."""
    return [j for j in tap.stats()["jobs"] if j["query"] == query]


# --- the fault proxy ----------------------------------------------------------------------------


@dataclass
class Rule:
    """What to do with matching requests: ``action`` for the next ``times`` matches.

    actions: ``status`` (answer ``code``, with ``retry_after`` when given, without forwarding),
    ``reset_before`` (reset the connection; the service never sees the request),
    ``reset_after`` (forward, then reset instead of answering: the service acted, the client
    does not know), ``cut`` (forward, send the headers and ``after`` body bytes, reset),
    ``hold`` (forward, then signal ``reached`` and keep the answer until ``release`` is set;
    a released hold answers normally), ``hold_before`` (signal and wait without forwarding,
    then reset), ``hold_mid`` (forward, send ``after`` body bytes, signal, wait, reset),
    ``delay`` (sleep ``seconds``, then forward), ``echo`` (answer ``code`` with the request's
    headers and body quoted back, as a careless service might).
    """

    method: str
    path: str                     # regular expression searched in the path with its query
    action: str
    times: int | None = 1         # None: every matching request
    code: int = 503
    retry_after: str | None = None
    after: int = 0
    seconds: float = 0.0
    reached: threading.Event = field(default_factory=threading.Event)
    release: threading.Event = field(default_factory=threading.Event)
    hits: int = 0

    def matches(self, method: str, path: str) -> bool:
        if self.times is not None and self.hits >= self.times:
            return False
        return (self.method in ("*", method)) and re.search(self.path, path) is not None


class FaultProxy:
    """``with FaultProxy(tap.url) as proxy: desk.submit(proxy.url, ...)``; ``proxy.add(Rule(...))``."""

    def __init__(self, upstream_url: str):
        parts = urlsplit(upstream_url)
        self.upstream = (parts.hostname, parts.port)
        self.prefix = parts.path  # "/tap"
        self.rules: list[Rule] = []
        self.log: list[tuple[str, str, str]] = []
        self._lock = threading.Lock()
        proxy = self

        class Handler(BaseHTTPRequestHandler):
            protocol_version = "HTTP/1.1"

            def log_message(self, *args):  # quiet: the test reports what matters
                pass

            def _any(self):
                proxy._handle(self)

            do_GET = do_POST = do_DELETE = do_HEAD = do_PUT = _any

        self.server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.server.daemon_threads = True
        self.port = self.server.server_address[1]
        self.url = f"http://127.0.0.1:{self.port}{self.prefix}"
        self._thread = threading.Thread(target=self.server.serve_forever, daemon=True)

    def __enter__(self) -> FaultProxy:
        self._thread.start()
        return self

    def __exit__(self, *exc) -> None:
        for rule in self.rules:
            rule.release.set()
        self.server.shutdown()
        self.server.server_close()

    def add(self, rule: Rule) -> Rule:
        with self._lock:
            self.rules.append(rule)
        return rule

    def clear(self) -> None:
        with self._lock:
            for rule in self.rules:
                rule.release.set()
            self.rules.clear()

    def _match(self, method: str, path: str) -> Rule | None:
        with self._lock:
            for rule in self.rules:
                if rule.matches(method, path):
                    rule.hits += 1
                    return rule
        return None

    def _handle(self, h: BaseHTTPRequestHandler) -> None:
        length = int(h.headers.get("Content-Length") or 0)
        body = h.rfile.read(length) if length else b""
        rule = self._match(h.command, h.path)
        action = rule.action if rule else "forward"
        with self._lock:
            self.log.append((h.command, h.path, action))
        h.close_connection = True
        if action == "status":
            text = f"injected HTTP {rule.code}\n".encode()
            h.send_response(rule.code)
            if rule.retry_after is not None:
                h.send_header("Retry-After", rule.retry_after)
            h.send_header("Content-Type", "text/plain")
            h.send_header("Content-Length", str(len(text)))
            h.send_header("Connection", "close")
            h.end_headers()
            h.wfile.write(text)
            return
        if action == "echo":  # a careless service quoting the request back, headers and all
            text = "".join(f"{k}: {v}\n" for k, v in h.headers.items()).encode() + body[:2000]
            h.send_response(rule.code)
            h.send_header("Content-Type", "text/plain")
            h.send_header("Content-Length", str(len(text)))
            h.send_header("Connection", "close")
            h.end_headers()
            h.wfile.write(text)
            return
        if action == "reset_before":
            _reset(h)
            return
        if action == "hold_before":  # the service never sees this request
            rule.reached.set()
            rule.release.wait(120)
            _reset(h)
            return
        if action == "delay":
            time.sleep(rule.seconds)
        status, reason, headers, payload = self._forward(h, body)
        if action == "reset_after":
            _reset(h)
            return
        if action == "hold":
            rule.reached.set()
            rule.release.wait(120)
        h.send_response(status, reason)
        for name, value in headers:
            if name.lower() not in ("transfer-encoding", "connection", "content-length"):
                h.send_header(name, value)
        h.send_header("Content-Length", str(len(payload)))
        h.send_header("Connection", "close")
        h.end_headers()
        if action in ("cut", "hold_mid"):
            with contextlib.suppress(OSError):
                h.wfile.write(payload[: rule.after])
                h.wfile.flush()
            if action == "hold_mid":
                rule.reached.set()
                rule.release.wait(120)
            _reset(h)
            return
        if h.command != "HEAD":
            with contextlib.suppress(OSError):
                h.wfile.write(payload)

    def _forward(self, h: BaseHTTPRequestHandler, body: bytes):
        conn = http.client.HTTPConnection(*self.upstream, timeout=300)
        try:
            headers = {k: v for k, v in h.headers.items() if k.lower() != "connection"}
            conn.request(h.command, h.path, body=body or None, headers=headers)
            response = conn.getresponse()
            payload = response.read()
            return response.status, response.reason, response.getheaders(), payload
        finally:
            conn.close()


def _reset(h: BaseHTTPRequestHandler) -> None:
    """Close with SO_LINGER 0: the peer sees a TCP reset, not an orderly end."""
    with contextlib.suppress(OSError):
        h.wfile.flush()
    with contextlib.suppress(OSError):
        h.connection.setsockopt(socket.SOL_SOCKET, socket.SO_LINGER, struct.pack("ii", 1, 0))
        h.connection.close()
    h.wfile = io.BytesIO()  # the handler's own cleanup writes go nowhere
    h.close_connection = True

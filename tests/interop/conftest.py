"""Shared set-up of the interop tests: the independent TAP server (DaCHS) that setup.sh started.

Every test here carries the ``interop`` marker. Without a reachable server they are skipped with
the reason; with ``JOBDESK_INTEROP_REQUIRED=1`` (CI) an unreachable server is a failure instead,
so a broken set-up can never pass as "all skipped".
"""

from __future__ import annotations

import os
import shutil
import subprocess
import time
import uuid
from pathlib import Path

import pytest
import requests

HERE = Path(__file__).resolve().parent
PORT = int(os.environ.get("JOBDESK_INTEROP_PORT", "8791"))
TAP_URL = os.environ.get("JOBDESK_INTEROP_URL", f"http://127.0.0.1:{PORT}/tap").rstrip("/")
REQUIRED = os.environ.get("JOBDESK_INTEROP_REQUIRED", "") not in ("", "0", "false", "no")

# The invented table that tests/interop/rd/q.rd imports (20000 rows, fixed seed) and the slow
# view over its first 400 rows that sleeps 0.25 s per returned row.
TABLE = "driftcat.objects"
SLOW = "driftcat.slow"
TABLE_ROWS = 20000
SLOW_SECONDS_PER_ROW = 0.25


def server_available(timeout: float = 5.0) -> str | None:
    """None when the server answers its VOSI availability with true, else the reason."""
    try:
        r = requests.get(f"{TAP_URL}/availability", timeout=timeout)
    except requests.RequestException as exc:
        return f"{exc.__class__.__name__}: {exc}"
    if r.status_code != 200 or b"<avl:available>true" not in r.content:
        return f"HTTP {r.status_code}: {r.text[:200]}"
    return None


_availability: dict[str, str | None] = {}


def pytest_collection_modifyitems(config, items):
    for item in items:
        if HERE in Path(str(item.fspath)).resolve().parents:
            item.add_marker(pytest.mark.interop)


@pytest.fixture(autouse=True)
def _need_dachs():
    """Skip (or, when required, fail) every interop test if the server is not there."""
    if "reason" not in _availability:
        _availability["reason"] = server_available()
    reason = _availability["reason"]
    if reason is not None:
        message = (f"independent TAP server not reachable at {TAP_URL} ({reason}); "
                   f"start it with: bash tests/interop/setup.sh")
        if REQUIRED:
            pytest.fail(message + " [JOBDESK_INTEROP_REQUIRED=1]", pytrace=False)
        pytest.skip(message)


@pytest.fixture(scope="session")
def tap_url() -> str:
    return TAP_URL


@pytest.fixture
def marker() -> str:
    """A unique string literal to put in a query: it tells our jobs apart from everyone else's
    (anonymous jobs are visible to every client in DaCHS's job list)."""
    return f"jd-{uuid.uuid4().hex[:12]}"


@pytest.fixture
def http():
    with requests.Session() as session:
        yield session


def server_jobs_with(session: requests.Session, text: str, *, after: str | None = None) -> list[str]:
    """URLs of the server's jobs whose QUERY parameter contains ``text`` (read job by job: the
    job list itself carries only id, href and phase on this server)."""
    from xml.etree import ElementTree as ET   # our own server's answer; nothing untrusted

    params = {"AFTER": after} if after else None
    listing = session.get(f"{TAP_URL}/async", params=params, timeout=30)
    listing.raise_for_status()
    ns = {"uws": "http://www.ivoa.net/xml/UWS/v1.0", "xlink": "http://www.w3.org/1999/xlink"}
    found = []
    for ref in ET.fromstring(listing.content).findall("uws:jobref", ns):
        href = ref.get("{http://www.w3.org/1999/xlink}href")
        doc = session.get(href, timeout=30)
        if doc.status_code != 200:
            continue
        for p in ET.fromstring(doc.content).iter("{http://www.ivoa.net/xml/UWS/v1.0}parameter"):
            if p.get("id", "").lower() == "query" and text in (p.text or ""):
                found.append(href)
    return found


def _dachs_cmd(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run(["dachs", *args], cwd="/tmp", capture_output=True, text=True, timeout=60)


@pytest.fixture
def dachs_control():
    """Stop and restart the server from inside a test (needs the dachs command and root, as in
    CI). The server is always running again when the test ends, whatever happened."""
    if shutil.which("dachs") is None or os.geteuid() != 0:
        pytest.skip("stopping the server needs the dachs command and root")

    class Control:
        def stop(self):
            _dachs_cmd("serve", "stop")
            for _ in range(100):
                if server_available(timeout=1) is not None:
                    return
                time.sleep(0.1)
            raise RuntimeError("DaCHS still answers after 'dachs serve stop'")

        def start(self):
            if server_available(timeout=1) is None:
                return
            done = _dachs_cmd("serve", "start")
            for _ in range(120):
                if server_available(timeout=1) is None:
                    return
                time.sleep(0.5)
            raise RuntimeError(f"DaCHS did not come back: {done.stdout} {done.stderr}")

    control = Control()
    try:
        yield control
    finally:
        control.start()

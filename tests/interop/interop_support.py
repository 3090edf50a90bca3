"""Where the independent TAP server (DaCHS, started by setup.sh) is, and helpers to look at it.

A plain module rather than conftest.py, so test modules can import it by a name no other test
directory uses.
"""

from __future__ import annotations

import os
import subprocess

import requests

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


def dachs_cmd(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run(["dachs", *args], cwd="/tmp", capture_output=True, text=True, timeout=60)

"""In-flight sharing: a claim file says "this key is running as that job", so a colleague waits.

A claim is the one mutable file in a group cache (``claims/<key[:2]>/<key>.json``): the desk
driving a job rewrites it with a fresh heartbeat while the job runs and removes it when the job
ends. A claim whose heartbeat is older than the group's ``claim_stale_seconds`` is ignored (its
driver died); a colleague's desk that finds a live claim records the claimed job URL instead of
creating a second job, which works wherever the service lets both read the job (anonymous jobs).
"""

from __future__ import annotations

import json
import time

from jobdesk.groups import layout

HEARTBEAT_EVERY = 30.0   # seconds between claim rewrites by one driver


def read_claim(layer, key: str) -> dict | None:
    """A live claim on ``key`` in this group, or None (absent, unreadable or stale)."""
    try:
        claim = json.loads(layer.storage.read(layout.claim_path(key)))
    except (OSError, ValueError):
        return None
    if not isinstance(claim, dict) or claim.get("key") != key or not claim.get("job_url"):
        return None
    beat = claim.get("heartbeat")
    if not isinstance(beat, (int, float)) or time.time() - beat > layer.claim_stale:
        return None
    return claim


def announce(layer, record: dict, *, claimant: str) -> None:
    """Write or refresh the claim for a running job (never over a live claim of someone else)."""
    key = record["key"]
    current = read_claim(layer, key)
    if current is not None and current.get("claimant") != claimant \
            and current.get("job_url") != record.get("job_url"):
        return
    claim = {"kind": "jobdesk-group-claim", "format": layout.FORMAT, "key": key,
             "service": record["service"], "job_url": record["job_url"],
             "claimant": claimant, "heartbeat": time.time(),
             "heartbeat_iso": layout.iso(time.time())}
    layer.storage.put_bytes(layout.claim_path(key), json.dumps(claim).encode("utf-8"))


def withdraw(layer, record: dict, *, claimant: str) -> None:
    """Remove our claim on the record's key (a colleague's claim stays)."""
    try:
        claim = json.loads(layer.storage.read(layout.claim_path(record["key"])))
    except (OSError, ValueError):
        return
    if claim.get("claimant") == claimant or claim.get("job_url") == record.get("job_url"):
        layer.storage.remove(layout.claim_path(record["key"]))

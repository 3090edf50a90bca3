"""Where things live in a group cache, and what a manifest and ``group.json`` must say.

This module is the executable form of docs/group-layout.md (format version 1): relative paths,
manifest names that sort by publication time, building a manifest from an index record and
checking one read back. Nothing here touches storage, so a path or a bucket share one layout.
"""

from __future__ import annotations

import datetime as _dt
import json
import re
import secrets
import time

FORMAT = 1                      # the layout and manifest format this code writes and reads
MANIFEST_KIND = "jobdesk-group-manifest"
GROUP_FILE = "group.json"
OBJECTS = "objects"
MANIFESTS = "manifests"
CLAIMS = "claims"
QUARANTINE = "quarantine"
TMP = "tmp"
ROLES = ("votable", "parquet")  # the two objects of one published result
DEFAULT_UMASK = 0o002           # group-writable, never world-writable
DEFAULT_CLAIM_STALE = 600.0     # seconds without a heartbeat before a claim is ignored

_HEX64 = re.compile(r"^[0-9a-f]{64}$")
_MANIFEST_NAME = re.compile(r"^\d{8}T\d{6}\.\d{6}Z-[0-9a-f]{12}\.json$")


class ManifestInvalid(ValueError):
    """A manifest that cannot be trusted: unreadable, incomplete or inconsistent."""


def is_sha256(value) -> bool:
    return isinstance(value, str) and bool(_HEX64.match(value))


def object_path(sha256: str) -> str:
    if not is_sha256(sha256):
        raise ValueError(f"not a sha256 checksum: {sha256!r}")
    return f"{OBJECTS}/{sha256[:2]}/{sha256}"


def manifest_dir(key: str) -> str:
    if not is_sha256(key):
        raise ValueError(f"not a cache key: {key!r}")
    return f"{MANIFESTS}/{key[:2]}/{key}"


def manifest_name(published: float) -> str:
    """``<UTC time to the microsecond>-<12 random hex>.json``: unique, sorts oldest first."""
    stamp = _dt.datetime.fromtimestamp(published, _dt.timezone.utc).strftime("%Y%m%dT%H%M%S.%fZ")
    return f"{stamp}-{secrets.token_hex(6)}.json"


def is_manifest_name(name: str) -> bool:
    return bool(_MANIFEST_NAME.match(name))


def claim_path(key: str) -> str:
    return f"{CLAIMS}/{key[:2]}/{key}.json"


def iso(ts: float) -> str:
    """UTC in the DALI 1.1 §3.3.3 form, ending in ``Z``."""
    text = _dt.datetime.fromtimestamp(ts, _dt.timezone.utc).isoformat(timespec="seconds")
    return text.replace("+00:00", "Z")


# --- group.json: the group's own settings -----------------------------------------------------


def default_policy(name: str) -> dict:
    return {"kind": "jobdesk-group", "format": FORMAT, "name": name,
            "umask": f"{DEFAULT_UMASK:04o}", "claim_stale_seconds": DEFAULT_CLAIM_STALE,
            "created": iso(time.time())}


def parse_umask(value) -> int:
    """The policy's umask (``"0002"`` or an int); a policy that lets the world write is refused."""
    try:
        umask = int(value, 8) if isinstance(value, str) else int(value)
    except (TypeError, ValueError):
        raise ValueError(f"group.json: umask {value!r} is not an octal number") from None
    if not 0 <= umask <= 0o777:
        raise ValueError(f"group.json: umask {value!r} is out of range")
    if not umask & 0o002:
        raise ValueError(f"group.json: umask {value!r} would make world-writable files; "
                         "jobdesk refuses (use 0002 or 0022)")
    return umask


def file_mode(umask: int) -> int:
    return 0o666 & ~umask


def dir_mode(umask: int) -> int:
    return (0o777 & ~umask) | 0o2000   # setgid: new entries keep the group's ownership


# --- manifests ----------------------------------------------------------------------------------


def build_manifest(record: dict, *, publisher: str, published: float,
                   software: dict | None = None) -> dict:
    """The manifest of one complete result held by a personal index record."""
    return {
        "kind": MANIFEST_KIND, "format": FORMAT,
        "key": record["key"], "service": record["service"], "adql": record.get("adql"),
        "canonical": record.get("canonical"), "maxrec": record.get("maxrec"),
        "fmt": record.get("fmt"), "scope": record.get("scope"),
        "uploads": record.get("uploads") or {}, "label": record.get("label"),
        "rows": record["rows"], "truncated": bool(record.get("truncated")),
        # The same flag under its first name, for members whose jobdesk still reads only that.
        "overflow": bool(record.get("truncated")),
        "objects": {
            "votable": {"sha256": record["result_sha256"], "bytes": record["result_bytes"]},
            "parquet": {"sha256": record["parquet_sha256"], "bytes": record["parquet_bytes"]},
        },
        "job_url": record.get("job_url"), "run_id": record.get("run_id"),
        "submitted": record.get("submitted"), "finished": record.get("finished"),
        "server": record.get("server") or {}, "warnings": record.get("warnings") or [],
        "publisher": publisher, "published": iso(published), "published_unix": published,
        "software": software or {},
    }


def encode_manifest(manifest: dict) -> bytes:
    return (json.dumps(manifest, sort_keys=True, indent=1) + "\n").encode("utf-8")


def parse_manifest(data: bytes, *, key: str | None = None) -> dict:
    """A manifest read back, checked field by field; raise ``ManifestInvalid`` on any doubt."""
    try:
        manifest = json.loads(data.decode("utf-8"))
    except (UnicodeDecodeError, ValueError) as exc:
        raise ManifestInvalid(f"not valid JSON ({exc})") from None
    if not isinstance(manifest, dict) or manifest.get("kind") != MANIFEST_KIND:
        raise ManifestInvalid("not a jobdesk group manifest")
    version = manifest.get("format")
    if not isinstance(version, int) or version < 1:
        raise ManifestInvalid(f"bad format version {version!r}")
    if version > FORMAT:
        raise ManifestInvalid(f"format version {version} is newer than this jobdesk reads "
                              f"({FORMAT}); upgrade jobdesk")
    if not is_sha256(manifest.get("key")):
        raise ManifestInvalid("no valid key")
    if key is not None and manifest["key"] != key:
        raise ManifestInvalid(f"holds key {manifest['key'][:12]}…, filed under {key[:12]}…")
    if not isinstance(manifest.get("service"), str):
        raise ManifestInvalid("no service")
    rows = manifest.get("rows")
    if not isinstance(rows, int) or isinstance(rows, bool) or rows < 0:
        raise ManifestInvalid(f"bad row count {rows!r}")
    # ``truncated`` (older manifests: only ``overflow``) must say False; both, when present.
    flags = [manifest[name] for name in ("truncated", "overflow") if name in manifest]
    if not flags or any(flag is not False for flag in flags):
        raise ManifestInvalid("the result is marked truncated (or not marked complete); "
                              "never served")
    objects = manifest.get("objects")
    if not isinstance(objects, dict):
        raise ManifestInvalid("no objects")
    for role in ROLES:
        entry = objects.get(role)
        if not (isinstance(entry, dict) and is_sha256(entry.get("sha256"))
                and isinstance(entry.get("bytes"), int) and entry["bytes"] >= 0):
            raise ManifestInvalid(f"no valid {role} object")
    if not isinstance(manifest.get("published_unix"), (int, float)):
        raise ManifestInvalid("no publication time")
    return manifest

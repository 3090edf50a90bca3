"""Maintainer work on a group cache: set one up, verify it, prune it; rebuild a personal view.

All of it is explicit (a command a person runs), never a side effect of using the cache.
Pruning only ever deletes what no remaining manifest references, and objects younger than a
grace period are left alone because a publisher writes its objects before its manifest.
"""

from __future__ import annotations

import grp
import hashlib
import json
import os
import time
from dataclasses import dataclass, field
from pathlib import Path

from jobdesk.groups import layout
from jobdesk.groups.layer import GroupLayer
from jobdesk.groups.storage import CHUNK, PosixStorage, open_storage

GRACE_SECONDS = 3600.0   # unreferenced objects younger than this may await their manifest


def init_group(location: str, *, name: str | None = None, umask: int = layout.DEFAULT_UMASK,
               unix_group: str | None = None, storage_options: dict | None = None) -> dict:
    """Create the layout and ``group.json`` (POSIX: group-owned, setgid directories)."""
    layout.parse_umask(umask)
    storage = open_storage(location, storage_options)
    policy = layout.default_policy(name or str(location).rstrip("/").rsplit("/", 1)[-1])
    policy["umask"] = f"{umask:04o}"
    if unix_group:
        policy["unix_group"] = unix_group
    if isinstance(storage, PosixStorage):
        root = storage.root
        root.mkdir(parents=True, exist_ok=True)
        gid = grp.getgrnam(unix_group).gr_gid if unix_group else root.stat().st_gid
        storage.set_policy(umask, gid)
        storage.make_dirs((layout.OBJECTS, layout.MANIFESTS, layout.CLAIMS, layout.TMP,
                           layout.QUARANTINE))
    storage.put_bytes(layout.GROUP_FILE, json.dumps(policy, indent=1).encode("utf-8"))
    return policy


@dataclass
class Report:
    """What verify or prune found or did; ``problems`` are human-readable lines."""

    manifests: int = 0
    objects: int = 0
    bytes: int = 0
    problems: list[str] = field(default_factory=list)
    removed: list[str] = field(default_factory=list)
    freed: int = 0

    def as_dict(self) -> dict:
        return dict(self.__dict__)


def _manifests(layer: GroupLayer):
    """(relative path, manifest or None, error) for every manifest file."""
    for rel, _, _ in layer.storage.walk(layout.MANIFESTS):
        parts = rel.split("/")
        if len(parts) != 4 or not layout.is_manifest_name(parts[3]):
            yield rel, None, "not a manifest name"
            continue
        try:
            yield rel, layout.parse_manifest(layer.storage.read(rel), key=parts[2]), None
        except FileNotFoundError:
            continue
        except (OSError, layout.ManifestInvalid) as exc:
            yield rel, None, str(exc)


def verify(layer: GroupLayer, *, hashes: bool = True) -> Report:
    """Check every manifest and (with ``hashes``) every object's sha256; change nothing."""
    report = Report()
    referenced: dict[str, tuple[int, str]] = {}
    for rel, manifest, error in _manifests(layer):
        report.manifests += 1
        if manifest is None:
            report.problems.append(f"{rel}: {error}")
            continue
        for role in layout.ROLES:
            entry = manifest["objects"][role]
            referenced.setdefault(entry["sha256"], (entry["bytes"], rel))
    present = {}
    for rel, size, _ in layer.storage.walk(layout.OBJECTS):
        report.objects += 1
        report.bytes += size
        present[rel.rsplit("/", 1)[-1]] = (rel, size)
    for sha, (size, manifest_rel) in sorted(referenced.items()):
        if sha not in present:
            report.problems.append(f"{manifest_rel}: object {sha} is missing")
        elif present[sha][1] != size:
            report.problems.append(f"{present[sha][0]}: {present[sha][1]} bytes, manifest "
                                   f"says {size}")
    if hashes:
        for sha, (rel, _) in sorted(present.items()):
            digest = hashlib.sha256()
            with layer.storage.open(rel) as fh:
                while block := fh.read(CHUNK):
                    digest.update(block)
            if digest.hexdigest() != sha:
                report.problems.append(f"{rel}: content does not match its name (sha256)")
    if isinstance(layer.storage, PosixStorage):
        report.problems += _permission_problems(layer)
    return report


def _permission_problems(layer: GroupLayer) -> list[str]:
    storage = layer.storage
    gid = storage.gid if storage.gid is not None else storage.root.stat().st_gid
    fmode, dmode = layout.file_mode(storage.umask), layout.dir_mode(storage.umask)
    problems = []
    for dirpath, dirs, files in os.walk(storage.root):
        for name, want in [(d, dmode) for d in dirs] + [(f, fmode) for f in files]:
            path = Path(dirpath) / name
            st = path.lstat()
            if st.st_mode & 0o002:
                problems.append(f"{path}: world-writable")
            if (st.st_mode & 0o7777) != want and (st.st_mode & 0o7777) & ~want:
                problems.append(f"{path}: mode {st.st_mode & 0o7777:04o}, policy {want:04o}")
            if st.st_gid != gid:
                problems.append(f"{path}: group {st.st_gid}, the cache's is {gid}")
    return problems


def prune(layer: GroupLayer, *, older_than: float | None = None, dry_run: bool = True,
          grace: float = GRACE_SECONDS) -> Report:
    """Remove manifests older than ``older_than`` seconds (all but each key's newest unless
    the newest is old too), then objects no manifest references, stale claims and temp files.
    """
    report = Report()
    now = time.time()
    by_key: dict[str, list[tuple[str, dict]]] = {}
    for rel, manifest, error in _manifests(layer):
        report.manifests += 1
        if manifest is None:
            report.problems.append(f"{rel}: {error} (left for a person to look at)")
            continue
        by_key.setdefault(manifest["key"], []).append((rel, manifest))
    keep: set[str] = set()
    for entries in by_key.values():
        for rel, manifest in entries:
            if older_than is not None and now - manifest["published_unix"] > older_than:
                report.removed.append(rel)
                if not dry_run:
                    layer.storage.remove(rel)
            else:
                keep |= {manifest["objects"][r]["sha256"] for r in layout.ROLES}
    for rel, size, mtime in list(layer.storage.walk(layout.OBJECTS)):
        report.objects += 1
        report.bytes += size
        sha = rel.rsplit("/", 1)[-1]
        if sha in keep or now - mtime < grace:
            continue
        report.removed.append(rel)
        report.freed += size
        if not dry_run:
            layer.storage.remove(rel)
    for rel, size, mtime in list(layer.storage.walk(layout.TMP)):
        if now - mtime > grace:
            report.removed.append(rel)
            report.freed += size
            if not dry_run:
                layer.storage.remove(rel)
    for rel, _, mtime in list(layer.storage.walk(layout.CLAIMS)):
        if now - mtime > layer.claim_stale:
            report.removed.append(rel)
            if not dry_run:
                layer.storage.remove(rel)
    if not dry_run:
        layer.storage.remove_empty_dirs(layout.MANIFESTS)
    return report


def view_records(layer: GroupLayer) -> list[dict]:
    """Personal index records for every good manifest (the newest per key), for a rebuild."""
    newest: dict[str, tuple[str, dict]] = {}
    for rel, manifest, _ in _manifests(layer):
        if manifest is not None:
            seen = newest.get(manifest["key"])
            if seen is None or rel > seen[0]:
                newest[manifest["key"]] = (rel, manifest)
    out = []
    for rel, m in newest.values():
        out.append({
            "id": "g" + hashlib.sha256(f"{layer.name}/{rel}".encode()).hexdigest()[:15],
            "key": m["key"], "service": m["service"], "adql": m.get("adql") or "",
            "canonical": m.get("canonical"), "maxrec": m.get("maxrec"), "fmt": m.get("fmt"),
            "label": m.get("label"), "scope": m.get("scope"), "uploads": m.get("uploads") or {},
            "phase": "COMPLETED", "job_url": m.get("job_url"), "run_id": m.get("run_id"),
            "created": m["published_unix"], "submitted": m.get("submitted"),
            "finished": m.get("finished") or m["published_unix"], "rows": m["rows"],
            "truncated": 0, "result_sha256": m["objects"]["votable"]["sha256"],
            "result_bytes": m["objects"]["votable"]["bytes"],
            "parquet_sha256": m["objects"]["parquet"]["sha256"], "server": m.get("server") or {},
            "warnings": m.get("warnings") or [], "user": m.get("publisher"), "requests": 0,
            "layer": layer.name,
        })
    return out

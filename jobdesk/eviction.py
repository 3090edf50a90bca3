"""Keeping the personal cache in bounds: by age and total size, sparing pinned jobs.

The rule: a record and its files go together. A record is dropped
(forgotten) with its result, never left pointing at a missing file; a file still referenced
by any kept record (the same result reused by two records, an upload) stays. Running jobs and
pinned jobs are never dropped. Pins are empty marker files ``pins/<job id>`` in the root.
"""

from __future__ import annotations

import time
from pathlib import Path

from jobdesk import phases

PINS = "pins"
GRACE_SECONDS = 600.0   # objects younger than this may belong to a record being written


def pin(root: Path, job_id: str, *, pinned: bool = True) -> None:
    folder = Path(root) / PINS
    folder.mkdir(exist_ok=True)
    if pinned:
        (folder / job_id).touch()
    else:
        (folder / job_id).unlink(missing_ok=True)


def pinned(root: Path) -> set[str]:
    folder = Path(root) / PINS
    return {p.name for p in folder.iterdir()} if folder.is_dir() else set()


def _files(record) -> set[str]:
    """The store objects a record (``JobRecord``) uses: result, Parquet copy, uploads."""
    shas = {record.result_sha256, record.parquet_sha256, *record.uploads.values()}
    return {s for s in shas if s}


def prune(index, store, root: Path, *, max_bytes: int | None = None,
          older_than: float | None = None, dry_run: bool = True) -> dict:
    """Drop finished records older than ``older_than`` seconds, then the oldest until the
    store fits ``max_bytes``; remove files no kept record references. Returns what (would) go."""
    now = time.time()
    keep_always = pinned(root)
    records = index.list(limit=None)
    candidates = sorted((r for r in records if r.phase not in phases.ACTIVE
                         and r.id not in keep_always),
                        key=lambda r: r.finished or r.created)
    sizes = {}
    for sha in {s for r in records for s in _files(r)}:
        if store.has(sha):
            sizes[sha] = store.path(sha).stat().st_size
    total = store.usage()[1]
    dropped: list[str] = []
    kept = {r.id: r for r in records}

    def referenced() -> set[str]:
        return {s for r in kept.values() for s in _files(r)}

    for record in candidates:
        when = record.finished or record.created
        if older_than is not None and now - when > older_than:
            dropped.append(record.id)
            kept.pop(record.id)
    if max_bytes is not None:
        in_use = referenced()
        used = total - sum(sizes.get(s, 0) for s in set(sizes) - in_use)
        for record in candidates:
            if used <= max_bytes:
                break
            if record.id not in kept:
                continue
            dropped.append(record.id)
            kept.pop(record.id)
            still = referenced()
            used -= sum(sizes.get(s, 0) for s in _files(record) - still)
    in_use = referenced()
    removed, freed = [], 0
    for sub in store.objects.iterdir():
        for f in sub.iterdir():
            if f.name in in_use or now - f.stat().st_mtime < GRACE_SECONDS \
                    and f.name not in sizes:
                continue
            removed.append(f.name)
            freed += f.stat().st_size
    if not dry_run:
        for job_id in dropped:
            index.forget(job_id)
        for sha in removed:
            store.remove(sha)
    return {"dropped": dropped, "removed": removed, "freed": freed, "pinned": sorted(keep_always),
            "dry_run": dry_run}

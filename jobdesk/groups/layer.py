"""One group cache seen from a desk: find a key's results, serve them verified, publish new ones.

Serving copies each object into the personal store while hashing it, and only a copy whose
sha256 and size match the manifest is kept: a group object is never served in place. Anything
that fails (a manifest that does not parse, an object missing or altered) is reported as a
``GroupCacheWarning`` naming the path, set aside under ``quarantine/`` when this member may write
there (else noted in the personal root), and skipped; the caller then falls through to the next
layer or to the service.
"""

from __future__ import annotations

import errno
import grp
import hashlib
import itertools
import json
import socket
import time
import warnings
from pathlib import Path

from jobdesk.errors import ConfigError, GroupCacheWarning, JobdeskError, PublishRefused
from jobdesk.groups import layout
from jobdesk.groups.config import Group
from jobdesk.groups.storage import PosixStorage, open_storage

DEDUP_LOOK = 3     # newest manifests compared before publishing a result again
USAGE_TTL = 60.0   # seconds a usage count is reused (walking a big bucket is slow)


class Served:
    """What a group layer handed over: the manifest and the personal copies of its objects."""

    def __init__(self, layer: "GroupLayer", manifest: dict, rel: str, copies: dict):
        self.layer = layer
        self.manifest = manifest
        self.rel = rel
        self.copies = copies          # role -> (sha256, personal path)

    @property
    def account(self) -> str:
        m = self.manifest
        return (f"served from group cache {self.layer.name}, published by "
                f"{m.get('publisher') or 'unknown'} on {m.get('published')}")


class GroupLayer:
    """A group cache: its storage, its policy (``group.json``) and its name."""

    def __init__(self, group: Group, *, local_state: Path | None = None):
        self.group = group
        self.readonly = group.readonly
        self.storage = open_storage(group.location, group.storage_options)
        self.location = self.storage.location
        self.local_state = Path(local_state) if local_state else None
        self.policy = self._read_policy()
        base = self.location.rstrip("/").rsplit("/", 1)[-1] or "group"
        self.name = group.name or self.policy.get("name") or base
        self._usage: tuple[float, dict] | None = None

    def __repr__(self) -> str:
        mode = "read-only" if self.readonly else "read-write"
        return f"<GroupLayer {self.name} {mode} {self.location}>"

    # --- policy -----------------------------------------------------------------------------

    def _read_policy(self) -> dict:
        try:
            policy = json.loads(self.storage.read(layout.GROUP_FILE))
        except FileNotFoundError:
            policy = {}
        except (OSError, ValueError) as exc:
            self._report(f"cannot read {self._where(layout.GROUP_FILE)}: {exc}; using defaults")
            policy = {}
        try:
            umask = layout.parse_umask(policy.get("umask", layout.DEFAULT_UMASK))
        except ValueError as exc:
            raise ConfigError(f"group cache {self.location}: {exc}",
                              hint="ask the group's maintainer to fix group.json") from None
        gid = None
        if policy.get("unix_group"):
            try:
                gid = grp.getgrnam(policy["unix_group"]).gr_gid
            except KeyError:
                self._report(f"group.json names unix group {policy['unix_group']!r}, "
                             "unknown on this host; new files keep the directory's group")
        if isinstance(self.storage, PosixStorage):
            self.storage.set_policy(umask, gid)
        return policy

    @property
    def claim_stale(self) -> float:
        return float(self.policy.get("claim_stale_seconds", layout.DEFAULT_CLAIM_STALE))

    def writable(self) -> bool:
        return not self.readonly and self.storage.can_write()

    # --- finding and serving ----------------------------------------------------------------

    def manifests(self, key: str):
        """This key's trustworthy manifests, newest first, read lazily (serving stops at the
        first good one); bad ones met on the way are reported and set aside."""
        folder = layout.manifest_dir(key)
        names = sorted((n for n in self.storage.listdir(folder) if layout.is_manifest_name(n)),
                       reverse=True)
        for name in names:
            rel = f"{folder}/{name}"
            try:
                data = self.storage.read(rel)
            except FileNotFoundError:
                continue   # pruned or quarantined meanwhile
            except OSError as exc:
                self._report(f"cannot read {self._where(rel)}: {exc}")
                continue
            try:
                manifest = layout.parse_manifest(data, key=key)
            except layout.ManifestInvalid as exc:
                self._set_aside(rel, f"manifest rejected: {exc}")
                continue
            yield rel, manifest

    def serve(self, key: str, store, *, oldest: float | None = None) -> Served | None:
        """Copy the newest good result for ``key`` into ``store`` (verified), or None."""
        for rel, manifest in self.manifests(key):
            finished = manifest.get("finished") or manifest["published_unix"]
            if oldest is not None and finished < oldest:
                continue
            copies = {}
            for role in layout.ROLES:
                entry = manifest["objects"][role]
                path = self.copy_verified(entry["sha256"], entry["bytes"], store, manifest=rel)
                if path is None:
                    break
                copies[role] = (entry["sha256"], path)
            else:
                return Served(self, manifest, rel, copies)
        return None

    def copy_verified(self, sha256: str, size: int, store, *, manifest: str = "") -> Path | None:
        """The object as a personal store file, hashed while copied; None if it is not good."""
        if store.has(sha256):
            return store.path(sha256)
        rel = layout.object_path(sha256)
        tmp = store.temp(".group")
        digest = hashlib.sha256()
        copied = 0
        try:
            with self.storage.open(rel) as src, open(tmp, "wb") as dst:
                while block := src.read(self.storage.read_block):
                    digest.update(block)
                    copied += len(block)
                    if copied > size:
                        break   # longer than the manifest says: stop before filling the disk
                    dst.write(block)
        except FileNotFoundError:
            tmp.unlink(missing_ok=True)
            self._report(f"{self._where(manifest)} points at {self._where(rel)}, which is "
                         "missing; not served")
            return None
        except OSError as exc:
            tmp.unlink(missing_ok=True)
            if exc.errno == errno.ELOOP:
                self._set_aside(rel, f"is a link ({exc.strerror}); group objects must be files")
            else:
                self._report(f"cannot read {self._where(rel)}: {exc}; not served")
            return None
        if digest.hexdigest() != sha256 or copied != size:
            tmp.unlink(missing_ok=True)
            got = f"more than {size}" if copied > size else str(copied)
            self._set_aside(rel, f"object does not match its checksum "
                                 f"(got {got} bytes, manifest says {size})")
            return None
        try:
            return store.commit(tmp, sha256)[1]
        except JobdeskError:
            tmp.unlink(missing_ok=True)
            raise

    # --- publishing -------------------------------------------------------------------------

    def publish(self, record: dict, store, *, publisher: str, software: dict | None = None) -> str:
        """Write the record's objects, then its manifest; return the manifest's path."""
        if self.readonly:
            raise PublishRefused(f"group cache {self.name} ({self.location}) is read-only here")
        if record.get("truncated") or not record.get("parquet_sha256"):
            raise PublishRefused(f"job {record['id']} has no complete result to publish",
                                 hint="only complete (not truncated) results are shared")
        try:
            for sha in (record["result_sha256"], record["parquet_sha256"]):
                self._put_object(sha, store)
            for rel, existing in itertools.islice(self.manifests(record["key"]), DEDUP_LOOK):
                if existing["objects"]["votable"]["sha256"] == record["result_sha256"]:
                    return rel   # this very result is already published
            now = time.time()
            full = dict(record, parquet_bytes=store.path(record["parquet_sha256"]).stat().st_size)
            manifest = layout.build_manifest(full, publisher=publisher, published=now,
                                             software=software)
            rel = f"{layout.manifest_dir(record['key'])}/{layout.manifest_name(now)}"
            if not self.storage.exists(layout.GROUP_FILE):
                self.storage.put_bytes(layout.GROUP_FILE, json.dumps(
                    layout.default_policy(self.name), indent=1).encode())
            self.storage.put_bytes(rel, layout.encode_manifest(manifest))
        except PermissionError as exc:
            raise PublishRefused(f"you may not write to group cache {self.name} "
                                 f"({self.location}): {exc}") from exc
        self._usage = None
        return rel

    def _put_object(self, sha256: str, store) -> None:
        rel = layout.object_path(sha256)
        local = store.checked(sha256, None)
        have = self.storage.size(rel)
        if have == local.stat().st_size:
            return   # content-addressed: the same name holds the same bytes
        if have is not None:
            self._set_aside(rel, f"object has {have} bytes, its checksum's file has "
                                 f"{local.stat().st_size}")
        self.storage.put_file(rel, local)

    # --- problems ---------------------------------------------------------------------------

    def _where(self, rel: str) -> str:
        return f"{self.location.rstrip('/')}/{rel}"

    def _report(self, message: str) -> None:
        warnings.warn(GroupCacheWarning(f"group cache {getattr(self, 'name', self.location)}: "
                                        f"{message}"), stacklevel=4)

    def _set_aside(self, rel: str, reason: str) -> None:
        """Quarantine a bad file in the group if we may, else note it locally; always report."""
        where = self._where(rel)
        moved = None
        if self.writable():
            dest = f"{layout.QUARANTINE}/{rel}.{time.time_ns()}"
            try:
                self.storage.move(rel, dest)
                moved = self._where(dest)
            except FileNotFoundError:
                moved = "(already gone)"
            except OSError:
                moved = None
        if moved is None and self.local_state is not None:
            self.local_state.mkdir(parents=True, exist_ok=True)
            with open(self.local_state / "quarantine.jsonl", "a", encoding="utf-8") as fh:
                fh.write(json.dumps({"group": self.name, "path": where, "reason": reason,
                                     "at": layout.iso(time.time())}) + "\n")
        tail = f"; moved to {moved}" if moved else "; noted locally (no write access)"
        self._report(f"{where}: {reason}; never served{tail}")

    # --- size -------------------------------------------------------------------------------

    def usage(self) -> dict:
        """Manifests, objects and their bytes (reused for a minute: a big bucket walks slowly)."""
        if self._usage and time.monotonic() - self._usage[0] < USAGE_TTL:
            return self._usage[1]
        objects = size = 0
        for _, n, _ in self.storage.walk(layout.OBJECTS):
            objects += 1
            size += n
        manifests = sum(1 for rel, _, _ in self.storage.walk(layout.MANIFESTS)
                        if rel.endswith(".json"))
        out = {"manifests": manifests, "objects": objects, "bytes": size}
        self._usage = (time.monotonic(), out)
        return out


def open_layers(groups: list[Group], *, local_state: Path) -> list[GroupLayer]:
    layers = [GroupLayer(g, local_state=local_state) for g in groups]
    names = [layer.name for layer in layers]
    if len(set(names)) != len(names) or "personal" in names:
        raise ConfigError(f"group cache names must be unique and not 'personal': {names}",
                          hint="give each group a name: jobdesk.Group(location, name=...)")
    return layers


def publisher() -> str:
    """``user@host``, as recorded in a manifest."""
    from jobdesk.provenance import current_user
    return f"{current_user()}@{socket.gethostname()}"


"""Group caches: results shared by a research group on a shared directory or an object store.

A desk's layers are its personal cache, then its group caches in the order given. The group's
truth is immutable files (content-addressed objects and one manifest per published result,
see docs/group-layout.md); each member's SQLite index stays private and only *records* what it
used. :class:`GroupCaches` is what ``Desk`` talks to; the modules below do one job each:
``layout`` (paths, manifest format), ``storage`` (POSIX and fsspec), ``layer`` (serve verified,
publish), ``claims`` (in-flight sharing), ``maintain`` (verify, prune, rebuild), ``config`` (which
groups). The personal cache's own size/age limits live in ``jobdesk.eviction``.
"""

from __future__ import annotations

import hashlib
import json
import os
import time
from pathlib import Path

from jobdesk.errors import PublishRefused
from jobdesk.groups import claims
from jobdesk.groups.config import Group, as_groups
from jobdesk.groups.layer import GroupLayer, Served, open_layers, publisher

__all__ = ["Group", "GroupCaches", "GroupLayer", "Served"]

STATE_DIR = "group-state"   # in the personal root: served-manifest copies, opt-outs, local notes


class GroupCaches:
    """The group layers of one desk, in lookup order, and the desk's local notes about them."""

    def __init__(self, groups, *, root: Path):
        self.root = Path(root)
        self.state = self.root / STATE_DIR
        if groups is None:   # the config file's (``Desk`` passes its settings' groups)
            from jobdesk.settings import build
            groups = build(root=self.root).groups
        chosen = as_groups(groups)
        self.layers = open_layers(chosen, local_state=self.state)
        # one personal index shares its own jobs already; a claim is for other desks
        desk = hashlib.sha256(str(self.root.resolve()).encode()).hexdigest()[:8]
        self.claimant = f"{publisher()}/{desk}"
        self._beats: dict[str, float] = {}

    def __bool__(self) -> bool:
        return bool(self.layers)

    @property
    def names(self) -> list[str]:
        return [layer.name for layer in self.layers]

    def layer(self, name: str) -> GroupLayer:
        for layer in self.layers:
            if layer.name == name:
                return layer
        raise KeyError(f"no group cache named {name!r} (this desk has {self.names})")

    # --- serving ----------------------------------------------------------------------------

    def serve(self, key: str, store, *, oldest: float | None = None) -> Served | None:
        """The first layer (in order) holding a good result for ``key``, copied and verified."""
        for layer in self.layers:
            served = layer.serve(key, store, oldest=oldest)
            if served is not None:
                return served
        return None

    def remember(self, job_id: str, served: Served) -> None:
        """Keep the manifest a job was served from, for its provenance (atomic write)."""
        folder = self.state / "served"
        folder.mkdir(parents=True, exist_ok=True)
        note = {"group": served.layer.name, "location": served.layer.location,
                "manifest": served.rel, "lookup_order": ["personal", *self.names],
                "account": served.account, **{k: served.manifest.get(k) for k in (
                    "publisher", "published", "job_url", "finished")}}
        tmp = folder / f".{job_id}.{os.getpid()}.tmp"
        tmp.write_text(json.dumps(note, indent=1), "utf-8")
        os.replace(tmp, folder / f"{job_id}.json")

    def served_note(self, job_id: str) -> dict | None:
        try:
            return json.loads((self.state / "served" / f"{job_id}.json").read_text("utf-8"))
        except (OSError, ValueError):
            return None

    # --- publishing -------------------------------------------------------------------------

    def opt_out(self, job_id: str) -> None:
        """``submit(..., publish=False)``: remembered on disk, so the process that ends up
        fetching the result (maybe the server's poller) honours it too."""
        folder = self.state / "unpublished"
        folder.mkdir(parents=True, exist_ok=True)
        (folder / job_id).touch()

    def opted_out(self, job_id: str) -> bool:
        return (self.state / "unpublished" / job_id).exists()

    def target(self, group: str | None = None) -> GroupLayer:
        if group is not None:
            return self.layer(group)
        for layer in self.layers:
            if not layer.readonly:
                return layer
        listed = ", ".join(self.names)
        raise PublishRefused(f"this desk's group caches ({listed}) are all read-only here"
                             if listed else "this desk has no group cache",
                             hint="list a group as a location string or "
                                  "jobdesk.Group(location, readonly=False)")

    def publish(self, record: dict, store, *, group: str | None = None) -> tuple[str, str]:
        """Publish a complete record (``JobRecord.as_dict()``) to ``group`` or the first
        read-write layer; the manifest names the software that fetched it, not this process."""
        layer = self.target(group)
        rel = layer.publish(record, store, publisher=publisher(),
                            software=record.get("software"))
        return layer.name, rel

    # --- in-flight sharing ------------------------------------------------------------------

    def running_elsewhere(self, key: str) -> tuple[GroupLayer, dict] | None:
        """A live claim by someone else on this key, in the first layer that has one."""
        for layer in self.layers:
            claim = claims.read_claim(layer, key)
            if claim and claim.get("claimant") != self.claimant:
                return layer, claim
        return None

    def heartbeat(self, record: dict, *, running: bool) -> None:
        """Announce (or refresh, at most every ``HEARTBEAT_EVERY``) or withdraw a claim."""
        layers = [layer for layer in self.layers if not layer.readonly]
        if not layers or not record.get("job_url"):
            return
        layer = layers[0]
        try:
            if running:
                last = self._beats.get(record["id"], 0.0)
                if time.monotonic() - last >= claims.HEARTBEAT_EVERY:
                    claims.announce(layer, record, claimant=self.claimant)
                    self._beats[record["id"]] = time.monotonic()
            else:
                claims.withdraw(layer, record, claimant=self.claimant)
                self._beats.pop(record["id"], None)
        except OSError:
            pass   # a claim is a courtesy; failing to write one must not stop the job

    # --- the personal index as a view -------------------------------------------------------

    def add_to_index(self, index) -> int:
        """List every group result (newest manifest per key) in the personal index, so the
        sidebar shows what the group holds; files are copied, verified, on first use."""
        from jobdesk.groups.maintain import view_records
        added = 0
        for layer in self.layers:
            for record in view_records(layer):
                if index.get(record["id"]) is None:
                    index.insert(record)
                    added += 1
        return added

    rebuild_index = add_to_index   # the old name (it rebuilt nothing); kept for callers

    # --- size -------------------------------------------------------------------------------

    def summary(self) -> list[dict]:
        out = []
        for layer in self.layers:
            entry = {"name": layer.name, "kind": "group", "location": layer.location,
                     "readonly": layer.readonly}
            try:
                usage = layer.usage()
                entry.update(entries=usage["manifests"], objects=usage["objects"],
                             bytes=usage["bytes"])
            except OSError as exc:
                entry.update(entries=None, bytes=None, error=str(exc))
            out.append(entry)
        return out

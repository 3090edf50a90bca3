"""Which group caches a desk uses: ``Desk(groups=...)`` if given, else the config file's.

The config file itself is found and read by ``jobdesk.settings`` (docs/settings.md); each of
its ``[[groups]]`` tables has ``location`` and optionally ``name``, ``readonly`` and
``storage_options`` (passed to fsspec). Wherever a group is named (a location string, a
``Group``, a config-file entry) it is read-write unless it says otherwise: one default,
``DEFAULT_READONLY``.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path

from jobdesk.errors import ConfigError


# Listing a group means taking part: your complete results are published there. A member who
# should only read says readonly=True (a member without write permission gets a warning).
DEFAULT_READONLY = False


@dataclass(frozen=True)
class Group:
    """A group cache to use: a path or an fsspec URL; read-write unless ``readonly=True``."""

    location: str
    readonly: bool = DEFAULT_READONLY
    name: str | None = None
    # may hold secrets: kept out of repr (and so out of logs and printed settings)
    storage_options: dict = field(default_factory=dict, compare=False, repr=False)

    def __post_init__(self):
        object.__setattr__(self, "location", str(self.location))


def as_groups(groups) -> list[Group]:
    """``Desk(groups=...)`` in canonical form: a bare location string is ``Group(location)``."""
    if groups is None:
        return []
    if isinstance(groups, (str, os.PathLike, Group)):
        groups = [groups]
    out = []
    for item in groups:
        if isinstance(item, Group):
            out.append(item)
        elif isinstance(item, (str, os.PathLike)):
            out.append(Group(str(item)))
        else:
            raise ConfigError(f"a group is a location string or jobdesk.Group, not {item!r}")
    names = [g.name for g in out if g.name]
    if len(names) != len(set(names)) or "personal" in names:
        raise ConfigError(f"group names must be unique and not 'personal': {names}")
    return out


def groups_from_file(path: Path, entries) -> list[Group]:
    """The ``[[groups]]`` of a config file, or ConfigError naming the file, entry and key."""
    if not isinstance(entries, list):
        raise ConfigError(f"{path}: groups must be [[groups]] tables, not {type(entries).__name__}",
                          hint="write each group as a [[groups]] table with a location")
    out = []
    for i, entry in enumerate(entries, 1):
        if not isinstance(entry, dict) or not isinstance(entry.get("location"), str):
            raise ConfigError(f"{path}: [[groups]] entry {i} needs a location string",
                              hint='add location = "/path/or/url" to the entry')
        unknown = set(entry) - {"location", "name", "readonly", "storage_options"}
        if unknown:
            raise ConfigError(f"{path}: [[groups]] entry {i}: unknown keys {sorted(unknown)}",
                              hint="a group has location, name, readonly and storage_options")
        readonly = entry.get("readonly", DEFAULT_READONLY)
        if not isinstance(readonly, bool):
            raise ConfigError(f"{path}: [[groups]] entry {i}: readonly = {readonly!r}: "
                              "expected true or false", hint="write readonly = true or false")
        if not isinstance(entry.get("name", ""), str):
            raise ConfigError(f"{path}: [[groups]] entry {i}: name = {entry['name']!r}: "
                              "expected a string", hint='write name = "lab"')
        options = entry.get("storage_options") or {}
        if not isinstance(options, dict):
            raise ConfigError(f"{path}: [[groups]] entry {i}: storage_options must be a table",
                              hint="write [groups.storage_options] under the entry")
        out.append(Group(entry["location"], readonly=readonly, name=entry.get("name"),
                         storage_options=dict(options)))
    try:
        return as_groups(out)
    except ConfigError as exc:
        raise ConfigError(f"{path}: {exc.message}", hint=exc.hint) from None

"""Which group caches a desk uses: ``Desk(groups=...)`` if given, else the config file.

The config file is TOML, read with ``tomllib``: ``$JOBDESK_CONFIG`` if set, else
``<desk root>/config.toml``, else ``config.toml`` in the platform's user config directory
(``~/.config/jobdesk/`` on Linux). Each ``[[groups]]`` table has ``location`` and optionally
``name``, ``readonly`` (default false) and ``storage_options`` (passed to fsspec).
"""

from __future__ import annotations

import os
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

import platformdirs

from jobdesk.errors import ConfigError


@dataclass(frozen=True)
class Group:
    """A group cache to use: a path or an fsspec URL; read-only unless said otherwise."""

    location: str
    readonly: bool = True
    name: str | None = None
    storage_options: dict = field(default_factory=dict, compare=False)

    def __post_init__(self):
        object.__setattr__(self, "location", str(self.location))


def as_groups(groups) -> list[Group]:
    """``Desk(groups=...)`` in canonical form: a bare location string is a read-write group."""
    if groups is None:
        return []
    if isinstance(groups, (str, os.PathLike, Group)):
        groups = [groups]
    out = []
    for item in groups:
        if isinstance(item, Group):
            out.append(item)
        elif isinstance(item, (str, os.PathLike)):
            out.append(Group(str(item), readonly=False))
        else:
            raise ConfigError(f"a group is a location string or jobdesk.Group, not {item!r}")
    names = [g.name for g in out if g.name]
    if len(names) != len(set(names)) or "personal" in names:
        raise ConfigError(f"group names must be unique and not 'personal': {names}")
    return out


def config_path(root: Path) -> Path | None:
    explicit = os.environ.get("JOBDESK_CONFIG")
    if explicit:
        return Path(explicit)
    for candidate in (Path(root) / "config.toml",
                      Path(platformdirs.user_config_dir("jobdesk")) / "config.toml"):
        if candidate.is_file():
            return candidate
    return None


def configured_groups(root: Path) -> list[Group]:
    """The groups listed in the config file (none when there is no file)."""
    path = config_path(root)
    if path is None or not path.is_file():
        return []
    try:
        data = tomllib.loads(path.read_text("utf-8"))
    except (OSError, tomllib.TOMLDecodeError) as exc:
        raise ConfigError(f"cannot read {path}: {exc}", hint="fix the TOML syntax") from exc
    out = []
    for i, entry in enumerate(data.get("groups", [])):
        if not isinstance(entry, dict) or not isinstance(entry.get("location"), str):
            raise ConfigError(f"{path}: [[groups]] entry {i + 1} needs a location string")
        unknown = set(entry) - {"location", "name", "readonly", "storage_options"}
        if unknown:
            raise ConfigError(f"{path}: [[groups]] entry {i + 1}: unknown keys {sorted(unknown)}")
        out.append(Group(entry["location"], readonly=bool(entry.get("readonly", False)),
                         name=entry.get("name"),
                         storage_options=dict(entry.get("storage_options") or {})))
    return as_groups(out)

"""One settings object for a desk, built once from documented sources in a documented order.

Every process that opens a desk root (a notebook kernel, the ``jobdesk`` command, the Jupyter
server's poller and REST handlers) builds its settings here and in the same way, so a running
limit written in the config file holds whichever process happens to start the job.

Order, later sources winning: the defaults below < the config file < environment variables <
arguments (``Desk(...)`` keywords, ``build(...)``, ``jobdesk --root``, the server extension's
traitlets). The desk root is decided first, since the config file may sit in it.
docs/settings.md lists every setting once; tests/test_settings_doc.py keeps page and code equal.
"""

from __future__ import annotations

import dataclasses
import math
import os
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType

import platformdirs

from jobdesk import keys
from jobdesk.errors import BadServiceURL, ConfigError
from jobdesk.groups.config import Group, as_groups, groups_from_file

CONFIG_NAME = "config.toml"
HOME_ENV = "JOBDESK_HOME"
CONFIG_ENV = "JOBDESK_CONFIG"


def default_root() -> Path:
    """The desk root when no argument names one: ``$JOBDESK_HOME``, else the user cache dir."""
    return Path(os.environ.get(HOME_ENV) or platformdirs.user_cache_dir("jobdesk"))


# What each kind of value must be: (check, words for an error message).
def _count(value) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, float, str)):
        raise ValueError
    number = float(value) if isinstance(value, str) else value
    if isinstance(number, float) and not number.is_integer():
        raise ValueError
    if int(number) < 1:
        raise ValueError
    return int(number)


def _seconds(positive: bool):
    def check(value) -> float:
        if isinstance(value, bool) or not isinstance(value, (int, float, str)):
            raise ValueError
        number = float(value)
        if not math.isfinite(number) or number < 0 or (positive and number == 0):
            raise ValueError
        return number
    return check


def _text(value) -> str:
    if not isinstance(value, str) or not value.strip():
        raise ValueError
    return value.strip()


def _path(value) -> Path:
    if not isinstance(value, (str, os.PathLike)) or not str(value).strip():
        raise ValueError
    return Path(value)


KINDS = {
    "count": (_count, "a whole number, 1 or more"),
    "seconds": (_seconds(True), "a number of seconds greater than 0"),
    "seconds0": (_seconds(False), "a number of seconds, 0 or more"),
    "text": (_text, "a non-empty string"),
    "path": (_path, "a path"),
}


def _setting(default, meaning: str, *, kind: str | None = None, file: str = "—",
             env: str = "—", argument: str = "—", traitlet: str = "—",
             shown: str | None = None, factory=None):
    """A dataclass field carrying what docs/settings.md says about it."""
    about = {"meaning": meaning, "kind": kind, "file": file, "env": env, "argument": argument,
             "traitlet": traitlet, "shown": shown}
    if factory is not None:
        return field(default_factory=factory, metadata=about)
    return field(default=default, metadata=about)


def _user_cache() -> Path:
    return Path(platformdirs.user_cache_dir("jobdesk"))


@dataclass(frozen=True)
class Settings:
    """Every setting of a desk and of the server extension; build one with :func:`build`."""

    # The defaults are the values the code had before settings were gathered here; the running
    # limit of 4 and the tries are common practice, no source.

    root: Path = _setting(
        None, "the desk's folder: its SQLite index, its cached results, and config.toml if you "
              "put one there",
        kind="path", env=HOME_ENV, argument="`Desk(root=)`, `jobdesk --root`",
        traitlet="`JobdeskServer.root`", shown="the user cache directory", factory=_user_cache)
    config_file: Path | None = _setting(
        None, "the TOML file the config-file settings were read from (None: there was none)",
        kind="path", env=CONFIG_ENV,
        shown="`<root>/config.toml`, else `config.toml` in the user config directory, if there")
    groups: tuple[Group, ...] = _setting(
        (), "group caches looked in after the personal cache, in this order; a group is "
            "read-write unless it says readonly = true", file="`[[groups]]`",
        argument="`Desk(groups=)` (replaces the file's list)", shown="none")
    limits: Mapping[str, int] = _setting(
        None, "jobs running at once on one service, by service URL; other services get "
              "default_limit", file="`[limits]`", argument="`Desk(limits=)` (merged, per service)",
        shown="none", factory=lambda: MappingProxyType({}))
    default_limit: int = _setting(
        4, "jobs running at once on a service the limits do not name", kind="count",
        file="`default_limit`", env="JOBDESK_DEFAULT_LIMIT")
    scope: str | None = _setting(
        None, "the identity results are cached under; None: anonymous, or authenticated when "
              "the session carries credentials", kind="text", file="`scope`",
        env="JOBDESK_SCOPE", argument="`Desk(scope=)`")
    wait_window: int = _setting(
        30, "seconds one blocking UWS WAIT request may last", kind="count",
        file="`wait_window`", env="JOBDESK_WAIT_WINDOW", argument="`Desk(wait_window=)`")
    attempts: int = _setting(
        5, "HTTP tries of one request before the service counts as unreachable", kind="count",
        file="`attempts`", env="JOBDESK_ATTEMPTS", argument="`Desk(attempts=)`")
    timeout: float = _setting(
        30.0, "seconds to wait for a service's answer to one HTTP request", kind="seconds",
        file="`timeout`", env="JOBDESK_TIMEOUT", argument="`Desk(timeout=)`")
    send_tries: int = _setting(
        3, "tries to create a job that gets no answer before its record ends UNREACHED",
        kind="count", file="`send_tries`", env="JOBDESK_SEND_TRIES",
        argument="`Desk(send_tries=)`")
    poll_interval: float = _setting(
        5.0, "seconds between two passes of the Jupyter server's poller (0: no poller)",
        kind="seconds0", file="`poll_interval`", env="JOBDESK_POLL_INTERVAL",
        traitlet="`JobdeskServer.poll_interval`")
    feed_timeout: float = _setting(
        25.0, "longest a sidebar change-feed request waits, in seconds", kind="seconds0",
        file="`feed_timeout`", env="JOBDESK_FEED_TIMEOUT",
        traitlet="`JobdeskServer.feed_timeout`")
    feed_interval: float = _setting(
        1.0, "seconds between two looks at the index's change token", kind="seconds",
        file="`feed_interval`", env="JOBDESK_FEED_INTERVAL",
        traitlet="`JobdeskServer.feed_interval`")
    # Not a setting: where each value came from ("default", the file, a variable, "argument").
    sources: Mapping[str, str] = field(default_factory=lambda: MappingProxyType({}),
                                       compare=False, repr=False)

    def limit_for(self, service: str) -> int:
        """How many jobs may run at once on ``service`` (any spelling of its URL)."""
        return self.limits.get(keys.service_id(service), self.default_limit)

    def running_limits(self) -> "RunningLimits":
        return RunningLimits(self.limits, self.default_limit)

    def replace(self, *, labels: Mapping[str, str] | None = None, **arguments) -> "Settings":
        """These settings with some values given as arguments (None: keep), checked as
        :func:`build` checks them; limits merge per service, groups replace."""
        values, sources = _arguments(arguments, labels or {}, base=self)
        if not values:
            return self
        merged = dict(self.sources)
        merged.update(sources)
        return dataclasses.replace(self, **values, sources=MappingProxyType(merged))

    def as_dict(self) -> dict:
        """JSON-ready values (for ``jobdesk settings --json``); storage options left out."""
        out = {}
        for name in names():
            value = getattr(self, name)
            if isinstance(value, Path):
                value = str(value)
            elif name == "groups":
                value = [{"location": g.location, "name": g.name, "readonly": g.readonly}
                         for g in value]
            elif name == "limits":
                value = dict(value)
            out[name] = value
        return out


class RunningLimits(dict):
    """Per-service running limits (service id -> count) that answer the configured default for
    any service they do not name, whatever fallback the caller passes: code written as
    ``limits.get(service, DEFAULT_RUNNING_LIMIT)`` then applies the configured default."""

    def __init__(self, named: Mapping[str, int], default: int):
        super().__init__(named)
        self.default = default

    def __missing__(self, service: str) -> int:
        return self.default

    def get(self, service, fallback=None):   # noqa: ARG002 - the configured default wins
        return self[service]


def names() -> list[str]:
    """The settings, in the order docs/settings.md lists them."""
    return [f.name for f in dataclasses.fields(Settings) if "meaning" in f.metadata]


def about(name: str) -> Mapping:
    """What docs/settings.md says about one setting (meaning, file key, variable, ...)."""
    return {f.name: f for f in dataclasses.fields(Settings)}[name].metadata


def reference_rows() -> list[str]:
    """docs/settings.md's table, one Markdown row per setting, from the fields above."""
    rows = []
    for f in dataclasses.fields(Settings):
        meta = f.metadata
        if "meaning" not in meta:
            continue
        default = meta["shown"] if meta["shown"] is not None else f"`{f.default!r}`"
        env = f"`{meta['env']}`" if meta["env"] != "—" else "—"
        kind = str(f.type).replace("|", "\\|")   # a bare | would split the Markdown cell
        rows.append(f"| `{f.name}` | `{kind}` | {default} | {meta['file']} | {env} | "
                    f"{meta['argument']} | {meta['traitlet']} | {meta['meaning']} |")
    return rows


# --- building ----------------------------------------------------------------------------------


def build(*, environ: Mapping[str, str] | None = None, labels: Mapping[str, str] | None = None,
          **arguments) -> Settings:
    """Settings from the defaults, the config file, the environment and ``arguments`` (a
    setting's name -> value; None means not given), later ones winning. ``labels`` names where
    an argument came from, for error messages and ``Settings.sources``."""
    unknown = set(arguments) - set(names())
    if unknown:
        raise TypeError(f"unknown settings {sorted(unknown)}; known: {names()}")
    env = os.environ if environ is None else environ
    labels = dict(labels or {})
    fields = {f.name: f for f in dataclasses.fields(Settings)}
    values: dict = {}
    sources: dict[str, str] = {}

    def pick(name: str, fallback, fallback_source: str):
        if arguments.get(name) is not None:
            return _check(name, arguments[name], _label(name, labels)), _label(name, labels)
        var = fields[name].metadata["env"]
        if var != "—" and env.get(var):
            return _check(name, env[var], f"${var}"), f"${var}"
        return fallback, fallback_source

    # The root first: the config file may sit in it. Neither is read from the file itself.
    values["root"], sources["root"] = pick("root", _user_cache(), "default")
    found = _find_config(values["root"])
    values["config_file"], sources["config_file"] = pick("config_file", found, "default")
    from_file = {}
    if values["config_file"] is not None:
        from_file = read_config(values["config_file"])
    where = str(values["config_file"])
    for name in names():
        if name in ("root", "config_file"):
            continue
        fallback, source = fields[name].default, "default"
        if fields[name].default is dataclasses.MISSING:
            fallback = fields[name].default_factory()
        if name in from_file:
            fallback, source = from_file[name], where
        if name in ("groups", "limits"):
            values[name], sources[name] = fallback, source
        else:
            values[name], sources[name] = pick(name, fallback, source)
    base = Settings(**values, sources=MappingProxyType(sources))
    given = {k: v for k, v in arguments.items() if k in ("groups", "limits")}
    return base.replace(labels=labels, **given) if any(
        v is not None for v in given.values()) else base


def _find_config(root: Path) -> Path | None:
    for candidate in (Path(root) / CONFIG_NAME,
                      Path(platformdirs.user_config_dir("jobdesk")) / CONFIG_NAME):
        if candidate.is_file():
            return candidate
    return None


def _label(name: str, labels: Mapping[str, str]) -> str:
    return labels.get(name, f"argument {name}")


def _check(name: str, value, where: str):
    """A value from the environment or an argument, or ConfigError naming where and what."""
    check, expected = KINDS[about(name)["kind"]]
    try:
        return check(value)
    except (ValueError, TypeError):
        raise ConfigError(f"{where} = {value!r}: expected {expected}",
                          hint=f"give {name} {expected} ({about(name)['meaning']})") from None


def _arguments(arguments: Mapping, labels: Mapping[str, str], *, base: Settings):
    """Checked argument values (None: not given) over ``base``, and where they came from."""
    unknown = set(arguments) - set(names())
    if unknown:
        raise TypeError(f"unknown settings {sorted(unknown)}; known: {names()}")
    values, sources = {}, {}
    for name, value in arguments.items():
        if value is None:
            continue
        where = _label(name, labels)
        if name == "groups":
            values[name] = tuple(as_groups(value))
        elif name == "limits":
            merged = dict(base.limits)
            merged.update(_limits(value, where))
            values[name] = MappingProxyType(merged)
            if base.sources.get(name, "default") != "default":
                where = f"{base.sources[name]}, then {where}"
        else:
            values[name] = _check(name, value, where)
        sources[name] = where
    return values, sources


def _limits(table, where: str) -> dict[str, int]:
    """A limits table (service URL -> count), keyed by service id, or ConfigError."""
    if not isinstance(table, Mapping):
        raise ConfigError(f"{where} = {table!r}: expected a table of service URL = count",
                          hint='write [limits] then "https://host/tap" = 2')
    out = {}
    for url, count in table.items():
        try:
            sid = keys.service_id(url)
        except BadServiceURL as exc:
            raise ConfigError(f"{where} {url!r}: not a service URL ({exc.message})",
                              hint="key each limit by the service's TAP base URL "
                                   "(http or https)") from None
        out[sid] = _check("default_limit", count, f"{where} {url!r}")
    return out


def read_config(path: Path) -> dict:
    """The settings a config file sets (validated), or ConfigError naming the file and key."""
    path = Path(path)
    try:
        data = tomllib.loads(path.read_text("utf-8"))
    except FileNotFoundError:
        raise ConfigError(f"config file {path} does not exist",
                          hint=f"create it, or unset {CONFIG_ENV}") from None
    except (OSError, UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
        raise ConfigError(f"cannot read config file {path}: {exc}",
                          hint="fix the TOML syntax (https://toml.io)") from exc
    known = {name: about(name)["file"].strip("`[]") for name in names()
             if about(name)["file"] != "—"}
    by_key = {key: name for name, key in known.items()}
    unknown = sorted(set(data) - set(by_key))
    if unknown:
        raise ConfigError(f"{path}: unknown key {unknown[0]!r}",
                          hint="the config file's keys are " + ", ".join(sorted(by_key))
                               + " (docs/settings.md)")
    out = {}
    for key, value in data.items():
        name = by_key[key]
        if name == "groups":
            out[name] = tuple(groups_from_file(path, value))
        elif name == "limits":
            out[name] = MappingProxyType(_limits(value, f"{path}: [limits]"))
        else:
            out[name] = _check(name, value, f"{path}: {key}")
    return out

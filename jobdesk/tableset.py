"""The names a service publishes, as a re-run checks its renamed queries against them.

Why its own module: a re-run is checked against the new release before anything runs, and that
needs only names, compared leniently (a check must never refuse a query the service would
accept).  The names come from the desk's metadata cache (``Desk.tables``/``Desk.columns``, read
again from the service here, since a new release is newer than any cache); a service that
publishes nothing readable means "cannot check" (``None``), never an error.
"""

from __future__ import annotations

import warnings

from jobdesk.errors import JobdeskError, MetadataWarning


def _norm(name: str) -> str:
    return name.replace('"', "").upper()


class Tableset:
    """Table and column names of one service, compared case-insensitively (lenient on purpose)."""

    def __init__(self, desk, service: str, names: list[str]):
        self._desk, self._service = desk, service
        self._names = {_norm(n): n for n in names}
        self._columns: dict[str, set[str] | None] = {}

    def has_table(self, name: str) -> bool:
        return _norm(name) in self._names

    def columns(self, name: str) -> set[str] | None:
        """Upper-cased column names, or None when the service lists the table without them."""
        key = _norm(name)
        if key not in self._names:
            return None
        if key not in self._columns:
            try:
                cols = self._desk.columns(self._service, self._names[key])
            except JobdeskError:
                cols = []
            self._columns[key] = {c["name"].upper() for c in cols} or None
        return self._columns[key]


def published(desk, service: str) -> Tableset | None:
    """What ``service`` publishes now, or None when it cannot be read."""
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", MetadataWarning)   # a stale cache: still names
            tables = desk.tables(service, refresh=True)
    except JobdeskError:
        return None
    names = [t["name"] for t in tables if t.get("name")]
    return Tableset(desk, service, names) if names else None

"""What tables and columns a TAP service publishes, read from its VOSI tables resource.

Why its own module: a re-run checks its renamed queries against the new release before anything
runs, and that needs only names.  TAP 1.1 §2 makes ``{base}/tables`` optional, so every failure
here means "cannot check" (``None``), never an error: a check must not block a query the service
would accept.  VOSI 1.1 §3.5 (from memory) lets a service list tables without their columns and
serve each one at ``{base}/tables/{name}``; such tables are read one by one when asked about.
"""

from __future__ import annotations

from urllib.parse import quote

import requests
from defusedxml import ElementTree

TIMEOUT = 30.0


def _local(tag) -> str:
    return tag.rsplit("}", 1)[-1] if isinstance(tag, str) else ""


def _text(element, name: str) -> str | None:
    for child in element:
        if _local(child.tag) == name:
            return (child.text or "").strip()
    return None


class Tableset:
    """Table and column names of one service, compared case-insensitively (lenient on purpose)."""

    def __init__(self, base_url: str, tables: dict[str, set[str] | None], session=None):
        self.base_url = base_url.rstrip("/")
        self._tables = tables          # upper-cased name -> upper-cased columns (None: not read)
        self._session = session

    @property
    def names(self) -> list[str]:
        return sorted(self._tables)

    def has_table(self, name: str) -> bool:
        return _norm(name) in self._tables

    def columns(self, name: str) -> set[str] | None:
        key = _norm(name)
        if key not in self._tables:
            return None
        if self._tables[key] is None:
            self._tables[key] = _read_one(self.base_url, name, self._session)
        return self._tables[key]


def _norm(name: str) -> str:
    return name.replace('"', "").upper()


def read(base_url: str, session=None) -> Tableset | None:
    """The service's tableset, or None when it offers none or it cannot be read."""
    try:
        body = _get(f"{base_url.rstrip('/')}/tables", session)
        root = ElementTree.fromstring(body)
    except Exception:  # noqa: BLE001 - any failure only means "cannot check"
        return None
    tables: dict[str, set[str] | None] = {}
    for schema in root.iter():
        if _local(schema.tag) != "schema":
            continue
        schema_name = _text(schema, "name") or ""
        for table in schema:
            if _local(table.tag) != "table":
                continue
            name = _text(table, "name")
            if not name:
                continue
            cols = {(_text(c, "name") or "").upper() for c in table if _local(c.tag) == "column"}
            value = cols or None
            tables[_norm(name)] = value
            if "." not in name and schema_name:
                tables[_norm(f"{schema_name}.{name}")] = value
    return Tableset(base_url, tables, session) if tables else None


def _read_one(base_url: str, name: str, session) -> set[str] | None:
    try:
        root = ElementTree.fromstring(_get(f"{base_url}/tables/{quote(name)}", session))
    except Exception:  # noqa: BLE001 - cannot check this table
        return None
    cols = {(_text(c, "name") or "").upper() for c in root.iter() if _local(c.tag) == "column"}
    return cols or None


def _get(url: str, session) -> bytes:
    response = (session or requests).get(url, timeout=TIMEOUT)
    response.raise_for_status()
    return response.content

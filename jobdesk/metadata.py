"""A service's table metadata: read from VOSI tables (or TAP_SCHEMA), kept in the index.

Reading streams: the VOSI document is parsed with ``iterparse`` and every ``<table>`` is
cleared once its columns are stored, so a service with thousands of tables is never held in
memory whole.  Malformed entries (no name, a row count that is not a number) are skipped or
emptied, and named in ``skipped`` so the caller can warn.
"""

from __future__ import annotations

import io
import re
from collections.abc import Callable, Iterator
from typing import IO

from defusedxml.ElementTree import iterparse

from jobdesk import checks

XSI_TYPE = "{http://www.w3.org/2001/XMLSchema-instance}type"


def _local(tag) -> str:
    return tag.rsplit("}", 1)[-1] if isinstance(tag, str) else ""


def _text(element) -> str | None:
    value = (element.text or "").strip() if element is not None else ""
    return " ".join(value.split()) or None


def parse_tableset(source: IO[bytes], *, on_skip: Callable[[str], None]) -> Iterator[dict]:
    """Tables of a VOSI tableset (VOSI 1.1 §3.4, VODataService 1.2 ``TableSet``/``Table``), one
    at a time: ``{name, schema_name, description, nrows, columns: [{name, datatype, arraysize,
    xtype, unit, ucd, description}]}``.  A lone ``<table>`` document (a VOSI 1.1 table child) is
    read too."""
    path: list[str] = []
    schema_name: str | None = None
    position = 0
    for event, element in iterparse(source, events=("start", "end"),
                                    forbid_dtd=True, forbid_entities=True):
        tag = _local(element.tag)
        if event == "start":
            path.append(tag)
            continue
        path.pop()
        parent = path[-1] if path else ""
        if tag == "name" and parent == "schema":
            schema_name = _text(element)
        elif tag == "schema":
            schema_name = None
            element.clear()
        elif tag == "table" and parent in ("schema", "tableset", ""):
            position += 1
            table = _table(element, schema_name, position, on_skip)
            element.clear()
            if table is not None:
                yield table


def _table(element, schema_name: str | None, position: int,
           on_skip: Callable[[str], None]) -> dict | None:
    name = None
    description = None
    nrows = None
    columns: list[dict] = []
    for child in element:
        tag = _local(child.tag)
        if tag == "name":
            name = _text(child)
        elif tag == "description":
            description = _text(child)
        elif tag == "nrows":                      # VODataService 1.2 §3.5 (Table/nrows)
            raw = _text(child)
            if raw is not None:
                try:
                    nrows = int(raw)
                except ValueError:
                    on_skip(f"table {name or position}: nrows {raw!r} is not a number (ignored)")
        elif tag == "column":
            columns.append(child)
    if not name:
        on_skip(f"table #{position} of the tableset has no name (skipped)")
        return None
    out: list[dict] = []
    seen: set[str] = set()
    for i, col in enumerate(columns, 1):
        column = _column(col)
        if column is None:
            on_skip(f"table {name}: column #{i} has no name (skipped)")
        elif column["name"] in seen:
            on_skip(f"table {name}: column {column['name']} is listed twice (second skipped)")
        else:
            seen.add(column["name"])
            out.append(column)
    if schema_name and "." not in name:
        full = f"{schema_name}.{name}"            # some services list names unqualified
    else:
        full = name
    return {"name": full, "schema_name": schema_name, "description": description,
            "nrows": nrows, "columns": out}


def _column(element) -> dict | None:
    out: dict = {"name": None, "datatype": None, "arraysize": None, "xtype": None, "unit": None,
                 "ucd": None, "description": None}
    for child in element:
        tag = _local(child.tag)
        if tag in ("name", "unit", "ucd", "description"):
            out[tag] = _text(child)
        elif tag == "dataType":                   # VODataService 1.2 §3.5.2 (TableParam)
            out["datatype"] = _text(child)
            out["arraysize"] = child.get("arraysize")
            out["xtype"] = child.get("extendedType") or child.get("xtype")
    return out if out["name"] else None


# --- TAP_SCHEMA (TAP 1.1 §4) -------------------------------------------------------------------

TAP_SCHEMA_TABLES = "SELECT schema_name, table_name, description FROM TAP_SCHEMA.tables"
TAP_SCHEMA_COLUMNS = ("SELECT table_name, column_name, datatype, arraysize, xtype, unit, ucd, "
                      "description FROM TAP_SCHEMA.columns")


def tables_from_tap_schema(tables_votable: bytes, columns_votable: bytes, *,
                           on_skip: Callable[[str], None]) -> list[dict]:
    """Tables from the answers of :data:`TAP_SCHEMA_TABLES` and :data:`TAP_SCHEMA_COLUMNS`."""
    from astropy.io.votable import parse_single_table

    def rows(body: bytes) -> list[dict]:
        table = parse_single_table(io.BytesIO(body), verify="ignore").to_table()
        names = list(table.colnames)
        out = []
        for row in table:
            item = {}
            for n in names:
                value = row[n]
                if hasattr(value, "mask") and bool(getattr(value, "mask", False)):
                    value = None
                elif isinstance(value, bytes):
                    value = value.decode("utf-8", "replace")
                item[n.lower()] = None if value is None else str(value).strip() or None
            out.append(item)
        return out

    by_name: dict[str, dict] = {}
    for i, row in enumerate(rows(tables_votable), 1):
        name = row.get("table_name")
        if not name:
            on_skip(f"TAP_SCHEMA.tables row {i} has no table_name (skipped)")
            continue
        by_name[name] = {"name": name, "schema_name": row.get("schema_name"),
                         "description": row.get("description"), "nrows": None, "columns": []}
    for i, row in enumerate(rows(columns_votable), 1):
        table, column = row.get("table_name"), row.get("column_name")
        if not table or not column or table not in by_name:
            on_skip(f"TAP_SCHEMA.columns row {i} ({table}.{column}) names no known table or "
                    "no column (skipped)")
            continue
        by_name[table]["columns"].append({
            "name": column, "datatype": row.get("datatype"), "arraysize": row.get("arraysize"),
            "xtype": row.get("xtype"), "unit": row.get("unit"), "ucd": row.get("ucd"),
            "description": row.get("description")})
    return list(by_name.values())


# --- the catalogue the checker reads -----------------------------------------------------------


class CachedCatalog:
    """The checker's view of one service's metadata in the index, read one table at a time."""

    def __init__(self, index, service: str):
        self.index = index
        self.service = service
        self.known = bool(index.metadata_info(service))
        self._names: list[str] | None = None

    def table(self, name: str) -> list[checks.TableMeta]:
        out = []
        for row in self.index.meta_table_like(self.service, name):
            columns = [checks.ColumnMeta(c["name"], c["datatype"], c["unit"], c["ucd"],
                                         c["description"])
                       for c in self.index.meta_columns(self.service, row["name"])]
            out.append(checks.TableMeta(row["name"], columns, row["nrows"]))
        return out

    def table_names(self) -> list[str]:
        if self._names is None:
            self._names = [t["name"] for t in self.index.meta_tables(self.service)]
        return self._names


def fts_query(text: str) -> str | None:
    """An FTS5 query from free text: every word must appear, each as a word prefix."""
    words = re.findall(r"\w+", text or "")
    if not words:
        return None
    return " AND ".join(f'"{w}"*' for w in words[:12])


# --- reading a service -------------------------------------------------------------------------


def refresh(index, remote, service: str, *, on_skip: Callable[[str], None]) -> dict:
    """Read ``service``'s metadata (VOSI tables, else TAP_SCHEMA) into ``index``; return what
    :meth:`Index.save_metadata` says.  Raises the service's error when neither can be read."""
    from jobdesk.errors import JobdeskError, ServiceResponseInvalid
    from xml.etree.ElementTree import ParseError

    skipped: list[str] = []

    def skip(message: str) -> None:
        skipped.append(message)
        on_skip(message)

    first_error: Exception | None = None
    try:
        with remote.open_tables() as response:
            counted = {"columns": 0}

            def tables():
                for t in parse_tableset(response.raw, on_skip=skip):
                    counted["columns"] += len(t["columns"])
                    yield t
            saved = index.save_metadata(service, tables(), source="vosi", skipped=skipped)
        if saved["tables"] and saved["columns"]:
            saved["skipped"] = skipped
            return saved
        first_error = ServiceResponseInvalid("the VOSI tables document lists no columns",
                                             service=service)
    except (JobdeskError, ParseError, ValueError) as exc:
        first_error = exc
    skipped.clear()
    try:
        tables_body = remote.sync(TAP_SCHEMA_TABLES)
        columns_body = remote.sync(TAP_SCHEMA_COLUMNS)
        found = tables_from_tap_schema(tables_body, columns_body, on_skip=skip)
    except JobdeskError:
        if isinstance(first_error, JobdeskError):
            raise first_error from None
        raise
    saved = index.save_metadata(service, found, source="tap_schema", skipped=skipped)
    saved["skipped"] = skipped
    return saved

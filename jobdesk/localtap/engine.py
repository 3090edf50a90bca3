"""The query engine behind localtap: ADQL in, typed rows out, over SQLite.

Why its own module: the HTTP/UWS side should know nothing about SQL.  It hands over ADQL text,
MAXREC and uploaded tables and gets back column metadata and a row stream; this module owns the
databases (the invented catalogue, TAP_SCHEMA and users' own files), opens one connection per
query (so it is thread-safe) and turns SQLite's loosely typed values into the declared VOTable
types.  Geometry cells come out as tuples of floats (DALI 1.1 double arrays).
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import random
import re
import sqlite3
import tempfile
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

from sqlglot import exp

from . import catalogue, geometry
from .adql import UNKNOWN, AdqlError, Resolved, adql_mod, adql_truncate, ident_matches, translate
from .tapschema import (TAP_SCHEMA, TAP_SCHEMA_TABLES, Column, ForeignKey, SchemaInfo, TableInfo,
                        physical_name, write_tap_schema)

__all__ = ["AdqlError", "Column", "Engine", "ForeignKey", "QueryResult", "TableInfo"]

USER_SCHEMA = "user"
UPLOAD_SCHEMA = "TAP_UPLOAD"
_PEEK_ROWS = 64


@dataclass
class QueryResult:
    """Columns, then rows streamed from SQLite; ``overflow`` is known once ``rows`` is exhausted."""

    columns: list[Column]
    rows: Iterator[tuple] = field(default_factory=lambda: iter(()))
    overflow: bool = False
    sql: str = ""  # the SQLite text run, for logs and debugging


class Engine:
    """Runs ADQL over the invented catalogue, TAP_SCHEMA, user files and uploads."""

    def __init__(self, state_dir: Path, *, rows: int = 20000, seed: int = 20261202,
                 files: Sequence[Path] = ()):
        self.state_dir = Path(state_dir)
        self.state_dir.mkdir(parents=True, exist_ok=True)
        self.rows, self.seed = rows, seed
        self.catalogue_path = catalogue.ensure_catalogue(self.state_dir, rows, seed)
        user = [_read_user_file(Path(f)) for f in files]
        names = [t.name for t, _ in user]
        if len(set(n.lower() for n in names)) != len(names):
            raise ValueError(f"two user files map to the same table name: {names}")
        schemas = [SchemaInfo(TAP_SCHEMA, "Metadata of this service (TAP 1.1 §4)"),
                   *catalogue.SCHEMAS]
        if user:
            schemas.append(SchemaInfo(USER_SCHEMA, "Tables served from the user's own files"))
        self._tables: list[TableInfo] = [*TAP_SCHEMA_TABLES, *catalogue.TABLES,
                                         *(t for t, _ in user)]
        self.aux_path = self._ensure_aux(schemas, user, files)
        self._resolved: list[Resolved] = []
        for t in TAP_SCHEMA_TABLES:
            self._resolved.append(Resolved(t, "aux", physical_name(t)))
        for t in catalogue.TABLES:
            self._resolved.append(Resolved(t, "main", catalogue.PHYSICAL[t.qualified]))
        for t, _ in user:
            self._resolved.append(Resolved(t, "aux", physical_name(t), _positional(t.columns)))

    # -- public API --

    def tables(self) -> list[TableInfo]:
        """Every published table (TAP_SCHEMA, the catalogue, user files), for VOSI /tables."""
        return list(self._tables)

    def execute(self, adql: str, *, maxrec: int | None,
                uploads: Mapping[str, object] | None = None) -> QueryResult:
        """Translate and start one query; errors in the ADQL raise :class:`AdqlError` here."""
        if maxrec is not None and maxrec < 0:
            raise AdqlError("MAXREC must not be negative")
        upload_tables = _prepare_uploads(uploads or {})
        lookup_list = self._resolved + [r for r, _ in upload_tables]

        def lookup(schema: exp.Identifier | None, name: exp.Identifier) -> Resolved | None:
            hits = [r for r in lookup_list if ident_matches(name, r.table.name)
                    and (schema is None or ident_matches(schema, r.table.schema))]
            if schema is None and len(hits) > 1:
                raise AdqlError(f"table name {name.this!r} is ambiguous; qualify it with its schema")
            return hits[0] if hits else None

        translation = translate(adql, lookup)
        conn, errors = self._connect(upload_tables)
        try:
            cursor = conn.execute(translation.sql)
            first = cursor.fetchmany(_PEEK_ROWS if maxrec is None else min(_PEEK_ROWS, maxrec + 1))
        except sqlite3.Error as exc:
            conn.close()
            raise _runtime_error(exc, errors) from None
        columns = [_settle_type(c, i, first) for i, c in enumerate(translation.columns)]
        result = QueryResult(columns=columns, sql=translation.sql)
        result.rows = self._stream(result, conn, cursor, first, maxrec, errors)
        return result

    # -- internals --

    def _stream(self, result: QueryResult, conn, cursor, first, maxrec, errors) -> Iterator[tuple]:
        converters = [_converter(c) for c in result.columns]
        if maxrec == 0:
            result.overflow = bool(first)
        try:
            count = 0
            rows = iter(first)
            while True:
                for row in rows:
                    if maxrec is not None and count >= maxrec:
                        result.overflow = True
                        return
                    count += 1
                    yield tuple(None if v is None else f(v) for f, v in zip(converters, row))
                if rows is cursor:
                    return
                rows = cursor
        except sqlite3.Error as exc:
            raise _runtime_error(exc, errors) from None
        finally:
            conn.close()

    def _connect(self, uploads: list[tuple[Resolved, object]]) -> tuple[sqlite3.Connection, list[str]]:
        conn = sqlite3.connect(f"file:{self.catalogue_path}?mode=ro", uri=True,
                               check_same_thread=False)
        conn.execute("ATTACH DATABASE ? AS aux", (f"file:{self.aux_path}?mode=ro",))
        conn.execute("PRAGMA case_sensitive_like = ON")  # ADQL LIKE is case-sensitive
        errors: list[str] = []
        geometry.register(conn, errors)
        _register_math(conn)
        if uploads:
            conn.execute("ATTACH DATABASE ':memory:' AS tap_upload")
            for resolved, table in uploads:
                _write_table(conn, f'tap_upload."{resolved.physical}"', resolved.table.columns, table)
        conn.execute("PRAGMA query_only = ON")
        return conn, errors

    def _ensure_aux(self, schemas, user, files) -> Path:
        """TAP_SCHEMA and user tables live in a small database rebuilt when the files change."""
        fingerprint = [self.catalogue_path.name, catalogue.LAYOUT_VERSION, 2]
        for f in files:
            st = Path(f).stat()
            fingerprint.append([str(Path(f).resolve()), st.st_size, st.st_mtime_ns])
        digest = hashlib.sha256(json.dumps(fingerprint).encode()).hexdigest()[:16]
        path = self.state_dir / f"aux-{digest}.sqlite"
        if path.exists():
            return path
        fd, tmp_name = tempfile.mkstemp(dir=self.state_dir, prefix=".aux-", suffix=".tmp")
        os.close(fd)
        tmp = Path(tmp_name)
        try:
            conn = sqlite3.connect(tmp)
            try:
                write_tap_schema(conn, schemas, self._tables)
                for info, table in user:
                    _write_table(conn, f'"{physical_name(info)}"', info.columns, table)
                conn.commit()
            finally:
                conn.close()
            os.replace(tmp, path)
        finally:
            tmp.unlink(missing_ok=True)
        return path


# --- result types -------------------------------------------------------------------------------


def _settle_type(col: Column, index: int, sample: list[tuple]) -> Column:
    """Give a column whose type could not be inferred the type of its first non-NULL value."""
    if col.datatype != UNKNOWN:
        return col
    for row in sample:
        v = row[index]
        if v is None:
            continue
        if geometry.is_geometry_text(v):
            return Column(col.name, "double", arraysize="*", unit="deg", xtype=geometry.dali_xtype(v))
        if isinstance(v, bool):
            return Column(col.name, "boolean")
        if isinstance(v, int):
            return Column(col.name, "long")
        if isinstance(v, float):
            return Column(col.name, "double")
        break
    return Column(col.name, "char", arraysize="*")


def _to_int(v):
    return int(v) if isinstance(v, int | float) and not (isinstance(v, float) and math.isnan(v)) else v


def _to_float(v):
    return float(v) if isinstance(v, int | float) else v


def _to_geometry(v):
    return geometry.dali_values(v) if isinstance(v, str) else v


def _converter(col: Column):
    if col.xtype in ("point", "circle", "polygon"):
        return _to_geometry
    if col.datatype in ("short", "int", "long"):
        return _to_int
    if col.datatype in ("float", "double"):
        return _to_float
    if col.datatype == "boolean":
        return bool
    return str


def _runtime_error(exc: sqlite3.Error, errors: list[str]) -> AdqlError:
    if errors:
        return AdqlError(errors[-1])
    return AdqlError(f"the query failed while running: {exc}")


# --- math SQLite may lack -----------------------------------------------------------------------


def _cot(x):
    return None if x is None else 1.0 / math.tan(x)


def _rand(seed=None):
    return random.Random(seed).random() if seed is not None else random.random()


def _py(fn):
    def call(*args):
        if any(a is None for a in args):
            return None
        try:
            return fn(*args)
        except (ValueError, ZeroDivisionError, OverflowError):
            return None  # SQLite's own math functions answer NULL outside their domain
    return call


# name, arity, Python fallback (used only when this SQLite build lacks the function)
_MATH = [
    ("ln", 1, math.log), ("log", 2, lambda b, x: math.log(x, b)), ("log10", 1, math.log10),
    ("exp", 1, math.exp), ("power", 2, math.pow), ("sqrt", 1, math.sqrt), ("sin", 1, math.sin),
    ("cos", 1, math.cos), ("tan", 1, math.tan), ("asin", 1, math.asin), ("acos", 1, math.acos),
    ("atan", 1, math.atan), ("atan2", 2, math.atan2), ("degrees", 1, math.degrees),
    ("radians", 1, math.radians), ("pi", 0, lambda: math.pi), ("ceil", 1, lambda x: float(math.ceil(x))),
    ("floor", 1, lambda x: float(math.floor(x))),
    ("sign", 1, lambda x: (x > 0) - (x < 0)),
]
_missing_math: list[tuple[str, int, object]] | None = None


def _register_math(conn: sqlite3.Connection) -> None:
    global _missing_math
    if _missing_math is None:
        missing = []
        for name, nargs, fn in _MATH:
            args = ", ".join(["0.5"] * nargs)
            try:
                conn.execute(f"SELECT {name}({args})").fetchone()
            except sqlite3.OperationalError:
                missing.append((name, nargs, fn))
        _missing_math = missing
    for name, nargs, fn in _missing_math:
        conn.create_function(name, nargs, _py(fn), deterministic=True)
    conn.create_function("cot", 1, _py(_cot), deterministic=True)
    conn.create_function("adql_mod", 2, adql_mod, deterministic=True)
    conn.create_function("adql_truncate", 2, adql_truncate, deterministic=True)
    conn.create_function("adql_rand", -1, _rand)


# --- tables from files and uploads --------------------------------------------------------------

_IDENT = re.compile(r"[A-Za-z][A-Za-z0-9_]*\Z")


def _positional(columns: list[Column]) -> dict[str, str]:
    """SQLite names c0, c1, ... for user columns: no quoting or case clash can bite."""
    return {c.name: f"c{i}" for i, c in enumerate(columns)}


def _table_name(stem: str) -> str:
    name = re.sub(r"[^a-z0-9_]", "_", stem.lower())
    return name if name[:1].isalpha() else f"t_{name}"


def _read_user_file(path: Path):
    from astropy.table import Table

    suffix = path.suffix.lower()
    fmt = {".csv": "ascii.csv", ".parquet": "parquet", ".pq": "parquet", ".vot": "votable",
           ".xml": "votable", ".votable": "votable"}.get(suffix)
    if fmt is None:
        raise ValueError(f"{path}: serve CSV (.csv), Parquet (.parquet) or VOTable (.vot, .xml) files")
    table = Table.read(path, format=fmt)
    info = TableInfo(USER_SCHEMA, _table_name(path.stem), f"served from the file {path.name}",
                     _describe(table, str(path)))
    return info, table


def _describe(table, where: str) -> list[Column]:
    cols = []
    seen: set[str] = set()
    for name in table.colnames:
        col = table[name]
        if col.ndim > 1:
            raise ValueError(f"{where}: column {name!r} holds arrays, which are not supported")
        if name.lower() in seen:
            raise ValueError(f"{where}: column names {name!r} differ only in case")
        seen.add(name.lower())
        cols.append(Column(name, _datatype(col), arraysize="*" if col.dtype.kind in "USO" else None,
                           unit=_unit(col), ucd=(col.meta or {}).get("ucd"),
                           description=col.description or None))
    return cols


def _datatype(col) -> str:
    kind, size = col.dtype.kind, col.dtype.itemsize
    if kind == "b":
        return "boolean"
    if kind in "iu":
        if kind == "u" and size >= 4 or size >= 8:
            return "long"
        return "int" if size >= 4 else "short"
    if kind == "f":
        return "float" if size == 4 else "double"
    if kind in "USO":
        values = [v for v in col.tolist() if v is not None]
        if all(isinstance(v, str) and v.isascii() or isinstance(v, bytes) for v in values):
            return "char"
        return "unicodeChar"
    raise ValueError(f"column {col.name!r} has a type that cannot be served ({col.dtype})")


def _unit(col) -> str | None:
    if col.unit is None:
        return None
    try:
        return col.unit.to_string("vounit")
    except (ValueError, AttributeError):
        return str(col.unit)


def _cell(v):
    if isinstance(v, bytes):
        return v.decode("utf-8", "replace")
    if isinstance(v, float) and math.isnan(v):
        return None
    return v


def _write_table(conn: sqlite3.Connection, target: str, columns: list[Column], table) -> None:
    phys = _positional(columns)
    types = {"boolean": "INTEGER", "short": "INTEGER", "int": "INTEGER", "long": "INTEGER",
             "float": "REAL", "double": "REAL"}
    decl = ", ".join(f'{phys[c.name]} {types.get(c.datatype, "TEXT")}' for c in columns)
    conn.execute(f"CREATE TABLE {target} ({decl})")
    data = []
    for c in columns:
        col = table[c.name]
        mask = getattr(col, "mask", None)
        values = [_cell(v) for v in col.tolist()]
        if mask is not None and mask is not False:
            values = [None if m else v for v, m in zip(values, list(mask))]
        if c.datatype == "boolean":
            values = [None if v is None else int(bool(v)) for v in values]
        data.append(values)
    marks = ", ".join("?" * len(columns))
    conn.executemany(f"INSERT INTO {target} VALUES ({marks})", zip(*data))


def _prepare_uploads(uploads: Mapping[str, object]) -> list[tuple[Resolved, object]]:
    from astropy.table import Table

    out = []
    for name, table in uploads.items():
        if not _IDENT.match(name):
            raise AdqlError(f"upload name {name!r} is not an ADQL identifier (letters, digits, _)")
        if not isinstance(table, Table):
            table = Table(table)
        try:
            columns = _describe(table, f"upload {name!r}")
        except ValueError as exc:
            raise AdqlError(str(exc)) from None
        info = TableInfo(UPLOAD_SCHEMA, name, "uploaded with the query", columns)
        out.append((Resolved(info, "tap_upload", name.lower(), _positional(columns)), table))
    return out

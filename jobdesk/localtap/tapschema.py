"""Table metadata and the TAP_SCHEMA tables that publish it (TAP 1.1 §4).

Why its own module: the same descriptions feed three readers — the ADQL translator (which
columns exist, their types), VOSI /tables, and the queryable TAP_SCHEMA — so they are defined
once here, as plain dataclasses, and TAP_SCHEMA's rows are derived from them.
"""

from __future__ import annotations

import sqlite3
from dataclasses import dataclass, field, replace


@dataclass
class Column:
    """One column's VOTable FIELD metadata (DALI/VOTable datatypes)."""

    name: str
    datatype: str  # boolean short int long float double char unicodeChar
    arraysize: str | None = None
    unit: str | None = None
    ucd: str | None = None
    description: str | None = None
    xtype: str | None = None
    utype: str | None = None
    principal: bool = False
    indexed: bool = False
    std: bool = False

    def renamed(self, name: str) -> Column:
        return replace(self, name=name)


@dataclass
class ForeignKey:
    """A TAP_SCHEMA.keys row with its key_columns (TAP 1.1 §4.4, §4.5)."""

    key_id: str
    from_table: str
    target_table: str
    columns: list[tuple[str, str]]  # (from_column, target_column)
    description: str | None = None


@dataclass
class TableInfo:
    """A table as VOSI /tables and TAP_SCHEMA.tables describe it."""

    schema: str
    name: str
    description: str | None
    columns: list[Column]
    table_type: str = "table"
    foreign_keys: list[ForeignKey] = field(default_factory=list)

    @property
    def qualified(self) -> str:
        return f"{self.schema}.{self.name}"


@dataclass
class SchemaInfo:
    name: str
    description: str | None


TAP_SCHEMA = "TAP_SCHEMA"


def _c(name, datatype, description, *, arraysize=None, principal=True, indexed=False) -> Column:
    return Column(name, datatype, arraysize=arraysize, description=description,
                  principal=principal, indexed=indexed, std=True)


# TAP 1.1 §4.1-4.5: the standard columns of the five TAP_SCHEMA tables
TAP_SCHEMA_TABLES = [
    TableInfo(TAP_SCHEMA, "schemas", "Schemas published by this service", [
        _c("schema_name", "char", "schema name, as used in queries", arraysize="*", indexed=True),
        _c("utype", "char", "utype of the schema", arraysize="*", principal=False),
        _c("description", "char", "what the schema holds", arraysize="*"),
        _c("schema_index", "int", "suggested display order", principal=False),
    ]),
    TableInfo(TAP_SCHEMA, "tables", "Tables published by this service", [
        _c("schema_name", "char", "schema the table belongs to", arraysize="*", indexed=True),
        _c("table_name", "char", "fully qualified table name", arraysize="*", indexed=True),
        _c("table_type", "char", "table or view", arraysize="*"),
        _c("utype", "char", "utype of the table", arraysize="*", principal=False),
        _c("description", "char", "what the table holds", arraysize="*"),
        _c("table_index", "int", "suggested display order", principal=False),
    ]),
    TableInfo(TAP_SCHEMA, "columns", "Columns of the published tables", [
        _c("table_name", "char", "fully qualified table name", arraysize="*", indexed=True),
        _c("column_name", "char", "column name", arraysize="*", indexed=True),
        _c("datatype", "char", "VOTable datatype", arraysize="*"),
        _c("arraysize", "char", "VOTable arraysize", arraysize="*"),
        _c("xtype", "char", "DALI xtype", arraysize="*"),
        _c("size", "int", "length of fixed-size arrays (deprecated in TAP 1.1)", principal=False),
        _c("description", "char", "what the column holds", arraysize="*"),
        _c("utype", "char", "utype of the column", arraysize="*", principal=False),
        _c("unit", "char", "unit in VOUnit syntax", arraysize="*"),
        _c("ucd", "char", "UCD1+ of the column", arraysize="*"),
        _c("indexed", "int", "1 if the column is indexed"),
        _c("principal", "int", "1 if the column is of main interest"),
        _c("std", "int", "1 if the column is defined by a standard"),
        _c("column_index", "int", "suggested display order", principal=False),
    ]),
    TableInfo(TAP_SCHEMA, "keys", "Foreign keys between published tables", [
        _c("key_id", "char", "key identifier", arraysize="*", indexed=True),
        _c("from_table", "char", "table holding the foreign key", arraysize="*"),
        _c("target_table", "char", "table the key points to", arraysize="*"),
        _c("description", "char", "what the key means", arraysize="*"),
        _c("utype", "char", "utype of the key", arraysize="*", principal=False),
    ]),
    TableInfo(TAP_SCHEMA, "key_columns", "Columns of the foreign keys", [
        _c("key_id", "char", "key identifier", arraysize="*", indexed=True),
        _c("from_column", "char", "column in from_table", arraysize="*"),
        _c("target_column", "char", "column in target_table", arraysize="*"),
    ]),
]


def physical_name(table: TableInfo) -> str:
    """SQLite name of a TAP_SCHEMA or user table inside the auxiliary database."""
    return f"{table.schema.lower()}__{table.name}"


def write_tap_schema(conn: sqlite3.Connection, schemas: list[SchemaInfo],
                     tables: list[TableInfo]) -> None:
    """Create and fill the five TAP_SCHEMA tables describing ``tables`` (themselves included)."""
    for t in TAP_SCHEMA_TABLES:
        cols = ", ".join(f'"{c.name}" {_sql_type(c)}' for c in t.columns)
        conn.execute(f'CREATE TABLE "{physical_name(t)}" ({cols})')
    rows = {
        "schemas": [(s.name, None, s.description, i) for i, s in enumerate(schemas)],
        "tables": [(t.schema, t.qualified, t.table_type, None, t.description, i)
                   for i, t in enumerate(tables)],
        "columns": [(t.qualified, c.name, c.datatype, c.arraysize, c.xtype, _size(c), c.description,
                     c.utype, c.unit, c.ucd, int(c.indexed), int(c.principal), int(c.std), j)
                    for t in tables for j, c in enumerate(t.columns)],
        "keys": [(k.key_id, k.from_table, k.target_table, k.description, None)
                 for t in tables for k in t.foreign_keys],
        "key_columns": [(k.key_id, f, g) for t in tables for k in t.foreign_keys for f, g in k.columns],
    }
    for t in TAP_SCHEMA_TABLES:
        marks = ", ".join("?" * len(t.columns))
        conn.executemany(f'INSERT INTO "{physical_name(t)}" VALUES ({marks})', rows[t.name])


def _size(c: Column) -> int | None:
    if c.arraysize and c.arraysize.isdigit():
        return int(c.arraysize)
    return None


def _sql_type(c: Column) -> str:
    if c.datatype in ("short", "int", "long", "boolean"):
        return "INTEGER"
    if c.datatype in ("float", "double") and not c.arraysize:
        return "REAL"
    return "TEXT"

"""Fixtures for the embedded service's HTTP tests: a real server on a free loopback port."""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path
from typing import Iterator

import pytest
import requests

from jobdesk.localtap import serve

# --- stand-in engine --------------------------------------------------------------------------
# The query engine is written in parallel (jobdesk/localtap/engine.py); until it is in the tree
# these tests run the real HTTP service over this stand-in, which implements the engine's
# interface over an in-memory list and understands only `SELECT [TOP n] cols FROM table`.
# It is replaced by the real Engine as soon as that module can be imported.


@dataclass
class Column:
    name: str
    datatype: str
    arraysize: str | None = None
    unit: str | None = None
    ucd: str | None = None
    description: str | None = None
    xtype: str | None = None


@dataclass
class QueryResult:
    columns: list
    rows: Iterator[tuple]
    overflow: bool = False


@dataclass
class TableInfo:
    schema: str
    name: str
    description: str
    columns: list


class AdqlError(Exception):
    def __init__(self, message, line=None, column=None):
        super().__init__(message)
        self.message, self.line, self.column = message, line, column


SOURCES = [Column("source_id", "long", ucd="meta.id;meta.main"),
           Column("ra", "double", unit="deg", ucd="pos.eq.ra;meta.main"),
           Column("dec", "double", unit="deg", ucd="pos.eq.dec;meta.main"),
           Column("mag_cyan", "float", unit="mag", ucd="phot.mag"),
           Column("class_label", "char", arraysize="*", ucd="src.class")]


class StandInEngine:
    def __init__(self, rows: int = 200):
        labels = ["star", "galaxy", None, "qso"]
        self.data = [(7_300_000_000_000 + i, (i * 7.3) % 360, -80 + (i * 1.7) % 160,
                      None if i % 11 == 0 else 12 + (i % 90) / 10, labels[i % 4])
                     for i in range(rows)]

    def tables(self):
        return [TableInfo("orrery", "orrery.sources", "invented sources", SOURCES)]

    def execute(self, adql, *, maxrec, uploads=None):
        pattern = re.compile(r"\s*SELECT\s+(?:TOP\s+(\d+)\s+)?(.+?)\s+FROM\s+([\w.]+)\s*$",
                             re.I | re.S)
        match = pattern.match(adql)
        if not match:
            word = re.search(r"\S+", adql)
            raise AdqlError(f"cannot parse the query near {word.group(0) if word else ''!r}",
                            line=1, column=(word.start() + 1) if word else 1)
        top, cols, table = match.groups()
        if table.lower() == "orrery.sources":
            columns, data = SOURCES, self.data
        elif table.lower().startswith("tap_upload."):
            upload = (uploads or {})[table.split(".", 1)[1]]
            columns = [Column(n, "double" if upload[n].dtype.kind == "f" else
                              "long" if upload[n].dtype.kind == "i" else "unicodeChar")
                       for n in upload.colnames]
            data = [tuple(None if v is None else (v.item() if hasattr(v, "item") else str(v))
                          for v in row) for row in upload.iterrows()]
        else:
            raise AdqlError(f"table {table} does not exist", line=1, column=match.start(3) + 1)
        if cols.strip() != "*":
            names = [c.strip() for c in cols.split(",")]
            index = {c.name: i for i, c in enumerate(columns)}
            missing = [n for n in names if n not in index]
            if missing:
                raise AdqlError(f"column {missing[0]} does not exist", line=1, column=1)
            columns = [columns[index[n]] for n in names]
            data = [tuple(row[index[n]] for n in names) for row in data]
        if top is not None:
            data = data[: int(top)]
        limit = len(data) if maxrec is None else maxrec
        result = QueryResult(columns, iter(()), False)

        def rows():
            for i, row in enumerate(data):
                if i >= limit:
                    result.overflow = True
                    return
                yield row

        result.rows = rows()
        return result


def make_engine(state_dir: Path):
    try:
        from jobdesk.localtap.engine import Engine
    except ImportError:
        return StandInEngine()
    return Engine(state_dir, rows=2000)


# --- fixtures ---------------------------------------------------------------------------------


@pytest.fixture(scope="session")
def shared_tap(tmp_path_factory):
    """One service for tests that do not change faults or depend on counters."""
    state = tmp_path_factory.mktemp("localtap-shared")
    with serve(state=state, engine=make_engine(state)) as tap:
        yield tap


@pytest.fixture
def tap_factory(tmp_path):
    """Start a private service with given faults; stopped at the end of the test."""
    import contextlib
    stack = contextlib.ExitStack()

    def start(state: Path | None = None, **faults):
        state = Path(state or tmp_path / "state")
        return stack.enter_context(serve(state=state, engine=make_engine(state), **faults))

    with stack:
        yield start


@pytest.fixture
def http():
    with requests.Session() as session:
        yield session

"""Shaping a query against the independent TAP server (DaCHS): its metadata, the checker's
verdicts next to the server's own, and the estimate next to what the server returns.

pyvo is the reference client for counts; DaCHS itself is the judge of which queries are valid.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest
import pyvo
import requests

from jobdesk import Desk, QueryRejected
from jobdesk import metadata
from jobdesk.checks import errors, from_service
from jobdesk.remote import Remote

from interop_support import SLOW, TABLE, TAP_URL

HERE = Path(__file__).resolve().parent


def interop_queries() -> list[str]:
    """Every query text the interop tests send, with their f-string names filled in."""
    values = {"TABLE": TABLE, "SLOW": SLOW, "marker": "jd-check", "i": "0"}
    found: set[str] = set()
    for path in sorted(HERE.glob("test_*.py")):
        if path.name == Path(__file__).name:
            continue
        tree = ast.parse(path.read_text())
        pieces = {id(v) for n in ast.walk(tree) if isinstance(n, ast.JoinedStr) for v in n.values}
        for node in ast.walk(tree):
            text = None
            if isinstance(node, ast.Constant) and isinstance(node.value, str) \
                    and id(node) not in pieces:
                text = node.value
            elif isinstance(node, ast.JoinedStr):
                parts = []
                for v in node.values:
                    if isinstance(v, ast.Constant):
                        parts.append(str(v.value))
                    elif isinstance(v, ast.FormattedValue) and isinstance(v.value, ast.Name) \
                            and v.value.id in values:
                        parts.append(values[v.value.id])
                    else:
                        parts = None
                        break
                text = "".join(parts) if parts is not None else None
            if text and text.lstrip()[:6].upper() == "SELECT" and " FROM " in text.upper():
                found.add(text)
    return sorted(found)


def server_refuses(adql: str) -> str | None:
    """The server's error message for ``adql``, or None when it accepts it (MAXREC=0: the
    query is planned and checked, no rows are sent; TAP 1.1 §2.7.4)."""
    r = requests.post(f"{TAP_URL}/sync", data={"LANG": "ADQL", "QUERY": adql, "MAXREC": "0"},
                      timeout=120)
    if b'value="ERROR"' in r.content:
        return r.text
    return None


@pytest.fixture(scope="module")
def desk(tmp_path_factory):
    desk = Desk(tmp_path_factory.mktemp("shape"))
    desk.tables(TAP_URL)
    return desk


def test_metadata_of_the_independent_server(desk):
    names = [t["name"] for t in desk.tables(TAP_URL)]
    assert TABLE in names and SLOW in names
    cols = {c["name"]: c for c in desk.columns(TAP_URL, TABLE)}
    # the resource descriptor of the server's table (tests/interop/rd/q.rd) says these
    assert cols["ra"]["unit"] == "deg" and cols["ra"]["ucd"] == "pos.eq.ra;meta.main"
    assert cols["label"]["datatype"] == "char" and cols["quality"]["datatype"] == "short"
    assert any(h["column"] == "mag_blue" for h in desk.find(TAP_URL, "blue band"))
    # the same columns through TAP_SCHEMA (TAP 1.1 §4), the fallback path
    remote = Remote(TAP_URL)
    from_schema = metadata.tables_from_tap_schema(
        remote.sync(metadata.TAP_SCHEMA_TABLES), remote.sync(metadata.TAP_SCHEMA_COLUMNS),
        on_skip=lambda m: None)
    schema_cols = next(t for t in from_schema if t["name"] == TABLE)["columns"]
    assert {c["name"]: c["unit"] for c in schema_cols} == {n: c["unit"] for n, c in cols.items()}


def test_no_false_error_on_any_query_the_interop_tests_run(desk):
    queries = interop_queries()
    assert len(queries) >= 15
    clean = 0
    for adql in queries:
        found = errors(desk.check(TAP_URL, adql))
        if not found:
            clean += 1
            continue
        # the checker said "error": the server must refuse it too
        assert server_refuses(adql) is not None, (adql, [str(f) for f in found])
    # Only queries written to fail (unknown columns, bad syntax) may be flagged; each flagged one
    # was refused by the server above, so this bound only keeps the check from saying nothing.
    assert clean >= len(queries) // 2, (clean, len(queries))


def test_unknown_column_caught_locally_and_by_the_server_at_the_same_token(desk):
    adql = f"SELECT obj_id,\n       nosuchcol, ra\nFROM {TABLE}\nWHERE quality = 0"
    local = errors(desk.check(TAP_URL, adql))
    assert [f.code for f in local] == ["unknown-column"]
    with pytest.raises(pyvo.dal.DALQueryError) as err:          # the server's own words
        pyvo.dal.TAPService(TAP_URL).run_sync(adql)
    served = from_service(adql, str(err.value))
    assert served is not None
    assert (served.line, served.column) == (local[0].line, local[0].column) == (2, 8)
    # and submit refuses it before a job is made
    with pytest.raises(QueryRejected):
        desk.submit(TAP_URL, adql)


def test_estimate_rows_equal_the_full_result_and_pyvo_count(desk):
    adql = f"SELECT obj_id, ra, dec FROM {TABLE} WHERE quality = 0 AND mag_blue < 19 ORDER BY obj_id"
    est = desk.estimate(TAP_URL, adql, maxrec=20000)
    ref = pyvo.dal.TAPService(TAP_URL).run_sync(
        f"SELECT COUNT(*) AS n FROM {TABLE} WHERE quality = 0 AND mag_blue < 19").to_table()
    assert est.rows == int(ref["n"][0]) and est.rows_exact
    assert est.over_maxrec is False
    job = desk.submit(TAP_URL, adql, maxrec=20000).wait(timeout=120, progress=False)
    assert not job.truncated and job.rows == est.rows
    assert abs(est.bytes - job.record["result_bytes"]) / job.record["result_bytes"] < 0.25


def test_estimate_of_grouped_and_distinct_queries_matches_pyvo(desk):
    svc = pyvo.dal.TAPService(TAP_URL)
    for adql in (f"SELECT quality, COUNT(*) AS n FROM {TABLE} GROUP BY quality",
                 f"SELECT DISTINCT quality FROM {TABLE} WHERE obj_id < 500",
                 f"SELECT TOP 40 obj_id FROM {TABLE} WHERE mag_red > 17 ORDER BY obj_id"):
        assert desk.estimate(TAP_URL, adql).rows == len(svc.run_sync(adql).to_table()), adql

"""desk.compare's counts against an outside reference: pandas' outer merge with indicator=True.

The reference (pandas ``DataFrame.merge(how="outer", indicator=True)``, a library no one here
wrote) decides which rows are added, removed and matched; per shared column, a value changed when
it is missing (pandas ``isna``: NULL or NaN) on one side only, or present on both and unequal.
Hypothesis generates the tables: NULLs, NaN, repeated keys and columns whose type changed.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from jobdesk.compare import compare_files
from jobdesk.errors import CompareKeyInvalid

FLOATS = st.sampled_from([0.0, 1.0, 1.5, -2.25, 1e-9, float("nan"), None])
INTS = st.one_of(st.none(), st.integers(-3, 3))
TEXTS = st.one_of(st.none(), st.sampled_from(["star", "galaxy", "qso", "", "Star"]))


@st.composite
def tables(draw, unique=True):
    """Two tables sharing key k (int64) and columns f, i, s, t (t changes type)."""
    pool = st.integers(0, 25)
    keys_old = draw(st.lists(pool, max_size=20, unique=unique))
    keys_new = draw(st.lists(pool, max_size=20, unique=unique))
    change = draw(st.sampled_from(["int->float", "float->int", "int->string", "int32->int64"]))

    def side(keys, t_type):
        n = len(keys)
        f = draw(st.lists(FLOATS, min_size=n, max_size=n))
        i = draw(st.lists(INTS, min_size=n, max_size=n))
        s = draw(st.lists(TEXTS, min_size=n, max_size=n))
        t = draw(st.lists(INTS, min_size=n, max_size=n))
        if t_type == pa.float64():
            t = [None if v is None else float(v) for v in t]
        elif t_type == pa.string():
            t = [None if v is None else str(v) for v in t]
        return pa.table({"k": pa.array(keys, pa.int64()), "f": pa.array(f, pa.float64()),
                         "i": pa.array(i, pa.int64()), "s": pa.array(s, pa.string()),
                         "t": pa.array(t, t_type)})

    before, after = {"int->float": (pa.int64(), pa.float64()),
                     "float->int": (pa.float64(), pa.int64()),
                     "int->string": (pa.int64(), pa.string()),
                     "int32->int64": (pa.int32(), pa.int64())}[change]
    return side(keys_old, before), side(keys_new, after)


def _reference(old: pa.Table, new: pa.Table, tolerance: float = 0.0) -> dict:
    a, b = old.to_pandas(), new.to_pandas()
    m = a.merge(b, on="k", how="outer", indicator=True, suffixes=("_o", "_n"))
    both = m[m["_merge"] == "both"]
    changed = {}
    for c in ("f", "i", "s", "t"):
        x, y = both[f"{c}_o"], both[f"{c}_n"]
        xm, ym = x.isna().to_numpy(), y.isna().to_numpy()
        if c == "t" and (old.schema.field("t").type == pa.string()
                         or new.schema.field("t").type == pa.string()):
            # compared as text: a number's decimal spelling
            def text(v):
                return v if isinstance(v, str) else str(int(v)) if not pd.isna(v) else None
            x, y = x.map(text), y.map(text)
        xv, yv = x.to_numpy(dtype=object), y.to_numpy(dtype=object)
        present = ~xm & ~ym
        differ = np.array([(abs(float(p) - float(q)) > tolerance) if tolerance and
                           not isinstance(p, str) else p != q
                           for p, q in zip(xv[present], yv[present])], dtype=bool)
        changed[c] = int(np.count_nonzero(xm != ym)) + int(np.count_nonzero(differ))
    counts = m["_merge"].value_counts()
    return {"added": int(counts.get("right_only", 0)), "removed": int(counts.get("left_only", 0)),
            "matched": int(counts.get("both", 0)), "changed": changed}


def _write(tmp_path, old: pa.Table, new: pa.Table):
    po, pn = tmp_path / "old.parquet", tmp_path / "new.parquet"
    pq.write_table(old, po)
    pq.write_table(new, pn)
    return po, pn


@settings(max_examples=150, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(pair=tables(), tolerance=st.sampled_from([0.0, 0.0, 0.6]))
def test_counts_equal_pandas_outer_merge(tmp_path, pair, tolerance):
    old, new = pair
    got = compare_files(*_write(tmp_path, old, new), key="k", tolerance=tolerance)
    want = _reference(old, new, tolerance)
    assert (got.added, got.removed, got.matched) == (want["added"], want["removed"], want["matched"])
    assert got.changed == want["changed"]
    assert got.rows_old == old.num_rows and got.rows_new == new.num_rows
    # the rows behind the counts
    assert got.rows("added").num_rows == got.added
    assert got.rows("removed").num_rows == got.removed
    assert got.rows("changed").num_rows == got.changed_rows <= got.matched
    assert sorted(got.rows("added")["k"].to_pylist()) == sorted(set(new["k"].to_pylist())
                                                                - set(old["k"].to_pylist()))
    t_changed = old.schema.field("t").type != new.schema.field("t").type
    assert [r["name"] for r in got.columns_retyped] == (["t"] if t_changed else [])


@settings(max_examples=80, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(pair=tables(unique=False))
def test_repeated_keys_are_an_error_naming_how_many(tmp_path, pair):
    old, new = pair
    paths = _write(tmp_path, old, new)
    repeats = {side: int(t.to_pandas()["k"][t.to_pandas()["k"].duplicated()].nunique())
               for side, t in (("old", old), ("new", new))}
    if not any(repeats.values()):
        compare_files(*paths, key="k")
        return
    with pytest.raises(CompareKeyInvalid) as caught:
        compare_files(*paths, key="k")
    side = "old" if repeats["old"] else "new"
    assert f"in the {side} result: {repeats[side]} values repeat" in caught.value.message


def test_key_from_ucd_and_errors_without_one(tmp_path):
    meta = {b"ucd": b"meta.id;meta.main"}
    schema = pa.schema([pa.field("oid", pa.int64(), metadata=meta), pa.field("x", pa.float64())])
    old = pa.table({"oid": [1, 2, 3], "x": [1.0, 2.0, 3.0]}, schema=schema)
    new = pa.table({"oid": [2, 3, 4], "x": [2.0, 3.5, 4.0]}, schema=schema)
    got = compare_files(*_write(tmp_path, old, new))
    assert got.key == "oid" and (got.added, got.removed, got.matched) == (1, 1, 2)
    assert got.changed == {"x": 1} and got.columns["x"].max_abs == 0.5
    plain = pa.table({"oid": [1], "x": [1.0]})
    with pytest.raises(CompareKeyInvalid, match="meta.id;meta.main"):
        compare_files(*_write(tmp_path, plain, plain))
    with pytest.raises(CompareKeyInvalid, match="'nope' is not in the old and new"):
        compare_files(*_write(tmp_path, plain, plain), key="nope")
    with_null = pa.table({"oid": pa.array([1, None], pa.int64()), "x": [1.0, 2.0]})
    with pytest.raises(CompareKeyInvalid, match="1 rows of the old result have no value"):
        compare_files(*_write(tmp_path, with_null, plain), key="oid")


def test_string_keys_and_report_files(tmp_path):
    old = pa.table({"name": ["a", "b", "c"], "ra": [10.0, 20.0, 30.0], "dec": [0.0, 1.0, 2.0],
                    "gone": [1, 2, 3]})
    new = pa.table({"name": ["b", "c", "d"], "ra": [20.0, 30.0, 40.0], "dec": [1.0, 2.5, 3.0],
                    "fresh": ["x", "y", "z"]})
    got = compare_files(*_write(tmp_path, old, new), key="name")
    assert (got.added, got.removed, got.matched, got.changed["dec"]) == (1, 1, 2, 1)
    assert got.columns_added == ["fresh"] and got.columns_removed == ["gone"]
    html, js = got.report(tmp_path / "r.html")
    text = html.read_text()
    assert text.startswith("<!DOCTYPE html>") and "<svg" in text and "<script" not in text
    assert "src=" not in text and "href=" not in text          # self-contained
    import json
    twin = json.loads(js.read_text())
    assert twin["comparisons"][0]["added"] == 1 and twin["comparisons"][0]["sky"]["added"]
    assert math.isclose(twin["comparisons"][0]["columns"]["dec"]["max_abs"], 0.5)

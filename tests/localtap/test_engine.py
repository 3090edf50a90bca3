"""The engine as the service uses it: catalogue files, TAP_SCHEMA, uploads, user files, MAXREC.

Real SQLite files in temporary directories throughout; nothing is mocked.
"""

from __future__ import annotations

import signal
import sqlite3
import subprocess
import sys
import time
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pytest
from astropy import units as u
from astropy.table import Table

from jobdesk.localtap import catalogue
from jobdesk.localtap.engine import AdqlError, Engine


@pytest.fixture(scope="module")
def engine(tmp_path_factory):
    return Engine(tmp_path_factory.mktemp("engine"), rows=2000, seed=99)


def all_rows(engine, adql, **kw):
    return list(engine.execute(adql, maxrec=None, **kw).rows)


# --- the catalogue ----------------------------------------------------------------------------


def test_same_seed_gives_identical_data_and_another_seed_differs(tmp_path):
    q = "SELECT * FROM orrery.sources ORDER BY orrery_id"
    a = all_rows(Engine(tmp_path / "a", rows=500, seed=1), q)
    b = all_rows(Engine(tmp_path / "b", rows=500, seed=1), q)
    c = all_rows(Engine(tmp_path / "c", rows=500, seed=2), q)
    assert a == b
    assert a != c and len(a) == len(c) == 500
    e1 = all_rows(Engine(tmp_path / "a", rows=500, seed=1), "SELECT * FROM orrery.visits")
    e2 = all_rows(Engine(tmp_path / "b", rows=500, seed=1), "SELECT * FROM orrery.visits")
    assert e1 == e2 and len(e1) == 125 * catalogue.VISITS_PER_SOURCE


def test_existing_catalogue_is_reused_not_rebuilt(tmp_path):
    Engine(tmp_path, rows=300, seed=5)
    path = catalogue.catalogue_path(tmp_path, 300, 5)
    stamp = path.stat().st_mtime_ns
    Engine(tmp_path, rows=300, seed=5)
    assert path.stat().st_mtime_ns == stamp
    assert not list(tmp_path.glob(".orrery-*"))  # no temp file left behind


def test_a_killed_build_leaves_no_catalogue_file(tmp_path):
    # a real process, killed mid-build: the final file must not exist (temp + rename)
    code = ("import sys; from pathlib import Path; from jobdesk.localtap import catalogue; "
            "catalogue.ensure_catalogue(Path(sys.argv[1]), 2_000_000, 3)")
    proc = subprocess.Popen([sys.executable, "-c", code, str(tmp_path)])
    deadline = time.monotonic() + 60
    while not list(tmp_path.glob(".orrery-*.tmp")) and time.monotonic() < deadline:
        time.sleep(0.05)
    time.sleep(0.3)
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    assert list(tmp_path.glob(".orrery-*.tmp")), "the build had started"
    assert not catalogue.catalogue_path(tmp_path, 2_000_000, 3).exists()


def test_catalogue_plants_edge_cases_and_nulls(engine):
    (north, south, wrap, nulls), = all_rows(
        engine, "SELECT SUM(CASE WHEN dec > 89.5 THEN 1 ELSE 0 END), "
                "SUM(CASE WHEN dec < -89.5 THEN 1 ELSE 0 END), "
                "SUM(CASE WHEN ra < 0.5 OR ra > 359.5 THEN 1 ELSE 0 END), "
                "SUM(CASE WHEN parallax IS NULL THEN 1 ELSE 0 END) FROM orrery.sources")
    assert north > 5 and south > 5 and wrap > 20 and nulls > 100


def test_result_types_follow_the_catalogue_metadata(engine):
    r = engine.execute("SELECT orrery_id, ra, mag_lime, var_flag, class_label, parallax "
                       "FROM orrery.sources WHERE parallax IS NULL", maxrec=3)
    assert [(c.datatype, c.unit, c.ucd) for c in r.columns] == [
        ("long", None, "meta.id;meta.main"), ("double", "deg", "pos.eq.ra;meta.main"),
        ("float", "mag", "phot.mag;em.opt.V"), ("short", None, "meta.code;src.var"),
        ("char", None, "src.class"), ("float", "mas", "pos.parallax")]
    rows = list(r.rows)
    assert len(rows) == 3 and all(row[5] is None for row in rows)
    assert all(isinstance(row[0], int) and isinstance(row[1], float) for row in rows)


# --- MAXREC and overflow ----------------------------------------------------------------------


def test_overflow_only_when_rows_were_cut(engine):
    # TAP 1.1 §2.7.4 / DALI 1.1: overflow when MAXREC cut the result
    r = engine.execute("SELECT orrery_id FROM orrery.sources", maxrec=10)
    assert len(list(r.rows)) == 10 and r.overflow is True
    r = engine.execute("SELECT TOP 10 orrery_id FROM orrery.sources", maxrec=10)
    assert len(list(r.rows)) == 10 and r.overflow is False
    r = engine.execute("SELECT orrery_id FROM orrery.sources", maxrec=2000)
    assert len(list(r.rows)) == 2000 and r.overflow is False
    r = engine.execute("SELECT orrery_id FROM orrery.sources", maxrec=1999)
    assert len(list(r.rows)) == 1999 and r.overflow is True


def test_maxrec_zero_gives_columns_only(engine):
    # TAP 1.1 §2.7.4: MAXREC=0 asks for metadata only
    r = engine.execute("SELECT orrery_id, DISTANCE(POINT(ra, dec), POINT(0, 0)) AS d "
                       "FROM orrery.sources", maxrec=0)
    assert [c.name for c in r.columns] == ["orrery_id", "d"]
    assert list(r.rows) == [] and r.overflow is True
    r = engine.execute("SELECT orrery_id FROM orrery.sources WHERE dec > 91", maxrec=0)
    assert list(r.rows) == [] and r.overflow is False


def test_negative_maxrec_is_refused(engine):
    with pytest.raises(AdqlError, match="MAXREC"):
        engine.execute("SELECT ra FROM orrery.sources", maxrec=-1)


def test_queries_from_many_threads(engine):
    queries = [f"SELECT COUNT(*) FROM orrery.sources WHERE mag_lime < {m}" for m in range(13, 21)]
    serial = [all_rows(engine, q) for q in queries]
    with ThreadPoolExecutor(8) as pool:
        parallel = list(pool.map(lambda q: all_rows(engine, q), queries * 3))
    assert parallel == serial * 3


# --- TAP_SCHEMA -------------------------------------------------------------------------------


def test_tap_schema_describes_every_table_and_column(engine):
    # TAP 1.1 §4.2, §4.3: tables and columns with units, UCDs and flags
    tables = {r[0] for r in all_rows(engine, "SELECT table_name FROM TAP_SCHEMA.tables")}
    assert {"orrery.sources", "orrery.visits", "TAP_SCHEMA.schemas", "TAP_SCHEMA.tables",
            "TAP_SCHEMA.columns", "TAP_SCHEMA.keys", "TAP_SCHEMA.key_columns"} <= tables
    cols = all_rows(engine, "SELECT column_name, datatype, unit, ucd, indexed, principal, std, "
                            "column_index FROM TAP_SCHEMA.columns WHERE table_name = 'orrery.sources' "
                            "ORDER BY column_index")
    assert [c[0] for c in cols] == [c.name for c in catalogue.SOURCES.columns]
    by_name = {c[0]: c for c in cols}
    assert by_name["ra"][1:4] == ("double", "deg", "pos.eq.ra;meta.main")
    assert by_name["pm_ra_cosdec"][2] == "mas/yr" and by_name["dec"][4] == 1
    # every column of every published table is listed
    for t in engine.tables():
        n = all_rows(engine, f"SELECT COUNT(*) FROM TAP_SCHEMA.columns WHERE table_name = '{t.qualified}'")
        assert n[0][0] == len(t.columns)


def test_tap_schema_keys_link_epochs_to_sources(engine):
    # TAP 1.1 §4.4, §4.5
    rows = all_rows(engine, "SELECT k.from_table, k.target_table, c.from_column, c.target_column "
                            "FROM TAP_SCHEMA.keys AS k JOIN TAP_SCHEMA.key_columns AS c "
                            "ON k.key_id = c.key_id")
    assert rows == [("orrery.visits", "orrery.sources", "orrery_id", "orrery_id"),
                    ("orrery_r2.visits", "orrery_r2.sources", "orrery_id", "orrery_id")]


def test_tables_for_vosi(engine):
    tables = {t.qualified: t for t in engine.tables()}
    assert tables["orrery.visits"].foreign_keys[0].target_table == "orrery.sources"
    assert {c.name for c in tables["orrery.sources"].columns} >= {"orrery_id", "ra", "dec"}


# --- uploads and user files -------------------------------------------------------------------


def test_upload_joins_as_tap_upload(engine):
    ids = [r[0] for r in all_rows(engine, "SELECT TOP 5 orrery_id FROM orrery.sources ORDER BY orrery_id")]
    mine = Table({"Src": np.array(ids + [1], dtype=np.int64), "note": ["a", "b", "c", "d", "e", "none"],
                  "weight": np.array([1.5, 2.5, 3.5, 4.5, 5.5, 6.5], dtype=np.float32)})
    mine["weight"].unit = u.mag
    r = engine.execute("SELECT m.src, m.Note, m.weight, s.ra FROM TAP_UPLOAD.mine AS m "
                       "JOIN orrery.sources AS s ON s.orrery_id = m.src ORDER BY m.src",
                       maxrec=None, uploads={"mine": mine})
    rows = list(r.rows)
    assert [row[0] for row in rows] == ids and [row[1] for row in rows] == list("abcde")
    assert [(c.name, c.datatype, c.unit) for c in r.columns][:3] == [
        ("src", "long", None), ("Note", "char", None), ("weight", "float", "mag")]
    # without the upload the same name is unknown
    with pytest.raises(AdqlError, match="unknown table"):
        engine.execute("SELECT * FROM TAP_UPLOAD.mine", maxrec=1)


def test_upload_with_masked_values_gives_nulls(engine):
    t = Table({"x": np.ma.MaskedArray([1.0, 2.0, 3.0], mask=[False, True, False])})
    rows = all_rows(engine, "SELECT x FROM TAP_UPLOAD.t ORDER BY x", uploads={"t": t})
    assert rows == [(None,), (1.0,), (3.0,)]


def test_bad_upload_name_is_refused(engine):
    with pytest.raises(AdqlError, match="upload name"):
        engine.execute("SELECT 1 FROM orrery.sources", maxrec=1, uploads={"no good": Table({"a": [1]})})


def test_user_files_become_user_tables(tmp_path):
    csv = tmp_path / "My-Targets.csv"
    csv.write_text("Name,RA,Dec,flux\nalpha,10.0,-30.0,1.5\nbeta,0.1,89.95,\n")
    pq = tmp_path / "fields.parquet"
    Table({"field": np.array([1, 2], dtype=np.int32), "centre_ra": [5.0, 6.0]}).write(pq)
    vot = tmp_path / "lines.vot"
    Table({"w": np.array([1.0, 2.0])}).write(vot, format="votable")
    engine = Engine(tmp_path / "state", rows=200, seed=1, files=[csv, pq, vot])
    rows = all_rows(engine, "SELECT name, ra, dec, flux FROM user.my_targets ORDER BY name")
    assert rows == [("alpha", 10.0, -30.0, 1.5), ("beta", 0.1, 89.95, None)]
    # delimited identifiers must match the file's own spelling
    assert all_rows(engine, 'SELECT "RA" FROM user.my_targets WHERE "Name" = \'beta\'') == [(0.1,)]
    with pytest.raises(AdqlError, match="unknown column"):
        engine.execute('SELECT "ra" FROM user.my_targets', maxrec=1)
    assert all_rows(engine, "SELECT SUM(field) FROM user.fields") == [(3,)]
    assert all_rows(engine, "SELECT COUNT(*) FROM user.lines") == [(2,)]
    listed = {r[0] for r in all_rows(engine, "SELECT table_name FROM TAP_SCHEMA.tables "
                                              "WHERE schema_name = 'user'")}
    assert listed == {"user.my_targets", "user.fields", "user.lines"}
    # geometry over user positions
    near = all_rows(engine, "SELECT name FROM user.my_targets WHERE "
                            "1 = CONTAINS(POINT(ra, dec), CIRCLE(180, 90, 0.1))")
    assert near == [("beta",)]


def test_unsupported_user_file_is_refused(tmp_path):
    bad = tmp_path / "notes.txt"
    bad.write_text("hello")
    with pytest.raises(ValueError, match="CSV"):
        Engine(tmp_path / "state", rows=100, seed=1, files=[bad])


def test_catalogue_is_opened_read_only(engine):
    # only SELECT gets through the translator ...
    with pytest.raises(AdqlError, match="only SELECT"):
        engine.execute("UPDATE orrery.sources SET ra = 0", maxrec=1)
    # ... and the connection a query runs on refuses writes by itself
    conn, _ = engine._connect([])
    try:
        with pytest.raises(sqlite3.OperationalError):
            conn.execute("UPDATE sources SET ra = 0")
    finally:
        conn.close()

"""Shaping a query before the long run, end to end: real HTTP to the embedded service, real
SQLite files.  Metadata (VOSI tables, TAP_SCHEMA), checks before submit, the cost estimate,
the command line.  The independent server's side is in tests/interop/test_shaping_dachs.py.
"""

from __future__ import annotations

import io
import json
import subprocess
import sys
import warnings

import pytest
import pyvo

from jobdesk import (
    Desk, MetadataUnavailable, MetadataWarning, QueryCheckWarning, QueryRejected, UnknownTable,
)
from jobdesk import metadata
from jobdesk.index import Index
from jobdesk.localtap import serve
from jobdesk.remote import Remote

ROWS = 3000
QUERY = ("SELECT orrery_id, ra, dec, mag_lime FROM orrery.sources "
         "WHERE mag_lime < 18 ORDER BY orrery_id")


@pytest.fixture(scope="module")
def tap(tmp_path_factory):
    with serve(state=tmp_path_factory.mktemp("tap"), rows=ROWS) as service:
        yield service


@pytest.fixture
def desk(tmp_path):
    return Desk(tmp_path / "desk", wait_window=5)


def _requests(tap) -> int:
    return tap.stats()["requests"]


# --- metadata ------------------------------------------------------------------------------


def test_tables_columns_and_find_come_from_vosi_and_survive_a_restart(tap, tmp_path):
    desk = Desk(tmp_path / "d")
    names = [t["name"] for t in desk.tables(tap.url)]
    assert "orrery.sources" in names and "orrery.visits" in names
    cols = {c["name"]: c for c in desk.columns(tap.url, "orrery.sources")}
    assert cols["ra"]["unit"] == "deg" and cols["ra"]["datatype"] == "double"
    assert cols["class_label"]["datatype"] == "char"
    # what pyvo reads from the same service's VOSI tables (the reference client)
    ref = pyvo.dal.TAPService(tap.url).tables["orrery.sources"]
    assert [c.name for c in ref.columns] == list(cols)
    assert [str(c.unit or "") for c in ref.columns] == [cols[n]["unit"] or "" for n in cols]
    hits = desk.find(tap.url, "mag")
    assert {"mag_cyan", "mag_lime", "mag_rose", "mag"} <= {h["column"] for h in hits}
    assert all(h["unit"] == "mag" for h in hits if h["column"] in ("mag_cyan", "mag"))
    assert desk.find(tap.url, "visit photometry")[0]["table"] == "orrery.visits"
    assert desk.find(tap.url, "   ") == []

    before = _requests(tap)
    again = Desk(tmp_path / "d")                             # a new process would see the same
    assert [t["name"] for t in again.tables(tap.url)] == names
    assert again.columns(tap.url, "ORRERY.SOURCES") == desk.columns(tap.url, "orrery.sources")
    assert _requests(tap) == before                          # from the cache: no request
    with pytest.raises(UnknownTable) as err:
        again.columns(tap.url, "orrery.sauces")
    assert "orrery.sources" in err.value.suggestions


def test_tap_schema_gives_the_same_tables_as_vosi(tap, tmp_path):
    # TAP 1.1 §4: TAP_SCHEMA.tables / TAP_SCHEMA.columns, read with synchronous queries
    remote = Remote(tap.url)
    skipped: list[str] = []
    from_schema = metadata.tables_from_tap_schema(
        remote.sync(metadata.TAP_SCHEMA_TABLES), remote.sync(metadata.TAP_SCHEMA_COLUMNS),
        on_skip=skipped.append)
    with remote.open_tables() as r:
        from_vosi = list(metadata.parse_tableset(r.raw, on_skip=skipped.append))
    assert not skipped
    by_name = {t["name"]: t for t in from_vosi}
    for t in from_schema:
        assert {c["name"] for c in t["columns"]} == {c["name"] for c in by_name[t["name"]]["columns"]}
        units = {c["name"]: c["unit"] for c in by_name[t["name"]]["columns"]}
        assert all(units[c["name"]] == c["unit"] for c in t["columns"])
    assert {t["name"] for t in from_schema} == set(by_name)


def test_malformed_metadata_rows_are_skipped_with_a_warning_naming_them(tmp_path):
    doc = b"""<?xml version="1.0"?>
<vosi:tableset xmlns:vosi="http://www.ivoa.net/xml/VOSITables/v1.0"
  xmlns:vs="http://www.ivoa.net/xml/VODataService/v1.1"
  xmlns:xsi="http://www.w3.org/2001/XMLSchema-instance">
 <schema><name>inv</name>
  <table><name>inv.good</name><nrows>many</nrows>
   <column><name>a</name><dataType xsi:type="vs:VOTableType">int</dataType></column>
   <column><description>no name</description></column>
   <column><name>a</name></column>
  </table>
  <table><description>a table without a name</description></table>
  <table><name>short</name><column><name>b</name><unit>s</unit></column></table>
 </schema>
</vosi:tableset>"""
    skipped: list[str] = []
    tables = list(metadata.parse_tableset(io.BytesIO(doc), on_skip=skipped.append))
    assert [t["name"] for t in tables] == ["inv.good", "inv.short"]
    assert [c["name"] for c in tables[0]["columns"]] == ["a"]
    assert tables[0]["nrows"] is None
    assert any("inv.good" in s and "'many'" in s for s in skipped)
    assert any("inv.good: column #2 has no name" in s for s in skipped)
    assert any("column a is listed twice" in s for s in skipped)
    assert any("table #2" in s for s in skipped)


def test_unreachable_service_uses_the_cache_with_its_age_or_says_clearly(tmp_path):
    root = tmp_path / "d"
    with serve(state=tmp_path / "tap", rows=200) as tap:
        url = tap.url
        Desk(root).tables(url)
    desk = Desk(root, attempts=1, timeout=2)
    with pytest.warns(MetadataWarning, match=r"could not be read .* cached \d+ s ago"):
        tables = desk.tables(url, refresh=True)
    assert "orrery.sources" in [t["name"] for t in tables]
    assert desk.check(url, "SELECT nope FROM orrery.sources WHERE ra > 1")[0].code == \
        "unknown-column"
    with pytest.raises(MetadataUnavailable, match="none is cached"):
        Desk(tmp_path / "empty", attempts=1, timeout=2).tables(url)
    # and the check without any metadata: syntax only, said so
    found = Desk(tmp_path / "empty2", attempts=1, timeout=2).check(url, "SELECT x FROM y")
    assert [f.code for f in found] == ["no-metadata"]


def test_index_from_before_this_feature_is_migrated(tmp_path):
    import sqlite3
    path = tmp_path / "index.sqlite"
    Index(path).close()
    conn = sqlite3.connect(path)
    for table in ("meta_search", "meta_columns", "meta_tables", "meta_services"):
        conn.execute(f"DROP TABLE {table}")
    conn.execute("ALTER TABLE jobs DROP COLUMN estimate")
    conn.execute("PRAGMA user_version = 4")              # as written by the v4 schema
    conn.commit()
    conn.close()
    index = Index(path)
    assert index.metadata_info() == []
    assert "estimate" in {r[1] for r in index.db.execute("PRAGMA table_info(jobs)")}
    index.save_metadata("http://x/tap", [{"name": "s.t", "columns": [{"name": "c"}]}],
                        source="vosi")
    assert index.meta_find("http://x/tap", '"c"*')[0]["column"] == "c"


# --- checks before submit ----------------------------------------------------------------------


def test_errors_are_refused_before_any_request(tap, desk):
    desk.tables(tap.url)
    before = _requests(tap)
    with pytest.raises(QueryRejected) as err:
        desk.submit(tap.url, "SELECT ra, decc FROM orrery.sources WHERE ra < 10")
    assert _requests(tap) == before
    assert [f.code for f in err.value.findings if f.severity == "error"] == ["unknown-column"]
    assert "^^^^" in str(err.value) and "did you mean dec" in str(err.value)
    assert "refresh=True" in err.value.hint and "read" in err.value.hint
    assert desk.jobs() == []
    # check=False sends it, and the service's refusal points at the same token
    job = desk.submit(tap.url, "SELECT ra, decc FROM orrery.sources WHERE ra < 10", check=False)
    with pytest.raises(QueryRejected) as served:
        job.wait(progress=False)
    assert served.value.findings, str(served.value)
    spot = served.value.findings[0]
    assert (spot.line, spot.column) == (err.value.findings[0].line, err.value.findings[0].column)


def test_syntax_errors_are_refused_even_without_metadata(tap, tmp_path):
    desk = Desk(tmp_path / "d")
    before = _requests(tap)
    with pytest.raises(QueryRejected) as err:
        desk.submit(tap.url, "SELECT orrery_id FROM orrery.sources WHERE")
    assert err.value.findings[0].code == "syntax"
    assert _requests(tap) == before


def test_warnings_are_shown_once_and_the_query_goes(tap, desk):
    sid = tap.url.rstrip("/")
    desk.tables(tap.url)
    # the cached metadata says orrery.sources is huge (the embedded service publishes no nrows)
    tables = [dict(t, columns=desk.columns(tap.url, t["name"])) for t in desk.tables(tap.url)]
    for t in tables:
        t["nrows"] = 50_000_000 if t["name"] == "orrery.sources" else t["nrows"]
    desk.index.save_metadata(sid, tables, source="vosi")
    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("default")
        for _ in range(2):
            job = desk.submit(tap.url, "SELECT orrery_id FROM orrery.sources")
    checks = [w for w in seen if issubclass(w.category, QueryCheckWarning)]
    assert len(checks) == 1 and "[unconstrained]" in str(checks[0].message)
    assert job.wait(progress=False).rows == ROWS


# --- the estimate --------------------------------------------------------------------------


def test_estimate_counts_like_pyvo_and_predicts_the_full_result(tap, desk):
    est = desk.estimate(tap.url, QUERY)
    # the reference: a COUNT(*) computed by pyvo on the same service
    ref = pyvo.dal.TAPService(tap.url).run_sync(
        "SELECT COUNT(*) AS n FROM orrery.sources WHERE mag_lime < 18").to_table()
    assert est.rows == int(ref["n"][0]) and est.rows_exact and est.method == "count"
    assert est.duration is None and est.duration_text == "unknown"
    job = desk.submit(tap.url, QUERY).wait(progress=False)
    assert job.rows == est.rows
    # The bytes are predicted in the format the job negotiates (VOParquet here); Parquet
    # compresses better over 2,000 rows than over the 100-row sample, so it is looser there
    # (common practice, no source: a size estimate within a quarter is good enough to plan by).
    assert est.fmt == job.record["result_fmt"]
    assert abs(est.bytes - job.record["result_bytes"]) / job.record["result_bytes"] < 0.25
    plain = desk.estimate(tap.url, QUERY, fmt="votable")
    text_job = desk.submit(tap.url, QUERY, fmt="votable", refresh=True).wait(progress=False)
    assert text_job.record["result_fmt"] in (None, "votable")
    assert abs(plain.bytes - text_job.record["result_bytes"]) / text_job.record["result_bytes"] < 0.1
    again = desk.estimate(tap.url, QUERY)
    assert again.duration is not None and again.history == 2      # the two jobs above
    shortest = min(j.record["finished"] - j.record["started"] for j in (job, text_job))
    assert again.duration[0] <= shortest + 1e-6


def test_estimate_applies_top_maxrec_and_the_output_limit(tap, desk):
    est = desk.estimate(tap.url, "SELECT TOP 7 orrery_id FROM orrery.sources ORDER BY orrery_id",
                        maxrec=5)
    assert est.rows == 7 and est.over_maxrec is True and est.maxrec == 5
    # TAPRegExt outputLimit of the embedded service: 100000 rows (its capabilities)
    assert est.output_limit == 100_000 and est.over_limit is False
    grouped = desk.estimate(tap.url, "SELECT class_label, COUNT(*) AS n FROM orrery.sources "
                                     "GROUP BY class_label")
    ref = pyvo.dal.TAPService(tap.url).run_sync(
        "SELECT class_label, COUNT(*) AS n FROM orrery.sources GROUP BY class_label").to_table()
    assert grouped.rows == len(ref)
    assert desk.estimate(tap.url, "SELECT COUNT(*) FROM orrery.sources").rows == 1


def test_submit_with_estimate_keeps_it_in_the_record(tap, desk, capsys):
    adql = "SELECT orrery_id, ra FROM orrery.sources WHERE ra < 90 ORDER BY orrery_id"
    job = desk.submit(tap.url, adql, estimate=True)
    assert "estimate before the long run" in capsys.readouterr().err
    kept = job.record["estimate"]
    assert kept["rows"] == job.wait(progress=False).rows and kept["method"] == "count"


def test_a_slow_count_falls_back_to_a_sample(tmp_path):
    with serve(state=tmp_path / "tap", rows=500, slow_response=0.6) as tap:
        est = Desk(tmp_path / "d").estimate(tap.url, "SELECT orrery_id FROM orrery.sources",
                                            time_limit=0.2)
    assert est.method == "sample" and est.rows == 500 and est.rows_exact   # all 500 < 1000
    assert "longer than 0.2 s" in est.notes[0]


# --- the command line ----------------------------------------------------------------------


def test_cli_tables_columns_find_check_estimate(tap, tmp_path):
    root = str(tmp_path / "cli")

    def cli(*args, stdin=""):
        return subprocess.run([sys.executable, "-m", "jobdesk.cli", "--root", root, *args],
                              input=stdin, capture_output=True, text=True, timeout=120)

    out = cli("tables", tap.url, "--json")
    assert out.returncode == 0 and "orrery.sources" in [t["name"] for t in json.loads(out.stdout)]
    out = cli("columns", tap.url, "orrery.visits")
    assert out.returncode == 0 and "mag_sigma" in out.stdout
    assert "orrery.sources.mag_lime" in cli("find", tap.url, "lime").stdout
    bad = cli("check", tap.url, "-", stdin="SELECT ra, decc FROM orrery.sources WHERE ra < 1")
    assert bad.returncode == 1 and "^^^^" in bad.stdout and "decc" in bad.stdout
    good = cli("check", tap.url, "--json", stdin="SELECT ra FROM orrery.sources WHERE ra < 1")
    assert good.returncode == 0 and json.loads(good.stdout) == []
    query = tmp_path / "q.adql"
    query.write_text(QUERY)
    est = cli("estimate", tap.url, str(query), "--json")
    assert est.returncode == 0 and json.loads(est.stdout)["rows"] > 0

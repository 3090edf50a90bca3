"""ADQL 2.1 lexical and syntax rules, run through the real engine over the real SQLite catalogue.

Section numbers refer to ADQL 2.1 (IVOA REC 2023-12-15) and are given from memory.  Expected
values are computed independently from the generated numpy data or from a second query, never
hard-coded.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from jobdesk.localtap import catalogue
from jobdesk.localtap.engine import AdqlError, Engine

SEED = 777
ROWS = 3000


@pytest.fixture(scope="module")
def engine(tmp_path_factory):
    return Engine(tmp_path_factory.mktemp("adql"), rows=ROWS, seed=SEED)


@pytest.fixture(scope="module")
def data():
    """The same numbers the catalogue was built from (independent of SQL)."""
    src = catalogue.generate_sources(ROWS, SEED)
    return src, catalogue.generate_visits(src, SEED)


def run(engine, adql, maxrec=None, **kw):
    r = engine.execute(adql, maxrec=maxrec, **kw)
    rows = list(r.rows)
    return r, rows


# --- lexical rules ----------------------------------------------------------------------------


def test_keywords_and_regular_identifiers_ignore_case(engine):
    # ADQL 2.1 §2.1.2 (keywords) and §2.1.3 (regular identifiers are case-insensitive)
    _, lower = run(engine, "select top 5 orrery_id, ra from orrery.sources order by orrery_id")
    _, mixed = run(engine, "SeLeCt ToP 5 ORRERY_ID, Ra FrOm ORRERY.Sources OrDeR bY Orrery_Id")
    assert lower == mixed and len(lower) == 5


def test_output_names_follow_the_query_spelling(engine):
    # common practice, no source: result columns are named as the query spells them
    r, _ = run(engine, "SELECT TOP 1 RA, s.Dec, mag_lime AS Bright, COUNT(*) FROM orrery.sources AS s "
                       "GROUP BY RA, s.Dec, mag_lime")
    assert [c.name for c in r.columns] == ["RA", "Dec", "Bright", "count"]


def test_delimited_identifiers_are_case_sensitive(engine):
    # ADQL 2.1 §2.1.3: "..." identifiers match exactly
    _, rows = run(engine, 'SELECT TOP 2 "ra" FROM "orrery"."sources"')
    assert len(rows) == 2
    with pytest.raises(AdqlError, match="unknown column 'RA'"):
        engine.execute('SELECT "RA" FROM orrery.sources', maxrec=1)
    with pytest.raises(AdqlError, match="unknown table"):
        engine.execute('SELECT ra FROM orrery."Sources"', maxrec=1)
    # TAP_SCHEMA's own name is upper case (TAP 1.1 §4), so it matches delimited as written
    _, rows = run(engine, 'SELECT COUNT(*) FROM "TAP_SCHEMA"."tables"')
    assert rows[0][0] > 0


def test_quote_escapes_in_strings_and_identifiers(engine):
    # ADQL 2.1 §2.1.4: '' inside a string literal is one quote
    _, rows = run(engine, "SELECT TOP 1 'it''s' AS s, 'a' || 'b' || 'c' AS joined FROM orrery.sources")
    assert rows == [("it's", "abc")]
    r, _ = run(engine, 'SELECT TOP 1 ra AS "say ""hi""" FROM orrery.sources')
    assert r.columns[0].name == 'say "hi"'


def test_comments_run_to_end_of_line_and_minus_minus_is_a_comment(engine, data):
    # ADQL 2.1 §2.1: -- starts a comment; a - -1 stays arithmetic (PROTOCOL.md)
    r, rows = run(engine, "SELECT TOP 1 ra - -1 AS a, ra--1 AS b\n, ra FROM orrery.sources -- trailing\n"
                          "ORDER BY orrery_id")
    ra0 = data[0]["ra"][0]
    assert rows[0] == pytest.approx((ra0 + 1, ra0, ra0))
    # "AS b" was inside the comment; a repeated output name gets a suffix
    assert [c.name for c in r.columns] == ["a", "ra", "ra_2"]


def test_numeric_literals_keep_their_types(engine):
    # ADQL 2.1 §2.1.4: exact (1), approximate (1E0), decimal (1.5) and hexadecimal (0x1F) literals
    r, rows = run(engine, "SELECT TOP 1 1, 1E0, 1.5, 0x1F, 7/2, 7.0/2 FROM orrery.sources")
    assert [c.datatype for c in r.columns] == ["long", "double", "double", "long", "long", "double"]
    # integer division as in SQL: 7/2 is 3 (common practice, no source; PostgreSQL does the same)
    assert rows == [(1, 1.0, 1.5, 31, 3, 3.5)]


# --- clauses ----------------------------------------------------------------------------------


def test_top_and_offset(engine, data):
    # ADQL 2.1 §2.2: TOP n limits rows; OFFSET n (new in 2.1) skips rows after ORDER BY
    ids = np.sort(data[0]["orrery_id"])
    _, rows = run(engine, "SELECT TOP 4 orrery_id FROM orrery.sources ORDER BY orrery_id OFFSET 10")
    assert [r[0] for r in rows] == ids[10:14].tolist()
    _, rows = run(engine, "SELECT orrery_id FROM orrery.sources ORDER BY orrery_id DESC OFFSET 2990")
    assert [r[0] for r in rows] == ids[::-1][2990:].tolist()


def test_order_by_prefers_output_names(engine, data):
    # SQL rule (ADQL 2.1 §2.2 defers to SQL-92): ORDER BY name = the output column of that name
    _, rows = run(engine, "SELECT TOP 3 ra AS dec FROM orrery.sources ORDER BY dec")
    assert [r[0] for r in rows] == np.sort(data[0]["ra"])[:3].tolist()
    _, rows = run(engine, "SELECT TOP 3 ra AS dec FROM orrery.sources ORDER BY dec + 0")
    by_dec = np.argsort(data[0]["dec"])[:3]  # inside an expression: the source column (SQL-92)
    assert [r[0] for r in rows] == data[0]["ra"][by_dec].tolist()


def test_where_predicates_match_numpy(engine, data):
    src = data[0]
    expected = int(np.sum((src["mag_lime"] >= 14) & (src["mag_lime"] <= 15)
                          & np.isin(src["class_label"], ["star", "qso"]) & ~np.isnan(src["parallax"])))
    _, rows = run(engine, "SELECT COUNT(*) FROM orrery.sources WHERE mag_lime BETWEEN 14 AND 15 "
                          "AND class_label IN ('star', 'qso') AND parallax IS NOT NULL")
    assert rows[0][0] == expected


def test_like_is_case_sensitive_and_ilike_is_not(engine, data):
    # ADQL 2.1 §2.2 (LIKE), ILIKE new in 2.1
    stars = int(np.sum(data[0]["class_label"] == "star"))
    assert run(engine, "SELECT COUNT(*) FROM orrery.sources WHERE class_label LIKE 'STA%'")[1][0][0] == 0
    assert run(engine, "SELECT COUNT(*) FROM orrery.sources WHERE class_label LIKE 'sta%'")[1][0][0] == stars
    assert run(engine, "SELECT COUNT(*) FROM orrery.sources WHERE class_label ILIKE 'STA_'")[1][0][0] == stars


def test_join_to_epochs_group_by_having(engine, data):
    src, ep = data
    _, rows = run(engine, "SELECT s.orrery_id, COUNT(*) AS n, MAX(e.mag) AS brightest_is_not_this "
                          "FROM orrery.sources AS s JOIN orrery.visits AS e ON e.orrery_id = s.orrery_id "
                          "WHERE s.var_flag = 1 GROUP BY s.orrery_id HAVING COUNT(*) >= 4 "
                          "ORDER BY s.orrery_id")
    variable = set(src["orrery_id"][src["var_flag"] == 1].tolist())
    ids, counts = np.unique(ep["orrery_id"], return_counts=True)
    expected = sorted(i for i, c in zip(ids.tolist(), counts.tolist()) if i in variable and c >= 4)
    assert [r[0] for r in rows] == expected and expected
    assert all(r[1] == catalogue.VISITS_PER_SOURCE for r in rows)


def test_subqueries_in_where_from_and_select(engine, data):
    src, ep = data
    faint = set(ep["orrery_id"][ep["mag"] > 20.0].tolist())
    _, rows = run(engine, "SELECT orrery_id FROM orrery.sources WHERE orrery_id IN "
                          "(SELECT orrery_id FROM orrery.visits WHERE mag > 20.0)")
    assert {r[0] for r in rows} == faint
    _, rows = run(engine, "SELECT COUNT(*) FROM orrery.sources AS s WHERE EXISTS "
                          "(SELECT 1 FROM orrery.visits AS e WHERE e.orrery_id = s.orrery_id)")
    assert rows[0][0] == len(np.unique(ep["orrery_id"]))
    _, rows = run(engine, "SELECT q.n FROM (SELECT class_label, COUNT(*) AS n FROM orrery.sources "
                          "GROUP BY class_label) AS q WHERE q.class_label = 'galaxy'")
    assert rows == [(int(np.sum(src["class_label"] == "galaxy")),)]


def test_union_and_with(engine, data):
    src = data[0]
    _, rows = run(engine, "SELECT orrery_id FROM orrery.sources WHERE dec > 89.5 UNION "
                          "SELECT orrery_id FROM orrery.sources WHERE dec < -89.5 ORDER BY orrery_id")
    expected = np.sort(src["orrery_id"][np.abs(src["dec"]) > 89.5]).tolist()
    assert [r[0] for r in rows] == expected and expected
    _, rows = run(engine, "WITH bright AS (SELECT orrery_id FROM orrery.sources WHERE mag_lime < 13) "
                          "SELECT COUNT(*) FROM bright")
    assert rows[0][0] == int(np.sum(src["mag_lime"] < 13))


def test_cast_coalesce_case(engine, data):
    src = data[0]
    r, rows = run(engine, "SELECT TOP 1 CAST(ra AS INTEGER) AS r, CAST(orrery_id AS VARCHAR(20)) AS t, "
                          "COALESCE(mag_rose, -1) AS m, CASE WHEN var_flag = 1 THEN 'var' ELSE 'const' END "
                          "AS kind FROM orrery.sources WHERE mag_rose IS NULL ORDER BY orrery_id")
    first = int(np.flatnonzero(np.isnan(src["mag_rose"]))[0])
    assert rows == [(int(src["ra"][first]), str(src["orrery_id"][first]), -1.0,
                     "var" if src["var_flag"][first] else "const")]
    assert [c.datatype for c in r.columns] == ["int", "char", "float", "char"]


def test_math_functions(engine):
    # ADQL 2.1 §2.3 (mathematical functions); expected values from Python's math module
    _, rows = run(engine, "SELECT TOP 1 ABS(-2.5), CEILING(1.2), FLOOR(-1.2), DEGREES(PI()), "
                          "RADIANS(180), SIN(0.5), COS(0.5), TAN(0.5), ASIN(0.5), ACOS(0.5), ATAN(0.5), "
                          "ATAN2(1, 2), EXP(1), LOG(10), LOG10(1000), POWER(2, 0.5), SQRT(2), "
                          "MOD(7.5, 2), MOD(-7, 3), ROUND(2.567, 1), TRUNCATE(-2.567, 1), TRUNCATE(2.9), "
                          "SIGN(-3.5) FROM orrery.sources")
    expected = (2.5, 2.0, -2.0, 180.0, math.pi, math.sin(0.5), math.cos(0.5), math.tan(0.5),
                math.asin(0.5), math.acos(0.5), math.atan(0.5), math.atan2(1, 2), math.e,
                math.log(10), 3.0, math.sqrt(2), math.sqrt(2), 1.5, math.fmod(-7, 3), 2.6, -2.5, 2.0,
                -1.0)
    assert rows[0] == pytest.approx(expected)


def test_rand_is_in_unit_interval(engine):
    _, rows = run(engine, "SELECT TOP 50 RAND() FROM orrery.sources")
    values = [r[0] for r in rows]
    assert all(0.0 <= v < 1.0 for v in values) and len(set(values)) > 1


# --- errors -----------------------------------------------------------------------------------


@pytest.mark.parametrize("adql, line, column", [
    ("SELECT ra FROM orrery.sources WHER dec > 0", 1, 36),
    ("SELECT ra,\n  dec FROM orrery.sources\nWHERE dec = = 2", 3, 13),
    ("SELEC ra FROM orrery.sources", 1, 10),
    ("SELECT ra FROM orrery.sources\n WHERE class_label = 'star", 2, 22),
])
def test_syntax_errors_say_where(engine, adql, line, column):
    with pytest.raises(AdqlError) as info:
        engine.execute(adql, maxrec=10)
    assert (info.value.line, info.value.column) == (line, column)
    assert info.value.message


@pytest.mark.parametrize("adql, message", [
    ("SELECT ra FROM orrery.nowhere", "unknown table 'orrery.nowhere'"),
    ("SELECT nothing FROM orrery.sources", "unknown column 'nothing'"),
    ("SELECT s.nothing FROM orrery.sources AS s", "unknown column 'nothing' in orrery.sources"),
    ("SELECT x.ra FROM orrery.sources AS s", "unknown table or alias 'x'"),
    ("SELECT orrery_id FROM orrery.sources AS s JOIN orrery.visits AS e ON s.orrery_id = e.orrery_id",
     "ambiguous"),
    ("SELECT LEN(class_label) FROM orrery.sources", "not an ADQL 2.1 function"),
    ("SELECT [ra] FROM orrery.sources", "square brackets"),
    ("SELECT ra INTO t FROM orrery.sources", "INTO"),
    ("SELECT ra FROM orrery.sources; DELETE FROM orrery.sources", "exactly one SELECT"),
    ("DELETE FROM orrery.sources", "only SELECT"),
    ("SELECT TOP 10 PERCENT ra FROM orrery.sources", "PERCENT"),
    ("SELECT ra FROM orrery.sources AS s JOIN orrery.visits AS e USING (orrery_id)", "USING"),
    ("SELECT REGION('Circle ICRS 1 2 3') FROM orrery.sources", "REGION"),
    ("SELECT 1", "FROM"),
    ("SELECT TOP 1 * FROM orrery.sources NATURAL JOIN orrery.visits", "NATURAL"),
    ("SELECT t.a FROM (SELECT ra FROM orrery.sources) AS t(a)", "column lists"),
    ("SELECT @x FROM orrery.sources", "not supported"),
    ("WITH RECURSIVE x AS (SELECT ra FROM orrery.sources) SELECT ra FROM x", "RECURSIVE"),
])
def test_unsupported_or_wrong_queries_get_clear_messages(engine, adql, message):
    with pytest.raises(AdqlError, match=message):
        engine.execute(adql, maxrec=10)


def test_unknown_column_error_points_at_it(engine):
    with pytest.raises(AdqlError) as info:
        engine.execute("SELECT ra,\n   bogus FROM orrery.sources", maxrec=1)
    assert (info.value.line, info.value.column) == (2, 4)

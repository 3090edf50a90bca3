"""The query checker on its own: positions, each rule, the ADQL 2.1 examples, bad input.

Schemas here are held in memory (``StaticCatalog``); the checker against a real service's
cached metadata is in test_shaping.py and tests/interop/test_shaping_dachs.py.
"""

from __future__ import annotations

import random

import pytest

from jobdesk.checks import ColumnMeta, StaticCatalog, TableMeta, check, errors, from_service

SOURCES = TableMeta("orrery.sources", [ColumnMeta(n, t) for n, t in [
    ("orrery_id", "long"), ("ra", "double"), ("dec", "double"), ("pm_ra_cosdec", "double"),
    ("pm_dec", "double"), ("parallax", "double"), ("mag_cyan", "float"), ("mag_lime", "float"),
    ("class_label", "char"), ("var_flag", "short")]], nrows=40_000_000)
VISITS = TableMeta("orrery.visits", [ColumnMeta(n, t) for n, t in [
    ("visit_id", "long"), ("orrery_id", "long"), ("obs_time", "double"), ("band", "char"),
    ("mag", "float"), ("mag_sigma", "float")]], nrows=1000)
WIDE = TableMeta("orrery.wide", [ColumnMeta(f"c{i}", "double") for i in range(150)], nrows=10)
CATALOG = StaticCatalog([SOURCES, VISITS, WIDE])


def codes(adql, catalog=CATALOG):
    return [(f.severity, f.code) for f in check(adql, catalog)]


def only(adql, code, catalog=CATALOG):
    found = [f for f in check(adql, catalog) if f.code == code]
    assert len(found) == 1, check(adql, catalog)
    return found[0]


# --- positions and the caret --------------------------------------------------------------


def test_unknown_column_points_at_the_token_and_offers_the_closest():
    adql = "SELECT ra,\n       decc\nFROM orrery.sources\nWHERE mag_lime < 15"
    f = only(adql, "unknown-column")
    assert (f.severity, f.line, f.column, f.length) == ("error", 2, 8, 4)
    assert "dec" in f.suggestion
    drawn = str(f).splitlines()
    assert drawn[1].endswith("       decc")
    assert drawn[2].index("^") == drawn[1].index("decc") and drawn[2].count("^") == 4


def test_unknown_table_offers_the_closest_names():
    f = only("SELECT ra FROM orrery.source WHERE ra > 1", "unknown-table")
    assert (f.line, f.column) == (1, 16)
    assert "orrery.sources" in f.suggestion


def test_ambiguous_column_across_a_join():
    adql = ("SELECT orrery_id FROM orrery.sources AS s JOIN orrery.visits AS v "
            "ON s.orrery_id = v.orrery_id")
    f = only(adql, "ambiguous-column")
    assert f.column == 8 and f.severity == "error"
    # qualified, or named in USING: not ambiguous
    assert not errors(check(adql.replace("SELECT orrery_id", "SELECT s.orrery_id"), CATALOG))
    assert not errors(check("SELECT orrery_id, mag FROM orrery.sources JOIN orrery.visits "
                            "USING (orrery_id) WHERE mag < 20", CATALOG))


def test_alias_used_but_never_defined():
    f = only("SELECT x.ra FROM orrery.sources AS s WHERE s.ra > 1", "undefined-alias")
    assert (f.line, f.column) == (1, 8)


def test_geometry_argument_counts():
    # ADQL 2.1 Appendix A: <point> takes [coord_sys,] coordinates (2 or 3 arguments)
    f = only("SELECT ra FROM orrery.sources WHERE 1 = CONTAINS(POINT('ICRS', ra, dec, 5), "
             "CIRCLE('ICRS', 10, 20, 1))", "geometry-args")
    assert f.message.startswith("POINT takes 2 to 3 arguments")
    f = only("SELECT ra FROM orrery.sources WHERE 1 = CONTAINS(POINT(ra, dec))", "geometry-args")
    assert "CONTAINS" in f.message


def test_contains_compared_with_other_than_0_or_1():
    # ADQL 2.1 §4.2.7 (CONTAINS): "must be compared to the integer values 0 or 1"
    f = only("SELECT ra FROM orrery.sources WHERE CONTAINS(POINT(ra, dec), "
             "CIRCLE(10, 20, 1)) = 2", "predicate-compare")
    assert f.severity == "error"
    assert not errors(check("SELECT ra FROM orrery.sources WHERE 0 = INTERSECTS("
                            "CIRCLE(ra, dec, 1), BOX(10, 20, 1, 1))", CATALOG))


def test_top_without_order_by_is_a_warning():
    f = only("SELECT TOP 10 ra FROM orrery.sources", "top-no-order")
    assert f.severity == "warning" and f.column == 8
    assert not [g for g in check("SELECT TOP 10 ra FROM orrery.sources ORDER BY ra", CATALOG)
                if g.code == "top-no-order"]


def test_string_column_compared_with_a_number():
    f = only("SELECT ra FROM orrery.sources WHERE class_label = 3", "type-mismatch")
    assert f.severity == "error" and f.column == 51
    assert not errors(check("SELECT ra FROM orrery.sources WHERE class_label = '3'", CATALOG))
    assert not errors(check("SELECT ra FROM orrery.sources WHERE var_flag = 3", CATALOG))


def test_wide_star_and_unconstrained_huge_table_warn():
    assert ("warning", "wide-star") in codes("SELECT * FROM orrery.wide")
    assert ("warning", "unconstrained") in codes("SELECT ra, dec FROM orrery.sources")
    assert ("warning", "unconstrained") not in codes(
        "SELECT ra, dec FROM orrery.sources WHERE mag_lime < 12")
    assert ("warning", "unconstrained") not in codes("SELECT COUNT(*) FROM orrery.sources")


def test_without_metadata_only_the_syntax_is_checked():
    assert codes("SELECT anything FROM nowhere", None) == [("warning", "no-metadata")]
    assert codes("SELECT anything FROM nowhere", StaticCatalog(None))[0][1] == "no-metadata"
    assert ("error", "syntax") in codes("SELECT a FROM", None)


def test_tables_listed_oddly_give_no_false_error():
    odd = StaticCatalog([TableMeta('"Mixed"."Case Tab"', [ColumnMeta("Flux", "double")]),
                         TableMeta("inv.names_only", [])])          # listed without columns
    assert not errors(check('SELECT "Flux" FROM "Mixed"."Case Tab" WHERE "Flux" > 1', odd))
    assert not errors(check("SELECT anything FROM inv.names_only WHERE x > 1", odd))
    assert only("SELECT a FROM inv.nothing", "unknown-table", odd).severity == "error"


def test_no_false_errors_on_valid_shapes():
    for adql in [
        "SELECT s.ra, v.mag FROM orrery.sources AS s JOIN orrery.visits AS v "
        "ON s.orrery_id = v.orrery_id WHERE v.band = 'g' ORDER BY s.ra",
        "SELECT ra AS r FROM orrery.sources WHERE ra > 1 ORDER BY r",
        "SELECT class_label, COUNT(*) AS n FROM orrery.sources GROUP BY class_label "
        "HAVING COUNT(*) > 3 ORDER BY n DESC",
        "SELECT ra FROM orrery.sources WHERE orrery_id IN "
        "(SELECT orrery_id FROM orrery.visits WHERE mag < ra)",     # correlated
        "SELECT u.tag, s.ra FROM TAP_UPLOAD.mine AS u JOIN orrery.sources AS s "
        "ON s.orrery_id = u.id",                                     # upload: columns unknown
        "SELECT TOP 5 table_name FROM TAP_SCHEMA.tables ORDER BY table_name",
        "SELECT orrery.sources.ra FROM orrery.sources WHERE orrery.sources.dec > 0",
        'SELECT "ra", RA, Dec FROM ORRERY.SOURCES WHERE Mag_Lime < 20',
        "SELECT DISTANCE(POINT('ICRS', ra, dec), POINT('ICRS', 10, 20)) AS d "
        "FROM orrery.sources WHERE ra BETWEEN 9 AND 11 ORDER BY d OFFSET 10",
        "SELECT CAST(var_flag AS DOUBLE PRECISION), LOG10(ABS(parallax) + 1) "
        "FROM orrery.sources WHERE class_label LIKE 'q%' OR class_label IS NULL",
    ]:
        assert not errors(check(adql, CATALOG)), (adql, check(adql, CATALOG))


# --- ADQL 2.1 (IVOA Recommendation 2023-12-15) examples ------------------------------------
# Source: the standard's LaTeX text, tag v2.1_20231215-rec of the IVOA's ADQL repository,
# verbatim blocks that are complete queries in the core language (section numbers counted from
# the LaTeX source).
# The schema holds the tables these examples read, with the columns they name.  §2.2.1's
# first example prints "alpha_sourceid" where "alpha_source.id" is plainly meant; the schema
# lists that spelling too so the example is taken exactly as printed.

ALPHA = [ColumnMeta("id", "long"), ColumnMeta("ra", "double"), ColumnMeta("dec", "double"),
         ColumnMeta("alpha_sourceid", "long")]
ADQL21_SCHEMA = StaticCatalog([TableMeta(name, list(ALPHA)) for name in
                               ("alpha_source", "atable", "table1", "table2", "table3")])
ADQL21_EXAMPLES = {
    "§2.2.1 Subqueries (1)": """SELECT alpha_source.id
    FROM alpha_source
    WHERE alpha_sourceid >=5
      AND alpha_sourceid IN (
            SELECT id
            FROM alpha_source
            WHERE id < 10
          )""",
    "§2.2.1 Subqueries (2)": """SELECT alpha_source.id
    FROM alpha_source,
         (
          SELECT alpha_source.id
          FROM alpha_source
          WHERE id < 10
         ) AS subsample
    WHERE alpha_source.id >=5
      AND alpha_source.id = subsample.id""",
    "§2.2.1 Subqueries (3)": """WITH subsample AS (
        SELECT alpha_source.id
        FROM alpha_source
        WHERE id < 10
    )
    SELECT alpha_source.id
    FROM alpha_source
      INNER JOIN subsample USING(id)
    WHERE alpha_source.id >= 5""",
    "§4.5.1 WITH (1)": """SELECT ra, dec
    FROM (
           SELECT *
           FROM alpha_source
           WHERE id % 10 = 0
         ) AS alpha_subset
    WHERE ra > 10
      AND ra < 20""",
    "§4.5.1 WITH (2)": """WITH alpha_subset AS (
      SELECT *
      FROM alpha_source
      WHERE id % 10 = 0
    )
    SELECT ra, dec
    FROM alpha_subset
    WHERE ra > 10
      AND ra < 20""",
    "§4.6.5 Operands (1)": """SELECT id, ra, dec FROM table1
    UNION
        SELECT id, ra, dec FROM table2
    ORDER BY id -- sort the UNION result""",
    "§4.6.5 Operands (2)": """-- take the 10 first
        (SELECT TOP 10 id, ra, dec FROM atable ORDER BY id ASC)
    UNION
        -- take the 10 last
        (SELECT TOP 10 id, ra, dec FROM atable ORDER BY id DESC)""",
    "§4.6.5 Operands (3)": """WITH tenFirst AS (SELECT TOP 10 id, ra, dec FROM atable ORDER BY id ASC),
     tenLast  AS (SELECT TOP 10 id, ra, dec FROM atable ORDER BY id DESC)
  SELECT * FROM tenFirst
UNION
  SELECT * FROM tenLast""",
    "§4.6.6 Precedence (1)": """SELECT id, ra, dec FROM table1
    UNION
        SELECT id, ra, dec FROM table2
    INTERSECT
        SELECT id, ra, dec FROM table3""",
    "§4.6.6 Precedence (2)": """SELECT id, ra, dec FROM table1
    UNION
        (
            SELECT id, ra, dec FROM table2
        INTERSECT
            SELECT id, ra, dec FROM table3
        )""",
    # §4.2.12 CONTAINS, the WHERE clause of its example on a table of ours
    "§4.2.12 CONTAINS": """SELECT id FROM alpha_source
    WHERE 1 = CONTAINS(POINT(25.0, -19.5),
                       CIRCLE(25.4, -20.0, 10.0))""",
}


@pytest.mark.parametrize("section", sorted(ADQL21_EXAMPLES))
def test_adql21_examples_pass_without_error(section):
    found = check(ADQL21_EXAMPLES[section], ADQL21_SCHEMA)
    assert not errors(found), "\n".join(map(str, found))


def test_adql21_example_names_checked_for_real():
    """The same examples against a schema without their columns: the checker does look."""
    bare = StaticCatalog([TableMeta(n, [ColumnMeta("other")]) for n in
                          ("alpha_source", "atable", "table1", "table2", "table3")])
    failing = [s for s, q in ADQL21_EXAMPLES.items() if errors(check(q, bare))]
    assert len(failing) >= len(ADQL21_EXAMPLES) - 1


# --- the service's own message --------------------------------------------------------------


def test_service_message_with_a_quoted_token_gets_a_caret():
    # DaCHS 2.7's words for an unknown column (tests/interop/test_dachs_behaviour.py)
    adql = "SELECT obj_id,\n  nosuchcol FROM driftcat.objects"
    f = from_service(adql, "Field query: No such field known: column 'nosuchcol' could not be "
                           "located in table metadata")
    assert (f.line, f.column, f.length) == (2, 3, 9)


def test_service_message_with_line_and_column():
    f = from_service("SELEKT obj_id FROM t", "Could not parse your query: Expected \"SELECT\", "
                     "found 'S'  (at char 0), (line:1, col:1)")
    assert (f.line, f.column) == (1, 1)
    assert from_service("SELECT a FROM t", "internal failure") is None


# --- bad input ------------------------------------------------------------------------------


def test_text_that_does_not_parse_never_crashes():
    rng = random.Random(12)
    pieces = ["SELECT", "FROM", "WHERE", "(", ")", "'", '"', ",", "*", "ra", "orrery.sources",
              "TOP", "1", "=", "CONTAINS", "POINT(", "--", "\n", "ORDER BY", "UNION", "é", "\x00"]
    for _ in range(400):
        adql = " ".join(rng.choice(pieces) for _ in range(rng.randint(0, 14)))
        found = check(adql, CATALOG)
        for f in found:
            assert f.severity in ("error", "warning") and f.line >= 1 and f.column >= 1
            str(f)
    assert only("", "syntax").message == "the query is empty"
    assert only("SELECT ra FROM orrery.sources WHERE class_label = 'x", "syntax").column == 51
    assert only("SELEKT ra FROM orrery.sources", "syntax").suggestion.startswith("did you mean SELECT")
    deep = "SELECT ra FROM orrery.sources WHERE " + "(" * 3000 + "1" + ")" * 3000 + " = 1"
    assert check(deep, CATALOG)[0].severity in ("error", "warning")


# --- no false errors on what a real engine accepts ------------------------------------------


def _query_literals(path):
    """Every plain string constant in a test module that reads as a query."""
    import ast
    tree = ast.parse(path.read_text())
    return sorted({n.value for n in ast.walk(tree) if isinstance(n, ast.Constant)
                   and isinstance(n.value, str) and n.value.lstrip()[:6].upper() in
                   ("SELECT", "WITH") and " FROM " in n.value.upper()})


def test_every_query_the_embedded_engine_runs_passes_without_error(tmp_path):
    """The queries of the engine's own ADQL tests (tests/localtap/test_adql.py) that the real
    engine answers: the checker, reading the same service's VOSI metadata, finds no error."""
    from pathlib import Path

    from jobdesk import metadata
    from jobdesk.localtap.engine import Engine
    from jobdesk.localtap.service import tableset_xml
    import io

    engine = Engine(tmp_path / "state", rows=300)
    tables = list(metadata.parse_tableset(io.BytesIO(tableset_xml(engine.tables()).encode()),
                                          on_skip=lambda m: None))
    catalog = StaticCatalog([TableMeta(t["name"], [ColumnMeta(c["name"], c["datatype"])
                                                   for c in t["columns"]]) for t in tables])
    accepted = 0
    for adql in _query_literals(Path(__file__).parent / "localtap" / "test_adql.py"):
        try:
            engine.execute(adql, maxrec=5)
        except Exception:                     # noqa: BLE001 - refused by the engine: skip
            continue
        accepted += 1
        assert not errors(check(adql, catalog)), (adql, check(adql, catalog))
    assert accepted >= 20


def test_any_text_gets_findings_never_an_exception():
    from hypothesis import given, settings, strategies as st

    @settings(max_examples=300, deadline=None)
    @given(st.text(max_size=300) | st.builds(lambda a, b: f"SELECT {a} FROM orrery.sources {b}",
                                              st.text(max_size=60), st.text(max_size=60)))
    def run(text):
        for f in check(text, CATALOG):
            assert f.severity in ("error", "warning") and f.line >= 1 and f.column >= 1
            assert isinstance(str(f), str)
    run()

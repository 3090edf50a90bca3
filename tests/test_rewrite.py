"""Renames on the parsed query: identifiers change, string literals and comments do not.

The rules checked are ADQL 2.1's: §2.1.7 (regular identifiers are case-insensitive, delimited
"..." ones exact), §2.1.8 ('...' literals are values, never names), Appendix A (a comment runs
from -- to the end of the line).  sqlglot (an independent parser) re-reads every rewritten query
to show it is still one query of the same shape.
"""

from __future__ import annotations

import sqlglot
from hypothesis import given, settings
from hypothesis import strategies as st

from jobdesk.rewrite import Name, rewrite

RENAMES = {"orrery.sources": "orrery_r2.sources", "class_label": "source_class"}


def test_identifiers_change_literals_and_comments_stay():
    q = ("SELECT orrery_id, class_label -- class_label is the class\n"
         "FROM orrery.sources WHERE class_label = 'class_label' AND ra > 3 ORDER BY orrery_id")
    r = rewrite(q, RENAMES)
    assert r.adql == ("SELECT orrery_id, source_class AS class_label -- class_label is the class\n"
                      "FROM orrery_r2.sources WHERE source_class = 'class_label' AND ra > 3 "
                      "ORDER BY orrery_id")
    assert r.used == set(RENAMES)


def test_case_rules_and_qualifiers():
    q = 'SELECT S.CLASS_LABEL, "class_label", sources.ra FROM ORRERY.Sources AS S'
    r = rewrite(q, RENAMES)
    # regular identifiers match whatever their case; the delimited "class_label" matches too
    # (exact spelling), the table qualifier follows a bare-name rename only when it changes
    assert r.adql == ('SELECT S.source_class AS CLASS_LABEL, source_class AS "class_label", '
                      'sources.ra FROM orrery_r2.sources AS S')
    r2 = rewrite('SELECT "Class_Label" FROM t', {"class_label": "x"})
    assert r2.adql == 'SELECT "Class_Label" FROM t' and not r2.used   # delimited: exact case


def test_upload_columns_and_names_containing_the_old_one_stay():
    q = ("SELECT m.class_label, s.class_label_2 FROM orrery.sources AS s "
         "JOIN TAP_UPLOAD.mine AS m ON m.orrery_id = s.orrery_id")
    r = rewrite(q, RENAMES)
    assert r.adql == ("SELECT m.class_label, s.class_label_2 FROM orrery_r2.sources AS s "
                      "JOIN TAP_UPLOAD.mine AS m ON m.orrery_id = s.orrery_id")


def test_rename_table_bare_qualifier_and_using():
    r = rewrite("SELECT sources.ra FROM orrery.sources JOIN orrery.visits USING (orrery_id)",
                {"orrery.sources": "orrery_r2.objects", "orrery_id": "oid"})
    assert r.adql == "SELECT objects.ra FROM orrery_r2.objects JOIN orrery.visits USING (oid)"


def test_name_parsing():
    assert Name.parse('orrery."Odd.Name"').parts == (("orrery", False), ("Odd.Name", True))
    assert Name.parse("a.b").folded == ("A", "B")


WORDS = st.sampled_from(["class_label", "'class_label'", "-- class_label\n", "ra", "'x''y'",
                         "1.5E0", "orrery_id"])


@settings(max_examples=200, deadline=None)
@given(extra=st.lists(WORDS, max_size=6))
def test_literals_and_comments_are_byte_for_byte_the_same(extra):
    where = " AND ".join(f"{w.strip() if not w.startswith('--') else 'ra'} IS NOT NULL"
                         for w in extra if not w.startswith("'")) or "1 = 1"
    literals = [w for w in extra if w.startswith("'")]
    comments = [w for w in extra if w.startswith("--")]
    q = ("SELECT orrery_id " + "".join(comments) + "FROM orrery.sources WHERE " + where
         + "".join(f" OR class_label = {lit}" for lit in literals))
    r = rewrite(q, RENAMES)
    for lit in literals:
        assert r.adql.count(lit) == q.count(lit)
    for c in comments:
        assert c in r.adql
    assert "orrery.sources" not in r.adql.split("--")[0] or "orrery_r2.sources" in r.adql
    # still one parseable query, reading the new table
    tree = sqlglot.parse_one(r.adql, read="tsql")
    assert [t.sql() for t in tree.find_all(sqlglot.exp.Table)] == ["orrery_r2.sources"]

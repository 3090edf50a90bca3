"""Order in the list over REST: sort by time, size or rows, filter and group by notebook.

Records are written through ``jobdesk.index.Index`` into the file the server reads; their
services are invented addresses that are never contacted (the poller is off).
"""

from __future__ import annotations

import hashlib
import sqlite3

import pytest
import requests

from jobdesk.index import Index
from jupyter_launch import RunningJupyter

NOTEBOOKS = ["survey/north.ipynb", "survey/south.ipynb", None]
T0 = 1_700_000_000.0


def _record(i: int) -> dict:
    cached = i % 4 != 3
    return {"id": hashlib.sha256(f"order {i}".encode()).hexdigest()[:16], "key": f"{i:064x}",
            "service": "http://tap.gamma.invalid/tap", "adql": f"SELECT TOP {i + 1} * FROM t",
            "label": f"job {i:03d}", "phase": "COMPLETED", "created": T0 + i,
            "finished": T0 + 1000 - i * 3, "rows": (i * 37) % 101, "result_bytes": (i * 53) % 97,
            "notebook": NOTEBOOKS[i % 3], "parquet_sha256": f"{i:064x}" if cached else None}


@pytest.fixture(scope="module")
def seeded(tmp_path_factory):
    work = tmp_path_factory.mktemp("order")
    index = Index(work / "desk" / "index.sqlite")
    records = [index.insert(_record(i)) for i in range(60)]
    with RunningJupyter(work, work / "desk", jobdesk_settings={"poll_interval": 0}) as jp:
        yield jp, records, work / "desk" / "index.sqlite"


def get(jp, path, **params):
    answer = requests.get(jp.url(f"jobdesk/api/{path}"), headers=jp.auth, params=params,
                          timeout=30)
    assert answer.status_code == 200, answer.text
    return answer.json()


@pytest.mark.parametrize("sort,field", [("rows", "rows"), ("size", "result_bytes"),
                                        ("finished", "finished"), ("created", "created")])
def test_sorted_pages_follow_python_sorted(seeded, sort, field):
    jp, records, _ = seeded
    got = get(jp, "jobs", sort=sort, limit=7)["jobs"] + get(jp, "jobs", sort=sort, limit=7,
                                                             offset=7)["jobs"]
    # Largest first; ties in the order the rows were written, newest first.
    expected = sorted(records, key=lambda r: (r[field], r["created"]), reverse=True)[:14]
    assert [r["id"] for r in got] == [r["id"] for r in expected]


def test_bad_sort_is_refused(seeded):
    jp, _, _ = seeded
    answer = requests.get(jp.url("jobdesk/api/jobs"), params={"sort": "adql; DROP"},
                          headers=jp.auth, timeout=30)
    assert answer.status_code == 400


def test_notebook_filter_and_groups_with_cache_use(seeded):
    jp, records, _ = seeded
    page = get(jp, "jobs", notebook="survey/south.ipynb", limit=100)
    assert {r["notebook"] for r in page["jobs"]} == {"survey/south.ipynb"}
    assert page["total"] == sum(r["notebook"] == "survey/south.ipynb" for r in records)
    none = get(jp, "jobs", notebook="", limit=100)
    assert none["total"] == sum(r["notebook"] is None for r in records)
    groups = get(jp, "groups", by="notebook")
    assert groups["available"] is True
    by_value = {g["value"]: g for g in groups["groups"]}
    for notebook in NOTEBOOKS:
        mine = [r for r in records if r["notebook"] == notebook]
        cached = [r for r in mine if r["parquet_sha256"]]
        g = by_value[notebook or ""]
        assert (g["jobs"], g["cached"]) == (len(mine), len(cached))
        assert g["bytes"] == sum(r["result_bytes"] for r in cached)
        assert g["rows"] == sum(r["rows"] for r in cached)
    assert [g["bytes"] for g in groups["groups"]] == sorted(
        (g["bytes"] for g in groups["groups"]), reverse=True)


def test_analysis_grouping_is_absent_until_the_index_has_it(seeded):
    jp, _, path = seeded
    columns = {r[1] for r in sqlite3.connect(path).execute("PRAGMA table_info(jobs)")}
    groups = get(jp, "groups", by="analysis")
    assert groups["available"] is ("analysis" in columns)
    if "analysis" not in columns:
        assert groups["groups"] == [] and get(jp, "jobs", analysis="x")["total"] == 0


def test_sorted_first_page_walks_an_index(seeded):
    _, _, path = seeded
    # SQLite's own query planner (EXPLAIN QUERY PLAN, sqlite.org/eqp.html): no temp B-tree sort.
    conn = sqlite3.connect(path)
    for column in ("rows", "result_bytes", "finished", "created"):
        plan = " ".join(r[-1] for r in conn.execute(
            f"EXPLAIN QUERY PLAN SELECT * FROM jobs ORDER BY {column} DESC, rowid DESC LIMIT 100"))
        assert "USE TEMP B-TREE" not in plan, (column, plan)

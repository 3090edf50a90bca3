"""The typed job record: one list of fields for the index, the API and the docs, and a migration
that keeps every record an earlier version wrote readable."""

import json
import sqlite3
import time
from pathlib import Path

import sqlite_utils

from jobdesk import Desk, phases, provenance, record
from jobdesk.index import MIGRATIONS, SCHEMA_VERSION, Index
from jobdesk.localtap import serve
from jobdesk.record import JobRecord

REPO = Path(__file__).resolve().parents[1]


def test_the_jobs_table_is_made_from_the_record(tmp_path):
    ix = Index(tmp_path / "index.sqlite")
    columns = {r[1] for r in ix.db.execute("PRAGMA table_info(jobs)").fetchall()}
    assert columns == set(record.FIELDS)


def test_every_field_says_what_it_means():
    described = record.describe()
    assert [name for name, _, _ in described] == list(record.FIELDS)
    for name, kind, meaning in described:
        assert kind and len(meaning) > 10, name


def test_docs_job_record_md_is_what_the_record_generates():
    page = (REPO / "docs" / "job-record.md").read_text(encoding="utf-8")
    assert page == record.reference(), \
        "docs/job-record.md is stale: python -m jobdesk.record > docs/job-record.md"


def test_as_dict_is_json_safe_and_keeps_truncated_as_0_or_1():
    rec = JobRecord.from_row({"id": "a" * 16, "key": "k", "service": "s", "adql": "SELECT 1",
                              "phase": "COMPLETED", "created": 1.0, "truncated": 1,
                              "uploads": '{"t": "abc"}', "warnings": None,
                              "a_column_of_a_newer_version": 5})
    assert rec.truncated is True and rec.uploads == {"t": "abc"} and rec.warnings == []
    out = json.loads(json.dumps(rec.as_dict()))
    assert out["truncated"] == 1 and out["uploads"] == {"t": "abc"}
    assert "a_column_of_a_newer_version" not in out
    # read by key, as scripts written against the old dict records do
    assert rec["phase"] == "COMPLETED" and rec.get("truncated") == 1 and rec.get("nope") is None


def test_records_built_from_one_page_share_no_mutable_values():
    columns = ("id", "key", "service", "adql", "phase", "created", "uploads", "warnings")
    rows = [(str(i) * 16, "k", "s", "SELECT 1", "COMPLETED", float(i), "{}", "[]")
            for i in range(3)]
    first, second, _ = JobRecord.from_rows(columns, rows)
    first.uploads["t"] = "abc"
    first.warnings.append("w")
    assert second.uploads == {} and second.warnings == [], \
        "an empty JSON value must be a fresh object per record"
    assert [r.created for r in (first, second)] == [0.0, 1.0] and first.rows is None


def _file_of_the_previous_version(path: Path) -> None:
    """An index as the version before typed records left it (every migration but the last)."""
    db = sqlite_utils.Database(sqlite3.connect(path, isolation_level=None))
    for step in MIGRATIONS[:-1]:
        step(db)
    db.execute(f"PRAGMA user_version = {SCHEMA_VERSION - 1}")
    assert "software" not in {r[1] for r in db.execute("PRAGMA table_info(jobs)").fetchall()}
    base = {"service": "http://tap.example.invalid/tap", "adql": "SELECT 1", "layer": "personal"}
    rows = [
        # an ordinary finished record
        {"id": "1" * 16, "key": "a" * 64, "phase": "COMPLETED", "created": 100.0, "rows": 3,
         "truncated": 0, "uploads": "{}", "warnings": "[]", "server": '{"publisher": "x"}'},
        # JSON text that is not JSON (written by hand, or by a buggy tool)
        {"id": "2" * 16, "key": "b" * 64, "phase": "ERROR", "created": 200.0,
         "uploads": "{broken", "warnings": "[]", "server": None},
        # a phase this version does not know, and numbers stored as text
        {"id": "3" * 16, "key": "c" * 64, "phase": "RESTING", "created": "300.5",
         "rows": "12", "uploads": None, "warnings": None},
    ]
    for row in rows:
        cols = {**base, **row}
        db.execute(f"INSERT INTO jobs ({', '.join(cols)}) VALUES ({', '.join('?' * len(cols))})",
                   list(cols.values()))
    db.conn.close()


def test_migration_keeps_every_old_record_readable(tmp_path):
    path = tmp_path / "index.sqlite"
    _file_of_the_previous_version(path)
    ix = Index(path)
    records = {r.id: r for r in ix.list(limit=None)}
    assert len(records) == 3
    ok, broken, odd = records["1" * 16], records["2" * 16], records["3" * 16]
    assert ok.phase == "COMPLETED" and ok.rows == 3 and ok.truncated is False
    assert ok.server == {"publisher": "x"} and ok.software is None
    assert broken.uploads == {} and "{broken" in broken.error_detail
    assert odd.phase == phases.LOST and odd.finished is not None
    assert odd.created == 300.5 and odd.rows == 12
    assert [h["phase"] for h in ix.history("3" * 16)][-1] == phases.LOST
    # and opening it again changes nothing (the migration ran once)
    again = Index(path)
    assert again.get("3" * 16) == odd


def test_provenance_names_the_software_that_fetched_not_the_reader(tmp_path):
    with serve(rows=50) as tap:
        desk = Desk(tmp_path / "d")
        job = desk.submit(tap.url, "SELECT TOP 2 orrery_id FROM orrery.sources "
                                   "ORDER BY orrery_id").wait(progress=False)
    assert job.typed().software == provenance.versions()
    # A record made before versions were kept: provenance must not claim the reader's.
    desk.index.update(job.id, software=None)
    prov = job.provenance()
    assert prov["software"] == {}
    assert "jobdesk (version not recorded)" in job.account()
    # and a recorded older version is kept as recorded
    desk.index.update(job.id, software={"jobdesk": "0.0.1-old"})
    assert job.provenance()["software"] == {"jobdesk": "0.0.1-old"}
    assert "jobdesk 0.0.1-old" in job.account()

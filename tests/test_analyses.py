"""Analyses and release re-runs end to end: real HTTP to the embedded service (which serves the
first release as orrery and the second as orrery_r2), real SQLite files.

Outside references: pyvo (an independent client) reads the new release for the same rewritten
query; the second release's published metadata (TAP 1.1 §4 TAP_SCHEMA) is what the check reads.
"""

from __future__ import annotations

import json
import subprocess
import sys

import pytest
import pyvo

from jobdesk import Desk
from jobdesk.cli import main as cli
from jobdesk.errors import AnalysisNotFound, RenameInvalid
from jobdesk.localtap import serve

ROWS = 3000
STARS = ("SELECT orrery_id, ra, dec, parallax, class_label FROM orrery.sources\n"
         "WHERE dec > 30 AND class_label = 'star' -- stars only, class_label as published\n"
         "ORDER BY orrery_id")
BRIGHT = "SELECT orrery_id, mag_lime FROM orrery.sources WHERE mag_lime < 14 ORDER BY orrery_id"
VISITS = ("SELECT v.orrery_id, count(*) AS n FROM orrery.visits AS v "
          "JOIN TAP_UPLOAD.mine AS m ON m.orrery_id = v.orrery_id GROUP BY v.orrery_id "
          "ORDER BY v.orrery_id")
RELEASE = {"orrery.sources": "orrery_r2.sources", "orrery.visits": "orrery_r2.visits",
           "class_label": "source_class"}


@pytest.fixture(scope="module")
def tap(tmp_path_factory):
    with serve(state=tmp_path_factory.mktemp("tap"), rows=ROWS, exec_delay=0.1) as service:
        yield service


@pytest.fixture
def desk(tmp_path):
    return Desk(tmp_path / "desk", wait_window=5)


def _analysis(desk, tap, name="stream-search"):
    with desk.analysis(name):
        stars = desk.submit(tap.url, STARS, label="north stars").wait(progress=False)
        desk.submit(tap.url, BRIGHT, label="bright").wait(progress=False)
        desk.submit(tap.url, VISITS, uploads={"mine": stars.table()}).wait(progress=False)
    return stars


def _snapshot(desk, name):
    steps = desk.index.steps(name)
    return json.dumps([steps, [desk.index.get(s["job_id"]).as_dict() for s in steps],
                       [desk.index.history(s["job_id"]) for s in steps]], sort_keys=True)


def test_analysis_records_order_and_upload_dependency(tap, desk):
    stars = _analysis(desk, tap)
    desk.submit(tap.url, BRIGHT, analysis="stream-search")       # a re-run cell: no new step
    [listed] = desk.analyses()
    assert listed["name"] == "stream-search" and listed["steps"] == 3
    steps = desk.index.steps("stream-search")
    assert [s["step"] for s in steps] == [1, 2, 3]
    assert steps[2]["depends"] == {"mine": stars.id}              # found from the table's key
    assert desk.job(stars.id).record["analysis"] == "stream-search"
    assert [j.id for j in desk.analysis_jobs("stream-search")][0] == stars.id
    # a table cut down from a result is its own upload, not a dependency on that result
    few = stars.table()[:5]
    cut = desk.submit(tap.url, VISITS, uploads={"mine": few}, analysis="cut")
    assert desk.index.steps("cut")[0]["depends"] == {} and cut.id != steps[2]["job_id"]


def test_rerun_on_the_second_release_and_compare(tap, desk, tmp_path):
    _analysis(desk, tap)
    before = _snapshot(desk, "stream-search")
    plan = desk.rerun("stream-search", rename=RELEASE)
    assert [s["state"] for s in plan.steps] == ["waiting"] * 3     # nothing ran yet
    assert "FROM orrery_r2.sources" in plan.steps[0]["new_adql"]
    assert "'star' -- stars only, class_label as published" in plan.steps[0]["new_adql"]
    assert plan.steps[2]["depends"] == {"mine": 1}
    plan.wait()
    assert [s["state"] for s in plan.steps] == ["done"] * 3 and not plan.failed
    assert plan.into.startswith("stream-search@")
    assert [s["job_id"] for s in desk.index.steps(plan.into)] == [j.id for j in plan.jobs]
    # independent client, same rewritten query, same rows
    reference = pyvo.dal.TAPService(tap.url).run_sync(plan.steps[0]["new_adql"]).to_table()
    assert list(plan.jobs[0].table()["orrery_id"]) == list(reference["orrery_id"])
    # the upload of step 3 was the NEW step 1's result
    new_ids = set(plan.jobs[0].table()["orrery_id"])
    assert set(plan.jobs[2].table()["orrery_id"]) <= new_ids

    comparisons = plan.compare()
    first = comparisons[0].comparison
    old_ids = set(desk.job(plan.steps[0]["old_job"]).table()["orrery_id"])
    assert first.added == len(new_ids - old_ids) and first.removed == len(old_ids - new_ids)
    assert first.changed["parallax"] > 0 and first.columns["parallax"].max_abs < 1.0
    html, js = comparisons.report(tmp_path / "rerun.html")
    assert "<svg" in html.read_text()
    twin = json.loads(js.read_text())
    assert len(twin["comparisons"]) == 3 and twin["comparisons"][0]["old"]["provenance"]
    # nothing of the old analysis changed
    assert _snapshot(desk, "stream-search") == before
    # the same arguments find the same plan, also from a new process
    again = Desk(desk.root).rerun("stream-search", rename=RELEASE)
    assert again.id == plan.id and [j.id for j in again.jobs] == [j.id for j in plan.jobs]


def test_unchanged_steps_are_cache_hits(tap, desk):
    _analysis(desk, tap)
    created = tap.stats()["jobs_created"]
    plan = desk.rerun("stream-search", into="same-again").wait()
    assert tap.stats()["jobs_created"] == created
    assert [j.id for j in plan.jobs] == [s["job_id"] for s in desk.index.steps("stream-search")]


def test_bad_renames_refused_before_anything_runs(tap, desk):
    _analysis(desk, tap)
    created = tap.stats()["jobs_created"]
    with pytest.raises(RenameInvalid) as caught:
        desk.rerun("stream-search", rename={"orrery.nothing": "orrery_r2.sources",
                                            "orrery.sources": "orrery_r9.sources"})
    text = str(caught.value)
    assert "'orrery.nothing': no step" in text
    assert "table orrery_r9.sources does not exist" in text
    with pytest.raises(RenameInvalid, match="column source_klass"):
        desk.rerun("stream-search", rename={**RELEASE, "class_label": "source_klass"})
    # the second release renamed class_label: forgetting that rename is caught too
    with pytest.raises(RenameInvalid, match="column class_label is not in orrery_r2.sources"):
        desk.rerun("stream-search", rename={"orrery.sources": "orrery_r2.sources",
                                            "orrery.visits": "orrery_r2.visits"})
    with pytest.raises(AnalysisNotFound):
        desk.rerun("no-such-analysis", rename=RELEASE)
    assert tap.stats()["jobs_created"] == created and desk.index.plans() == []


def test_a_failing_step_stops_only_what_depends_on_it(tap, desk):
    # a subquery hides the column from the re-run's name check; it fails when submitted
    hidden = ("SELECT q.orrery_id FROM (SELECT orrery_id, class_label FROM orrery.sources) AS q "
              "WHERE q.class_label = 'qso' ORDER BY q.orrery_id")
    with desk.analysis("fragile"):
        first = desk.submit(tap.url, hidden).wait(progress=False)
        desk.submit(tap.url, BRIGHT).wait(progress=False)
        desk.submit(tap.url, VISITS, uploads={"mine": first}).wait(progress=False)
    plan = desk.rerun("fragile", rename={"orrery.sources": "orrery_r2.sources",
                                         "orrery.visits": "orrery_r2.visits"}).wait()
    assert [s["state"] for s in plan.steps] == ["failed", "done", "blocked"]
    assert [f["step"] for f in plan.failed] == [1, 3] and "class_label" in plan.failed[0]["error"]
    # the local check before submit (the desk's own) refuses step 1 before any request
    assert [j.id for j in plan.jobs] == [plan.steps[1]["new_job"]]


def test_cli_analyses_rerun_compare(tap, desk, tmp_path, capsys):
    _analysis(desk, tap)
    root = ["--root", str(desk.root)]
    assert cli([*root, "analyses", "--json"]) == 0
    assert json.loads(capsys.readouterr().out)[0]["name"] == "stream-search"
    args = [*root, "rerun", "stream-search", "--into", "r2"]
    for old, new in RELEASE.items():
        args += ["--rename", f"{old}={new}"]
    assert cli([*args, "--start", "--wait", "--json"]) == 0
    plan = json.loads(capsys.readouterr().out)
    assert [s["state"] for s in plan["steps"]] == ["done"] * 3
    old, new = plan["steps"][0]["old_job"], plan["steps"][0]["new_job"]
    out = tmp_path / "cmp.html"
    assert cli([*root, "compare", old, new, "--report", str(out), "--json"]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["key"] == "orrery_id" and out.exists() and out.with_suffix(".json").exists()
    assert cli([*root, "rerun", "stream-search", "--rename", "nope=x"]) == 2
    assert "no step of 'stream-search' uses that name" in capsys.readouterr().err


def test_index_from_before_analyses_is_migrated_and_keeps_its_jobs(tmp_path):
    import sqlite_utils

    from jobdesk.index import MIGRATIONS, Index, _add_analyses_and_plans
    path = tmp_path / "index.sqlite"
    # The schema exactly as it was before analyses: the migrations up to that one, run in order.
    before = MIGRATIONS.index(_add_analyses_and_plans)
    db = sqlite_utils.Database(path)
    for step in MIGRATIONS[:before]:
        step(db)
    db.execute(f"PRAGMA user_version = {before}")
    db.execute("INSERT INTO jobs (id, key, service, adql, phase, created) VALUES "
               "('00112233aabbccdd', ?, 'http://x.invalid/tap', 'SELECT 1', 'COMPLETED', 1.0)",
               ["k" * 64])
    db.conn.commit()
    db.close()
    index = Index(path)
    assert index.get("00112233aabbccdd")["analysis"] is None
    assert index.add_step("a", "00112233aabbccdd") == 1 and index.analyses()[0]["steps"] == 1
    assert index.get("00112233aabbccdd")["analysis"] == "a"

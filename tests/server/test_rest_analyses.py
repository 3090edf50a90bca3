"""The REST API's view of analyses, re-run plans and comparisons, over a real Jupyter server and
real jobs on the embedded service (first release orrery, second orrery_r2)."""

from __future__ import annotations

import pytest
import requests

from jobdesk.desk import Desk
from jobdesk.localtap import serve
from jupyter_launch import RunningJupyter

STARS = "SELECT orrery_id, ra, dec, parallax FROM orrery.sources WHERE dec > 20 ORDER BY orrery_id"


@pytest.fixture(scope="module")
def setup(tmp_path_factory):
    work = tmp_path_factory.mktemp("rest-analyses")
    with serve(state=work / "tap", rows=800, exec_delay=0.1) as tap:
        desk = Desk(work / "desk", wait_window=2)
        desk.submit(tap.url, STARS, analysis="north").wait(progress=False)
        plan = desk.rerun("north", rename={"orrery.sources": "orrery_r2.sources"}).wait()
        with RunningJupyter(work, work / "desk", jobdesk_settings={"poll_interval": 0}) as jp:
            yield jp, desk, plan


def get(jp, path, **kw):
    return requests.get(jp.url(f"jobdesk/api/{path}"), headers=jp.auth, timeout=60, **kw)


def test_job_objects_carry_their_analysis(setup):
    jp, desk, plan = setup
    jobs = {j["id"]: j for j in get(jp, "jobs").json()["jobs"]}
    assert jobs[plan.steps[0]["old_job"]]["analysis"] == "north"
    assert jobs[plan.jobs[0].id]["analysis"] == plan.into


def test_analyses_steps_and_plans(setup):
    jp, desk, plan = setup
    names = [a["name"] for a in get(jp, "analyses").json()["analyses"]]
    assert set(names) == {"north", plan.into}
    steps = get(jp, "analyses/steps", params={"name": "north"}).json()
    assert [j["id"] for j in steps["jobs"]] == [plan.steps[0]["old_job"]]
    assert steps["plans"] == [plan.id]
    assert get(jp, "analyses/steps", params={"name": "nothing"}).status_code == 404
    shown = get(jp, f"plans/{plan.id}").json()
    assert [s["state"] for s in shown["steps"]] == ["done"] and shown["finished"] is True
    assert get(jp, "plans/0123456789abcdef").status_code == 404


def test_comparison_and_its_report(setup):
    jp, desk, plan = setup
    old, new = plan.steps[0]["old_job"], plan.jobs[0].id
    summary = get(jp, f"compare/{old}/{new}").json()
    direct = desk.compare(old, new)
    assert (summary["added"], summary["removed"], summary["matched"]) == \
        (direct.added, direct.removed, direct.matched)
    page = get(jp, f"compare/{old}/{new}/report")
    assert page.status_code == 200 and page.headers["Content-Type"].startswith("text/html")
    assert "<svg" in page.text
    bad = get(jp, f"compare/{old}/{new}", params={"key": "nope"})
    assert bad.status_code == 409 and "nope" in bad.json()["message"]

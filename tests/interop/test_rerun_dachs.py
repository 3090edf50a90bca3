"""Re-runs against the independent TAP server (DaCHS): the rewritten queries run unchanged there.

An analysis made on the embedded service is re-run on DaCHS with its table and column names
renamed to the ones DaCHS publishes (driftcat.objects, see rd/q.rd).  The rename check reads
DaCHS's own VOSI tables; each step's result is compared with what pyvo (the reference client)
gets from DaCHS for the same rewritten ADQL, sent as is.
"""

from __future__ import annotations

import uuid

import pytest
import pyvo

from jobdesk import Desk
from jobdesk.errors import RenameInvalid
from jobdesk.localtap import serve

STEPS = [
    "SELECT orrery_id, ra, dec, mag_lime FROM orrery.sources -- mag_lime: the lime band\n"
    "WHERE dec > 10 AND mag_lime < 16 AND '{tag}' = '{tag}' ORDER BY orrery_id",
    "SELECT TOP 20 s.orrery_id, s.mag_lime FROM orrery.sources AS s "
    "WHERE 1 = CONTAINS(POINT('ICRS', s.ra, s.dec), CIRCLE('ICRS', 150.0, 20.0, 10.0)) "
    "AND 'orrery_id {tag}' = 'orrery_id {tag}' ORDER BY s.orrery_id",
]
RENAME = {"orrery.sources": "driftcat.objects", "orrery_id": "obj_id", "mag_lime": "mag_blue"}


@pytest.fixture
def desk_with_analysis(tmp_path):
    tag = uuid.uuid4().hex[:8]
    with serve(state=tmp_path / "tap", rows=1000, exec_delay=0.1) as tap:
        desk = Desk(tmp_path / "desk", wait_window=5)
        with desk.analysis("prototype"):
            for adql in STEPS:
                desk.submit(tap.url, adql.format(tag=tag)).wait(progress=False)
        yield desk


def test_rewritten_queries_run_unchanged_on_dachs(desk_with_analysis, tap_url):
    desk = desk_with_analysis
    plan = desk.rerun("prototype", rename=RENAME, service=tap_url, into="on-dachs")
    first = plan.steps[0]["new_adql"]
    assert "FROM driftcat.objects -- mag_lime: the lime band" in first    # comment untouched
    assert "'orrery_id " in plan.steps[1]["new_adql"]                       # literal untouched
    plan.wait(timeout=300)
    assert [s["state"] for s in plan.steps] == ["done", "done"], plan.failed
    reference = pyvo.dal.TAPService(tap_url)
    for step, job in zip(plan.steps, plan.jobs):
        ours = job.table()
        theirs = reference.run_sync(step["new_adql"]).to_table()
        # the select items kept their output names (new AS old)
        assert ours.colnames == theirs.colnames
        assert "orrery_id" in ours.colnames
        assert list(ours["orrery_id"]) == list(theirs["orrery_id"])


def test_dachs_metadata_refuses_unknown_targets(desk_with_analysis, tap_url):
    with pytest.raises(RenameInvalid) as caught:
        desk_with_analysis.rerun("prototype", rename={**RENAME, "mag_lime": "mag_green"},
                                 service=tap_url)
    assert "column mag_green" in str(caught.value)
    with pytest.raises(RenameInvalid, match="driftcat.nothing does not exist"):
        desk_with_analysis.rerun("prototype", rename={**RENAME,
                                                      "orrery.sources": "driftcat.nothing"},
                                 service=tap_url)

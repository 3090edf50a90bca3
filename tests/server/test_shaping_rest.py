"""REST routes of the service browser and the checks, over real HTTP to a real Jupyter server,
whose Desk reads the embedded TAP service."""

from __future__ import annotations

import pytest
import requests

from jobdesk.desk import Desk
from jobdesk.localtap import serve
from jupyter_launch import RunningJupyter


@pytest.fixture(scope="module")
def tap(tmp_path_factory):
    with serve(state=tmp_path_factory.mktemp("tap"), rows=500) as tap:
        yield tap


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    work = tmp_path_factory.mktemp("server")
    with RunningJupyter(work, work / "desk", jobdesk_settings={"poll_interval": 0}) as jp:
        yield jp


def get(server, path, **params):
    return requests.get(server.url(f"jobdesk/api/{path}"), params=params, headers=server.auth,
                        timeout=60)


def post(server, path, body):
    return requests.post(server.url(f"jobdesk/api/{path}"), json=body, headers=server.auth,
                         timeout=60)


def test_browse_tables_columns_and_find(server, tap):
    tables = get(server, "services/tables", service=tap.url)
    assert tables.status_code == 200, tables.text
    assert "orrery.sources" in [t["name"] for t in tables.json()["tables"]]
    assert tables.json()["info"]["source"] == "vosi"
    services = get(server, "services").json()["services"]
    assert [s["service"] for s in services] == [tap.url.rstrip("/")]
    cols = get(server, "services/columns", service=tap.url, table="orrery.visits").json()
    assert {"name": "mag", "unit": "mag"}.items() <= next(
        c for c in cols["columns"] if c["name"] == "mag").items()
    hits = get(server, "services/find", service=tap.url, text="parallax").json()["hits"]
    assert {"parallax", "parallax_sigma"} <= {h["column"] for h in hits}
    missing = get(server, "services/columns", service=tap.url, table="orrery.sauces")
    assert missing.status_code == 404 and "orrery.sources" in missing.json()["suggestions"]
    assert get(server, "services/tables", service="not a url").status_code == 400


def test_check_and_estimate(server, tap):
    bad = post(server, "check", {"service": tap.url,
                                 "adql": "SELECT ra, decc FROM orrery.sources WHERE ra < 2"})
    assert bad.status_code == 200 and bad.json()["errors"] == 1
    finding = bad.json()["findings"][0]
    assert (finding["code"], finding["line"], finding["column"]) == ("unknown-column", 1, 12)
    assert "^^^^" in finding["text"]
    est = post(server, "estimate", {"service": tap.url, "maxrec": 10,
                                    "adql": "SELECT orrery_id FROM orrery.sources WHERE ra < 180"})
    assert est.status_code == 200, est.text
    body = est.json()
    assert body["rows"] > 10 and body["over_maxrec"] is True and body["duration_text"] == "unknown"
    assert post(server, "check", {"service": tap.url}).status_code == 400


def test_estimate_of_a_recorded_job(server, tap):
    job = Desk(server.desk_root).submit(tap.url, "SELECT TOP 3 orrery_id FROM orrery.sources "
                                                 "ORDER BY orrery_id").wait(progress=False)
    est = get(server, f"jobs/{job.id}/estimate")
    assert est.status_code == 200, est.text
    assert est.json()["rows"] == 3 == job.rows
    assert get(server, "jobs/0123456789abcdef/estimate").status_code == 404

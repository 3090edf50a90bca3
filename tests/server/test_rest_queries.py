"""What one REST request costs the index, and which errors are 404s: a real Jupyter server in
this process (so the test can watch the index connection), real HTTP, a real SQLite file.

In-process rather than the child server of test_rest.py: counting SQL statements needs
``sqlite3.Connection.set_trace_callback`` on the very connection the handlers use.
"""

from __future__ import annotations

import hashlib
import json
import logging

import pytest
from tornado.httpclient import HTTPClientError

from jobdesk.index import Index

pytest_plugins = ["pytest_jupyter.jupyter_server"]

SERVICE_A = "http://tap.alpha.invalid/tap"
SERVICE_B = "http://tap.beta.invalid/tap"
PHASES = ["COMPLETED", "EXECUTING", "QUEUED", "ERROR", "ABORTED"]
SEEDED = 120
T0 = 1_700_000_000.0


def _record(i: int) -> dict:
    job_id = hashlib.sha256(f"counted {i}".encode()).hexdigest()[:16]
    return {"id": job_id, "key": f"{i:064x}", "service": SERVICE_A if i % 2 else SERVICE_B,
            "adql": f"SELECT TOP {i + 1} * FROM orrery.sources ORDER BY orrery_id",
            "label": f"counted job {i:04d}", "phase": PHASES[i % len(PHASES)],
            "created": T0 + i, "layer": "personal", "rows": i * 10, "truncated": 0}


@pytest.fixture
def desk_root(tmp_path):
    root = tmp_path / "desk"
    index = Index(root / "index.sqlite")
    for i in range(SEEDED):
        index.insert(_record(i))
    index.close()
    return root


@pytest.fixture
def jp_server_config(desk_root):
    # The poller is off: these invented services must never be contacted.
    return {"ServerApp": {"jpserver_extensions": {"jobdesk.server": True},
                          "tornado_settings": {"jobdesk": {"root": str(desk_root),
                                                           "poll_interval": 0}}}}


@pytest.fixture
def statements(jp_serverapp):
    """Every SQL statement the server's index connection runs, from now on."""
    desk = jp_serverapp.web_app.settings["jobdesk_runner"].desk()
    seen: list[str] = []
    desk.index.db.conn.set_trace_callback(seen.append)
    yield seen
    desk.index.db.conn.set_trace_callback(None)


async def _page(jp_fetch, statements, **params) -> tuple[dict, list[str]]:
    statements.clear()
    answer = await jp_fetch("jobdesk", "api", "jobs", params=params)
    return json.loads(answer.body), list(statements)


def _reads_of_jobs(sql: list[str]) -> list[str]:
    return [s for s in sql if "FROM jobs" in s]


@pytest.mark.parametrize("params", [
    {"limit": "50"},
    {"limit": "50", "offset": "25", "phase": "COMPLETED,ERROR"},
    {"limit": "10", "service": SERVICE_A, "text": "counted", "sort": "rows"},
])
async def test_a_page_is_one_query_and_the_total_one_count(jp_fetch, statements, params):
    page, sql = await _page(jp_fetch, statements, **params)
    assert page["jobs"], page  # the page is not empty, so the count below is not trivially low
    reads = _reads_of_jobs(sql)
    rows = [s for s in reads if "SELECT *" in s]
    counts = [s for s in reads if s.lstrip().startswith("SELECT count(*) FROM jobs")]
    assert len(rows) == 1, sql
    assert "LIMIT" in rows[0]
    assert len(counts) == 1, sql
    # The rest is the change token the page carries (one aggregate, not one read per row).
    others = [s for s in reads if s not in rows and s not in counts]
    assert len(others) <= 1, sql
    assert len(sql) <= 3, sql


async def test_statements_per_page_do_not_grow_with_the_page(jp_fetch, statements):
    small, few = await _page(jp_fetch, statements, limit="2")
    large, many = await _page(jp_fetch, statements, limit="100")
    assert len(small["jobs"]) == 2 and len(large["jobs"]) == 100
    assert small["total"] == large["total"] == SEEDED
    assert len(few) == len(many), (few, many)


async def test_unknown_id_is_404_with_our_message(jp_fetch):
    with pytest.raises(HTTPClientError) as info:
        await jp_fetch("jobdesk", "api", "jobs", "ffffffffffffffff")
    assert info.value.code == 404
    body = json.loads(info.value.response.body)
    assert body["error"] == "JobNotFound"
    assert "ffffffffffffffff" in body["message"] and body["hint"]


async def test_a_keyerror_from_a_bug_is_a_500_and_logged(jp_fetch, monkeypatch, caplog):
    # A bug cannot be produced on demand in working code, so one method stands in for one:
    # reading a job's failure raises a plain KeyError, as a missing record field would.
    from jobdesk.desk import Job

    def broken(self):
        raise KeyError("error_detail")

    monkeypatch.setattr(Job, "failure", broken)
    job_id = _record(0)["id"]
    with caplog.at_level(logging.ERROR), pytest.raises(HTTPClientError) as info:
        await jp_fetch("jobdesk", "api", "jobs", job_id)
    assert info.value.code == 500
    text = info.value.response.body.decode()
    assert "no such job" not in text and "JobNotFound" not in text
    logged = [r for r in caplog.records if r.levelno >= logging.ERROR and r.exc_info]
    assert any(r.exc_info[0] is KeyError for r in logged), caplog.records
    # the same route still answers for an id it knows once the bug is gone
    monkeypatch.undo()
    answer = await jp_fetch("jobdesk", "api", "jobs", job_id)
    assert json.loads(answer.body)["job"]["id"] == job_id

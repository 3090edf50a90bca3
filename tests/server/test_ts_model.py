"""The sidebar's TypeScript model (labextension/src/model.ts) against a real server.

The model is the sidebar's only door to the REST API, so it is tested where it runs for real:
vitest runs labextension/test/model.test.ts in Node against a Jupyter server with the jobdesk
extension, over a desk holding real jobs on the embedded TAP service. What the model must see
is computed here, through the Python library, and handed over in an environment variable.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import time
from pathlib import Path

import pytest

from jobdesk.desk import Desk
from jobdesk.localtap import serve
from jupyter_launch import RunningJupyter

LABEXT = Path(__file__).resolve().parents[2] / "labextension"
VITEST = LABEXT / "node_modules" / ".bin" / "vitest"
QUERY = "SELECT TOP {n} orrery_id, ra, dec, mag_lime FROM orrery.sources ORDER BY orrery_id"


def _needs_node():
    if shutil.which("node") is None:
        pytest.skip("needs Node.js to run the TypeScript model tests")
    if not VITEST.exists():
        pytest.skip("needs the lab extension's npm packages (cd labextension && npm install)")


def _until(predicate, timeout=60.0):
    end = time.monotonic() + timeout
    while not (value := predicate()) and time.monotonic() < end:
        time.sleep(0.2)
    return value


def test_model_against_a_real_server(tmp_path):
    _needs_node()
    with serve(state=tmp_path / "quick", rows=300) as quick, \
            serve(state=tmp_path / "slow", rows=300, exec_delay=120) as slow, \
            RunningJupyter(tmp_path / "server", tmp_path / "desk",
                           jobdesk_settings={"poll_interval": 0.5}) as server:
        desk = Desk(server.desk_root)
        done = [desk.submit(quick.url, QUERY.format(n=n), label=label).wait(timeout=60,
                                                                           progress=False)
                for n, label in ((3, "three bright"), (4, "four faint"), (5, "five bright"))]
        forget = desk.submit(quick.url, QUERY.format(n=6), label="to forget").wait(
            timeout=60, progress=False)
        running = desk.submit(slow.url, QUERY.format(n=2), label="long one")
        assert _until(lambda: desk.job(running.id).record.get("job_url"))
        expect = {
            "total": desk.count(),
            "completed": [j.id for j in desk.jobs(phase="COMPLETED")],
            "running": running.id,
            "forget": forget.id,
            "text": "bright",
            "text_ids": [j.id for j in desk.jobs(text="bright")],
            "cache_entries": desk.cache_summary()["entries"],
            # Well formed, never issued: the server must answer "not found", not "bad request".
            "unknown_id": "0" * len(forget.id),
        }
        assert expect["total"] == 5 and len(expect["completed"]) == 4
        assert sorted(expect["text_ids"]) == sorted([done[0].id, done[2].id])
        env = dict(os.environ, JOBDESK_TEST_BASE_URL=server.base, JOBDESK_TEST_TOKEN=server.token,
                   JOBDESK_TEST_EXPECT=json.dumps(expect))
        run = subprocess.run([str(VITEST), "run", "--reporter=verbose", "test/model.test.ts"],
                             cwd=LABEXT, env=env, capture_output=True, text=True, timeout=240)
        output = run.stdout + run.stderr
        assert run.returncode == 0, output[-6000:]
        # Every test ran (none skipped for want of the server's address).
        assert "skipped" not in output and "7 passed" in output, output[-3000:]
        # What the model did reached the library's view of the desk.
        assert desk.job(running.id).phase == "ABORTED"
        with pytest.raises(KeyError):
            desk.job(forget.id)

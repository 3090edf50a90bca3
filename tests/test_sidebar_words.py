"""The sidebar's phase table and its words, run as the browser runs them (format.ts, compiled by
the project's own TypeScript in node), checked against the Python side and UWS 1.1.

Needs node and ``labextension/node_modules`` (``cd labextension && npm install``); skipped with
that reason otherwise. The whole sidebar in a real browser is tests/browser/test_sidebar.py.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
from pathlib import Path

import pytest

from jobdesk import phases

LAB = Path(__file__).resolve().parents[1] / "labextension"
NOW = 1_800_000_000.0

# Transpile format.ts alone (it imports nothing), load it as a CommonJS module, print what the
# test asks for: the tables, and timeWords / plural for the cases given on stdin.
_RUNNER = r"""
const fs = require('fs');
const ts = require(process.env.JOBDESK_LAB + '/node_modules/typescript');
const source = fs.readFileSync(process.env.JOBDESK_LAB + '/src/format.ts', 'utf8');
const js = ts.transpileModule(source, {compilerOptions: {module: ts.ModuleKind.CommonJS,
                                                        target: ts.ScriptTarget.ES2022}});
const module = {exports: {}};
new Function('exports', 'module', js.outputText)(module.exports, module);
const f = module.exports;
const cases = JSON.parse(fs.readFileSync(0, 'utf8'));
console.log(JSON.stringify({
  family: f.PHASE_FAMILY, terminal: [...f.TERMINAL], active: f.ACTIVE, filters: f.PHASE_FILTERS,
  unknownFamily: f.phaseFamily('SOMETHING_NEW'),
  times: cases.times.map(job => f.timeWords(job, cases.now)),
  plurals: [f.plural(1, 'result'), f.plural(1200, 'result')],
}));
"""


def _sidebar(times: list[dict]) -> dict:
    node = shutil.which("node")
    if node is None or not (LAB / "node_modules" / "typescript").is_dir():
        pytest.skip("needs node and labextension/node_modules (cd labextension && npm install)")
    done = subprocess.run([node, "-e", _RUNNER], capture_output=True, text=True, timeout=60,
                          input=json.dumps({"now": NOW, "times": times}),
                          env={**os.environ, "JOBDESK_LAB": str(LAB)})
    assert done.returncode == 0, done.stderr
    return json.loads(done.stdout)


# Every phase jobdesk can record: UWS 1.1 §2.1.3 lists PENDING, QUEUED, EXECUTING, COMPLETED,
# ERROR, ABORTED, UNKNOWN, HELD, SUSPENDED, ARCHIVED; ours are UNSENT, SUBMITTED, LOST, and
# UNREACHED (the service was never reached, no job created), covered before it lands.
UWS_11 = {"PENDING", "QUEUED", "EXECUTING", "COMPLETED", "ERROR", "ABORTED", "UNKNOWN", "HELD",
          "SUSPENDED", "ARCHIVED"}
OURS = {"UNSENT", "SUBMITTED", "LOST", "UNREACHED"}


def test_every_phase_is_in_exactly_one_filter_family():
    table = _sidebar([])
    assert set(phases.UWS_PHASES) == UWS_11
    assert set(table["family"]) == UWS_11 | OURS
    families = [set(value.split(",")) for label, value in table["filters"]
                if label not in ("All phases", "Active")]
    for phase in UWS_11 | OURS:
        holders = [f for f in families if phase in f]
        assert len(holders) == 1, f"{phase} is under {len(holders)} filters"
    assert {"ARCHIVED", "UNKNOWN", "SUSPENDED", "UNREACHED"} <= set().union(*families)
    assert table["unknownFamily"] == "waiting"


def test_terminal_and_active_agree_with_the_library_and_uws():
    table = _sidebar([])
    # UWS 1.1 §2.1.3: COMPLETED, ERROR, ABORTED, ARCHIVED end a job for a client.
    assert {"COMPLETED", "ERROR", "ABORTED", "ARCHIVED"} <= set(table["terminal"])
    assert set(table["terminal"]) == set(phases.TERMINAL) | {"UNREACHED"}
    assert set(table["active"]) == set(phases.ACTIVE)
    assert table["family"]["UNREACHED"] == table["family"]["ERROR"] == "failed"
    assert table["family"]["ABORTED"] != "failed"   # an abort is not shown as an error


def test_queued_is_said_only_of_queued_jobs():
    created = NOW - 90
    jobs = [{"phase": p, "created": created, "submitted": created + 30}
            for p in ("QUEUED", "PENDING", "UNSENT", "SUBMITTED", "HELD", "SUSPENDED", "UNKNOWN")]
    jobs += [{"phase": "EXECUTING", "created": created, "submitted": created + 30,
              "started": created + 60},
             {"phase": "ERROR", "created": created, "finished": created + 5},
             {"phase": "COMPLETED", "created": created, "started": created + 1,
              "finished": created + 3}]
    words = _sidebar(jobs)["times"]
    assert words == ["queued 1 min 00 s", "pending 1 min 00 s", "not sent yet, 1 min 30 s",
                     "sent 1 min 00 s ago", "held 1 min 00 s", "suspended 1 min 00 s",
                     "phase unknown, 1 min 00 s", "running 30 s", "ended after 5 s", "ran 2 s"]
    assert [w for w in words if w.startswith("queued")] == ["queued 1 min 00 s"]


def test_counts_read_naturally():
    assert _sidebar([])["plurals"] == ["1 result", "1,200 results"]

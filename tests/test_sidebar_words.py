"""The sidebar's phase table and its words (labextension/src/format.ts), run by vitest in node
(labextension/test/format.test.ts) with the Python library's phase sets handed over, so the
TypeScript and Python sides are checked against each other and against UWS 1.1 §2.1.3.

Skipped, saying why, without node or the lab extension's npm packages.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
from pathlib import Path

import pytest

from jobdesk import phases

LABEXT = Path(__file__).resolve().parents[1] / "labextension"
VITEST = LABEXT / "node_modules" / ".bin" / "vitest"


def test_phase_table_and_words():
    if shutil.which("node") is None:
        pytest.skip("needs Node.js to run the TypeScript tests")
    if not VITEST.exists():
        pytest.skip("needs the lab extension's npm packages (cd labextension && npm install)")
    library = {"uws": list(phases.UWS_PHASES), "terminal": sorted(phases.TERMINAL),
               "active": sorted(phases.ACTIVE),
               "ours": [p for p in ("UNSENT", "SUBMITTED", "LOST", "UNREACHED")
                        if hasattr(phases, p)]}
    run = subprocess.run([str(VITEST), "run", "--reporter=verbose", "test/format.test.ts"],
                         cwd=LABEXT, capture_output=True, text=True, timeout=240,
                         env=dict(os.environ, JOBDESK_TEST_PHASES=json.dumps(library)))
    output = run.stdout + run.stderr
    assert run.returncode == 0, output[-6000:]
    # Every test ran, the comparison with the library included.
    source = (LABEXT / "test" / "format.test.ts").read_text()
    tests = len(re.findall(r"^\s*it(?:\.skipIf\([^)]*\))?\(", source, re.M))
    assert "skipped" not in output and f"{tests} passed" in output, output[-3000:]

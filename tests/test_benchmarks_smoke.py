"""The benchmarks still run: ``python -m benchmarks --quick --json`` in a subprocess.

Only the shape of the report is checked (every case present, every figure a number); no
wall-clock time is asserted anywhere, since the machines are shared and noisy.
"""

import json
import math
import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
CASES = ("case1", "case2", "case3", "case4", "case5", "case6", "case7", "case8",
         "case9", "case10", "case11")


@pytest.mark.timeout(600)
def test_quick_run_reports_every_case_with_numbers(tmp_path):
    out = tmp_path / "bench.json"
    env = dict(os.environ, JOBDESK_BENCH_CACHE=str(tmp_path / "cache"))
    done = subprocess.run([sys.executable, "-m", "benchmarks", "--quick", "--json", str(out)],
                          cwd=ROOT, env=env, capture_output=True, text=True, timeout=580)
    assert done.returncode == 0, done.stderr[-4000:]
    report = json.loads(out.read_text())
    assert report["quick"] is True
    assert report["machine"]["cores"] >= 1
    assert set(report["cases"]) == set(CASES)
    for name in CASES:
        case = report["cases"][name]
        assert "error" not in case, case.get("error")
        assert case["rows"], f"{name} reported no figures"
        for row in case["rows"]:
            assert row["case"] == name
            assert isinstance(row["figure"], (int, float)) and math.isfinite(row["figure"]), row
            assert row["figure"] >= 0, row
            if row["baseline"] is not None:
                assert isinstance(row["baseline"], (int, float)) and row["baseline"] > 0, row
                assert isinstance(row["ratio"], (int, float)) and row["ratio"] > 0, row
            if row["target"] is not None:
                assert isinstance(row["met"], bool), row
    # the printed table names every case too
    for name in CASES:
        assert name in done.stdout


def test_ratios_read_the_right_way_round_and_cases_have_names():
    from benchmarks.common import CASE_NAMES, Row, ratio_words, table
    # 1.02 s against a loop's 28.8 ms is "35x later", never "0.0282x sooner".
    assert ratio_words(0.0288 / 1.02, "sooner") == "35.4x later"
    assert ratio_words(7.44, "sooner") == "7.44x sooner"
    assert ratio_words(0.5, "fewer") == "2x more"
    assert ratio_words(1 / 15.7, "less memory") == "15.7x more memory"
    assert ratio_words(0.679, "curl's throughput") == "0.679x curl's throughput"   # a share
    assert set(CASE_NAMES) == set(CASES) and len(set(CASE_NAMES.values())) == len(CASES)
    printed = table([Row("case4", "latency", 1.02, "s", "loop", 0.0288, 0.0288 / 1.02, "sooner")])
    assert "case4 completion" in printed and "35.4x later" in printed and "sooner" not in printed

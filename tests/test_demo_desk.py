"""`jobdesk demo` works in a throwaway desk unless given one, says where, and run twice in the
same desk replaces its earlier records instead of adding four new ones each time."""

from __future__ import annotations

import os
import subprocess
import sys

import pytest

from jobdesk import Desk


def demo(*args, env):
    return subprocess.run([sys.executable, "-m", "jobdesk.cli", *args, "demo", "--rows", "2000"],
                          capture_output=True, text=True, timeout=600, env=env)


@pytest.mark.slow
def test_demo_desk_is_throwaway_or_replaced(tmp_path):
    home = tmp_path / "home-desk"
    env = dict(os.environ, JOBDESK_HOME=str(home))
    first = demo(env=env)
    assert first.returncode == 0, first.stderr[-2000:]
    assert "a throwaway desk for this demo" in first.stdout
    assert not home.exists() or Desk(home).count() == 0, "the demo wrote into the user's desk"

    mine = tmp_path / "mine"
    counts = []
    for _ in range(2):
        run = demo("--root", str(mine), env=env)
        assert run.returncode == 0, run.stderr[-2000:]
        assert f"desk:    {mine}" in run.stdout
        counts.append(Desk(mine).count())
    assert counts[0] >= 4 and counts[1] == counts[0], counts  # replaced, not added to

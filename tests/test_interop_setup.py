"""tests/interop/setup.sh never takes over a DaCHS it did not install.

Its ownership check reads two files whose paths the environment can move (the marker it writes
when it installs, and the DaCHS configuration it writes); here they point at temporary files, so
the machine's own installation is only read, never touched. The full script is run only once
``--check`` has said "foreign", i.e. when it must stop before changing anything.
"""

from __future__ import annotations

import os
import subprocess
from pathlib import Path

import pytest

SETUP = Path(__file__).resolve().parent / "interop" / "setup.sh"
HEADER = "# written by jobdesk tests/interop/setup.sh"


def run(tmp_path, *args, rc_text=None, marker=False):
    rc = tmp_path / "gavo.rc"
    if rc_text is not None:
        rc.write_text(rc_text)
    mark = tmp_path / "marker"
    if marker:
        mark.write_text("installed by jobdesk tests/interop/setup.sh\n")
    env = dict(os.environ, JOBDESK_INTEROP_GAVO_RC=str(rc), JOBDESK_INTEROP_MARKER=str(mark),
               JOBDESK_INTEROP_STATE=str(tmp_path / "state"))
    return subprocess.run(["bash", str(SETUP), *args], capture_output=True, text=True, env=env,
                          timeout=60)


def test_an_installation_with_our_marker_is_ours(tmp_path):
    assert run(tmp_path, "--check", rc_text="[web]\n", marker=True).stdout.strip() == "ours"


def test_a_configuration_this_script_wrote_is_ours(tmp_path):
    assert run(tmp_path, "--check", rc_text=HEADER + "\n[web]\n").stdout.strip() == "ours"


def test_someone_elses_installation_is_left_untouched_and_skipped(tmp_path):
    theirs = "[web]\nserverPort: 8080\n"
    assert run(tmp_path, "--check", rc_text=theirs).stdout.strip() == "foreign"
    done = run(tmp_path, rc_text=theirs)
    assert done.returncode == 3, done.stderr
    assert "SKIPPED" in done.stderr and "left untouched" in done.stderr
    assert (tmp_path / "gavo.rc").read_text() == theirs          # configuration unchanged
    assert not (tmp_path / "marker").exists() and not (tmp_path / "state").exists()


def test_scripts_test_skips_interop_on_status_3():
    text = (SETUP.parents[2] / "scripts" / "test").read_text()
    assert "status == 3" in text and "JOBDESK_INTEROP_SKIP=" in text
    conftest = (SETUP.parent / "conftest.py").read_text()
    assert 'os.environ.get("JOBDESK_INTEROP_SKIP")' in conftest

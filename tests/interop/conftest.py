"""Shared set-up of the interop tests: the independent TAP server (DaCHS) that setup.sh started.

Every test here carries the ``interop`` marker. Without a reachable server they are skipped with
the reason; with ``JOBDESK_INTEROP_REQUIRED=1`` (CI) an unreachable server is a failure instead,
so a broken set-up can never pass as "all skipped".
"""

from __future__ import annotations

import os
import shutil
import time
import uuid
from pathlib import Path

import pytest
import requests

from interop_support import REQUIRED, TAP_URL, dachs_cmd, server_available

HERE = Path(__file__).resolve().parent

_availability: dict[str, str | None] = {}


def pytest_collection_modifyitems(config, items):
    for item in items:
        if HERE in Path(str(item.fspath)).resolve().parents:
            item.add_marker(pytest.mark.interop)


@pytest.fixture(autouse=True)
def _need_dachs():
    """Skip (or, when required, fail) every interop test if the server is not there."""
    if os.environ.get("JOBDESK_INTEROP_SKIP"):
        pytest.skip(os.environ["JOBDESK_INTEROP_SKIP"])  # setup.sh found another's DaCHS
    if "reason" not in _availability:
        _availability["reason"] = server_available()
    reason = _availability["reason"]
    if reason is not None:
        message = (f"independent TAP server not reachable at {TAP_URL} ({reason}); "
                   f"start it with: bash tests/interop/setup.sh")
        if REQUIRED:
            pytest.fail(message + " [JOBDESK_INTEROP_REQUIRED=1]", pytrace=False)
        pytest.skip(message)


@pytest.fixture(scope="session")
def tap_url() -> str:
    return TAP_URL


@pytest.fixture
def marker() -> str:
    """A unique string literal to put in a query: it tells our jobs apart from everyone else's
    (anonymous jobs are visible to every client in DaCHS's job list)."""
    return f"jd-{uuid.uuid4().hex[:12]}"


@pytest.fixture
def http():
    with requests.Session() as session:
        yield session


def setup_ownership() -> str:
    """What ``setup.sh --check`` says of the DaCHS here: ours, foreign or absent (reads only)."""
    import subprocess
    done = subprocess.run(["bash", str(HERE / "setup.sh"), "--check"], capture_output=True,
                          text=True, timeout=60)
    return done.stdout.strip().splitlines()[-1] if done.stdout.strip() else "unknown"


@pytest.fixture
def dachs_control():
    """Stop and restart the server from inside a test (needs the dachs command and root, as in
    CI). The server is always running again when the test ends, whatever happened."""
    if shutil.which("dachs") is None or os.geteuid() != 0:
        pytest.skip("stopping the server needs the dachs command and root")
    if setup_ownership() != "ours":
        pytest.skip("the DaCHS here was not installed by tests/interop/setup.sh: it is not "
                    "ours to stop")

    class Control:
        def stop(self):
            dachs_cmd("serve", "stop")
            for _ in range(100):
                if server_available(timeout=1) is not None:
                    return
                time.sleep(0.1)
            raise RuntimeError("DaCHS still answers after 'dachs serve stop'")

        def start(self):
            if server_available(timeout=1) is None:
                return
            done = dachs_cmd("serve", "start")
            for _ in range(120):
                if server_available(timeout=1) is None:
                    return
                time.sleep(0.5)
            raise RuntimeError(f"DaCHS did not come back: {done.stdout} {done.stderr}")

    control = Control()
    try:
        yield control
    finally:
        control.start()

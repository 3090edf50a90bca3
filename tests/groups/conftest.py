"""Fixtures for the group-cache tests: the embedded TAP service, and a group cache place on a
local directory or on a real S3-speaking server (moto in server mode, on loopback)."""

from __future__ import annotations

import importlib.util

import pytest

from group_support import MotoServer, Place
from jobdesk.localtap import serve

ROWS = 2000


@pytest.fixture(scope="module")
def tap(tmp_path_factory):
    with serve(state=tmp_path_factory.mktemp("tap"), rows=ROWS) as service:
        yield service


@pytest.fixture(scope="session")
def moto_server():
    if importlib.util.find_spec("moto") is None or importlib.util.find_spec("s3fs") is None:
        pytest.skip("the S3 tests need moto[server] and s3fs (pip install -e '.[test]')")
    server = MotoServer()   # installed but failing to start is a failure, not a skip
    yield server
    server.stop()


@pytest.fixture(params=["posix", "s3"])
def place(request, tmp_path) -> Place:
    """A fresh, empty group cache: a directory, or a bucket prefix on the S3 server."""
    if request.param == "posix":
        return Place(str(tmp_path / "group"), kind="posix")
    server = request.getfixturevalue("moto_server")
    return Place(server.new_bucket(), server.options(), kind="s3")

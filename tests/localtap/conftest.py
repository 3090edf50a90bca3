"""Fixtures for the embedded service's HTTP tests: a real server on a free loopback port."""

from __future__ import annotations

from pathlib import Path

import pytest
import requests

from jobdesk.localtap import serve


def make_engine(state_dir: Path, rows: int = 2000):
    """The real query engine over a small invented catalogue (built once per state directory)."""
    from jobdesk.localtap.engine import Engine
    return Engine(state_dir, rows=rows)


# --- fixtures ---------------------------------------------------------------------------------


@pytest.fixture(scope="session")
def shared_tap(tmp_path_factory):
    """One service for tests that do not change faults or depend on counters."""
    state = tmp_path_factory.mktemp("localtap-shared")
    with serve(state=state, engine=make_engine(state)) as tap:
        yield tap


@pytest.fixture
def tap_factory(tmp_path):
    """Start a private service with given faults; stopped at the end of the test."""
    import contextlib
    stack = contextlib.ExitStack()

    def start(state: Path | None = None, *, sweep_interval: float = 1.0, **faults):
        state = Path(state or tmp_path / "state")
        return stack.enter_context(serve(state=state, engine=make_engine(state),
                                         sweep_interval=sweep_interval, **faults))

    with stack:
        yield start


@pytest.fixture
def http():
    with requests.Session() as session:
        yield session

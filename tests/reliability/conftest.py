"""Fixtures of the reliability suite: the figures recorder and the embedded service."""

from __future__ import annotations

import pytest

from reliability_support import Figures


@pytest.fixture(scope="session")
def figures():
    return Figures()

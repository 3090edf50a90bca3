"""Fixtures of the reliability suite: the figures recorder and the embedded service."""

from __future__ import annotations

import subprocess

import pytest

from reliability_support import Figures


@pytest.fixture(scope="session")
def figures():
    return Figures()


@pytest.fixture
def small_disk(tmp_path):
    """A real 3 MiB tmpfs (needs root; skipped with the reason otherwise)."""
    mount = tmp_path / "disk"
    mount.mkdir()
    done = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=3m", "tmpfs", str(mount)],
                          capture_output=True, text=True)
    if done.returncode != 0:
        pytest.skip(f"cannot mount a tmpfs here: {done.stderr.strip()}")
    try:
        yield mount
    finally:
        subprocess.run(["umount", "-l", str(mount)], check=False)

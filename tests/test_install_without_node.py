"""A source install on a machine without Node.js still gives the library and the command line.

Built for real: a copy of the checkout (without a sidebar bundle) is built as an editable wheel by
hatchling and hatch-jupyter-builder with a PATH that holds no node or npm, the wheel is installed
into a fresh virtual environment, and the ``jobdesk`` command runs there. The build tools come
from ``JOBDESK_BUILD_PYTHON`` (a Python with hatchling, hatch-jupyter-builder and editables), else
this Python; without them the test skips, saying so.
"""

from __future__ import annotations

import os
import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
BUILD_PYTHON = os.environ.get("JOBDESK_BUILD_PYTHON", sys.executable)


def _has_build_tools() -> bool:
    done = subprocess.run([BUILD_PYTHON, "-c", "import hatchling, hatch_jupyter_builder, editables"],
                          capture_output=True)
    return done.returncode == 0


@pytest.mark.slow
def test_editable_build_without_node_installs_library_and_cli(tmp_path):
    if not _has_build_tools():
        pytest.skip(f"{BUILD_PYTHON} lacks hatchling, hatch-jupyter-builder or editables "
                    "(set JOBDESK_BUILD_PYTHON to a Python that has them)")
    copy = tmp_path / "src"
    files = subprocess.run(["git", "ls-files", "-z"], cwd=ROOT, capture_output=True,
                           check=True).stdout.split(b"\0")
    for name in filter(None, files):
        source = ROOT / name.decode()
        if source.is_file() and not name.startswith(b"jobdesk/labextension/"):
            target = copy / name.decode()
            target.parent.mkdir(parents=True, exist_ok=True)
            target.write_bytes(source.read_bytes())
    bare = tmp_path / "bin"  # a PATH with no node and no npm
    bare.mkdir()
    (bare / "python").symlink_to(BUILD_PYTHON)
    env = {"PATH": str(bare), "HOME": str(tmp_path)}
    build = subprocess.run(
        [BUILD_PYTHON, "-W", "always", "-c",
         "from hatchling.build import build_editable; print(build_editable('dist'))"],
        cwd=copy, env=env, capture_output=True, text=True, timeout=600)
    assert build.returncode == 0, build.stderr[-2000:]
    assert "npm" in build.stderr  # the warning says what was missing
    wheel = copy / "dist" / build.stdout.strip().splitlines()[-1]
    with zipfile.ZipFile(wheel) as z:
        entry = next(n for n in z.namelist() if n.endswith("entry_points.txt"))
        assert "jobdesk = jobdesk.cli:main" in z.read(entry).decode()

    venv = tmp_path / "venv"
    subprocess.run([sys.executable, "-m", "venv", "--system-site-packages", str(venv)],
                   check=True, timeout=300)
    subprocess.run([str(venv / "bin" / "python"), "-m", "pip", "install", "-q", "--no-deps",
                    "--no-index", str(wheel)], check=True, timeout=300,
                   env=dict(os.environ, PIP_DISABLE_PIP_VERSION_CHECK="1"))
    run = subprocess.run([str(venv / "bin" / "jobdesk"), "--root", str(tmp_path / "desk"), "list"],
                         env={"PATH": str(bare), "HOME": str(tmp_path)}, cwd=tmp_path,
                         capture_output=True, text=True, timeout=120)
    assert run.returncode == 0, run.stderr
    assert "no jobs recorded" in run.stdout
    where = subprocess.run([str(venv / "bin" / "python"), "-c",
                            "import jobdesk; print(jobdesk.__file__)"],
                           env={"PATH": str(bare)}, cwd=tmp_path, capture_output=True,
                           text=True)
    assert where.stdout.strip().startswith(str(copy))  # the copy is what got installed

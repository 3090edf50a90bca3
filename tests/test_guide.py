"""docs/guide.md runs as written: its Python blocks, in order, as one session, against the
embedded TAP service, each printing something (an example that shows nothing teaches nothing)."""

from __future__ import annotations

import contextlib
import io
import re
import warnings
from pathlib import Path

import pytest

from jobdesk.localtap import serve

GUIDE = Path(__file__).resolve().parents[1] / "docs" / "guide.md"


def python_blocks(text: str) -> list[str]:
    return re.findall(r"```python\n(.*?)```", text, flags=re.S)


def test_guide_examples_run_and_show_something(tmp_path, monkeypatch):
    blocks = python_blocks(GUIDE.read_text(encoding="utf-8"))
    assert len(blocks) >= 7
    monkeypatch.setenv("JOBDESK_HOME", str(tmp_path / "desk"))
    monkeypatch.chdir(tmp_path)
    with serve(state=tmp_path / "tap", rows=20000, exec_delay=0.2) as tap:
        session = {"TAP": tap.url, "__name__": "guide"}
        shown_all = []
        for i, block in enumerate(blocks, 1):
            out = io.StringIO()
            with contextlib.redirect_stdout(out), warnings.catch_warnings():
                warnings.simplefilter("ignore")
                # progress=False is not in the guide: in a pipe the progress goes to stderr
                exec(compile(block, f"guide block {i}", "exec"), session)  # noqa: S102
            shown = out.getvalue()
            shown_all.append(shown)
            assert shown.strip(), f"guide block {i} runs but shows nothing:\n{block}"
            if "TAP_UPLOAD" in block:
                assert len(session["job"].table()) >= 3, "the upload example finds no rows"
    assert (tmp_path / "matches.fits").exists() and (tmp_path / "matches.fits.prov.json").exists()
    said = "\n".join(shown_all)
    assert "True COMPLETED" in said  # the cache answered with the same record
    assert "500 rows, knowingly" in said

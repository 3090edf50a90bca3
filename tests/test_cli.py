"""The ``jobdesk`` command, every command: real HTTP to the embedded TAP service, real SQLite
files, ``jobdesk.cli.main`` in this process (and the installed ``jobdesk`` entry point in a
real subprocess). Bad ids and bad arguments end with a clear message and status 1 or 2, never
a traceback.

Outside references: W3C PROV-JSON (the ``provenance`` command's document), argparse's own
status 2 for bad arguments (Python's documentation), UWS 1.1 §2.1.3 phase names.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from jobdesk import Desk, QueryRejected
from jobdesk import cli as cli_module
from jobdesk.cli import main
from jobdesk.localtap import serve

ROWS = 2000
REPO = Path(__file__).resolve().parents[1]
CONE = ("SELECT orrery_id, ra, dec, mag_lime FROM orrery.sources "
        "WHERE 1 = CONTAINS(POINT('ICRS', ra, dec), CIRCLE('ICRS', 150.0, 20.0, 25.0)) "
        "ORDER BY orrery_id")
BRIGHT = "SELECT orrery_id, mag_lime FROM orrery.sources WHERE mag_lime < 15 ORDER BY orrery_id"
BAD = "SELECT no_such_column FROM orrery.sources"   # the service answers ERROR

RUN: set[str] = set()   # the commands this file ran, checked against the parser at the end


@pytest.fixture(scope="module")
def tap(tmp_path_factory):
    with serve(state=tmp_path_factory.mktemp("tap"), rows=ROWS, exec_delay=0.1) as service:
        yield service


@pytest.fixture(scope="module")
def made(tap, tmp_path_factory):
    """One desk with a finished job, a truncated one and a failed one."""
    root = tmp_path_factory.mktemp("made") / "desk"
    desk = Desk(root, wait_window=5)
    done = desk.submit(tap.url, CONE, label="cone").wait(progress=False)
    with pytest.warns(Warning):
        capped = desk.submit(tap.url, BRIGHT, maxrec=3, label="capped").wait(progress=False)
    failed = desk.submit(tap.url, BAD, check=False, label="bad")
    with pytest.raises(QueryRejected):
        failed.wait(progress=False)
    return {"root": root, "done": done.id, "capped": capped.id, "failed": failed.id}


def run(capsys, root, *argv) -> tuple[int, str, str]:
    """``jobdesk --root ROOT ARGV...`` in this process: (status, stdout, stderr)."""
    capsys.readouterr()
    args = (["--root", str(root)] if root is not None else []) + [str(a) for a in argv]
    words = [a for a in argv if not str(a).startswith("-")]
    if words:
        RUN.add(" ".join(words[:2]) if words[0] == "group" else words[0])
    code = main(args)
    out, err = capsys.readouterr()
    assert "Traceback" not in err and "Traceback" not in out
    return code, out, err


def _refused(code, err, status, *words):
    assert code == status, err
    assert err.startswith(("jobdesk: ", "usage: ")), err
    for word in words:
        assert word in err, err


# --- help and the generated reference ---------------------------------------------------------


def test_help_says_what_the_tool_does(capsys):
    code, out, _ = run(capsys, None, "--help")
    assert code == 0
    first = out.split("\n\n")[1]   # the paragraph after the usage line
    assert first.startswith("Send ADQL queries to TAP services"), first
    for word in ("Desk", "skin", "subcommand", "method"):
        assert word not in first, first


def test_docs_cli_md_is_what_the_parser_generates():
    page = (REPO / "docs" / "cli.md").read_text(encoding="utf-8")
    assert page == cli_module.reference(), \
        "docs/cli.md is stale: python -m jobdesk.cli --reference > docs/cli.md"
    for command in _commands():
        assert f"`jobdesk {command}`" in page, command
    assert "docs/cli.md" in (REPO / "README.md").read_text(encoding="utf-8")


def test_the_installed_entry_point_runs_in_a_subprocess(made):
    exe = shutil.which("jobdesk")
    assert exe, "the `jobdesk` entry point is not installed (pip install -e .)"
    env = {**os.environ, "PYTHONPATH": str(REPO)}   # this tree's jobdesk, not another one's
    done = subprocess.run([exe, "--root", str(made["root"]), "show", made["done"][:6], "--json"],
                          capture_output=True, text=True, timeout=120, env=env)
    assert done.returncode == 0, done.stderr
    assert json.loads(done.stdout)["id"] == made["done"]
    bad = subprocess.run([exe, "--root", str(made["root"]), "list", "--phase", "finished"],
                         capture_output=True, text=True, timeout=120, env=env)
    # argparse refuses a bad argument with status 2 (Python's argparse documentation)
    assert bad.returncode == 2 and "unknown phase 'finished'" in bad.stderr
    assert "Traceback" not in bad.stderr


# --- list ---------------------------------------------------------------------------------------


def test_list_phases_in_any_case_unknown_phase_refused_and_a_service_column(made, tap, capsys):
    root = made["root"]
    code, out, _ = run(capsys, root, "list", "--phase", "completed")
    assert code == 0 and made["done"] in out and made["failed"] not in out
    code, out, _ = run(capsys, root, "list", "--phase", "Error", "--json")
    assert code == 0 and [r["id"] for r in json.loads(out)] == [made["failed"]]
    code, _, err = run(capsys, root, "list", "--phase", "done")
    _refused(code, err, 2, "unknown phase 'done'", "COMPLETED", "EXECUTING", "UNREACHED")
    code, out, _ = run(capsys, root, "list")
    short = tap.url.split("://", 1)[1]      # host:port/path of the service
    assert "service" in out.splitlines()[0]
    for job_id in (made["done"], made["capped"], made["failed"]):
        line = next(ln for ln in out.splitlines() if ln.startswith(job_id))
        assert short[:27] in line
    code, _, err = run(capsys, root, "list", "--limit", "many")
    _refused(code, err, 2, "invalid int value")


# --- one job: show, account, provenance, export, wait ------------------------------------------


def test_show_says_yes_or_no_for_truncated_and_takes_a_short_id(made, capsys):
    root = made["root"]
    code, out, _ = run(capsys, root, "show", made["capped"][:5])
    assert code == 0 and "truncated: yes" in out and "truncated: 1" not in out
    code, out, _ = run(capsys, root, "show", made["done"][:7])
    assert code == 0 and "truncated: no" in out and made["done"] in out
    code, out, _ = run(capsys, root, "show", made["done"][:7], "--json")
    assert json.loads(out)["id"] == made["done"]


def test_unknown_and_ambiguous_ids_have_one_status_everywhere(made, capsys, tmp_path):
    root = made["root"]
    statuses = set()
    for command in (["show"], ["forget"], ["abort"], ["resend"], ["account"], ["provenance"],
                    ["pin"], ["publish"], ["wait"], ["export", "NOID", str(tmp_path / "x.csv")]):
        argv = command + ["nojob"] if command[0] != "export" else ["export", "nojob",
                                                                    command[2]]
        code, _, err = run(capsys, root, *argv)
        _refused(code, err, code, "no job 'nojob'", "what to do:")
        statuses.add(code)
    assert statuses == {1}   # JobNotFound's status, for every command that takes an id

    # Two records whose ids share a prefix, written through the index like any other record.
    desk = Desk(root)
    for job_id in ("abcd0000aaaaaaaa", "abcd1111bbbbbbbb"):
        desk.index.claim(f"{job_id:0<64}", {"id": job_id, "service": "http://x.invalid/tap",
                                            "adql": "SELECT 1", "phase": "UNSENT"},
                         reuse=lambda r: False)
    code, _, err = run(capsys, root, "show", "abcd")
    _refused(code, err, 1, "abcd0000aaaaaaaa", "abcd1111bbbbbbbb", "more characters")
    code, out, _ = run(capsys, root, "forget", "abcd1", "--json")
    assert code == 0 and json.loads(out) == {"id": "abcd1111bbbbbbbb", "forgotten": True}
    code, out, _ = run(capsys, root, "forget", "abcd0")
    assert code == 0 and out.strip() == "forgot abcd0000aaaaaaaa"
    code, _, err = run(capsys, root, "forget", "abcd0")
    _refused(code, err, 1, "no job 'abcd0'")


def test_account_of_a_failed_job_says_there_is_no_result(made, capsys):
    root = made["root"]
    code, out, _ = run(capsys, root, "account", made["failed"])
    assert code == 0
    assert "None rows" not in out and "SHA-256 None" not in out
    assert "There is no result: the job ended ERROR" in out
    assert "Data were selected" not in out and "SELECT no_such_column" in out
    code, out, _ = run(capsys, root, "account", made["done"], "--json")
    told = json.loads(out)
    assert told["id"] == made["done"] and "rows; the result file has SHA-256" in told["account"]


def test_provenance_prints_prov_json(made, capsys):
    root = made["root"]
    code, out, _ = run(capsys, root, "provenance", made["done"][:8])
    assert code == 0
    document = json.loads(out)
    # W3C PROV-JSON (Member Submission, 2013) §2: a document maps "prefix", "entity",
    # "activity" and relation names ("used", "wasGeneratedBy", ...) to objects keyed by id.
    assert {"prefix", "entity", "activity", "wasGeneratedBy"} <= set(document)
    assert all(isinstance(document[k], dict) for k in ("entity", "activity", "wasGeneratedBy"))
    code, out, _ = run(capsys, root, "provenance", made["done"], "--jobdesk", "--json")
    assert code == 0
    code2, shown, _ = run(capsys, root, "show", made["done"], "--provenance")
    own = json.loads(out)
    assert own["key"] == json.loads(shown)["key"] and own["adql"] == CONE


def test_export_refuses_clearly_and_makes_missing_directories(made, capsys, tmp_path):
    root, job_id = made["root"], made["done"]
    code, _, err = run(capsys, root, "export", job_id, tmp_path / "result.xlsx")
    _refused(code, err, 2, "cannot tell the format of result.xlsx", ".parquet")
    target = tmp_path / "not" / "yet" / "there" / "result.parquet"
    code, out, _ = run(capsys, root, "export", job_id[:6], target, "--json")
    assert code == 0 and target.exists()
    assert json.loads(out)["written"] == [str(target), str(target) + ".prov.json"]
    code, _, err = run(capsys, root, "export", job_id, target)
    _refused(code, err, 2, "already exists", "--overwrite")
    code, out, _ = run(capsys, root, "export", job_id, tmp_path / "t.dat", "--format", "csv")
    assert code == 0 and (tmp_path / "t.dat").read_text().startswith("orrery_id,ra,dec")
    code, _, err = run(capsys, root, "export", made["capped"], tmp_path / "c.parquet")
    _refused(code, err, 2, "truncated")
    code, _, err = run(capsys, root, "export", made["failed"], tmp_path / "f.parquet")
    assert code in (1, 2) and err.startswith("jobdesk: ")


def test_wait_on_a_finished_job_prints_one_line(made, capsys):
    root, job_id = made["root"], made["done"]
    code, out, err = run(capsys, root, "wait", job_id[:6])
    assert code == 0
    assert (out + err).count(job_id) == 1, out + err
    code, out, _ = run(capsys, root, "wait", job_id, "--json")
    assert code == 0 and [r["id"] for r in json.loads(out)] == [job_id]
    code, _, err = run(capsys, root, "wait", made["failed"])
    assert code == 1 and "no_such_column" in err
    code, _, err = run(capsys, root, "wait", job_id, "--timeout", "soon")
    _refused(code, err, 2, "invalid float value")


# --- submitting and the job's life: submit, abort, resend, forget --------------------------------


def test_submit_abort_resend_forget(tap, capsys, tmp_path):
    root = tmp_path / "d"
    code, out, _ = run(capsys, root, "submit", tap.url, CONE, "--wait", "--json")
    first = json.loads(out)
    assert code == 0 and first["phase"] == "COMPLETED"
    code, out, _ = run(capsys, root, "submit", tap.url, CONE)   # the same query: the same job
    assert code == 0 and out.startswith(first["id"])
    assert run(capsys, root, "tables", tap.url)[0] == 0   # metadata cached: the check has it
    code, _, err = run(capsys, root, "submit", tap.url, "SELECT nope FROM orrery.nothing")
    _refused(code, err, 2, "orrery.nothing", "not sent")  # the local check, before sending
    code, _, err = run(capsys, root, "submit", tap.url, "   ")
    _refused(code, err, 2, "empty")
    code, _, err = run(capsys, root, "submit", tap.url)
    _refused(code, err, 2, "adql")                  # argparse names the missing argument

    tap.configure(exec_delay=30)
    try:
        code, out, _ = run(capsys, root, "submit", tap.url, BRIGHT, "--json")
        slow = json.loads(out)["id"]
        code, out, _ = run(capsys, root, "abort", slow[:6], "--json")
        assert code == 0 and json.loads(out)["phase"] == "ABORTED"
    finally:
        tap.configure(exec_delay=0.1)
    code, out, _ = run(capsys, root, "resend", slow, "--json")
    again = json.loads(out)
    assert code == 0 and again["id"] != slow and again["adql"] == BRIGHT
    code, out, _ = run(capsys, root, "forget", slow)
    assert code == 0 and out.strip() == f"forgot {slow}"


# --- the cache: cache, pin, prune, publish, group ... ----------------------------------------


def test_pin_keeps_a_record_through_prune(tap, capsys, tmp_path):
    root = tmp_path / "d"
    desk = Desk(root, wait_window=5)
    keep = desk.submit(tap.url, CONE).wait(progress=False)
    drop = desk.submit(tap.url, BRIGHT).wait(progress=False)
    code, out, _ = run(capsys, root, "pin", keep.id[:6], "--json")
    assert code == 0 and json.loads(out) == {"id": keep.id, "pinned": True}
    code, out, _ = run(capsys, root, "prune", "--older-than-days", "0", "--dry-run", "--json")
    planned = json.loads(out)
    assert code == 0 and planned["dropped"] == [drop.id] and planned["dry_run"] is True
    assert desk.index.get(drop.id) is not None, "a dry run drops nothing"
    code, out, _ = run(capsys, root, "prune", "--older-than-days", "0")
    assert code == 0 and f"dropped record {drop.id}" in out and "1 pinned kept" in out
    assert desk.index.get(drop.id) is None and desk.index.get(keep.id) is not None
    code, out, _ = run(capsys, root, "pin", keep.id, "--unpin")
    assert code == 0 and out.startswith(f"unpinned {keep.id}")
    code, _, err = run(capsys, root, "prune", "--max-bytes", "lots")
    _refused(code, err, 2, "invalid int value")
    code, out, _ = run(capsys, root, "cache", "--json")
    assert code == 0 and json.loads(out)["layers"][0]["name"] == "personal"
    code, out, _ = run(capsys, root, "cache")
    assert code == 0 and out.startswith("personal")


def test_publish_and_group_commands_go_through_the_desk(tap, capsys, tmp_path):
    group_dir = tmp_path / "shared"
    code, out, _ = run(capsys, None, "group", "init", group_dir, "--name", "lab", "--json")
    assert code == 0 and json.loads(out)["name"] == "lab"
    root = tmp_path / "d"
    root.mkdir()
    (root / "config.toml").write_text(f'[[groups]]\nlocation = "{group_dir}"\n')
    job = Desk(root, wait_window=5).submit(tap.url, CONE, publish=False).wait(progress=False)
    code, out, _ = run(capsys, root, "publish", job.id[:6], "--json")
    assert code == 0 and json.loads(out)["published"].startswith("lab:")
    code, _, err = run(capsys, root, "publish", job.id, "--group", "nope")
    _refused(code, err, 2, "nope")
    code, out, _ = run(capsys, root, "group", "add-to-index", "--json")
    assert code == 0 and "added" in json.loads(out)
    code, out, _ = run(capsys, root, "group", "verify", "--json")
    assert code == 0 and json.loads(out)["problems"] == []
    code, _, err = run(capsys, root, "group", "verify", "--group", "nope")
    _refused(code, err, 2, "no group cache named 'nope'", "--location")  # was StopIteration
    code, out, _ = run(capsys, root, "group", "prune", "--group", "lab", "--dry-run", "--json")
    assert code == 0 and json.loads(out)["manifests"] == 1
    code, _, err = run(capsys, tmp_path / "lonely", "group", "prune")
    _refused(code, err, 2, "0 group caches", "--group NAME")
    code, _, err = run(capsys, root, "group")
    _refused(code, err, 2, "usage:")


def test_settings_command_shows_each_value_and_where_it_came_from(capsys, tmp_path):
    root = tmp_path / "d"
    root.mkdir()
    (root / "config.toml").write_text('default_limit = 2\n[limits]\n"https://tap.alpha.invalid'
                                      '/tap" = 1\n')
    code, out, _ = run(capsys, root, "settings", "--json")
    shown = json.loads(out)
    assert code == 0 and shown["settings"]["root"] == str(root)
    assert shown["settings"]["limits"] == {"https://tap.alpha.invalid/tap": 1}
    assert shown["settings"]["default_limit"] == 2
    assert shown["sources"]["default_limit"] == str(root / "config.toml")
    assert shown["sources"]["root"] == "argument root"   # --root is an argument
    code, out, _ = run(capsys, root, "settings")
    assert code == 0 and f"default_limit  2   ({root / 'config.toml'})" in out
    (root / "config.toml").write_text("default_limit = 0\n")
    code, _, err = run(capsys, root, "settings")
    _refused(code, err, 2, "config.toml: default_limit = 0", "expected a whole number")


# --- shaping a query: tables, columns, find, check, estimate -----------------------------------


def test_shaping_commands(tap, capsys, tmp_path):
    root = tmp_path / "d"
    code, out, _ = run(capsys, root, "tables", tap.url, "--json")
    assert code == 0 and "orrery.sources" in [t["name"] for t in json.loads(out)]
    code, out, _ = run(capsys, root, "columns", tap.url, "orrery.sources", "--json")
    # TAP 1.1 / VOSI tables: ra is in degrees in the service's published metadata
    assert code == 0 and {c["name"]: c["unit"] for c in json.loads(out)}["ra"] == "deg"
    code, _, err = run(capsys, root, "columns", tap.url, "orrery.nothing")
    _refused(code, err, 2, "orrery.nothing")
    code, out, _ = run(capsys, root, "find", tap.url, "mag", "--json")
    assert code == 0 and "mag_lime" in {h["column"] for h in json.loads(out)}
    query = tmp_path / "q.adql"
    query.write_text("SELECT orrery_id, mag_lyme FROM orrery.sources")
    code, out, _ = run(capsys, root, "check", tap.url, query, "--json")
    assert code == 1 and any("mag_lyme" in f["message"] for f in json.loads(out))
    code, _, err = run(capsys, root, "check", tap.url, tmp_path / "missing.adql")
    _refused(code, err, 2, "cannot read the query file")
    query.write_text(CONE)
    code, out, _ = run(capsys, root, "estimate", tap.url, query, "--json")
    assert code == 0 and json.loads(out)["rows"] is not None
    code, _, err = run(capsys, root, "estimate", tap.url, query, "--maxrec", "ten")
    _refused(code, err, 2, "invalid int value")


# --- analyses, rerun, compare; demo ------------------------------------------------------------


def test_analyses_rerun_compare(tap, capsys, tmp_path):
    root = tmp_path / "d"
    desk = Desk(root, wait_window=5)
    with desk.analysis("bright-ones"):
        first = desk.submit(tap.url, BRIGHT).wait(progress=False)
    code, out, _ = run(capsys, root, "analyses", "--json")
    assert code == 0 and json.loads(out)[0]["name"] == "bright-ones"
    code, out, _ = run(capsys, root, "analyses", "bright-ones")
    assert code == 0 and first.id in out
    code, out, _ = run(capsys, root, "rerun", "bright-ones", "--rename",
                       "orrery.sources=orrery_r2.sources", "--wait", "--json")
    plan = json.loads(out)
    assert code == 0 and plan["steps"][0]["state"] == "done"
    code, out, _ = run(capsys, root, "compare", first.id[:6], plan["steps"][0]["new_job"][:6],
                       "--json")
    assert code == 0 and json.loads(out)["key"] == "orrery_id"
    code, _, err = run(capsys, root, "rerun", "no-such-analysis")
    _refused(code, err, 2, "no-such-analysis")
    code, _, err = run(capsys, root, "rerun", "bright-ones", "--rename", "missing-equals")
    _refused(code, err, 2, "OLD=NEW")
    code, _, err = run(capsys, root, "compare", first.id, "nojob")
    _refused(code, err, 1, "no job 'nojob'")


def test_demo_refuses_bad_arguments_and_runs(capsys, tmp_path):
    code, _, err = run(capsys, None, "demo", "--rows", "few")
    _refused(code, err, 2, "invalid int value")
    # The whole story end to end in a subprocess is tests/test_demo_desk.py; here in process.
    code, out, _ = run(capsys, tmp_path / "demo", "demo", "--rows", "1500")
    assert code == 0 and "1. Submit a cone search" in out


def test_no_command_and_unknown_command(capsys):
    code, _, err = run(capsys, None)
    _refused(code, err, 2, "COMMAND")
    code, _, err = run(capsys, None, "fetch-everything")
    _refused(code, err, 2, "invalid choice")


# --- last: every command of the parser was run above -----------------------------------------


def _commands() -> list[str]:
    import argparse
    names = []

    def walk(p, path):
        for action in p._actions:
            if isinstance(action, argparse._SubParsersAction):
                shown = {c.dest for c in action._choices_actions}
                for name, child in action.choices.items():
                    if name in shown:
                        names.append(f"{path}{name}")
                        walk(child, f"{path}{name} ")
    walk(cli_module.parser(), "")
    return [n for n in names if n != "group"]


def test_every_command_was_run_by_this_file():
    missing = set(_commands()) - RUN
    assert not missing, f"commands no test above runs: {sorted(missing)}"

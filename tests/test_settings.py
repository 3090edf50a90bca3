"""One settings object, built the same way in every process: defaults < config file <
environment < arguments, on real config files in a temporary directory and the real process
environment (monkeypatch sets variables, nothing is mocked). A bad value names where it was."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from jobdesk import ConfigError, Desk, Group
from jobdesk.groups.config import DEFAULT_READONLY, as_groups
from jobdesk.keys import service_id
from jobdesk.localtap import serve
from jobdesk.settings import Settings, build

REPO = Path(__file__).resolve().parents[1]
SERVICE = "https://tap.alpha.invalid/tap"
OTHER = "https://tap.beta.invalid/tap"


@pytest.fixture(autouse=True)
def _no_outside_settings(monkeypatch):
    """No JOBDESK_* variable of the machine running the tests may leak into them."""
    for name in list(os.environ):
        if name.startswith("JOBDESK_"):
            monkeypatch.delenv(name)


def _root(tmp_path, text: str | None) -> Path:
    root = tmp_path / "desk"
    root.mkdir(exist_ok=True)
    if text is not None:
        (root / "config.toml").write_text(text, "utf-8")
    return root


def test_defaults_then_file_then_environment_then_argument(tmp_path, monkeypatch):
    root = _root(tmp_path, None)
    assert build(root=root).wait_window == Settings.wait_window == 30
    assert build(root=root).sources["wait_window"] == "default"

    _root(tmp_path, f'wait_window = 7\ntimeout = 12.5\n[limits]\n"{SERVICE}" = 2\n')
    from_file = build(root=root)
    assert (from_file.wait_window, from_file.timeout) == (7, 12.5)
    assert from_file.sources["wait_window"] == str(root / "config.toml")
    assert from_file.config_file == root / "config.toml"

    monkeypatch.setenv("JOBDESK_WAIT_WINDOW", "8")
    from_env = build(root=root)
    assert from_env.wait_window == 8 and from_env.sources["wait_window"] == "$JOBDESK_WAIT_WINDOW"
    assert from_env.timeout == 12.5, "the file still gives what the environment does not"

    from_argument = build(root=root, wait_window=9)
    assert from_argument.wait_window == 9 and from_argument.sources["wait_window"] == \
        "argument wait_window"

    # a Desk builds the same, its keywords being the arguments
    assert Desk(root).settings.wait_window == 8
    desk = Desk(root, wait_window=9, limits={OTHER: 1})
    assert desk.settings.wait_window == 9 and desk.drive_slice == 10.0
    assert desk._remote_options == {"wait_window": 9, "attempts": 5, "timeout": 12.5}
    # limits merge service by service: the file's stays, the argument's is added
    assert dict(desk.settings.limits) == {service_id(SERVICE): 2, service_id(OTHER): 1}
    assert Desk(root, limits={SERVICE: 3}).limits[service_id(SERVICE)] == 3


def test_the_root_comes_first_and_the_config_file_is_found_through_it(tmp_path, monkeypatch):
    home = _root(tmp_path, "default_limit = 2\n")
    monkeypatch.setenv("JOBDESK_HOME", str(home))
    assert build().root == home and build().default_limit == 2
    elsewhere = tmp_path / "elsewhere.toml"
    elsewhere.write_text("default_limit = 3\n", "utf-8")
    monkeypatch.setenv("JOBDESK_CONFIG", str(elsewhere))
    assert build().default_limit == 3 and build().config_file == elsewhere
    monkeypatch.setenv("JOBDESK_CONFIG", str(tmp_path / "missing.toml"))
    with pytest.raises(ConfigError, match="missing.toml does not exist"):
        build()


def test_a_limit_from_the_file_applies_however_the_desk_looks_it_up(tmp_path):
    root = _root(tmp_path, f'default_limit = 6\n[limits]\n"{SERVICE}/" = 1\n')
    desk = Desk(root)
    assert desk.settings.limit_for(SERVICE.upper().replace("/TAP", "/tap")) == 1
    assert desk.limits[service_id(SERVICE)] == 1
    assert desk.limits.get(service_id(OTHER), 4) == 6, "the configured default, not the caller's"


@pytest.mark.parametrize("text, words", [
    ('wait_window = "soon"\n', ["wait_window = 'soon'", "expected a whole number, 1 or more"]),
    ("timeout = 0\n", ["timeout = 0", "greater than 0"]),
    ("send_tries = true\n", ["send_tries = True", "whole number"]),
    ("wait_windw = 3\n", ["unknown key 'wait_windw'"]),
    ('[limits]\n"tap.example" = 2\n', ["[limits] 'tap.example'", "not a service URL"]),
    (f'[limits]\n"{SERVICE}" = 0\n', [f"[limits] '{SERVICE}' = 0", "1 or more"]),
    ("limits = 3\n", ["[limits] = 3: expected a table of service URL = count"]),
    ('[[groups]]\nlocation = "/x"\nreadonly = "no"\n', ["entry 1", "readonly = 'no'",
                                                         "true or false"]),
    ("wait_window = [\n", ["cannot read config file", "fix the TOML syntax"]),
])
def test_a_bad_value_in_the_file_names_the_file_the_key_and_what_is_expected(tmp_path, text,
                                                                               words):
    root = _root(tmp_path, text)
    with pytest.raises(ConfigError) as caught:
        Desk(root)
    said = str(caught.value)
    assert str(root / "config.toml") in said
    for word in words:
        assert word in said, (word, said)
    assert caught.value.hint


def test_a_bad_variable_or_argument_names_itself(tmp_path, monkeypatch):
    root = _root(tmp_path, None)
    monkeypatch.setenv("JOBDESK_POLL_INTERVAL", "-1")
    with pytest.raises(ConfigError, match=r"\$JOBDESK_POLL_INTERVAL = '-1': expected a number "
                                          r"of seconds, 0 or more"):
        build(root=root)
    monkeypatch.delenv("JOBDESK_POLL_INTERVAL")
    with pytest.raises(ConfigError, match="argument attempts = 0: expected a whole number"):
        Desk(root, attempts=0)
    with pytest.raises(TypeError, match="unknown settings"):
        build(root=root, wait_windows=3)


def test_one_default_for_whether_a_group_is_read_only(tmp_path):
    # A location string, Group(location) and a config-file entry without readonly agree.
    from_string = as_groups(["/srv/group"])[0]
    root = _root(tmp_path, '[[groups]]\nlocation = "/srv/group"\n')
    from_file = build(root=root).groups[0]
    assert Group("/srv/group").readonly is from_string.readonly is from_file.readonly \
        is DEFAULT_READONLY is False
    _root(tmp_path, '[[groups]]\nlocation = "/srv/group"\nreadonly = true\n')
    assert build(root=root).groups[0].readonly is True


def test_storage_options_stay_out_of_printed_settings(tmp_path):
    root = _root(tmp_path, '[[groups]]\nlocation = "/srv/group"\n'
                           '[groups.storage_options]\nsecret = "s3cr3t-value"\n')
    settings = build(root=root)
    assert settings.groups[0].storage_options == {"secret": "s3cr3t-value"}
    assert "s3cr3t-value" not in repr(settings)
    assert "s3cr3t-value" not in json.dumps(settings.as_dict())


def test_a_limit_in_the_file_holds_in_another_process_with_a_bare_desk(tmp_path):
    """Process independence: a child process that builds ``Desk()`` with no argument at all
    (as a kernel does) applies the config file's limit of 1 on this service."""
    with serve(state=tmp_path / "tap", rows=500, exec_delay=1.0) as tap:
        root = _root(tmp_path, f'[limits]\n"{tap.url}" = 1\n')
        child = ("import json\nfrom jobdesk import Desk\ndesk = Desk()\n"
                 "jobs = [desk.submit(%r, f'SELECT TOP {n} orrery_id FROM orrery.sources "
                 "ORDER BY orrery_id') for n in (1, 2, 3)]\n"
                 "print(json.dumps([desk.settings.limit_for(%r), [j.phase for j in jobs]]))\n"
                 % (tap.url, tap.url))
        env = {k: v for k, v in os.environ.items() if not k.startswith("JOBDESK_")}
        env.update(JOBDESK_HOME=str(root), PYTHONPATH=str(REPO))
        done = subprocess.run([sys.executable, "-c", child], capture_output=True, text=True,
                              env=env, timeout=120)
        assert done.returncode == 0, done.stderr[-2000:]
        limit, phases = json.loads(done.stdout.strip().splitlines()[-1])
        assert limit == 1
        assert phases[0] != "UNSENT" and phases[1:] == ["UNSENT", "UNSENT"], phases
        # and the command line, another process again, reports the same limit and its source
        shown = subprocess.run([sys.executable, "-m", "jobdesk.cli", "settings", "--json"],
                               capture_output=True, text=True, env=env, timeout=60)
        assert shown.returncode == 0, shown.stderr
        out = json.loads(shown.stdout)
        assert out["settings"]["limits"] == {service_id(tap.url): 1}
        assert out["sources"]["limits"] == str(root / "config.toml")

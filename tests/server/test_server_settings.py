"""The server extension reads its settings as Jupyter configures everything (traitlets of
``JobdeskServer``), builds them once with the same builder as kernels (so the desk's config file
applies), and still honours the deprecated ``tornado_settings["jobdesk"]`` keys.

Two real servers: one in this process (pytest-jupyter, as test_rest_queries.py starts it) so
the test can look at the settings object itself, and one child process configured by a Python
config file (``c.JobdeskServer.root = ...``), seen only over HTTP, on disk and in its log.
"""

from __future__ import annotations

import json
import os

import pytest
import requests

from jupyter_launch import RunningJupyter

pytest_plugins = ["pytest_jupyter.jupyter_server"]

SERVICE = "https://tap.alpha.invalid/tap"


@pytest.fixture(autouse=True)
def _no_outside_settings(monkeypatch):
    for name in list(os.environ):
        if name.startswith("JOBDESK_"):
            monkeypatch.delenv(name)


@pytest.fixture
def desk_root(tmp_path):
    root = tmp_path / "desk"
    root.mkdir()
    (root / "config.toml").write_text(f'default_limit = 3\nfeed_interval = 0.75\n'
                                      f'[limits]\n"{SERVICE}" = 1\n', "utf-8")
    return root


@pytest.fixture
def jp_server_config(desk_root):
    # The poller is off (0 from the traitlet, over the deprecated key's 9): nothing to contact.
    return {"ServerApp": {"jpserver_extensions": {"jobdesk.server": True},
                          "tornado_settings": {"jobdesk": {"poll_interval": 9,
                                                           "feed_timeout": 4}}},
            "JobdeskServer": {"root": str(desk_root), "poll_interval": 0.0}}


async def test_traitlets_then_deprecated_keys_then_the_config_file(jp_serverapp, jp_fetch,
                                                                     desk_root):
    app = jp_serverapp.web_app.settings
    settings = app["jobdesk_settings"]
    assert settings.root == desk_root and settings.sources["root"] == "JobdeskServer.root"
    assert settings.poll_interval == 0.0, "the traitlet wins over the deprecated key"
    assert settings.sources["poll_interval"] == "JobdeskServer.poll_interval"
    assert settings.feed_timeout == 4.0, "a deprecated key still works where no traitlet is set"
    assert settings.sources["feed_timeout"] == "tornado_settings['jobdesk']['feed_timeout']"
    assert settings.feed_interval == 0.75, "the desk's config file, read by the server too"
    assert settings.limit_for(SERVICE) == 1 and settings.default_limit == 3
    # built once, shared: the REST handlers' desk, the poller and the feed use this object
    assert app["jobdesk_runner"].desk().settings is settings
    assert app["jobdesk_poller"].settings is settings and app["jobdesk_poller"].interval == 0.0
    assert app["jobdesk_feed"].timeout == 4.0 and app["jobdesk_feed"].interval == 0.75
    answer = json.loads((await jp_fetch("jobdesk", "api", "cache")).body)
    assert answer["layers"][0]["name"] == "personal"


def test_a_python_config_file_sets_the_extension(tmp_path):
    work = tmp_path / "work"
    chosen = tmp_path / "chosen-desk"
    work.mkdir()
    # Python config as a user writes jupyter_server_config.py; beside the launcher's --config
    # JSON file of the same name, so the server loads both (traitlets loads .py, then .json)
    (work / "jupyter_test_config.py").write_text(
        f"c.JobdeskServer.root = {str(chosen)!r}\nc.JobdeskServer.feed_interval = 0.3\n")
    with RunningJupyter(work, tmp_path / "env-desk", jobdesk_settings={"poll_interval": 0},
                        extra_config={"ServerApp": {"tornado_settings": {"jobdesk": {
                            "feed_timeout": 5}}}}) as jp:
        r = requests.get(jp.url("jobdesk/api/cache"), headers=jp.auth, timeout=30)
        assert r.status_code == 200
        log = jp.log()
    assert (chosen / "index.sqlite").exists(), "the traitlet's root, not JOBDESK_HOME's"
    assert not (tmp_path / "env-desk" / "index.sqlite").exists()
    assert f"desk root {chosen}" in log
    assert "tornado_settings['jobdesk']['feed_timeout'] is deprecated" in log
    assert "c.JobdeskServer.feed_timeout" in log

"""Start a real Jupyter server (or JupyterLab) as a child process, for the REST and browser tests.

A child process rather than an in-process app: it loads the extension exactly as a user's
server does (through the installed jupyter-config file), and its poller runs in another process
from the test's own Desk, as it would beside a kernel.
"""

from __future__ import annotations

import json
import os
import secrets
import socket
import subprocess
import sys
import time
from pathlib import Path

import requests


def free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


def lab_bundle() -> Path | None:
    """The built lab extension next to the imported ``jobdesk`` package (``npm run build`` in
    labextension/ writes it there), or None when this checkout has not built one."""
    import jobdesk

    bundle = Path(jobdesk.__file__).resolve().parent / "labextension"
    return bundle if (bundle / "package.json").exists() else None


class RunningJupyter:
    """``with RunningJupyter(tmp, desk_root) as jp: requests.get(jp.url("jobdesk/api/jobs"), ...)``"""

    def __init__(self, workdir: Path, desk_root: Path, *, app: str = "server",
                 jobdesk_settings: dict | None = None, extra_config: dict | None = None):
        self.workdir = Path(workdir)
        self.desk_root = Path(desk_root)
        self.app = app
        self.token = secrets.token_hex(16)
        self.notebooks = self.workdir / "notebooks"
        self.settings = {"poll_interval": 1, "feed_timeout": 20, "feed_interval": 0.2,
                         **(jobdesk_settings or {})}
        self.extra_config = extra_config or {}
        self.proc: subprocess.Popen | None = None
        self.port = 0
        self.log_path = self.workdir / f"jupyter-{app}.log"

    @property
    def base(self) -> str:
        return f"http://127.0.0.1:{self.port}/"

    def url(self, path: str) -> str:
        return self.base + path.lstrip("/")

    @property
    def auth(self) -> dict:
        return {"Authorization": f"token {self.token}"}

    def env(self) -> dict:
        env = dict(os.environ)
        for name in ("config", "runtime", "ipython"):
            (self.workdir / name).mkdir(parents=True, exist_ok=True)
        data = self.workdir / "data"
        bundle = lab_bundle()
        if self.app == "lab" and bundle is not None:
            # The lab loads THIS checkout's bundle, not the one pip installed into the
            # environment: Jupyter searches JUPYTER_DATA_DIR/labextensions first and the first
            # copy of a package name wins. The installed one is left untouched.
            link = data / "labextensions" / "jobdesk-labextension"
            link.parent.mkdir(parents=True, exist_ok=True)
            if not link.exists():
                link.symlink_to(bundle, target_is_directory=True)
            env["JUPYTER_DATA_DIR"] = str(data)
        # The server imports the jobdesk these tests import (this checkout), not whichever one
        # is installed in the environment.
        import jobdesk

        checkout = str(Path(jobdesk.__file__).resolve().parents[1])
        env["PYTHONPATH"] = os.pathsep.join(p for p in (checkout, env.get("PYTHONPATH")) if p)
        env.update(JOBDESK_HOME=str(self.desk_root),
                   JUPYTER_CONFIG_DIR=str(self.workdir / "config"),
                   JUPYTER_RUNTIME_DIR=str(self.workdir / "runtime"),
                   IPYTHONDIR=str(self.workdir / "ipython"),
                   JUPYTER_PLATFORM_DIRS="1")
        return env

    def __enter__(self) -> "RunningJupyter":
        self.notebooks.mkdir(parents=True, exist_ok=True)
        # jobdesk's server settings are traitlets of JobdeskServer (docs/settings.md)
        config = {"ServerApp": {"jpserver_extensions": {"jobdesk.server": True}},
                  "JobdeskServer": self.settings}
        for section, values in self.extra_config.items():
            config.setdefault(section, {}).update(values)
        config_file = self.workdir / "jupyter_test_config.json"
        config_file.write_text(json.dumps(config))
        module = "jupyterlab" if self.app == "lab" else "jupyter_server"
        for _attempt in range(3):
            self.port = free_port()
            cmd = [sys.executable, "-m", module, "--no-browser", "--ip=127.0.0.1",
                   f"--port={self.port}", "--ServerApp.port_retries=0",
                   f"--IdentityProvider.token={self.token}",
                   f"--ServerApp.root_dir={self.notebooks}", f"--config={config_file}"]
            if hasattr(os, "geteuid") and os.geteuid() == 0:
                cmd.append("--allow-root")
            log = open(self.log_path, "ab")
            self.proc = subprocess.Popen(cmd, env=self.env(), stdout=log, stderr=log,
                                         cwd=self.notebooks)
            if self._ready(timeout=60):
                return self
            self.stop()
        raise RuntimeError(f"jupyter {self.app} did not start; log:\n{self.log()}")

    def _ready(self, timeout: float) -> bool:
        end = time.monotonic() + timeout
        while time.monotonic() < end:
            if self.proc.poll() is not None:
                return False
            try:
                r = requests.get(self.url("jobdesk/api/cache"), headers=self.auth, timeout=5)
                if r.status_code == 200:
                    return True
            except requests.RequestException:
                pass
            time.sleep(0.2)
        return False

    def log(self) -> str:
        return self.log_path.read_text(errors="replace")[-5000:] if self.log_path.exists() else ""

    def stop(self) -> None:
        if self.proc and self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(15)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(5)

    def __exit__(self, *exc) -> None:
        self.stop()

"""The embedded TAP 1.1 / UWS 1.1 service on loopback, for the demo and the tests.

``serve()`` runs it in this process on a background thread; ``spawn()`` runs
``python -m jobdesk.localtap`` as a child process that can be killed and restarted on the same
state directory (for "the service restarted mid-job" stories). Both give the TAP base URL.
"""

from __future__ import annotations

import contextlib
import json
import os
import signal
import subprocess
import sys
import tempfile
import threading
import time
import urllib.request
from pathlib import Path
from typing import Iterator, Sequence

from jobdesk.localtap.faults import FAULT_NAMES, Faults

__all__ = ["LocalTap", "SpawnedTap", "serve", "spawn", "FAULT_NAMES"]

READY_PREFIX = "jobdesk-localtap serving "


def _http_json(url: str, payload: dict | None = None) -> dict:
    data = None if payload is None else json.dumps(payload).encode("utf-8")
    request = urllib.request.Request(url, data=data, method="GET" if data is None else "POST",
                                     headers={"Content-Type": "application/json"})
    with urllib.request.urlopen(request, timeout=30) as response:
        return json.loads(response.read())


class _Introspection:
    """stats()/configure() over real HTTP, shared by the in-process and the child service."""

    url: str

    @property
    def root(self) -> str:
        return self.url[: -len("/tap")]

    def stats(self) -> dict:
        return _http_json(f"{self.root}/_localtap/stats")

    def configure(self, **faults) -> dict:
        return _http_json(f"{self.root}/_localtap/faults", faults)


def default_engine(state_dir: Path, *, rows: int, files: Sequence[Path] = ()):
    from jobdesk.localtap.engine import Engine
    return Engine(state_dir, rows=rows, files=files)


class LocalTap(_Introspection):
    """An in-process service on its own IOLoop thread. Use through :func:`serve`."""

    def __init__(self, *, state: Path, rows: int = 20_000, port: int = 0, engine=None,
                 files: Sequence[Path] = (), sweep_interval: float = 1.0, **faults):
        from jobdesk.localtap.service import LocalTapService, make_app

        self.state = Path(state)
        self.faults = Faults(**faults)
        engine = engine if engine is not None else default_engine(self.state, rows=rows, files=files)
        self.service = LocalTapService(state_dir=self.state, engine=engine, faults=self.faults,
                                       sweep_interval=sweep_interval)
        self._app = make_app(self.service)
        self._port = port
        self._ready = threading.Event()
        self._error: BaseException | None = None
        self._thread = threading.Thread(target=self._run, name="localtap-ioloop", daemon=True)
        self._thread.start()
        self._ready.wait(60)
        if self._error is not None:
            raise self._error
        self.url = f"http://127.0.0.1:{self.port}/tap"

    def _run(self):
        import asyncio

        from tornado.httpserver import HTTPServer
        from tornado.ioloop import IOLoop
        from tornado.netutil import bind_sockets

        asyncio.set_event_loop(asyncio.new_event_loop())
        self.loop = IOLoop.current()
        try:
            self._server = HTTPServer(self._app, max_body_size=512 * 1024 * 1024)
            sockets = bind_sockets(self._port, address="127.0.0.1")
            self._server.add_sockets(sockets)
            self.port = sockets[0].getsockname()[1]
            self.service.start(self.loop)
        except BaseException as exc:   # report startup failures to the caller's thread
            self._error = exc
            self._ready.set()
            return
        self._ready.set()
        self.loop.start()
        self.loop.close(all_fds=True)

    def alive(self) -> bool:
        return self._thread.is_alive()

    def stop(self):
        """Stop serving and release the port; jobs stay in the state directory."""
        if not self._thread.is_alive():
            return
        done = threading.Event()

        def shutdown():
            self._server.stop()
            self.service.stop()
            self.loop.stop()
            done.set()

        self.loop.add_callback(shutdown)
        done.wait(10)
        self._thread.join(10)


@contextlib.contextmanager
def serve(*, state: str | Path | None = None, rows: int = 20_000, port: int = 0, engine=None,
          files: Sequence[Path] = (), sweep_interval: float = 1.0, **faults) -> Iterator[LocalTap]:
    """Run the service in this process; yields a :class:`LocalTap` with ``.url`` (the TAP base).

    ``faults`` are the settings of :class:`jobdesk.localtap.faults.FaultSettings`
    (``exec_delay=2``, ``fail_first=3``, ...); change them later with ``.configure()``.
    Without ``state`` a temporary directory is used and removed afterwards.
    """
    with contextlib.ExitStack() as stack:
        if state is None:
            state = stack.enter_context(tempfile.TemporaryDirectory(prefix="localtap-"))
        tap = LocalTap(state=Path(state), rows=rows, port=port, engine=engine, files=files,
                       sweep_interval=sweep_interval, **faults)
        try:
            yield tap
        finally:
            tap.stop()


# --- the service as a child process -------------------------------------------------------------


def _flag(name: str) -> str:
    return "--" + name.replace("_", "-")


def command_line(*, state: Path, rows: int, port: int, files: Sequence[Path] = (),
                 **faults) -> list[str]:
    """The ``python -m jobdesk.localtap`` command for these settings."""
    args = [sys.executable, "-m", "jobdesk.localtap", "--port", str(port), "--state", str(state),
            "--rows", str(rows)]
    for path in files:
        args += ["--file", str(path)]
    for name, value in faults.items():
        if name not in FAULT_NAMES:
            raise ValueError(f"unknown fault setting {name!r}; known: {', '.join(FAULT_NAMES)}")
        if isinstance(value, bool):
            if value:
                args.append(_flag(name))
        elif value is not None:
            args += [_flag(name), str(value)]
    return args


class SpawnedTap(_Introspection):
    """``python -m jobdesk.localtap`` as a child process; restartable on the same state and port."""

    def __init__(self, *, state: Path, rows: int = 20_000, port: int = 0,
                 files: Sequence[Path] = (), startup_timeout: float = 120.0, **faults):
        self.state = Path(state)
        self._settings = dict(rows=rows, files=tuple(files), **faults)
        self._startup_timeout = startup_timeout
        self.process: subprocess.Popen | None = None
        self.port = port
        self.url = ""
        self._start()

    def _start(self):
        args = command_line(state=self.state, port=self.port, **self._settings)
        env = dict(os.environ, PYTHONUNBUFFERED="1")
        self.process = subprocess.Popen(args, stdout=subprocess.PIPE, stderr=None, text=True,
                                        env=env)
        deadline = time.monotonic() + self._startup_timeout
        url = None
        while time.monotonic() < deadline:
            line = self.process.stdout.readline()
            if not line:
                break
            if line.startswith(READY_PREFIX):
                url = line[len(READY_PREFIX):].strip()
                break
        if url is None:
            self.kill()
            raise RuntimeError(f"jobdesk.localtap did not start (exit code {self.process.poll()})")
        self.url = url
        self.port = int(url.split(":")[2].split("/")[0])
        # keep reading stdout so the child never blocks on a full pipe
        threading.Thread(target=self._drain, args=(self.process,), daemon=True).start()
        self._wait_available()

    @staticmethod
    def _drain(process: subprocess.Popen):
        for _ in process.stdout:
            pass

    def _wait_available(self):
        deadline = time.monotonic() + self._startup_timeout
        while time.monotonic() < deadline:
            try:
                with urllib.request.urlopen(f"{self.url}/availability", timeout=5) as response:
                    if response.status == 200:
                        return
            except OSError:
                time.sleep(0.05)
        raise RuntimeError(f"{self.url}/availability did not answer")

    def stop(self, timeout: float = 15.0):
        """Graceful stop (SIGTERM), then kill if it lingers."""
        if self.process is None or self.process.poll() is not None:
            return
        self.process.send_signal(signal.SIGTERM)
        try:
            self.process.wait(timeout)
        except subprocess.TimeoutExpired:
            self.kill()

    def kill(self):
        """Hard stop (SIGKILL): like a crash, nothing is tidied up."""
        if self.process is not None and self.process.poll() is None:
            self.process.kill()
            self.process.wait(15)

    def restart(self, *, hard: bool = False, **faults):
        """Stop (or kill) and start again on the same state directory and port."""
        self.kill() if hard else self.stop()
        self._settings.update(faults)
        self._start()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.stop()


def spawn(*, state: str | Path | None = None, rows: int = 20_000, port: int = 0,
          files: Sequence[Path] = (), **faults) -> SpawnedTap:
    """Start the service as a child process and wait until it answers; the caller stops it.

    Without ``state`` a fresh temporary directory is made (and left for the caller to inspect).
    """
    if state is None:
        state = tempfile.mkdtemp(prefix="localtap-")
    return SpawnedTap(state=Path(state), rows=rows, port=port, files=files, **faults)

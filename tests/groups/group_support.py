"""Helpers for the group-cache tests: a real S3-speaking server, group places, other users.

Kept out of conftest so test modules import them plainly.
"""

from __future__ import annotations

import json
import os
import secrets
import socket
import subprocess
import sys
import tempfile
import time
import traceback
import urllib.request
import warnings
from pathlib import Path

from jobdesk import Group
from jobdesk.groups import layout
from jobdesk.groups.storage import open_storage

# Dummy credentials: moto accepts any; they only have to be present (no real account exists).
S3_KEY, S3_SECRET = "jobdesk-test-key", "jobdesk-test-secret"


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class MotoServer:
    """``python -m moto.server`` on loopback: a real S3 HTTP API, in memory, for one session."""

    def __init__(self):
        self.port = free_port()
        self.url = f"http://127.0.0.1:{self.port}"
        # Its request log goes to a file: an unread pipe would fill and stall the server.
        self.log = tempfile.TemporaryFile()
        self.process = subprocess.Popen(
            [sys.executable, "-m", "moto.server", "-H", "127.0.0.1", "-p", str(self.port)],
            stdout=subprocess.DEVNULL, stderr=self.log)
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline:
            if self.process.poll() is not None:
                self.log.seek(0)
                raise RuntimeError(f"moto server exited: {self.log.read()[-2000:]!r}")
            try:
                with urllib.request.urlopen(self.url + "/moto-api/", timeout=2):
                    return
            except OSError:
                time.sleep(0.1)
        self.stop()
        raise RuntimeError("moto server did not answer within 60 s")

    def options(self) -> dict:
        return {"key": S3_KEY, "secret": S3_SECRET,
                "client_kwargs": {"endpoint_url": self.url, "region_name": "us-east-1"}}

    def new_bucket(self) -> str:
        import boto3   # comes with moto
        name = f"jobdesk-group-{secrets.token_hex(4)}"
        boto3.client("s3", endpoint_url=self.url, region_name="us-east-1",
                     aws_access_key_id=S3_KEY, aws_secret_access_key=S3_SECRET
                     ).create_bucket(Bucket=name)
        return f"s3://{name}/cache"

    def stop(self) -> None:
        if self.process.poll() is None:
            self.process.terminate()
            try:
                self.process.wait(10)
            except subprocess.TimeoutExpired:
                self.process.kill()
                self.process.wait()
        self.log.close()


class Place:
    """Where a test's group cache lives, with raw access for damaging it on purpose."""

    def __init__(self, location: str, options: dict | None = None, kind: str = "posix"):
        self.location = location
        self.options = options or {}
        self.kind = kind
        self.storage = open_storage(location, self.options)

    def group(self, *, readonly: bool, name: str | None = "lab") -> Group:
        return Group(self.location, readonly=readonly, name=name, storage_options=self.options)

    def files(self, under: str) -> list[str]:
        return sorted(rel for rel, _, _ in self.storage.walk(under))

    def manifests(self) -> list[str]:
        return [r for r in self.files(layout.MANIFESTS) if r.endswith(".json")]

    def flip_byte(self, rel: str, at: int = 100) -> None:
        data = bytearray(self.storage.read(rel))
        data[at % len(data)] ^= 0x01
        self.storage.put_bytes(rel, bytes(data))

    def truncate(self, rel: str, keep: int) -> None:
        self.storage.put_bytes(rel, self.storage.read(rel)[:keep])


# --- running code as another Unix user -----------------------------------------------------------


def run_as(uid: int, gid: int, fn, *args, home: str | None = None, timeout: float = 120):
    """Run ``fn(*args)`` in a forked child that has become ``uid``/``gid``; return its result.

    Fork rather than exec: the interpreter lives under a directory only root may enter here,
    and the parent has already imported everything the story needs. The child reports
    ``{"ok": result, "warnings": [...]}`` or the traceback as JSON on a pipe.
    """
    read_end, write_end = os.pipe()
    pid = os.fork()
    if pid == 0:   # the child: never returns into pytest
        code = 0
        try:
            os.close(read_end)
            os.setgroups([gid])
            os.setgid(gid)
            os.setuid(uid)
            os.umask(0o077)   # a careless personal umask: jobdesk must apply the group's own
            if home:
                os.environ["HOME"] = home
            with warnings.catch_warnings(record=True) as seen:
                warnings.simplefilter("always")
                result = fn(*args)
            out = {"ok": result, "warnings": [str(w.message) for w in seen]}
        except BaseException:
            out = {"error": traceback.format_exc()}
            code = 1
        try:
            with os.fdopen(write_end, "w") as fh:
                json.dump(out, fh, default=str)
        finally:
            os._exit(code)
    os.close(write_end)
    with os.fdopen(read_end) as fh:
        text = fh.read()
    _, status = os.waitpid(pid, 0)
    out = json.loads(text) if text else {"error": f"child died with status {status}"}
    if "error" in out:
        raise AssertionError(f"the child process as uid {uid} failed:\n{out['error']}")
    return out


class UnixAccounts:
    """Throw-away users and a group, created with useradd/groupadd and removed afterwards."""

    def __init__(self):
        tag = secrets.token_hex(3)
        self.group = f"jdg{tag}"
        self.users: dict[str, tuple[int, int]] = {}
        subprocess.run(["groupadd", self.group], check=True, capture_output=True)
        import grp
        self.gid = grp.getgrnam(self.group).gr_gid
        self._tag = tag

    def add(self, role: str, *, member: bool) -> tuple[int, int]:
        import pwd
        name = f"jd{role}{self._tag}"
        args = ["useradd", "--no-create-home", "--shell", "/usr/sbin/nologin"]
        if member:
            args += ["--groups", self.group]
        subprocess.run(args + [name], check=True, capture_output=True)
        entry = pwd.getpwnam(name)
        self.users[role] = (entry.pw_uid, entry.pw_gid)
        return self.users[role]

    def remove(self) -> None:
        for role in list(self.users):
            subprocess.run(["userdel", f"jd{role}{self._tag}"], capture_output=True)
        subprocess.run(["groupdel", self.group], capture_output=True)


def mode(path: Path) -> int:
    return path.stat().st_mode & 0o7777

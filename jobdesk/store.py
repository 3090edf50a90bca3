"""Content-addressed result files: written atomically, named by their sha256, verified on doubt.

An object is first written to a temporary file in ``tmp/`` (same filesystem), fsynced, then
renamed to ``objects/ab/<sha256>``: a reader sees a whole file or none. The index records each
object's checksum and a *stat stamp* (size and modification time); a load whose stamp still
matches trusts the file (as git trusts its index), anything else is re-hashed before it is
served. A file that fails its checksum is moved to ``quarantine/`` and never served again.
"""

from __future__ import annotations

import hashlib
import os
import shutil
import tempfile
from pathlib import Path

from jobdesk.errors import CacheCorrupt, from_transport

CHUNK = 1 << 20


def sha256_file(path: Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        while block := fh.read(CHUNK):
            digest.update(block)
    return digest.hexdigest()


def stat_stamp(path: Path) -> str:
    st = path.stat()
    return f"{st.st_size}:{st.st_mtime_ns}"


def fsync_dir(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


class Store:
    """The objects of one cache root."""

    def __init__(self, root: Path | str):
        self.root = Path(root)
        self.objects = self.root / "objects"
        self.tmp = self.root / "tmp"
        self.quarantined = self.root / "quarantine"
        for d in (self.objects, self.tmp):
            d.mkdir(parents=True, exist_ok=True)

    def temp(self, suffix: str = "") -> Path:
        """A fresh temporary path beside the objects, so the final rename is atomic."""
        fd, name = tempfile.mkstemp(dir=self.tmp, suffix=suffix, prefix=f"{os.getpid()}-")
        os.close(fd)
        return Path(name)

    def path(self, sha256: str) -> Path:
        if len(sha256) != 64 or any(c not in "0123456789abcdef" for c in sha256):
            raise ValueError(f"not a sha256 checksum: {sha256!r}")
        return self.objects / sha256[:2] / sha256

    def has(self, sha256: str) -> bool:
        return self.path(sha256).is_file()

    def commit(self, tmp: Path, sha256: str | None = None) -> tuple[str, Path]:
        """Move a finished temp file into the store under its checksum; return (sha256, path)."""
        try:
            sha256 = sha256 or sha256_file(tmp)
            with open(tmp, "rb+") as fh:
                os.fsync(fh.fileno())
            final = self.path(sha256)
            final.parent.mkdir(exist_ok=True)
            os.chmod(tmp, 0o644)
            os.replace(tmp, final)
            fsync_dir(final.parent)
        except OSError as exc:
            tmp.unlink(missing_ok=True)
            raise from_transport(exc) from exc
        return sha256, final

    def checked(self, sha256: str, stamp: str | None) -> Path:
        """The object's path, after making sure it is the file the index recorded."""
        try:
            path = self.path(sha256)
        except ValueError:
            raise CacheCorrupt(f"the record names {str(sha256)[:80]!r} as its file, which is not "
                               "a sha256 checksum") from None
        if path.is_symlink() or not path.resolve().is_relative_to(self.objects.resolve()):
            # Objects are only ever written here by rename; a link may lead out of the cache.
            self.quarantine(sha256)
            raise CacheCorrupt(f"cached file {sha256[:12]}… is a link out of {self.objects}")
        if not path.is_file():
            raise CacheCorrupt(f"cached file {sha256[:12]}… is missing from {self.objects}")
        if stamp and stat_stamp(path) == stamp:
            return path
        if sha256_file(path) != sha256:
            self.quarantine(sha256)
            raise CacheCorrupt(f"cached file {sha256[:12]}… does not match its checksum")
        return path

    def verify(self, sha256: str) -> bool:
        path = self.path(sha256)
        return path.is_file() and sha256_file(path) == sha256

    def quarantine(self, sha256: str) -> None:
        path = self.path(sha256)
        if path.exists():
            self.quarantined.mkdir(exist_ok=True)
            shutil.move(path, self.quarantined / sha256)

    def remove(self, sha256: str) -> int:
        path = self.path(sha256)
        size = path.stat().st_size if path.exists() else 0
        path.unlink(missing_ok=True)
        return size

    def usage(self) -> tuple[int, int]:
        """(number of objects, total bytes)."""
        count = size = 0
        for sub in self.objects.iterdir():
            for f in sub.iterdir():
                count += 1
                size += f.stat().st_size
        return count, size

    def clean_temp(self) -> None:
        """Remove temp files left by dead processes of this host (none is ever registered)."""
        for f in self.tmp.iterdir():
            # "<pid>-..." from temp(), ".<pid>-....partial" from writers working beside it
            pid = f.name.lstrip(".").split("-", 1)[0]
            if pid.isdigit() and not _pid_alive(int(pid)):
                f.unlink(missing_ok=True)


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True

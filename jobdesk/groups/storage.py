"""Two ways to hold a group cache's files: a shared POSIX directory, or any fsspec filesystem.

Both offer the same small set of operations on paths relative to the group root. Every write
makes a whole file appear at once: on POSIX a temp file in the group's ``tmp/`` is fsynced,
given the group's mode bits and renamed into place; on an object store a file is one PUT (a
multipart upload, too, becomes visible only when complete). Nothing here decides *what* to
write; ``layer`` does.
"""

from __future__ import annotations

import contextlib
import errno
import os
import secrets
import socket
from pathlib import Path
from typing import BinaryIO, Iterator

from jobdesk.errors import ConfigError
from jobdesk.groups import layout
from jobdesk.store import fsync_dir

CHUNK = 1 << 20


class PosixStorage:
    """A directory on a local or network filesystem (NFS, Lustre, CephFS, ...)."""

    kind = "posix"
    read_block = CHUNK

    def __init__(self, root: Path | str):
        self.root = Path(root).expanduser()
        self.location = str(self.root)
        self.umask = layout.DEFAULT_UMASK
        self.gid: int | None = None    # group owner for new entries (None: the root's)

    def set_policy(self, umask: int, gid: int | None = None) -> None:
        self.umask = umask
        self.gid = gid

    def _abs(self, rel: str) -> Path:
        return self.root / rel

    # --- reading ----------------------------------------------------------------------------

    def read(self, rel: str) -> bytes:
        with self.open(rel) as fh:
            return fh.read()

    def open(self, rel: str) -> BinaryIO:
        """Open a file of the group for reading; never through a link out of it (ELOOP)."""
        path = self._abs(rel)
        root = os.path.realpath(self.root)
        parent = os.path.realpath(path.parent)
        if parent != root and not parent.startswith(root + os.sep):
            raise OSError(errno.ELOOP, "a directory link leads out of the group", str(path))
        return os.fdopen(os.open(path, os.O_RDONLY | os.O_NOFOLLOW), "rb")

    def exists(self, rel: str) -> bool:
        return self._abs(rel).exists()

    def size(self, rel: str) -> int | None:
        try:
            return self._abs(rel).stat().st_size
        except FileNotFoundError:
            return None

    def listdir(self, rel: str) -> list[str]:
        try:
            return os.listdir(self._abs(rel))
        except (FileNotFoundError, NotADirectoryError):
            return []

    def walk(self, rel: str) -> Iterator[tuple[str, int, float]]:
        """(relative path, size, modification time) of every file under ``rel``."""
        base = self._abs(rel)
        for dirpath, _, files in os.walk(base):
            for name in files:
                path = Path(dirpath) / name
                try:
                    st = path.stat()
                except FileNotFoundError:
                    continue
                yield path.relative_to(self.root).as_posix(), st.st_size, st.st_mtime

    # --- writing ----------------------------------------------------------------------------

    def can_write(self) -> bool:
        probe = self.root if not (self.root / layout.MANIFESTS).exists() else \
            self.root / layout.MANIFESTS
        return self.root.is_dir() and os.access(probe, os.W_OK | os.X_OK)

    def _group(self) -> int:
        return self.gid if self.gid is not None else self.root.stat().st_gid

    def make_dirs(self, subdirs) -> None:
        """Give the root the policy's mode and group, and create ``subdirs`` under it the same
        way (a new group cache's layout)."""
        self._own(self.root, layout.dir_mode(self.umask))
        for sub in subdirs:
            self._mkdirs(self.root / sub)

    def _mkdirs(self, path: Path) -> None:
        """Create missing directories with the policy's mode, setgid and the group's owner."""
        missing = []
        while not path.exists():
            missing.append(path)
            path = path.parent
        for d in reversed(missing):
            try:
                d.mkdir()
            except FileExistsError:
                continue
            self._own(d, layout.dir_mode(self.umask))

    def _own(self, path: Path, mode: int) -> None:
        if mode & 0o002:
            raise PermissionError(f"refusing to make {path} world-writable")
        gid = self._group()
        if path.stat().st_gid != gid:
            try:
                os.chown(path, -1, gid)
            except PermissionError:
                pass   # not a member: the file keeps the user's group; verify reports it
        os.chmod(path, mode)  # after chown, which may clear setgid

    def _temp(self) -> tuple[int, Path]:
        tmp = self.root / layout.TMP
        self._mkdirs(tmp)
        name = tmp / f"{socket.gethostname()}-{os.getpid()}-{secrets.token_hex(6)}"
        fd = os.open(name, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
        return fd, name

    def _place(self, fd: int, tmp: Path, rel: str) -> None:
        try:
            os.fsync(fd)
        finally:
            os.close(fd)
        try:
            self._own(tmp, layout.file_mode(self.umask))
            final = self._abs(rel)
            self._mkdirs(final.parent)
            os.replace(tmp, final)
            fsync_dir(final.parent)
        except BaseException:
            tmp.unlink(missing_ok=True)
            raise

    def put_bytes(self, rel: str, data: bytes) -> None:
        self._put(rel, [data])

    def put_file(self, rel: str, local: Path) -> None:
        with open(local, "rb") as src:
            self._put(rel, iter(lambda: src.read(CHUNK), b""))

    def _put(self, rel: str, blocks) -> None:
        """Write the blocks to a temp file beside the target, then place it (fsync + rename)."""
        fd, tmp = self._temp()
        try:
            for block in blocks:
                view = memoryview(block)
                while view:
                    view = view[os.write(fd, view):]
        except BaseException:
            os.close(fd)
            tmp.unlink(missing_ok=True)
            raise
        self._place(fd, tmp, rel)

    def remove(self, rel: str) -> None:
        self._abs(rel).unlink(missing_ok=True)

    def move(self, rel: str, dest: str) -> None:
        target = self._abs(dest)
        self._mkdirs(target.parent)
        os.replace(self._abs(rel), target)

    def remove_empty_dirs(self, rel: str) -> None:
        for dirpath, _, _ in sorted(os.walk(self._abs(rel)), key=lambda d: -len(d[0])):
            with contextlib.suppress(OSError):
                os.rmdir(dirpath)


class FsspecStorage:
    """Any fsspec filesystem; written for S3-compatible object stores (one PUT per file)."""

    kind = "fsspec"
    read_block = 16 * CHUNK   # one ranged GET per read: fewer, larger requests

    def __init__(self, url: str, storage_options: dict | None = None):
        try:
            import fsspec
        except ImportError:
            raise ConfigError(f"group cache {url} needs fsspec",
                              hint="pip install 'jobdesk[group-s3]'") from None

        options = dict(storage_options or {})
        options.setdefault("skip_instance_cache", True)
        if url.startswith(("s3://", "s3a://")):
            options.setdefault("use_listings_cache", False)
        try:
            self.fs, self.base = fsspec.core.url_to_fs(url, **options)
        except ImportError as exc:   # the protocol's package (s3fs, gcsfs, ...) is missing
            raise ConfigError(f"group cache {url}: {exc}",
                              hint="pip install 'jobdesk[group-s3]' for s3:// URLs") from None
        self.base = self.base.rstrip("/")
        self.location = url

    def _abs(self, rel: str) -> str:
        return f"{self.base}/{rel}"

    def read(self, rel: str) -> bytes:
        return self.fs.cat_file(self._abs(rel))

    def open(self, rel: str) -> BinaryIO:
        return self.fs.open(self._abs(rel), "rb", block_size=self.read_block, cache_type="none")

    def exists(self, rel: str) -> bool:
        return self.size(rel) is not None

    def size(self, rel: str) -> int | None:
        try:
            return int(self.fs.info(self._abs(rel))["size"])
        except FileNotFoundError:
            return None

    def listdir(self, rel: str) -> list[str]:
        try:
            return [p.rstrip("/").rsplit("/", 1)[-1]
                    for p in self.fs.ls(self._abs(rel), detail=False)]
        except (FileNotFoundError, NotADirectoryError):
            return []

    def walk(self, rel: str) -> Iterator[tuple[str, int, float]]:
        try:
            found = self.fs.find(self._abs(rel), detail=True)
        except FileNotFoundError:
            return
        prefix = self.base + "/"
        for path, info in found.items():
            if info.get("type") == "directory":
                continue
            when = info.get("LastModified") or info.get("mtime") or info.get("created") or 0
            if hasattr(when, "timestamp"):
                when = when.timestamp()
            yield path[len(prefix):] if path.startswith(prefix) else path, \
                int(info.get("size") or 0), float(when)

    def can_write(self) -> bool:
        return True   # an object store says no only when asked; publish reports it then

    def put_bytes(self, rel: str, data: bytes) -> None:
        self.fs.pipe_file(self._abs(rel), data)

    def put_file(self, rel: str, local: Path) -> None:
        self.fs.put_file(str(local), self._abs(rel))

    def remove(self, rel: str) -> None:
        with contextlib.suppress(FileNotFoundError):
            self.fs.rm_file(self._abs(rel))

    def move(self, rel: str, dest: str) -> None:
        self.fs.copy(self._abs(rel), self._abs(dest))
        self.fs.rm_file(self._abs(rel))

    def remove_empty_dirs(self, rel: str) -> None:
        pass   # object stores have no directories


def open_storage(location: str, storage_options: dict | None = None):
    """A path (or ``file://`` URL) gives POSIX storage; any other URL goes through fsspec."""
    text = str(location)
    if text.startswith("file://"):
        return PosixStorage(text[len("file://"):])
    if "://" in text:
        return FsspecStorage(text, storage_options)
    return PosixStorage(text)

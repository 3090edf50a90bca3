"""The content-addressed store: atomic commits, checksums, quarantine."""

import hashlib
import os

import pytest

from jobdesk.errors import CacheCorrupt
from jobdesk.store import Store, stat_stamp


def test_commit_names_file_by_checksum(tmp_path):
    store = Store(tmp_path)
    tmp = store.temp(".bin")
    tmp.write_bytes(b"abc" * 1000)
    sha, path = store.commit(tmp)
    assert sha == hashlib.sha256(b"abc" * 1000).hexdigest()
    assert path == store.path(sha) and path.read_bytes() == b"abc" * 1000
    assert not tmp.exists() and store.verify(sha)


def test_flipped_byte_is_quarantined_and_never_served(tmp_path):
    store = Store(tmp_path)
    tmp = store.temp()
    tmp.write_bytes(b"0123456789" * 100)
    sha, path = store.commit(tmp)
    stamp = stat_stamp(path)
    assert store.checked(sha, stamp) == path
    data = bytearray(path.read_bytes())
    data[17] ^= 0x01
    path.write_bytes(bytes(data))
    with pytest.raises(CacheCorrupt):
        store.checked(sha, stamp)
    assert not store.has(sha) and (store.quarantined / sha).exists()


def test_missing_object_is_reported(tmp_path):
    store = Store(tmp_path)
    with pytest.raises(CacheCorrupt, match="missing"):
        store.checked("a" * 64, None)


def test_bad_checksum_names_are_refused(tmp_path):
    with pytest.raises(ValueError):
        Store(tmp_path).path("../../etc/passwd")


def test_temp_files_of_dead_processes_are_cleaned(tmp_path):
    store = Store(tmp_path)
    mine = store.temp()
    stale = store.tmp / "999999999-left-by-a-killed-process"
    stale.write_bytes(b"partial")
    store.clean_temp()
    assert mine.exists() and not stale.exists()
    assert os.getpid()

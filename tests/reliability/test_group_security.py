"""Group caches under hostile or careless members: file permissions, bad checksums, links out of
the group, oversized objects and manifests naming paths. Nothing bad is ever served, nothing
outside the group is read, and a colleague's desk is never filled by a group object.

POSIX directory groups only: links and modes are the file system's matter (the S3 layer has
neither).
"""

from __future__ import annotations

import json
import os
import stat
import warnings
from pathlib import Path

import pytest

from jobdesk import Desk, Group
from jobdesk.errors import JobdeskError
from jobdesk.groups import layout
from jobdesk.localtap import serve

QUERY = "SELECT TOP {n} orrery_id, ra, dec FROM orrery.sources ORDER BY orrery_id"


@pytest.fixture(scope="module")
def tap(tmp_path_factory):
    with serve(state=tmp_path_factory.mktemp("tap"), rows=2000) as service:
        yield service


def published(tap, tmp_path, n: int):
    """Member A runs a query with the group writable: the result is published there."""
    group = tmp_path / "group"
    member_a = Desk(tmp_path / "member_a", groups=[str(group)], wait_window=2)
    job = member_a.submit(tap.url, QUERY.format(n=n)).wait(progress=False)
    return group, job


def colleague(tap, tmp_path, group, n: int, root: Path | None = None):
    """Member B (read-only) asks the same: served from the group, or run on the service."""
    member_b = Desk(root or tmp_path / "member_b", groups=[Group(str(group), readonly=True)], wait_window=2)
    created = tap.stats()["jobs_created"]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        job = member_b.submit(tap.url, QUERY.format(n=n)).wait(progress=False)
    went_to_service = tap.stats()["jobs_created"] == created + 1
    return member_b, job, went_to_service


def test_group_files_honour_the_permission_policy(tap, tmp_path, figures):
    with figures.case("security", "group cache: modes after publishing"):
        group, job = published(tap, tmp_path, 31)
        entries = list(group.rglob("*"))
        assert any(p.is_file() for p in entries) and any(p.is_dir() for p in entries)
        for path in entries:
            mode = path.lstat().st_mode
            assert not mode & stat.S_IWOTH, f"{path} is world-writable ({oct(mode)})"
            if path.is_dir():
                assert mode & stat.S_ISGID, f"{path} lacks setgid ({oct(mode)})"
                assert mode & stat.S_IRGRP and mode & stat.S_IXGRP
            else:
                assert mode & stat.S_IRGRP, f"{path} is not group-readable"
        for path in (tmp_path / "member_a" / "objects").rglob("*"):
            assert not path.lstat().st_mode & stat.S_IWOTH, f"{path} is world-writable"


def test_object_with_a_bad_checksum_is_never_served(tap, tmp_path, figures):
    with figures.case("security", "group cache: bad checksum never served"):
        group, job = published(tap, tmp_path, 32)
        obj = group / layout.object_path(job.record["parquet_sha256"])
        data = bytearray(obj.read_bytes())
        data[100] ^= 0xFF
        os.chmod(obj, 0o644)
        obj.write_bytes(bytes(data))
        member_b, served, went = colleague(tap, tmp_path, group, 32)
        assert went, "the bad object was not served: the service answered"
        assert served.record["layer"] == "personal"
        assert member_b.store.verify(served.record["parquet_sha256"])


def test_manifest_naming_a_path_is_rejected(tap, tmp_path, figures):
    with figures.case("security", "group cache: manifest naming ../ paths"):
        group, job = published(tap, tmp_path, 33)
        (manifest,) = [p for p in (group / layout.MANIFESTS).rglob("*.json")]
        doc = json.loads(manifest.read_text())
        for role in layout.ROLES:
            doc["objects"][role]["sha256"] = "../../../../../../etc/passwd"
        os.chmod(manifest, 0o644)
        manifest.write_text(json.dumps(doc))
        member_b, served, went = colleague(tap, tmp_path, group, 33)
        assert went and served.record["layer"] == "personal"


def _link_out(group: Path, sha: str, target: Path) -> Path:
    obj = group / layout.object_path(sha)
    obj.unlink()
    obj.symlink_to(target)
    return obj


def test_object_linked_out_of_the_group_is_not_read(tap, tmp_path, figures):
    group, job = published(tap, tmp_path, 34)
    sha = job.record["parquet_sha256"]
    outside = tmp_path / "outside" / "copy.parquet"
    outside.parent.mkdir()
    outside.write_bytes((group / layout.object_path(sha)).read_bytes())
    with figures.case("security", "group cache: object linked out of the group"):
        _link_out(group, sha, outside)
        member_b, served, went = colleague(tap, tmp_path, group, 34)
        assert went and served.record["layer"] == "personal", "served through a link out"
        assert outside.exists(), "the file outside the group is left alone"


def test_oversized_group_object_never_breaks_a_colleagues_submit(tap, tmp_path, small_disk,
                                                                figures):
    """An object far larger than its manifest says, on a colleague's small disk: refused (the
    copy runs out of room and is dropped), the query goes to the service, no StorageFull."""
    group, job = published(tap, tmp_path, 35)
    obj = group / layout.object_path(job.record["result_sha256"])
    os.chmod(obj, 0o644)
    with open(obj, "ab") as fh:
        fh.write(b"\0" * (8 << 20))  # 8 MiB more than the manifest says, on a 3 MiB disk
    with figures.case("security", "group cache: oversized object on a small disk"):
        try:
            member_b, served, went = colleague(tap, tmp_path, group, 35, root=small_disk / "member_b")
        except JobdeskError as exc:
            pytest.fail(f"a group object broke the colleague's submit: {exc!r}")
        assert went and served.record["layer"] == "personal"
        assert not list((small_disk / "member_b" / "tmp").iterdir()), "the partial copy is gone"

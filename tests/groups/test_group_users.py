"""Two real Unix users in one group share a group directory; a third, outside it, cannot write.

Needs root (to create the accounts with useradd/groupadd, and to run each user's desk in a
process that has become that user); skipped with that reason otherwise. The accounts are
removed afterwards.
"""

from __future__ import annotations

import os
import shutil
import tempfile
from pathlib import Path

import pytest

from group_support import UnixAccounts, mode, run_as
from jobdesk import Desk, Group
from jobdesk.errors import PublishRefused
from jobdesk.groups import layout, maintain
from jobdesk.groups.layer import GroupLayer

pytestmark = [
    pytest.mark.skipif(not hasattr(os, "geteuid") or os.geteuid() != 0,
                       reason="creates Unix users and a group: run as root (CI does)"),
    pytest.mark.skipif(shutil.which("useradd") is None or shutil.which("groupadd") is None,
                       reason="needs useradd and groupadd"),
]

QUERY = "SELECT TOP {n} orrery_id, ra FROM orrery.sources ORDER BY orrery_id"


@pytest.fixture(scope="module")
def accounts():
    made = UnixAccounts()
    try:
        made.add("a", member=True)
        made.add("b", member=True)
        made.add("c", member=False)
        yield made
    finally:
        made.remove()


@pytest.fixture
def shared(tmp_path_factory, accounts, tap):
    """A directory every test user may enter (pytest's own temp root is private to root)."""
    base = Path(tempfile.mkdtemp(prefix="jobdesk-users-"))
    base.chmod(0o755)
    group_dir = base / "group"
    maintain.init_group(str(group_dir), name="lab", unix_group=accounts.group, umask=0o002)
    for role, (uid, gid) in accounts.users.items():
        home = base / f"home-{role}"
        home.mkdir()
        os.chown(home, uid, gid)
    # Warm up: import everything a story needs while still root (children cannot read /root).
    warm = Desk(base / "warm", groups=[str(base / "warm-group")], wait_window=5)
    warm.submit(tap.url, QUERY.format(n=3)).wait(progress=False).provenance()
    yield base
    shutil.rmtree(base, ignore_errors=True)


def _story(root, groups, url, query, publish_after):
    desk = Desk(root, groups=groups, wait_window=5)
    job = desk.submit(url, query).wait(progress=False)
    out = {"layer": job.record["layer"], "rows": len(job.table()), "id": job.id,
           "sha": job.record["parquet_sha256"], "served": job.provenance().get("served")}
    if publish_after:
        try:
            desk.publish(job.id)
            out["publish"] = "ok"
        except PublishRefused as exc:
            out["publish"] = str(exc)
    return out


def test_a_result_of_one_member_serves_another(tap, shared, accounts):
    group_dir = str(shared / "group")
    a_uid, _ = accounts.users["a"]
    b_uid, _ = accounts.users["b"]
    a = run_as(a_uid, accounts.gid, _story, str(shared / "home-a" / "desk"), [group_dir],
               tap.url, QUERY.format(n=140), False, home=str(shared / "home-a"))
    assert a["ok"]["layer"] == "personal" and a["ok"]["rows"] == 140
    assert a["warnings"] == []

    before = tap.stats()["requests"]
    b = run_as(b_uid, accounts.gid, _story, str(shared / "home-b" / "desk"),
               [Group(group_dir, readonly=True)], tap.url, QUERY.format(n=140), True,
               home=str(shared / "home-b"))
    assert tap.stats()["requests"] == before, "B was served with no request to the service"
    assert b["ok"]["layer"] == "lab" and b["ok"]["rows"] == 140
    assert b["ok"]["served"].startswith("served from group cache lab, published by jda")
    assert "read-only here" in b["ok"]["publish"]


def test_what_a_member_writes_follows_the_policy_exactly(tap, shared, accounts):
    group_dir = shared / "group"
    a_uid, _ = accounts.users["a"]
    run_as(a_uid, accounts.gid, _story, str(shared / "home-a" / "desk"), [str(group_dir)],
           tap.url, QUERY.format(n=150), False, home=str(shared / "home-a"))
    # The child ran with umask 077; the group's policy (umask 0002) still decides the bits.
    written = [p for sub in (layout.OBJECTS, layout.MANIFESTS)
               for p in (group_dir / sub).rglob("*") if p.is_file()]
    assert len(written) == 3   # two objects and one manifest
    for path in written:
        assert path.stat().st_uid == a_uid
        assert path.stat().st_gid == accounts.gid
        assert mode(path) == 0o664, f"{path}: {mode(path):o}"
    for path in [p for p in group_dir.rglob("*") if p.is_dir()] + [group_dir]:
        assert path.stat().st_gid == accounts.gid
        assert mode(path) == 0o2775, f"{path}: {mode(path):o}"   # setgid, group-writable
    assert maintain.verify(GroupLayer(Group(str(group_dir)))).problems == []


def test_a_user_outside_the_group_reads_but_cannot_publish(tap, shared, accounts):
    c_uid, c_gid = accounts.users["c"]
    out = run_as(c_uid, c_gid, _story, str(shared / "home-c" / "desk"),
                 [str(shared / "group")], tap.url, QUERY.format(n=160), True,
                 home=str(shared / "home-c"))
    assert out["ok"]["rows"] == 160, "the submit itself succeeds"
    assert any("the result stays personal, publishing failed" in w and "may not write" in w
               for w in out["warnings"])
    assert "may not write to group cache lab" in out["ok"]["publish"]
    assert not list((shared / "group" / layout.MANIFESTS).rglob("*.json"))


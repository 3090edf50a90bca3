"""A group cache shared by several desks: serving, publishing, corruption, claims, maintenance.

Every test runs twice: on a local directory and on a bucket of a real S3-speaking server (moto
in server mode on loopback). Real HTTP to the embedded TAP service, real SQLite, real files.
"""

from __future__ import annotations

import json
import os
import time
import warnings

import pytest

from jobdesk import Desk, Group, phases
from jobdesk.errors import GroupCacheWarning, PublishRefused, ResultTruncatedWarning
from jobdesk.groups import layout, maintain
from jobdesk.groups.layer import GroupLayer

QUERY = "SELECT TOP {n} orrery_id, ra, dec FROM orrery.sources ORDER BY orrery_id"


def _query(n: int) -> str:
    return QUERY.format(n=n)


def _requests(tap) -> int:
    return tap.stats()["requests"]


def _created(tap) -> int:
    return tap.stats()["jobs_created"]


def _desk(tmp_path, name, *groups) -> Desk:
    return Desk(tmp_path / name, groups=list(groups), wait_window=5)


# --- serving a colleague's result -----------------------------------------------------------


def test_published_result_serves_a_colleague_without_the_service(tap, tmp_path, place):
    member_a = _desk(tmp_path, "member_a", place.group(readonly=False))
    first = member_a.submit(tap.url, _query(1200), label="first").wait(progress=False)
    assert len(place.manifests()) == 1
    before = _requests(tap)

    member_b = _desk(tmp_path, "member_b", place.group(readonly=True))
    with warnings.catch_warnings():
        warnings.simplefilter("error", GroupCacheWarning)
        job = member_b.submit(tap.url, _query(1200))
    assert _requests(tap) == before, "served from the group: no request to the service"
    assert job.phase == phases.COMPLETED and job.record["layer"] == "lab"
    assert list(job.table()["orrery_id"]) == list(first.table()["orrery_id"])
    # The copy member B serves is their own, and it is the very file member A fetched.
    assert job.record["result_sha256"] == first.record["result_sha256"]
    assert member_b.store.verify(job.record["parquet_sha256"])
    prov = job.provenance()
    assert prov["lookup_order"] == ["personal", "lab"]
    assert prov["served"].startswith("served from group cache lab, published by ")
    assert prov["group"]["published"] and "@" in prov["group"]["publisher"]
    assert prov["served_from"] == "lab"
    # The sidebar lists it with its layer; a second submit is a plain personal hit.
    assert [j.record["layer"] for j in member_b.jobs()] == ["lab"]
    assert member_b.submit(tap.url, _query(1200)).id == job.id
    assert _requests(tap) == before
    layers = {layer["name"]: layer for layer in member_b.cache_summary()["layers"]}
    assert layers["lab"]["entries"] == 1 and layers["lab"]["readonly"] is True


def test_lookup_order_is_the_order_given(tap, tmp_path, place):
    other = Group(str(tmp_path / "other-group"), readonly=False, name="other")
    one = _desk(tmp_path, "one", other)
    one.submit(tap.url, _query(300)).wait(progress=False)
    two = _desk(tmp_path, "two", place.group(readonly=False))
    two.submit(tap.url, _query(300), refresh=True).wait(progress=False)
    before = _requests(tap)
    reader = _desk(tmp_path, "reader", place.group(readonly=True),
                   Group(str(tmp_path / "other-group"), readonly=True, name="other"))
    job = reader.submit(tap.url, _query(300))
    assert job.record["layer"] == "lab" and _requests(tap) == before
    backwards = _desk(tmp_path, "backwards", Group(str(tmp_path / "other-group"), name="other"),
                      place.group(readonly=True))
    assert backwards.submit(tap.url, _query(300)).record["layer"] == "other"
    assert backwards.job(backwards.jobs()[0].id).provenance()["lookup_order"] == \
        ["personal", "other", "lab"]


def test_read_only_layer_never_publishes(tap, tmp_path, place):
    member_b = _desk(tmp_path, "member_b", place.group(readonly=True))
    job = member_b.submit(tap.url, _query(50)).wait(progress=False)
    assert job.rows == 50
    assert place.manifests() == [], "a read-only layer wrote nothing"
    with pytest.raises(PublishRefused, match="read-only"):
        member_b.publish(job.id)
    with pytest.raises(PublishRefused, match=r"group cache lab \(.*\) is read-only here"):
        member_b.publish(job.id, group="lab")
    assert place.files("") == []


def test_only_complete_results_are_published_and_opt_out_is_honoured(tap, tmp_path, place):
    member_a = _desk(tmp_path, "member_a", place.group(readonly=False))
    with pytest.warns(ResultTruncatedWarning):
        cut = member_a.submit(tap.url, _query(500), maxrec=20).wait(progress=False)
    assert cut.truncated
    private = member_a.submit(tap.url, _query(40), publish=False).wait(progress=False)
    assert private.rows == 40
    assert place.manifests() == []
    with pytest.raises(PublishRefused, match="no complete result"):
        member_a.publish(cut.id)
    # Published later on purpose: a manifest with the record's facts, written last.
    where = member_a.publish(private.id)
    rel = where.split(":", 1)[1]
    manifest = layout.parse_manifest(place.storage.read(rel), key=private.key)
    assert manifest["rows"] == 40 and manifest["truncated"] is False
    assert manifest["overflow"] is False   # the flag's first name, still written for older readers
    assert manifest["objects"]["votable"]["sha256"] == private.record["result_sha256"]
    assert manifest["objects"]["votable"]["bytes"] == private.record["result_bytes"]
    assert manifest["canonical"] == private.record["canonical"]
    assert manifest["service"] == private.record["service"]
    assert manifest["format"] == layout.FORMAT


def test_second_result_for_a_key_is_a_second_manifest(tap, tmp_path, place):
    member_a = _desk(tmp_path, "member_a", place.group(readonly=False))
    a = member_a.submit(tap.url, _query(77)).wait(progress=False)
    b = member_a.submit(tap.url, _query(77), refresh=True).wait(progress=False)
    assert a.key == b.key and a.id != b.id
    names = place.manifests()
    assert len(names) == 2 and len({n.rsplit("/", 1)[0] for n in names}) == 1
    # Publishing the same result again adds nothing (same object, same manifest).
    assert member_a.publish(b.id).split(":", 1)[1] in names
    assert len(place.manifests()) == 2
    # The newest is served first.
    member_b = _desk(tmp_path, "member_b", place.group(readonly=True))
    assert member_b.submit(tap.url, _query(77)).record["result_sha256"] == b.record["result_sha256"]


def test_max_age_and_refresh_skip_old_group_results(tap, tmp_path, place):
    member_a = _desk(tmp_path, "member_a", place.group(readonly=False))
    member_a.submit(tap.url, _query(33)).wait(progress=False)
    time.sleep(0.05)
    member_b = _desk(tmp_path, "member_b", place.group(readonly=True))
    created = _created(tap)
    assert member_b.submit(tap.url, _query(33), max_age=0.01).record["layer"] == "personal"
    assert member_b.submit(tap.url, _query(34), refresh=True).record["layer"] == "personal"
    assert _created(tap) == created + 2


# --- corruption: detected, reported, never served, refetched ---------------------------------


def _published(tap, tmp_path, place, n):
    member_a = _desk(tmp_path, "member_a", place.group(readonly=False))
    job = member_a.submit(tap.url, _query(n)).wait(progress=False)
    (rel,) = place.manifests()
    return job, rel


def _refetches(tap, tmp_path, place, n, *, expect: str, readonly: bool = False):
    member_b = _desk(tmp_path, "member_b", place.group(readonly=readonly))
    created = _created(tap)
    with pytest.warns(GroupCacheWarning, match=expect) as seen:
        job = member_b.submit(tap.url, _query(n))
    assert job.record["layer"] == "personal"
    assert job.wait(progress=False).rows == n and len(job.table()) == n
    assert _created(tap) == created + 1, "the next submit went to the service"
    return member_b, job, [str(w.message) for w in seen]


def test_flipped_byte_in_an_object_is_quarantined_and_refetched(tap, tmp_path, place):
    job, _ = _published(tap, tmp_path, place, 60)
    obj = layout.object_path(job.record["parquet_sha256"])
    place.flip_byte(obj)
    member_b, again, messages = _refetches(tap, tmp_path, place, 60,
                                      expect="does not match its checksum")
    assert any(place.location in m and obj in m for m in messages), "the path is reported"
    assert not place.storage.exists(obj), "set aside, never served again"
    assert any(r.startswith(f"{layout.QUARANTINE}/{obj}") for r in place.files(layout.QUARANTINE))
    assert len(place.manifests()) == 2, "the refetched result was published again"
    carol = _desk(tmp_path, "carol", place.group(readonly=True))
    with warnings.catch_warnings():
        warnings.simplefilter("error", GroupCacheWarning)
        served = carol.submit(tap.url, _query(60))
    assert served.record["layer"] == "lab" and carol.store.verify(served.record["parquet_sha256"])


def test_read_only_member_notes_corruption_locally(tap, tmp_path, place):
    job, _ = _published(tap, tmp_path, place, 61)
    obj = layout.object_path(job.record["result_sha256"])
    place.flip_byte(obj, at=7)
    member_b, _, _ = _refetches(tap, tmp_path, place, 61, expect="does not match", readonly=True)
    assert place.storage.exists(obj), "a read-only member moves nothing"
    notes = (tmp_path / "member_b" / "group-state" / "quarantine.jsonl").read_text().splitlines()
    assert json.loads(notes[0])["path"].endswith(obj)


def test_truncated_manifest_is_rejected_and_refetched(tap, tmp_path, place):
    _, rel = _published(tap, tmp_path, place, 62)
    place.truncate(rel, keep=200)
    _refetches(tap, tmp_path, place, 62, expect="manifest rejected: not valid JSON")
    assert not place.storage.exists(rel)
    assert any(r.startswith(f"{layout.QUARANTINE}/{rel}") for r in place.files(layout.QUARANTINE))


def test_manifest_pointing_at_a_missing_object_is_not_served(tap, tmp_path, place):
    job, rel = _published(tap, tmp_path, place, 63)
    place.storage.remove(layout.object_path(job.record["result_sha256"]))
    _, again, _ = _refetches(tap, tmp_path, place, 63, expect="which is missing")
    report = maintain.verify(GroupLayer(place.group(readonly=True)))
    assert report.manifests == 2
    if again.record["result_sha256"] == job.record["result_sha256"]:
        assert report.problems == []   # member_b's publish put the same bytes back
    else:
        assert len(report.problems) == 1 and "is missing" in report.problems[0]


def test_manifest_claiming_truncation_or_newer_format_is_never_served(tap, tmp_path, place):
    _, rel = _published(tap, tmp_path, place, 64)
    manifest = json.loads(place.storage.read(rel))
    # A manifest of an older writer names the flag only ``overflow``: read in its place.
    legacy = {k: v for k, v in manifest.items() if k != "truncated"}
    assert layout.parse_manifest(json.dumps(legacy).encode())["rows"] == manifest["rows"]
    for name in ("truncated", "overflow"):
        with pytest.raises(layout.ManifestInvalid, match="marked truncated"):
            layout.parse_manifest(json.dumps(dict(manifest, **{name: True})).encode())
    with pytest.raises(layout.ManifestInvalid, match="marked truncated"):
        layout.parse_manifest(json.dumps({k: v for k, v in legacy.items()
                                          if k != "overflow"}).encode())
    place.storage.put_bytes(rel, json.dumps(dict(manifest, truncated=True)).encode())
    _refetches(tap, tmp_path, place, 64, expect="marked truncated", readonly=True)
    place.storage.put_bytes(rel, json.dumps(dict(manifest, format=layout.FORMAT + 1)).encode())
    with pytest.warns(GroupCacheWarning, match="newer than this jobdesk reads"):
        assert _desk(tmp_path, "dan", place.group(readonly=True)).submit(
            tap.url, _query(64)).record["layer"] == "personal"


def test_group_listing_in_the_index_fetches_verified_on_first_use(tap, tmp_path, place):
    member_a = _desk(tmp_path, "member_a", place.group(readonly=False))
    good = member_a.submit(tap.url, _query(65)).wait(progress=False)
    member_a.submit(tap.url, _query(66)).wait(progress=False)
    member_b = _desk(tmp_path, "member_b", place.group(readonly=True))
    added = member_b.groups.add_to_index(member_b.index)
    assert added == 2 and member_b.groups.add_to_index(member_b.index) == 0   # idempotent
    assert {j.record["layer"] for j in member_b.jobs()} == {"lab"}
    before = _requests(tap)
    job = member_b.submit(tap.url, _query(65))
    assert job.id in {j.id for j in member_b.jobs()} and _requests(tap) == before
    assert list(job.table()["orrery_id"]) == list(good.table()["orrery_id"])
    assert member_b.store.verify(job.record["parquet_sha256"])


# --- in-flight sharing --------------------------------------------------------------------------


def test_identical_submission_joins_a_running_job_announced_in_the_group(tmp_path, place):
    from jobdesk.localtap import serve
    with serve(state=tmp_path / "slow-tap", rows=500, exec_delay=1.5) as slow:
        member_a = _desk(tmp_path, "member_a", place.group(readonly=False))
        running = member_a.submit(slow.url, _query(90))
        assert running.record["job_url"]
        (claim,) = place.files(layout.CLAIMS)
        assert json.loads(place.storage.read(claim))["job_url"] == running.record["job_url"]
        member_b = _desk(tmp_path, "member_b", place.group(readonly=False))
        joined = member_b.submit(slow.url, _query(90))
        assert joined.record["job_url"] == running.record["job_url"]
        assert joined.wait(progress=False).rows == 90
        assert running.wait(progress=False).rows == 90
        assert slow.stats()["jobs_created"] == 1, "one job on the service for two members"
        assert place.files(layout.CLAIMS) == [], "claims are withdrawn when the job ends"


def test_stale_claim_is_ignored(tap, tmp_path, place):
    key_job = _desk(tmp_path, "probe", place.group(readonly=True)).submit(
        tap.url, _query(91), publish=False)
    stale = {"kind": "jobdesk-group-claim", "key": key_job.key, "service": key_job.record["service"],
             "job_url": key_job.record["service"] + "/async/gone", "claimant": "ghost@nowhere:1",
             "heartbeat": time.time() - layout.DEFAULT_CLAIM_STALE - 5}
    place.storage.put_bytes(layout.claim_path(key_job.key), json.dumps(stale).encode())
    created = _created(tap)
    job = _desk(tmp_path, "member_b", place.group(readonly=False)).submit(tap.url, _query(91))
    assert job.record["job_url"] != stale["job_url"]
    assert job.wait(progress=False).rows == 91 and _created(tap) == created + 1


# --- maintenance ---------------------------------------------------------------------------------


def test_prune_dry_run_then_real_keeps_everything_a_manifest_references(tap, tmp_path, place):
    member_a = _desk(tmp_path, "member_a", place.group(readonly=False))
    kept = member_a.submit(tap.url, _query(70)).wait(progress=False)
    layer = GroupLayer(place.group(readonly=False))
    orphan = layout.object_path("0" * 64)
    place.storage.put_bytes(orphan, b"no manifest names this")
    everything = place.files("")
    report = maintain.prune(layer, grace=0, dry_run=True)
    assert report.removed == [orphan] and place.files("") == everything, "dry run deletes nothing"
    report = maintain.prune(layer, grace=0, dry_run=False)
    assert report.removed == [orphan] and not place.storage.exists(orphan)
    for sha in (kept.record["result_sha256"], kept.record["parquet_sha256"]):
        assert place.storage.exists(layout.object_path(sha))
    # Old manifests go only when asked, and then their objects with them.
    report = maintain.prune(layer, older_than=0, grace=0, dry_run=False)
    assert place.manifests() == [] and place.files(layout.OBJECTS) == []
    assert maintain.verify(layer).problems == []


def test_verify_reports_every_kind_of_damage(tap, tmp_path, place):
    member_a = _desk(tmp_path, "member_a", place.group(readonly=False))
    one = member_a.submit(tap.url, _query(71)).wait(progress=False)
    member_a.submit(tap.url, _query(72)).wait(progress=False)
    layer = GroupLayer(place.group(readonly=True))
    assert maintain.verify(layer).problems == []
    first, second = place.manifests()
    place.flip_byte(layout.object_path(one.record["result_sha256"]))
    place.truncate(second, keep=10)
    problems = maintain.verify(layer).problems
    assert any("does not match" in p for p in problems)
    assert any(second in p and "JSON" in p for p in problems)
    assert len(problems) == 2


def test_world_writable_policy_is_refused(tmp_path):
    with pytest.raises(ValueError, match="world-writable"):
        maintain.init_group(str(tmp_path / "open"), umask=0o000)
    maintain.init_group(str(tmp_path / "closed"), umask=0o022)
    policy = json.loads((tmp_path / "closed" / layout.GROUP_FILE).read_text())
    assert policy["umask"] == "0022" and policy["format"] == layout.FORMAT


def test_config_file_and_command_line(tap, tmp_path, capsys):
    from jobdesk.cli import main
    group_dir = tmp_path / "shared"
    assert main(["group", "init", str(group_dir), "--name", "lab"]) == 0
    member_a = Desk(tmp_path / "member_a", groups=[str(group_dir)], wait_window=5)
    member_a.submit(tap.url, _query(80)).wait(progress=False)
    root = tmp_path / "member_b"
    root.mkdir()
    (root / "config.toml").write_text(f'[[groups]]\nlocation = "{group_dir}"\nreadonly = true\n')
    assert Desk(root).groups.names == ["lab"]
    assert Desk(root, groups=[]).groups.names == [], "Desk(groups=...) overrides the file"
    capsys.readouterr()
    assert main(["--root", str(root), "group", "add-to-index"]) == 0
    assert "1 group results newly listed" in capsys.readouterr().out
    assert main(["--root", str(root), "group", "rebuild-index"]) == 0   # the old name, hidden
    assert "0 group results newly listed" in capsys.readouterr().out
    assert main(["--root", str(root), "group", "verify", "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["problems"] == []
    (group_dir / layout.object_path("f" * 64)).parent.mkdir(parents=True, exist_ok=True)
    (group_dir / layout.object_path("f" * 64)).write_bytes(b"stray")
    os.utime(group_dir / layout.object_path("f" * 64), (0, 0))   # older than the grace time
    assert main(["--root", str(root), "group", "prune", "--dry-run"]) == 0
    assert f"would remove: {layout.object_path('f' * 64)}" in capsys.readouterr().out
    assert (group_dir / layout.object_path("f" * 64)).exists()
    assert main(["--root", str(root), "cache", "--json"]) == 0
    layers = json.loads(capsys.readouterr().out)["layers"]
    assert [layer["name"] for layer in layers] == ["personal", "lab"]

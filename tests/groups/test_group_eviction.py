"""The personal cache by size and age, with pins: a record goes together with its files."""

from __future__ import annotations

import time

from jobdesk import Desk

QUERY = "SELECT TOP {n} orrery_id, ra, dec FROM orrery.sources ORDER BY orrery_id"


def test_prune_by_age_and_size_spares_pins_and_shared_files(tap, tmp_path):
    desk = Desk(tmp_path / "desk", groups=[], wait_window=5)
    old = desk.submit(tap.url, QUERY.format(n=300)).wait(progress=False)
    kept = desk.submit(tap.url, QUERY.format(n=301)).wait(progress=False)
    new = desk.submit(tap.url, QUERY.format(n=302)).wait(progress=False)
    desk.pin(kept.id)
    desk.index.update(old.id, finished=time.time() - 7200)
    desk.index.update(kept.id, finished=time.time() - 7200)
    files = set(desk.store.objects.rglob("*"))
    old_files = {old.record["result_sha256"], old.record["parquet_sha256"]}

    plan = desk.prune(older_than=3600)
    assert plan["dry_run"] and plan["dropped"] == [old.id]
    assert set(desk.store.objects.rglob("*")) == files, "a dry run deletes nothing"
    assert set(plan["removed"]) == old_files

    done = desk.prune(older_than=3600, dry_run=False)
    assert done["dropped"] == [old.id] and done["freed"] > 0
    assert {j.id for j in desk.jobs()} == {kept.id, new.id}
    assert not any(desk.store.has(sha) for sha in old_files)
    for job in (kept, new):
        assert len(job.table()) in (301, 302), "what records still use is intact"

    # By size: the newest unpinned record goes only when the pinned one alone is over budget.
    plan = desk.prune(max_bytes=1, dry_run=False)
    assert plan["dropped"] == [new.id]
    assert [j.id for j in desk.jobs()] == [kept.id] and len(kept.table()) == 301
    desk.pin(kept.id, pinned=False)
    assert desk.prune(max_bytes=1)["dropped"] == [kept.id]

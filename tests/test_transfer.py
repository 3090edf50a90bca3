"""Fetch progress: bytes and rows so far, a percentage when the length is known, recorded in
the index for the sidebar and handed to the waiting display; real HTTP to the embedded service."""

from __future__ import annotations

import pytest

from jobdesk import Desk, formats, transfer
from jobdesk import desk as desk_module
from jobdesk.localtap import serve
from jobdesk.progress import Progress
from jobdesk.transfer import FetchMeter


def test_meter_throttles_index_writes_but_tells_the_listener_everything():
    writes, heard, now = [], [], [0.0]
    meter = FetchMeter(writes.append, heard.append, every=0.5, clock=lambda: now[0])
    meter.length(1000)
    for step in range(10):
        now[0] = step * 0.1
        meter.bytes((step + 1) * 100)
    assert [h["bytes"] for h in heard] == [100 * k for k in range(1, 11)]
    assert heard[-1]["percent"] == 100.0
    assert len(writes) == 2  # t=0 and t=0.5
    meter.rows(500, read=250, size=1000)  # a new stage is recorded at once
    assert len(writes) == 3 and writes[-1]["stage"] == "convert"
    assert heard[-1] == {"stage": "convert", "bytes": 1000, "total": 1000, "rows": 500,
                         "percent": 25.0}
    meter.done()
    assert writes[-1] is None
    assert transfer.describe(heard[-1]) == "converting 500 rows (25 %)"
    assert transfer.describe({"stage": "download", "bytes": 2_000_000, "total": None,
                              "percent": None}) == "downloading 2.0 MB"


class Recorder(Progress):
    """Keeps every download figure the wait shows (the card and the line show the same words)."""

    seen: list[str] = []

    def _show_transfer(self) -> None:
        Recorder.seen.append(self.transfer_words())


# The job runs 2 s on the service, so the wait itself (not the first start-up pass, which may
# also fetch a job that finished at once) drives the download.
@pytest.fixture(scope="module")
def tap(tmp_path_factory):
    with serve(state=tmp_path_factory.mktemp("tap"), rows=60_000, exec_delay=2) as service:
        yield service


def test_wait_shows_download_and_conversion_progress(tap, tmp_path, monkeypatch):
    monkeypatch.setattr(desk_module, "_progress", lambda title, job_id=None: Recorder(title))
    Recorder.seen = []
    desk = Desk(tmp_path / "desk", wait_window=2)
    recorded = []  # what the fetch writes into the index row, for the sidebar and other waits
    update = desk.index.update

    def spy(job_id, **fields):
        if "fetch" in fields:
            recorded.append(fields["fetch"])
        return update(job_id, **fields)

    monkeypatch.setattr(desk.index, "update", spy)
    # A VOTable answer (BINARY2), so the cache's Parquet copy is a conversion with rows to count
    # (a VOParquet answer would only have its footer rewritten).
    job = desk.submit(tap.url, "SELECT orrery_id, ra, dec, mag_lime, mag_rose FROM "
                      "orrery.sources", fmt=formats.BINARY2).wait(timeout=120)
    notes = [n for n in Recorder.seen if n]
    downloads = [n for n in notes if n.startswith("downloading")]
    assert downloads, notes
    # The embedded service sends Content-Length (RFC 9110 §8.6), so a percentage shows.
    assert downloads[-1].endswith("(100 %)"), downloads[-1]
    total_mb = f"{job.record['result_bytes'] / 1e6:.1f} MB"
    assert f"of {total_mb}" in downloads[-1]
    # The index saw the download and the conversion, then nothing in flight.
    assert recorded[0]["stage"] == "download" and recorded[0]["total"] == job.record["result_bytes"]
    converts = [r for r in recorded if r and r["stage"] == "convert"]
    assert converts and converts[-1]["rows"] == 60_000 and converts[-1]["percent"] == 100.0
    assert recorded[-1] is None
    assert job.record["fetch"] is None  # nothing in flight once the result is cached
    assert job.record["rows"] == 60_000

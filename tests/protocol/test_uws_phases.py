"""Every UWS 1.1 phase and result-link form, met by the real client over real HTTP.

The service is tests/protocol/uws_server.py, written from UWS 1.1 (IVOA REC 2016-10-24); the
result is the typed VOTable of tests/exports/typed_votable.py.
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).parents[1] / "exports"))

import typed_votable  # noqa: E402
from uws_server import UwsServer  # noqa: E402

from jobdesk import Desk, phases  # noqa: E402
from jobdesk.errors import JobAborted, JobFailed, JobLost  # noqa: E402
from jobdesk.remote import Remote  # noqa: E402


@pytest.fixture
def uws():
    with UwsServer(typed_votable.votable()) as server:
        yield server


@pytest.fixture
def desk(tmp_path):
    return Desk(tmp_path / "desk", wait_window=5, attempts=2, timeout=10)


def _history(desk, job) -> list[str]:
    return [h["phase"] for h in desk.index.history(job.id)]


def test_held_job_is_sent_run_again_and_completes(uws, desk):
    job = desk.submit(uws.url, "SELECT * FROM hold_me").wait(timeout=60, progress=False)
    served = uws.job_for("hold_me")
    # UWS 1.1 §2.1.3: HELD waits for the client's PHASE=RUN; exactly one more was sent.
    assert job.phase == phases.COMPLETED and job.rows == typed_votable.ROWS
    assert len(served.runs) == 2
    assert phases.HELD in _history(desk, job)


def test_held_job_frees_its_slot_and_is_rerun_only_when_one_is_free(uws, tmp_path,
                                                                    monkeypatch):
    # Not a mock: the pause between RUNs to a HELD job is shortened so that only the slot rule
    # can hold a RUN back while the other job runs.
    import jobdesk.lifecycle
    monkeypatch.setattr(jobdesk.lifecycle, "HELD_RETRY", 0.0)
    desk = Desk(tmp_path / "d", limits={uws.url: 1}, wait_window=5, attempts=2, timeout=10)
    held = desk.submit(uws.url, "SELECT * FROM hold_thrice")
    deadline = time.monotonic() + 10
    while len(uws.job_for("hold_thrice").runs) < 2 and time.monotonic() < deadline:
        desk.step()          # the slot is free: HELD is answered with RUN (held again)
        time.sleep(0.1)
    assert desk.job(held.id).phase == phases.HELD
    # With the only slot's job HELD, a second job starts at once instead of waiting (a HELD
    # job holds no slot: it may stay HELD indefinitely).
    other = desk.submit(uws.url, "SELECT * FROM plain_second")
    assert other.phase != phases.UNSENT
    while desk.job(other.id).phase != phases.COMPLETED and time.monotonic() < deadline + 20:
        desk.step()          # drives both; the HELD one must get no RUN while the other runs
        time.sleep(0.05)
    second = uws.job_for("plain_second")
    busy = (second.runs[0], second.ended)
    desk.job(held.id).wait(timeout=60, progress=False)
    runs = uws.job_for("hold_thrice").runs
    assert desk.job(held.id).phase == phases.COMPLETED and len(runs) == 4
    assert not [t for t in runs if busy[0] <= t < busy[1]], (runs, busy)
    assert runs[-1] >= busy[1]


def test_suspended_job_is_waited_for_not_given_up(uws, desk):
    job = desk.submit(uws.url, "SELECT * FROM suspend_me").wait(timeout=60, progress=False)
    seen = _history(desk, job)
    assert job.phase == phases.COMPLETED
    assert phases.SUSPENDED in seen and seen.index(phases.SUSPENDED) < seen.index(phases.COMPLETED)
    # SUSPENDED resumes on the service's side (§2.1.3): no RUN is repeated for it.
    assert len(uws.job_for("suspend_me").runs) == 1


def test_unknown_phase_is_asked_again(uws, desk):
    job = desk.submit(uws.url, "SELECT * FROM unknown_for_a_while").wait(timeout=60,
                                                                         progress=False)
    assert job.phase == phases.COMPLETED
    assert phases.UNKNOWN in _history(desk, job)


def test_archived_job_ends_without_result_and_says_so(uws, desk):
    job = desk.submit(uws.url, "SELECT * FROM archive_me")
    with pytest.raises(JobLost) as failure:      # the result is gone: resubmitting is the way
        job.wait(timeout=60, progress=False)
    record = desk.job(job.id).record
    # ARCHIVED: "the job has been archived and results are no longer available" (§2.1.3)
    assert record["phase"] == phases.ARCHIVED and record["result_sha256"] is None
    assert "ARCHIVED" in str(failure.value)


@pytest.mark.parametrize("script", ["redirect", "relocate", "hostpath", "plain"])
def test_every_result_link_form_is_followed(uws, desk, script):
    """Relative after a redirected job URL, absolute to a redirecting path, host-relative,
    and absolute (UWS 1.1 §2.2.1: the result href may point anywhere; RFC 3986 §5 resolves a
    relative one against the URL the document came from)."""
    job = desk.submit(uws.url, f"SELECT * FROM links_{script}").wait(timeout=60, progress=False)
    assert job.phase == phases.COMPLETED, job.record["error"]
    assert job.rows == typed_votable.ROWS
    served = uws.job_for(f"links_{script}")
    fetched = {p for m, p in uws.log if m == "GET" and served.id in p and "async" not in p
               and "moved" not in p}
    expected = {"redirect": set(), "relocate": {f"/tap/stash/{served.id}",
                                                f"/tap/blob/{served.id}.vot"},
                "hostpath": {f"/files/{served.id}.vot"}, "plain": set()}[script]
    assert expected <= fetched
    if script == "redirect":
        assert ("GET", f"/tap/moved/{served.id}/results/result") in uws.log


def test_error_carries_the_services_message(uws, desk):
    job = desk.submit(uws.url, "SELECT * FROM fail_here")
    with pytest.raises(JobFailed) as failure:
        job.wait(timeout=60, progress=False)
    assert desk.job(job.id).phase == phases.ERROR
    assert "the worker ran out of scratch space" in str(failure.value)


def test_abort_by_the_service_is_reported(uws, desk):
    job = desk.submit(uws.url, "SELECT * FROM cancelled_there")
    with pytest.raises(JobAborted):
        job.wait(timeout=60, progress=False)
    assert desk.job(job.id).phase == phases.ABORTED


def test_every_phase_was_seen_by_the_client(uws, desk):
    """Across the scripted jobs the client meets every UWS 1.1 phase (§2.1.3)."""
    for word in ("hold", "suspend", "unknown", "plain"):
        desk.submit(uws.url, f"SELECT * FROM all_{word}").wait(timeout=60, progress=False)
    for word, error in (("archive", JobLost), ("fail", JobFailed), ("cancelled", JobAborted)):
        job = desk.submit(uws.url, f"SELECT * FROM all_{word}")
        with pytest.raises(error):
            job.wait(timeout=60, progress=False)
    seen = {h["phase"] for j in desk.jobs(limit=None) for h in desk.index.history(j.id)}
    # PENDING is passed before the first read (the client sends RUN right after creating).
    assert set(phases.UWS_PHASES) <= seen | {phases.PENDING}


def test_times_sent_to_the_service_use_the_z_form(uws):
    """DALI 1.1 §3.3.3: UTC timestamps end in Z (AFTER= of the job list, UWS 1.1 §2.2.2.1)."""
    from jobdesk import provenance
    remote = Remote(uws.url, attempts=1, timeout=10)
    remote.find(run_id="nobody", after=provenance.iso(time.time() - 60))
    after = [q["AFTER"] for q in uws.queries if "AFTER" in q]
    assert after and all(a.endswith("Z") and "+00:00" not in a for a in after)


def test_the_test_server_follows_the_uws_11_schema(uws, desk):
    """The test service itself checked against the UWS 1.1 REC schema (schemas/README.md)."""
    import requests
    from lxml import etree

    schemas = Path(__file__).parents[1] / "localtap" / "schemas"

    class Saved(etree.Resolver):
        def resolve(self, url, pubid, context):
            if "xlink" in url.lower():
                return self.resolve_filename(str(schemas / "xlink.xsd"), context)
            return None

    parser = etree.XMLParser(no_network=True)
    parser.resolvers.add(Saved())
    schema = etree.XMLSchema(etree.parse(str(schemas / "UWS-1.1.xsd"), parser))
    for word in ("plain", "fail"):
        job = desk.submit(uws.url, f"SELECT * FROM schema_{word}")
        with pytest.raises(JobFailed) if word == "fail" else _nothing():
            job.wait(timeout=60, progress=False)
        url = f"{uws.url}/async/{uws.job_for(f'schema_{word}').id}"
        schema.assertValid(etree.fromstring(requests.get(url, timeout=10).content))
    schema.assertValid(etree.fromstring(requests.get(f"{uws.url}/async", timeout=10).content))


class _nothing:
    def __enter__(self):
        return self

    def __exit__(self, *exc):
        return False


def test_provenance_carries_the_services_times_and_no_unset_parameter(uws, desk, tmp_path):
    import json

    import prov.model

    job = desk.submit(uws.url, "SELECT * FROM prov_plain").wait(timeout=60, progress=False)
    served = uws.job_for("prov_plain")
    prov_record = job.provenance()
    # startTime/endTime as the job document gave them (UWS 1.1 §2.2.1), in the DALI Z form.
    from uws_server import _iso
    assert prov_record["service_start"] == _iso(served.started)
    assert prov_record["service_end"] == _iso(served.ended)
    assert all(h["at"].endswith("Z") for h in prov_record["phase_history"])
    _, sidecar = job.export(tmp_path / "r.vot")
    text = sidecar.read_text()
    activity = next(iter(json.loads(text)["activity"].values()))
    assert activity["prov:startTime"] == _iso(served.started)
    assert activity["prov:endTime"] == _iso(served.ended)
    assert "jd:MAXREC" not in activity and '"None"' not in text     # MAXREC was never set
    doc = prov.model.ProvDocument.deserialize(content=text, format="json")   # W3C `prov`
    (act,) = doc.get_records(prov.model.ProvActivity)
    assert act.get_startTime().timestamp() == pytest.approx(served.started, abs=0.001)

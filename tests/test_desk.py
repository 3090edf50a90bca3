"""The durable job manager end to end: real HTTP to the embedded service, real SQLite files.

Each test names the user story of the job-manager issue it proves (numbers in brackets).
"""

from __future__ import annotations

import json
import multiprocessing as mp
import signal
import subprocess
import sys
import time
from datetime import datetime, timezone
from urllib.parse import parse_qs, urlsplit

import numpy as np
import pytest
import requests
from astropy.coordinates import SkyCoord
from astropy.io import fits
import astropy.units as u

from jobdesk import (
    Desk, JobLost, NotRepeatableWarning, QueryRejected, ResultTruncated, ResultTruncatedWarning,
    ServiceError, WaitTimeout,
)
from jobdesk import phases
from jobdesk.localtap import serve

ROWS = 3000
CONE = ("SELECT orrery_id, ra, dec, mag_lime, parallax FROM orrery.sources "
        "WHERE 1 = CONTAINS(POINT('ICRS', ra, dec), CIRCLE('ICRS', 150.0, 20.0, 25.0)) "
        "ORDER BY orrery_id")


@pytest.fixture(scope="module")
def tap(tmp_path_factory):
    with serve(state=tmp_path_factory.mktemp("tap"), rows=ROWS, exec_delay=0.3) as service:
        yield service


@pytest.fixture
def desk(tmp_path):
    return Desk(tmp_path / "desk", wait_window=5)


def _created(tap) -> int:
    return tap.stats()["jobs_created"]


def _requests(tap) -> int:
    return tap.stats()["requests"]


# --- [1] submit, wait, table -----------------------------------------------------------------


def test_submit_wait_table_keeps_units_and_matches_pyvo(tap, desk):
    import pyvo

    job = desk.submit(tap.url, CONE, label="cone")
    assert job.phase in phases.ACTIVE | {phases.COMPLETED}
    table = job.wait(progress=False).table()
    assert job.phase == phases.COMPLETED and job.rows == len(table) > 0
    assert str(table["ra"].unit) == "deg" and table["ra"].description
    # Independent client: pyvo reading the same service must give the same rows.
    reference = pyvo.dal.TAPService(tap.url).run_sync(CONE).to_table()
    assert list(table["orrery_id"]) == list(reference["orrery_id"])
    np.testing.assert_allclose(table["dec"], reference["dec"])
    # Independent geometry truth: astropy's separation (the cone radius is 25 deg).
    sep = SkyCoord(table["ra"], table["dec"], unit="deg").separation(
        SkyCoord(150.0, 20.0, unit="deg"))
    assert (sep <= 25 * u.deg).all()
    frame = job.frame()
    assert list(frame["orrery_id"]) == list(table["orrery_id"])


# --- [2] kernel restart and concurrent kernels share one server job --------------------------

_KERNEL = """
import sys
from jobdesk import Desk
job = Desk(sys.argv[1]).submit(sys.argv[2], sys.argv[3])
print(job.id, flush=True)
job.wait(progress=False)
"""


def test_killed_kernel_job_is_reattached_not_resubmitted(tmp_path):
    with serve(state=tmp_path / "tap", rows=ROWS, exec_delay=3.0) as tap:
        root = tmp_path / "desk"
        query = "SELECT TOP 5 orrery_id FROM orrery.sources ORDER BY orrery_id"
        child = subprocess.Popen([sys.executable, "-c", _KERNEL, str(root), tap.url, query],
                                 stdout=subprocess.PIPE, text=True)
        job_id = child.stdout.readline().strip()
        desk = Desk(root)
        for _ in range(100):
            if desk.job(job_id).record.get("job_url"):
                break
            time.sleep(0.05)
        child.send_signal(signal.SIGKILL)
        child.wait()
        again = desk.submit(tap.url, query)
        assert again.id == job_id
        assert again.wait(progress=False).rows == 5
        assert _created(tap) == 1, "no second server job"


def _submit_at(root, url, query, ready, go, out):
    desk = Desk(root)     # opened before the signal, so that the submissions really race
    ready.put(True)
    go.wait(60)
    out.put(desk.submit(url, query).id)


def test_two_kernels_at_once_share_one_server_job(tmp_path):
    with serve(state=tmp_path / "tap", rows=ROWS, exec_delay=0.5) as tap:
        root = tmp_path / "desk"
        Desk(root)
        # spawn, not fork: this process runs the service's threads, and a fork copies their locks
        ctx = mp.get_context("spawn")
        ready, go, out = ctx.Queue(), ctx.Event(), ctx.Queue()
        procs = [ctx.Process(target=_submit_at, args=(root, tap.url, CONE, ready, go, out))
                 for _ in range(4)]
        for p in procs:
            p.start()
        for _ in procs:
            ready.get(timeout=120)
        go.set()
        ids = {out.get(timeout=120) for _ in procs}
        for p in procs:
            p.join(30)
        assert len(ids) == 1
        assert _created(tap) == 1


# --- [3] cache hits, refresh, max_age --------------------------------------------------------


def test_cache_hit_needs_no_service(tmp_path):
    root = tmp_path / "desk"
    with serve(state=tmp_path / "tap", rows=ROWS, port=0) as tap:
        url = tap.url
        first = Desk(root).submit(url, CONE).wait(progress=False)
        rows = first.rows
    # The service is gone (stopped, port closed): the same query is answered from the cache.
    with pytest.raises(requests.ConnectionError):
        requests.get(url + "/availability", timeout=2)
    again = Desk(root).submit(url, "select ORRERY_ID, ra, dec, mag_lime, parallax\n"
                              "from orrery.sources -- same query, other spelling of keywords\n"
                              "where 1 = contains(point('ICRS', ra, dec), "
                              "circle('ICRS', 150.0, 20.0, 25.0)) order by orrery_id"
                              .replace("ORRERY_ID", "orrery_id"))
    assert again.id == first.id and again.rows == rows
    assert len(again.table()) == rows


def test_refresh_and_max_age_run_anew(tap, desk):
    first = desk.submit(tap.url, CONE + " ").wait(progress=False)
    before = _created(tap)
    assert desk.submit(tap.url, CONE).id == first.id
    assert desk.submit(tap.url, CONE, max_age=3600).id == first.id
    time.sleep(0.05)
    stale = desk.submit(tap.url, CONE, max_age=0.01)
    assert stale.id != first.id
    fresh = desk.submit(tap.url, CONE, refresh=True)
    assert fresh.id not in (first.id, stale.id)
    assert _created(tap) == before + 2


def test_no_request_reaches_the_service_on_a_hit(tap, desk):
    desk.submit(tap.url, CONE).wait(progress=False)
    before = _requests(tap)
    desk.submit(tap.url, CONE).table()
    assert _requests(tap) == before + 0


# --- [4] keys at the desk: what shares and what does not -------------------------------------


def test_identifier_case_and_literals_make_new_jobs(tap, desk):
    a = desk.submit(tap.url, "SELECT TOP 3 orrery_id FROM orrery.sources ORDER BY orrery_id")
    b = desk.submit(tap.url, "select top 3 orrery_id from orrery.sources order by orrery_id")
    c = desk.submit(tap.url, "SELECT TOP 3 ORRERY_ID FROM orrery.sources ORDER BY orrery_id")
    assert a.id == b.id != c.id
    # Services name output columns after the query's spelling, so the difference is real.
    assert c.wait(progress=False).table().colnames != a.wait(progress=False).table().colnames


def test_not_repeatable_query_warns(tap, desk):
    with pytest.warns(NotRepeatableWarning):
        desk.submit(tap.url, "SELECT TOP 3 orrery_id FROM orrery.sources")


# --- [5] overflow -----------------------------------------------------------------------------


def test_truncated_result_is_never_served_as_complete(tap, desk):
    # DALI 1.1 §4.4.1 (QUERY_STATUS=OVERFLOW after the table) is what the service writes.
    with pytest.warns(ResultTruncatedWarning, match="truncated at 50 rows"):
        job = desk.submit(tap.url, "SELECT orrery_id FROM orrery.sources ORDER BY orrery_id",
                          maxrec=50).wait(progress=False)
    assert job.truncated is True and job.rows == 50
    with pytest.raises(ResultTruncated, match="50 rows") as info:
        job.table()
    assert info.value.rows == 50 and "maxrec" in str(info.value)
    assert len(job.table(allow_truncated=True)) == 50
    full = desk.submit(tap.url, "SELECT orrery_id FROM orrery.sources ORDER BY orrery_id",
                       maxrec=ROWS + 10).wait(progress=False)
    assert full.truncated is False and len(full.table()) == ROWS


def test_the_progress_display_says_truncated(tap, desk, capsys):
    with pytest.warns(ResultTruncatedWarning):
        desk.submit(tap.url, "SELECT orrery_id FROM orrery.sources ORDER BY orrery_id",
                    maxrec=20).wait()
    last = capsys.readouterr().err.strip().splitlines()[-1]
    assert "COMPLETED" in last and "20 rows" in last and "truncated" in last


# --- [6] failures -----------------------------------------------------------------------------


def test_bad_adql_carries_the_services_message(tap, desk):
    with pytest.raises(QueryRejected) as info:
        # check=False: this is about the service's own words (the local check would stop it)
        desk.submit(tap.url, "SELECT orrery_id FORM orrery.sources",
                    check=False).wait(progress=False)
    text = str(info.value)
    assert "FORM" in text or "line" in text.lower()
    assert info.value.hint
    assert desk.jobs()[0].phase == phases.ERROR


def test_unknown_column_error(tap, desk):
    with pytest.raises(QueryRejected, match="no_such_col"):
        desk.submit(tap.url, "SELECT no_such_col FROM orrery.sources").wait(progress=False)


def test_overloaded_service_is_retried(tmp_path):
    with serve(state=tmp_path / "tap", rows=ROWS, fail_first=3) as tap:
        job = Desk(tmp_path / "d").submit(tap.url, CONE).wait(progress=False)
        assert job.phase == phases.COMPLETED
        assert job.record["requests"] >= 3 + 3  # the refused ones count too


def test_service_down_is_a_clear_error(desk):
    with pytest.raises(ServiceError) as info:
        Desk(desk.root, attempts=2).submit("http://127.0.0.1:9/tap", CONE)
    assert "127.0.0.1:9" in str(info.value) and info.value.hint


def test_job_destroyed_before_fetch_is_reported_lost(tmp_path):
    with serve(state=tmp_path / "tap", rows=ROWS, exec_delay=1.0) as tap:
        desk = Desk(tmp_path / "d")
        job = desk.submit(tap.url, CONE)
        tap.configure(lose_jobs=True)
        with pytest.raises(JobLost) as info:
            job.wait(progress=False)
        assert "resend" in str(info.value)  # the next step is named
        assert job.phase == phases.LOST
        tap.configure(lose_jobs=False)
        assert desk.submit(tap.url, CONE).id != job.id, "a lost job is not reused"


def test_wait_timeout_leaves_the_job_running(tmp_path):
    with serve(state=tmp_path / "tap", rows=ROWS, exec_delay=3.0) as tap:
        desk = Desk(tmp_path / "d")
        job = desk.submit(tap.url, CONE)
        with pytest.raises(WaitTimeout):
            job.wait(timeout=0.5, progress=False)
        assert job.phase in phases.ACTIVE
        assert job.wait(progress=False).phase == phases.COMPLETED


# --- [7] WAIT versus polling: requests per job -----------------------------------------------


@pytest.mark.parametrize("no_wait", [False, True])
def test_requests_per_job_are_counted(tmp_path, no_wait):
    with serve(state=tmp_path / "tap", rows=ROWS, exec_delay=2.0, no_wait=no_wait) as tap:
        job = Desk(tmp_path / "d", wait_window=10).submit(tap.url, CONE).wait(progress=False)
        spent = job.record["requests"]
        # Everything the service saw, but the one VOSI capabilities read per service, which
        # provenance uses and which is not charged to the job.
        assert spent == _requests(tap) - 1
        if not no_wait:
            # create + run + a couple of blocking WAITs + result (UWS 1.1 §2.2.1.2)
            assert spent <= 8
        else:
            assert spent > 4  # polling costs more requests


@pytest.mark.parametrize("queued", [0.0, 1.0])
def test_every_request_of_a_job_with_wait_traced(tmp_path, queued):
    """The requests of one job with WAIT, in order, on a service that starts jobs at once and
    on one that keeps them QUEUED a second first (performance case 4).

    create, RUN, one WAIT&PHASE=QUEUED (UWS 1.1 §2.2.3.5: a started job is typically QUEUED;
    §2.2.1.2: the read returns when it leaves QUEUED, at once if it already has), one
    WAIT&PHASE=EXECUTING that returns at COMPLETED, the result: 5.  That is one more than
    ``1 + duration/WAIT + 3`` allows a 1 s job: the read that shows the job EXECUTING, which
    the index (the sidebar, another process) would otherwise not learn before the job ends.
    The VOSI capabilities are read once per service and index, not per job.
    """
    session = requests.Session()
    seen: list[tuple[str, str, str | None]] = []   # (method, path, PHASE of a WAIT)

    def trace(response, *args, **kwargs):  # a response hook: every answer, redirects included
        parts = urlsplit(response.request.url)
        seen.append((response.request.method, parts.path,
                     parse_qs(parts.query).get("PHASE", [None])[0]))

    session.hooks["response"].append(trace)
    with serve(state=tmp_path / "tap", rows=ROWS, exec_delay=1.0, queue_delay=queued) as tap:
        desk = Desk(tmp_path / "d", session=session, wait_window=30)
        jobs = []
        for n in (1, 2):
            start = len(seen)
            job = desk.submit(tap.url, f"SELECT TOP {n} orrery_id FROM orrery.sources "
                                       "ORDER BY orrery_id").wait(progress=False)
            jobs.append((job, [(m, p.rsplit("/", 1)[-1] if "/async/" in p else p, w)
                               for m, p, w in seen[start:]]))
        served = _requests(tap)
    (first, first_trace), (second, trace) = jobs
    job_id = second.record["job_url"].rsplit("/", 1)[-1]
    assert trace == [("POST", "/tap/async", None),
                     ("POST", "phase", None),
                     ("GET", job_id, "QUEUED"),
                     ("GET", job_id, "EXECUTING"),
                     ("GET", "result", None)]
    assert [m for m, p, w in first_trace if p == "/tap/capabilities"] == ["GET"]
    assert first.record["requests"] == second.record["requests"] == len(trace) == 5
    assert served == 5 + 5 + 1                      # the two jobs and the one capabilities read
    history = [h["phase"] for h in desk.index.history(second.id)]
    assert history == ["UNSENT", "SUBMITTED", "EXECUTING", "COMPLETED"]


# --- [8] streaming, checksums, interrupted downloads -----------------------------------------


def test_interrupted_download_still_gives_the_verified_result(tmp_path):
    with serve(state=tmp_path / "tap", rows=ROWS, drop_result_after=5000,
               drop_result_times=2) as tap:
        desk = Desk(tmp_path / "d")
        job = desk.submit(tap.url, CONE).wait(progress=False)
        record = job.record
        raw = desk.store.path(record["result_sha256"])
        assert desk.store.verify(record["result_sha256"]) and desk.store.verify(
            record["parquet_sha256"])
        # The file equals a clean download of the same result.
        clean = requests.get(record["job_url"] + "/results/result").content
        assert raw.read_bytes() == clean
        assert not any(desk.store.tmp.iterdir()), "no partial file is left behind"


# --- [9] provenance ---------------------------------------------------------------------------


def test_provenance_and_exports(tap, desk, tmp_path):
    job = desk.submit(tap.url, CONE, label="cone").wait(progress=False)
    prov = job.provenance()
    assert prov["service"] == tap.url and prov["adql"] == CONE and prov["rows"] == job.rows
    assert [h["phase"] for h in prov["phase_history"]][-1] == phases.COMPLETED
    assert {c["name"]: c["unit"] for c in prov["columns"]}["ra"] == "deg"
    assert prov["software"]["astropy"] and prov["software"]["pyvo"]
    # The service's identity as its VOSI capabilities state it (VOSI 1.1 §3.2, TAPRegExt 1.0).
    caps = prov["server"]["capabilities"]
    assert caps["standard_id"].lower().startswith("ivo://ivoa.net/std/tap")
    assert caps["software"].startswith("jobdesk-localtap")
    assert "orrery.sources" in job.account() and str(job.rows) in job.account()
    out = tmp_path / "cone.fits"
    written = job.export(out)
    header = fits.getheader(out, 1)
    assert header["JDROWS"] == str(job.rows) and any("orrery" in h for h in header["HISTORY"])
    # FITS 4.0 §4.4.2.1: DATE is when the HDU was written; the job's end has a key of our own.
    written_at = datetime.fromisoformat(header["DATE"]).replace(tzinfo=timezone.utc)
    assert abs((datetime.now(timezone.utc) - written_at).total_seconds()) < 120
    assert header["JDDONE"] == job.provenance()["finished"][:19]
    # An independent reader of W3C PROV-JSON: the `prov` package.
    import prov.model
    doc = prov.model.ProvDocument.deserialize(content=written[1].read_text(), format="json")
    assert len(list(doc.get_records(prov.model.ProvActivity))) == 1
    assert len(list(doc.get_records(prov.model.ProvGeneration))) == 1


# --- [10] credentials never written -----------------------------------------------------------


def test_token_never_reaches_disk(tap, tmp_path):
    secret = "s3cr3t-token-value-0123456789"
    session = requests.Session()
    session.headers["Authorization"] = f"Bearer {secret}"
    desk = Desk(tmp_path / "d", session=session)
    job = desk.submit(tap.url, CONE).wait(progress=False)
    assert job.record["scope"] == "authenticated"
    job.export(tmp_path / "d" / "out.vot")
    for path in (tmp_path / "d").rglob("*"):
        if path.is_file():
            assert secret.encode() not in path.read_bytes(), path
    assert secret not in json.dumps(job.provenance())


# --- [12] per-service limit --------------------------------------------------------------------


def test_limit_holds_extra_jobs_locally_and_starts_them_in_order(tmp_path):
    with serve(state=tmp_path / "tap", rows=ROWS, exec_delay=1.0) as tap:
        desk = Desk(tmp_path / "d", limits={tap.url: 1})
        jobs = [desk.submit(tap.url, f"SELECT TOP {n} orrery_id FROM orrery.sources "
                                     "ORDER BY orrery_id") for n in (1, 2, 3)]
        assert [j.phase == phases.UNSENT for j in jobs] == [False, True, True]
        jobs[2].wait(progress=False)   # waiting on the last still starts them in order
        for j in jobs[:2]:
            j.wait(progress=False)
        started = [desk.job(j.id).record["submitted"] for j in jobs]
        assert started == sorted(started)
        assert [j.rows for j in jobs] == [1, 2, 3]


# --- [13] the command line --------------------------------------------------------------------


def test_cli_lists_shows_and_exports(tap, tmp_path):
    root = tmp_path / "d"
    job = Desk(root).submit(tap.url, CONE, label="cone").wait(progress=False)

    def cli(*args):
        return subprocess.run([sys.executable, "-m", "jobdesk.cli", "--root", str(root), *args],
                              capture_output=True, text=True, timeout=60)

    listed = json.loads(cli("list", "--json").stdout)
    assert [r["id"] for r in listed] == [job.id]
    assert job.id in cli("list").stdout
    shown = cli("show", job.id)
    assert "COMPLETED" in shown.stdout and "orrery.sources" in shown.stdout
    # show --json prints the same kind of object as list --json: the record.
    record = json.loads(cli("show", job.id, "--json").stdout)
    assert record == listed[0]
    provenance = json.loads(cli("show", job.id, "--provenance").stdout)
    assert provenance != record and provenance["adql"] == record["adql"]
    out = tmp_path / "x.parquet"
    assert cli("export", job.id, str(out)).returncode == 0 and out.exists()
    missing = cli("show", "nope")
    assert missing.returncode == 1 and "no job" in missing.stderr  # JobNotFound: status 1

    # Truncation reads "truncated" in the list, as in the API (``Job.truncated``), never "CUT".
    with pytest.warns(ResultTruncatedWarning):
        capped = Desk(root).submit(tap.url, CONE, maxrec=3, label="capped").wait(progress=False)
    line = next(l for l in cli("list").stdout.splitlines() if l.startswith(capped.id))
    assert " truncated " in line and "CUT" not in line.upper().replace("TRUNCATED", "")
    assert " 2 results " in cli("cache").stdout   # two results, four files (VOTable + Parquet)


def test_public_errors_are_exported_and_old_names_still_work():
    import jobdesk
    from jobdesk import errors
    for name in ("PublishRefused", "IndexBusy", "ConfigError", "GroupCacheWarning",
                 "ResultTruncated", "ResultTruncatedWarning"):
        assert name in jobdesk.__all__ and getattr(jobdesk, name) is getattr(errors, name)
    assert "TruncatedResultWarning" not in jobdesk.__all__
    for module in (jobdesk, errors):
        with pytest.warns(DeprecationWarning, match="use .*ResultTruncatedWarning"):
            assert module.TruncatedResultWarning is errors.ResultTruncatedWarning
    with pytest.raises(AttributeError):
        jobdesk.NoSuchName

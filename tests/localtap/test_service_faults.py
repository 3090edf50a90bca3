"""Each fault setting changes the service's behaviour as documented in docs/localtap.md."""

from __future__ import annotations

import time

import pytest
import requests
from lxml import etree

from jobdesk.localtap import spawn

UWS = "{http://www.ivoa.net/xml/UWS/v1.0}"
QUERY = "SELECT TOP 50 orrery_id, ra, dec FROM orrery.sources"


def create(http, base, **params):
    response = http.post(f"{base}/async", data={"LANG": "ADQL", "QUERY": QUERY, **params},
                         allow_redirects=False)
    assert response.status_code == 303
    return response.headers["Location"]


def finish(http, job_url, timeout=30):
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        phase = http.get(f"{job_url}/phase").text
        if phase not in ("PENDING", "QUEUED", "EXECUTING"):
            return phase
        time.sleep(0.05)
    raise AssertionError("job did not finish")


def test_fail_first_answers_503_with_retry_after(tap_factory, http):
    tap = tap_factory(fail_first=2)
    codes = [http.get(f"{tap.url}/availability") for _ in range(3)]
    assert [r.status_code for r in codes] == [503, 503, 200]
    assert codes[0].headers["Retry-After"] == "1"   # RFC 9110 §10.2.3
    tap.configure(status_429=1)
    limited = http.get(f"{tap.url}/availability")
    assert limited.status_code == 429 and limited.headers["Retry-After"] == "1"
    assert tap.stats()["refused"] == 3


def test_drop_result_after_cuts_the_download_then_range_resumes(tap_factory, http):
    tap = tap_factory(drop_result_after=300, drop_result_times=1)
    job_url = create(http, tap.url, PHASE="RUN")
    assert finish(http, job_url) == "COMPLETED"
    url = f"{job_url}/results/result"
    with pytest.raises(requests.exceptions.RequestException):
        response = http.get(url, stream=True)
        b"".join(response.iter_content(64))   # body shorter than Content-Length
    whole = http.get(url)   # drop_result_times=1: the next download is whole
    assert len(whole.content) == int(whole.headers["Content-Length"])
    tap.configure(drop_result_after=100, drop_result_times=None)
    received = b""
    for _ in range(100):   # every response is cut after 100 bytes: resume with Range
        response = http.get(url, headers={"Range": f"bytes={len(received)}-"}, stream=True)
        try:
            for chunk in response.iter_content(32):
                received += chunk
        except requests.exceptions.RequestException:
            pass
        if len(received) >= len(whole.content):
            break
    assert received == whole.content
    assert tap.stats()["dropped_downloads"] >= 2


def test_exec_and_queue_delays_hold_the_phases(tap_factory, http):
    tap = tap_factory(queue_delay=1.0, exec_delay=1.0)
    job_url = create(http, tap.url, PHASE="RUN")
    seen = []
    while True:
        phase = http.get(f"{job_url}/phase").text
        if not seen or seen[-1] != phase:
            seen.append(phase)
        if phase not in ("QUEUED", "EXECUTING"):
            break
        time.sleep(0.05)
    assert seen == ["QUEUED", "EXECUTING", "COMPLETED"]


def test_max_running_keeps_extra_jobs_queued(tap_factory, http):
    tap = tap_factory(max_running=1, exec_delay=30)
    first, second = create(http, tap.url, PHASE="RUN"), create(http, tap.url, PHASE="RUN")
    for _ in range(200):
        if http.get(f"{first}/phase").text == "EXECUTING":
            break
        time.sleep(0.02)
    assert http.get(f"{second}/phase").text == "QUEUED"
    http.post(f"{first}/phase", data={"PHASE": "ABORT"})
    for _ in range(200):
        if http.get(f"{second}/phase").text == "EXECUTING":
            break
        time.sleep(0.02)
    assert http.get(f"{second}/phase").text == "EXECUTING"
    http.post(f"{second}/phase", data={"PHASE": "ABORT"})


def test_no_wait_behaves_like_uws_1_0(tap_factory, http):
    tap = tap_factory(no_wait=True, exec_delay=30)
    job_url = create(http, tap.url, PHASE="RUN")
    doc = etree.fromstring(http.get(job_url, params={"WAIT": "30"}).content)   # answers at once
    assert doc.get("version") is None   # UWS 1.1 §2.2: 1.0 documents carry no version
    assert doc.find(f"{UWS}creationTime") is None
    assert etree.fromstring(http.get(f"{tap.url}/async").content).get("version") is None
    assert tap.stats()["wait_requests"] == 0
    http.post(f"{job_url}/phase", data={"PHASE": "ABORT"})


def test_lose_jobs_answers_404(tap_factory, http):
    tap = tap_factory()
    job_url = create(http, tap.url)
    assert http.get(job_url).status_code == 200
    tap.configure(lose_jobs=True)
    assert http.get(job_url).status_code == 404
    assert http.get(f"{job_url}/phase").status_code == 404
    tap.configure(lose_jobs=False)
    assert http.get(job_url).status_code == 200


def test_max_rec_lowers_the_limit_and_slow_response_delays(tap_factory, http):
    tap = tap_factory(max_rec=2)
    body = http.get(f"{tap.url}/sync", params={"QUERY": QUERY, "MAXREC": "10"}).text
    assert body.count("<TR>") == 2 and 'value="OVERFLOW"' in body
    tap.configure(slow_response=0.3)
    assert tap.stats()["faults"]["slow_response"] == 0.3
    assert http.get(f"{tap.url}/availability").status_code == 200


def test_unknown_fault_is_refused(tap_factory, http):
    tap = tap_factory()
    response = http.post(tap.url.replace("/tap", "/_localtap/faults"), json={"explode": True})
    assert response.status_code == 400 and "explode" in response.text


def test_spawned_service_restarts_mid_job(tmp_path, http):
    """The real command line: kill the process while a job executes, start it again on the same
    state directory and port; the finished job and its result are kept, the interrupted job is
    ERROR with a message that says why."""
    child = spawn(state=tmp_path / "state", rows=500)
    try:
        done = create(http, child.url, PHASE="RUN")
        assert finish(http, done) == "COMPLETED"
        result = http.get(f"{done}/results/result").content
        child.configure(exec_delay=60)
        running = create(http, child.url, PHASE="RUN")
        for _ in range(200):
            if http.get(f"{running}/phase").text == "EXECUTING":
                break
            time.sleep(0.02)
        old_url = child.url
        child.restart(hard=True)   # SIGKILL, like a crash
        assert child.url == old_url
        assert http.get(f"{done}/results/result").content == result
        assert http.get(f"{running}/phase").text == "ERROR"
        assert child.stats()["restart"]["stopped"] == [running.rsplit("/", 1)[1]]
    finally:
        child.stop()
    assert child.process.poll() is not None

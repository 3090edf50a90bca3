"""The REST API of the jupyter_server extension, over real HTTP to a real Jupyter server.

The records listed here are written through ``jobdesk.index.Index`` into the same SQLite file
the server reads (as a kernel would write them); services in these records are invented
addresses that are never contacted.
"""

from __future__ import annotations

import hashlib
import threading
import time

import pytest
import requests

from jobdesk.index import Index
from jupyter_launch import RunningJupyter

SERVICE_A = "http://tap.alpha.invalid/tap"
SERVICE_B = "http://tap.beta.invalid/tap"
PHASE_CYCLE = ["COMPLETED", "EXECUTING", "QUEUED", "ERROR", "ABORTED"]
SEEDED = 250
T0 = 1_700_000_000.0


def _record(i: int, **extra) -> dict:
    job_id = hashlib.sha256(f"seeded {i}".encode()).hexdigest()[:16]
    return {"id": job_id, "key": f"{i:064x}", "service": SERVICE_A if i % 2 else SERVICE_B,
            "adql": f"SELECT TOP {i + 1} * FROM orrery.sources ORDER BY orrery_id",
            "label": f"seeded job {i:04d}", "phase": PHASE_CYCLE[i % len(PHASE_CYCLE)],
            "created": T0 + i, "layer": "personal", "rows": i * 10, "truncated": 0,
            **extra}


@pytest.fixture(scope="module")
def seeded(tmp_path_factory):
    """A desk root holding SEEDED records, and the server running over it."""
    work = tmp_path_factory.mktemp("rest")
    desk_root = work / "desk"
    index = Index(desk_root / "index.sqlite")
    records = [index.insert(_record(i)) for i in range(SEEDED)]
    # The poller is off here: these invented services must never be contacted.
    with RunningJupyter(work, desk_root, jobdesk_settings={"poll_interval": 0}) as jp:
        yield jp, index, records


def get(jp, path, **kw):
    return requests.get(jp.url(f"jobdesk/api/{path}"), headers=jp.auth, timeout=30, **kw)


# --- authentication and XSRF ------------------------------------------------------------------


@pytest.mark.parametrize("path", ["jobs", "cache", "changes", "jobs/0123456789abcdef"])
def test_refuses_requests_without_a_valid_token(seeded, path):
    jp, _, records = seeded
    bare = requests.get(jp.url(f"jobdesk/api/{path}"), timeout=30)
    wrong = requests.get(jp.url(f"jobdesk/api/{path}"), timeout=30,
                         headers={"Authorization": "token not-the-token"})
    for answer in (bare, wrong):
        assert answer.status_code == 403
        assert records[0]["id"] not in answer.text


def test_cookie_session_needs_the_xsrf_token_for_a_post(seeded):
    jp, _, records = seeded
    job_id = records[4]["id"]  # an ABORTED record: aborting it again changes nothing
    browser = requests.Session()
    browser.get(jp.url(f"tree?token={jp.token}"), timeout=30)  # logs in, sets the cookies
    assert browser.get(jp.url("jobdesk/api/jobs?limit=1"), timeout=30).status_code == 200
    refused = browser.post(jp.url(f"jobdesk/api/jobs/{job_id}/abort"), timeout=30)
    assert refused.status_code == 403
    xsrf = browser.cookies.get("_xsrf")
    assert xsrf, "the login page sets an _xsrf cookie"
    allowed = browser.post(jp.url(f"jobdesk/api/jobs/{job_id}/abort"), timeout=30,
                           headers={"X-XSRFToken": xsrf})
    assert allowed.status_code == 200, allowed.text
    assert allowed.json()["job"]["phase"] == "ABORTED"


# --- listing ----------------------------------------------------------------------------------


def test_pages_are_newest_first_and_cover_every_record_once(seeded):
    jp, _, records = seeded
    seen = []
    for offset in (0, 100, 200):
        page = get(jp, f"jobs?limit=100&offset={offset}").json()
        assert page["total"] == SEEDED
        seen += [job["id"] for job in page["jobs"]]
        created = [job["created"] for job in page["jobs"]]
        assert created == sorted(created, reverse=True)
    assert len(seen) == SEEDED == len(set(seen))
    assert seen[0] == records[-1]["id"]            # the newest record opens the first page
    assert set(seen) == {r["id"] for r in records}
    assert len(get(jp, "jobs?limit=100&offset=200").json()["jobs"]) == SEEDED - 200


def test_page_size_is_bounded(seeded):
    jp, _, _ = seeded
    assert len(get(jp, "jobs?limit=100000").json()["jobs"]) <= 500
    assert get(jp, "jobs?limit=ten").status_code == 400


def test_filters_by_phase_service_and_text(seeded):
    jp, _, records = seeded
    done = get(jp, "jobs?phase=COMPLETED&limit=500").json()
    assert done["total"] == sum(r["phase"] == "COMPLETED" for r in records)
    assert {j["phase"] for j in done["jobs"]} == {"COMPLETED"}

    two = get(jp, "jobs?phase=executing,QUEUED&limit=500").json()
    assert {j["phase"] for j in two["jobs"]} == {"EXECUTING", "QUEUED"}
    assert two["total"] == sum(r["phase"] in ("EXECUTING", "QUEUED") for r in records)

    on_a = get(jp, "jobs?limit=500", params={"service": SERVICE_A}).json()
    assert on_a["total"] == SEEDED // 2 and {j["service"] for j in on_a["jobs"]} == {SERVICE_A}

    found = get(jp, "jobs", params={"text": "seeded job 0042"}).json()
    assert [j["id"] for j in found["jobs"]] == [records[42]["id"]]

    assert get(jp, "jobs?phase=FINISHED").status_code == 400


# --- one job ----------------------------------------------------------------------------------


def test_details_carry_the_record_and_its_phase_history(seeded):
    jp, index, records = seeded
    job_id = records[10]["id"]
    index.update(job_id, phase="EXECUTING", note="moved for the test")
    body = get(jp, f"jobs/{job_id}").json()
    assert body["job"]["id"] == job_id and body["job"]["adql"] == records[10]["adql"]
    assert [h["phase"] for h in body["history"]][-1] == "EXECUTING"
    assert len(body["history"]) >= 2
    assert "provenance" in body


def test_unknown_ids_are_404_and_malformed_ids_400(seeded):
    jp, _, _ = seeded
    assert get(jp, "jobs/ffffffffffffffff").status_code == 404
    assert get(jp, "jobs/NOT-AN-ID").status_code == 400
    assert get(jp, "jobs/ffffffffffffffff/snippet").status_code == 404


@pytest.mark.parametrize("path", [
    "jobs/..%2F..%2F..%2Fetc%2Fpasswd",
    "jobs/..%2F..",
    "jobs/%2e%2e",
    "jobs/..%5C..%5Cindex.sqlite/preview",
    "jobs/%2Fetc%2Fpasswd/preview",
    "jobs/0123456789abcdef%00/preview",
])
def test_path_like_ids_never_reach_the_library(seeded, path):
    jp, _, _ = seeded
    answer = requests.get(jp.base + "jobdesk/api/" + path, headers=jp.auth, timeout=30)
    assert answer.status_code in (400, 404)
    assert "root:" not in answer.text and "SQLite" not in answer.text


def test_forget_removes_the_record(seeded):
    jp, index, _ = seeded
    extra = index.insert(_record(10_000, label="to be forgotten"))
    gone = requests.delete(jp.url(f"jobdesk/api/jobs/{extra['id']}"), headers=jp.auth,
                           timeout=30)
    assert gone.status_code == 200 and gone.json() == {"forgotten": extra["id"]}
    assert index.get(extra["id"]) is None
    assert get(jp, f"jobs/{extra['id']}").status_code == 404
    again = requests.delete(jp.url(f"jobdesk/api/jobs/{extra['id']}"), headers=jp.auth,
                            timeout=30)
    assert again.status_code == 404


def test_preview_of_a_job_without_a_result_says_why(seeded):
    jp, _, records = seeded
    running = next(r for r in records if r["phase"] == "EXECUTING")
    answer = get(jp, f"jobs/{running['id']}/preview")
    assert answer.status_code == 409
    assert "no result" in answer.json()["message"]


def test_cache_summary_has_entries_bytes_and_layers(seeded):
    jp, _, _ = seeded
    body = get(jp, "cache").json()
    assert isinstance(body["entries"], int) and isinstance(body["bytes"], int)
    assert body["layers"][0]["name"] == "personal"


# --- the change feed --------------------------------------------------------------------------


def test_change_feed_answers_when_the_index_changes(seeded):
    jp, index, records = seeded
    token = get(jp, "changes").json()["token"]
    answers = {}

    def listen():
        answers["body"] = get(jp, "changes", params={"since": token}).json()

    listener = threading.Thread(target=listen)
    listener.start()
    time.sleep(0.5)  # let the request park on the server
    assert listener.is_alive(), "an unchanged index must not answer at once"
    index.update(records[20]["id"], phase="COMPLETED", note="changed for the feed test")
    listener.join(30)
    assert answers["body"]["changed"] is True
    assert answers["body"]["token"] != token


def test_change_feed_answers_at_once_for_a_stale_token(seeded):
    jp, _, _ = seeded
    body = get(jp, "changes?since=0:0").json()
    assert body["changed"] is True and body["token"] != "0:0"


# --- unknown ids and the actions on a failed job --------------------------------------------


def post(jp, path, body=None):
    return requests.post(jp.url(f"jobdesk/api/{path}"), headers=jp.auth, json=body, timeout=30)


@pytest.mark.parametrize("method,path", [
    ("GET", ""), ("DELETE", ""), ("PATCH", ""), ("POST", "/abort"), ("POST", "/resend"),
    ("POST", "/pin"), ("POST", "/export"), ("GET", "/snippet"),
])
def test_unknown_id_is_404_with_our_message(seeded, method, path):
    jp, _, _ = seeded
    body = {"label": "x"} if method == "PATCH" else {"path": "out.fits"} if "export" in path \
        else None
    answer = requests.request(method, jp.url(f"jobdesk/api/jobs/ffffffffffffffff{path}"),
                              headers=jp.auth, json=body, timeout=30)
    assert answer.status_code == 404, (method, path, answer.text)
    said = answer.json()
    assert said["error"] == "JobNotFound" and "no job 'ffffffffffffffff'" in said["message"]
    assert said["hint"]


def test_label_and_pin_of_a_failed_job_go_through_the_library(seeded):
    jp, index, _ = seeded
    failed = index.insert(_record(20_000, phase="ERROR", error="the service said no"))
    answer = requests.patch(jp.url(f"jobdesk/api/jobs/{failed['id']}"), headers=jp.auth,
                            json={"label": "  renamed  "}, timeout=30)
    assert answer.status_code == 200, answer.text
    assert answer.json()["job"]["label"] == "renamed" == index.get(failed["id"])["label"]
    pinned = post(jp, f"jobs/{failed['id']}/pin", {"pinned": True})
    assert pinned.status_code == 200 and pinned.json()["pinned"] is True
    assert post(jp, f"jobs/{failed['id']}/pin", {"pinned": "yes"}).status_code == 400
    # a failed job has no result to export: the library says so, in our words
    export = post(jp, f"jobs/{failed['id']}/export", {"path": "out.fits"})
    assert export.status_code == 409 and "the service said no" in export.json()["message"]
    for bad in ("../out.fits", "/etc/out.fits", ""):
        assert post(jp, f"jobs/{failed['id']}/export", {"path": bad}).status_code == 400

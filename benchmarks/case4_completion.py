"""Case 4: how soon the client knows a job finished, and how many requests a job costs.

Three clients, each against a service of its own (so the service's request counter is theirs
alone), for jobs that stay EXECUTING 2 s / 20 s / 120 s (``exec_delay``):

* jobdesk on a UWS 1.1 service (blocking WAIT);
* jobdesk on a service that ignores WAIT (``no_wait=True``, as a UWS 1.0 service);
* a fixed 1 s polling loop written the obvious way with requests (create, RUN, GET the phase
  every second, GET the result).

Detection latency = when the client knew COMPLETED minus the service's ``endTime`` (same clock,
both on this machine; ``endTime`` has millisecond resolution).  For jobdesk "knew" is the moment
it recorded COMPLETED in its index (the phase history's time stamp); for the loop, the moment its
GET of the phase returned COMPLETED.  Requests per job are counted by the service
(``/_localtap/stats``) over the whole job: creation, RUN, status reads and the result download.
All jobs of a run go at once, staggered a little so their completions do not coincide.
"""

from __future__ import annotations

import threading
import time
from concurrent.futures import ThreadPoolExecutor
from urllib.parse import urljoin

import requests

from benchmarks.common import CaseResult, Context, Row, median
from jobdesk import Desk
from jobdesk.localtap import spawn
from jobdesk.localtap.uws import parse_iso
from jobdesk.remote import Remote

CLIENTS = ("jobdesk-wait", "jobdesk-nowait", "poll-1s")
WAIT_WINDOW = 30  # the Desk's default wait_window (seconds per blocking WAIT)
STAGGER = 0.37    # seconds between two submissions to one service


def plan(ctx: Context) -> dict[int, int]:
    """Job duration (s) -> repetitions."""
    return {2: 3} if ctx.quick else {2: 5, 20: 4, 120: 3}


def query(n: int) -> str:
    return (f"SELECT TOP 5 orrery_id, ra, dec FROM orrery.sources WHERE orrery_id > {n} "
            f"ORDER BY orrery_id")


def jobdesk_client(ctx: Context, url: str, tag: str, n: int) -> dict:
    desk = Desk(ctx.work / f"case4-{tag.rsplit('-', 1)[0]}", limits={url: 1000})
    job = desk.submit(url, query(n)).wait(progress=False)
    record = job.record
    knew = next(h["at"] for h in desk.index.history(job.id) if h["phase"] == "COMPLETED")
    return {"job_url": record["job_url"], "knew": knew, "client_requests": record["requests"]}


def polling_client(ctx: Context, url: str, tag: str, n: int) -> dict:
    """What one writes by hand: no retries, no WAIT, one second between looks."""
    session = requests.Session()
    counted = 0
    r = session.post(f"{url}/async", data={"REQUEST": "doQuery", "LANG": "ADQL",
                                           "QUERY": query(n)})
    counted += 1 + len(r.history)
    r.raise_for_status()
    job_url = r.url
    r = session.post(f"{job_url}/phase", data={"PHASE": "RUN"})
    counted += 1 + len(r.history)
    while True:
        phase = session.get(f"{job_url}/phase").text.strip()
        counted += 1
        if phase in ("COMPLETED", "ERROR", "ABORTED"):
            knew = time.time()
            break
        time.sleep(1.0)
    body = session.get(urljoin(job_url + "/", "results/result")).content
    counted += 1
    (ctx.work / f"case4-{tag}-{n}.xml").write_bytes(body)
    return {"job_url": job_url, "knew": knew, "client_requests": counted}


def run(ctx: Context) -> CaseResult:
    durations = plan(ctx)
    services = {}
    lock = threading.Lock()

    def start(duration: int, client: str):
        tap = spawn(state=ctx.work / f"case4-tap-{duration}-{client}", rows=2000,
                    exec_delay=duration, max_running=64, no_wait=(client == "jobdesk-nowait"))
        with lock:
            services[(duration, client)] = tap
        ctx.callback(tap.stop)

    with ThreadPoolExecutor(4) as pool:
        list(pool.map(lambda dc: start(*dc), [(d, c) for d in durations for c in CLIENTS]))
    before = {key: tap.stats()["requests"] for key, tap in services.items()}
    ctx.log(f"  {len(services)} services up; jobs of {', '.join(f'{d} s' for d in durations)} "
            f"running (the longest sets this case's time)")

    tasks = []
    n = int(time.time()) % 100_000 * 10
    for (duration, client), tap in services.items():
        for rep in range(durations[duration]):
            n += 1
            tasks.append((duration, client, tap.url, n, rep * STAGGER))

    def one(task):
        duration, client, url, n, delay = task
        time.sleep(delay)
        tag = f"{duration}-{client}-{n}"
        fn = polling_client if client == "poll-1s" else jobdesk_client
        return (duration, client), fn(ctx, url, tag, n)

    with ThreadPoolExecutor(len(tasks)) as pool:
        done = list(pool.map(one, tasks))

    per: dict[tuple[int, str], list[dict]] = {}
    for key, out in done:
        per.setdefault(key, []).append(out)
    measured: dict[tuple[int, str], dict] = {}
    for key, outs in per.items():
        tap = services[key]
        served = tap.stats()["requests"] - before[key]  # before the endTime reads below
        remote = Remote(tap.url)
        latencies = []
        for out in outs:
            end = parse_iso(remote.status(out["job_url"]).end_time)
            latencies.append(out["knew"] - end)
        measured[key] = {"latency_s": latencies, "median_latency_s": median(latencies),
                         "requests_per_job": served / len(outs),
                         "client_requests": [o["client_requests"] for o in outs]}

    rows: list[Row] = []
    for duration in durations:
        base = measured[(duration, "poll-1s")]
        allowed = 1 + duration / WAIT_WINDOW + 3
        for client, label in (("jobdesk-wait", "WAIT"), ("jobdesk-nowait", "no WAIT")):
            m = measured[(duration, client)]
            lat, blat = m["median_latency_s"], base["median_latency_s"]
            wait = client == "jobdesk-wait"
            rows.append(Row("case4", f"median detection latency, {duration} s job, {label}",
                            lat, "s", "1 s polling loop", blat,
                            blat / lat if lat > 0 else None, "sooner",
                            "< 100 ms" if wait else None, (lat < 0.1) if wait else None))
            req, breq = m["requests_per_job"], base["requests_per_job"]
            rows.append(Row("case4", f"requests per job, {duration} s job, {label}", req, "req",
                            "1 s polling loop", breq, breq / req, "fewer",
                            f"<= {allowed:.2f}" if wait else None,
                            (req <= allowed) if wait else None))
    details = {"wait_window": WAIT_WINDOW, "durations": durations,
               "measured": {f"{d}s/{c}": v for (d, c), v in measured.items()}}
    return CaseResult(rows, details)

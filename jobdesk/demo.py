"""``jobdesk demo``: the whole story, offline, against the embedded TAP service.

It starts ``jobdesk.localtap`` on loopback with an invented catalogue, then walks through what a
user meets: an async job with progress, a kernel killed mid-job and the same server job picked
up again, a result truncated by MAXREC, a bad query's message, a cache hit with the service
down, and an analysis re-run on the catalogue's second release with a report of what changed.
It runs in a throwaway desk of its own (a new temporary directory, named at the start) unless
``--root`` names one; there, the job records of the previous demo run are replaced, not added to.
"""

from __future__ import annotations

import subprocess
import sys
import tempfile
import textwrap
import time
import warnings

from jobdesk import keys
from jobdesk.desk import Desk
from jobdesk.errors import JobdeskError, ResultTruncated, ResultTruncatedWarning

CONE = """\
SELECT orrery_id, ra, dec, mag_lime, parallax
FROM orrery.sources
WHERE 1 = CONTAINS(POINT('ICRS', ra, dec), CIRCLE('ICRS', 150.0, 20.0, 12.0))
ORDER BY orrery_id"""

SLOW = """\
SELECT s.orrery_id, s.ra, s.dec, count(*) AS n_epochs
FROM orrery.sources AS s JOIN orrery.visits AS e ON e.orrery_id = s.orrery_id
WHERE s.dec > 60
GROUP BY s.orrery_id, s.ra, s.dec
ORDER BY s.orrery_id"""

BIG = "SELECT orrery_id, ra, dec FROM orrery.sources ORDER BY orrery_id"

BAD = "SELECT orrery_id, ra, dec FORM orrery.sources"

_KILLED_KERNEL = """
import sys
from jobdesk import Desk
job = Desk(sys.argv[1]).submit(sys.argv[2], sys.argv[3], label="demo: north cap visits")
print(job.id, flush=True)
job.wait(progress=False)
"""


def _say(step: str, text: str = "") -> None:
    print(f"\n== {step}")
    if text:
        print(textwrap.indent(textwrap.dedent(text).strip(), "   "))


def run(root=None, rows: int = 20000) -> int:
    from jobdesk import localtap

    throwaway = root is None
    desk = Desk(tempfile.mkdtemp(prefix="jobdesk-demo-") if throwaway else root)
    if not throwaway:
        _forget_earlier_runs(desk)
    state = tempfile.mkdtemp(prefix="jobdesk-demo-tap-")
    _say("Starting the embedded TAP service",
         f"an invented catalogue of {rows} sources, each async job held EXECUTING 3 s")
    tap = localtap.spawn(state=state, rows=rows, exec_delay=3.0)
    try:
        url = tap.url
        print(f"   service: {url}\n   desk:    {desk.root}"
              + (" (a throwaway desk for this demo; --root DIR keeps it elsewhere)"
                 if throwaway else ""))

        _say("1. Submit a cone search and wait", CONE)
        job = desk.submit(url, CONE, label="demo: cone around (150, +20)")
        job.wait()
        table = job.table()
        print(f"   {job.phase}: {len(table)} rows; columns "
              + ", ".join(f"{c}[{table[c].unit or ''}]" for c in table.colnames))

        _say("2. A kernel dies mid-job; the same cell runs again",
             "a second Python process submits a slow join and is killed while it waits")
        before = tap.stats()["jobs_created"]
        child = subprocess.Popen([sys.executable, "-c", _KILLED_KERNEL, str(desk.root), url, SLOW],
                                 stdout=subprocess.PIPE, text=True)
        first_id = child.stdout.readline().strip()
        time.sleep(1.0)
        child.kill()
        child.wait()
        print(f"   killed the process that submitted job {first_id}")
        again = desk.submit(url, SLOW, label="demo: north cap visits")
        again.wait()
        created = tap.stats()["jobs_created"] - before
        print(f"   re-submitted: job {again.id} (same record: {again.id == first_id}); "
              f"server jobs created for it: {created}; rows: {again.rows}")

        _say("3. A result truncated by MAXREC is never served as complete", BIG + "   -- MAXREC=500")
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            cut = desk.submit(url, BIG, maxrec=500, label="demo: all sources, capped").wait()
        for w in caught:
            if issubclass(w.category, ResultTruncatedWarning):
                print(f"   warning: {w.message}")
        try:
            cut.table()
        except ResultTruncated as exc:
            print(f"   table() refused: {exc.message}")
        print(f"   table(allow_truncated=True) gives {len(cut.table(allow_truncated=True))} rows")

        _say("4. A bad query gets the service's own message", BAD)
        try:
            desk.submit(url, BAD, label="demo: typo", check=False).wait()
        except JobdeskError as exc:
            print(f"   {type(exc).__name__}: {exc}".replace("\n", "\n   "))
        print("   checked locally first (submit does this by default, before any request):")
        for finding in desk.check(url, BAD):
            print("   " + str(finding).replace("\n", "\n   "))

        _say("5. The service goes down; the cone search is answered from the cache")
        tap.stop()
        t0 = time.perf_counter()
        hit = desk.submit(url, CONE)
        table = hit.table()
        print(f"   {len(table)} rows in {1000 * (time.perf_counter() - t0):.0f} ms, "
              f"no request to the service (job {hit.id}, same as step 1: {hit.id == job.id})")

        _say("6. Where the table came from", hit.account())
        where = f"--root {desk.root} " if throwaway else ""
        print(f"\n   More: `jobdesk {where}list`, `jobdesk {where}show <id>`,"
              f"\n   `jobdesk {where}export <id> out.fits`; the desk stays at {desk.root}.")
        if throwaway:
            from jobdesk.desk import default_root
            print(f"   To see the demo's jobs in the JupyterLab sidebar, run it in your desk:"
                  f"\n   jobdesk --root {default_root()} demo")
        from jobdesk.server import SIDEBAR_MISSING, sidebar_built
        if not sidebar_built():
            print(f"\n   Note: {SIDEBAR_MISSING}")
    finally:
        tap.stop()
    tap = localtap.spawn(state=state, rows=rows)   # up again (the same catalogue, re-used)
    try:
        _rerun_story(desk, tap.url)
    finally:
        tap.stop()
    return 0


RELEASE = {"orrery.sources": "orrery_r2.sources", "orrery.visits": "orrery_r2.visits",
           "class_label": "source_class"}


def _rerun_story(desk, url: str) -> None:
    """Steps 7-9: an analysis, its re-run on the second release, and what changed."""
    import datetime as _dt
    from pathlib import Path

    name = "demo stream search " + _dt.datetime.now().strftime("%Y-%m-%d %H:%M:%S")
    stars = ("SELECT orrery_id, ra, dec, parallax, class_label FROM orrery.sources\n"
             "WHERE dec > 60 AND class_label = 'star'  -- class_label as published\n"
             "ORDER BY orrery_id")
    visits = ("SELECT v.orrery_id, count(*) AS n_visits FROM orrery.visits AS v\n"
              "JOIN TAP_UPLOAD.mine AS m ON m.orrery_id = v.orrery_id\n"
              "GROUP BY v.orrery_id ORDER BY v.orrery_id")
    _say("7. An analysis: two steps, the second uploads the first's result",
         stars + "\n\n" + visits)
    with desk.analysis(name):
        first = desk.submit(url, stars, label="demo: north stars").wait(progress=False)
        desk.submit(url, visits, uploads={"mine": first}, label="demo: their visits").wait(progress=False)
    print(f"   analysis {name!r}: {len(desk.analysis_jobs(name))} steps")

    _say("8. The archive publishes release 2: plan the same analysis on it",
         "renames: " + ", ".join(f"{k} -> {v}" for k, v in RELEASE.items()))
    plan = desk.rerun(name, rename=RELEASE, into=name + " on r2")
    for step in plan.steps:
        print(f"   step {step['step']} new ADQL:\n      "
              + step["new_adql"].replace("\n", "\n      "))
    plan.wait()
    print(f"   {plan!r}")

    _say("9. What the new release changed")
    comparisons = plan.compare()
    for entry in comparisons:
        c = entry.comparison
        if c is None:
            print(f"   step {entry.step}: {entry.error}")
            continue
        moved = ", ".join(f"{k} {v}" for k, v in c.changed.items() if v) or "none"
        print(f"   step {entry.step}: {c.rows_old} -> {c.rows_new} rows; added {c.added}, "
              f"removed {c.removed}, matched {c.matched}; changed values: {moved}")
    html, _ = comparisons.report(Path(desk.root) / "reports" / "release-report.html")
    print(f"   report: {html} (and {html.with_suffix('.json').name})")


def _forget_earlier_runs(desk: Desk) -> int:
    """Drop the records an earlier demo run left in this desk (its service had another port,
    so its jobs would pile up): loopback services, labels starting "demo: "."""
    gone = 0
    for job in desk.jobs(text="demo: ", limit=None):
        r = job.record
        host = keys.service_id(r["service"]).split("//", 1)[-1]
        if (r.get("label") or "").startswith("demo: ") and host.startswith("127.0.0.1:"):
            gone += desk.forget(job.id)
    return gone

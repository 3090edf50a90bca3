"""Case 9: re-running a 5-step analysis whose steps are all cache hits, against running it.

A fresh ``Desk`` on the same root plans the re-run (reading the service's VOSI tables to check
the names, rewriting every step), submits every step (each one a cache hit) and waits; the
baseline is the analysis's first run, which executes on the service.
"""

from __future__ import annotations

from benchmarks.common import CaseResult, Context, Row, median, timed
from jobdesk import Desk

STEPS = [
    "SELECT orrery_id, ra, dec, parallax FROM orrery.sources WHERE dec > 40 ORDER BY orrery_id",
    "SELECT orrery_id, mag_lime, mag_cyan FROM orrery.sources WHERE mag_lime < 15 "
    "ORDER BY orrery_id",
    "SELECT class_label, count(*) AS n FROM orrery.sources GROUP BY class_label "
    "ORDER BY class_label",
    "SELECT v.orrery_id, avg(v.mag) AS mean_mag FROM orrery.visits AS v "
    "JOIN TAP_UPLOAD.north AS m ON m.orrery_id = v.orrery_id GROUP BY v.orrery_id "
    "ORDER BY v.orrery_id",
    "SELECT orrery_id, pm_ra_cosdec, pm_dec FROM orrery.sources "
    "WHERE 1 = CONTAINS(POINT('ICRS', ra, dec), CIRCLE('ICRS', 10.0, -30.0, 2.0)) "
    "ORDER BY orrery_id",
]


def run(ctx: Context) -> CaseResult:
    from jobdesk.localtap import spawn

    tap = spawn(state=ctx.cache / "tap-rerun-20000", rows=20_000)
    ctx.callback(tap.stop)
    root = ctx.work / "case9-desk"

    def first_run():
        desk = Desk(root)
        with desk.analysis("five-steps"):
            north = desk.submit(tap.url, STEPS[0]).wait(progress=False)
            for adql in STEPS[1:]:
                uploads = {"north": north} if "TAP_UPLOAD" in adql else None
                desk.submit(tap.url, adql, uploads=uploads).wait(progress=False)

    first_s, _ = timed(first_run)
    created = tap.stats()["jobs_created"]
    times = []
    for i in range(3 if ctx.quick else 7):
        seconds, plan = timed(lambda: Desk(root).rerun("five-steps", into=f"again-{i}").wait())
        assert not plan.failed and len(plan.jobs) == len(STEPS)
        times.append(seconds)
    assert tap.stats()["jobs_created"] == created, "a cache-hit re-run created server jobs"
    hit = median(times)
    rows = [Row("case9", "re-run of a 5-step analysis, all cache hits", hit, "s",
                "first run (executes on the service)", first_s, first_s / hit, "faster",
                "< 1 s", hit < 1.0)]
    return CaseResult(rows, {"rerun_s": times, "first_s": first_s})

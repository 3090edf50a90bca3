"""A desk root with many invented job records, written fast, for the index-scale case.

Records go in through ``Index`` (so the schema and its indexes are the real ones) but in one
transaction with ``executemany``: 100,000 one-row transactions would take minutes and measure
nothing of interest.  Every value is invented from a fixed seed.
"""

from __future__ import annotations

import hashlib
import json
import random
import time
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq

from jobdesk import keys
from jobdesk.index import JOB_COLUMNS, Index
from jobdesk.store import Store, stat_stamp

SERVICES = ("http://127.0.0.1:8787/tap", "https://tap.example.org/tap",
            "https://archive.example.net/vo/tap", "https://data.example.edu/tap")
PHASES = (("COMPLETED", 0.82), ("ERROR", 0.10), ("ABORTED", 0.05), ("LOST", 0.03))
HIT_SERVICE = SERVICES[1]
HIT_ADQL = ("SELECT s.orrery_id, s.ra, s.dec, s.mag_cyan FROM orrery.sources AS s "
            "WHERE 1 = CONTAINS(POINT('ICRS', s.ra, s.dec), CIRCLE('ICRS', 10.0, -30.0, 0.25))")
RARE_WORD = "pilot"   # in about 1 % of the labels: a filter that must look at every row


def _adql(rng: random.Random) -> str:
    ra, dec, r = rng.uniform(0, 360), rng.uniform(-90, 90), rng.choice((0.05, 0.1, 0.5, 1.0))
    kind = rng.random()
    if kind < 0.5:
        return (f"SELECT orrery_id, ra, dec, mag_cyan, mag_rose FROM orrery.sources WHERE "
                f"1 = CONTAINS(POINT('ICRS', ra, dec), CIRCLE('ICRS', {ra:.5f}, {dec:.5f}, {r}))")
    if kind < 0.8:
        return (f"SELECT s.orrery_id, e.obs_time, e.mag, e.band FROM orrery.sources AS s "
                f"JOIN orrery.visits AS e ON e.orrery_id = s.orrery_id "
                f"WHERE s.mag_lime < {rng.uniform(12, 20):.2f} AND e.band = "
                f"'{rng.choice(('cyan', 'lime', 'rose'))}' AND 1 = CONTAINS(POINT('ICRS', s.ra, "
                f"s.dec), BOX('ICRS', {ra:.4f}, {dec:.4f}, {r * 2}, {r}))\nORDER BY e.obs_time")
    return (f"SELECT class_label, COUNT(*) AS n, AVG(parallax) AS mean_plx FROM orrery.sources "
            f"WHERE var_flag = {rng.randint(0, 1)} AND dec BETWEEN {dec - 5:.2f} AND "
            f"{dec + 5:.2f} GROUP BY class_label")


def _hex(rng: random.Random, n: int = 64) -> str:
    return "%0*x" % (n, rng.getrandbits(4 * n))


def seed(root: Path, jobs: int, *, seed_value: int = 20240601) -> dict:
    """Fill ``root`` with ``jobs`` terminal records; return what the benchmark needs to know."""
    rng = random.Random(seed_value)
    index = Index(root / "index.sqlite")
    store = Store(root)
    # One real cached result, for the cache-hit submit.
    tmp = store.temp(".parquet")
    pq.write_table(pa.table({"orrery_id": pa.array(range(500), pa.int64()),
                             "ra": pa.array([rng.uniform(9, 11) for _ in range(500)])}), tmp)
    parquet_sha, parquet_path = store.commit(tmp)
    hit_key = keys.query_key(HIT_SERVICE, HIT_ADQL, maxrec=None, fmt="votable", uploads={},
                             scope="anonymous")
    now = time.time()
    names = list(JOB_COLUMNS)
    job_rows, phase_rows = [], []
    hit_at = rng.randrange(jobs)
    for i in range(jobs):
        job_id = _hex(rng, 16)
        service = rng.choice(SERVICES)
        adql = _adql(rng)
        phase = rng.choices([p for p, _ in PHASES], [w for _, w in PHASES])[0]
        created = now - rng.uniform(0, 365 * 86400)
        submitted = created + rng.uniform(0.01, 2)
        started = submitted + rng.uniform(0.1, 30)
        finished = started + rng.expovariate(1 / 60)
        label = (f"{RARE_WORD} field {i}" if rng.random() < 0.01 else
                 rng.choice((None, None, f"cone {i}", f"epochs batch {i % 97}")))
        completed = phase == "COMPLETED"
        record = {name: None for name in names}
        record.update(
            id=job_id, key=hashlib.sha256(f"{service}|{adql}|{i}".encode()).hexdigest(),
            service=service, adql=adql, canonical=adql, maxrec=rng.choice((None, 10000, 100000)),
            fmt="votable", label=label, scope="anonymous", uploads="{}", phase=phase,
            job_url=f"{service}/async/{_hex(rng, 12)}", run_id=f"jobdesk-{job_id}",
            created=created, intent=created, submitted=submitted, started=started,
            finished=finished, updated=finished, rows=rng.randint(0, 200000) if completed else None,
            truncated=int(rng.random() < 0.03) if completed else None,
            result_sha256=_hex(rng) if completed else None,
            result_bytes=rng.randint(2000, 50_000_000) if completed else None,
            parquet_sha256=_hex(rng) if completed else None,
            error=None if completed else f"the job ended in {phase}: invented message {i}",
            notebook=rng.choice(("survey.ipynb", "epochs.ipynb", None)), user="bench",
            host="bench-host", requests=rng.randint(4, 12), layer="personal", warnings="[]",
            server=json.dumps({"server_software": "invented-tap 1.0"}))
        if i == hit_at:
            record.update(key=hit_key, service=keys.service_id(HIT_SERVICE), adql=HIT_ADQL,
                          canonical=keys.canonical_adql(HIT_ADQL).text, maxrec=None,
                          phase="COMPLETED", rows=500, truncated=0, error=None,
                          parquet_sha256=parquet_sha, parquet_stat=stat_stamp(parquet_path))
            hit_id = job_id
        job_rows.append([record[n] for n in names])
        for name, at in (("UNSENT", created), ("SUBMITTED", submitted), ("EXECUTING", started),
                         (record["phase"], finished)):
            phase_rows.append((job_id, name, at, None))
    with index._write() as conn:
        conn.executemany(f"INSERT INTO jobs ({', '.join(names)}) VALUES "
                         f"({', '.join('?' * len(names))})", job_rows)
        conn.executemany("INSERT INTO phases (job_id, phase, at, note) VALUES (?, ?, ?, ?)",
                         phase_rows)
    index.db.execute("ANALYZE")
    index.close()
    return {"jobs": jobs, "hit_id": hit_id, "hit_service": HIT_SERVICE, "hit_adql": HIT_ADQL,
            "rare_word": RARE_WORD}

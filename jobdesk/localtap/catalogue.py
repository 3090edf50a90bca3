"""The Orrery Wide Sky Census: an invented catalogue, generated deterministically from a seed.

Why it exists: the demo and the tests need a sky catalogue on a fresh machine with no network.
Every number here is invented.  Beyond an all-sky population it plants sources where ADQL
geometry is easy to get wrong: a dense patch around (10, -30), caps at both celestial poles and a
band straddling RA = 0/360; some values are NULL.  The SQLite file is built into a temporary
file and renamed, so a killed build leaves nothing half-written, and it is re-used when one with
the same row count, seed and layout version exists.

A second release (schema ``orrery_r2``) is served beside the first, derived from it with a fixed
seed the way a survey's next release differs from its last: some sources removed, some added,
positions, parallaxes and magnitudes moved within their errors, a few sources reclassified,
``class_label`` renamed ``source_class`` and a column ``visit_count`` added (docs/localtap.md).
"""

from __future__ import annotations

import os
import sqlite3
import tempfile
from pathlib import Path

import numpy as np

from .tapschema import Column, ForeignKey, SchemaInfo, TableInfo

SCHEMA = "orrery"
LAYOUT_VERSION = 3
ORRERY_ID_BASE = 3_100_000  # invented: ids run upwards from here in steps of 1 to 5
VISIT_EVERY = 4        # every 4th source has a light curve ...
VISITS_PER_SOURCE = 4  # ... of this many visits
BANDS = ("cyan", "lime", "rose")

SCHEMA_INFO = SchemaInfo(SCHEMA, "Orrery Wide Sky Census: an invented all-sky survey (demo data)")


def _col(name, datatype, unit, ucd, description, *, arraysize=None, principal=False, indexed=False):
    return Column(name, datatype, arraysize=arraysize, unit=unit, ucd=ucd,
                  description=description, principal=principal, indexed=indexed)


# UCDs from the IVOA UCD1+ controlled vocabulary; units in VOUnits syntax
SOURCES = TableInfo(SCHEMA, "sources", "One row per detected source of the Orrery Wide Sky Census", [
    _col("orrery_id", "long", None, "meta.id;meta.main", "unique source identifier",
         principal=True, indexed=True),
    _col("ra", "double", "deg", "pos.eq.ra;meta.main", "right ascension (ICRS, epoch 2020.0)",
         principal=True),
    _col("dec", "double", "deg", "pos.eq.dec;meta.main", "declination (ICRS, epoch 2020.0)",
         principal=True, indexed=True),
    _col("pm_ra_cosdec", "float", "mas/yr", "pos.pm;pos.eq.ra", "proper motion in RA, times cos(dec)"),
    _col("pm_dec", "float", "mas/yr", "pos.pm;pos.eq.dec", "proper motion in declination"),
    _col("parallax", "float", "mas", "pos.parallax", "parallax; NULL for extended sources"),
    _col("parallax_sigma", "float", "mas", "stat.error;pos.parallax", "standard error of parallax"),
    _col("mag_cyan", "float", "mag", "phot.mag;em.opt.B", "mean magnitude in the cyan band",
         principal=True),
    _col("mag_lime", "float", "mag", "phot.mag;em.opt.V", "mean magnitude in the lime band",
         principal=True),
    _col("mag_rose", "float", "mag", "phot.mag;em.opt.R", "mean magnitude in the rose band; "
         "NULL when not detected", principal=True),
    _col("cyan_rose", "float", "mag", "phot.color;em.opt.B;em.opt.R", "colour mag_cyan - mag_rose"),
    _col("var_flag", "short", None, "meta.code;src.var", "1 if the source varies, else 0"),
    _col("class_label", "char", None, "src.class", "star, galaxy or qso; NULL if unclassified",
         arraysize="*"),
])

VISITS = TableInfo(SCHEMA, "visits", "Single-visit photometry of every fourth source", [
    _col("visit_id", "long", None, "meta.id", "unique identifier of this measurement",
         principal=True, indexed=True),
    _col("orrery_id", "long", None, "meta.id;meta.main", "source measured (orrery.sources)",
         principal=True, indexed=True),
    _col("obs_time", "double", "d", "time.epoch", "time of observation (MJD, TDB)", principal=True),
    _col("band", "char", None, "instr.bandpass", "band: cyan, lime or rose", arraysize="*",
         principal=True),
    _col("mag", "float", "mag", "phot.mag", "magnitude in this visit", principal=True),
    _col("mag_sigma", "float", "mag", "stat.error;phot.mag", "standard error of mag"),
], foreign_keys=[ForeignKey("orrery_visits_source", "orrery.visits", "orrery.sources",
                            [("orrery_id", "orrery_id")], "each visit belongs to one source")])

# --- the second release ------------------------------------------------------------------------

SCHEMA_R2 = "orrery_r2"
SCHEMA_INFO_R2 = SchemaInfo(SCHEMA_R2, "Orrery Wide Sky Census, second release (demo data)")
R2_REMOVED = 0.02      # fraction of first-release sources dropped
R2_ADDED = 0.03        # new sources, as a fraction of the first release
R2_RECLASSIFIED = 0.01
R2_MAG_MOVED = 0.4     # fraction of sources whose magnitudes were re-measured

SOURCES_R2 = TableInfo(SCHEMA_R2, "sources", "One row per source of the second release", [
    *(c.renamed("source_class") if c.name == "class_label" else c for c in SOURCES.columns),
    _col("visit_count", "short", None, "meta.number;obs", "single-visit measurements of this "
         "source in orrery_r2.visits"),
])
VISITS_R2 = TableInfo(SCHEMA_R2, "visits", "Single-visit photometry of the second release",
                      list(VISITS.columns),
                      foreign_keys=[ForeignKey("orrery_r2_visits_source", "orrery_r2.visits",
                                               "orrery_r2.sources", [("orrery_id", "orrery_id")],
                                               "each visit belongs to one source")])

TABLES = [SOURCES, VISITS, SOURCES_R2, VISITS_R2]
SCHEMAS = [SCHEMA_INFO, SCHEMA_INFO_R2]
# SQLite table of each published table (both releases live in one file)
PHYSICAL = {SOURCES.qualified: "sources", VISITS.qualified: "visits",
            SOURCES_R2.qualified: "r2_sources", VISITS_R2.qualified: "r2_visits"}


def catalogue_path(state_dir: Path, rows: int, seed: int) -> Path:
    return Path(state_dir) / f"orrery-r{rows}-s{seed}-v{LAYOUT_VERSION}.sqlite"


def ensure_catalogue(state_dir: Path, rows: int, seed: int) -> Path:
    """Path of the catalogue for (rows, seed), building it first if it does not exist yet."""
    if rows < 1:
        raise ValueError("the catalogue needs at least one row")
    path = catalogue_path(state_dir, rows, seed)
    if path.exists():
        return path
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp_name = tempfile.mkstemp(dir=path.parent, prefix=".orrery-", suffix=".tmp")
    os.close(fd)
    tmp = Path(tmp_name)
    try:
        _build(tmp, rows, seed)
        with open(tmp, "rb+") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)
    return path


def _sql_type(c: Column) -> str:
    return {"long": "INTEGER", "int": "INTEGER", "short": "INTEGER",
            "float": "REAL", "double": "REAL"}.get(c.datatype, "TEXT")


def _create(conn: sqlite3.Connection, table: TableInfo, primary: str) -> None:
    cols = ", ".join(f"{c.name} {_sql_type(c)}" + (" PRIMARY KEY" if c.name == primary else "")
                     for c in table.columns)
    conn.execute(f"CREATE TABLE {PHYSICAL[table.qualified]} ({cols})")


def _with_nulls(values: np.ndarray, null: np.ndarray) -> list:
    out = values.astype(object)
    out[null] = None
    return out.tolist()


def _insert(conn: sqlite3.Connection, table: TableInfo, columns: list[list], batch: int = 100_000):
    marks = ", ".join("?" * len(table.columns))
    n = len(columns[0])
    for start in range(0, n, batch):
        chunk = [c[start:start + batch] for c in columns]
        conn.executemany(f"INSERT INTO {PHYSICAL[table.qualified]} VALUES ({marks})",
                         zip(*chunk))


def generate_sources(rows: int, seed: int) -> dict[str, np.ndarray]:
    """The sources as numpy arrays (NaN marks NULL in float columns)."""
    rng = np.random.default_rng(seed)
    n = rows
    # population: 0 all-sky, 1 patch around (10, -30), 2 north cap, 3 south cap, 4 RA-wrap band
    kind = rng.choice(5, size=n, p=[0.86, 0.05, 0.02, 0.02, 0.05])
    ra = rng.uniform(0.0, 360.0, n)
    dec = np.degrees(np.arcsin(rng.uniform(-1.0, 1.0, n)))
    patch = kind == 1
    dec[patch] = -30.0 + rng.normal(0.0, 0.6, patch.sum())
    ra[patch] = (10.0 + rng.normal(0.0, 0.6, patch.sum()) / np.cos(np.radians(dec[patch]))) % 360.0
    north = kind == 2
    dec[north] = 90.0 - np.abs(rng.normal(0.0, 0.3, north.sum()))
    south = kind == 3
    dec[south] = -90.0 + np.abs(rng.normal(0.0, 0.3, south.sum()))
    wrap = kind == 4
    ra[wrap] = rng.normal(0.0, 0.4, wrap.sum()) % 360.0
    dec[wrap] = rng.normal(0.0, 1.0, wrap.sum())
    ra[ra >= 360.0] = 0.0

    label = rng.choice(np.array(["star", "galaxy", "qso"], dtype=object), size=n, p=[0.7, 0.25, 0.05])
    star = label == "star"
    label_null = rng.random(n) < 0.01

    parallax_sigma = 0.02 + 0.1 * rng.random(n)
    parallax = np.where(star, rng.exponential(1.2, n), np.nan) + rng.normal(0.0, 1.0, n) * parallax_sigma
    pm_scale = np.where(star, 8.0, 0.3)
    pm_ra_cosdec = rng.normal(0.0, 1.0, n) * pm_scale
    pm_dec = rng.normal(0.0, 1.0, n) * pm_scale
    pm_null = rng.random(n) < 0.01
    pm_ra_cosdec[pm_null] = np.nan
    pm_dec[pm_null] = np.nan

    mag_lime = rng.uniform(12.0, 21.0, n)
    colour = np.where(star, rng.normal(0.8, 0.5, n), rng.normal(1.2, 0.3, n))
    mag_cyan = mag_lime + colour * 0.55
    mag_rose = mag_lime - colour * 0.45
    mag_rose[rng.random(n) < 0.03] = np.nan
    return {
        "orrery_id": ORRERY_ID_BASE + np.cumsum(rng.integers(1, 6, n), dtype=np.int64),
        "ra": ra, "dec": dec,
        "pm_ra_cosdec": np.round(pm_ra_cosdec, 3), "pm_dec": np.round(pm_dec, 3),
        "parallax": np.round(parallax, 4), "parallax_sigma": np.round(parallax_sigma, 4),
        "mag_cyan": np.round(mag_cyan, 4), "mag_lime": np.round(mag_lime, 4),
        "mag_rose": np.round(mag_rose, 4), "cyan_rose": np.round(mag_cyan - mag_rose, 4),
        "var_flag": (rng.random(n) < 0.08).astype(np.int64),
        "class_label": np.where(label_null, None, label),
    }


def generate_visits(src: dict[str, np.ndarray], seed: int) -> dict[str, np.ndarray]:
    rng = np.random.default_rng([seed, 1])
    chosen = np.arange(0, len(src["orrery_id"]), VISIT_EVERY)
    idx = np.repeat(chosen, VISITS_PER_SOURCE)
    m = len(idx)
    band_no = np.tile(np.arange(VISITS_PER_SOURCE) % len(BANDS), len(chosen))
    base = np.choose(band_no, [src["mag_cyan"][idx], src["mag_lime"][idx],
                               np.where(np.isnan(src["mag_rose"][idx]), src["mag_lime"][idx],
                                        src["mag_rose"][idx])])
    obs_time = 60000.0 + rng.uniform(0.0, 1500.0, m)
    swing = np.where(src["var_flag"][idx] == 1, 0.4 * np.sin(obs_time / 3.7), 0.0)
    mag_sigma = 0.005 + 0.02 * rng.random(m)
    return {
        "visit_id": np.arange(1, m + 1, dtype=np.int64),
        "orrery_id": src["orrery_id"][idx],
        "obs_time": np.round(obs_time, 5),
        "band": np.array(BANDS, dtype=object)[band_no],
        "mag": np.round(base + swing + rng.normal(0.0, 1.0, m) * mag_sigma, 4),
        "mag_sigma": np.round(mag_sigma, 4),
    }


def release_two(src: dict[str, np.ndarray], visits: dict[str, np.ndarray], seed: int
                ) -> tuple[dict[str, np.ndarray], dict[str, np.ndarray]]:
    """The second release's sources and visits, derived from the first's with a fixed seed."""
    rng = np.random.default_rng([seed, 2])
    n = len(src["orrery_id"])
    keep = rng.random(n) >= R2_REMOVED
    out = {k: v[keep].copy() for k, v in src.items()}
    m = int(keep.sum())
    # positions move by a few mas, parallaxes within their (now 10% smaller) errors
    scatter = 5e-3 / 3600.0
    out["dec"] = np.clip(out["dec"] + rng.normal(0.0, scatter, m), -90.0, 90.0)
    out["ra"] = (out["ra"] + rng.normal(0.0, scatter, m)
                 / np.maximum(np.cos(np.radians(out["dec"])), 1e-3)) % 360.0
    out["parallax_sigma"] = np.round(out["parallax_sigma"] * 0.9, 4)
    out["parallax"] = np.round(out["parallax"] + rng.normal(0.0, 1.0, m) * out["parallax_sigma"], 4)
    moved = rng.random(m) < R2_MAG_MOVED
    for band in ("mag_cyan", "mag_lime", "mag_rose"):
        out[band] = np.where(moved, np.round(out[band] + rng.normal(0.0, 0.01, m), 4), out[band])
    out["cyan_rose"] = np.round(out["mag_cyan"] - out["mag_rose"], 4)
    flip = (rng.random(m) < R2_RECLASSIFIED) & (out["class_label"] != None)  # noqa: E711
    out["class_label"] = np.where(flip, np.where(out["class_label"] == "star", "galaxy", "star"),
                                  out["class_label"])
    added = max(1, int(round(n * R2_ADDED)))
    extra = generate_sources(added, seed + 1)
    extra["orrery_id"] = (src["orrery_id"].max()
                          + np.cumsum(rng.integers(1, 6, added), dtype=np.int64))
    out = {k: np.concatenate([out[k], extra[k]]) for k in out}
    out["source_class"] = out.pop("class_label")
    kept_visits = np.isin(visits["orrery_id"], out["orrery_id"])
    v2 = {k: v[kept_visits].copy() for k, v in visits.items()}
    noise = rng.normal(0.0, 1.0, len(v2["mag"])) * v2["mag_sigma"] * 0.5
    v2["mag"] = np.round(v2["mag"] + noise, 4)
    ids, counts = np.unique(v2["orrery_id"], return_counts=True)
    out["visit_count"] = np.zeros(len(out["orrery_id"]), dtype=np.int64)
    if len(ids):
        where = np.minimum(np.searchsorted(ids, out["orrery_id"]), len(ids) - 1)
        found = ids[where] == out["orrery_id"]
        out["visit_count"][found] = counts[where[found]]
    return out, v2


def _columns(table: TableInfo, data: dict[str, np.ndarray]) -> list[list]:
    out = []
    for c in table.columns:
        values = data[c.name]
        if values.dtype.kind == "f":
            out.append(_with_nulls(values, np.isnan(values)))
        else:
            out.append(values.tolist())
    return out


def _build(path: Path, rows: int, seed: int) -> None:
    conn = sqlite3.connect(path)
    try:
        conn.execute("PRAGMA journal_mode=OFF")
        conn.execute("PRAGMA synchronous=OFF")
        _create(conn, SOURCES, "orrery_id")
        _create(conn, VISITS, "visit_id")
        _create(conn, SOURCES_R2, "orrery_id")
        _create(conn, VISITS_R2, "visit_id")
        src = generate_sources(rows, seed)
        visits = generate_visits(src, seed)
        _insert(conn, SOURCES, _columns(SOURCES, src))
        _insert(conn, VISITS, _columns(VISITS, visits))
        src2, visits2 = release_two(src, visits, seed)
        _insert(conn, SOURCES_R2, _columns(SOURCES_R2, src2))
        _insert(conn, VISITS_R2, _columns(VISITS_R2, visits2))
        conn.execute("CREATE INDEX sources_dec ON sources (dec)")
        conn.execute("CREATE INDEX visits_source ON visits (orrery_id)")
        conn.execute("CREATE INDEX r2_sources_dec ON r2_sources (dec)")
        conn.execute("CREATE INDEX r2_visits_source ON r2_visits (orrery_id)")
        conn.execute("CREATE TABLE build_info (rows INTEGER, seed INTEGER, layout INTEGER)")
        conn.execute("INSERT INTO build_info VALUES (?, ?, ?)", (rows, seed, LAYOUT_VERSION))
        conn.commit()
    finally:
        conn.close()

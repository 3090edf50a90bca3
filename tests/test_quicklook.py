"""Quick looks: the binning checked against numpy and astropy.wcs computed independently on the
same columns, units from the result's own metadata, images cached by checksum.

Results are real Parquet files made by jobdesk's own VOTable conversion from VOTables that
astropy writes (so units and UCDs travel the way a service's FIELDs carry them).
"""

from __future__ import annotations

import math
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq
import pytest
from astropy.io.votable import from_table
from astropy.table import MaskedColumn, Table
from astropy.wcs import WCS

from jobdesk import quicklook, results
from jobdesk.errors import QuickLookUnavailable

SEED = 1919


def _parquet(tmp_path: Path, ra, dec, *, names=("pos_a", "pos_b"), ucd=True,
             ra_unit="deg", extra=None) -> Path:
    t = Table()
    t[names[0]] = ra
    t[names[0]].unit = ra_unit
    t[names[1]] = dec
    t[names[1]].unit = "deg"
    for name, (values, unit) in (extra or {}).items():
        t[name] = values
        t[name].unit = unit
    vt = from_table(t)
    table = vt.get_first_table()
    if ucd:
        table.get_field_by_id(names[0]).ucd = "pos.eq.ra;meta.main"
        table.get_field_by_id(names[1]).ucd = "pos.eq.dec;meta.main"
    src = tmp_path / "r.xml"
    vt.to_xml(str(src), tabledata_format="binary2")
    out = tmp_path / "r.parquet"
    results.to_parquet(src, out)
    return out


def test_positions_by_ucd_before_names():
    cols = [{"name": "ra", "ucd": None}, {"name": "dec", "ucd": None},
            {"name": "x_alpha", "ucd": "pos.eq.ra;meta.main"},
            {"name": "x_delta", "ucd": "pos.eq.dec;meta.main"},
            {"name": "err", "ucd": "stat.error;pos.eq.ra"}]  # secondary word: not a position
    ra, dec = quicklook.positions(cols)
    assert (ra["name"], dec["name"]) == ("x_alpha", "x_delta")
    ra, dec = quicklook.positions(cols[:2])
    assert (ra["name"], dec["name"]) == ("ra", "dec")
    assert quicklook.positions([{"name": "mag", "ucd": "phot.mag"}]) is None


def test_small_region_across_ra_zero_matches_numpy_histogram2d(tmp_path, monkeypatch):
    monkeypatch.setattr(quicklook, "BATCH_ROWS", 1000)  # several batches, summed
    rng = np.random.default_rng(SEED)
    n = 20_000
    ra = np.mod(rng.normal(0.0, 2.0, n), 360.0)  # a field straddling RA 0
    dec = rng.normal(-5.0, 1.5, n)
    path = _parquet(tmp_path, ra, dec)
    m = quicklook.sky(path)
    assert m.projection == "plain" and m.ra_offset == 360.0
    assert m.ra_edges[0] < 0 < m.ra_edges[-1] and m.ra_edges[-1] - m.ra_edges[0] < 30
    # Independent: numpy.histogram2d on the same columns read back by pyarrow alone.
    cols = pq.read_table(path, columns=["pos_a", "pos_b"])
    a, b = cols["pos_a"].to_numpy(), cols["pos_b"].to_numpy()
    a = np.where(a > 180, a - 360, a)
    expected, _, _ = np.histogram2d(a, b, bins=[m.ra_edges, m.dec_edges])
    assert np.array_equal(m.counts, expected.T.astype(np.int64))
    assert m.counts.sum() == n


def test_all_sky_matches_astropy_wcs_ait_and_numpy(tmp_path):
    rng = np.random.default_rng(SEED + 1)
    n = 50_000
    ra = rng.uniform(0, 360, n)
    dec = np.degrees(np.arcsin(rng.uniform(-1, 1, n)))  # uniform on the sphere
    ra_masked = MaskedColumn(ra, mask=np.arange(n) % 97 == 0)  # nulls are not drawn
    path = _parquet(tmp_path, ra_masked, dec, names=("ra", "dec"), ucd=False)
    m = quicklook.sky(path)
    assert m.projection == "hammer-aitoff" and m.missing == int((np.arange(n) % 97 == 0).sum())
    h, w = m.counts.shape
    # Independent projection: wcslib's AIT (Hammer-Aitoff, FITS WCS paper II, Calabretta &
    # Greisen 2002, §5.3.3) through astropy.wcs, RA growing to the left, centred on RA 180.
    wcs = WCS(naxis=2)
    wcs.wcs.ctype = ["RA---AIT", "DEC--AIT"]
    wcs.wcs.crval = [180.0, 0.0]
    wcs.wcs.cdelt = [-2 * quicklook.X_MAX * 180 / math.pi / w,
                     -2 * quicklook.Y_MAX * 180 / math.pi / h]
    wcs.wcs.crpix = [w / 2 + 0.5, h / 2 + 0.5]
    keep = ~ra_masked.mask
    px, py = wcs.all_world2pix(ra[keep], dec[keep], 0)
    expected, _, _ = np.histogram2d(py + 0.5, px + 0.5, bins=[np.arange(h + 1), np.arange(w + 1)])
    assert m.counts.sum() == expected.sum() == keep.sum()
    # Points within rounding of a cell edge may fall either side (two implementations of the
    # same formula): allow 0.1 % of them to move (common practice, no source).
    moved = np.abs(m.counts - expected).sum() / 2
    assert moved <= 0.001 * keep.sum()
    # Equal-area: a uniform sky fills cells inside the ellipse evenly (Poisson scatter).
    inner = m.counts[h // 4: 3 * h // 4, w // 4: 3 * w // 4]
    assert abs(inner.mean() - keep.sum() / (math.pi * w * h / 4)) < 0.1 * inner.mean()


def test_units_come_from_metadata_radians_and_labels(tmp_path):
    rng = np.random.default_rng(SEED + 2)
    ra = np.radians(rng.uniform(10, 11, 2000))
    dec = rng.uniform(40, 41, 2000)
    path = _parquet(tmp_path, ra, dec, ra_unit="rad",
                    extra={"mag_lime": (rng.normal(18, 1, 2000), "mag")})
    m = quicklook.sky(path)
    assert m.projection == "plain"
    assert 9.99 < m.ra_edges[0] < 10.01 and 10.99 < m.ra_edges[-1] < 11.01  # rad -> deg
    svg = quicklook.draw_sky(m)
    assert "pos_a [rad]" in svg and "pos_b [deg]" in svg
    root = ET.fromstring(svg)  # well-formed, with a title for screen readers
    ns = "{http://www.w3.org/2000/svg}"
    assert root.get("role") == "img" and root.find(ns + "title").text.startswith("Sky density")
    hist_svg = quicklook.draw_histogram(quicklook.histogram(path, "mag_lime"))
    assert "mag_lime [mag]" in hist_svg
    ET.fromstring(hist_svg)


def test_histogram_matches_numpy_histogram(tmp_path, monkeypatch):
    monkeypatch.setattr(quicklook, "BATCH_ROWS", 777)
    rng = np.random.default_rng(SEED + 3)
    n = 10_000
    values = rng.normal(17.5, 1.2, n)
    masked = MaskedColumn(values, mask=rng.random(n) < 0.05)
    path = _parquet(tmp_path, rng.uniform(0, 1, n), rng.uniform(0, 1, n),
                    extra={"mag_rose": (masked, "mag")})
    h = quicklook.histogram(path, "mag_rose")
    good = values[~masked.mask]
    counts, edges = np.histogram(good, bins=quicklook.HIST_BINS)  # numpy's own edges
    assert np.allclose(h.edges, edges, rtol=0, atol=1e-12)
    assert np.array_equal(h.counts, counts)
    assert h.missing == int(masked.mask.sum()) and h.rows == n


def test_refusals_are_typed(tmp_path):
    path = _parquet(tmp_path, np.arange(5.0), np.arange(5.0), names=("u", "v"), ucd=False)
    with pytest.raises(QuickLookUnavailable):
        quicklook.sky(path)
    with pytest.raises(QuickLookUnavailable):
        quicklook.histogram(path, "nope")


def test_images_are_cached_by_checksum(tmp_path):
    rng = np.random.default_rng(SEED + 4)
    path = _parquet(tmp_path, rng.uniform(0, 5, 500), rng.uniform(0, 5, 500))
    looks = quicklook.QuickLooks(tmp_path / "desk")
    sha = "ab" * 32
    assert looks.cached(sha, "sky") is None
    first = looks.sky(path, sha)
    assert looks.cached(sha, "sky") == first
    path.unlink()  # served from the cache: the Parquet file is not read again
    assert looks.sky(path, sha) == first

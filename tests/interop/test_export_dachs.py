"""Exports of a result from the independent TAP server (DaCHS), read back by each standard's
reader and compared with what pyvo gets from the same server; provenance against its job."""

from __future__ import annotations

import json
import uuid
import warnings

import numpy as np
import pytest
import pyvo
import requests
from astropy.table import Table

from jobdesk import Desk

from interop_support import TABLE, TAP_URL

WAIT = 120


@pytest.fixture(scope="module")
def result(tmp_path_factory):
    marker = uuid.uuid4().hex[:10]
    # A string column (label), floats, a smallint, and a string literal: the common catalogue
    # query whose FITS export used to fail.
    adql = (f"SELECT TOP 50 obj_id, label, ra, dec, mag_blue, quality, '{marker}' AS tag "
            f"FROM {TABLE} ORDER BY obj_id")
    desk = Desk(tmp_path_factory.mktemp("export-dachs"))
    job = desk.submit(TAP_URL, adql).wait(timeout=WAIT, progress=False)
    reference = pyvo.dal.TAPService(TAP_URL).run_sync(adql).to_table()
    return job, reference


@pytest.mark.parametrize("suffix", [".fits", ".vot", ".parquet", ".h5", ".csv", ".ecsv"])
def test_export_of_a_dachs_result_reads_back_equal_to_pyvos_table(result, tmp_path, suffix):
    job, reference = result
    path, sidecar = job.export(tmp_path / f"r{suffix}")
    if suffix == ".fits":
        from astropy.io import fits
        from astropy.utils.exceptions import AstropyUserWarning
        with warnings.catch_warnings():
            warnings.simplefilter("error", AstropyUserWarning)
            with fits.open(path, checksum=True) as hdul:
                hdul.verify("exception")                  # astropy's FITS standard check
        back = Table.read(path, hdu=1, character_as_bytes=False)
    elif suffix == ".vot":
        from astropy.io.votable import parse
        back = parse(str(path), verify="exception").get_first_table().to_table()
    elif suffix == ".parquet":
        import pyarrow.parquet as pq
        back = Table(pq.read_table(path).to_pydict())
    elif suffix == ".h5":
        back = Table.read(path, path=f"jobdesk/{job.id}", character_as_bytes=False)
    elif suffix == ".csv":
        import csv
        with open(path, newline="", encoding="utf-8") as f:
            rows = list(csv.DictReader(f))                # Python's RFC 4180 reader
        back = Table(rows=[[r[n] for n in reference.colnames] for r in rows],
                     names=reference.colnames)
    else:
        back = Table.read(path, format="ascii.ecsv")
    assert len(back) == len(reference)
    for name in reference.colnames:
        want, got = np.asarray(reference[name]), np.asarray(back[name])
        if want.dtype.kind in "fiu":
            np.testing.assert_allclose(got.astype(float), want.astype(float), rtol=1e-6)
        else:
            assert [str(x) for x in got] == [x.decode() if isinstance(x, bytes) else str(x)
                                              for x in want], name
    assert json.loads(sidecar.read_text())["activity"]


def test_provenance_start_time_is_the_servers(result, tmp_path):
    job, _ = result
    document = requests.get(job.record["job_url"], timeout=30).text
    from lxml import etree
    start = etree.fromstring(document.encode()).findtext(
        "{http://www.ivoa.net/xml/UWS/v1.0}startTime")
    assert start
    _, sidecar = job.export(tmp_path / "r.vot")
    activity = next(iter(json.loads(sidecar.read_text())["activity"].values()))
    # The same instant as DaCHS's startTime, written in the DALI Z form.
    from datetime import datetime
    ours = datetime.fromisoformat(activity["prov:startTime"].replace("Z", "+00:00"))
    theirs = datetime.fromisoformat(start.replace("Z", "+00:00"))
    if theirs.tzinfo is None:
        from datetime import timezone
        theirs = theirs.replace(tzinfo=timezone.utc)
    assert activity["prov:startTime"].endswith("Z")
    assert abs((ours - theirs).total_seconds()) < 0.01

"""pyvo 1.9 as an independent client of the embedded service (real HTTP, real parsing)."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import pyvo
from astropy.table import Table
from pyvo.dal.exceptions import DALOverflowWarning, DALQueryError

QUERY = "SELECT TOP 5 orrery_id, ra, dec FROM orrery.sources"


def test_sync_query(shared_tap):
    service = pyvo.dal.TAPService(shared_tap.url)
    result = service.run_sync(QUERY)   # pyvo/dal/tap.py TAPService.run_sync
    table = result.to_table()
    assert len(table) == 5 and table.colnames == ["orrery_id", "ra", "dec"]
    assert str(table["ra"].unit) == "deg"
    assert result.query_status == "OK"


def test_async_run_async(shared_tap):
    service = pyvo.dal.TAPService(shared_tap.url)
    result = service.run_async(QUERY)   # submit_job + run + wait + fetch_result + delete
    assert len(result) == 5


def test_async_step_by_step(shared_tap):
    service = pyvo.dal.TAPService(shared_tap.url)
    job = service.submit_job(QUERY, runid="pyvo-steps")
    assert job.phase == "PENDING" and job.uws_version == "1.1"   # UWS 1.1 §2.2 version attr
    job.run()
    job.wait(timeout=30)
    assert job.phase == "COMPLETED"
    assert job.job.runid == "pyvo-steps"
    assert len(job.fetch_result().to_table()) == 5
    job.delete()


def test_upload_joins_as_tap_upload(shared_tap):
    service = pyvo.dal.TAPService(shared_tap.url)
    mine = Table({"tid": np.array([10, 20, 30]), "weight": np.array([0.5, 1.5, 2.5])})
    # pyvo sends UPLOAD=mine,param:mine plus a multipart part (pyvo/dal/tap.py TAPQuery.submit)
    result = service.run_sync("SELECT * FROM TAP_UPLOAD.mine", uploads={"mine": mine})
    table = result.to_table()
    assert list(table["tid"]) == [10, 20, 30]
    async_result = service.run_async("SELECT * FROM TAP_UPLOAD.mine", uploads={"mine": mine})
    assert list(async_result.to_table()["weight"]) == [0.5, 1.5, 2.5]


def test_overflow_is_flagged_and_warned_when_unexpected(tap_factory):
    tap = tap_factory(max_rec=4)
    service = pyvo.dal.TAPService(tap.url)
    # pyvo/dal/query.py DALResults.check_overflow_warning: an OVERFLOW at exactly the MAXREC the
    # client asked for is expected (no warning); a cut by the service's own limit warns.
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        asked = service.run_sync("SELECT orrery_id FROM orrery.sources", maxrec=3)
    assert asked.query_status == "OVERFLOW" and len(asked) == 3
    assert not any(issubclass(w.category, DALOverflowWarning) for w in caught)

    with pytest.warns(DALOverflowWarning):
        cut = service.run_sync("SELECT orrery_id FROM orrery.sources")
    assert cut.query_status == "OVERFLOW" and len(cut) == 4   # lowered to --max-rec

    with pytest.warns(DALOverflowWarning):
        cut_async = service.run_async("SELECT orrery_id FROM orrery.sources", maxrec=1000)
    assert len(cut_async) == 4   # a larger MAXREC is lowered to the service maximum


def test_query_error_message_reaches_pyvo(shared_tap):
    service = pyvo.dal.TAPService(shared_tap.url)
    # pyvo/dal/query.py DALResults.__init__ raises DALQueryError with the INFO's text
    with pytest.raises(DALQueryError) as sync_error:
        service.run_sync("SELEKT nothing FROM nowhere")
    assert "line 1" in str(sync_error.value)

    job = service.submit_job("SELEKT nothing FROM nowhere")
    job.run().wait(timeout=30)
    assert job.phase == "ERROR"
    with pytest.raises(DALQueryError) as async_error:
        job.raise_if_error()   # pyvo reads errorSummary's message (pyvo/dal/tap.py)
    assert "line 1" in str(async_error.value)


def test_capabilities_and_tables(shared_tap):
    service = pyvo.dal.TAPService(shared_tap.url)
    # TAPRegExt outputLimit and uploadMethod, read through pyvo/dal/tap.py properties
    assert service.maxrec == 100_000 and service.hardlimit == 100_000
    assert "ivo://ivoa.net/std/TAPRegExt#upload-inline" in [m.ivo_id for m in service.upload_methods]
    names = [t.name for t in service.tables]   # VOSI tables via pyvo.io.vosi
    assert "orrery.sources" in names
    columns = {c.name: c for c in service.tables["orrery.sources"].columns}
    assert columns["ra"].unit == "deg"

"""A cached result is served while the independent server is down.

This module stops DaCHS and starts it again (the ``dachs_control`` fixture always restarts it);
its name sorts after the other interop modules so that nothing else runs against a stopped
server.
"""

from __future__ import annotations

import numpy as np
import pytest

from jobdesk import Desk
from jobdesk.errors import ServiceUnreachable

from interop_support import TABLE, TAP_URL, server_available

WAIT = 120


def test_cache_hit_with_the_server_stopped(tmp_path, marker, dachs_control):
    adql = f"SELECT obj_id, ra, dec, '{marker}' AS m FROM {TABLE} WHERE obj_id <= 25 ORDER BY obj_id"
    job = Desk(root=tmp_path).submit(TAP_URL, adql, maxrec=1000)
    job.wait(timeout=WAIT, progress=False)
    before = job.table()
    assert len(before) == 25

    dachs_control.stop()
    assert server_available(timeout=2) is not None      # really down
    desk = Desk(root=tmp_path)                          # a fresh desk, as after a kernel restart
    again = desk.submit(TAP_URL, adql, maxrec=1000)
    assert again.id == job.id and again.ready
    again.wait(timeout=5, progress=False)               # finished: no service needed
    after = again.table()
    assert list(after["obj_id"]) == list(before["obj_id"])
    np.testing.assert_array_equal(np.asarray(after["ra"]), np.asarray(before["ra"]))

    # a query not in the cache meets the stopped service as a typed error (at submit or wait)
    other = adql.replace("<= 25", "<= 26")
    with pytest.raises(ServiceUnreachable):
        desk.submit(TAP_URL, other, maxrec=1000).wait(timeout=30, progress=False)

    dachs_control.start()
    fresh = desk.submit(TAP_URL, other, maxrec=1000)     # "re-run the same call later"
    fresh.wait(timeout=WAIT, progress=False)
    assert fresh.rows == 26

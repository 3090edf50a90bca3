"""Result formats end to end: negotiation, equal tables whatever the bytes, bad binary input.

Real HTTP to the embedded service (which lists TABLEDATA, BINARY2 and VOParquet in its
capabilities). Outside references: astropy.io.votable (TABLEDATA, BINARY2), astropy's VOParquet
reader ``Table.read(..., format="parquet.votable")`` and pyvo's answer to the same query.
Failures of a service are injected by swapping the embedded service's writer for one format in
this process (monkeypatch): the embedded service itself writes every format correctly, so a
failing one cannot be had otherwise.
"""

from __future__ import annotations

import io

import numpy as np
import pytest
import requests
from astropy.io.votable import parse
from astropy.table import Table

from jobdesk import Desk, JobFailed, QueryRejected, formats, keys
from jobdesk.localtap import serve
from jobdesk.localtap import votable_out

ROWS = 3000
QUERY = ("SELECT orrery_id, ra, dec, parallax, mag_rose, var_flag, class_label "
         "FROM orrery.sources WHERE dec > 10 ORDER BY orrery_id")
EXPLICIT = {"votable": "TABLEDATA", "votable/b2": "BINARY2",
            formats.VOPARQUET: "VOParquet"}


@pytest.fixture(scope="module")
def tap(tmp_path_factory):
    with serve(state=tmp_path_factory.mktemp("tap"), rows=ROWS) as service:
        yield service


@pytest.fixture
def desk(tmp_path):
    return Desk(tmp_path / "desk", wait_window=5)


def _values(col):
    """Values with nulls as None; float NaN counts as null (VOTable 1.4 §6), strings as text."""
    mask = np.ma.getmaskarray(col)
    data = np.asarray(getattr(col, "data", col))
    out = []
    for v, m in zip(data.tolist(), mask.tolist()):
        if m or (isinstance(v, float) and v != v):
            out.append(None)
        else:
            out.append(v.decode() if isinstance(v, bytes) else v)
    return out


def assert_tables_equal(ref, got, *, what):
    assert ref.colnames == got.colnames, what
    assert len(ref) == len(got), what
    for name in ref.colnames:
        r, g = _values(ref[name]), _values(got[name])
        if ref[name].dtype.kind in "OUS":
            r = ["" if v is None else str(v) for v in r]   # an empty TD is "" (VOTable 1.4 §2.1)
            g = ["" if v is None else str(v) for v in g]
        assert r == g, f"{what}: column {name} differs"


def test_negotiation_picks_voparquet_and_records_it(tap, desk):
    job = desk.submit(tap.url, QUERY).wait(progress=False)
    record = job.record
    assert record["fmt"] is None
    assert record["result_fmt"] == formats.VOPARQUET
    prov = job.provenance()
    assert prov["parameters"]["RESPONSEFORMAT"] == formats.VOPARQUET
    assert prov["format_requested"] is None
    # the key is the default format's, not the negotiated one's
    assert job.key == keys.query_key(keys.service_id(tap.url), QUERY, maxrec=None,
                                     fmt="votable", scope="anonymous")
    assert len(job.table()) == record["rows"] > 0


def test_explicit_format_wins_and_keys_differ(tap, desk):
    job = desk.submit(tap.url, QUERY, fmt="votable/b2").wait(progress=False)
    assert job.record["result_fmt"] == job.record["fmt"] == "votable/b2"
    assert job.key != desk.submit(tap.url, QUERY).key


def test_the_table_is_the_same_whichever_format_carried_it(tap, desk):
    import pyvo

    tables = {}
    for fmt, name in EXPLICIT.items():
        job = desk.submit(tap.url, QUERY, fmt=fmt).wait(progress=False)
        got = job.table()
        raw = desk.store.path(job.record["result_sha256"])
        if fmt == formats.VOPARQUET:
            # astropy's VOParquet reader (IVOA VOParquet 1.0 Note: VOTable in the footer)
            ref = Table.read(raw, format="parquet.votable")
        else:
            ref = parse(str(raw)).get_first_table().to_table()   # astropy.io.votable
        assert_tables_equal(ref, got, what=f"{name} vs astropy")
        for column in ("ra", "parallax"):
            assert str(got[column].unit) == "deg" if column == "ra" else str(got[column].unit)
        tables[name] = got
    tables["negotiated"] = desk.submit(tap.url, QUERY).wait(progress=False).table()
    for name, t in tables.items():
        assert_tables_equal(tables["TABLEDATA"], t, what=f"TABLEDATA vs {name}")
        assert [t[c].dtype for c in t.colnames if t[c].dtype.kind != "O"] == \
            [tables["TABLEDATA"][c].dtype for c in t.colnames if t[c].dtype.kind != "O"]
        assert t["ra"].unit == tables["TABLEDATA"]["ra"].unit
        assert t["ra"].description == tables["TABLEDATA"]["ra"].description
    # pyvo's own answer to the same query on the same service
    theirs = pyvo.dal.TAPService(tap.url).run_sync(QUERY).to_table()
    assert_tables_equal(theirs, tables["negotiated"], what="pyvo vs negotiated")


def test_embedded_service_voparquet_keeps_metadata_for_astropy(tap):
    # IVOA VOParquet 1.0 Note, the section on the embedded VOTable: the footer key
    # IVOA.VOTable-Parquet.content holds the VOTable with its FIELDs; astropy rebuilds units,
    # UCDs and descriptions from it.
    answer = requests.post(f"{tap.url}/sync", data={"LANG": "ADQL", "QUERY": QUERY,
                                                     "RESPONSEFORMAT": formats.VOPARQUET},
                           timeout=60)
    assert answer.headers["Content-Type"].startswith(formats.VOPARQUET)
    t = Table.read(io.BytesIO(answer.content), format="parquet.votable")
    assert str(t["ra"].unit) == "deg"
    assert t["ra"].meta.get("ucd") == "pos.eq.ra;meta.main"
    assert t["ra"].description
    assert t["orrery_id"].dtype == np.int64 and t["var_flag"].dtype == np.int16


def _caps_list_voparquet(tap):
    caps = requests.get(f"{tap.url}/capabilities", timeout=30).text
    return formats.VOPARQUET in caps


def test_a_listed_format_that_fails_gets_one_retry_with_the_default(tap, desk, monkeypatch):
    assert _caps_list_voparquet(tap)

    def not_parquet(out, result, **kw):
        out.write(b"this is not what was promised")
        return votable_out.Written(rows=0, overflow=False)

    monkeypatch.setitem(votable_out.WRITERS, "parquet", not_parquet)
    job = desk.submit(tap.url, QUERY + " ", label="fallback").wait(progress=False)
    assert job.record["result_fmt"] == formats.DEFAULT
    notes = " ".join(h.get("note") or "" for h in desk.index.history(job.id))
    assert f"RESPONSEFORMAT={formats.VOPARQUET}" in notes and "retrying once" in notes
    assert len(job.table()) > 0


def _cut_footer(out, result, **kw):
    buffer = io.BytesIO()
    written = votable_out.write_parquet(buffer, result, **kw)
    out.write(buffer.getvalue()[:-40])            # the footer's end (length and PAR1) is gone
    return written


def _corrupt_footer(out, result, **kw):
    buffer = io.BytesIO()
    written = votable_out.write_parquet(buffer, result, **kw)
    data = bytearray(buffer.getvalue())
    data[-200:-8] = b"\xff" * 192                  # metadata bytes garbled, length kept
    out.write(bytes(data))
    return written


def _binary2_cut_mid_row(out, result, **kw):
    buffer = io.BytesIO()
    written = votable_out.write_binary2(buffer, result, **kw)
    text = buffer.getvalue()
    end = text.index(b"</STREAM>")
    payload = b"".join(text[:end].split(b'encoding="base64">', 1)[1].split())
    import base64
    raw = base64.b64decode(payload)[:-5]            # the last row loses its last 5 bytes
    cut = base64.encodebytes(raw)
    head = text.split(b'encoding="base64">', 1)[0] + b'encoding="base64">\n'
    out.write(head + cut + text[end:])
    return written


@pytest.mark.parametrize("fmt, writer, fault, says", [
    (formats.VOPARQUET, "parquet", _cut_footer, "footer"),
    (formats.VOPARQUET, "parquet", _corrupt_footer, "footer"),
    ("votable/b2", "binary2", _binary2_cut_mid_row, "inside a row"),
    ("votable/b2", "binary2", votable_out.write_tabledata, "declared serialization=BINARY2"),
])
def test_bad_binary_input_is_refused_naming_the_job_and_the_next_attempt_is_clean(
        tap, desk, monkeypatch, fmt, writer, fault, says):
    monkeypatch.setitem(votable_out.WRITERS, writer, fault)
    job = desk.submit(tap.url, QUERY, fmt=fmt)
    with pytest.raises(JobFailed, match=says) as caught:
        job.wait(progress=False)
    assert job.id in str(caught.value)
    assert job.record["parquet_sha256"] is None
    assert not list(desk.store.root.rglob("*.partial"))
    monkeypatch.undo()
    again = desk.submit(tap.url, QUERY, fmt=fmt)
    assert again.id != job.id
    assert len(again.wait(progress=False).table()) > 0


def test_a_job_error_naming_the_format_gets_one_retry_but_other_errors_do_not(tap, desk,
                                                                                monkeypatch):
    def refuses(out, result, **kw):
        raise ValueError("cannot write this result as Parquet")

    monkeypatch.setitem(votable_out.WRITERS, "parquet", refuses)
    job = desk.submit(tap.url, QUERY + "  ", label="job error").wait(progress=False)
    assert job.record["result_fmt"] == formats.DEFAULT
    assert job.record["run_id"].endswith("-default")   # a RUNID of its own for the retry
    assert len(job.table()) > 0
    # a bad query is not the format's fault: it fails once, no second run
    with pytest.raises((JobFailed, QueryRejected)):
        desk.submit(tap.url, "SELECT nothing_here FROM orrery.sources").wait(progress=False)
    bad = desk.jobs(limit=1)[0]
    assert bad.record["result_fmt"] == formats.VOPARQUET


@pytest.mark.parametrize("fmt", list(EXPLICIT))
def test_overflow_is_known_in_every_format(tap, desk, fmt):
    # DALI 1.1 §4.4.1: OVERFLOW follows the table; VOParquet's footer, written last, carries it
    job = desk.submit(tap.url, QUERY, maxrec=50, fmt=fmt)
    with pytest.warns(Warning):
        job.wait(progress=False)
    assert job.truncated is True and job.rows == 50

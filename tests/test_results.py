"""VOTable results -> Parquet -> astropy/pandas, checked against astropy's own VOTable reader.

astropy's writer makes the documents and astropy's parser is the independent reference for the
values; hand-built documents cover what astropy does not write (OVERFLOW after the TABLE, error
documents, hostile XML).
"""

from __future__ import annotations

import json
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq
import pytest
from astropy.io.votable import from_table, parse
from astropy.table import MaskedColumn, Table

from jobdesk import results, votable_stream
from jobdesk.errors import ServiceResponseInvalid

SEED = 20240611
SERIALIZATIONS = ["tabledata", "binary", "binary2"]


# --- fixtures: invented tables written by astropy --------------------------------------------


def invented_table(n: int, seed: int = SEED) -> Table:
    """An invented catalogue slice: every datatype we map, nulls, unicode and arrays."""
    rng = np.random.default_rng(seed)
    t = Table()
    t["obj_id"] = MaskedColumn(rng.integers(-2**62, 2**62, n), mask=rng.random(n) < 0.1)
    t["field_no"] = MaskedColumn(rng.integers(-1000, 1000, n).astype("i4"), mask=rng.random(n) < 0.1)
    t["chip"] = rng.integers(-300, 300, n).astype("i2")
    t["flags"] = rng.integers(0, 255, n).astype("u1")
    t["ra"] = MaskedColumn(rng.uniform(0, 360, n), mask=rng.random(n) < 0.1)
    t["ra"].unit = "deg"
    t["ra"].description = "right ascension of the invented source"
    t["mag"] = MaskedColumn(rng.normal(18, 2, n).astype("f4"), mask=rng.random(n) < 0.1)
    t["mag"].unit = "mag"
    t["pm"] = rng.normal(size=n)
    t["pm"].unit = "mas/yr"
    t["label"] = np.array(["".join(rng.choice(list("abc xyz"), rng.integers(0, 9)))
                           for _ in range(n)])
    t["note"] = np.array(["".join(rng.choice(list("aé漢zΩ"), rng.integers(0, 6)))
                          for _ in range(n)])
    t["good"] = MaskedColumn(rng.random(n) < 0.5, mask=rng.random(n) < 0.1)
    t["pos_err"] = rng.normal(size=(n, 3))
    t["phase"] = rng.normal(size=n) + 1j * rng.normal(size=n)
    return t


def write_votable(t: Table, path: Path, fmt: str, *, var_array: bool = False) -> Path:
    vt = from_table(t)
    table = vt.get_first_table()
    # integer nulls need a VALUES null in BINARY (VOTable 1.4 §4.6); astropy writes it.
    table.get_field_by_id("obj_id").values.null = -1
    table.get_field_by_id("field_no").values.null = -999
    table.get_field_by_id("ra").ucd = "pos.eq.ra;meta.main"
    vt.to_xml(str(path), tabledata_format=fmt)
    return path


def reference(path: Path) -> Table:
    return parse(str(path)).get_first_table().to_table()


def assert_same_column(ref, got, name):
    ref_mask = np.ma.getmaskarray(ref)
    got_mask = np.ma.getmaskarray(got)
    assert ref_mask.shape == got_mask.shape, name
    assert np.array_equal(ref_mask, got_mask), f"{name}: masks differ"
    ref_data = np.asarray(ref.data if hasattr(ref, "mask") else ref)
    got_data = np.asarray(got.data if hasattr(got, "mask") else got)
    keep = ~ref_mask
    if ref_data.dtype.kind in "UO" or got_data.dtype.kind in "UO":
        assert [str(x) for x in ref_data[keep]] == [str(x) for x in got_data[keep]], name
    else:
        np.testing.assert_array_equal(ref_data[keep], got_data[keep], err_msg=name)
        assert got_data.dtype == ref_data.dtype, f"{name}: {got_data.dtype} != {ref_data.dtype}"


# --- values round-trip ---------------------------------------------------------------------


@pytest.mark.parametrize("fmt", SERIALIZATIONS)
def test_values_round_trip_as_astropy_reads_them(tmp_path, fmt):
    src = write_votable(invented_table(2500), tmp_path / f"r.{fmt}.xml", fmt)
    out = tmp_path / "r.parquet"
    summary = results.to_parquet(src, out)
    ref = reference(src)
    got = results.load_table(out)
    assert summary.rows == len(ref) == len(got) == 2500
    assert got.colnames == ref.colnames
    for name in ref.colnames:
        assert_same_column(ref[name], got[name], name)


@pytest.mark.parametrize("fmt", SERIALIZATIONS)
def test_many_batches_and_tiny_reads_give_the_same_values(tmp_path, fmt, monkeypatch):
    # Small batches and 1 kB reads: base64 and rows split across every possible boundary.
    monkeypatch.setattr(votable_stream, "BATCH_CELLS", 700)
    monkeypatch.setattr(votable_stream, "BATCH_ROWS", 50)
    monkeypatch.setattr(votable_stream, "READ_CHUNK", 1024)
    monkeypatch.setattr(results, "ROW_GROUP_ROWS", 120)
    src = write_votable(invented_table(1500, seed=SEED + 1), tmp_path / "b.xml", fmt)
    out = tmp_path / "b.parquet"
    assert results.to_parquet(src, out).rows == 1500
    assert pq.ParquetFile(out).metadata.num_row_groups > 1
    ref, got = reference(src), results.load_table(out)
    for name in ref.colnames:
        assert_same_column(ref[name], got[name], name)


def _unmasked(values: np.ndarray) -> np.ma.MaskedArray:
    return np.ma.MaskedArray(values, mask=np.zeros(len(values), dtype=bool))


@pytest.mark.parametrize("fmt", SERIALIZATIONS)
def test_variable_length_arrays_and_strings(tmp_path, fmt):
    rng = np.random.default_rng(SEED + 2)
    n = 300
    t = Table()
    # astropy's binary writer wants masked arrays as the cells of variable-length columns
    t["samples"] = np.array([_unmasked(rng.normal(size=rng.integers(0, 6))) for _ in range(n)],
                            dtype=object)
    t["counts"] = np.array([_unmasked(rng.integers(0, 99, rng.integers(1, 4)).astype("i4"))
                            for _ in range(n)], dtype=object)
    t["word"] = np.array(["".join(rng.choice(list("pqrΩ"), rng.integers(0, 12))) for _ in range(n)],
                         dtype=object)
    t["code"] = np.array(["".join(rng.choice(list("ABC-"), rng.integers(0, 7))) for _ in range(n)],
                         dtype=object)
    # fixed fields after variable ones, with nulls (BINARY2 null bits, VALUES null in BINARY)
    t["after"] = MaskedColumn(rng.integers(0, 50, n).astype("i4"), mask=rng.random(n) < 0.2)
    t["last"] = MaskedColumn(rng.normal(size=n), mask=rng.random(n) < 0.2)
    vt = from_table(t)
    vt.get_first_table().get_field_by_id("after").values.null = -7
    src = tmp_path / "v.xml"
    vt.to_xml(str(src), tabledata_format=fmt)
    out = tmp_path / "v.parquet"
    results.to_parquet(src, out)
    ref, got = reference(src), results.load_table(out)
    for name in ("samples", "counts"):
        assert len(ref[name]) == len(got[name]) == n
        for a, b in zip(ref[name], got[name]):
            np.testing.assert_array_equal(np.asarray(a), np.asarray(b))
    for name in ("word", "code"):
        assert [str(x) for x in ref[name]] == [str(x) for x in got[name]], name
    for name in ("after", "last"):
        assert_same_column(ref[name], got[name], name)
    assert got["after"].mask.any() and got["last"].mask.any()
    fields = {f["name"]: f for f in results.scan(src).fields}
    assert fields["code"]["arraysize"] == "*"


@pytest.mark.parametrize("binary2", [False, True])
def test_hand_built_binary_stream_with_variable_char(tmp_path, binary2):
    # VOTable 1.4 §5.4 (BINARY): big-endian values, a 4-byte count before variable-length ones;
    # §5.5 (BINARY2): a null bitmask (one bit per FIELD, MSB first) heads every row.
    import base64
    import struct

    rng = np.random.default_rng(SEED + 3)
    rows = []
    for k in range(257):
        name = "".join(rng.choice(list("abcdef_"), rng.integers(0, 10))).encode()
        num = None if binary2 and k % 5 == 0 else int(rng.integers(-99, 99))
        mag = float("nan") if k % 7 == 0 else float(rng.normal())
        rows.append((name, num, mag))
    payload = bytearray()
    for name, num, mag in rows:
        if binary2:
            payload.append(0b01000000 if num is None else 0)
        payload += struct.pack(">I", len(name)) + name
        payload += struct.pack(">i", -1 if num is None else num)   # masked: any value
        payload += struct.pack(">d", mag)
    tag = "BINARY2" if binary2 else "BINARY"
    doc = _doc(f"""<TABLE>
      <FIELD name="name" datatype="char" arraysize="*"/>
      <FIELD name="num" datatype="int"/>
      <FIELD name="mag" datatype="double" unit="mag"/>
      <DATA><{tag}><STREAM encoding="base64">
{base64.encodebytes(bytes(payload)).decode()}</STREAM></{tag}></DATA></TABLE>""")
    src = _write(tmp_path / "hb.xml", doc)
    out = tmp_path / "hb.parquet"
    assert results.to_parquet(src, out).rows == 257
    ref, got = reference(src), results.load_table(out)
    for name in ref.colnames:
        assert_same_column(ref[name], got[name], name)
    assert list(got["name"][:3]) == [r[0].decode() for r in rows[:3]]


def test_tabledata_conventions_by_hand(tmp_path):
    # VOTable 1.4 §6: hexadecimal integers, NaN/Inf spellings, VALUES null, whitespace in TDs,
    # boolean spellings (§2.1), and short rows (fewer TDs than FIELDs).
    doc = _doc("""
      <TABLE>
        <FIELD name="n" datatype="int"><VALUES null="-1"/></FIELD>
        <FIELD name="x" datatype="double"/>
        <FIELD name="ok" datatype="boolean"/>
        <FIELD name="s" datatype="char" arraysize="*"/>
        <DATA><TABLEDATA>
          <TR><TD>0x1F</TD><TD> +Inf </TD><TD>T</TD><TD>a&amp;b</TD></TR>
          <TR><TD>-1</TD><TD>NaN</TD><TD>false</TD><TD></TD></TR>
          <TR><TD> 7 </TD><TD>-1.5e3</TD><TD>?</TD><TD>  padded  </TD></TR>
        </TABLEDATA></DATA>
      </TABLE>""")
    src = _write(tmp_path / "h.xml", doc)
    out = tmp_path / "h.parquet"
    assert results.to_parquet(src, out).rows == 3
    ref, got = reference(src), results.load_table(out)
    for name in ref.colnames:
        assert_same_column(ref[name], got[name], name)
    assert list(got["n"].filled(0)) == [31, 0, 7]
    assert got["n"].mask.tolist() == [False, True, False]


def test_pyarrow_reads_the_file_alone_with_column_metadata(tmp_path):
    src = write_votable(invented_table(50), tmp_path / "m.xml", "binary2")
    out = tmp_path / "m.parquet"
    results.to_parquet(src, out, metadata={"provenance": json.dumps({"service": "local"})})
    table = pq.read_table(out)              # independent reader, no jobdesk code
    assert table.num_rows == 50
    ra = table.schema.field("ra").metadata
    assert ra[b"unit"] == b"deg" and ra[b"ucd"] == b"pos.eq.ra;meta.main"
    assert ra[b"datatype"] == b"double"
    assert b"right ascension" in ra[b"description"]
    meta = table.schema.metadata
    assert json.loads(meta[b"provenance"]) == {"service": "local"}
    assert json.loads(meta[results.SUMMARY_KEY.encode()])["rows"] == 50
    assert results.read_metadata(out) == {"provenance": json.dumps({"service": "local"})}
    # the same keys in the Parquet footer, for readers that do not rebuild an Arrow schema
    footer = pq.read_metadata(out).metadata
    assert footer[b"provenance"] == meta[b"provenance"]
    assert results.read_summary(out).rows == 50


def test_units_descriptions_ucds_survive_to_table_and_frame(tmp_path):
    src = write_votable(invented_table(40), tmp_path / "u.xml", "tabledata")
    out = tmp_path / "u.parquet"
    results.to_parquet(src, out)
    ref, got = reference(src), results.load_table(out)
    for name in ("ra", "mag", "pm"):
        assert got[name].unit == ref[name].unit, name
    assert got["ra"].description == ref["ra"].description
    assert got["ra"].meta["ucd"] == "pos.eq.ra;meta.main"
    frame = results.load_frame(out)
    assert frame.attrs["units"]["ra"] == "deg"
    assert frame.attrs["ucds"]["ra"] == "pos.eq.ra;meta.main"
    assert "right ascension" in frame.attrs["descriptions"]["ra"]
    # 64-bit identifiers with nulls stay exact integers, not floats
    assert str(frame["obj_id"].dtype) == "Int64"
    keep = ~np.ma.getmaskarray(ref["obj_id"])
    assert list(frame["obj_id"][keep]) == list(ref["obj_id"][keep])
    assert frame["obj_id"].isna().sum() == np.ma.getmaskarray(ref["obj_id"]).sum()


# --- status, overflow and errors -----------------------------------------------------------


def _doc(body: str, *, version: str = "1.4") -> str:
    return ('<?xml version="1.0" encoding="UTF-8"?>\n'
            f'<VOTABLE version="{version}" xmlns="http://www.ivoa.net/xml/VOTable/v1.3">\n'
            f'<RESOURCE type="results">\n{body}\n</RESOURCE>\n</VOTABLE>\n')


def _write(path: Path, text: str | bytes) -> Path:
    path.write_bytes(text.encode() if isinstance(text, str) else text)
    return path


_ONE_ROW_TABLE = """
  <TABLE><FIELD name="a" datatype="int"/><DATA><TABLEDATA>
    <TR><TD>1</TD></TR><TR><TD>2</TD></TR>
  </TABLEDATA></DATA></TABLE>"""


def test_overflow_after_the_table_is_the_status(tmp_path):
    # DALI 1.1 §4.4.1: QUERY_STATUS=OK before the TABLE, OVERFLOW appended after it.
    src = _write(tmp_path / "o.xml", _doc(
        '<INFO name="QUERY_STATUS" value="OK"/>' + _ONE_ROW_TABLE
        + '<INFO name="QUERY_STATUS" value="OVERFLOW">row limit reached</INFO>'))
    out = tmp_path / "o.parquet"
    summary = results.to_parquet(src, out)
    assert (summary.status, summary.rows, summary.truncated) == ("OVERFLOW", 2, True)
    assert summary.message == "row limit reached"
    assert results.load_table(out).meta["status"] == "OVERFLOW"
    assert results.scan(src).status == "OVERFLOW"


def test_last_query_status_wins_and_default_is_ok(tmp_path):
    two = _write(tmp_path / "two.xml", _doc(
        '<INFO name="QUERY_STATUS" value="OVERFLOW"/>' + _ONE_ROW_TABLE
        + '<INFO name="QUERY_STATUS" value="OK"/>'))
    assert results.scan(two).status == "OK"
    none = _write(tmp_path / "none.xml", _doc(_ONE_ROW_TABLE))
    assert results.scan(none).status == "OK"
    # a QUERY_STATUS in another RESOURCE (e.g. a DataLink "meta" one) does not count
    meta = _write(tmp_path / "meta.xml", _doc(_ONE_ROW_TABLE).replace(
        "</VOTABLE>", '<RESOURCE type="meta"><INFO name="QUERY_STATUS" value="ERROR"/>'
        "</RESOURCE></VOTABLE>"))
    assert results.scan(meta).status == "OK"


def test_error_document(tmp_path):
    # DALI 1.1 §4.4.1 / TAP 1.1 §2.9: the message is the INFO's content.
    body = _doc('<INFO name="QUERY_STATUS" value="ERROR">column "magg" does not exist</INFO>'
                '<INFO name="server_software" value="localtap 0.1"/>')
    assert results.error_message(body.encode()) == 'column "magg" does not exist'
    summary = results.scan(_write(tmp_path / "e.xml", body))
    assert summary.status == "ERROR" and summary.rows == 0
    assert summary.infos["server_software"] == "localtap 0.1"
    assert results.error_message(_doc(_ONE_ROW_TABLE).encode()) is None
    assert results.error_message(b"<html><body>502 Bad Gateway</body></html>") is None


def test_error_inside_a_valid_document_and_infos(tmp_path):
    src = _write(tmp_path / "ei.xml", textwrap.dedent("""\
        <VOTABLE version="1.3" xmlns="http://www.ivoa.net/xml/VOTable/v1.3">
        <INFO name="request_date" value="2024-06-11T10:00:00Z"/>
        <RESOURCE type="results">
          <INFO name="QUERY" value="SELECT a FROM demo.objects"/>
          <INFO name="QUERY_STATUS" value="OK"/>""") + _ONE_ROW_TABLE + """
          <INFO name="QUERY_STATUS" value="ERROR">query timed out while writing rows</INFO>
        </RESOURCE></VOTABLE>""")
    out = tmp_path / "ei.parquet"
    summary = results.to_parquet(src, out)
    assert summary.status == "ERROR"
    assert summary.message == "query timed out while writing rows"
    assert summary.infos == {"request_date": "2024-06-11T10:00:00Z",
                             "QUERY": "SELECT a FROM demo.objects"}
    assert summary.fields[0]["name"] == "a" and summary.fields[0]["datatype"] == "int"


def test_metadata_only_result_has_schema(tmp_path):
    # TAP 1.1 §2.7.4: MAXREC=0 gives the table's metadata and no rows.
    src = _write(tmp_path / "z.xml", _doc(
        '<INFO name="QUERY_STATUS" value="OVERFLOW"/><TABLE>'
        '<FIELD name="ra" datatype="double" unit="deg"/></TABLE>'))
    out = tmp_path / "z.parquet"
    summary = results.to_parquet(src, out)
    assert summary.rows == 0 and summary.status == "OVERFLOW"
    t = results.load_table(out)
    assert t.colnames == ["ra"] and len(t) == 0 and str(t["ra"].unit) == "deg"


# --- broken and hostile documents -----------------------------------------------------------


@pytest.mark.parametrize("fmt", SERIALIZATIONS)
def test_truncated_documents_are_refused_and_leave_no_file(tmp_path, fmt):
    full = write_votable(invented_table(400), tmp_path / "full.xml", fmt).read_bytes()
    for cut in (len(full) // 3, len(full) // 2, len(full) - 30):
        src = _write(tmp_path / "cut.xml", full[:cut])
        out = tmp_path / "cut.parquet"
        with pytest.raises(ServiceResponseInvalid):
            results.to_parquet(src, out)
        assert not out.exists()
        assert [p.name for p in tmp_path.iterdir() if "partial" in p.name] == []


def test_values_that_do_not_fit_their_datatype_are_refused(tmp_path):
    # VOTable 1.4 §2.1: unsignedByte is 0..255; "abc" is no number.
    for cell in ("300", "abc"):
        src = _write(tmp_path / "fit.xml", _doc(
            '<TABLE><FIELD name="b" datatype="unsignedByte"/>'
            f"<DATA><TABLEDATA><TR><TD>{cell}</TD></TR></TABLEDATA></DATA></TABLE>"))
        with pytest.raises(ServiceResponseInvalid, match="'b'"):
            results.to_parquet(src, tmp_path / "fit.parquet")


def test_byte_order_mark_is_accepted(tmp_path):
    src = _write(tmp_path / "bom.xml", b"\xef\xbb\xbf" + _doc(_ONE_ROW_TABLE).encode())
    assert results.scan(src).rows == 2


def test_rows_with_missing_cells_are_refused(tmp_path):
    # VOTable 1.4 §5.2: a TR holds one TD per FIELD.
    src = _write(tmp_path / "short.xml", _doc(
        '<TABLE><FIELD name="a" datatype="int"/><FIELD name="b" datatype="int"/>'
        "<DATA><TABLEDATA><TR><TD>1</TD><TD>2</TD></TR><TR><TD>3</TD></TR>"
        "</TABLEDATA></DATA></TABLE>"))
    with pytest.raises(ServiceResponseInvalid, match="row 2 has 1 cells for 2 FIELDs"):
        results.to_parquet(src, tmp_path / "short.parquet")


@pytest.mark.parametrize("body,found", [
    (b"<!DOCTYPE html><html><body><h1>502 Bad Gateway</h1></body></html>", "DTD"),
    (b"<html><body><h1>502 Bad Gateway</h1></body></html>", "<html>"),
    (b"Service temporarily unavailable", "Service temporarily"),
    (b"", "empty"),
    (b"<VOTABLE><RESOURCE>", "truncated"),
    (b"<VOTABLE><RESOURCE></VOTABLE>", "malformed"),
])
def test_non_votable_answers_say_what_was_found(tmp_path, body, found):
    with pytest.raises(ServiceResponseInvalid, match=found):
        results.scan(_write(tmp_path / "x.xml", body))


_META_THEN_RESULTS = (
    '<?xml version="1.0" encoding="UTF-8"?>\n'
    '<VOTABLE version="1.4" xmlns="http://www.ivoa.net/xml/VOTable/v1.3">\n'
    '<RESOURCE type="results"><INFO name="QUERY_STATUS" value="ERROR">  table  "orrery.nope"\n'
    ' is not known </INFO></RESOURCE>\n'
    '<RESOURCE type="meta"><INFO name="QUERY_STATUS" value="OK"/></RESOURCE>\n</VOTABLE>\n')


@pytest.mark.parametrize("body", [
    _doc('<INFO name="QUERY_STATUS" value="ERROR">column "magg" does not exist</INFO>'),
    _doc('<INFO name="QUERY_STATUS" value="OK"/>' + _ONE_ROW_TABLE
         + '<INFO name="QUERY_STATUS" value="OVERFLOW"/>'),
    _doc(_ONE_ROW_TABLE).replace("</VOTABLE>", '<RESOURCE type="meta"><INFO name="QUERY_STATUS" '
                                 'value="ERROR">not about the result</INFO></RESOURCE></VOTABLE>'),
    _doc('<INFO name="QUERY_STATUS" value="ERROR">first</INFO>'
         '<INFO name="QUERY_STATUS" value="ERROR">second and last</INFO>'),
    _META_THEN_RESULTS,
], ids=["error", "overflow", "meta-error", "last-wins", "results-before-meta"])
def test_error_documents_are_read_by_one_rule_everywhere(tmp_path, body):
    # DALI 1.1 §4.4.1: the QUERY_STATUS INFOs of the RESOURCE of type "results" count, the last
    # one wins; a "meta" resource's does not. The HTTP side (remote) and the streaming scan
    # must agree on every document; remote uses the very same reader.
    from jobdesk import remote

    assert remote._error_votable_message is results.error_message
    summary = results.scan(_write(tmp_path / "d.xml", body))
    message = results.error_message(body.encode())
    assert (message is not None) == (summary.status == "ERROR")
    if message is not None:
        assert message == summary.message.strip()
        # the reference reader (astropy) sees the same words in the results RESOURCE's INFO
        table = parse(str(tmp_path / "d.xml"))
        infos = [i for r in table.resources if r.type == "results" for i in r.infos
                 if i.name == "QUERY_STATUS"]
        assert infos[-1].value == "ERROR"
        assert message == (infos[-1].content or "").strip()


def test_entity_expansion_bomb_is_refused(tmp_path):
    lol = "".join(f'<!ENTITY l{i} "{"&l%d;" % (i - 1) * 10}">' for i in range(1, 10))
    body = (f'<?xml version="1.0"?><!DOCTYPE VOTABLE [<!ENTITY l0 "lol">{lol}]>'
            '<VOTABLE><RESOURCE type="results"><INFO name="QUERY_STATUS" value="ERROR">&l9;'
            '</INFO></RESOURCE></VOTABLE>')
    src = _write(tmp_path / "bomb.xml", body)
    with pytest.raises(ServiceResponseInvalid, match="unsafe"):
        results.to_parquet(src, tmp_path / "bomb.parquet")
    assert results.error_message(body.encode()) is None
    assert not (tmp_path / "bomb.parquet").exists()


def test_external_entity_is_refused_and_never_read(tmp_path):
    secret = tmp_path / "secret.txt"
    secret.write_text("TOP-SECRET-CONTENT")
    body = (f'<?xml version="1.0"?><!DOCTYPE VOTABLE [<!ENTITY x SYSTEM "file://{secret}">]>'
            '<VOTABLE><RESOURCE type="results"><INFO name="QUERY_STATUS" value="ERROR">&x;'
            '</INFO></RESOURCE></VOTABLE>')
    src = _write(tmp_path / "xxe.xml", body)
    with pytest.raises(ServiceResponseInvalid) as info:
        results.to_parquet(src, tmp_path / "xxe.parquet")
    assert "TOP-SECRET" not in str(info.value)
    message = results.error_message(body.encode())
    assert message is None or "TOP-SECRET" not in message
    passwd = body.replace(f"file://{secret}", "file:///etc/passwd")
    with pytest.raises(ServiceResponseInvalid) as info:
        results.scan(_write(tmp_path / "xxe2.xml", passwd))
    assert "root:" not in str(info.value)


# --- memory, measured (not asserted) -----------------------------------------------------------

_MEASURE = r"""
import resource, sys, time
from pathlib import Path
import numpy as np
from jobdesk import results
path, out, target = Path(sys.argv[1]), Path(sys.argv[2]), int(sys.argv[3])
rng = np.random.default_rng(20240611)
head = ('<?xml version="1.0"?><VOTABLE version="1.4" xmlns="http://www.ivoa.net/xml/VOTable/v1.3">'
        '<RESOURCE type="results"><INFO name="QUERY_STATUS" value="OK"/><TABLE>'
        + "".join(f'<FIELD name="c{i}" datatype="double"/>' for i in range(8))
        + '<FIELD name="id" datatype="long"/><FIELD name="tag" datatype="char" arraysize="*"/>'
        '<DATA><TABLEDATA>\n')
with open(path, "w") as fh:
    fh.write(head)
    rows = 0
    while fh.tell() < target:
        block = rng.normal(size=(20000, 8))
        lines = ["<TR>" + "".join(f"<TD>{v!r}</TD>" for v in row) + f"<TD>{rows + k}</TD><TD>s{k % 97}</TD></TR>\n"
                 for k, row in enumerate(block.tolist())]
        rows += len(lines)
        fh.write("".join(lines))
    fh.write('</TABLEDATA></DATA></TABLE><INFO name="QUERY_STATUS" value="OVERFLOW"/></RESOURCE></VOTABLE>\n')
size = path.stat().st_size
import gc; gc.collect()
before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
t0 = time.perf_counter()
s = results.to_parquet(path, out)
dt = time.perf_counter() - t0
after = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
print(f"{size} {s.rows} {s.status} {dt:.2f} {(after - before) / 1024:.1f}")
"""


@pytest.mark.slow
def test_measure_peak_memory_on_a_large_tabledata_result(tmp_path):
    """Bounded memory: reports peak RSS growth for a ~200 MB TABLEDATA result (measured only)."""
    proc = subprocess.run([sys.executable, "-c", _MEASURE, str(tmp_path / "big.xml"),
                           str(tmp_path / "big.parquet"), str(200 * 10**6)],
                          capture_output=True, text=True, check=True, timeout=900)
    size, rows, status, seconds, grown_mb = proc.stdout.split()
    print(f"\n{int(size) / 1e6:.0f} MB, {rows} rows in {seconds} s "
          f"({int(size) / 1e6 / float(seconds):.1f} MB/s), peak RSS growth {grown_mb} MB")
    assert status == "OVERFLOW" and int(rows) > 0

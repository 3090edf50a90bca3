"""The bulk TABLEDATA path: plain rows parsed in bulk, all other markup read by the XML parser.

The outside reference is astropy.io.votable's reading of the same bytes (an independent
VOTable 1.4 parser): whatever markup a piece of rows holds, the values must be the ones astropy
reads. Each document is also read with small reads, so that pieces of plain rows and pieces
needing the XML parser alternate, and with the bulk path switched off: the three must agree.
"""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np
import pytest
from astropy.io.votable import parse

from jobdesk import results, votable_stream
from jobdesk.errors import ServiceResponseInvalid

HEAD = ('<?xml version="1.0" encoding="UTF-8"?>\n'
        '<VOTABLE version="1.4" xmlns="http://www.ivoa.net/xml/VOTable/v1.3">\n'
        '<RESOURCE type="results">\n<INFO name="QUERY_STATUS" value="OK"/>\n<TABLE>\n'
        '<FIELD name="n" datatype="long"><VALUES null="-1"/></FIELD>\n'
        '<FIELD name="x" datatype="double" unit="deg"/>\n'
        '<FIELD name="f" datatype="float"/>\n'
        '<FIELD name="k" datatype="short"/>\n'
        '<FIELD name="ok" datatype="boolean"/>\n'
        '<FIELD name="s" datatype="char" arraysize="*"/>\n'
        '<FIELD name="v" datatype="double" arraysize="2"/>\n'
        '<DATA><TABLEDATA>\n')
TAIL = '</TABLEDATA></DATA>\n</TABLE>\n</RESOURCE>\n</VOTABLE>\n'


def plain_row(i: int) -> str:
    x = "NaN" if i % 7 == 0 else f"{i * 0.37:.17g}"
    n = "-1" if i % 11 == 0 else str(i * 1_000_003)
    s = ["", "alpha", "b c", "é漢"][i % 4]
    return (f"<TR><TD>{n}</TD><TD>{x}</TD><TD>{i / 8}</TD><TD>{i % 300}</TD>"
            f"<TD>{'TF?'[i % 3]}</TD><TD>{s}</TD><TD>{i} {-i}</TD></TR>\n")


# Markup the bulk path cannot take; each must reach the XML parser, never a wrong value.
ODD_ROWS = {
    "entity": "<TR><TD>5</TD><TD>1.5</TD><TD>2</TD><TD>3</TD><TD>T</TD>"
              "<TD>a&amp;b &lt;c&gt; &#65;</TD><TD>1 2</TD></TR>\n",
    "attribute on TD": '<TR><TD>5</TD><TD ref="x">1.5</TD><TD>2</TD><TD>3</TD><TD>T</TD>'
                       "<TD>q</TD><TD>1 2</TD></TR>\n",
    "attribute on TR": '<TR ID="r9"><TD>5</TD><TD>1.5</TD><TD>2</TD><TD>3</TD><TD>T</TD>'
                       "<TD>q</TD><TD>1 2</TD></TR>\n",
    "CDATA": "<TR><TD>5</TD><TD>1.5</TD><TD>2</TD><TD>3</TD><TD>T</TD>"
             "<TD><![CDATA[x < y & </TD>]]></TD><TD>1 2</TD></TR>\n",
    "comment in a cell": "<TR><TD>5</TD><TD>1<!-- not 9 -->.5</TD><TD>2</TD><TD>3</TD><TD>T</TD>"
                         "<TD>q</TD><TD>1 2</TD></TR>\n",
    # rows inside a comment are not rows (and must not be read as such by either path)
    "comment over rows": "<!-- <TR><TD>99</TD><TD>9</TD><TD>9</TD><TD>9</TD><TD>T</TD>"
                         "<TD>ghost</TD><TD>9 9</TD></TR>\n"
                         "<TR><TD>98</TD><TD>9</TD><TD>9</TD><TD>9</TD><TD>T</TD>"
                         "<TD>ghost</TD><TD>9 9</TD></TR> -->\n",
    "processing instruction": "<?note x?><TR><TD>5</TD><TD>1.5</TD><TD>2</TD><TD>3</TD>"
                              "<TD>T</TD><TD>q</TD><TD>1 2</TD></TR>\n",
    "empty TD element": "<TR><TD/><TD/><TD>2</TD><TD>3</TD><TD/><TD/><TD>1 2</TD></TR>\n",
    "indented, CRLF": "<TR>\r\n   <TD>5</TD>\r\n   <TD>1.5</TD>\r\n   <TD>2</TD>\r\n   <TD>3</TD>"
                      "\r\n   <TD>T</TD>\r\n   <TD>q</TD>\r\n   <TD>1 2</TD>\r\n</TR>\r\n",
    "line end in a cell": "<TR><TD>5</TD><TD>1.5</TD><TD>2</TD><TD>3</TD><TD>T</TD>"
                          "<TD>two\nlines</TD><TD>1 2</TD></TR>\n",
    "padded cells": "<TR><TD> 5 </TD><TD>\n1.5\n</TD><TD> 2</TD><TD>0x10</TD><TD> true </TD>"
                    "<TD>  q  </TD><TD> 1  2 </TD></TR>\n",
}

BULK_TAKES = {"empty TD element"}   # <TD/> is an empty cell: the bulk path reads it itself


def document(odd: str, rows: int = 600) -> bytes:
    body = [plain_row(i) for i in range(rows)]
    body.insert(rows // 2, odd)
    return (HEAD + "".join(body) + TAIL).encode("utf-8")


def read_ours(tmp_path: Path, data: bytes, name: str = "r"):
    src = tmp_path / f"{name}.xml"
    src.write_bytes(data)
    out = tmp_path / f"{name}.parquet"
    summary = results.to_parquet(src, out)
    return summary, results.load_table(out)


def astropy_reads(data: bytes):
    # the outside reference: astropy.io.votable's own TABLEDATA parser
    return parse(io.BytesIO(data)).get_first_table().to_table()


def assert_same(ref, got):
    assert ref.colnames == got.colnames
    assert len(ref) == len(got)
    for name in ref.colnames:
        r, g = ref[name], got[name]
        rm, gm = np.ma.getmaskarray(r), np.ma.getmaskarray(g)
        assert np.array_equal(rm, gm), f"{name}: masks differ"
        rd, gd = np.asarray(getattr(r, "data", r)), np.asarray(getattr(g, "data", g))
        keep = ~rm
        if rd.dtype.kind in "UOS":
            assert [str(x) for x in rd[keep]] == [str(x) for x in gd[keep]], name
        else:
            np.testing.assert_array_equal(rd[keep], gd[keep], err_msg=name)
            assert rd.dtype == gd.dtype, name
        assert str(getattr(r, "unit", None)) == str(getattr(g, "unit", None)), name


@pytest.fixture
def bulk_calls(monkeypatch):
    """Counts the pieces the bulk path took and the ones it handed to the XML parser."""
    seen = {"bulk": 0, "xml": 0}
    convert = votable_stream._TableDataSplitter._convert

    def counting(self, body):
        try:
            got = convert(self, body)
        except votable_stream._NotBulk:
            seen["xml"] += 1
            raise
        seen["bulk"] += 1
        return got

    monkeypatch.setattr(votable_stream._TableDataSplitter, "_convert", counting)
    return seen


@pytest.mark.parametrize("odd", list(ODD_ROWS))
@pytest.mark.parametrize("chunk", [4 << 20, 1500, 97])
def test_markup_falls_back_piece_by_piece_and_equals_astropy(tmp_path, monkeypatch, bulk_calls,
                                                              odd, chunk):
    monkeypatch.setattr(votable_stream, "READ_CHUNK", chunk)
    data = document(ODD_ROWS[odd])
    summary, got = read_ours(tmp_path, data)
    ref = astropy_reads(data)
    assert summary.rows == len(ref)
    assert_same(ref, got)
    if odd in BULK_TAKES:
        assert bulk_calls["xml"] == 0
    else:
        assert bulk_calls["xml"] >= 1, "the odd piece must have gone to the XML parser"
    if chunk == 1500:
        # pieces of plain rows away from the odd one still go the bulk way
        assert bulk_calls["bulk"] >= 2


def test_plain_rows_all_go_the_bulk_way_and_equal_the_xml_path(tmp_path, monkeypatch, bulk_calls):
    monkeypatch.setattr(votable_stream, "READ_CHUNK", 2000)
    data = (HEAD + "".join(plain_row(i) for i in range(800)) + TAIL).encode()
    _, fast = read_ours(tmp_path, data, "fast")
    assert bulk_calls["xml"] == 0 and bulk_calls["bulk"] > 5
    monkeypatch.setattr(votable_stream, "_declares_utf8", lambda head: False)   # the XML path only
    _, slow = read_ours(tmp_path, data, "slow")
    assert_same(slow, fast)
    assert_same(astropy_reads(data), fast)


def test_namespace_prefix_rows_are_read_in_bulk(tmp_path, monkeypatch, bulk_calls):
    monkeypatch.setattr(votable_stream, "READ_CHUNK", 1500)
    data = document(ODD_ROWS["padded cells"]).decode()
    data = data.replace('xmlns="http://www.ivoa.net/xml/VOTable/v1.3"',
                        'xmlns:v="http://www.ivoa.net/xml/VOTable/v1.3"')
    for tag in ("VOTABLE", "RESOURCE", "INFO", "TABLE", "FIELD", "VALUES", "DATA",
                "TABLEDATA", "TR", "TD"):
        data = data.replace(f"<{tag}", f"<v:{tag}").replace(f"</{tag}", f"</v:{tag}")
    _, got = read_ours(tmp_path, data.encode())
    assert bulk_calls["bulk"] >= 1
    assert_same(astropy_reads(document(ODD_ROWS["padded cells"])), got)


def test_a_latin1_document_is_read_by_the_xml_parser_only(tmp_path, bulk_calls):
    text = document("<TR><TD>5</TD><TD>1</TD><TD>2</TD><TD>3</TD><TD>T</TD><TD>café</TD>"
                    "<TD>1 2</TD></TR>\n").decode()
    data = text.replace('encoding="UTF-8"', 'encoding="ISO-8859-1"').replace("漢", "ü").encode("latin-1")
    _, got = read_ours(tmp_path, data)
    assert bulk_calls == {"bulk": 0, "xml": 0}
    assert_same(astropy_reads(data), got)
    assert "café" in list(got["s"])


@pytest.mark.parametrize("bad, says", [
    ("<TR><TD>1</TD><TD>2</TD></TR>\n", "cells for 7 FIELDs"),
    ("<TR><TD>5</TD><TD>1\x01</TD><TD>2</TD><TD>3</TD><TD>T</TD><TD>q</TD><TD>1 2</TD></TR>\n",
     "malformed XML"),
    ("<TR><TD>5</TD><TD>1.5</TD><TD>2</TD><TD>99999</TD><TD>T</TD><TD>q</TD><TD>1 2</TD></TR>\n",
     "does not fit"),
    ("<TR><TD>5<TD>1.5</TD><TD>2</TD><TD>3</TD><TD>T</TD><TD>q</TD><TD>1 2</TD></TR>\n",
     "malformed XML"),
])
def test_bad_rows_raise_the_xml_paths_error(tmp_path, monkeypatch, bad, says):
    data = document(bad)
    with pytest.raises(ServiceResponseInvalid, match=says):
        read_ours(tmp_path, data, "fast")
    monkeypatch.setattr(votable_stream, "_declares_utf8", lambda head: False)
    with pytest.raises(ServiceResponseInvalid, match=says):
        read_ours(tmp_path, data, "slow")
    assert not list(tmp_path.glob("*.partial"))

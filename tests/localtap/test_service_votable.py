"""Every VOTable the service writes passes astropy's parser with verify='exception'."""

from __future__ import annotations

import io
import math
from dataclasses import dataclass

import numpy as np
import pytest
from astropy.io import votable
from astropy.table import Table

from jobdesk.localtap.votable_out import (
    error_document, serialization_for, write_binary2, write_csv, write_tabledata,
)


@dataclass
class Col:
    name: str
    datatype: str
    arraysize: str | None = None
    unit: str | None = None
    ucd: str | None = None
    description: str | None = None
    xtype: str | None = None


class Result:
    def __init__(self, columns, rows, overflow=False):
        self.columns, self.rows, self.overflow = columns, iter(rows), overflow


COLUMNS = [Col("id", "long", ucd="meta.id;meta.main"), Col("n", "short"), Col("k", "int"),
           Col("f", "float", unit="mag"), Col("ra", "double", unit="deg", ucd="pos.eq.ra"),
           Col("flag", "boolean"), Col("label", "char", description='a <label> & "quote"'),
           Col("note", "unicodeChar"), Col("pos", "double", arraysize="2", xtype="point")]
ROWS = [
    (1, 2, 3, 1.5, 359.9999999, True, "a<b&c>d", "naïve ☃", (1.0, 2.0)),
    (None, None, None, None, None, None, None, None, None),              # every cell NULL
    (-9, -1, 0, math.nan, math.inf, False, "tab\tctl\x01", "", (3.0, None)),
]


def _parse(data: bytes):
    # astropy.io.votable.parse, verify='exception': any spec warning becomes an error
    return votable.parse(io.BytesIO(data), verify="exception")


@pytest.mark.parametrize("writer", [write_tabledata, write_binary2], ids=["tabledata", "binary2"])
def test_values_nulls_and_text_round_trip(tmp_path, writer):
    path = tmp_path / "out.xml"
    with open(path, "wb") as out:
        written = writer(out, Result(COLUMNS, ROWS), infos=[("QUERY", "SELECT *\nFROM t")])
    assert written.rows == 3 and not written.overflow
    table = _parse(path.read_bytes()).get_first_table().to_table()
    assert list(table["id"].data.data[[0, 2]]) == [1, -9]
    assert table["ra"][0] == pytest.approx(359.9999999, abs=1e-9)
    assert table["label"][0] == "a<b&c>d"
    assert table["flag"][0] and not table["flag"][2]
    # NULLs come back masked (VOTable 1.4 §5.5 null flags for BINARY2, empty TD for TABLEDATA)
    for name in ("id", "n", "k", "f", "ra", "flag"):
        assert table[name].mask[1], name
    assert table["note"][0].startswith("naïve")
    assert table["pos"][0].tolist() == [1.0, 2.0]


def test_binary2_null_flags_are_per_column(tmp_path):
    columns = [Col(f"c{i}", "int") for i in range(10)]   # two flag bytes per row
    rows = [tuple(None if j == i else j for j in range(10)) for i in range(10)]
    data = io.BytesIO()
    write_binary2(data, Result(columns, rows))
    table = _parse(data.getvalue()).get_first_table().to_table()
    for i in range(10):
        assert [bool(table[f"c{j}"].mask[i]) for j in range(10)] == [j == i for j in range(10)]


def test_overflow_info_follows_the_table():
    data = io.BytesIO()
    write_tabledata(data, Result(COLUMNS[:1], [(1,)], overflow=True))
    text = data.getvalue().decode()
    # DALI 1.1 §4.4.1: QUERY_STATUS=OK before the TABLE, OVERFLOW after </TABLE>
    assert text.index('value="OK"') < text.index("<TABLE>") < text.index("</TABLE>") \
        < text.index('value="OVERFLOW"')
    infos = [(i.name, i.value) for i in _parse(data.getvalue()).resources[0].infos]
    assert infos[0] == ("QUERY_STATUS", "OK") and infos[-1] == ("QUERY_STATUS", "OVERFLOW")


@pytest.mark.parametrize("writer", [write_tabledata, write_binary2], ids=["tabledata", "binary2"])
def test_empty_result_is_a_valid_table(writer):
    data = io.BytesIO()
    writer(data, Result(COLUMNS, []))
    table = _parse(data.getvalue()).get_first_table().to_table()
    assert len(table) == 0 and table.colnames == [c.name for c in COLUMNS]


def test_binary2_streams_many_rows_in_base64_chunks():
    rows = [(i, float(i) / 3) for i in range(20_000)]   # > one 57 KiB base64 chunk
    data = io.BytesIO()
    write_binary2(data, Result([Col("i", "long"), Col("x", "double")], rows))
    table = _parse(data.getvalue()).get_first_table().to_table()
    assert len(table) == 20_000 and table["i"][-1] == 19_999
    assert table["x"][12345] == pytest.approx(12345 / 3)


def test_error_document_carries_the_message():
    message = "unexpected token 'FORM' at line 2, column 5 <near> & more"
    parsed = _parse(error_document(message))
    infos = parsed.resources[0].infos
    # DALI 1.1 §4.4.2: INFO name=QUERY_STATUS value=ERROR, message as content
    assert (infos[0].name, infos[0].value) == ("QUERY_STATUS", "ERROR")
    assert infos[0].content == message


def test_csv_header_then_rows():
    data = io.BytesIO()
    write_csv(data, Result(COLUMNS[:7], [r[:7] for r in ROWS]))
    table = Table.read(data.getvalue().decode(), format="ascii.csv")
    assert table.colnames == [c.name for c in COLUMNS[:7]]
    assert table["label"][0] == "a<b&c>d" and len(table) == 3


def test_response_format_names():
    # TAP 1.1 §2.7.1 / DALI 1.1 §4.1 names and their common aliases
    assert serialization_for(None) == "tabledata"
    assert serialization_for("votable") == "tabledata"
    assert serialization_for("application/x-votable+xml") == "tabledata"
    assert serialization_for("application/x-votable+xml; serialization=BINARY2") == "binary2"
    assert serialization_for("votable/b2") == "binary2"
    assert serialization_for("text/csv") == "csv" and serialization_for("csv") == "csv"
    assert serialization_for("fits") is None


@pytest.mark.parametrize("fmt", ["votable", "application/x-votable+xml;serialization=BINARY2",
                                 "votable/b2"])
def test_http_results_pass_strict_parsing(shared_tap, http, fmt):
    response = http.post(f"{shared_tap.url}/sync", data={
        "LANG": "ADQL", "QUERY": "SELECT TOP 7 orrery_id, ra, dec, mag_cyan, class_label "
                                 "FROM orrery.sources", "RESPONSEFORMAT": fmt})
    assert response.status_code == 200
    parsed = _parse(response.content)
    assert len(parsed.get_first_table().array) == 7
    names = [i.name for i in parsed.resources[0].infos]
    assert {"QUERY_STATUS", "QUERY", "request_date", "server_software"} <= set(names)


def test_http_error_and_upload_echo_pass_strict_parsing(shared_tap, http):
    bad = http.post(f"{shared_tap.url}/sync", data={"LANG": "ADQL", "QUERY": "SELEKT nothing"})
    assert _parse(bad.content).resources[0].infos[0].value == "ERROR"

    upload = Table({"tid": np.array([1, 2, 3]), "w": np.array([0.5, np.nan, 2.5])})
    buffer = io.BytesIO()
    upload.write(buffer, format="votable")
    echo = http.post(f"{shared_tap.url}/sync",
                     data={"LANG": "ADQL", "QUERY": "SELECT * FROM TAP_UPLOAD.mine",
                           "UPLOAD": "mine,param:part1"},
                     files={"part1": ("part1.xml", buffer.getvalue(), "application/x-votable+xml")})
    assert echo.status_code == 200, echo.text
    table = _parse(echo.content).get_first_table().to_table()
    assert list(table["tid"]) == [1, 2, 3]

"""A VOTable 1.4 result holding every column type a TAP service can return, built here.

Values are invented with a fixed seed. The document is written by hand (TABLEDATA) so that each
type, null and edge value is exactly as a service would send it; the datatypes, arraysize forms
and empty-cell nulls follow VOTable 1.4 (§2.1 Table 1, §2.2, §5.1 "an empty TD is null"), the
xtypes follow DALI 1.1 §3.3 (timestamp, point, circle, polygon).
"""

from __future__ import annotations

import math
from xml.sax.saxutils import escape

import numpy as np

RNG = np.random.default_rng(20261202)
ROWS = 6
NULL_ROW = 2            # every nullable column is empty in this row

# name, datatype, arraysize, xtype, unit, ucd, description, values (None = null)
_ints16 = [int(v) for v in RNG.integers(-32000, 32000, ROWS)]
_ints16[0] = -32768
_ints32 = [int(v) for v in RNG.integers(-2**31, 2**31 - 1, ROWS)]
_ints64 = [int(v) for v in RNG.integers(-2**62, 2**62, ROWS)]
_ints64[1] = 2**63 - 1
_bytes = [int(v) for v in RNG.integers(0, 255, ROWS)]
_f32 = [float(np.float32(v)) for v in RNG.normal(15, 2, ROWS)]
_f32[3] = math.nan
_f64 = [float(v) for v in RNG.uniform(0, 360, ROWS)]
_f64[4], _f64[5] = math.inf, -math.inf
_bools = [True, False, None, True, False, True]
_words = ["kestrel", "a<b & c>d", None, "tab\tinside", "", "x" * 40]
_unicode = ["Ångström", "naïve café", None, "ζήτα", "日本語の名前", "plain"]
_fixed = [[float(v) for v in RNG.normal(0, 1, 3)] for _ in range(ROWS)]
_var = [[int(v) for v in RNG.integers(0, 100, n)] for n in (0, 1, 2, 3, 4, 5)]
_points = [[round(float(a), 6), round(float(b), 6)]
           for a, b in zip(RNG.uniform(0, 360, ROWS), RNG.uniform(-90, 90, ROWS))]
_circles = [p + [round(float(r), 4)] for p, r in zip(_points, RNG.uniform(0.01, 1, ROWS))]
_polygons = [[10.0, 10.0, 11.0, 10.0, 11.0, 11.0],
             [20.0, -5.0, 21.0, -5.0, 21.5, -4.0, 20.0, -4.0],
             None, [0.0, 0.0, 1.0, 0.0, 0.5, 1.0],
             [100.0, 40.0, 101.0, 40.0, 100.5, 41.0], [200.0, 1.0, 201.0, 1.0, 200.5, 2.0]]
_times = ["2031-04-05T06:07:08.250Z", "2031-04-05T23:59:59Z", None, "2029-12-31T00:00:00Z",
          "2030-01-01T12:00:00.5Z", "2031-07-14T01:02:03Z"]

COLUMNS = [
    ("n_byte", "unsignedByte", None, None, None, "meta.number", "an unsigned byte", _bytes),
    ("n_short", "short", None, None, None, "meta.number", "a 16-bit integer", _ints16),
    ("n_int", "int", None, None, None, "meta.id", "a 32-bit integer", _ints32),
    ("n_long", "long", None, None, None, "meta.id", "a 64-bit integer", _ints64),
    ("flux", "float", None, None, "mJy", "phot.flux", "a 32-bit float with NaN", _f32),
    ("angle", "double", None, None, "deg", "pos.eq.ra", "a 64-bit float with +-inf", _f64),
    ("flag", "boolean", None, None, None, "meta.code", "a boolean", _bools),
    ("word", "char", "*", None, None, "meta.note", "ASCII text with XML specials", _words),
    ("label", "unicodeChar", "*", None, None, "meta.note", "text beyond ASCII", _unicode),
    ("vec3", "double", "3", None, "km/s", "phys.veloc", "a fixed array of 3", _fixed),
    ("counts", "int", "*", None, None, "meta.number", "a variable-length array", _var),
    ("pos", "double", "2", "point", "deg", "pos.eq", "a DALI point", _points),
    ("region", "double", "3", "circle", "deg", "pos.outline", "a DALI circle", _circles),
    ("shape", "double", "*", "polygon", "deg", "pos.outline", "a DALI polygon", _polygons),
    ("seen_at", "char", "*", "timestamp", None, "time.epoch", "a DALI timestamp", _times),
]


def _null(row: int, col) -> bool:
    return row == NULL_ROW


def _cell(v) -> str:
    if v is None:
        return "<TD/>"
    if isinstance(v, bool):
        return f"<TD>{'T' if v else 'F'}</TD>"
    if isinstance(v, list):
        return "<TD>" + " ".join(_num(x) for x in v) + "</TD>"
    if isinstance(v, float):
        return f"<TD>{_num(v)}</TD>"
    return f"<TD>{escape(str(v))}</TD>"


def _num(v) -> str:
    if isinstance(v, float):
        if math.isnan(v):
            return "NaN"           # VOTable 1.4 §6: NaN, +Inf, -Inf in TABLEDATA
        if math.isinf(v):
            return "+Inf" if v > 0 else "-Inf"
        return repr(v)
    return str(v)


def expected(name: str) -> list:
    """The column's values with None for nulls."""
    for col in COLUMNS:
        if col[0] == name:
            return [None if _null(r, col) else col[7][r] for r in range(ROWS)]
    raise KeyError(name)


def votable(*, query: str = "SELECT * FROM typed") -> bytes:
    """The result document, as a TAP service would send it (QUERY_STATUS OK)."""
    fields = []
    for name, dt, size, xtype, unit, ucd, desc, _ in COLUMNS:
        attrs = f'name="{name}" datatype="{dt}"'
        attrs += f' arraysize="{size}"' if size else ""
        attrs += f' xtype="{xtype}"' if xtype else ""
        attrs += f' unit="{unit}"' if unit else ""
        attrs += f' ucd="{ucd}"'
        fields.append(f"<FIELD {attrs}><DESCRIPTION>{escape(desc)}</DESCRIPTION></FIELD>")
    rows = []
    for r in range(ROWS):
        rows.append("<TR>" + "".join(_cell(None if _null(r, c) else c[7][r]) for c in COLUMNS)
                    + "</TR>")
    body = (
        '<?xml version="1.0" encoding="UTF-8"?>\n'
        '<VOTABLE version="1.4" xmlns="http://www.ivoa.net/xml/VOTable/v1.3">\n'
        '<RESOURCE type="results">\n'
        '<INFO name="QUERY_STATUS" value="OK"/>\n'
        f'<INFO name="QUERY" value="{escape(query, {chr(34): "&quot;"})}"/>\n'
        '<TABLE>\n' + "\n".join(fields) + "\n<DATA><TABLEDATA>\n" + "\n".join(rows)
        + "\n</TABLEDATA></DATA>\n</TABLE>\n"
        '<INFO name="QUERY_STATUS" value="OK"/>\n'
        "</RESOURCE>\n</VOTABLE>\n")
    return body.encode("utf-8")

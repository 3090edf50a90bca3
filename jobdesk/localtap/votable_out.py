"""Streaming writers for results: VOTable 1.4 TABLEDATA and BINARY2, VOParquet, CSV, and errors.

Results can be far larger than memory, so every writer takes the engine's row iterator and writes
as it goes; nothing is built as a tree. The overflow flag is known only once the rows are
exhausted, which is why DALI puts the second QUERY_STATUS after ``</TABLE>`` (DALI 1.1 §4.4.1).
"""

from __future__ import annotations

import base64
import dataclasses
import csv
import io
import math
import re
import struct
from dataclasses import dataclass
from typing import BinaryIO, Callable, Iterable, Sequence
from xml.sax.saxutils import escape, quoteattr

VOTABLE_NS = "http://www.ivoa.net/xml/VOTable/v1.3"   # VOTable 1.4 keeps the 1.3 namespace (§3)

FORMATS = {
    # RESPONSEFORMAT value -> serialization (TAP 1.1 §2.7.1, DALI 1.1 §4.1)
    "votable": "tabledata",
    "application/x-votable+xml": "tabledata",
    "text/xml": "tabledata",
    "application/x-votable+xml;serialization=tabledata": "tabledata",
    "votable/td": "tabledata",
    "application/x-votable+xml;serialization=binary2": "binary2",
    "votable/b2": "binary2",
    # IVOA VOParquet 1.0 Note: Parquet with the VOTable metadata in the footer
    "application/vnd.apache.parquet": "parquet",
    "parquet": "parquet",
    "csv": "csv",
    "text/csv": "csv",
    "text/csv;header=present": "csv",
}

CONTENT_TYPES = {
    "tabledata": "application/x-votable+xml",
    "binary2": "application/x-votable+xml;serialization=BINARY2",
    "parquet": "application/vnd.apache.parquet",
    "csv": "text/csv;header=present",
}

# XML 1.0 cannot carry these characters at all, not even escaped.
_XML_ILLEGAL = re.compile("[\x00-\x08\x0b\x0c\x0e-\x1f\ufffe\uffff]")

_BINARY_FORMATS = {
    "short": ">h", "int": ">i", "long": ">q", "float": ">f", "double": ">d",
    "unsignedByte": ">B",
}
_NUMERIC = set(_BINARY_FORMATS)
_CHECK_EVERY = 256   # rows between looks at should_stop


class Stopped(Exception):
    """Writing was stopped from outside (abort, time limit); the partial file must be dropped."""


def serialization_for(response_format: str | None) -> str | None:
    """Map a RESPONSEFORMAT value to our serialization name, or None when not supported.

    MIME parameters are compared without spaces and case (RFC 2045 §5.1 makes them
    case-insensitive); the rest of the value is case-sensitive per DALI but we accept
    the common spellings.
    """
    if response_format is None or response_format.strip() == "":
        return "tabledata"
    key = re.sub(r"\s+", "", response_format).lower()
    return FORMATS.get(key)


@dataclass
class Written:
    rows: int
    overflow: bool


def xml_text(value: str) -> str:
    """Text safe inside an XML element: escaped, illegal characters replaced by U+FFFD."""
    return escape(_XML_ILLEGAL.sub("\ufffd", value))


def xml_attr(value: str) -> str:
    """A quoted attribute value, newlines kept as character references."""
    return quoteattr(_XML_ILLEGAL.sub("\ufffd", value), {"\n": "&#10;", "\r": "&#13;", "\t": "&#9;"})


def _column_arraysize(column) -> str | None:
    if column.arraysize:
        return column.arraysize
    if column.datatype in ("char", "unicodeChar"):
        return "*"
    return None


def _field_xml(column) -> str:
    attrs = [f"name={xml_attr(column.name)}", f"datatype={xml_attr(column.datatype)}"]
    arraysize = _column_arraysize(column)
    if arraysize:
        attrs.append(f"arraysize={xml_attr(arraysize)}")
    for attr in ("unit", "ucd", "xtype"):
        value = getattr(column, attr, None)
        if value:
            attrs.append(f"{attr}={xml_attr(value)}")
    description = getattr(column, "description", None)
    inner = f"<DESCRIPTION>{xml_text(description)}</DESCRIPTION>" if description else ""
    return f"<FIELD {' '.join(attrs)}>{inner}</FIELD>" if inner else f"<FIELD {' '.join(attrs)}/>"


def _info_xml(name: str, value: str, content: str | None = None) -> str:
    if content:
        return f"<INFO name={xml_attr(name)} value={xml_attr(value)}>{xml_text(content)}</INFO>"
    return f"<INFO name={xml_attr(name)} value={xml_attr(value)}/>"


def _head(infos: Sequence[tuple[str, str]]) -> str:
    lines = ['<?xml version="1.0" encoding="UTF-8"?>',
             f'<VOTABLE version="1.4" xmlns="{VOTABLE_NS}" '
             'xmlns:xsi="http://www.w3.org/2001/XMLSchema-instance">',
             '<RESOURCE type="results">',
             _info_xml("QUERY_STATUS", "OK")]
    lines += [_info_xml(name, value) for name, value in infos]
    return "\n".join(lines) + "\n"


# --- TABLEDATA -------------------------------------------------------------------------------


def _td_scalar(datatype: str, value) -> str:
    if value is None:
        return ""
    if datatype == "boolean":
        return "T" if value else "F"
    if datatype in ("float", "double"):
        number = float(value)
        if math.isnan(number):
            return "NaN"
        if math.isinf(number):
            return "+Inf" if number > 0 else "-Inf"
        return repr(number)
    if datatype in _NUMERIC:
        return str(int(value))
    return str(value)


def _td_item(datatype: str, value) -> str:
    """An array element: a null element has no empty form inside an array, so NaN / 0 / ?."""
    if value is None:
        return "NaN" if datatype in ("float", "double") else ("?" if datatype == "boolean" else "0")
    return _td_scalar(datatype, value)


def _td_cell(column, value) -> str:
    """One TD's text; None becomes an empty cell, which VOTable 1.3+ reads as null (§6)."""
    if value is None:
        return ""
    datatype = column.datatype
    if datatype in ("char", "unicodeChar"):
        text = value if isinstance(value, str) else _to_text(value)
        if datatype == "char":
            text = _XML_ILLEGAL.sub("?", text).encode("ascii", "replace").decode("ascii")
        return xml_text(text)
    if _column_arraysize(column) and not isinstance(value, (str, bytes)):
        try:
            items = list(value)
        except TypeError:
            items = [value]
        return " ".join(_td_item(datatype, item) for item in items)
    return xml_text(_td_scalar(datatype, value))


def _to_text(value) -> str:
    if isinstance(value, bytes):
        return value.decode("utf-8", "replace")
    return str(value)


def write_tabledata(out: BinaryIO, result, *, infos=(), should_stop: Callable[[], bool] | None = None
                    ) -> Written:
    """Write ``result`` (columns, rows, overflow) as VOTable TABLEDATA, row by row."""
    columns = list(result.columns)
    write = _text_writer(out)
    write(_head(infos))
    write("<TABLE>\n")
    for column in columns:
        write(_field_xml(column) + "\n")
    write("<DATA><TABLEDATA>\n")
    count = 0
    for row in result.rows:
        write("<TR>" + "".join(f"<TD>{_td_cell(c, v)}</TD>" for c, v in zip(columns, row)) + "</TR>\n")
        count += 1
        if should_stop is not None and count % _CHECK_EVERY == 0 and should_stop():
            raise Stopped()
    write("</TABLEDATA></DATA>\n</TABLE>\n")
    return _tail(write, result, count)


def _tail(write, result, count: int) -> Written:
    overflow = bool(result.overflow)
    if overflow:
        # DALI 1.1 §4.4.1: the last QUERY_STATUS counts; OVERFLOW goes after the table.
        write(_info_xml("QUERY_STATUS", "OVERFLOW") + "\n")
    write("</RESOURCE>\n</VOTABLE>\n")
    write(None)
    return Written(rows=count, overflow=overflow)


def _text_writer(out: BinaryIO, size: int = 1 << 16):
    """Buffered UTF-8 writer; ``write(None)`` flushes."""
    parts: list[str] = []
    pending = 0

    def write(text: str | None):
        nonlocal pending
        if text is None:
            if parts:
                out.write("".join(parts).encode("utf-8"))
                parts.clear()
                pending = 0
            return
        parts.append(text)
        pending += len(text)
        if pending >= size:
            out.write("".join(parts).encode("utf-8"))
            parts.clear()
            pending = 0

    return write


# --- BINARY2 ---------------------------------------------------------------------------------


def _binary_encoder(column) -> Callable[[object], bytes]:
    """Return a function value -> bytes for one column (VOTable 1.4 §5.4, §5.5)."""
    datatype = column.datatype
    arraysize = _column_arraysize(column)
    variable = arraysize is not None and arraysize.endswith("*")
    fixed = None
    if arraysize and not variable:
        fixed = 1
        for part in arraysize.split("x"):
            fixed *= int(part)

    if datatype in ("char", "unicodeChar"):
        wide = datatype == "unicodeChar"

        def encode_text(value) -> bytes:
            text = "" if value is None else (value if isinstance(value, str) else _to_text(value))
            if wide:
                # UCS-2: characters beyond the BMP cannot be written; U+FFFD stands in.
                text = "".join(ch if ord(ch) < 0x10000 else "\ufffd" for ch in text)
                data = text.encode("utf-16-be")
            else:
                data = text.encode("ascii", "replace")
            unit = 2 if wide else 1
            if fixed is not None:
                return (data[: fixed * unit]).ljust(fixed * unit, b"\0")
            return struct.pack(">i", len(data) // unit) + data

        return encode_text

    if datatype == "boolean":
        def encode_bool(value) -> bytes:
            if value is None:
                return b"?"
            return b"T" if value else b"F"

        if arraysize is None:
            return encode_bool
        scalar = encode_bool
    elif datatype in _BINARY_FORMATS:
        fmt = _BINARY_FORMATS[datatype]
        floating = datatype in ("float", "double")
        packer = struct.Struct(fmt)

        def scalar(value) -> bytes:
            if value is None:
                return packer.pack(math.nan if floating else 0)
            return packer.pack(float(value) if floating else int(value))

        if arraysize is None:
            return scalar
    else:
        raise ValueError(f"cannot write datatype {datatype!r} as BINARY2")

    def encode_array(value) -> bytes:
        items = [] if value is None else list(value)
        if fixed is not None:
            items = (items + [None] * fixed)[:fixed]
            return b"".join(scalar(item) for item in items)
        return struct.pack(">i", len(items)) + b"".join(scalar(item) for item in items)

    return encode_array


class _Base64Stream:
    """Encode bytes to base64 as they come, in whole 3-byte groups, 76-character lines."""

    CHUNK = 57 * 1024   # a multiple of 57 bytes gives whole 76-character lines

    def __init__(self, out: BinaryIO):
        self._out = out
        self._buffer = bytearray()

    def write(self, data: bytes):
        self._buffer += data
        if len(self._buffer) >= self.CHUNK:
            cut = len(self._buffer) - len(self._buffer) % 57
            self._out.write(base64.encodebytes(bytes(self._buffer[:cut])))
            del self._buffer[:cut]

    def close(self):
        if self._buffer:
            self._out.write(base64.encodebytes(bytes(self._buffer)))
            self._buffer.clear()


def write_binary2(out: BinaryIO, result, *, infos=(), should_stop: Callable[[], bool] | None = None
                  ) -> Written:
    """Write ``result`` as VOTable BINARY2: per row a null-flag bitmask, then the cells."""
    columns = list(result.columns)
    encoders = [_binary_encoder(c) for c in columns]
    write = _text_writer(out)
    write(_head(infos))
    write("<TABLE>\n")
    for column in columns:
        write(_field_xml(column) + "\n")
    write("<DATA><BINARY2><STREAM encoding=\"base64\">\n")
    write(None)
    stream = _Base64Stream(out)
    flag_bytes = (len(columns) + 7) // 8
    count = 0
    for row in result.rows:
        flags = bytearray(flag_bytes)
        cells = []
        for index, (encode, value) in enumerate(zip(encoders, row)):
            if value is None or (isinstance(value, float) and math.isnan(value)
                                 and columns[index].datatype not in ("float", "double")):
                flags[index >> 3] |= 0x80 >> (index & 7)   # VOTable 1.4 §5.5: MSB = first column
                value = None
            cells.append(encode(value))
        stream.write(bytes(flags) + b"".join(cells))
        count += 1
        if should_stop is not None and count % _CHECK_EVERY == 0 and should_stop():
            raise Stopped()
    stream.close()
    write("</STREAM></BINARY2></DATA>\n</TABLE>\n")
    return _tail(write, result, count)


# --- CSV -------------------------------------------------------------------------------------


def write_csv(out: BinaryIO, result, *, infos=(), should_stop: Callable[[], bool] | None = None
              ) -> Written:
    """Header line of column names, then rows (RFC 4180). CSV cannot signal overflow."""
    text = io.TextIOWrapper(out, encoding="utf-8", newline="", write_through=False)
    writer = csv.writer(text, lineterminator="\r\n")
    columns = list(result.columns)
    writer.writerow([c.name for c in columns])
    count = 0
    for row in result.rows:
        writer.writerow([_csv_cell(c, v) for c, v in zip(columns, row)])
        count += 1
        if should_stop is not None and count % _CHECK_EVERY == 0 and should_stop():
            text.flush()
            text.detach()
            raise Stopped()
    text.flush()
    text.detach()
    return Written(rows=count, overflow=bool(result.overflow))


def _csv_cell(column, value) -> str:
    if value is None:
        return ""
    if column.datatype == "boolean":
        return "true" if value else "false"
    if isinstance(value, (list, tuple)):
        return " ".join(_td_item(column.datatype, v) for v in value)
    if column.datatype in ("float", "double", *_NUMERIC):
        return _td_scalar(column.datatype, value)
    return _to_text(value)


# --- VOParquet --------------------------------------------------------------------------------

PARQUET_ROWS = 65_536   # rows per row group written (memory stays bounded whatever the size)
_ARROW_TYPES = {"short": "int16", "int": "int32", "long": "int64", "float": "float32",
                "double": "float64", "unsignedByte": "uint8", "boolean": "bool_",
                "char": "string", "unicodeChar": "string"}


def _arrow_type(column):
    import pyarrow as pa

    base = getattr(pa, _ARROW_TYPES[column.datatype])()
    arraysize = _column_arraysize(column)
    if arraysize and column.datatype not in ("char", "unicodeChar"):
        return pa.list_(base)
    return base


def write_parquet(out: BinaryIO, result, *, infos=(), should_stop: Callable[[], bool] | None = None
                  ) -> Written:
    """Write ``result`` as VOParquet (IVOA VOParquet 1.0 Note): Parquet row groups, and in the
    footer the VOTable that describes them, with a PARQUET element where DATA would be. The
    footer is written last, so it carries the overflow status (DALI 1.1 §4.4.1) as well."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    columns = list(result.columns)
    schema = pa.schema([pa.field(c.name, _arrow_type(c)) for c in columns])
    floating = [c.datatype in ("float", "double") for c in columns]
    texts = [c.datatype in ("char", "unicodeChar") for c in columns]
    longest = [0] * len(columns)
    writer = pq.ParquetWriter(out, schema, compression="snappy")
    count = 0
    batch: list[tuple] = []

    def flush():
        if batch:
            cells = list(zip(*batch))
            arrays = []
            for i, field in enumerate(schema):
                values = cells[i]
                if floating[i]:   # VOTable 1.4 §6: NaN is the null of floating point values
                    values = [None if v is not None and v != v else v for v in values]
                elif texts[i]:
                    # as in TABLEDATA, where a NULL string is an empty TD; astropy's VOParquet
                    # reader also cannot take null strings
                    values = ["" if v is None else (v if isinstance(v, str) else _to_text(v))
                              for v in values]
                    longest[i] = max(longest[i], max(map(len, values)))
                arrays.append(pa.array(values, field.type))
            writer.write_table(pa.Table.from_arrays(arrays, schema=schema))
            batch.clear()

    try:
        for row in result.rows:
            batch.append(row)
            count += 1
            if len(batch) >= PARQUET_ROWS:
                flush()
            if should_stop is not None and count % _CHECK_EVERY == 0 and should_stop():
                raise Stopped()
        flush()
        # A variable-length string gets its longest length as a bound ("12*", VOTable 1.4
        # §2.2): still variable, and astropy's VOParquet reader can then stack its columns.
        described = [c if not (texts[i] and _column_arraysize(c) == "*") else
                     dataclasses.replace(c, arraysize=f"{max(1, longest[i])}*")
                     for i, c in enumerate(columns)]
        parts = [_head(infos), "<TABLE>\n"] + [_field_xml(c) + "\n" for c in described]
        parts.append('<PARQUET type="Parquet-local-XML"/>\n</TABLE>\n')
        if result.overflow:
            parts.append(_info_xml("QUERY_STATUS", "OVERFLOW") + "\n")
        parts.append("</RESOURCE>\n</VOTABLE>\n")
        writer.add_key_value_metadata({"IVOA.VOTable-Parquet.version": "1.0",
                                       "IVOA.VOTable-Parquet.content": "".join(parts)})
    finally:
        writer.close()
    return Written(rows=count, overflow=bool(result.overflow))


WRITERS = {"tabledata": write_tabledata, "binary2": write_binary2, "parquet": write_parquet,
           "csv": write_csv}


def write_result(out: BinaryIO, result, serialization: str, *, infos=(), should_stop=None) -> Written:
    """Write ``result`` in the given serialization (a value of :data:`FORMATS`)."""
    return WRITERS[serialization](out, result, infos=infos, should_stop=should_stop)


# --- error documents -------------------------------------------------------------------------


def error_document(message: str, *, infos: Iterable[tuple[str, str]] = ()) -> bytes:
    """An error VOTable: RESOURCE type="results" with QUERY_STATUS=ERROR (DALI 1.1 §4.4.2)."""
    lines = ['<?xml version="1.0" encoding="UTF-8"?>',
             f'<VOTABLE version="1.4" xmlns="{VOTABLE_NS}" '
             'xmlns:xsi="http://www.w3.org/2001/XMLSchema-instance">',
             '<RESOURCE type="results">',
             _info_xml("QUERY_STATUS", "ERROR", message or "unknown error")]
    lines += [_info_xml(name, value) for name, value in infos]
    lines += ["</RESOURCE>", "</VOTABLE>", ""]
    return "\n".join(lines).encode("utf-8")

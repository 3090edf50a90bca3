"""Reading a VOTable result as a stream: rows, columns and the status that counts.

A TAP result can be far larger than memory, and its overflow flag comes *after* the rows
(DALI 1.1 §4.4.1), so the document is read once, front to back, in bounded memory: XML events
from a defusedxml-hardened parser (plain TABLEDATA rows in bulk), BINARY and BINARY2 streams
decoded with numpy, rows handed on in Arrow batches to a sink and dropped. The VOTable column
types become Arrow types here, with the FIELD metadata kept on each Arrow field. What the rows
go into (the cached Parquet copy) is ``jobdesk.results``'s business: this module writes nothing.
"""

from __future__ import annotations

import binascii
import io
import json
import re
import struct
import xml.parsers.expat
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import IO, Any, Protocol

import defusedxml
import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
from defusedxml.ElementTree import DefusedXMLParser

from jobdesk.documents import query_status
from jobdesk.errors import ServiceResponseInvalid, shorten

__all__ = ["ResultSummary", "RowSink", "read", "scan", "describe"]

READ_CHUNK = 1 << 20          # bytes read at a time (fed to the XML parser, or the bulk path)
BATCH_CELLS = 100_000         # cells per Arrow batch: bounds memory whatever the column count
BATCH_ROWS = 50_000
_FIELD_KEYS = ("name", "datatype", "arraysize", "unit", "ucd", "description", "xtype", "utype")


@dataclass
class ResultSummary:
    """What a result holds: rows, the status that counts, and its columns."""

    rows: int
    status: str = "OK"
    message: str | None = None
    fields: list[dict] = field(default_factory=list)
    infos: dict[str, str] = field(default_factory=dict)

    @property
    def truncated(self) -> bool:
        return self.status == "OVERFLOW"

    def to_json(self) -> str:
        return json.dumps(asdict(self), sort_keys=True)

    @classmethod
    def from_json(cls, text: str) -> ResultSummary:
        return cls(**json.loads(text))


# --- column types ------------------------------------------------------------------------------

# VOTable 1.4 §2.1 (Table 1): primitive datatypes, their binary width and the Arrow type kept.
_NUMERIC = {
    "unsignedByte": ("u1", pa.uint8()),
    "short": ("i2", pa.int16()),
    "int": ("i4", pa.int32()),
    "long": ("i8", pa.int64()),
    "float": ("f4", pa.float32()),
    "double": ("f8", pa.float64()),
    "floatComplex": ("f4", pa.float32()),    # kept as [re, im] pairs, rebuilt on load
    "doubleComplex": ("f8", pa.float64()),
}
_STRINGS = ("char", "unicodeChar")
_BOOL_TEXT = {"t": True, "true": True, "1": True, "f": False, "false": False, "0": False}


class _Field:
    """One FIELD of the result table and how its values are decoded."""

    def __init__(self, attrib: dict[str, str], index: int):
        self.index = index
        self.attrib = attrib
        self.name = attrib.get("name") or attrib.get("ID") or f"col{index}"
        self.datatype = attrib.get("datatype", "")
        self.arraysize = attrib.get("arraysize")
        self.description: str | None = None
        self.null: str | None = None          # <VALUES null="..."> (VOTable 1.4 §4.6)
        dt = self.datatype
        if dt not in _NUMERIC and dt not in _STRINGS and dt not in ("boolean", "bit"):
            raise ServiceResponseInvalid(f"FIELD {self.name!r} has unknown datatype {dt!r}")
        self.is_string = dt in _STRINGS
        self.complex = dt.endswith("Complex")
        # VOTable 1.4 §2.2: "AxBx*": the last dimension may vary ("*" or "10*", the 10 an upper
        # bound), and the first dimension varies fastest.
        dims = (self.arraysize or "").replace(" ", "").split("x") if self.arraysize else []
        self.dims = dims
        self.variable = bool(dims) and dims[-1].endswith("*")
        sizes = [int(d.rstrip("*") or 1) for d in dims]
        self.step = int(np.prod(sizes[:-1])) if dims else 1   # elements per step of the last dim
        self.count = int(np.prod(sizes)) if dims else 1        # elements per row when fixed
        self.is_array = bool(dims) and not self.is_string and not (dims == ["1"])
        if self.is_string:
            self.arrow = pa.string()
        elif dt in ("boolean", "bit"):
            self.arrow = pa.bool_()
        else:
            self.arrow = _NUMERIC[dt][1]
        self.arrow_column = pa.list_(self.arrow) if (self.is_array or self.complex) else self.arrow

    def describe(self) -> dict:
        out = {k: self.attrib.get(k) for k in _FIELD_KEYS}
        out["name"] = self.name
        out["description"] = self.description
        return out

    def arrow_field(self) -> pa.Field:
        meta = {k: v for k, v in self.describe().items() if v is not None and k != "name"}
        if self.null is not None:
            meta["null"] = self.null
        return pa.field(self.name, self.arrow_column, nullable=True,
                        metadata={k: str(v) for k, v in meta.items()})

    def null_value(self) -> Any:
        if self.null is None or self.is_string or self.arrow == pa.bool_():
            return None
        try:
            return int(self.null, 0) if pa.types.is_integer(self.arrow) else float(self.null)
        except ValueError:
            return None


# --- values: text cells (TABLEDATA) -------------------------------------------------------------


def _numbers_from_text(cells: list[str] | pa.Array, fld: _Field) -> pa.Array:
    """Parse numeric text cells; empty cells, the VALUES null and NaN become nulls."""
    text = pc.utf8_trim_whitespace(_as_arrow(cells))
    text = pc.if_else(pc.equal(text, ""), pa.scalar(None, pa.string()), text)
    try:
        arr = pc.cast(text, fld.arrow)
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
        arr = pa.array([_parse_number(s, fld) for s in text.to_pylist()], fld.arrow)
    return _apply_nulls(arr, fld)


def _parse_number(s: str | None, fld: _Field) -> Any:
    # VOTable 1.4 §6: integers may be written in hexadecimal (0x...); NaN in an integer is null.
    if s is None:
        return None
    try:
        if pa.types.is_integer(fld.arrow):
            try:
                return int(s, 0)
            except ValueError:
                return int(float(s)) if s.lower() not in ("nan", "+nan", "-nan") else None
        return float(s)
    except ValueError:
        raise ServiceResponseInvalid(
            f"column {fld.name!r} ({fld.datatype}) holds {s[:40]!r}, which is not a number") from None


def _apply_nulls(arr: pa.Array, fld: _Field) -> pa.Array:
    null = fld.null_value()
    if null is not None:
        arr = pc.if_else(pc.equal(arr, pa.scalar(null, fld.arrow)), pa.scalar(None, fld.arrow), arr)
    if pa.types.is_floating(fld.arrow) and arr.null_count < len(arr):
        # VOTable 1.4 §6: NaN is the null of floating point values.
        arr = pc.if_else(pc.is_nan(arr), pa.scalar(None, fld.arrow), arr)
    return arr


def _bools_from_text(cells: list[str]) -> pa.Array:
    # VOTable 1.4 §2.1: T/F, t/f, true/false, 1/0; "?", space or empty is null.
    return pa.array([_BOOL_TEXT.get(c.strip().lower()) for c in cells], pa.bool_())


def _as_arrow(cells: list[str] | pa.Array) -> pa.Array:
    return cells if isinstance(cells, pa.Array) else pa.array(cells, pa.string())


def _column_from_text(cells: list[str] | pa.Array, fld: _Field) -> pa.Array:
    """One column from its text cells: a list of str (the XML path) or an Arrow string array
    (the bulk path); both go through the same steps, so both give the same values."""
    if fld.is_string:
        # An empty TD is an empty string, not a null, and surrounding whitespace is dropped:
        # both as the reference reader (astropy) does, so the two agree value for value.
        return pc.utf8_trim_whitespace(_as_arrow(cells))
    if not (fld.is_array or fld.complex):
        if fld.arrow == pa.bool_():
            return _bools_from_text(cells if isinstance(cells, list) else cells.to_pylist())
        return _numbers_from_text(cells, fld)
    if isinstance(cells, pa.Array):
        cells = cells.to_pylist()
    # Arrays: whitespace separated values, the first dimension varying fastest (VOTable 1.4 §2.2).
    if fld.arrow == pa.bool_():
        parts = [_bool_tokens(c) for c in cells]
    else:
        parts = [c.split() for c in cells]
    offsets = np.zeros(len(cells) + 1, dtype=np.int32)
    np.cumsum([len(p) for p in parts], out=offsets[1:])
    flat = [x for p in parts for x in p]
    if fld.arrow == pa.bool_():
        values = _bools_from_text(flat)
    else:
        values = _numbers_from_text(flat, fld)
    empty = pa.array([not c.strip() for c in cells])
    return pa.ListArray.from_arrays(pa.array(offsets), values, mask=empty)


def _bool_tokens(cell: str) -> list[str]:
    tokens = cell.split()
    if len(tokens) == 1 and len(tokens[0]) > 1 and tokens[0].lower() not in _BOOL_TEXT:
        return list(tokens[0])       # bits written without separators: "0110"
    return tokens


# --- values: binary rows (BINARY, BINARY2) ------------------------------------------------------


class _BinaryRows:
    """Decodes BINARY / BINARY2 rows (VOTable 1.4 §5.4, §5.5) from a growing byte buffer."""

    def __init__(self, fields: list[_Field], binary2: bool):
        self.fields = fields
        self.binary2 = binary2
        self.mask_bytes = (len(fields) + 7) // 8 if binary2 else 0
        self.fixed = all(not f.variable for f in fields)
        if self.fixed:
            spec = [("_mask", "u1", (self.mask_bytes,))] if binary2 else []
            for f in fields:
                spec.append((f"f{f.index}",) + self._fixed_dtype(f))
            self.dtype = np.dtype(spec)
            self.row_size = self.dtype.itemsize

    @staticmethod
    def _fixed_dtype(f: _Field) -> tuple:
        n = f.count
        if f.datatype == "char":
            return (f"S{n}",)
        if f.datatype == "unicodeChar":
            return (f"S{2 * n}",)
        if f.datatype == "boolean":
            return ("S1", (n,)) if f.is_array else ("S1",)
        if f.datatype == "bit":
            return ("u1", ((n + 7) // 8,))
        base = ">" + _NUMERIC[f.datatype][0]
        n = n * 2 if f.complex else n
        return (base, (n,)) if (f.is_array or f.complex) else (base,)

    def decode(self, buf: bytearray) -> tuple[list[pa.Array], int, int] | None:
        """Decode the complete rows at the head of ``buf``: (columns, rows, bytes used)."""
        if self.fixed:
            rows = min(len(buf) // self.row_size, max(1, BATCH_CELLS // max(1, len(self.fields))))
            if rows == 0:
                return None
            rec = np.frombuffer(buf, dtype=self.dtype, count=rows)
            nulls = self._null_bits(rec["_mask"]) if self.binary2 else None
            cols = [self._fixed_column(f, rec[f"f{f.index}"],
                                       None if nulls is None else nulls[:, f.index])
                    for f in self.fields]
            return cols, rows, rows * self.row_size
        return self._decode_variable(buf)

    def _null_bits(self, mask: np.ndarray) -> np.ndarray:
        # BINARY2: one bit per field, most significant bit first; set means null (§5.5).
        return np.unpackbits(mask, axis=1)[:, : len(self.fields)].astype(bool)

    def _fixed_column(self, f: _Field, raw: np.ndarray, null: np.ndarray | None) -> pa.Array:
        if f.datatype == "char":
            arr = pa.array(raw, pa.binary())         # numpy drops the trailing NUL padding
            arr = pa.array([_latin(b) for b in arr.to_pylist()], pa.string()) \
                if not _is_utf8(arr) else arr.cast(pa.string())
        elif f.datatype == "unicodeChar":
            arr = _ucs2_column(raw, f.count)
        elif f.datatype == "boolean":
            flat = raw.reshape(len(raw), -1)
            vals = np.isin(flat, (b"T", b"t", b"1"))
            nul = ~(vals | np.isin(flat, (b"F", b"f", b"0")))
            if f.is_array:
                arr = _list_from_2d(vals, nul)
            else:
                arr = pa.array(vals[:, 0], mask=nul[:, 0])
        elif f.datatype == "bit":
            if f.is_array:
                bits = np.unpackbits(raw.reshape(len(raw), -1), axis=1)[:, : f.count].astype(bool)
                arr = _list_from_2d(bits, None)
            else:
                arr = pa.array(raw.reshape(len(raw), -1)[:, 0] != 0)   # any set bit: writers differ
        else:
            native = raw.astype(raw.dtype.newbyteorder("="))
            if f.is_array or f.complex:
                mask = self._element_nulls(f, native)
                arr = _list_from_2d(native.reshape(len(native), -1), mask)
            else:
                arr = pa.array(native, mask=self._element_nulls(f, native))
        if null is not None and null.any():
            arr = pc.if_else(pa.array(null), pa.scalar(None, arr.type), arr)
        return arr

    @staticmethod
    def _element_nulls(f: _Field, values: np.ndarray) -> np.ndarray | None:
        if values.dtype.kind == "f":
            mask = np.isnan(values)
            return mask if mask.any() else None
        sentinel = f.null_value()
        if sentinel is not None:
            mask = values == sentinel
            return mask if mask.any() else None
        return None

    def _decode_variable(self, buf: bytearray) -> tuple[list[pa.Array], int, int] | None:
        """Tables with variable-length fields: a 4-byte count precedes each such value (§5.4).

        Only the walk from one row to the next is sequential; it touches the counts alone and
        records where each value starts. The values are then gathered with numpy.
        """
        size = len(buf)
        limit = max(1, BATCH_CELLS // max(1, len(self.fields)))
        count_at = _COUNT.unpack_from
        # the row as runs: a constant number of bytes, or one variable field (bytes per count)
        layout: list[tuple[int, int]] = []        # (fixed bytes before, bytes per count)
        run = self.mask_bytes
        for f in self.fields:
            if f.variable:
                layout.append((run, _width(f, f.step)))
                run = 0
            else:
                run += _width(f, f.count)
        tail = run
        row_starts: list[int] = []
        var_starts: list[list[int]] = [[] for _ in layout]
        var_sizes: list[list[int]] = [[] for _ in layout]
        pos = rows = 0
        while rows < limit:
            p = pos
            sizes = []
            for before, unit in layout:
                p += before
                if p + 4 > size:
                    break
                nbytes = count_at(buf, p)[0] * unit
                sizes.append((p + 4, nbytes))
                p += 4 + nbytes
            else:
                p += tail
                if p <= size:
                    row_starts.append(pos)
                    for k, (start, nbytes) in enumerate(sizes):
                        var_starts[k].append(start)
                        var_sizes[k].append(nbytes)
                    pos = p
                    rows += 1
                    continue
            break
        if rows == 0:
            return None
        data = np.frombuffer(buf, dtype=np.uint8, count=pos)
        starts = np.array(row_starts, dtype=np.int64)
        nulls = None
        if self.binary2:
            nulls = self._null_bits(_gather_fixed(data, starts, self.mask_bytes))
        cols = []
        anchor = starts + self.mask_bytes         # where the current run of fixed fields starts
        k = 0
        for f in self.fields:
            null = None if nulls is None else nulls[:, f.index]
            if f.variable:
                vs = np.array(var_starts[k], dtype=np.int64)
                vn = np.array(var_sizes[k], dtype=np.int64)
                cols.append(self._variable_column(f, data, vs, vn, null))
                anchor = vs + vn
                k += 1
            else:
                width = _width(f, f.count)
                dtype = np.dtype([("v",) + self._fixed_dtype(f)])
                raw = _gather_fixed(data, anchor, width).view(dtype).reshape(rows)["v"]
                cols.append(self._fixed_column(f, raw, null))
                anchor = anchor + width
        del data
        return cols, rows, pos

    def _variable_column(self, f: _Field, data: np.ndarray, starts: np.ndarray,
                         nbytes: np.ndarray, null: np.ndarray | None) -> pa.Array:
        offsets = np.zeros(len(starts) + 1, dtype=np.int64)
        np.cumsum(nbytes, out=offsets[1:])
        payload = _gather_ranges(data, starts, nbytes, offsets)
        if f.datatype == "char":
            arr = pa.Array.from_buffers(pa.large_binary(), len(starts),
                                        [None, pa.py_buffer(offsets), pa.py_buffer(payload)])
            if _is_utf8(arr):
                arr = arr.cast(pa.large_string()).cast(pa.string())
            else:
                arr = pa.array([_latin(b) for b in arr.to_pylist()], pa.string())
            arr = pc.utf8_rtrim(arr, characters="\0")
        elif f.datatype == "unicodeChar":
            arr = pa.array([payload[a:b].tobytes().decode("utf-16-be", "replace").rstrip("\0")
                            for a, b in zip(offsets[:-1], offsets[1:])], pa.string())
        else:
            if f.datatype == "bit":
                # packed bits: the exact count is in the element count, padding bits dropped
                parts = [np.unpackbits(payload[a:b]).astype(bool) for a, b in
                         zip(offsets[:-1], offsets[1:])]
                lengths = np.array([len(x) for x in parts], dtype=np.int64)
                flat = np.concatenate(parts) if parts else np.zeros(0, dtype=bool)
            elif f.datatype == "boolean":
                flat = np.isin(payload.view("S1"), (b"T", b"t", b"1"))
                lengths = nbytes
            else:
                dt = np.dtype(">" + _NUMERIC[f.datatype][0])
                flat = payload.view(dt).astype(dt.newbyteorder("="))
                lengths = nbytes // dt.itemsize
            item_offsets = np.zeros(len(starts) + 1, dtype=np.int32)
            np.cumsum(lengths, out=item_offsets[1:])
            values = pa.array(flat, mask=self._element_nulls(f, flat))
            arr = pa.ListArray.from_arrays(pa.array(item_offsets), values)
        if null is not None and null.any():
            arr = pc.if_else(pa.array(null), pa.scalar(None, arr.type), arr)
        return arr


_COUNT = struct.Struct(">I")


def _gather_fixed(data: np.ndarray, starts: np.ndarray, width: int) -> np.ndarray:
    """The ``width`` bytes at each start, as a C-contiguous (rows, width) array."""
    if width == 0:
        return np.zeros((len(starts), 0), dtype=np.uint8)
    return data[starts[:, None] + np.arange(width)]


def _gather_ranges(data: np.ndarray, starts: np.ndarray, nbytes: np.ndarray,
                   offsets: np.ndarray) -> np.ndarray:
    """The byte ranges (start, nbytes) concatenated, without a Python loop."""
    total = int(offsets[-1])
    if total == 0:
        return np.zeros(0, dtype=np.uint8)
    index = np.arange(total, dtype=np.int64) + np.repeat(starts - offsets[:-1], nbytes)
    return data[index]


def _ucs2_column(raw: np.ndarray, n: int) -> pa.Array:
    """Fixed-width unicodeChar (UCS-2, VOTable 1.4 §2.1) to strings without a Python loop."""
    codes = np.frombuffer(raw.tobytes(), dtype=">u2").astype("<u4")
    try:
        return pa.array(codes.view(f"<U{n}"), pa.string())   # numpy drops the NUL padding
    except (pa.ArrowInvalid, UnicodeError, ValueError):       # lone surrogates
        return pa.array([b.decode("utf-16-be", "replace").rstrip("\0") for b in raw.tolist()],
                        pa.string())


def _width(f: _Field, n: int) -> int:
    if f.datatype == "bit":
        return (n + 7) // 8
    if f.datatype in ("char", "boolean"):
        return n
    if f.datatype == "unicodeChar":
        return 2 * n
    return n * int(_NUMERIC[f.datatype][0][1]) * (2 if f.complex else 1)


def _list_from_2d(values: np.ndarray, mask: np.ndarray | None) -> pa.Array:
    rows, width = values.shape
    offsets = pa.array(np.arange(0, (rows + 1) * width, width, dtype=np.int32))
    flat = values.reshape(-1)
    items = pa.array(flat, mask=None if mask is None else mask.reshape(-1))
    return pa.ListArray.from_arrays(offsets, items)


def _latin(b: bytes) -> str:
    # VOTable char is 7-bit ASCII (§2.1); tolerate servers that send Latin-1 bytes.
    return b.decode("ascii") if b.isascii() else b.decode("latin-1")


def _is_utf8(arr: pa.Array) -> bool:
    try:
        arr.cast(pa.string()).validate(full=True)
        return True
    except pa.ArrowInvalid:
        return False


# --- the streaming reader ----------------------------------------------------------------------


def _local(tag: str) -> str:
    return tag.rpartition("}")[2]


class _Reader:
    """XML target for the hardened parser: keeps the summary, hands row batches to ``sink``."""

    def __init__(self, sink):
        self.sink = sink
        self.stack: list[str] = []
        self.resources: list[str] = []        # the type of each open RESOURCE
        self.infos: dict[str, str] = {}
        self.statuses: list[tuple[str, str, str | None]] = []   # (where, value, message)
        self.fields: list[_Field] = []
        self.table_depth: int | None = None   # stack depth of the TABLE whose rows we keep
        self.tables_seen = 0
        self.rows = 0
        self.text: list[str] = []
        self.info: dict[str, str] | None = None
        self.mode = ""                        # "", "td" (inside TABLEDATA), "stream"
        self.cells: list[str] = []
        self.row_start = 0
        self.batch_rows = BATCH_ROWS
        self.binary: _BinaryRows | None = None
        self.b64 = ""
        self.raw = bytearray()
        self.td = self.tr = self.tabledata = ""
        self.ended = False
        self.declared: str | None = None      # the serialization the Content-Type named
        self.where = lambda: -1               # expat's byte index of the current event
        self.tabledata_at = self.row_end_at = -1

    # XML target protocol ------------------------------------------------------------------------

    def data(self, text: str) -> None:
        self.text.append(text)

    def expat_start(self, tag: str, attr_list: list[str]) -> None:
        """The same as :meth:`start`, called by expat directly (attributes as a flat list);
        cells skip building an attribute dict, which is most of the time on TABLEDATA."""
        if self.mode == "td":
            self._cell_start(tag)
            return
        self.start(tag, dict(zip(attr_list[::2], attr_list[1::2])))

    def _cell_start(self, tag: str) -> None:
        if tag == self.td:
            self.text.clear()
        elif tag == self.tr:
            self.row_start = len(self.cells)
        else:
            raise ServiceResponseInvalid(f"unexpected <{_local(tag)}> inside TABLEDATA")

    def start(self, tag: str, attrib: dict[str, str]) -> None:
        if self.mode == "td":
            self._cell_start(tag)
            return
        self.text.clear()
        name = _local(tag)
        if not self.stack and name != "VOTABLE":
            raise ServiceResponseInvalid(
                f"expected a VOTable document, found <{name}> as the root element")
        depth = len(self.stack)
        self.stack.append(name)
        if name == "RESOURCE":
            self.resources.append(attrib.get("type", ""))
        elif name == "INFO":
            self.info = attrib
        elif name == "TABLE" and self.table_depth is None and self._in_result_scope():
            self.table_depth = depth
        elif self._keeping():
            if name == "FIELD" and self.stack[-2] == "TABLE":
                self.fields.append(_Field(attrib, len(self.fields)))
            elif name == "VALUES" and self.stack[-2] == "FIELD" and "null" in attrib and self.fields:
                self.fields[-1].null = attrib["null"]
            elif name in ("TABLEDATA", "BINARY", "BINARY2", "FITS") and self.declared and \
                    name != self.declared:
                raise ServiceResponseInvalid(
                    f"the answer declared serialization={self.declared} but holds {name}")
            if name == "DATA":
                self.sink.begin([f.arrow_field() for f in self.fields])
                self.batch_rows = max(1, min(BATCH_ROWS, BATCH_CELLS // max(1, len(self.fields))))
            elif name == "TABLEDATA":
                self.mode = "td"
                self.tabledata_at = self.where()
                prefix = tag[: len(tag) - len(name)]
                self.tabledata, self.tr, self.td = tag, prefix + "TR", prefix + "TD"
            elif name in ("BINARY", "BINARY2"):
                self.binary = _BinaryRows(self.fields, name == "BINARY2")
            elif name == "STREAM" and self.binary is not None and self.mode == "":
                if attrib.get("href"):
                    raise ServiceResponseInvalid("the result points to an external STREAM "
                                                 f"({attrib['href'][:80]}); not supported")
                if attrib.get("encoding", "base64") != "base64":
                    raise ServiceResponseInvalid(
                        f"STREAM encoding {attrib.get('encoding')!r} is not supported")
                self.mode = "stream"
            elif name == "FITS":
                raise ServiceResponseInvalid("FITS-serialised VOTable data is not supported; "
                                             "ask for TABLEDATA, BINARY or BINARY2")

    def end(self, tag: str) -> None:
        if self.mode == "td":
            if tag == self.td:
                t = self.text
                self.cells.append(t[0] if len(t) == 1 else "".join(t))
                return
            if tag == self.tr:
                self._end_row()
                self.row_end_at = self.where()
                return
            if tag != self.tabledata:
                return
            self.mode = ""
            self._flush_text()
        name = self.stack.pop() if self.stack else _local(tag)
        if name == "STREAM" and self.mode == "stream":
            self.drain_stream(final=True)
            self.mode = ""
            if self.raw:
                raise ServiceResponseInvalid(
                    f"the binary stream ends inside a row ({len(self.raw)} stray bytes)")
        elif name == "INFO" and self.info is not None:
            self._end_info("".join(self.text).strip())
        elif name == "DESCRIPTION" and self.stack and self.stack[-1] == "FIELD" and self._keeping() \
                and self.fields:
            self.fields[-1].description = " ".join("".join(self.text).split()) or None
        elif name == "TABLE" and self.table_depth == len(self.stack):
            self.tables_seen += 1
        elif name == "RESOURCE":
            self.resources.pop()
        elif name == "VOTABLE":
            self.ended = True
        self.text.clear()

    def close(self) -> None:
        pass

    # helpers ------------------------------------------------------------------------------------

    def _in_result_scope(self) -> bool:
        # DALI 1.1 §4.4: the table is in the RESOURCE of type "results"; older services leave
        # the type out, so the first TABLE of any resource that is not "meta" is taken.
        return bool(self.resources) and self.resources[-1] != "meta"

    def _keeping(self) -> bool:
        return self.table_depth is not None and self.tables_seen == 0 and len(self.stack) > self.table_depth

    def _end_info(self, content: str) -> None:
        attrib, self.info = self.info, None
        parent = self.stack[-1] if self.stack else ""
        name, value = attrib.get("name", ""), attrib.get("value", "")
        if name == "QUERY_STATUS":
            # DALI 1.1 §4.4.1: the QUERY_STATUS INFOs of the results RESOURCE; the last counts.
            where = self.resources[-1] if parent == "RESOURCE" else parent
            self.statuses.append((where, value.strip().upper(), content or None))
        elif parent == "VOTABLE" or (parent == "RESOURCE" and self.resources[-1] == "results"):
            self.infos[name] = value if value else content

    def _end_row(self) -> None:
        got = len(self.cells) - self.row_start
        want = len(self.fields)
        if got != want:
            # VOTable 1.4 §5.2: one TD per FIELD; the reference reader refuses other rows too.
            raise ServiceResponseInvalid(f"row {self.rows + 1} has {got} cells for {want} FIELDs")
        self.rows += 1
        if len(self.cells) >= self.batch_rows * want:
            self._flush_text()

    def _flush_text(self) -> None:
        n = len(self.fields)
        if not self.cells or n == 0:
            self.cells = []
            return
        rows = len(self.cells) // n
        if self.sink.wants_values:
            cols = []
            for i, f in enumerate(self.fields):
                try:
                    cols.append(_column_from_text(self.cells[i::n], f))
                except (pa.ArrowInvalid, OverflowError) as exc:
                    raise ServiceResponseInvalid(
                        f"column {f.name!r} ({f.datatype}) holds a value that does not fit: "
                        f"{shorten(str(exc), 200)}") from None
            self.sink.write(cols, rows)
        self.cells = []

    def add_rows(self, cols: list[pa.Array], rows: int) -> None:
        """Rows decoded by the bulk path, after any the XML path gathered before them."""
        self._flush_text()
        self.rows += rows
        if self.sink.wants_values:
            self.sink.write(cols, rows)

    def drain_stream(self, final: bool = False) -> None:
        """Decode the base64 text gathered so far and hand complete rows on (§5.1)."""
        if self.mode != "stream":
            if self.stack and self.stack[-1] == "STREAM":
                self.text.clear()       # the stream of a table we do not keep
            return
        text = self.b64 + "".join("".join(self.text).split())
        self.text.clear()
        usable = len(text) if final else len(text) - len(text) % 4
        chunk, self.b64 = text[:usable], text[usable:]
        if chunk:
            try:
                self.raw += binascii.a2b_base64(chunk)
            except binascii.Error as exc:
                raise ServiceResponseInvalid(f"the binary stream is not valid base64: {exc}") from None
        while self.raw:
            got = self.binary.decode(self.raw)
            if got is None:
                break
            cols, rows, used = got
            del self.raw[:used]
            self.rows += rows
            if self.sink.wants_values:
                self.sink.write(cols, rows)

    def summary(self) -> ResultSummary:
        # DALI 1.1 §4.4.1: the last QUERY_STATUS of the results RESOURCE counts (OVERFLOW
        # follows the TABLE); the same rule as for error documents (jobdesk.documents).
        status, message = query_status(self.statuses)
        return ResultSummary(rows=self.rows, status=status, message=message,
                             fields=[f.describe() for f in self.fields], infos=dict(self.infos))


def read(source: IO[bytes], sink: RowSink, serialization: str | None = None
         ) -> tuple[ResultSummary, list[pa.Field]]:
    """Read a VOTable document to its end, handing the kept table's rows to ``sink``; returns
    the summary and the columns as Arrow fields. ``serialization`` ("BINARY2", ...) is what the
    answer declared: a document holding another is refused rather than guessed at."""
    reader = _Reader(sink)
    reader.declared = serialization
    # defusedxml refuses DTDs, entity declarations and external references outright, so
    # entity-expansion bombs and file/URL inclusion never reach the reader.
    parser = DefusedXMLParser(target=reader, forbid_dtd=True, forbid_entities=True,
                              forbid_external=True)
    expat = getattr(parser, "_parser", None)
    if isinstance(expat, xml.parsers.expat.XMLParserType):
        # Speed: let expat call the reader directly, skipping ElementTree's per-element name
        # fixing (a third of the time on TABLEDATA). defusedxml's refusals stay installed.
        expat.StartElementHandler = reader.expat_start
        expat.EndElementHandler = reader.end
        expat.CharacterDataHandler = reader.text.append
        reader.where = lambda: expat.CurrentByteIndex
    feed = parser.feed
    try:
        seen = 0
        while True:
            chunk = source.read(READ_CHUNK)
            if not chunk:
                break
            if seen == 0:
                _refuse_non_xml(chunk)
                if isinstance(expat, xml.parsers.expat.XMLParserType) and _declares_utf8(chunk):
                    feed = _TableDataSplitter(reader, parser.feed).push
            seen += len(chunk)
            feed(chunk)
            reader.drain_stream()
        if seen == 0:
            raise ServiceResponseInvalid("the result document is empty (0 bytes)")
        if feed != parser.feed:
            feed(b"", final=True)
        parser.close()
    except ServiceResponseInvalid:
        raise
    except defusedxml.DefusedXmlException as exc:
        raise ServiceResponseInvalid(
            f"the result document was refused as unsafe XML: {type(exc).__name__} ({exc})") from None
    except (xml.parsers.expat.ExpatError, SyntaxError) as exc:
        where = "truncated or malformed" if "no element found" in str(exc) or "unclosed" in str(exc) \
            else "malformed"
        raise ServiceResponseInvalid(f"the result is {where} XML: {exc}") from None
    if not reader.ended:
        raise ServiceResponseInvalid("the result document ends before </VOTABLE>")
    return reader.summary(), [f.arrow_field() for f in reader.fields]


def _refuse_non_xml(head: bytes) -> None:
    if head[:2] in (b"\xff\xfe", b"\xfe\xff"):
        return                                  # UTF-16 with a byte order mark: expat decides
    start = head.removeprefix(b"\xef\xbb\xbf").lstrip()[:200]
    if start[:1] != b"<":
        preview = start[:60].decode("utf-8", "replace")
        raise ServiceResponseInvalid(f"expected a VOTable document, found text: {preview!r}")


# --- TABLEDATA in bulk -------------------------------------------------------------------------
#
# Most of the time of the XML path goes into one Python call per cell (expat's start, end and
# text events). Rows written the plain way -- <TR><TD>text</TD>...</TR>, no entities, comments,
# CDATA, processing instructions or attributes -- are turned into delimited text with a few
# whole-buffer byte replacements and parsed by Arrow's CSV reader, then go through the same
# per-column steps as the XML path. Anything else in a piece of rows sends that piece to expat,
# which stays in step: the bulk path only ever skips whole rows, and it resumes only once
# expat's own events prove it stands between two rows.

_ROWS_START = re.compile(rb"<(?:([A-Za-z_][\w.-]*):)?TABLEDATA\s*>")
_BETWEEN_TAGS = re.compile(rb">\s+<")
# XML 1.0 §2.2: characters a document cannot hold; expat refuses them, so must the bulk path.
# Our delimiter \x1f is one of them, so no cell can hold it.
_CSV_PARSE = pacsv.ParseOptions(delimiter="\x1f", quote_char=False, double_quote=False,
                                escape_char=False, newlines_in_values=False,
                                ignore_empty_lines=False)
_NOT_XML = bytes(range(0, 9)) + b"\x0b\x0c" + bytes(range(0x0e, 0x20))
# Entities and character references, the CDATA end (refused in text, XML 1.0 §2.4) and line
# ends expat would normalise (§2.11). Comments, CDATA sections and processing instructions
# need no test: they start with "<", which no replacement below takes, so they are left over.
_MARKUP = (b"&", b"]]>", b"\r")
_CELL, _ROW = b"\x1f", b"\n"
_DECLARED = re.compile(rb"""^\s*<\?xml[^>]*?encoding\s*=\s*["']([A-Za-z0-9._-]+)["']""")


def _declares_utf8(head: bytes) -> bool:
    """The bulk path reads bytes as UTF-8: only for documents that are UTF-8 (XML 1.0 §4.3.3:
    no byte order mark and no encoding declaration also means UTF-8)."""
    if head[:2] in (b"\xff\xfe", b"\xfe\xff"):
        return False
    found = _DECLARED.match(head.removeprefix(b"\xef\xbb\xbf")[:400])
    return found is None or found.group(1).lower() in (b"utf-8", b"utf8", b"us-ascii", b"ascii")


class _NotBulk(Exception):
    """This piece of rows needs the XML parser."""


class _TableDataSplitter:
    """Hands a document to expat, except the rows of the kept TABLEDATA it can read in bulk."""

    def __init__(self, reader: "_Reader", feed):
        self.reader = reader
        self._expat_feed = feed
        self.fed = 0                  # bytes given to expat (its byte index counts only these)
        self.buf = b""
        self.in_rows = False
        self.clean = True             # expat stands between two rows (not inside a comment...)

    def _feed(self, data: bytes) -> None:
        if data:
            self._expat_feed(data)
            self.fed += len(data)

    def push(self, chunk: bytes, final: bool = False) -> None:
        buf = self.buf + chunk if self.buf else chunk
        while buf:
            if not self.in_rows:
                found = _ROWS_START.search(buf) if b"TABLEDATA" in buf else None
                if found is None:
                    keep = 0 if final else min(len(buf), 256)   # a tag cut by the chunk edge
                    self._feed(buf[: len(buf) - keep])
                    buf = buf[len(buf) - keep:]
                    break
                start = self.fed + found.start()
                self._feed(buf[: found.end()])
                buf = buf[found.end():]
                reader = self.reader
                if reader.mode == "td" and reader.tabledata_at == start:
                    self._enter(found.group(1) or b"")
                continue
            end = buf.find(self.close)
            if end >= 0:
                limit = end
            else:
                last = buf.rfind(self.tr_close)
                if last < 0 or final:
                    if final:           # no </TABLEDATA>: expat says how the document is cut
                        self._feed(buf)
                        buf = b""
                    break
                limit = last + len(self.tr_close)
            self._rows(buf[:limit])
            buf = buf[limit:]
            if end >= 0:
                self.in_rows = False
        self.buf = buf

    def _enter(self, prefix: bytes) -> None:
        p = prefix + b":" if prefix else b""
        tr, td = b"<" + p + b"TR>", b"<" + p + b"TD>"
        tr_end, td_end = b"</" + p + b"TR>", b"</" + p + b"TD>"
        self.close = b"</" + p + b"TABLEDATA"
        self.tr_close = tr_end
        self.first, self.last = tr + td, td_end + tr_end
        self.empty, self.empty_as = b"<" + p + b"TD/>", td + td_end
        self.cell_sep = td_end + td
        self.row_seps = (td_end + tr_end + b"\n" + tr + td, td_end + tr_end + tr + td)
        self.in_rows, self.clean = True, True
        self.names = [f"c{i}" for i in range(len(self.reader.fields))]

    def _rows(self, piece: bytes) -> None:
        if self.clean:
            body = piece.strip()
            if not body:
                return
            try:
                cols, rows = self._convert(body)
            except _NotBulk:
                pass
            else:
                self.reader.add_rows(cols, rows)
                return
        before = self.fed
        self._feed(piece)
        # Back in step only if the piece's last </TR> was a real end tag, seen by the reader.
        last = piece.rfind(self.tr_close)
        self.clean = (last >= 0 and not piece[last + len(self.tr_close):].strip()
                      and self.reader.row_end_at == before + last)

    def _convert(self, body: bytes) -> tuple[list[pa.Array], int]:
        fields = self.reader.fields
        if not fields or any(m in body for m in _MARKUP) or \
                len(body.translate(None, _NOT_XML)) != len(body):
            raise _NotBulk
        text = self._delimited(body) or self._delimited(_BETWEEN_TAGS.sub(b"><", body))
        if text is None:
            raise _NotBulk
        rows = body.count(self.tr_close)
        try:
            table = pacsv.read_csv(pa.py_buffer(text), read_options=pacsv.ReadOptions(
                column_names=self.names, use_threads=False,
                block_size=len(text) + 1),
                parse_options=_CSV_PARSE, convert_options=pacsv.ConvertOptions(
                    column_types={n: pa.string() for n in self.names},
                    strings_can_be_null=False, quoted_strings_can_be_null=False,
                    null_values=[], check_utf8=True))
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
            raise _NotBulk from None
        if table.num_rows != rows:          # a line end inside a cell: not one row per line
            raise _NotBulk
        if not self.reader.sink.wants_values:
            return [], rows
        try:
            cols = [_column_from_text(table.column(i).combine_chunks(), f)
                    for i, f in enumerate(fields)]
        except Exception:  # noqa: BLE001 - the XML path raises the exact error, or reads it
            raise _NotBulk from None
        return cols, rows

    def _delimited(self, body: bytes) -> bytes | None:
        if self.empty in body:
            body = body.replace(self.empty, self.empty_as)
        if not (body.startswith(self.first) and body.endswith(self.last)):
            return None
        text = body[len(self.first): len(body) - len(self.last)].replace(self.cell_sep, _CELL)
        for sep in self.row_seps:
            text = text.replace(sep, _ROW)
        # Every tag was one of the replaced sequences, so nothing of markup is left, or the
        # rows are not plain: the whole piece is refused.
        return None if b"<" in text else text




# --- where the rows go -------------------------------------------------------------------------


class RowSink(Protocol):
    """What the reader hands the kept table to: ``begin`` once with its columns as Arrow fields
    (at ``<DATA>``), then ``write`` for each batch of decoded columns. A sink whose
    ``wants_values`` is False is only told the columns: rows are counted, never decoded."""

    wants_values: bool

    def begin(self, fields: list[pa.Field]) -> None: ...

    def write(self, cols: list[pa.Array], rows: int) -> None: ...


class _Counter:
    wants_values = False

    def begin(self, fields):
        pass

    def write(self, cols, rows):
        pass


# --- public API --------------------------------------------------------------------------------


def scan(votable: Path) -> ResultSummary:
    """Read a VOTable result to the end: rows, the status that counts, columns and INFOs."""
    with open(votable, "rb") as fh:
        return read(fh, _Counter())[0]


def describe(votable_xml: bytes) -> tuple[ResultSummary, list[pa.Field]]:
    """The summary and the Arrow fields (with their VOTable metadata) of a VOTable document
    without rows, such as the one a VOParquet file embeds in its footer."""
    return read(io.BytesIO(votable_xml), _Counter())

"""Writing a cached result out with its provenance embedded, plus a PROV-JSON sidecar.

One function, :func:`export`, per call one table into one file:

- FITS: a binary table with ORIGIN/DATE/HISTORY cards (FITS 4.0 §4.4.2) and CHECKSUM/DATASUM;
- VOTable 1.4: the FIELD datatypes, arraysizes, xtypes, units, UCDs and descriptions of the
  cached result, and INFO elements with the names TAP services use (QUERY, request_date, ...);
- Parquet: the cached Parquet's field metadata (unit, ucd, description, xtype, ...) and the
  provenance JSON in the schema metadata;
- HDF5 (astropy's writer, h5py underneath): several results in one file, each under a path of
  the caller's choosing, units, UCDs, descriptions and provenance as attributes; a table already
  there is replaced only with ``overwrite=True``, and a warning says so;
- CSV (RFC 4180, UTF-8, a header line): DALI geometry values in their DALI text form; CSV has
  nowhere to put provenance, so only the sidecar speaks;
- ECSV (astropy's writer): every type, provenance in the YAML header.

Before a byte is written the table is checked against what the format can hold; a value it
cannot hold raises :class:`~jobdesk.errors.ExportRefused` naming every such column and what to
do. Files are written to a temporary file beside the target, synced and renamed, so a failure
leaves nothing partial. The sidecar ``<file>.prov.json`` (W3C PROV-JSON) names the exported
file's SHA-256, which ties the two together.
"""

from __future__ import annotations

import csv
import hashlib
import json
import os
import shutil
import tempfile
import warnings
from contextlib import contextmanager
from pathlib import Path

import numpy as np

from jobdesk import provenance as prov_mod
from jobdesk.errors import (
    ExportRefused, ExportTargetExists, ExportWarning, JobdeskError, from_transport,
)

FORMATS = {".fits": "fits", ".fit": "fits", ".vot": "votable", ".xml": "votable",
           ".votable": "votable", ".parquet": "parquet", ".csv": "csv", ".ecsv": "ecsv",
           ".h5": "hdf5", ".hdf5": "hdf5", ".hdf": "hdf5"}
GEOMETRY = ("point", "circle", "polygon")        # DALI 1.1 §3.3.5-3.3.7
_COLUMN_KEYS = ("unit", "ucd", "description", "xtype", "utype", "datatype", "arraysize")


def export(table, prov: dict, path: Path | str, *, fmt: str | None = None,
           name: str | None = None, overwrite: bool = False) -> list[Path]:
    """Write ``table`` to ``path`` and ``<path>.prov.json``; return both paths.

    ``fmt`` defaults to the suffix (see ``FORMATS``). ``name`` is the table's path inside an
    HDF5 file (default ``jobdesk/<key prefix>``). An existing file (or, in HDF5, an existing
    table at ``name``) is replaced only with ``overwrite=True``.
    """
    path = Path(path)
    fmt = (fmt or FORMATS.get(path.suffix.lower()) or "").lower()
    if fmt not in set(FORMATS.values()):
        raise ExportRefused(f"cannot tell the format of {path.name}",
                            hint="use one of the suffixes " + ", ".join(sorted(FORMATS))
                            + " or pass fmt=")
    table = _prepared(table)
    problems = _unrepresentable(table, fmt)
    if problems:
        raise ExportRefused(
            f"{path.name}: {fmt.upper()} cannot hold " + "; ".join(problems) + ". Nothing was written",
            hint=_HINTS.get(fmt, "choose another format (VOTable and Parquet hold every type)"))
    if fmt == "hdf5":
        name = (name or f"jobdesk/{prov['key'][:12]}").strip("/")
        if not name or any(part in ("", ".", "..") for part in name.split("/")):
            raise ExportRefused(f"{name!r} is not a usable table path inside {path.name}",
                                hint="give name= as group/table, e.g. name='run1/stars'")
        sidecar = path.with_name(f"{path.name}.{name.replace('/', '.')}.prov.json")
    else:
        if name is not None:
            raise ExportRefused(f"name= ({name!r}) only applies to HDF5 files, not {fmt.upper()}",
                                hint="drop name=, or write to a .h5 file")
        sidecar = path.with_name(path.name + ".prov.json")
        if path.exists() and not overwrite:
            raise ExportTargetExists(f"{path} already exists; nothing was written",
                                     hint="pass overwrite=True (jobdesk export --overwrite) to "
                                          "replace it, or choose another name")
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        with _atomic(path, copy_existing=(fmt == "hdf5")) as tmp:
            _WRITERS[fmt](table, prov, tmp, name=name, overwrite=overwrite, target=path)
            digest, size = _sha256(tmp)
            exported = {"path": path.name, "format": fmt, "sha256": digest, "bytes": size}
            if fmt == "hdf5":
                exported["table"] = "/" + name
            document = prov_mod.to_prov_json(prov, exported=exported)
            with _atomic(sidecar) as side:
                side.write_text(json.dumps(document, indent=1), encoding="utf-8")
                _fsync(side)
                # Both files are complete: the table goes into place first, then (leaving
                # this block) the sidecar that describes it.
                _fsync(tmp)
                os.replace(tmp, path)
    except JobdeskError:
        raise
    except OSError as exc:          # disk full, permission, not an HDF5 file, ...
        raise from_transport(exc) if exc.errno else ExportRefused(
            f"could not write {path.name}: {exc}; nothing was written",
            hint="check that the path is writable (and, for HDF5, that it is an HDF5 file)"
        ) from exc
    except (TypeError, ValueError) as exc:      # a writer met a value its checks did not foresee
        raise ExportRefused(f"{fmt.upper()} writer refused {path.name}: {exc}; nothing was "
                            "written") from exc
    return [path, sidecar]


# --- what a format can hold ---------------------------------------------------------------------

_HINTS = {
    "fits": ("write VOTable, Parquet or HDF5 instead (they hold these values), or change the "
             "columns first (e.g. drop them, or fill nulls with table[name].filled(value))"),
    "csv": ("write VOTable, Parquet, ECSV or HDF5 instead, or turn the arrays into text first, "
            "e.g. table[name] = [' '.join(map(str, v)) for v in table[name]]"),
    "hdf5": ("write VOTable, Parquet or ECSV instead, or pad the arrays to one length first"),
}


def _kind(col) -> str:
    """'string', 'vararray', 'array', 'bool' or 'number'."""
    meta = col.meta or {}
    if col.dtype.kind in "US" or (meta.get("datatype") in ("char", "unicodeChar")
                                  and col.ndim == 1):
        return "string"
    if col.dtype.kind == "O":
        return "vararray"
    if col.ndim > 1:
        return "array"
    if col.dtype.kind == "b":
        return "bool"
    return "number"


def _mask(col) -> np.ndarray | None:
    mask = getattr(col, "mask", None)
    if mask is None or not np.any(mask):
        return None
    mask = np.asarray(mask)
    return mask.any(axis=tuple(range(1, mask.ndim))) if mask.ndim > 1 else mask


def _unrepresentable(table, fmt: str) -> list[str]:
    problems = []
    for col in table.itercols():
        kind, mask = _kind(col), _mask(col)
        if fmt == "fits":
            if kind == "string":
                bad = [str(v) for v in np.asarray(col, dtype=str)
                       if any(not 0x20 <= ord(c) <= 0x7E for c in v)]
                if bad:
                    # FITS 4.0 §7.3.3.1: character fields hold ASCII text, 0x20-0x7E (from memory)
                    problems.append(f"column {col.name!r}: {len(bad)} value(s) with characters "
                                    f"outside printable ASCII (first: {bad[0]!r})")
            elif kind == "bool" and mask is not None:
                # FITS 4.0 §7.3.3.1: a null logical is the byte 0, which astropy cannot write.
                problems.append(f"column {col.name!r}: {int(mask.sum())} null boolean value(s)")
        elif fmt == "csv" and kind in ("array", "vararray") \
                and (col.meta or {}).get("xtype") not in GEOMETRY:
            problems.append(f"column {col.name!r}: arrays ({'variable' if kind == 'vararray' else 'fixed'}"
                            " length) have no CSV form")
        elif fmt == "hdf5" and kind == "vararray":
            problems.append(f"column {col.name!r}: variable-length arrays (astropy's HDF5 "
                            "writer stores fixed shapes only)")
    return problems


def _prepared(table):
    """A copy whose strings are numpy text, whose variable arrays are lists of numpy arrays (a
    null one empty) and whose loader metadata is dropped; units, descriptions, meta kept."""
    from astropy.table import Column, MaskedColumn, Table

    out = Table()
    for col in table.itercols():
        meta = dict(col.meta or {})
        kw = {"name": col.name, "unit": col.unit, "description": col.description, "meta": meta}
        mask = getattr(col, "mask", None)
        if col.dtype.kind == "O" and meta.get("datatype") not in ("char", "unicodeChar"):
            dtype = _numpy_type(meta.get("datatype"))
            values = np.empty(len(col), dtype=object)
            for i, v in enumerate(col):
                null = mask is not None and bool(np.all(mask[i]))
                values[i] = (np.zeros(0, dtype) if null or isinstance(v, str) or v is None
                             else np.asarray(v, dtype=dtype))
            out.add_column(Column(values, dtype=object, **kw))
        elif col.dtype.kind == "O" or col.dtype.kind in "US":
            text = np.array(["" if v is None or v is np.ma.masked else
                             (v.decode("utf-8") if isinstance(v, bytes) else str(v)) for v in col],
                            dtype=str)
            if text.dtype.itemsize == 0:
                text = text.astype("U1")
            if mask is not None and np.any(mask):
                out.add_column(MaskedColumn(text, mask=np.asarray(mask), **kw))
            else:
                out.add_column(Column(text, **kw))
        else:
            out.add_column(col.copy(), copy=False)
            out[col.name].meta = meta
    return out


def _numpy_type(datatype: str | None):
    return {"unsignedByte": "u1", "short": "i2", "int": "i4", "long": "i8", "float": "f4",
            "double": "f8", "boolean": "?", "bit": "?"}.get(datatype or "", "f8")


# --- the writers ----------------------------------------------------------------------------


def _write_fits(table, prov, path, **_):
    from astropy.io import fits
    from astropy.table import Table

    plain = Table()
    for col in table.itercols():
        if _kind(col) == "string":
            plain[col.name] = np.char.encode(np.asarray(col, dtype=str), "ascii")
            plain[col.name].unit, plain[col.name].description = col.unit, col.description
        else:
            plain[col.name] = col
    hdu = fits.table_to_hdu(plain)
    for i, col in enumerate(table.itercols(), start=1):
        meta = col.meta or {}
        if meta.get("ucd"):
            hdu.header[f"TUCD{i}"] = (meta["ucd"], "UCD of the column (IVOA UCD1+)")
    for keyword, value, comment in prov_mod.fits_cards(prov):
        if keyword == "HISTORY":
            hdu.header.add_history(_ascii(value))
        else:
            hdu.header[keyword] = (_ascii(value), comment)
    fits.HDUList([fits.PrimaryHDU(), hdu]).writeto(path, checksum=True)


def _ascii(text: str) -> str:
    """FITS header text is printable ASCII (FITS 4.0 §4.2.1): escape the rest as \\uXXXX."""
    escaped = text.encode("ascii", "backslashreplace").decode("ascii")
    return "".join(c if 0x20 <= ord(c) <= 0x7E else " " for c in escaped)


def _write_votable(table, prov, path, **_):
    from astropy.io.votable import converters, from_table
    from astropy.io.votable.tree import Info

    for col in table.itercols():
        meta = col.meta
        if _kind(col) == "string":
            datatype = meta.get("datatype") or "unicodeChar"
            if datatype == "char" and not all(v.isascii() for v in np.asarray(col, dtype=str)):
                datatype = "unicodeChar"     # VOTable 1.4 §2.1: char holds ASCII only
            meta["_votable_string_dtype"] = datatype
            meta["_votable_arraysize"] = meta.get("arraysize") or "*"
    vot = from_table(table)
    vot.version = "1.4"
    votable = vot.get_first_table()
    for field, col in zip(votable.fields, table.itercols()):
        meta = col.meta
        for key in ("_votable_string_dtype", "_votable_arraysize"):
            meta.pop(key, None)
        if meta.get("datatype") == "boolean" and field.datatype != "boolean":
            field.datatype = "boolean"
            field.converter = converters.get_converter(field)
        if col.description:
            field.description = col.description
    resource = vot.resources[0]
    for name, value in (("QUERY", " ".join((prov.get("adql") or "").split())),
                        ("service", prov["service"]), ("job_url", prov.get("job_url") or ""),
                        ("request_date", prov.get("finished") or ""),
                        ("QUERY_STATUS", "OVERFLOW" if prov.get("truncated") else "OK"),
                        ("jobdesk_key", prov["key"]),
                        ("result_sha256", prov.get("result_sha256") or "")):
        resource.infos.append(Info(name=name, value=value))
    vot.to_xml(str(path))


def _arrow(table):
    """The table as Arrow, each field carrying the cached Parquet's metadata keys."""
    import pyarrow as pa

    fields, arrays = [], []
    for col in table.itercols():
        kind, mask = _kind(col), _mask(col)
        meta = {k: str(v) for k, v in (col.meta or {}).items() if k in _COLUMN_KEYS and v}
        if col.unit is not None:
            meta["unit"] = col.unit.to_string()
        if col.description:
            meta["description"] = col.description
        if kind in ("array", "vararray"):
            values = [None if mask is not None and mask[i] and kind == "array" else
                      np.asarray(v).tolist() for i, v in enumerate(np.asarray(col))]
            arr = pa.array(values)
        elif kind == "string":
            arr = pa.array(np.asarray(col, dtype=str).tolist(), pa.string(),
                           mask=mask if mask is not None else None)
        else:
            arr = pa.array(np.asarray(getattr(col, "data", col)), mask=mask)
        arrays.append(arr)
        fields.append(pa.field(col.name, arr.type, nullable=True, metadata=meta))
    return pa.Table.from_arrays(arrays, schema=pa.schema(fields))


def _write_parquet(table, prov, path, **_):
    import pyarrow.parquet as pq

    arrow = _arrow(table)
    arrow = arrow.replace_schema_metadata({b"jobdesk.provenance": json.dumps(prov).encode()})
    pq.write_table(arrow, path)


def _write_csv(table, prov, path, **_):
    texts = [_csv_texts(col) for col in table.itercols()]
    with open(path, "w", newline="", encoding="utf-8") as out:
        writer = csv.writer(out)                      # RFC 4180 quoting, "\r\n" line ends
        writer.writerow(table.colnames)
        writer.writerows(zip(*texts))


def _csv_texts(col) -> list[str]:
    """One column as CSV cells, converted a column at a time (no Python call per number)."""
    kind, mask = _kind(col), _mask(col)
    values = np.asarray(getattr(col, "data", col))
    if kind in ("array", "vararray"):             # DALI geometry: numbers separated by spaces
        cells = np.array([" ".join(_number_texts(np.asarray(v).ravel())) for v in values],
                         dtype=object)
    elif kind == "bool":
        cells = np.where(values, "true", "false").astype(object)
    elif kind == "string":
        cells = values.astype(str).astype(object)
    else:
        cells = np.asarray(_number_texts(values), dtype=object)
    if mask is not None:
        cells[mask] = ""
    return cells.tolist()


def _number_texts(values: np.ndarray) -> list[str]:
    """Shortest round-trip text of each number (numpy's), NaN and +-Inf spelled as VOTable 1.4
    §6 and DALI spell them."""
    text = values.astype(str)
    if values.dtype.kind == "f":
        text = np.where(np.isnan(values), "NaN", text)
        text = np.where(np.isposinf(values), "+Inf", text)
        text = np.where(np.isneginf(values), "-Inf", text)
    return text.tolist()


def _write_ecsv(table, prov, path, **_):
    out = table.copy(copy_data=False)
    out.meta = {"jobdesk_provenance": prov}
    out.write(path, format="ascii.ecsv")


def _write_hdf5(table, prov, path, *, name, overwrite, target, **_):
    import h5py

    with h5py.File(path, "a") as f:
        if name in f:
            if not overwrite:
                raise ExportTargetExists(
                    f"{target} already holds a table at /{name}; nothing was written",
                    hint="pass overwrite=True to replace it, or choose another name=")
            warnings.warn(ExportWarning(f"replacing the table at /{name} (overwrite=True)"),
                          stacklevel=4)
            del f[name]
            for extra in [k for k in f.get(os.path.dirname(name) or "/", {})
                          if k.startswith(os.path.basename(name) + ".__table_column_meta__")]:
                del f[f"{os.path.dirname(name)}/{extra}".lstrip("/")]
    out = table.copy(copy_data=False)
    out.meta = {}
    out.write(path, format="hdf5", path=name, append=True, serialize_meta=True)
    with h5py.File(path, "a") as f:
        ds = f[name]
        ds.attrs["jobdesk_provenance"] = json.dumps(prov)
        ds.attrs["jobdesk_key"] = prov["key"]
        for col in table.itercols():
            meta = col.meta or {}
            if col.unit is not None:
                ds.attrs[f"{col.name}.unit"] = col.unit.to_string()
            for key in ("ucd", "xtype"):
                if meta.get(key):
                    ds.attrs[f"{col.name}.{key}"] = meta[key]
            if col.description:
                ds.attrs[f"{col.name}.description"] = col.description


_WRITERS = {"fits": _write_fits, "votable": _write_votable, "parquet": _write_parquet,
            "csv": _write_csv, "ecsv": _write_ecsv, "hdf5": _write_hdf5}


# --- files ----------------------------------------------------------------------------------


@contextmanager
def _atomic(path: Path, *, copy_existing: bool = False):
    """Yield a temporary path beside ``path``; rename it into place only if the block succeeds.

    With ``copy_existing`` the temporary file starts as a copy of ``path`` (an HDF5 file being
    added to), so the original stays untouched until the new version is complete.
    """
    fd, name = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent)
    os.close(fd)
    tmp = Path(name)
    try:
        if copy_existing and path.exists():
            shutil.copyfile(path, tmp)
        else:
            tmp.unlink()
        yield tmp
        if tmp.exists():                 # (the caller may have moved it into place itself)
            _fsync(tmp)
            os.replace(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)


def _fsync(path: Path) -> None:
    with open(path, "rb") as f:
        os.fsync(f.fileno())


def _sha256(path: Path) -> tuple[str, int]:
    h = hashlib.sha256()
    size = 0
    with open(path, "rb") as f:
        for piece in iter(lambda: f.read(1 << 20), b""):
            h.update(piece)
            size += len(piece)
    return h.hexdigest(), size

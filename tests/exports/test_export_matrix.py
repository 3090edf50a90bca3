"""Every column type a TAP service returns x every export format, read back by the standard's
own reader and compared value by value with the cached table.

The result comes over real HTTP from tests/protocol/uws_server.py (a UWS 1.1 service written
from the standard) serving tests/exports/typed_votable.py; the desk caches it as usual. Each
(column, format) pair either round-trips or is refused with ExportRefused, leaving no file.
"""

from __future__ import annotations

import csv
import json
import math
import sys
import warnings
from pathlib import Path

import numpy as np
import pytest
from lxml import etree

sys.path.insert(0, str(Path(__file__).parents[1] / "protocol"))

import typed_votable  # noqa: E402
from uws_server import UwsServer  # noqa: E402

from jobdesk import Desk  # noqa: E402
from jobdesk.errors import ExportRefused, ExportTargetExists  # noqa: E402
from jobdesk.export import ExportWarning  # noqa: E402

SCHEMAS = Path(__file__).parents[1] / "localtap" / "schemas"
FORMATS = {"fits": ".fits", "votable": ".vot", "parquet": ".parquet", "csv": ".csv",
           "hdf5": ".h5", "ecsv": ".ecsv"}
COLUMNS = [c[0] for c in typed_votable.COLUMNS]
# What each format cannot hold, and so must refuse (everything else must round-trip):
REFUSED = {
    # FITS 4.0 §7.3.3.1 (from memory): character fields are printable ASCII; a null logical is
    # the byte 0, which astropy's writer cannot produce.
    ("fits", "word"), ("fits", "label"), ("fits", "flag"),
    # CSV (RFC 4180) has no arrays; DALI geometry has a text form (DALI 1.1 §3.3.5-3.3.7).
    ("csv", "vec3"), ("csv", "counts"),
    # astropy's HDF5 writer stores fixed shapes only.
    ("hdf5", "counts"), ("hdf5", "shape"),
}
VARIABLE = {"counts", "shape"}
FLOATY = {"flux", "angle", "vec3", "pos", "region", "shape"}


@pytest.fixture(scope="module")
def cached(tmp_path_factory):
    root = tmp_path_factory.mktemp("matrix")
    with UwsServer(typed_votable.votable(query="SELECT * FROM typed WHERE label = 'Å'")) as uws:
        desk = Desk(root / "desk", wait_window=5, attempts=2, timeout=10)
        job = desk.submit(uws.url, "SELECT * FROM typed WHERE label = 'Ångström'",
                          maxrec=1000).wait(timeout=60, progress=False)
    return job, job.table()


# --- turning what a reader gives into plain Python ---------------------------------------------


def _py(v):
    if v is None or v is np.ma.masked:
        return None
    if isinstance(v, np.ma.MaskedArray):
        return [None if m else _py(x) for x, m in zip(v.data.tolist(), np.ma.getmaskarray(v))]
    if isinstance(v, np.ndarray):
        return [_py(x) for x in v.tolist()]
    if isinstance(v, list):
        return [_py(x) for x in v]
    if isinstance(v, bytes):
        return v.decode("utf-8")
    if isinstance(v, np.generic):
        return v.item()
    return v


def _column(table, name) -> list:
    col = table[name]
    mask = getattr(col, "mask", None)
    out = []
    for i in range(len(col)):
        whole = mask is not None and bool(np.all(mask[i]))
        out.append(None if whole else _py(col[i]))
    return out


def _null_ok(got, name: str, fmt: str) -> bool:
    if got is None:
        return True
    if name in VARIABLE and got == []:                 # an empty TD / zero-length descriptor
        return True
    if fmt == "csv" and got == "":
        return True
    if fmt == "fits" and name in FLOATY:               # FITS 4.0 §7.3.3: a null float is NaN
        flat = got if isinstance(got, list) else [got]
        return all(isinstance(x, float) and math.isnan(x) for x in flat)
    return False


TEXT = {"word", "label", "seen_at"}


def _same(want, got, name: str, fmt: str) -> bool:
    # In TABLEDATA an empty TD is null for every type (VOTable 1.4 §5.1), so an empty string
    # and an empty variable-length array cannot be told from null once cached.
    if want is None or (name in TEXT and want == "") or (name in VARIABLE and want == []):
        return _null_ok(got, name, fmt) or got == ""
    if isinstance(want, list):
        return isinstance(got, list) and len(got) == len(want) and all(
            _same(w, g, name, fmt) for w, g in zip(want, got))
    if isinstance(want, float) and math.isnan(want):
        # VOTable 1.4 §6: NaN is how a float null is written, so a reader may give either.
        return got is None or (isinstance(got, float) and math.isnan(got))
    if isinstance(want, float):
        if not isinstance(got, float | int):
            return False
        return got == want or math.isclose(got, want, rel_tol=1e-6)
    return want == got


# --- the readers, one per standard ---------------------------------------------------------------


def _read_fits(path: Path) -> dict[str, list]:
    from astropy.io import fits
    from astropy.table import Table
    from astropy.utils.exceptions import AstropyUserWarning

    with warnings.catch_warnings():
        warnings.simplefilter("error", AstropyUserWarning)   # a checksum mismatch warns
        with fits.open(path, checksum=True) as hdul:
            hdul.verify("exception")                         # astropy's FITS standard check
            header = hdul[1].header
            assert "CHECKSUM" in header and "DATASUM" in header   # FITS 4.0 §4.4.2.7
            assert all(0x20 <= ord(c) <= 0x7E for c in str(header.tostring()))
            table = Table.read(hdul[1])
    return {name: _column(table, name) for name in table.colnames}


VOTABLE_SCHEMA = etree.XMLSchema(etree.parse(str(SCHEMAS / "VOTable-1.4.xsd")))


def _read_votable(path: Path) -> dict[str, list]:
    from astropy.io.votable import parse

    VOTABLE_SCHEMA.assertValid(etree.parse(str(path)))       # IVOA VOTable 1.4 XSD
    table = parse(str(path), verify="exception").get_first_table().to_table()
    return {name: _column(table, name) for name in table.colnames}


def _read_parquet(path: Path) -> dict[str, list]:
    import pyarrow.parquet as pq

    arrow = pq.read_table(path)
    return {name: [_py(v) for v in arrow.column(name).to_pylist()] for name in arrow.column_names}


def _read_csv(path: Path) -> dict[str, list]:
    with open(path, newline="", encoding="utf-8") as f:
        rows = list(csv.reader(f))                           # Python's RFC 4180 reader
    header, body = rows[0], rows[1:]
    out = {}
    for i, name in enumerate(header):
        out[name] = [_from_text(r[i], name) for r in body]
    return out


def _from_text(cell: str, name: str):
    kind = {c[0]: c[1] for c in typed_votable.COLUMNS}[name]
    if cell == "" and name not in TEXT:
        return None
    if name in ("pos", "region", "shape"):
        return [float(x) for x in cell.split()]
    if kind == "boolean":
        return {"true": True, "false": False}[cell]
    if kind in ("float", "double"):
        return float(cell.replace("Inf", "inf"))
    if kind in ("short", "int", "long", "unsignedByte"):
        return int(cell)
    return cell


def _read_hdf5(path: Path, name: str = "jobdesk/matrix") -> dict[str, list]:
    import h5py
    from astropy.table import Table

    with h5py.File(path, "r") as f:                          # the HDF5 library itself
        assert isinstance(f[name], h5py.Dataset)
        attrs = dict(f[name].attrs)
    assert json.loads(attrs["jobdesk_provenance"])["key"]
    table = Table.read(path, path=name)
    return {n: _column(table, n) for n in table.colnames}


def _read_ecsv(path: Path) -> dict[str, list]:
    from astropy.table import Table

    table = Table.read(path, format="ascii.ecsv")
    return {name: _column(table, name) for name in table.colnames}


READERS = {"fits": _read_fits, "votable": _read_votable, "parquet": _read_parquet,
           "csv": _read_csv, "hdf5": _read_hdf5, "ecsv": _read_ecsv}


# --- the matrix ----------------------------------------------------------------------------------


def test_cached_table_holds_what_the_service_sent(cached):
    _, table = cached
    for name in COLUMNS:
        want = typed_votable.expected(name)
        assert all(_same(w, g, name, "votable") for w, g in zip(want, _column(table, name))), name


@pytest.mark.parametrize("fmt", sorted(FORMATS))
@pytest.mark.parametrize("name", COLUMNS)
def test_column_type_in_format(cached, tmp_path, fmt, name):
    job, table = cached
    path = tmp_path / f"{name}{FORMATS[fmt]}"
    sub = table[[name]]
    from jobdesk.export import export
    kw = {"name": "jobdesk/matrix"} if fmt == "hdf5" else {}
    if (fmt, name) in REFUSED:
        with pytest.raises(ExportRefused) as refused:
            export(sub, job.provenance(), path, **kw)
        assert name in str(refused.value) and "Nothing was written" in str(refused.value)
        assert list(tmp_path.iterdir()) == []               # nothing partial, no sidecar
        return
    written = export(sub, job.provenance(), path, **kw)
    assert written[0] == path and written[1].exists()
    got = READERS[fmt](path)[name]
    want = _column(table, name)
    assert len(got) == len(want)
    bad = [(i, w, g) for i, (w, g) in enumerate(zip(want, got)) if not _same(w, g, name, fmt)]
    assert not bad, f"{fmt}/{name}: rows differ (row, cached, read back): {bad}"


@pytest.mark.parametrize("fmt", ["votable", "parquet", "ecsv"])
def test_whole_table_round_trips_with_metadata(cached, tmp_path, fmt):
    """The formats that hold every type take the whole result, units/UCDs/descriptions kept."""
    job, table = cached
    path = tmp_path / f"all{FORMATS[fmt]}"
    job.export(path)
    got = READERS[fmt](path)
    for name in COLUMNS:
        assert all(_same(w, g, name, fmt) for w, g in zip(_column(table, name), got[name])), name
    if fmt == "parquet":
        import pyarrow.parquet as pq
        schema = pq.read_schema(path)
        for name, _dt, _size, xtype, unit, ucd, desc, _ in typed_votable.COLUMNS:
            meta = {k.decode(): v.decode() for k, v in (schema.field(name).metadata or {}).items()}
            assert meta.get("ucd") == ucd and meta.get("description") == desc, name
            assert (meta.get("unit") or None) == (unit and str(table[name].unit)), name
            assert meta.get("xtype") == xtype, name
        assert json.loads(schema.metadata[b"jobdesk.provenance"])["key"] == job.key
    if fmt == "votable":
        from astropy.io.votable import parse
        fields = {f.name: f for f in parse(str(path)).get_first_table().fields}
        for name, dt, _size, xtype, _unit, ucd, desc, _ in typed_votable.COLUMNS:
            assert fields[name].ucd == ucd and fields[name].description == desc, name
            assert fields[name].xtype == xtype and fields[name].datatype == dt, name


def test_fits_of_a_string_catalogue_with_unicode_query(cached, tmp_path):
    """The everyday case: ASCII strings, timestamps and numbers, a non-ASCII query text."""
    job, table = cached
    path = tmp_path / "cat.fits"
    from jobdesk.export import export
    export(table[["n_int", "angle", "seen_at", "pos"]], job.provenance(), path)
    got = _read_fits(path)
    assert got["seen_at"] == _column(table, "seen_at")
    from astropy.io import fits
    history = " ".join(str(h) for h in fits.getheader(path, 1)["HISTORY"])
    assert "\\xc5ngstr\\xf6m" in history                     # escaped, not dropped


def test_refused_whole_export_names_every_column_and_leaves_no_file(cached, tmp_path):
    job, _ = cached
    with pytest.raises(ExportRefused) as refused:
        job.export(tmp_path / "all.csv")
    text = str(refused.value)
    assert "'vec3'" in text and "'counts'" in text and "what to do" in text
    assert list(tmp_path.iterdir()) == []


def test_hdf5_holds_several_results_and_never_replaces_one_unasked(cached, tmp_path):
    job, table = cached
    path = tmp_path / "analysis.h5"
    fixed = [n for n in COLUMNS if n not in VARIABLE]
    from jobdesk.export import export
    export(table[fixed], job.provenance(), path, name="run1/stars")
    export(table[fixed[3:6]], job.provenance(), path, name="run2/stars")
    before = path.read_bytes()
    with pytest.raises(ExportTargetExists) as exists:
        export(table[fixed[:2]], job.provenance(), path, name="run1/stars")
    assert "/run1/stars" in str(exists.value) and "overwrite=True" in str(exists.value)
    assert path.read_bytes() == before                         # untouched
    with pytest.warns(ExportWarning, match="replacing the table at /run1/stars"):
        export(table[fixed[:2]], job.provenance(), path, name="run1/stars", overwrite=True)
    import h5py
    with h5py.File(path, "r") as f:
        assert set(f) == {"run1", "run2"}
        names = [n for n in f["run1/stars"].dtype.names if not n.endswith(".mask")]
        assert names == fixed[:2]
        assert [n for n in f["run2/stars"].dtype.names if not n.endswith(".mask")] == fixed[3:6]
        attrs = f["run2/stars"].attrs
        assert attrs["angle.unit"] == "deg" and attrs["flux.ucd"] == "phot.flux"
        assert attrs["flux.description"] == "a 32-bit float with NaN"
        assert json.loads(attrs["jobdesk_provenance"])["adql"] == job.record["adql"]


def test_existing_file_is_replaced_only_when_asked(cached, tmp_path):
    job, _ = cached
    path = tmp_path / "t.vot"
    job.export(path)
    with pytest.raises(ExportTargetExists):
        job.export(path)
    assert job.export(path, overwrite=True)[0] == path


def test_sidecar_is_prov_json_tied_to_the_file_by_checksum(cached, tmp_path):
    import hashlib

    import prov.model

    job, _ = cached
    path, sidecar = job.export(tmp_path / "t.parquet")
    text = sidecar.read_text()
    # The W3C `prov` package reads it (PROV-JSON, W3C Member Submission 2013).
    doc = prov.model.ProvDocument.deserialize(content=text, format="json")
    entities = {str(e.identifier): e for e in doc.get_records(prov.model.ProvEntity)}
    digest = hashlib.sha256(path.read_bytes()).hexdigest()
    exported = [e for e in entities.values()
                if any(str(v) == digest for _, v in e.attributes)]
    assert len(exported) == 1
    assert doc.get_records(prov.model.ProvDerivation)
    activity = next(iter(doc.get_records(prov.model.ProvActivity)))
    # Types are qualified names, not strings (PROV-JSON §2.3: prov:QUALIFIED_NAME).
    for record in doc.get_records():
        for key, value in record.attributes:
            if str(key) == "prov:type":
                assert isinstance(value, prov.model.QualifiedName), (record, value)
    raw = json.loads(text)
    act = next(iter(raw["activity"].values()))
    assert act["jd:MAXREC"]["$"] == "1000" and "None" not in text
    # DALI 1.1 §3.3.3 timestamps: UTC with a trailing Z.
    assert act["prov:startTime"].endswith("Z") and "+00:00" not in text
    # startTime is the service's startTime from the job document, not the local record's.
    assert activity.get_startTime() is not None


def test_char_column_with_non_ascii_text_becomes_unicode_char_in_votable(cached, tmp_path):
    """Some services send UTF-8 in a char FIELD; VOTable 1.4 §2.1 char is ASCII, so the export
    declares unicodeChar rather than failing half-way or writing an invalid file."""
    job, table = cached
    sub = table[["word"]].copy()
    sub["word"] = ["çà", "b", "", "d", "e", "f"]
    sub["word"].meta = {"datatype": "char", "arraysize": "*"}
    from jobdesk.export import export
    path = export(sub, job.provenance(), tmp_path / "w.vot")[0]
    VOTABLE_SCHEMA.assertValid(etree.parse(str(path)))
    from astropy.io.votable import parse
    votable = parse(str(path), verify="exception").get_first_table()
    assert votable.fields[0].datatype == "unicodeChar"
    assert list(votable.to_table()["word"])[:2] == ["çà", "b"]


def test_hdf5_refuses_a_file_that_is_not_hdf5_and_a_bad_table_path(cached, tmp_path):
    job, table = cached
    from jobdesk.export import export
    other = tmp_path / "notes.h5"
    other.write_text("not an HDF5 file")
    with pytest.raises(ExportRefused, match="nothing was written"):
        export(table[["n_int"]], job.provenance(), other, name="a/b")
    assert other.read_text() == "not an HDF5 file"
    with pytest.raises(ExportRefused, match="not a usable table path"):
        export(table[["n_int"]], job.provenance(), tmp_path / "new.h5", name="a/../b")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["notes.h5"]


def test_command_line_adds_tables_to_an_hdf5_file_and_refuses_to_replace_one(cached, tmp_path):
    import os
    import subprocess

    job, _ = cached
    path = tmp_path / "a.h5"
    env = {**os.environ, "PYTHONPATH": str(Path(__file__).parents[2])}

    def cli(*args):
        return subprocess.run([sys.executable, "-m", "jobdesk.cli", "--root",
                               str(job.desk.root), "export", job.id, str(path), *args],
                              capture_output=True, text=True, timeout=120, env=env)

    # The whole result has variable-length arrays, which the HDF5 writer cannot store:
    refused = cli("--name", "run1/all")
    assert refused.returncode == 2 and "'counts'" in refused.stderr and not path.exists()
    assert "what to do" in refused.stderr

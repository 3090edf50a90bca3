"""Comparing two cached results row by row through a key column: what was added, removed, changed.

Why its own module: a release comparison must be exact, fast and small in memory on results of
millions of rows.  It runs on the cached Parquet copies, columnar throughout (numpy sorting and
Arrow compute kernels, never a Python loop over rows), reading one column at a time so memory
stays near two columns plus the row matching.

Semantics (documented in docs/guide.md):

- Rows are matched by the key.  A NULL key, or a key value that repeats in either result, is an
  error naming how many: matching would be ambiguous.
- Values are equal when both are missing (NULL, or NaN in a float column: VOTable writes float
  NULLs as NaN, VOTable 1.4 §2.1 footnote, from memory), or both present and equal; floats within
  ``tolerance`` (absolute; default 0, exact) count as equal.  Missing on one side only is a change.
- A column whose type changed between the results is compared as numbers when both types are
  numeric, else as text.
"""

from __future__ import annotations

import json
import math
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from jobdesk.errors import CompareKeyInvalid

MAIN_ID_UCD = "meta.id;meta.main"
HISTOGRAM_BINS = 40
SKY_POINTS = 4000        # positions drawn per kind in the report (evenly thinned)


@dataclass
class ColumnChange:
    """One column shared by both results: how many matched rows changed, and by how much."""

    name: str
    changed: int = 0
    compared: bool = True
    median_abs: float | None = None
    max_abs: float | None = None
    histogram: dict | None = None          # {"edges": [...], "counts": [...]} of new - old


@dataclass
class ColumnMeta:
    name: str
    type: str
    unit: str | None
    ucd: str | None


@dataclass
class Comparison:
    """The outcome of :func:`compare_files`; ``rows(kind)`` reads the rows behind a count."""

    key: str
    rows_old: int
    rows_new: int
    added: int
    removed: int
    matched: int
    changed: dict[str, int]
    columns: dict[str, ColumnChange]
    columns_added: list[str]
    columns_removed: list[str]
    columns_retyped: list[dict]
    changed_rows: int = 0
    tolerance: float = 0.0
    old: dict = field(default_factory=dict)        # {"job": id, "provenance": {...}}
    new: dict = field(default_factory=dict)
    sky: dict | None = None                        # {"ra": name, "dec": name, "added": [...]...}
    _paths: tuple[Path, Path] | None = field(default=None, repr=False)
    _match: tuple[np.ndarray, np.ndarray] | None = field(default=None, repr=False)
    _only: tuple[np.ndarray, np.ndarray] | None = field(default=None, repr=False)  # removed, added
    _changed_mask: np.ndarray | None = field(default=None, repr=False)

    def __repr__(self) -> str:
        return (f"<jobdesk.Comparison key={self.key!r} old={self.rows_old} new={self.rows_new} "
                f"added={self.added} removed={self.removed} matched={self.matched} "
                f"changed_rows={self.changed_rows}>")

    def rows(self, kind: str) -> pa.Table:
        """The rows behind a count: ``"added"`` (from the new result), ``"removed"`` (from the
        old), ``"changed"`` (the key, then ``<column>_old``/``<column>_new`` of every changed
        column)."""
        old_path, new_path = self._paths
        removed_idx, added_idx = self._only
        if kind == "added":
            return pq.read_table(new_path).take(pa.array(added_idx))
        if kind == "removed":
            return pq.read_table(old_path).take(pa.array(removed_idx))
        if kind != "changed":
            raise ValueError(f"kind must be 'added', 'removed' or 'changed', not {kind!r}")
        io, inew = self._match
        sel = np.flatnonzero(self._changed_mask)
        out = {self.key: _read(new_path, self.key).take(pa.array(inew[sel]))}
        for name, change in self.columns.items():
            if change.changed:
                out[f"{name}_old"] = _read(old_path, name).take(pa.array(io[sel]))
                out[f"{name}_new"] = _read(new_path, name).take(pa.array(inew[sel]))
        return pa.table(out)

    def as_dict(self) -> dict:
        """JSON-safe summary (what the report's JSON twin holds)."""
        return _json_safe({
            "key": self.key, "rows_old": self.rows_old, "rows_new": self.rows_new,
            "added": self.added, "removed": self.removed, "matched": self.matched,
            "changed_rows": self.changed_rows, "changed": self.changed,
            "tolerance": self.tolerance,
            "columns": {n: asdict(c) for n, c in self.columns.items()},
            "columns_added": self.columns_added, "columns_removed": self.columns_removed,
            "columns_retyped": self.columns_retyped, "old": self.old, "new": self.new,
            "sky": self.sky,
        })

    def report(self, path) -> tuple[Path, Path]:
        """Write a self-contained HTML page (figures inline) and its JSON twin ``<path>.json``."""
        from jobdesk.report import write_report
        return write_report([self], Path(path))


def _json_safe(value):
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {str(k): _json_safe(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_json_safe(v) for v in value]
    if isinstance(value, np.generic):
        return _json_safe(value.item())
    return value


# --- reading --------------------------------------------------------------------------------


def _read(path: Path, column: str) -> pa.Array:
    chunked = pq.read_table(path, columns=[column]).column(0)
    return chunked.combine_chunks() if chunked.num_chunks != 1 else chunked.chunk(0)


def _meta(schema: pa.Schema) -> dict[str, ColumnMeta]:
    out = {}
    for f in schema:
        m = {k.decode(): v.decode() for k, v in (f.metadata or {}).items()}
        out[f.name] = ColumnMeta(f.name, str(f.type), m.get("unit") or None,
                                 m.get("ucd") or None)
    return out


def find_key(old: dict[str, ColumnMeta], new: dict[str, ColumnMeta], key: str | None) -> str:
    """The given key, else the shared column whose UCD is ``meta.id;meta.main``."""
    if key is not None:
        missing = [side for side, cols in (("old", old), ("new", new)) if key not in cols]
        if missing:
            raise CompareKeyInvalid(f"key column {key!r} is not in the {' and '.join(missing)} "
                                    f"result (columns: {', '.join(list(old)[:20])})")
        return key
    main = [n for n, c in old.items() if n in new
            and (c.ucd or "").replace(" ", "").lower() == MAIN_ID_UCD]
    if len(main) == 1:
        return main[0]
    why = ("several columns have the UCD meta.id;meta.main: " + ", ".join(main) if main
           else "no column shared by both results has the UCD meta.id;meta.main")
    raise CompareKeyInvalid(f"cannot tell which column identifies a row: {why}")


def _numeric(t: pa.DataType) -> bool:
    return pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_boolean(t)


def _key_codes(a: pa.Array, b: pa.Array) -> tuple[np.ndarray, np.ndarray]:
    """Both key columns as comparable numpy arrays (integers as they are, anything else through
    one shared dictionary)."""
    if pa.types.is_integer(a.type) and pa.types.is_integer(b.type):
        return (a.to_numpy(zero_copy_only=False).astype(np.int64, copy=False),
                b.to_numpy(zero_copy_only=False).astype(np.int64, copy=False))
    if _numeric(a.type) and _numeric(b.type):
        return (pc.cast(a, pa.float64()).to_numpy(zero_copy_only=False),
                pc.cast(b, pa.float64()).to_numpy(zero_copy_only=False))
    both = pa.chunked_array([pc.cast(a, pa.string()), pc.cast(b, pa.string())])
    codes = pc.dictionary_encode(both).combine_chunks().indices.to_numpy(zero_copy_only=False)
    return codes[:len(a)], codes[len(a):]


def _check_key(values: np.ndarray, order: np.ndarray, side: str, key: str) -> None:
    s = values[order]
    same = s[1:] == s[:-1]
    if same.any():
        rows = int(same.sum())
        starts = int(np.count_nonzero(same[1:] & ~same[:-1]) + int(same[0]))
        raise CompareKeyInvalid(
            f"key {key!r} is not unique in the {side} result: {starts} values repeat, "
            f"{rows + starts} rows carry a repeated value ({rows} more than one each)")


def _match(ko: np.ndarray, kn: np.ndarray, oo: np.ndarray, on: np.ndarray):
    """Index pairs of matching keys, and the rows found on one side only (sorted merge)."""
    so, sn = ko[oo], kn[on]
    if len(sn):
        pos = np.searchsorted(sn, so)
        pos[pos == len(sn)] = len(sn) - 1 if len(sn) else 0
        hit = sn[pos] == so
    else:
        pos = np.zeros(len(so), dtype=np.int64)
        hit = np.zeros(len(so), dtype=bool)
    io, inew = oo[hit], on[pos[hit]]
    removed = np.sort(oo[~hit])
    seen = np.zeros(len(kn), dtype=bool)
    seen[inew] = True
    added = np.flatnonzero(~seen)
    order = np.argsort(inew, kind="stable")   # walk the new result in its own order
    return io[order], inew[order], removed, added


# --- comparing columns ------------------------------------------------------------------------


def _missing(arr: pa.Array) -> np.ndarray:
    if pa.types.is_floating(arr.type):
        return pc.is_null(arr, nan_is_null=True).to_numpy(zero_copy_only=False)
    return pc.is_null(arr).to_numpy(zero_copy_only=False)


def _compare_column(a: pa.Array, b: pa.Array, tolerance: float, change: ColumnChange
                    ) -> np.ndarray | None:
    """Mask of matched rows whose value changed (None when the type cannot be compared)."""
    if any(pa.types.is_nested(t) for t in (a.type, b.type)):
        change.compared = False
        return None
    am, bm = _missing(a), _missing(b)
    both = ~(am | bm)
    numeric = _numeric(a.type) and _numeric(b.type)
    if numeric:
        if pa.types.is_boolean(a.type) or pa.types.is_boolean(b.type):
            a, b = pc.cast(a, pa.int8()), pc.cast(b, pa.int8())
        exact_ints = (pa.types.is_integer(a.type) and pa.types.is_integer(b.type))
        kind = np.int64 if exact_ints else np.float64
        av = np.asarray(a.fill_null(0).to_numpy(zero_copy_only=False), dtype=kind)
        bv = np.asarray(b.fill_null(0).to_numpy(zero_copy_only=False), dtype=kind)
        if exact_ints:
            diff = bv - av
            differs = diff != 0 if not tolerance else np.abs(diff) > tolerance
        else:
            with np.errstate(invalid="ignore", over="ignore"):
                diff = bv - av
                differs = (av != bv) if not tolerance else ~(np.abs(diff) <= tolerance)
        changed = (am != bm) | (both & differs)
        d = diff[both]
        if d.size:
            ad = np.abs(d.astype(np.float64, copy=False))
            finite = np.isfinite(ad)
            if finite.any():
                change.median_abs = float(np.median(ad[finite]))
                change.max_abs = float(ad[finite].max())
                moved = d[finite & (ad > 0)].astype(np.float64, copy=False)
                if moved.size:
                    counts, edges = np.histogram(moved, bins=HISTOGRAM_BINS)
                    change.histogram = {"edges": edges.tolist(), "counts": counts.tolist(),
                                        "zero": int(np.count_nonzero(ad[finite] == 0))}
    else:
        if a.type != b.type:
            a, b = pc.cast(a, pa.string()), pc.cast(b, pa.string())
        eq = pc.equal(a, b).fill_null(False).to_numpy(zero_copy_only=False)
        changed = (am != bm) | (both & ~eq)
    change.changed = int(np.count_nonzero(changed))
    return changed


def _position_columns(meta: dict[str, ColumnMeta]) -> tuple[str, str] | None:
    ra = [n for n, c in meta.items() if (c.ucd or "").lower().startswith("pos.eq.ra")]
    dec = [n for n, c in meta.items() if (c.ucd or "").lower().startswith("pos.eq.dec")]
    if ra and dec:
        return ra[0], dec[0]
    lower = {n.lower(): n for n in meta}
    if "ra" in lower and "dec" in lower:
        return lower["ra"], lower["dec"]
    return None


def _thin(idx: np.ndarray, limit: int) -> np.ndarray:
    if len(idx) <= limit:
        return idx
    return idx[np.linspace(0, len(idx) - 1, limit).astype(np.int64)]


def compare_files(old: Path, new: Path, *, key: str | None = None,
                  tolerance: float = 0.0) -> Comparison:
    """Compare two Parquet results (see the module docstring for the rules)."""
    if tolerance < 0 or not math.isfinite(tolerance):
        raise ValueError("tolerance must be a finite number >= 0")
    old, new = Path(old), Path(new)
    mo, mn = _meta(pq.read_schema(old)), _meta(pq.read_schema(new))
    key = find_key(mo, mn, key)
    ka, kb = _read(old, key), _read(new, key)
    for side, arr in (("old", ka), ("new", kb)):
        if arr.null_count:
            raise CompareKeyInvalid(f"key {key!r}: {arr.null_count} rows of the {side} result "
                                    "have no value")
    ko, kn = _key_codes(ka, kb)
    oo, on = np.argsort(ko, kind="stable"), np.argsort(kn, kind="stable")
    _check_key(ko, oo, "old", key)
    _check_key(kn, on, "new", key)
    del ka, kb
    io, inew, removed, added = _match(ko, kn, oo, on)
    del ko, kn, oo, on

    shared = [n for n in mo if n in mn and n != key]
    retyped = [{"name": n, "type_old": mo[n].type, "type_new": mn[n].type,
                "unit_old": mo[n].unit, "unit_new": mn[n].unit}
               for n in [key, *shared]
               if (mo[n].type, mo[n].unit) != (mn[n].type, mn[n].unit)]
    any_changed = np.zeros(len(io), dtype=bool)
    columns: dict[str, ColumnChange] = {}
    take_o, take_n = pa.array(io), pa.array(inew)
    for name in shared:
        change = ColumnChange(name)
        a = _read(old, name).take(take_o)
        b = _read(new, name).take(take_n)
        mask = _compare_column(a, b, tolerance, change)
        if mask is not None:
            any_changed |= mask
        columns[name] = change
        del a, b, mask

    sky = None
    pos = _position_columns(mn) if _position_columns(mo) == _position_columns(mn) else None
    if pos is not None and (len(added) or len(removed)):
        sky = {"ra": pos[0], "dec": pos[1]}
        for kind, path, idx in (("added", new, added), ("removed", old, removed)):
            pick = pa.array(_thin(idx, SKY_POINTS))
            sky[kind] = [pc.cast(_read(path, c).take(pick), pa.float64()).to_pylist()
                         for c in pos]
    return Comparison(
        key=key, rows_old=pq.read_metadata(old).num_rows, rows_new=pq.read_metadata(new).num_rows,
        added=len(added), removed=len(removed), matched=len(io),
        changed={n: c.changed for n, c in columns.items()}, columns=columns,
        columns_added=[n for n in mn if n not in mo], columns_removed=[n for n in mo if n not in mn],
        columns_retyped=retyped, changed_rows=int(np.count_nonzero(any_changed)),
        tolerance=tolerance, sky=sky, _paths=(old, new), _match=(io, inew),
        _only=(removed, added), _changed_mask=any_changed)


def to_json(comparison: Comparison) -> str:
    return json.dumps(comparison.as_dict(), indent=1, allow_nan=False)

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


def _check_key(s: np.ndarray, side: str, key: str) -> None:
    """``s``: the key values sorted; a value equal to its neighbour repeats."""
    same = s[1:] == s[:-1]
    if same.any():
        rows = int(same.sum())
        starts = int(np.count_nonzero(same[1:] & ~same[:-1]) + int(same[0]))
        raise CompareKeyInvalid(
            f"key {key!r} is not unique in the {side} result: {starts} values repeat, "
            f"{rows + starts} rows carry a repeated value ({rows} more than one each)")


def _sorted(values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(order, values in that order); a result already ordered by its key skips the sort."""
    if len(values) < 2 or bool(np.all(values[1:] >= values[:-1])):
        return np.arange(len(values)), values
    order = np.argsort(values)        # introsort: 3x quicker than a stable sort here
    return order, values[order]


def _match(so: np.ndarray, sn: np.ndarray, oo: np.ndarray, on: np.ndarray):
    """Index pairs of matching keys (in the old result's key order), and the rows found on one
    side only, from both key columns sorted (a merge by binary search)."""
    if len(sn):
        pos = np.searchsorted(sn, so)
        np.minimum(pos, len(sn) - 1, out=pos)
        hit = np.equal(sn.take(pos), so)
    else:
        pos = np.zeros(len(so), dtype=np.int64)
        hit = np.zeros(len(so), dtype=bool)
    io = oo[hit]
    pos = pos[hit]
    inew = on[pos]
    del pos
    removed = np.sort(oo[~hit])
    seen = np.zeros(len(sn), dtype=bool)
    seen[inew] = True
    added = np.flatnonzero(~seen)
    return io, inew, removed, added


# --- comparing columns ------------------------------------------------------------------------


def _taken(arr: pa.Array, rows: np.ndarray):
    """The matched rows of one column: numbers as (numpy values, missing mask, arrow type),
    anything else as an Arrow array."""
    t = arr.type
    if pa.types.is_boolean(t):
        arr, t = pc.cast(arr, pa.int8()), pa.int8()
    if pa.types.is_floating(t):
        values = arr.to_numpy(zero_copy_only=False)[rows]     # NULL -> NaN: both "missing"
        return values, np.isnan(values), t
    if pa.types.is_integer(t):
        values = (arr.fill_null(0) if arr.null_count else arr).to_numpy(zero_copy_only=False)
        missing = (arr.is_null().to_numpy(zero_copy_only=False)[rows] if arr.null_count
                   else np.zeros(len(rows), dtype=bool))
        return values[rows], missing, t
    return arr.take(pa.array(rows))


def _compare_column(a, b, tolerance: float, change: ColumnChange) -> np.ndarray | None:
    """Mask of matched rows whose value changed (None when the type cannot be compared)."""
    if isinstance(a, tuple) and isinstance(b, tuple):
        return _compare_numbers(a, b, tolerance, change)
    a = a if not isinstance(a, tuple) else _as_arrow(a)
    b = b if not isinstance(b, tuple) else _as_arrow(b)
    if any(pa.types.is_nested(t) for t in (a.type, b.type)):
        change.compared = False
        return None
    am = pc.is_null(a, nan_is_null=True).to_numpy(zero_copy_only=False)
    bm = pc.is_null(b, nan_is_null=True).to_numpy(zero_copy_only=False)
    if a.type != b.type:
        a, b = pc.cast(a, pa.string()), pc.cast(b, pa.string())
    eq = pc.equal(a, b).fill_null(False).to_numpy(zero_copy_only=False)
    changed = (am != bm) | (~(am | bm) & ~eq)
    change.changed = int(np.count_nonzero(changed))
    return changed


def _as_arrow(taken) -> pa.Array:
    values, missing, t = taken
    return pa.array(values, type=t, mask=missing)


def _compare_numbers(a, b, tolerance: float, change: ColumnChange) -> np.ndarray:
    (av, am, at), (bv, bm, bt) = a, b
    both = ~(am | bm)
    if pa.types.is_integer(at) and pa.types.is_integer(bt):
        av, bv = av.astype(np.int64, copy=False), bv.astype(np.int64, copy=False)
        diff = bv - av
        differs = diff != 0 if not tolerance else np.abs(diff) > tolerance
    else:
        av, bv = av.astype(np.float64, copy=False), bv.astype(np.float64, copy=False)
        with np.errstate(invalid="ignore", over="ignore"):
            diff = bv - av
            differs = (av != bv) if not tolerance else ~(np.abs(diff) <= tolerance)
    del av, bv
    changed = (am != bm)
    changed |= both & differs
    del differs
    d = diff[both]
    del diff
    change.changed = int(np.count_nonzero(changed))
    if d.size:
        ad = np.abs(d.astype(np.float64, copy=False))
        finite = np.isfinite(ad)
        if not finite.all():
            d, ad = d[finite], ad[finite]
        if ad.size:
            change.max_abs = float(ad.max())
            moved = d[ad > 0].astype(np.float64, copy=False)
            zero = int(ad.size - moved.size)
            change.median_abs = float(np.median(ad, overwrite_input=True))
            del ad
            if moved.size:
                counts, edges = np.histogram(moved, bins=HISTOGRAM_BINS)
                change.histogram = {"edges": edges.tolist(), "counts": counts.tolist(),
                                    "zero": zero}
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
    pool = pa.default_memory_pool()
    ka, kb = _read(old, key), _read(new, key)
    pool.release_unused()
    for side, arr in (("old", ka), ("new", kb)):
        if arr.null_count:
            raise CompareKeyInvalid(f"key {key!r}: {arr.null_count} rows of the {side} result "
                                    "have no value")
    ko, kn = _key_codes(ka, kb)
    del ka, kb
    oo, so = _sorted(ko)
    del ko
    _check_key(so, "old", key)
    on, sn = _sorted(kn)
    del kn
    _check_key(sn, "new", key)
    io, inew, removed, added = _match(so, sn, oo, on)
    del so, sn, oo, on
    pool.release_unused()

    shared = [n for n in mo if n in mn and n != key]
    retyped = [{"name": n, "type_old": mo[n].type, "type_new": mn[n].type,
                "unit_old": mo[n].unit, "unit_new": mn[n].unit}
               for n in [key, *shared]
               if (mo[n].type, mo[n].unit) != (mn[n].type, mn[n].unit)]
    any_changed = np.zeros(len(io), dtype=bool)
    columns: dict[str, ColumnChange] = {}
    for name in shared:
        change = ColumnChange(name)
        a = _taken(_read(old, name), io)
        pool.release_unused()      # the column's read buffers go back before the next read
        b = _taken(_read(new, name), inew)
        pool.release_unused()
        mask = _compare_column(a, b, tolerance, change)
        del a, b
        if mask is not None:
            any_changed |= mask
        columns[name] = change
        del mask
        pool.release_unused()      # hand freed column buffers back between columns

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
        columns_added=[n for n in mn if n not in mo],
        columns_removed=[n for n in mo if n not in mn],
        columns_retyped=retyped, changed_rows=int(np.count_nonzero(any_changed)),
        tolerance=tolerance, sky=sky, _paths=(old, new), _match=(io, inew),
        _only=(removed, added), _changed_mask=any_changed)


def to_json(comparison: Comparison) -> str:
    return json.dumps(comparison.as_dict(), indent=1, allow_nan=False)

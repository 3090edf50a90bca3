"""What a query will cost before it runs: rows, bytes, limits, and how long similar jobs took.

The row count is a ``COUNT(*)`` over the query's own FROM/WHERE, written by cutting the query's
tokens (never by re-printing a parse tree, which could change names or functions): the select
list becomes ``COUNT(*)``; ORDER BY goes; TOP and OFFSET are applied to the count afterwards;
a query with DISTINCT, GROUP BY, HAVING or a set operation is counted as a derived table.
The bytes per row come from a small sample of the real answer in the format the job will use.
"""

from __future__ import annotations

import math
import re
from dataclasses import asdict, dataclass, field

import sqlglot
from sqlglot import exp
from sqlglot.tokens import TokenType

from jobdesk.checks import _Adql

SAMPLE_ROWS = 100           # rows of the sample that measures bytes per row
FALLBACK_ROWS = 1000        # rows of the TOP-limited sample when the count runs out of time
TIME_LIMIT = 10.0           # seconds for the count (common practice, no source)
SAMPLE_TIME_LIMIT = 30.0    # seconds for a TOP-limited sample (it stops early: cheap)


@dataclass
class Plan:
    """The queries that measure ``adql`` and how to read their answers."""

    count: str | None            # COUNT(*) query, None when the answer is known without one
    sample: str                  # the query's rows, TOP-limited, unordered (bytes per row)
    top: int | None              # the query's own TOP
    offset: int | None           # the query's own OFFSET
    known_rows: int | None = None   # e.g. 1 for an aggregate without GROUP BY


def plan(adql: str) -> Plan | None:
    """The measuring queries for ``adql``, or None when its shape is not understood."""
    try:
        tokens = _Adql.Tokenizer().tokenize(adql)
    except Exception:                       # noqa: BLE001 - any failure: no plan
        return None
    depth = 0
    top_level: list[tuple[int, object]] = []
    for i, t in enumerate(tokens):
        if t.token_type == TokenType.L_PAREN:
            depth += 1
        elif t.token_type == TokenType.R_PAREN:
            depth -= 1
        elif depth == 0:
            top_level.append((i, t))
    kinds = [t.token_type for _, t in top_level]
    selects = [i for i, t in top_level if t.token_type == TokenType.SELECT]
    if not selects:
        # a parenthesised set operation, ( SELECT ... ) UNION ( SELECT ... ): wrap it whole
        if TokenType.UNION in kinds or TokenType.EXCEPT in kinds or TokenType.INTERSECT in kinds:
            body, order_cut = _without_order(adql, top_level)
            return Plan(f"SELECT COUNT(*) AS n FROM ({body}) AS jobdesk_q", _sample_wrapped(body),
                        None, None)
        return None
    first = selects[0]
    prefix = adql[:tokens[first].start]                 # WITH ... (kept as written)
    set_op = any(k in (TokenType.UNION, TokenType.EXCEPT, TokenType.INTERSECT) for k in kinds)
    after_select = tokens[first + 1:first + 4]
    distinct = bool(after_select) and after_select[0].token_type == TokenType.DISTINCT
    top = offset = None
    j = first + 1 + (1 if after_select and after_select[0].token_type in (TokenType.DISTINCT,
                                                                           TokenType.ALL) else 0)
    if not set_op and j + 1 < len(tokens) and tokens[j].token_type == TokenType.TOP \
            and tokens[j + 1].token_type == TokenType.NUMBER:
        top = int(float(tokens[j + 1].text))
        j += 2
    list_start = tokens[j].start if j < len(tokens) else len(adql)
    froms = [i for i, t in top_level if t.token_type == TokenType.FROM and i > first]
    if not froms:
        return None
    offsets = [i for i, t in top_level if t.token_type == TokenType.OFFSET]
    if offsets and offsets[-1] + 1 < len(tokens) and \
            tokens[offsets[-1] + 1].token_type == TokenType.NUMBER:
        offset = int(float(tokens[offsets[-1] + 1].text))
    body_end = _clause_start(adql, tokens, top_level, (TokenType.ORDER_BY, TokenType.OFFSET))
    from_start = tokens[froms[0]].start
    grouped = any(k in (TokenType.GROUP_BY, TokenType.HAVING) for k in kinds)
    select_list = adql[list_start:from_start]
    if set_op or distinct or grouped:
        start = tokens[first].start
        head = adql[start:tokens[first + 1].start]                  # "SELECT "
        rest = adql[tokens[first + 1].start:body_end]
        if top is not None:                                         # TOP n is applied after
            rest = adql[list_start:body_end]
            if distinct:
                rest = "DISTINCT " + rest
        body = head + rest
        return Plan(f"{prefix}SELECT COUNT(*) AS n FROM ({body}) AS jobdesk_q",
                    f"{prefix}SELECT TOP {SAMPLE_ROWS} * FROM ({body}) AS jobdesk_q", top, offset)
    tail = adql[from_start:body_end].rstrip()
    known = 1 if _aggregate_only(select_list) else None
    count = None if known is not None else f"{prefix}SELECT COUNT(*) AS n {tail}"
    sample = f"{prefix}SELECT TOP {SAMPLE_ROWS} {select_list.strip()} {tail}"
    return Plan(count, sample, top, offset, known)


def _clause_start(adql, tokens, top_level, kinds) -> int:
    found = [t.start for _, t in top_level if t.token_type in kinds]
    return min(found) if found else len(adql)


def _without_order(adql: str, top_level) -> tuple[str, bool]:
    found = [t.start for _, t in top_level if t.token_type in (TokenType.ORDER_BY,
                                                               TokenType.OFFSET)]
    return (adql[:min(found)].rstrip(), True) if found else (adql.rstrip(), False)


def _sample_wrapped(body: str) -> str:
    return f"SELECT TOP {SAMPLE_ROWS} * FROM ({body}) AS jobdesk_q"


def _aggregate_only(select_list: str) -> bool:
    """Whether the select list is made of aggregates only (one row comes back)."""
    try:
        tree = sqlglot.parse_one(f"SELECT {select_list} FROM jobdesk_x", dialect=_Adql)
    except Exception:                       # noqa: BLE001
        return False
    items = tree.expressions
    return bool(items) and all(any(isinstance(n, exp.AggFunc) for n in item.walk())
                               and not any(isinstance(n, exp.Column) and
                                           not any(isinstance(a, exp.AggFunc)
                                                   for a in _ancestors(n, item))
                                           for n in item.walk())
                               for item in items)


def _ancestors(node, stop):
    while node is not None and node is not stop:
        node = node.parent
        yield node


def apply_limits(count: int, plan_: Plan) -> int:
    rows = count
    if plan_.offset:
        rows = max(0, rows - plan_.offset)
    if plan_.top is not None:
        rows = min(rows, plan_.top)
    return rows


# --- bytes ---------------------------------------------------------------------------------------


def count_value(body: bytes) -> int | None:
    """The single number a COUNT(*) query answered (any format: VOTable, CSV)."""
    from astropy.io.votable import parse_single_table
    import io
    try:
        table = parse_single_table(io.BytesIO(body), verify="ignore").to_table()
        return int(table[table.colnames[0]][0])
    except Exception:                       # noqa: BLE001 - try plain text next
        pass
    numbers = re.findall(rb"(?m)^\s*(\d+)\s*$", body)
    return int(numbers[-1]) if numbers else None


def sample_rows(body: bytes) -> int | None:
    """Rows in a sample answer (VOTable in any serialization, VOParquet, or CSV/TSV)."""
    from astropy.io.votable import parse_single_table
    import io
    if body[:4] == b"PAR1":
        import pyarrow.parquet as pq
        try:
            return pq.read_metadata(io.BytesIO(body)).num_rows
        except Exception:                   # noqa: BLE001 - a cut file: no figure
            return None
    try:
        return len(parse_single_table(io.BytesIO(body), verify="ignore").array)
    except Exception:                       # noqa: BLE001
        pass
    lines = [ln for ln in body.splitlines() if ln.strip()]
    return max(0, len(lines) - 1) if lines else None


# --- durations -----------------------------------------------------------------------------------


def duration_range(history: list[tuple[float, int | None]]) -> tuple[float, float] | None:
    """(shortest, longest) seconds of this service's past jobs, dropping the extreme tenth at
    each end once there are ten or more; None without history."""
    seconds = sorted(s for s, _ in history if s is not None and s >= 0)
    if not seconds:
        return None
    if len(seconds) >= 10:
        cut = len(seconds) // 10
        seconds = seconds[cut:len(seconds) - cut]
    return seconds[0], seconds[-1]


def _span(seconds: float) -> str:
    if seconds < 60:
        return f"{seconds:.0f} s" if seconds >= 1 else f"{seconds:.1f} s"
    if seconds < 3600:
        return f"{seconds / 60:.0f} min"
    return f"{seconds / 3600:.1f} h"


def _size(n: int) -> str:
    for unit in ("bytes", "kB", "MB", "GB", "TB"):
        if n < 1000 or unit == "TB":
            return f"{n:.0f} {unit}" if unit == "bytes" else f"{n:.1f} {unit}"
        n /= 1000
    return str(n)


@dataclass
class Estimate:
    """The predicted cost of a query (``str()`` reads as a short paragraph)."""

    rows: int | None                 # predicted rows (after TOP/OFFSET), None when unknown
    rows_exact: bool                 # False: a lower bound from a sample (the count timed out)
    method: str                      # "count", "known" or "sample"
    bytes: int | None                # predicted size of the answer in ``fmt``
    fmt: str
    maxrec: int | None               # the row limit that will apply (yours, else the default)
    over_maxrec: bool | None
    output_limit: int | None         # the service's hard limit (TAPRegExt outputLimit)
    over_limit: bool | None
    duration: tuple[float, float] | None   # seconds, from this service's past jobs
    history: int                     # how many past jobs that range comes from
    count_query: str | None
    notes: list[str] = field(default_factory=list)

    @property
    def duration_text(self) -> str:
        if self.duration is None:
            return "unknown"
        low, high = self.duration
        return _span(low) if _span(low) == _span(high) else f"{_span(low)} to {_span(high)}"

    def to_dict(self) -> dict:
        out = asdict(self)
        out["duration"] = list(self.duration) if self.duration else None
        out["duration_text"] = self.duration_text
        return out

    def __str__(self) -> str:
        if self.rows is None:
            rows = "rows: unknown"
        else:
            rows = f"rows: {'' if self.rows_exact else 'at least '}{self.rows:,}"
        size = "unknown" if self.bytes is None else f"about {_size(self.bytes)}"
        lines = [rows + f" ({self.method})", f"size as {self.fmt}: {size}"]
        if self.maxrec is not None:
            lines.append(f"MAXREC {self.maxrec:,}: " + (
                "the result will be cut" if self.over_maxrec else "fits" if
                self.over_maxrec is False else "unknown"))
        if self.output_limit is not None:
            lines.append(f"service limit {self.output_limit:,} rows: " + (
                "exceeded" if self.over_limit else "fits" if self.over_limit is False
                else "unknown"))
        past = f" (from {self.history} past jobs)" if self.history else ""
        lines.append(f"duration: {self.duration_text}{past}")
        lines.extend(f"note: {n}" for n in self.notes)
        return "\n".join(lines)


def measure(adql: str, run, *, fmt: str, maxrec: int | None, default_maxrec: int | None,
            output_limit: int | None, history: list, time_limit: float, timeout_error: type,
            ) -> Estimate:
    """Measure ``adql`` with ``run(query, *, maxrec, fmt, timeout) -> bytes`` (a synchronous
    TAP query); ``history`` lists (seconds, rows) of this service's past jobs."""
    notes: list[str] = []
    sample_limit = max(time_limit, SAMPLE_TIME_LIMIT)
    p = plan(adql)
    if p is None:
        raise ValueError("the query's shape is not understood well enough to count it")
    method = "count"
    rows_exact = True
    if p.known_rows is not None:
        rows: int | None = apply_limits(p.known_rows, p)
        method = "known"
    else:
        try:
            rows = count_value(run(p.count, maxrec=None, fmt="votable", timeout=time_limit))
            if rows is None:
                notes.append("the count's answer could not be read")
            else:
                rows = apply_limits(rows, p)
        except timeout_error:
            notes.append(f"the count took longer than {time_limit:g} s; rows come from a "
                         f"sample of at most {FALLBACK_ROWS}")
            method = "sample"
            body = run(_resize(p.sample, FALLBACK_ROWS), maxrec=None, fmt="votable",
                       timeout=sample_limit)
            got = sample_rows(body) or 0
            rows = apply_limits(got, p)
            rows_exact = got < FALLBACK_ROWS
    header = sample = sampled = None
    try:
        header = len(run(p.sample, maxrec=0, fmt=fmt, timeout=sample_limit))
        body = run(p.sample, maxrec=None, fmt=fmt, timeout=sample_limit)
        sample, sampled = len(body), sample_rows(body)
    except timeout_error:
        notes.append("the sample that measures bytes per row ran out of time")
    limit = maxrec if maxrec is not None else default_maxrec
    shown = rows if rows is None or limit is None else min(rows, limit)
    size = predicted_bytes(shown, header, sample, sampled)
    over = None if rows is None or limit is None else rows > limit
    if over is False and rows is not None and limit is not None and rows == limit:
        notes.append("exactly MAXREC rows: some services flag that as an overflow")
    if over and not rows_exact:
        notes.append("the count is a lower bound, already above the row limit")
    hard = None if rows is None or output_limit is None else rows > output_limit
    if not rows_exact and rows is not None and limit is not None and rows < limit:
        over = None
    past = duration_range(history)
    return Estimate(rows=rows, rows_exact=rows_exact, method=method, bytes=size, fmt=fmt,
                    maxrec=limit, over_maxrec=over, output_limit=output_limit, over_limit=hard,
                    duration=past, history=len(history) if past else 0,
                    count_query=p.count, notes=notes)


def _resize(sample: str, rows: int) -> str:
    return re.sub(rf"\bTOP {SAMPLE_ROWS}\b", f"TOP {rows}", sample, count=1)


def predicted_bytes(rows: int | None, header: int | None, sample: int | None,
                    sampled: int | None) -> int | None:
    if rows is None or header is None:
        return None
    if rows == 0:
        return header
    if not sample or not sampled:
        return None
    per_row = max(0.0, (sample - header) / sampled)
    return int(math.ceil(header + rows * per_row))

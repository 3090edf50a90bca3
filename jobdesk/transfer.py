"""How far a result's download and conversion have come, recorded for everyone who watches.

The process fetching a result feeds a ``FetchMeter`` bytes (download) and rows (conversion to
Parquet); the meter writes the figures into the job's index row (field ``fetch``) at most every
half second, so the sidebar (through the REST list and its change feed), another kernel or the
CLI see them, and hands them to a local listener (the notebook card or the terminal line).
"""

from __future__ import annotations

import time
from collections.abc import Callable


def describe(fetch: dict | None) -> str:
    """``downloading 12.0 MB of 34.0 MB (35 %)`` / ``converting 147,930 rows (80 %)``."""
    if not fetch:
        return ""
    pct = fetch.get("percent")
    tail = f" ({pct:.0f} %)" if pct is not None else ""
    if fetch.get("stage") == "convert":
        return f"converting {fetch.get('rows') or 0:,} rows{tail}"
    total = fetch.get("total")
    of = f" of {_mb(total)}" if total else ""
    return f"downloading {_mb(fetch.get('bytes') or 0)}{of}{tail}"


def _mb(n: int) -> str:
    return f"{n / 1e6:.1f} MB"


class FetchMeter:
    """Progress of one job's fetch: ``length`` (when the service says it), ``bytes``, ``rows``."""

    def __init__(self, write: Callable[[dict | None], None],
                 listener: Callable[[dict], None] | None = None, *, every: float = 0.5,
                 clock: Callable[[], float] = time.monotonic):
        self._write = write
        self._listener = listener
        self._every = every
        self._clock = clock
        self._last = -1e9
        self.state: dict = {"stage": "download", "bytes": 0, "total": None, "rows": None,
                            "percent": None}

    def length(self, total: int | None) -> None:
        self.state["total"] = total

    def bytes(self, written: int) -> None:
        total = self.state["total"]
        self._set(stage="download", bytes=written,
                  percent=None if not total else min(100.0, 100.0 * written / total))

    def rows(self, rows: int, read: int | None = None, size: int | None = None) -> None:
        """Rows converted so far; ``read`` of ``size`` bytes of the downloaded file consumed."""
        pct = None if not size or read is None else min(100.0, 100.0 * read / size)
        self._set(stage="convert", rows=rows, percent=pct)

    def done(self) -> None:
        """Nothing in flight any more (the final index update says what came of it)."""
        self._write(None)

    def _set(self, **fields) -> None:
        new_stage = fields.get("stage") != self.state["stage"]
        self.state.update(fields)
        if self._listener is not None:
            self._listener(dict(self.state))
        now = self._clock()
        if new_stage or now - self._last >= self._every:  # a new stage is always recorded
            self._last = now
            self._write(dict(self.state))

"""VOParquet results into the cache: the service's own row groups, our footer.

A VOParquet file (IVOA VOParquet 1.0 Note) is Parquet whose footer embeds the VOTable that
describes the table (key ``IVOA.VOTable-Parquet.content``, the Note's section on the embedded
VOTable metadata; the table's DATA is replaced by a PARQUET element). The rows need no
conversion: the cache copy is the service's bytes up to its footer, then a new footer that
keeps the service's keys and adds what every cached Parquet copy carries (each column's VOTable
metadata in the Arrow schema, the summary with the overflow status, our provenance keys). The
footer is rewritten, never the row groups, so the cost is one kernel-side file copy.
"""

from __future__ import annotations

import io
import os
import struct
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq

from jobdesk import results
from jobdesk.errors import ServiceResponseInvalid

CONTENT_KEY = b"IVOA.VOTable-Parquet.content"
VERSION_KEY = b"IVOA.VOTable-Parquet.version"
MAGIC = b"PAR1"


def is_parquet(path: Path) -> bool:
    with open(path, "rb") as fh:
        return fh.read(4) == MAGIC


def to_cache(src: Path, dest: Path, *, metadata: dict[str, str] | None = None
             ) -> results.ResultSummary:
    """Check ``src`` (a downloaded VOParquet file) and write its cache copy at ``dest``.

    Refuses, as :class:`ServiceResponseInvalid`, a file that is not Parquet, whose footer is
    missing or corrupt, that embeds no VOTable, or whose VOTable describes other columns.
    ``dest`` appears only when complete.
    """
    src, dest = Path(src), Path(dest)
    size = src.stat().st_size
    with open(src, "rb") as fh:
        head = fh.read(4)
        fh.seek(max(0, size - 8))
        tail = fh.read(8)
    if head != MAGIC:
        raise ServiceResponseInvalid("the result is not Parquet (no PAR1 at its start), "
                                     "though VOParquet was asked for")
    if size < 12 or tail[4:] != MAGIC:
        raise ServiceResponseInvalid(f"the Parquet result has no footer ({size} bytes, cut "
                                     "short or not written to the end)")
    footer_len = struct.unpack("<I", tail[:4])[0]
    body_end = size - 8 - footer_len
    if body_end < 4:
        raise ServiceResponseInvalid("the Parquet result's footer is corrupt (its length "
                                     "points outside the file)")
    try:
        meta = pq.read_metadata(src)
        schema = meta.schema.to_arrow_schema()
    except (pa.ArrowException, OSError) as exc:
        raise ServiceResponseInvalid(f"the Parquet result's footer is corrupt: {exc}") from None
    kv = meta.metadata or {}
    if CONTENT_KEY not in kv:
        raise ServiceResponseInvalid("the Parquet result embeds no VOTable metadata "
                                     f"({CONTENT_KEY.decode()}): not VOParquet")
    summary, fields = results.describe(kv[CONTENT_KEY])
    if summary.status == "ERROR":
        summary.rows = 0
        return summary
    if [f.name for f in fields] != schema.names:
        raise ServiceResponseInvalid(
            f"the embedded VOTable describes the columns {[f.name for f in fields][:8]}, the "
            f"Parquet holds {schema.names[:8]}")
    summary.rows = meta.num_rows
    keep = {k.decode(): v.decode() for k, v in kv.items() if not k.startswith(b"ARROW:")}
    full = pa.schema([af.with_metadata(vf.metadata) for af, vf in zip(schema, fields)],
                     metadata={**keep, **results.cache_keys(summary, metadata)})
    footer = _footer(full, meta)
    tmp = dest.with_name(f".{dest.name}.{os.getpid()}.partial")
    try:
        with open(src, "rb") as fin, open(tmp, "wb") as fout:
            _copy(fin, fout, body_end)
            fout.write(footer)
        os.replace(tmp, dest)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return summary


def _footer(schema: pa.Schema, meta: pq.FileMetaData) -> bytes:
    """Footer bytes (metadata, its length, PAR1) describing ``meta``'s row groups with
    ``schema``'s metadata; the row groups' offsets stay valid since the body is unchanged."""
    empty = io.BytesIO()
    pq.ParquetWriter(empty, schema).close()
    ours = pq.read_metadata(pa.BufferReader(empty.getvalue()))
    try:
        ours.append_row_groups(meta)
    except (RuntimeError, pa.ArrowException) as exc:
        raise ServiceResponseInvalid(f"the Parquet result's columns do not match their "
                                     f"description: {exc}") from None
    out = io.BytesIO()
    ours.write_metadata_file(out)
    return out.getvalue()[len(MAGIC):]


def _copy(fin, fout, count: int) -> None:
    """The first ``count`` bytes, copied by the kernel where it can."""
    left = count
    try:
        while left > 0:
            done = os.copy_file_range(fin.fileno(), fout.fileno(), left)
            if done == 0:
                break
            left -= done
    except (AttributeError, OSError):
        fin.seek(count - left)
        fout.seek(count - left)
    while left > 0:      # no copy_file_range here (or across filesystems): plain reads
        piece = fin.read(min(left, 1 << 20))
        if not piece:
            raise ServiceResponseInvalid("the Parquet result is shorter than its footer says")
        fout.write(piece)
        left -= len(piece)

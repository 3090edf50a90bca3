"""Tables given in ``submit(uploads=...)``, turned into the VOTable bytes TAP_UPLOAD sends.

The bytes are what the cache key digests (TAP 1.1 §3.3.4: the service sees only these), and
they are kept in the store so that any process can create the job later.
"""

from __future__ import annotations

import hashlib
import io
import re
from collections.abc import Mapping
from pathlib import Path

from jobdesk.errors import UploadInvalid

# ADQL 2.1 §2.1.3: a regular identifier is a letter followed by letters, digits or underscores.
_NAME = re.compile(r"^[A-Za-z][A-Za-z0-9_]*$")


def to_votable_bytes(name: str, value) -> bytes:
    """VOTable bytes for one upload: an astropy Table, a pandas DataFrame, a path or bytes."""
    from astropy.io.votable import from_table, parse
    from astropy.table import Table

    if isinstance(value, bytes):
        data = value
    elif isinstance(value, str | Path):
        path = Path(value)
        if not path.is_file():
            raise UploadInvalid(f"upload {name!r}: no file at {path}")
        data = path.read_bytes()
    else:
        if not isinstance(value, Table):
            try:
                import pandas as pd
            except ImportError:  # pragma: no cover - pandas is a dependency
                pd = None
            if pd is not None and isinstance(value, pd.DataFrame):
                value = Table.from_pandas(value)
            else:
                raise UploadInvalid(f"upload {name!r}: a {type(value).__name__} is not a table")
        buf = io.BytesIO()
        try:
            from_table(value).to_xml(buf, tabledata_format="binary2")
        except Exception as exc:  # astropy's many ways of refusing a column (objects, mixins)
            raise UploadInvalid(f"upload {name!r} cannot be written as a VOTable: "
                                f"{exc.__class__.__name__}: {exc}") from exc
        return buf.getvalue()
    try:
        parse(io.BytesIO(data), verify="ignore").get_first_table()
    except Exception as exc:
        raise UploadInvalid(f"upload {name!r} is not a readable VOTable: {exc}") from exc
    return data


def prepare(uploads: Mapping[str, object] | None) -> dict[str, tuple[bytes, str]]:
    """{name: (votable bytes, sha256)} for every upload, names checked as ADQL identifiers."""
    out: dict[str, tuple[bytes, str]] = {}
    for name, value in (uploads or {}).items():
        if not isinstance(name, str) or not _NAME.match(name):
            raise UploadInvalid(f"upload name {name!r} is not an ADQL identifier "
                                "(a letter, then letters, digits or underscores)")
        data = to_votable_bytes(name, value)
        out[name] = (data, hashlib.sha256(data).hexdigest())
    return out

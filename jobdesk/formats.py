"""Which result format to ask a service for, and what a downloaded result turned out to be.

A result's table is the same whichever bytes carry it, but not its cost: TABLEDATA must be
parsed as text, BINARY2 (VOTable 1.4 §5.5) and VOParquet (IVOA VOParquet 1.0 Note) need no text
parsing at all. So unless the user named a format, jobdesk asks for the fastest one the service
lists in its capabilities (TAPRegExt 1.0 §2.5 outputFormat) that keeps the full VOTable
metadata: VOParquet, then BINARY2, then the TAP default. The choice never enters the cache key.
"""

from __future__ import annotations

from typing import Any

DEFAULT = "votable"                                             # TAP 1.1 §2.7.1
VOPARQUET = "application/vnd.apache.parquet"                    # VOParquet 1.0 Note
BINARY2 = "application/x-votable+xml;serialization=BINARY2"     # VOTable 1.4 §5.5, DALI 1.1 §4.1

_BINARY2_IDS = {"ivo://ivoa.net/std/taptregext#output-votable-binary2",
                "ivo://ivoa.net/std/tapregext#output-votable-binary2"}


def _squeeze(text: str | None) -> str:
    # MIME parameters compare without case or spaces (RFC 2045 §5.1)
    return "".join((text or "").split()).lower()


def offered(capabilities: dict[str, Any]) -> dict[str, str]:
    """The fast formats a service lists, mapped to the RESPONSEFORMAT value to send (its own
    MIME spelling, so a service that matches strings exactly still recognises it)."""
    found: dict[str, str] = {}
    for fmt in capabilities.get("output_formats") or ():
        mime = fmt.get("mime") or ""
        squeezed = _squeeze(mime)
        if squeezed.split(";")[0] == VOPARQUET:
            found.setdefault("voparquet", mime.strip())
        elif (squeezed.startswith("application/x-votable+xml")
              and "serialization=binary2" in squeezed) or \
                _squeeze(fmt.get("ivo_id")) in _BINARY2_IDS:
            found.setdefault("binary2", mime.strip() or BINARY2)
    return found


def choose(capabilities: dict[str, Any] | None) -> str:
    """RESPONSEFORMAT for a job whose user named none: VOParquet, else BINARY2, else default."""
    found = offered(capabilities or {})
    return found.get("voparquet") or found.get("binary2") or DEFAULT


def is_voparquet(fmt: str | None) -> bool:
    return _squeeze(fmt).split(";")[0] in (VOPARQUET, "parquet")


def is_csv(fmt: str | None) -> bool:
    return _squeeze(fmt).startswith(("csv", "text/csv"))


def declared_serialization(content_type: str | None) -> str | None:
    """The VOTable serialization an HTTP Content-Type declares ("BINARY2", ...), if any."""
    for part in _squeeze(content_type).split(";")[1:]:
        name, _, value = part.partition("=")
        if name == "serialization" and value:
            return value.upper()
    return None


def blames_format(message: str | None, fmt: str | None) -> bool:
    """Whether a job's error text points at its result format (common practice, no source:
    services word this differently; a restart or a bad query must not cost a second run)."""
    text = _squeeze(message)
    words = ("responseformat", "format", "parquet", "binary2", "serializ", _squeeze(fmt))
    return bool(text) and any(w and w in text for w in words)

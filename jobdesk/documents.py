"""Reading what a TAP/UWS service sends back: job documents, job lists, VOSI capabilities and
error documents.

Kept apart from the HTTP exchange (``jobdesk.remote``) so that every document is read in one
place, the same way, whatever request brought it: parsed with defusedxml (no DTDs, no entity
expansion), elements found by local name (servers differ in namespaces), and a web page where a
document was expected (a portal, a login form) named as such.  Nothing here speaks HTTP.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any
from urllib.parse import urljoin
from xml.etree.ElementTree import Element, ParseError

from defusedxml import DefusedXmlException
from defusedxml import ElementTree as SafeET

from jobdesk import phases
from jobdesk.errors import NotATapService, ServiceResponseInvalid, shorten

XLINK_HREF = "{http://www.w3.org/1999/xlink}href"
TAP_STANDARD = "ivo://ivoa.net/std/tap"  # TAPRegExt 1.0 §2; ivo identifiers ignore case
MESSAGE_LIMIT = 4000  # characters of a service's error message kept (common practice, no source)
ERROR_DOCUMENT_LIMIT = 1 << 20  # a "result" this small may be an error document in disguise
_NO_MESSAGE = "the service reported an error without a message"


@dataclass
class JobStatus:
    """One reading of a UWS job document."""

    url: str
    phase: str
    run_id: str | None
    uws_version: str | None  # "1.1", or None for a UWS 1.0 document (no version attribute)
    creation_time: str | None
    start_time: str | None
    end_time: str | None
    destruction: str | None
    error_summary: str | None  # the errorSummary message
    error_type: str | None  # transient | fatal
    result_url: str | None  # href of the result named "result", else the first result
    parameters: dict[str, str] = field(default_factory=dict)  # names upper-cased (TAP: case-insensitive)


@dataclass
class JobRef:
    """One entry of a UWS job list (UWS 1.1 §2.2.2.1)."""

    url: str
    run_id: str | None  # as listed; None when the service lists no runId
    created: datetime | None  # creationTime, when listed


# --- UWS job documents and job lists ------------------------------------------------------------


def job_status(url: str, body: bytes, service: str, *, base: str | None = None) -> JobStatus:
    """Read a UWS job document (UWS 1.1 §2.2.1, schema in the UWS 1.1 appendix).

    ``base`` is the URL the document was finally read from (after redirects); relative result
    links are resolved against it.
    """
    root = parse_xml(body, service, "job document")
    if _local(root.tag) != "job":
        raise ServiceResponseInvalid(f"expected a UWS job document, got <{_local(root.tag)}>: "
                                     f"{snippet(body)}", service=service)
    phase = _child_text(root, "phase")
    if not phase:
        raise ServiceResponseInvalid(f"the job document has no phase: {snippet(body)}",
                                     service=service)
    if phase.upper() not in phases.UWS_PHASES:  # UWS 1.1 §2.1.3: a closed list
        raise ServiceResponseInvalid(f"the job document has the phase {shorten(phase, 40)!r}, "
                                     f"which UWS does not define: {snippet(body)}",
                                     service=service)
    parameters: dict[str, str] = {}
    params_el = _child(root, "parameters")
    for param in _children(params_el, "parameter") if params_el is not None else ():
        name = param.get("id")
        if name:
            parameters[name.upper()] = param.text or ""  # exact: values are case- and space-sensitive
    result_url = None
    results_el = _child(root, "results")
    # Some servers list a "result" for an ABORTED job (empty, or a partial table ending in an
    # error): it is never offered, nor is one of a failed job (UWS 1.1 §2.1.3: results are the
    # output of a job that ran to completion).
    if results_el is not None and phase.strip().upper() not in (phases.ABORTED, phases.ERROR):
        results = [(r.get("id"), _href(r)) for r in _children(results_el, "result")]
        named = [href for rid, href in results if rid == "result" and href]
        anyone = [href for _, href in results if href]
        chosen = (named or anyone or [None])[0]
        result_url = urljoin(base or url, chosen) if chosen else None
    summary = _child(root, "errorSummary")
    return JobStatus(
        url=url, phase=phase.upper(), run_id=_child_text(root, "runId"),
        uws_version=root.get("version"),
        creation_time=_child_text(root, "creationTime"), start_time=_child_text(root, "startTime"),
        end_time=_child_text(root, "endTime"), destruction=_child_text(root, "destruction"),
        error_summary=_child_text(summary, "message") if summary is not None else None,
        error_type=summary.get("type") if summary is not None else None,
        result_url=result_url, parameters=parameters)


def job_id(body: bytes, service: str) -> str | None:
    """The jobId of a job document (some servers answer a creating POST with one), else None."""
    root = parse_xml(body, service, "job document")
    return _child_text(root, "jobId") if _local(root.tag) == "job" else None


def job_list(body: bytes, service: str, *, base: str, jobs_url: str, limit: int) -> list[JobRef]:
    """At most ``limit`` entries of a UWS job list (UWS 1.1 §2.2.2.1), newest first.

    ``base`` resolves the entries' links (the list's own URL, after redirects); an entry without
    a link is ``{jobs_url}/{id}``.
    """
    root = parse_xml(body, service, "job list")
    if _local(root.tag) != "jobs":
        raise ServiceResponseInvalid(f"expected a UWS job list, got <{_local(root.tag)}>: "
                                     f"{snippet(body)}", service=service)
    refs = []
    for ref in _newest_first(_children(root, "jobref"), limit):
        href = _href(ref)
        url = urljoin(base, href) if href else f"{jobs_url.rstrip('/')}/{ref.get('id')}"
        refs.append(JobRef(url=url, run_id=_child_text(ref, "runId"),
                           created=parse_time(_child_text(ref, "creationTime"))))
    return refs


def _newest_first(refs: list[Element], limit: int) -> list[Element]:
    """At most ``limit`` job-list entries, newest first.

    By creationTime when every entry has one; else the server's order: newest first when it
    honoured ``LAST`` (UWS 1.1 §2.2.2.1), and when it sent more than asked for (LAST ignored, as
    UWS 1.0 servers do) its list is taken as oldest first (common practice, no source).
    """
    times = [parse_time(_child_text(r, "creationTime")) for r in refs]
    if refs and all(t is not None for t in times):
        ordered = [r for _, r in sorted(zip(times, refs), key=lambda p: p[0], reverse=True)]
    elif len(refs) > limit:
        ordered = list(reversed(refs))
    else:
        ordered = list(refs)
    return ordered[:limit]


def same_text(read_back: str, sent: str) -> bool:
    """Whether a parameter read back from a document is the text that was sent.

    XML 1.0 §2.11 turns CR LF and lone CR into LF, so the two can differ only there; nothing
    else is forgiven (values are case- and space-sensitive).
    """
    return _newlines(read_back) == _newlines(sent)


def _newlines(text: str) -> str:
    return text.replace("\r\n", "\n").replace("\r", "\n")


def parse_time(value: str | None) -> datetime | None:
    """An ISO 8601 timestamp as an aware UTC datetime; a zone-less one is taken as UTC."""
    if not value:
        return None
    try:
        parsed = datetime.fromisoformat(value.strip().replace("Z", "+00:00"))
    except ValueError:
        return None
    return parsed if parsed.tzinfo else parsed.replace(tzinfo=UTC)


# --- VOSI capabilities (TAPRegExt) --------------------------------------------------------------


def capabilities(body: bytes, service: str) -> dict[str, Any]:
    """The TAP capability of a VOSI 1.1 capabilities document (TAPRegExt 1.0 §2).

    Raises ``ValueError`` when the document describes no TAP service.
    """
    root = parse_xml(body, service, "capabilities")
    if _local(root.tag) != "capabilities":
        raise ValueError(f"expected <capabilities>, got <{_local(root.tag)}>")
    taps = [c for c in _children(root, "capability")
            if (c.get("standardID") or "").strip().lower().split("#")[0] == TAP_STANDARD]
    if not taps:
        raise ValueError("the capabilities name no TAP capability (ivo://ivoa.net/std/TAP)")
    # Prefer the one that describes the service in TAPRegExt terms (it has a <language>).
    cap = next((c for c in taps if _child(c, "language") is not None), taps[0])
    interfaces = _children(cap, "interface")
    std = [i for i in interfaces if i.get("role") == "std"] or interfaces
    versions = sorted((i.get("version") for i in std if i.get("version")), key=_version_key)
    adql: list[str] = []
    for language in _children(cap, "language"):
        if (_child_text(language, "name") or "").upper() != "ADQL":
            continue
        for version in _children(language, "version"):
            text = (version.text or "").strip() or (version.get("ivo-id") or "").rsplit("#v", 1)[-1]
            if text and text not in adql:
                adql.append(text)
    uploads = [m.get("ivo-id") for m in _children(cap, "uploadMethod") if m.get("ivo-id")]
    # TAPRegExt 1.0 §2.5: each outputFormat has a MIME type, aliases and maybe an ivo-id;
    # what jobdesk may ask for instead of plain TABLEDATA (see jobdesk.formats).
    formats = [{"mime": (_child_text(f, "mime") or "").strip(),
                "aliases": [(a.text or "").strip() for a in _children(f, "alias")],
                "ivo_id": f.get("ivo-id")}
               for f in _children(cap, "outputFormat")]
    return {"output_formats": formats,
            "standard_id": cap.get("standardID"),
            "interface_version": versions[-1] if versions else None,
            "adql_versions": adql,
            "output_limit": _limits(_child(cap, "outputLimit")),
            "retention": _limits(_child(cap, "retentionPeriod")),
            "execution_duration": _limits(_child(cap, "executionDuration")),
            "upload_methods": uploads}


def _limits(element: Element | None) -> dict[str, Any] | None:
    """TAPRegExt 1.0 ``default``/``hard`` limits as integers (``unit`` kept when given)."""
    if element is None:
        return None
    out: dict[str, Any] = {}
    for name in ("default", "hard"):
        child = _child(element, name)
        if child is not None:
            out[name] = as_int((child.text or "").strip())
            if child.get("unit"):
                out["unit"] = child.get("unit")
    return out


def _version_key(version: str) -> tuple[int, ...]:
    return tuple(int(p) if p.isdigit() else 0 for p in version.split("."))


# --- error documents ----------------------------------------------------------------------------


def error_document_message(body: bytes) -> str | None:
    """The message of a DALI error VOTable (QUERY_STATUS=ERROR), else None.

    The one reader of error documents, for HTTP error answers, synchronous answers and small
    downloaded results alike. DALI 1.1 §4.4.1: the QUERY_STATUS INFOs of the RESOURCE of type
    "results" count and the last one wins; without a typed resource any INFO outside a "meta"
    resource counts (the rule of :func:`query_status`, which ``results.scan`` uses too). The
    message is the service's words exactly, inner whitespace included; only the ends are trimmed.
    """
    try:
        root = SafeET.fromstring(body)
    except (ParseError, DefusedXmlException, ValueError):
        return None
    if _local(root.tag) != "VOTABLE":
        return None
    parents = {child: parent for parent in root.iter() for child in parent}
    statuses: list[tuple[str, str, str | None]] = []  # (where, value, text), in document order
    for element in root.iter():
        if _local(element.tag) != "INFO" or element.get("name") != "QUERY_STATUS":
            continue
        parent = parents.get(element)
        above = _local(parent.tag) if parent is not None else ""
        where = (parent.get("type") or "") if above == "RESOURCE" else above
        statuses.append((where, (element.get("value") or "").strip().upper(), element.text))
    value, text = query_status(statuses)
    if value != "ERROR":
        return None
    return (text or "").strip() or _NO_MESSAGE


def query_status(statuses: list[tuple[str, str, str | None]]) -> tuple[str, str | None]:
    """The QUERY_STATUS that counts among (where, value, text) in document order.

    DALI 1.1 §4.4.1: those of the RESOURCE of type "results", the last one winning (OVERFLOW
    follows the TABLE); without a typed resource, any not in a "meta" resource. "OK" when none.
    """
    in_results = [s for s in statuses if s[0] == "results"]
    elsewhere = [s for s in statuses if s[0] != "meta"]
    _, value, text = (in_results or elsewhere or [("", "OK", None)])[-1]
    return value or "OK", text


def document_message(body: bytes) -> str:
    """An error document's message: a VOTable's QUERY_STATUS text, or plain text as it is
    (the text of any other XML, whitespace folded)."""
    message = error_document_message(body)
    return message if message is not None else _plain_text(body)


def _plain_text(body: bytes) -> str:
    text = body.decode("utf-8", errors="replace").strip()
    if text.startswith("<"):
        try:
            root = SafeET.fromstring(body)
            text = " ".join(" ".join(root.itertext()).split())
        except (ParseError, DefusedXmlException, ValueError):
            pass
    return text


def answer_message(body: bytes, content_type: str | None, reason: str | None
                   ) -> tuple[str, str | None]:
    """An error answer's body as (the service's own words worth showing, raw detail).

    An error VOTable's message stays as written (cut at ``MESSAGE_LIMIT``); a web page (an HTML
    error or login page) is not shown as a message: its text goes to detail.
    """
    if is_web_page(body, content_type):
        return "the answer is a web page, not a service message", page_text(body)
    verbatim = error_document_message(body)
    if verbatim is not None:
        return shorten(verbatim, MESSAGE_LIMIT), None
    message = " ".join(re.sub(r"<[^>]{0,200}>", " ", _plain_text(body)).split())  # stray tags
    return shorten(message or reason or "(empty answer)"), None


def result_error_message(path: Path, content_type: str | None, size: int) -> str | None:
    """The message of an error document delivered where a result was expected, else None.

    Only a small file that looks like XML is read (a real result is left alone, whatever size).
    """
    if size > ERROR_DOCUMENT_LIMIT:
        return None
    if not (content_type and "xml" in content_type.lower()):
        with open(path, "rb") as f:
            if not f.read(64).lstrip().startswith(b"<"):
                return None
    return error_document_message(path.read_bytes())


def is_web_page(body: bytes, content_type: str | None = None) -> bool:
    """An HTML page (a portal, a login form, a proxy's error page), not a protocol document."""
    if content_type and "html" in content_type.lower():
        return True
    head = body[:512].lstrip().lower()
    return head.startswith((b"<!doctype html", b"<html")) or b"<html" in head[:200]


def page_text(body: bytes) -> str:
    """The readable text of a web page, short (for ``detail``)."""
    text = body[:65536].decode("utf-8", errors="replace")
    text = re.sub(r"(?is)<(script|style)\b.*?</\1>", " ", text)
    return shorten(" ".join(re.sub(r"<[^>]{0,500}>", " ", text).split()))


# --- XML, safely and by local name --------------------------------------------------------------


def parse_xml(body: bytes, service: str, what: str) -> Element:
    """``body`` parsed with defusedxml; a web page or unreadable XML raises naming ``what``."""
    if is_web_page(body):
        raise NotATapService(f"a web page came back where a {what} was expected: {service} is "
                             "not a TAP service, or a login page is in the way",
                             service=service, detail=page_text(body))
    try:
        return SafeET.fromstring(body)
    except (ParseError, DefusedXmlException, ValueError) as exc:
        raise ServiceResponseInvalid(f"the {what} is not readable XML ({exc.__class__.__name__}): "
                                     f"{snippet(body)}", service=service) from None


def _local(tag: Any) -> str:
    return tag.rsplit("}", 1)[-1] if isinstance(tag, str) else ""


def _children(parent: Element, name: str) -> list[Element]:
    """Children by local name: namespaces vary (or are missing) between servers."""
    return [c for c in parent if _local(c.tag) == name]


def _child(parent: Element, name: str) -> Element | None:
    found = _children(parent, name)
    return found[0] if found else None


def _child_text(parent: Element | None, name: str) -> str | None:
    if parent is None:
        return None
    element = _child(parent, name)
    if element is None or element.text is None:
        return None  # absent or xsi:nil
    text = element.text.strip()
    return text or None


def _href(element: Element) -> str | None:
    href = element.get(XLINK_HREF)
    if href is None:
        href = next((v for k, v in element.attrib.items() if _local(k) == "href"), None)
    return href


def as_int(value: str | None) -> int | None:
    """A decimal integer, or None when there is none (absent or malformed)."""
    try:
        return int(value) if value is not None else None
    except ValueError:
        return None


def snippet(body: bytes | str, limit: int = 200) -> str:
    """A body quoted on one line, short, for a message about a malformed answer."""
    text = body.decode("utf-8", errors="replace") if isinstance(body, bytes) else body
    return repr(shorten(text, limit, one_line=True))

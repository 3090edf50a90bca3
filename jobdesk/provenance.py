"""Where a table came from: the provenance record, its W3C PROV-JSON form and a plain account.

The record is built from the index row and its phase history, so it can be rebuilt at any time
and never holds anything the index does not (in particular no credential). The PROV-JSON form
follows the W3C PROV-JSON submission (2013) and the IVOA Provenance DM 1.0 mapping: the job is
an Activity carrying its parameters, the result an Entity, the service and the user Agents.
"""

from __future__ import annotations

import datetime as _dt
import getpass
import platform
from importlib import metadata

from jobdesk import phases

PROV_NS = "https://jobdesk.invalid/ns/prov#"


def iso(ts: float | None) -> str | None:
    """Unix seconds as a DALI 1.1 §3.3.3 timestamp: UTC, ISO 8601, ending in ``Z``."""
    if ts is None:
        return None
    text = _dt.datetime.fromtimestamp(ts, _dt.timezone.utc).isoformat(timespec="milliseconds")
    return text.replace("+00:00", "Z")


def utc(text: str | None) -> str | None:
    """A service's ISO 8601 time in the DALI ``Z`` form (``+00:00`` rewritten; others kept)."""
    if not text:
        return None
    text = text.strip()
    return text[:-6] + "Z" if text.endswith("+00:00") else text


def versions() -> dict[str, str]:
    out = {}
    for name in ("jobdesk", "astropy", "pyvo", "pyarrow", "pandas"):
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            pass
    out["python"] = platform.python_version()
    return out


def current_user() -> str:
    try:
        return getpass.getuser()
    except Exception:  # no user name in some containers
        return "unknown"


def build(record, history: list[dict], *, columns: list[dict] | None = None) -> dict:
    """The provenance of one job (a ``jobdesk.record.JobRecord``), as a JSON-safe dict.

    ``software`` names the versions of the process that fetched the result, as recorded then
    (empty for a record made before they were kept), never those of the process reading it."""
    server = record.server or {}
    return {
        "jobdesk_provenance": 1,
        "service": record.service,
        "server": server,
        "adql": record.adql,
        "canonical_adql": record.canonical,
        "key": record.key,
        "job_url": record.job_url,
        "run_id": record.run_id,
        "parameters": {"LANG": "ADQL", "MAXREC": record.maxrec,
                       "RESPONSEFORMAT": record.result_fmt or record.fmt,
                       "UPLOAD": record.uploads},
        # the format the user asked for (None: chosen from the service's capabilities)
        "format_requested": record.fmt,
        "scope": record.scope,
        "label": record.label,
        "phase": record.phase,
        "phase_history": [{"phase": h["phase"], "at": iso(h["at"]), "note": h.get("note")}
                          for h in history],
        "created": iso(record.created),
        "started": iso(record.started),
        "finished": iso(record.finished),
        # The service's own times from the job document (UWS 1.1 §2.2.1: startTime, endTime).
        "service_start": utc(server.get("start_time")),
        "service_end": utc(server.get("end_time")),
        "rows": record.rows,
        "truncated": bool(record.truncated),
        "columns": columns or [],
        "result_sha256": record.result_sha256,
        "result_bytes": record.result_bytes,
        "parquet_sha256": record.parquet_sha256,
        "served_from": record.layer or "personal",
        "requests": record.requests,
        "notebook": record.notebook,
        "user": record.user,
        "host": record.host,
        "software": record.software or {},
    }


def _jobdesk_version(prov: dict) -> str:
    """``jobdesk 0.1.0``, or a plain note when the fetching process's version was not kept."""
    version = (prov.get("software") or {}).get("jobdesk")
    return f"jobdesk {version}" if version else "jobdesk (version not recorded)"


VOPROV_NS = "http://www.ivoa.net/documents/ProvenanceDM/ns/voprov/"


def to_prov_json(prov: dict, *, exported: dict | None = None) -> dict:
    """W3C PROV-JSON: an activity (the job) used a query and generated a result entity.

    Types are qualified names (``prov:QUALIFIED_NAME``, PROV-JSON §2.3) in the ``prov:``,
    ``voprov:`` (IVOA Provenance DM 1.0) or ``jd:`` namespaces. ``startTime``/``endTime`` are
    the service's own times when the job document gave them. ``exported`` describes the written
    file (path, format, sha256, bytes, table): it becomes an entity derived from the result,
    carrying the file's SHA-256, so the file can be matched to this sidecar.
    """
    job = f"jd:job-{prov['key'][:16]}"
    result = f"jd:result-{(prov.get('result_sha256') or prov['key'])[:16]}"
    query = f"jd:query-{prov['key'][:16]}"
    service = "jd:service"
    user = "jd:user"
    software = "jd:jobdesk"

    def literal(value, kind="xsd:string"):
        return {"$": str(value), "type": kind}

    def qname(value):
        return {"$": value, "type": "prov:QUALIFIED_NAME"}

    activity = {"prov:type": qname("jd:TAPJob"), "prov:label": prov.get("label") or "TAP query"}
    start = prov.get("service_start") or prov.get("started")
    if not start and prov["phase_history"]:
        start = prov["phase_history"][0]["at"]
    if start:
        activity["prov:startTime"] = start
    end = prov.get("service_end") or prov.get("finished")
    if end:
        activity["prov:endTime"] = end
    activity["jd:jobURL"] = literal(prov.get("job_url") or "", "xsd:anyURI")
    activity["jd:phase"] = prov.get("phase") or ""
    # Parameters of the activity (Provenance DM 1.0 §2.3): only those that were set.
    parameters = prov.get("parameters") or {}
    if parameters.get("MAXREC") is not None:
        activity["jd:MAXREC"] = literal(int(parameters["MAXREC"]), "xsd:long")
    if parameters.get("RESPONSEFORMAT"):
        activity["jd:RESPONSEFORMAT"] = literal(parameters["RESPONSEFORMAT"])
    activity["jd:LANG"] = literal(parameters.get("LANG") or "ADQL")
    entity = {"prov:type": qname("voprov:Entity"),
              "jd:kind": qname("jd:QueryResult"),
              "jd:rows": literal(prov.get("rows") or 0, "xsd:long"),
              "jd:truncated": literal(str(bool(prov.get("truncated"))).lower(), "xsd:boolean"),
              "jd:sha256": prov.get("result_sha256") or "",
              "jd:servedFrom": prov.get("served_from") or "personal"}
    entities = {
        result: entity,
        query: {"prov:type": qname("jd:ADQLQuery"), "prov:value": prov.get("adql") or "",
                "jd:canonical": prov.get("canonical_adql") or "", "jd:key": prov["key"]},
    }
    document = {
        "prefix": {"jd": PROV_NS, "voprov": VOPROV_NS,
                   "xsd": "http://www.w3.org/2001/XMLSchema#"},
        "entity": entities,
        "activity": {job: activity},
        "agent": {
            service: {"prov:type": qname("prov:SoftwareAgent"),
                      "prov:location": literal(prov["service"], "xsd:anyURI")},
            user: {"prov:type": qname("prov:Person"),
                   "prov:label": prov.get("user") or "unknown"},
            software: {"prov:type": qname("prov:SoftwareAgent"),
                       "prov:label": _jobdesk_version(prov)},
        },
        "wasGeneratedBy": {"_:gen1": {"prov:entity": result, "prov:activity": job}},
        "used": {"_:use1": {"prov:activity": job, "prov:entity": query}},
        "wasAssociatedWith": {
            "_:assoc1": {"prov:activity": job, "prov:agent": service},
            "_:assoc2": {"prov:activity": job, "prov:agent": user},
            "_:assoc3": {"prov:activity": job, "prov:agent": software},
        },
        "wasAttributedTo": {"_:attr1": {"prov:entity": result, "prov:agent": service}},
    }
    if exported:
        file_id = f"jd:file-{exported['sha256'][:16]}"
        file_entity = {"prov:type": qname("jd:ExportedFile"),
                       "prov:label": exported["path"],
                       "jd:format": exported["format"],
                       "jd:sha256": literal(exported["sha256"]),
                       "jd:bytes": literal(exported["bytes"], "xsd:long")}
        if exported.get("table"):
            file_entity["jd:table"] = exported["table"]
        entities[file_id] = file_entity
        document["wasDerivedFrom"] = {"_:der1": {"prov:generatedEntity": file_id,
                                                 "prov:usedEntity": result}}
    return document


def account(prov: dict) -> str:
    """A short plain-text account of how the table was made, to paste into a data section; of
    a job without a result, a plain statement that there is none."""
    when = (prov.get("finished") or prov.get("created") or "")[:10]
    tables = ", ".join(prov.get("tables") or []) or "the service's tables"
    made = bool(prov.get("result_sha256")) and prov.get("rows") is not None
    query = ["", "    " + (prov.get("adql") or "").strip().replace("\n", "\n    "), ""]
    if not made:
        return "\n".join([
            f"The ADQL query below was sent on {when} to the TAP service at {prov['service']} "
            f"({tables}):", *query,
            f"There is no result: the job {_no_result(prov.get('phase'))}, so no rows were "
            "returned and no result file exists.",
            f"Sent with {_jobdesk_version(prov)} "
            f"(job {prov.get('job_url') or 'never created on the service'}).",
        ])
    lines = [
        f"Data were selected on {when} from the TAP service at {prov['service']} "
        f"({tables}) with the ADQL query:", *query,
        f"The query returned {prov.get('rows')} rows"
        + (" (TRUNCATED by a row or time limit: incomplete)" if prov.get("truncated") else "")
        + f"; the result file has SHA-256 {prov.get('result_sha256')}.",
        f"Retrieved with {_jobdesk_version(prov)} (job {prov.get('job_url')}).",
    ]
    return "\n".join(lines)


def _no_result(phase: str | None) -> str:
    if phase in phases.TERMINAL:
        return f"ended {phase} without one"
    return f"is {phase} and has none yet"


def fits_cards(prov: dict) -> list[tuple[str, str, str]]:
    """FITS header cards (keyword, value, comment) plus HISTORY lines describing the result."""
    cards = [
        ("ORIGIN", "jobdesk " + prov["software"].get("jobdesk", ""), "software that fetched it"),
        # DATE is the date the HDU was written (FITS 4.0 §4.4.2.1): ours is the export time;
        # the job's own finish time gets a keyword of our own.
        ("DATE", _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%S"), "HDU written (UTC)"),
        ("JDDONE", (prov.get("finished") or "")[:19], "when the job finished (UTC)"),
        ("JDKEY", prov["key"][:64], ""),           # 64 hex digits fill the card: no comment
        ("JDROWS", str(prov.get("rows")), "rows returned"),
        ("JDTRUNC", "T" if prov.get("truncated") else "F", "result cut by a limit"),
        ("JDSHA256", (prov.get("result_sha256") or "")[:64], ""),
    ]
    history = [f"TAP service: {prov['service']}", f"job: {prov.get('job_url')}",
               "ADQL: " + " ".join((prov.get("adql") or "").split())]
    return cards + [("HISTORY", h, "") for h in history]

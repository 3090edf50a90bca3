"""Where a table came from: the provenance record, its W3C PROV-JSON form and a plain account.

The record is built from the index row and its phase history, so it can be rebuilt at any time
and never holds anything the index does not (in particular no credential). The PROV-JSON form
follows the W3C PROV-JSON submission (2013) and the IVOA Provenance DM 1.0 mapping: the job is
an Activity carrying its parameters, the result an Entity, the service and the user Agents.
"""

from __future__ import annotations

import datetime as _dt
import getpass
import json
import platform
from importlib import metadata

PROV_NS = "https://jobdesk.invalid/ns/prov#"


def iso(ts: float | None) -> str | None:
    if ts is None:
        return None
    return _dt.datetime.fromtimestamp(ts, _dt.timezone.utc).isoformat(timespec="milliseconds")


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


def build(record: dict, history: list[dict], *, columns: list[dict] | None = None) -> dict:
    """The provenance of one job, as a JSON-safe dict."""
    server = record.get("server") or {}
    return {
        "jobdesk_provenance": 1,
        "service": record["service"],
        "server": server,
        "adql": record.get("adql"),
        "canonical_adql": record.get("canonical"),
        "key": record["key"],
        "job_url": record.get("job_url"),
        "run_id": record.get("run_id"),
        "parameters": {"LANG": "ADQL", "MAXREC": record.get("maxrec"),
                       "RESPONSEFORMAT": record.get("fmt"),
                       "UPLOAD": record.get("uploads") or {}},
        "scope": record.get("scope"),
        "label": record.get("label"),
        "phase": record.get("phase"),
        "phase_history": [{"phase": h["phase"], "at": iso(h["at"]), "note": h.get("note")}
                          for h in history],
        "created": iso(record.get("created")),
        "finished": iso(record.get("finished")),
        "rows": record.get("rows"),
        "truncated": bool(record.get("truncated")),
        "columns": columns or [],
        "result_sha256": record.get("result_sha256"),
        "result_bytes": record.get("result_bytes"),
        "parquet_sha256": record.get("parquet_sha256"),
        "served_from": record.get("layer") or "personal",
        "requests": record.get("requests"),
        "notebook": record.get("notebook"),
        "user": record.get("user"),
        "host": record.get("host"),
        "software": record.get("software") or versions(),
    }


def to_prov_json(prov: dict) -> dict:
    """W3C PROV-JSON: an activity (the job) used a query and generated a result entity."""
    job = f"jd:job-{prov['key'][:16]}"
    result = f"jd:result-{(prov.get('result_sha256') or prov['key'])[:16]}"
    query = f"jd:query-{prov['key'][:16]}"
    service = "jd:service"
    user = "jd:user"
    software = "jd:jobdesk"

    def literal(value, kind="xsd:string"):
        return {"$": str(value), "type": kind}

    activity = {"prov:type": literal("jd:TAPJob"), "prov:label": prov.get("label") or "TAP query"}
    if prov["phase_history"]:
        activity["prov:startTime"] = prov["phase_history"][0]["at"]
    if prov.get("finished"):
        activity["prov:endTime"] = prov["finished"]
    activity["jd:jobURL"] = literal(prov.get("job_url") or "", "xsd:anyURI")
    activity["jd:phase"] = prov.get("phase") or ""
    activity["jd:MAXREC"] = literal(prov["parameters"].get("MAXREC"), "xsd:string")
    entity = {"prov:type": literal("jd:QueryResult"),
              "jd:rows": literal(prov.get("rows") or 0, "xsd:long"),
              "jd:truncated": literal(str(prov.get("truncated")).lower(), "xsd:boolean"),
              "jd:sha256": prov.get("result_sha256") or "",
              "jd:servedFrom": prov.get("served_from") or "personal"}
    return {
        "prefix": {"jd": PROV_NS, "xsd": "http://www.w3.org/2001/XMLSchema#"},
        "entity": {
            result: entity,
            query: {"prov:type": literal("jd:ADQLQuery"), "prov:value": prov.get("adql") or "",
                    "jd:canonical": prov.get("canonical_adql") or "", "jd:key": prov["key"]},
        },
        "activity": {job: activity},
        "agent": {
            service: {"prov:type": literal("prov:SoftwareAgent", "prov:QUALIFIED_NAME"),
                      "prov:location": literal(prov["service"], "xsd:anyURI")},
            user: {"prov:type": literal("prov:Person", "prov:QUALIFIED_NAME"),
                   "prov:label": prov.get("user") or "unknown"},
            software: {"prov:type": literal("prov:SoftwareAgent", "prov:QUALIFIED_NAME"),
                       "prov:label": "jobdesk " + prov["software"].get("jobdesk", "")},
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


def account(prov: dict) -> str:
    """A short plain-text account of how the table was made, to paste into a data section."""
    when = (prov.get("finished") or prov.get("created") or "")[:10]
    tables = ", ".join(prov.get("tables") or []) or "the service's tables"
    lines = [
        f"Data were selected on {when} from the TAP service at {prov['service']} "
        f"({tables}) with the ADQL query:",
        "",
        "    " + (prov.get("adql") or "").strip().replace("\n", "\n    "),
        "",
        f"The query returned {prov.get('rows')} rows"
        + (" (TRUNCATED by a row or time limit: incomplete)" if prov.get("truncated") else "")
        + f"; the result file has SHA-256 {prov.get('result_sha256')}.",
        f"Retrieved with jobdesk {prov['software'].get('jobdesk', '')} (job {prov.get('job_url')}).",
    ]
    return "\n".join(lines)


def fits_cards(prov: dict) -> list[tuple[str, str, str]]:
    """FITS header cards (keyword, value, comment) plus HISTORY lines describing the result."""
    cards = [
        ("ORIGIN", "jobdesk " + prov["software"].get("jobdesk", ""), "software that fetched it"),
        ("DATE", (prov.get("finished") or "")[:19], "when the job finished (UTC)"),
        ("JDKEY", prov["key"][:64], "jobdesk cache key (sha256)"),
        ("JDROWS", str(prov.get("rows")), "rows returned"),
        ("JDTRUNC", "T" if prov.get("truncated") else "F", "result cut by a limit"),
        ("JDSHA256", (prov.get("result_sha256") or "")[:64], "sha256 of the service's file"),
    ]
    history = [f"TAP service: {prov['service']}", f"job: {prov.get('job_url')}",
               "ADQL: " + " ".join((prov.get("adql") or "").split())]
    return cards + [("HISTORY", h, "") for h in history]


def as_json(prov: dict) -> str:
    return json.dumps(prov, sort_keys=True, indent=1)

"""The job record: every field the index keeps about one job, its type and what it means.

This is the one place that lists them. The index's ``jobs`` table is made from it (column names
and SQL types), ``Index`` hands out ``JobRecord`` objects, and ``JobRecord.as_dict()`` is the
JSON-safe form the REST API, the command line's ``--json`` and ``Job.record`` show.
Times are unix seconds (floats); JSON-typed fields are stored as JSON text.
"""

from __future__ import annotations

import dataclasses
import functools
import json
import operator
import types
import typing
from dataclasses import dataclass, field

from jobdesk import phases


def _doc(text: str, default=None, *, factory=None):
    if factory is not None:
        return field(default_factory=factory, metadata={"doc": text})
    return field(default=default, metadata={"doc": text})


@dataclass(slots=True)
class JobRecord:
    """One job as the index keeps it (read afresh from the index; changed only through
    ``Index.update``, so every process sees the same record)."""

    # --- what was asked
    id: str = _doc("our id of the job: 16 hex digits")
    key: str = _doc("the cache key: SHA-256 of service, canonical query, MAXREC, format, "
                    "uploads and scope (jobdesk.keys.query_key)")
    service: str = _doc("the TAP service's base URL, normalised (jobdesk.keys.service_id)")
    adql: str = _doc("the query exactly as the user wrote it")
    phase: str = _doc("UWS phase as last seen, or one of ours: UNSENT, SUBMITTED, LOST, "
                      "UNREACHED (jobdesk.phases)", phases.UNSENT)
    created: float = _doc("when the record was made", 0.0)
    canonical: str | None = _doc("the query's canonical text, the part of the key a reader "
                                 "can check")
    maxrec: int | None = _doc("MAXREC sent, or None for the service's default")
    fmt: str | None = _doc("RESPONSEFORMAT the user insisted on; None when jobdesk chose it")
    result_fmt: str | None = _doc("RESPONSEFORMAT actually used (negotiated or asked)")
    label: str | None = _doc("a name for people; not part of the key")
    scope: str | None = _doc("whose results these may be shared with: anonymous, "
                             "authenticated or a group's name")
    uploads: dict = _doc("upload name -> SHA-256 of its VOTable bytes (in the store)",
                         factory=dict)
    warnings: list = _doc("why the query is not repeatable (TOP without ORDER BY, RAND())",
                          factory=list)
    notebook: str | None = _doc("the notebook that submitted it (JPY_SESSION_NAME), if any")
    user: str | None = _doc("the Unix user that submitted it")
    host: str | None = _doc("the host that submitted it")
    analysis: str | None = _doc("the first analysis the job joined (jobdesk.analyses)")
    estimate: dict | None = _doc("Estimate.to_dict() measured before sending, if asked for")
    # --- the job on the service
    run_id: str | None = _doc("RUNID sent with the job, to find it again after a crash")
    job_url: str | None = _doc("the UWS job's URL, once the service created it")
    intent: float | None = _doc("when this side last began creating the job (orphan search)")
    submitted: float | None = _doc("when the service created the job")
    started: float | None = _doc("when it started executing (the service's startTime if given)")
    finished: float | None = _doc("when the record reached a terminal phase")
    updated: float | None = _doc("when any field last changed (the change feed's token)")
    service_started: float | None = _doc("the service's own startTime (UWS 1.1 §2.2.1)")
    service_finished: float | None = _doc("the service's own endTime (UWS 1.1 §2.2.1)")
    requests: int = _doc("HTTP requests made for this job so far", 0)
    server: dict | None = _doc("what the service said of itself when the result came: "
                               "software, capabilities, its job start and end times")
    software: dict | None = _doc("versions of jobdesk and its libraries in the process that "
                                 "fetched the result (None on records made before they were "
                                 "kept)")
    # --- trouble
    error: str | None = _doc("why the job failed, in our words with the service's own")
    error_detail: str | None = _doc("the raw text under the error (a library's exception, a "
                                    "web page)")
    unreachable_since: float | None = _doc("since when the service has not answered "
                                           "(None when it answers)")
    last_error: str | None = _doc("the last failure to reach the service, in our words")
    next_try: float | None = _doc("when the next try is due after the service did not answer")
    send_tries: int | None = _doc("failed tries to create the job (UNREACHED after "
                                  "Desk(send_tries=))")
    # --- the result
    rows: int | None = _doc("rows in the result")
    truncated: bool | None = _doc("whether the service cut the result (QUERY_STATUS OVERFLOW)")
    result_sha256: str | None = _doc("SHA-256 of the result's bytes as the service sent them")
    result_bytes: int | None = _doc("size of those bytes")
    result_stat: str | None = _doc("size and mtime of the stored file, for a cheap re-check")
    parquet_sha256: str | None = _doc("SHA-256 of the cache's Parquet copy")
    parquet_stat: str | None = _doc("size and mtime of the Parquet copy")
    layer: str | None = _doc("where the result came from: personal, or a group cache's name",
                             "personal")
    fetch: dict | None = _doc("while the result is fetched: stage, bytes, total, rows, percent "
                              "(jobdesk.transfer)")
    # --- who drives it
    owner: str | None = _doc("host:pid of the process driving the job (creating, waiting, "
                             "downloading)")
    lease_until: float | None = _doc("until when that process holds the job")

    @classmethod
    def from_row(cls, row: dict) -> "JobRecord":
        """A record from an index row (JSON text decoded, 0/1 as a bool); columns this version
        does not know are left out."""
        return cls.from_rows(tuple(row), [tuple(row.values())])[0]

    @classmethod
    def from_rows(cls, columns: tuple[str, ...], rows) -> list["JobRecord"]:
        """Records from rows of ``columns`` (as a cursor gives them). The per-column work is
        planned once per column list and records are built positionally, so a page of 50 records
        costs little more than its SQL (case5 in benchmarks/)."""
        pick, absent, decode, flag = _plan(tuple(columns))
        out = []
        for row in rows:
            values = list(pick(row))
            for k, field in absent:
                values[k] = field.default_factory() if field.name in _FACTORIES \
                    else field.default
            for k in decode:
                text = values[k]
                if isinstance(text, str):
                    empty = _EMPTY_JSON.get(text)   # most records: no uploads, no warnings
                    values[k] = empty() if empty else json.loads(text)
            if flag is not None and values[flag] is not None:
                values[flag] = bool(values[flag])
            for k, factory in _FACTORY_AT:
                if values[k] is None:
                    values[k] = factory()
            out.append(cls(*values))
        return out

    def as_dict(self) -> dict:
        """The JSON-safe form (``truncated`` as 0/1, as the REST API has always given it)."""
        out = {name: getattr(self, name) for name in FIELDS}
        if out["truncated"] is not None:
            out["truncated"] = int(out["truncated"])
        return out

    # ``Index`` handed out dicts before records were typed, and scripts read them by key:
    # reading by key still works (read-only); jobdesk itself reads attributes.
    def __getitem__(self, name: str):
        if name not in FIELDS:
            raise KeyError(name)
        value = getattr(self, name)
        return int(value) if name == "truncated" and value is not None else value

    def get(self, name: str, default=None):
        return self[name] if name in FIELDS else default

    def __contains__(self, name: object) -> bool:
        return name in FIELDS

    @property
    def has_result(self) -> bool:
        """Finished, with a Parquet copy recorded (it may still have to be fetched from a group
        cache: see ``Lifecycle.bring_here``)."""
        return self.phase == phases.COMPLETED and bool(self.parquet_sha256)

    @property
    def title(self) -> str:
        """The label, else the query's first non-blank line."""
        return self.label or next((ln.strip() for ln in self.adql.splitlines() if ln.strip()), "")


_EMPTY_JSON = {"{}": dict, "[]": list}


@functools.lru_cache(maxsize=16)
def _plan(columns: tuple[str, ...]):
    """How ``JobRecord.from_rows`` turns rows of ``columns`` into records: a getter that puts
    the row in field order, the fields the rows lack (every field has a default), the positions of the
    JSON fields, and of ``truncated``. Made once per column list (the poller's pass is mostly
    this when no job is active)."""
    at = {name: i for i, name in enumerate(columns)}
    absent = [(k, field) for k, (name, field) in enumerate(FIELDS.items()) if name not in at]
    pick = operator.itemgetter(*[at.get(name, 0) for name in FIELDS])
    decode = [k for k, name in enumerate(FIELDS) if name in JSON_FIELDS and name in at]
    flag = _POSITION["truncated"] if "truncated" in at else None
    return pick, absent, decode, flag
FIELDS: dict[str, dataclasses.Field] = {f.name: f for f in dataclasses.fields(JobRecord)}
_FACTORIES = {name for name, f in FIELDS.items() if f.default_factory is not dataclasses.MISSING}
_POSITION = {name: k for k, name in enumerate(FIELDS)}
_FACTORY_AT = [(_POSITION[name], FIELDS[name].default_factory) for name in _FACTORIES]


def _python_type(name: str) -> type:
    hint = typing.get_type_hints(JobRecord)[name]
    if isinstance(hint, types.UnionType):
        hint = next(t for t in typing.get_args(hint) if t is not type(None))
    return typing.get_origin(hint) or hint


JSON_FIELDS = tuple(n for n in FIELDS if _python_type(n) in (dict, list))
# What the index's jobs table stores each field as (sqlite-utils' column types).
COLUMN_TYPES: dict[str, type] = {
    name: (str if name in JSON_FIELDS else int if _python_type(name) is bool
           else _python_type(name)) for name in FIELDS}


def describe() -> list[tuple[str, str, str]]:
    """(name, type, meaning) of every field, in order: for docs and ``jobdesk --reference``."""
    hints = typing.get_type_hints(JobRecord)
    return [(name, _type_text(hints[name]), f.metadata["doc"]) for name, f in FIELDS.items()]


def _type_text(hint) -> str:
    if isinstance(hint, types.UnionType):
        return " or ".join(_type_text(t) for t in typing.get_args(hint))
    return "None" if hint is type(None) else getattr(hint, "__name__", str(hint))


def reference() -> str:
    """docs/job-record.md: every field of the job record (``python -m jobdesk.record``)."""
    lines = ["# The job record", "",
             "Every field jobdesk keeps about a job: a column of the index's `jobs` table, an",
             "attribute of `jobdesk.record.JobRecord`, a key of `Job.record` and of the REST API's",
             "job object. Times are unix seconds; `dict`/`list` fields are stored as JSON.",
             "Generated from jobdesk/record.py by `python -m jobdesk.record > docs/job-record.md`",
             "(tests/test_record.py checks it is current).", "",
             "| field | type | meaning |", "|---|---|---|"]
    lines += [f"| `{name}` | `{kind}` | {meaning} |" for name, kind, meaning in describe()]
    return "\n".join(lines) + "\n"


if __name__ == "__main__":
    print(reference(), end="")

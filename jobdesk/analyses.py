"""Analyses (named chains of jobs) and re-running one on a new data release.

Why its own module: a re-run is a plan over many jobs that must survive kernel restarts, honour
the order the steps depend on each other (a step that uploads an earlier step's result waits for
the new run of that step), and check every renamed query before anything runs.  The plan's state
lives in the index (``plans``), its steps are ordinary jobs submitted through the desk, so limits,
caching and recovery are the desk's own.  Nothing of the old analysis is written to.
"""

from __future__ import annotations

import contextlib
import contextvars
import datetime as _dt
import hashlib
import json

from jobdesk import keys, phases, rewrite, tableset
from jobdesk.errors import AnalysisNotFound, JobdeskError, RenameInvalid

_current: contextvars.ContextVar[str | None] = contextvars.ContextVar("jobdesk_analysis",
                                                                     default=None)


@contextlib.contextmanager
def active(name: str):
    """Inside the block, every submit without ``analysis=`` joins ``name``."""
    check_name(name)
    token = _current.set(name)
    try:
        yield name
    finally:
        _current.reset(token)


def current() -> str | None:
    return _current.get()


def check_name(name) -> str:
    if not isinstance(name, str) or not name.strip() or len(name) > 200:
        raise ValueError("an analysis name is non-empty text of at most 200 characters")
    return name


def upload_sources(uploads) -> dict[str, str]:
    """{upload name: cache key} for uploads that are jobdesk results (a Job, or a table
    loaded from one, which carries its key in its metadata)."""
    out = {}
    for name, value in (uploads or {}).items():
        key = getattr(value, "key", None) if hasattr(value, "desk") else None
        if key is None:
            meta = getattr(value, "meta", None) or getattr(value, "attrs", None) or {}
            key = meta.get("jobdesk_key") if hasattr(meta, "get") else None
        if isinstance(key, str):
            out[name] = key
    return out


# --- re-runs ----------------------------------------------------------------------------------

DONE, FAILED, WAITING, RUNNING, BLOCKED = "done", "failed", "waiting", "running", "blocked"


def plan_id(name: str, renames: dict, service: str | None, into: str | None) -> str:
    blob = json.dumps({"analysis": name, "rename": renames, "service": service, "into": into},
                      sort_keys=True)
    return hashlib.sha256(blob.encode()).hexdigest()[:16]


class Plan:
    """A re-run of an analysis: every step's old and new ADQL, then the new jobs.

    ``start()`` submits what can run now; ``wait()`` drives the rest in dependency order until
    every step has ended; ``jobs`` lists the new jobs in step order; ``compare()`` compares each
    step's old and new result.  ``steps`` says, per step, its state and any error.
    """

    def __init__(self, desk, record: dict):
        self.desk = desk
        self.id = record["id"]
        self.analysis = record["analysis"]
        self.into = record["into_name"]
        self.args = record["args"]
        self._state = record["state"]

    def __repr__(self) -> str:
        counts: dict[str, int] = {}
        for s in self.steps:
            counts[s["state"]] = counts.get(s["state"], 0) + 1
        text = ", ".join(f"{n} {k}" for k, n in sorted(counts.items()))
        return f"<jobdesk.Plan {self.id} {self.analysis!r} -> {self.into!r}: {text}>"

    def _save(self) -> None:
        self.desk.index.save_plan(self.id, self.analysis, self.into, self.args, self._state)

    # --- reading the state --------------------------------------------------------------------

    @property
    def steps(self) -> list[dict]:
        """Per step: number, old job, old and new ADQL, service, depends, new job, state, error."""
        out = []
        for s in self._state["steps"]:
            out.append({**s, "state": self._step_state(s)})
        return out

    def _step_state(self, s: dict) -> str:
        if s.get("error"):
            return FAILED
        if not s.get("new_job"):
            bad = [d for d in s["depends"].values()
                   if self._step_state(self._by_step(d)) in (FAILED, BLOCKED)]
            return BLOCKED if bad else WAITING
        record = self.desk.index.get(s["new_job"])
        if record is None:
            return FAILED
        if record.has_result:
            return DONE
        if record.phase in phases.FAILED:
            return FAILED
        return RUNNING

    def _by_step(self, number: int) -> dict:
        return next(s for s in self._state["steps"] if s["step"] == number)

    @property
    def jobs(self) -> list:
        """The new jobs in step order (steps not submitted yet are left out)."""
        return [self.desk.job(s["new_job"]) for s in self._state["steps"] if s.get("new_job")]

    @property
    def failed(self) -> list[dict]:
        """Steps that failed or cannot run because a step they depend on failed, with why."""
        out = []
        for s in self.steps:
            if s["state"] == FAILED:
                record = self.desk.index.get(s["new_job"]) if s.get("new_job") else None
                why = s.get("error") or (record.error if record is not None else None)
                out.append({"step": s["step"], "error": why or "the job failed"})
            elif s["state"] == BLOCKED:
                out.append({"step": s["step"], "error": "depends on a step that failed: "
                            + ", ".join(str(d) for d in s["depends"].values())})
        return out

    @property
    def finished(self) -> bool:
        return all(s["state"] in (DONE, FAILED, BLOCKED) for s in self.steps)

    def as_dict(self) -> dict:
        return {"id": self.id, "analysis": self.analysis, "into": self.into, "args": self.args,
                "steps": self.steps, "failed": self.failed, "finished": self.finished}

    # --- running ------------------------------------------------------------------------------

    def start(self) -> Plan:
        """Submit every step whose inputs are ready, in step order; failures stay per step."""
        changed = False
        for s in self._state["steps"]:
            if s.get("new_job") or s.get("error"):
                continue
            deps = {name: self._by_step(n) for name, n in s["depends"].items()}
            states = {name: self._step_state(d) for name, d in deps.items()}
            if any(st in (FAILED, BLOCKED) for st in states.values()) \
                    or any(st != DONE for st in states.values()):
                continue
            try:
                uploads = {name: self.desk.store.path(sha).read_bytes()
                           for name, sha in s["uploads"].items()}
            except OSError as exc:
                s["error"] = f"an upload of the old step is no longer in the cache: {exc}"
                changed = True
                continue
            for name, dep in deps.items():
                uploads[name] = self.desk.job(dep["new_job"])
            try:
                job = self.desk.submit(s["service"], s["new_adql"], maxrec=s["maxrec"],
                                       fmt=s["fmt"], uploads=uploads or None, label=s["label"],
                                       analysis=self.into)
                s["new_job"] = job.id
            except JobdeskError as exc:
                s["error"] = str(exc)
            changed = True
        if changed:
            self._save()
        return self

    def wait(self, timeout: float | None = None) -> Plan:
        """Block until every step has ended (done, failed, or blocked by a failed step)."""
        import time
        deadline = None if timeout is None else time.monotonic() + timeout
        self.start()
        while not self.finished:
            for s in self.steps:
                if s["state"] != RUNNING:
                    continue
                left = None if deadline is None else max(0.0, deadline - time.monotonic())
                try:
                    self.desk.job(s["new_job"]).wait(timeout=left, progress=False)
                except JobdeskError:
                    pass  # recorded on the job; the plan reports it per step
            self.start()
            if deadline is not None and time.monotonic() >= deadline and not self.finished:
                from jobdesk.errors import WaitTimeout
                raise WaitTimeout(f"re-run {self.id} has steps still running after {timeout:g} s")
        return self

    def compare(self, *, key: str | None = None, tolerance: float = 0.0) -> list:
        """One comparison per finished step pair (old result vs new); steps that cannot be
        compared (failed, no usable key) carry ``error`` instead, see :class:`StepComparison`."""
        out = StepComparisons(plan=self)
        for s in self.steps:
            entry = StepComparison(step=s["step"], old_job=s["old_job"], new_job=s.get("new_job"))
            if s["state"] != DONE:
                entry.error = f"step {s['step']} is {s['state']}"
                for f in self.failed:
                    if f["step"] == s["step"]:
                        entry.error += f": {f['error']}"
            else:
                try:
                    entry.comparison = self.desk.compare(s["old_job"], s["new_job"], key=key,
                                                         tolerance=tolerance)
                except JobdeskError as exc:
                    entry.error = exc.message
            out.append(entry)
        return out


class StepComparison:
    def __init__(self, step: int, old_job: str, new_job: str | None):
        self.step, self.old_job, self.new_job = step, old_job, new_job
        self.comparison = None
        self.error: str | None = None

    def __repr__(self) -> str:
        return f"<step {self.step}: {self.comparison if self.error is None else self.error}>"


class StepComparisons(list):
    """``plan.compare()``: a list of :class:`StepComparison`, and one report for them all."""

    def __init__(self, plan: Plan):
        super().__init__()
        self.plan = plan

    def report(self, path):
        from jobdesk.report import write_report
        done = [e for e in self if e.comparison is not None]
        problems = [f"step {e.step}: {e.error}" for e in self if e.error]
        return write_report([e.comparison for e in done], path,
                            titles=[f"Step {e.step}" for e in done],
                            heading=f"Re-run of {self.plan.analysis!r} as {self.plan.into!r}",
                            extra={"plan": self.plan.as_dict(), "problems": problems})


def make_plan(desk, name: str, renames: dict[str, str], service: str | None,
              into: str | None) -> Plan:
    """Find the plan made with these arguments, or check the renames and record a new one."""
    check_name(name)
    if not isinstance(renames, dict) or not all(isinstance(k, str) and isinstance(v, str)
                                                for k, v in renames.items()):
        raise TypeError("rename must map old names to new names, both text")
    sid = keys.service_id(service) if service else None
    pid = plan_id(name, renames, sid, into)
    known = desk.index.plan(pid)
    if known is not None:
        return Plan(desk, known)
    steps = desk.index.steps(name)
    if not steps:
        raise AnalysisNotFound(f"no analysis named {name!r} on this desk ({desk.root})")
    problems: list[str] = []
    used: set[str] = set()
    by_job = {s["job_id"]: s["step"] for s in steps}
    planned = []
    metadata: dict[str, tableset.Tableset | None] = {}
    for s in steps:
        record = desk.index.get(s["job_id"])
        if record is None:
            problems.append(f"step {s['step']}: job {s['job_id']} was forgotten from this desk")
            continue
        target = sid or record.service
        try:
            done = rewrite.rewrite(record.adql, renames) if renames else None
        except rewrite.QueryUnreadable as exc:
            problems.append(f"step {s['step']}: {exc}; it cannot be rewritten safely")
            continue
        if done is not None:
            used |= done.used
        new_adql = done.adql if done is not None else record.adql
        depends = {}
        for upload, job_id in (s["depends"] or {}).items():
            if job_id in by_job:
                depends[upload] = by_job[job_id]
        uploads = {n: sha for n, sha in record.uploads.items() if n not in depends}
        if target not in metadata:
            metadata[target] = tableset.published(desk, target)
        meta = metadata[target]
        if meta is not None:
            problems += _check_names(s["step"], new_adql, meta, done, renames, target)
        planned.append({"step": s["step"], "old_job": s["job_id"], "old_adql": record.adql,
                        "new_adql": new_adql, "service": target, "maxrec": record.maxrec,
                        "fmt": record.fmt or "votable", "label": record.label,
                        "uploads": uploads, "depends": depends, "new_job": None, "error": None})
    for source in renames:
        if source not in used:
            problems.append(f"rename {source!r}: no step of {name!r} uses that name")
    if problems:
        raise RenameInvalid(f"re-run of {name!r} refused before anything ran:\n  - "
                            + "\n  - ".join(problems), problems=problems)
    resolved = into or _default_into(desk, name)
    check_name(resolved)
    if resolved == name:
        raise ValueError("the re-run needs an analysis name of its own (into=...)")
    state = {"steps": planned, "renames": renames, "service": sid}
    args = {"rename": renames, "service": sid, "into": into}
    desk.index.save_plan(pid, name, resolved, args, state)
    return Plan(desk, desk.index.plan(pid))


def _default_into(desk, name: str) -> str:
    base = f"{name}@{_dt.date.today().isoformat()}"
    taken = ({a["name"] for a in desk.index.analyses()}
             | {p["into_name"] for p in desk.index.plans()})
    candidate, n = base, 1
    while candidate in taken:
        n += 1
        candidate = f"{base}-{n}"
    return candidate


def _check_names(step: int, adql: str, meta: tableset.Tableset, done, renames: dict,
                 service: str) -> list[str]:
    """Names the rewritten query reads that the new release lacks (lenient: never a false
    error; subqueries, common table expressions and uploads skip the column check)."""
    if done is None:
        try:
            done = rewrite.rewrite(adql, {})
        except rewrite.QueryUnreadable:
            return []
    problems = []
    known_cols: set[str] = set()
    complete = True
    for table in done.tables:
        if not meta.has_table(table):
            problems.append(f"step {step}: table {table} does not exist on {service}")
            complete = False
            continue
        cols = meta.columns(table)
        if cols is None:
            complete = False
        else:
            known_cols |= cols
    if complete and not done.uncheckable and done.tables:
        aliases = {a.upper() for a in done.aliases}
        missing = sorted({c for _, c in done.columns if c.upper() not in known_cols
                          and c.upper() not in aliases})
        for c in missing:
            target = [k for k, v in renames.items() if v.upper() == c.upper()]
            why = f" (the target of rename {target[0]!r})" if target else ""
            problems.append(f"step {step}: column {c.lower() if c.isupper() else c}{why} is not "
                            f"in {', '.join(done.tables)} on {service}")
    return problems

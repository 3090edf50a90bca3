"""The ``jobdesk`` command: a thin skin over ``Desk``, one subcommand per Desk method, with
the library's words; every command takes ``--json`` where a script might read the output.

Exit status: 0 done; 1 no such job (``JobNotFound``, also for an ambiguous short id) or the
outcome was a failure (a job failed, a check found errors); 2 the command could not be carried
out as given (bad arguments, a refusal with the reason). ``python -m jobdesk.cli --reference``
prints docs/cli.md from the parser below.
"""

from __future__ import annotations

import argparse
import datetime as _dt
import json
import sys
from urllib.parse import urlsplit

from jobdesk import phases
from jobdesk.errors import JobdeskError, JobNotFound

DESCRIPTION = ("Send ADQL queries to TAP services as jobs that survive restarts, follow them, "
               "and keep, export and explain their results.")
EXIT_NOT_FOUND = 1      # JobNotFound, everywhere an id is taken
EXIT_USAGE = 2          # what argparse uses for bad arguments
KNOWN_PHASES = (*phases.UWS_PHASES, phases.UNSENT, phases.SUBMITTED, phases.LOST,
                phases.UNREACHED)


def _settings(args):
    """The command's settings: the same builder as every desk, ``--root`` as an argument."""
    from jobdesk.settings import build
    return build(root=args.root)


def _desk(args):
    from jobdesk.desk import Desk
    return Desk(settings=_settings(args))


def _job(desk, text: str):
    """The job an id or a unique prefix of one names (``JobNotFound``/``JobIdAmbiguous``)."""
    return desk.job(desk.resolve(text))


def _phase(text: str) -> str:
    """A phase name in any case; an unknown one is refused with the known ones."""
    name = text.strip().upper()
    if name not in KNOWN_PHASES:
        raise argparse.ArgumentTypeError(f"unknown phase {text!r}; known phases: "
                                         + ", ".join(KNOWN_PHASES))
    return name


def _short_service(url: str | None) -> str:
    """host/path of a service URL, cut to fit a column."""
    if not url:
        return "-"
    parts = urlsplit(url)
    text = (parts.netloc + parts.path) or url
    return text if len(text) <= 28 else text[:27] + "~"


def _dump(value) -> None:
    print(json.dumps(value, indent=1, default=str))


def _when(ts) -> str:
    if not ts:
        return "-"
    return _dt.datetime.fromtimestamp(ts).strftime("%Y-%m-%d %H:%M")


def _size(n) -> str:
    if n is None:
        return "-"
    for unit in ("B", "kB", "MB", "GB"):
        if n < 1000:
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1000
    return f"{n:.1f} TB"


def _row(job) -> str:
    from jobdesk.desk import unreachable_note
    r = job.record
    rows = "-" if r.get("rows") is None else str(r["rows"])
    mark = " truncated" if r.get("truncated") else ""
    line = (f"{r['id']}  {r['phase']:<10} {rows:>9}{mark:<10} {_size(r.get('result_bytes')):>9}  "
            f"{_when(r['created'])}  {_short_service(r.get('service')):<28}  {job.title[:50]}")
    note = unreachable_note(r)
    if note:
        line += f"\n{'':18}{note}: {r.get('last_error') or ''}"
    if r["phase"] == phases.UNREACHED:
        line += (f"\n{'':18}never reached the service, no job exists there: "
                 f"`jobdesk resend {r['id']}` or `jobdesk forget {r['id']}`")
    return line


def cmd_list(args) -> int:
    desk = _desk(args)
    jobs = desk.jobs(phase=args.phase, service=args.service, text=args.text, limit=args.limit)
    if args.json:
        print(json.dumps([j.record for j in jobs], indent=1))
        return 0
    if not jobs:
        print(f"no jobs match in {desk.root}" if (args.phase or args.service or args.text)
              else f"no jobs recorded in {desk.root}")
        return 0
    print(f"{'id':<16}  {'phase':<10} {'rows':>9}{'':<10} {'size':>9}  {'created':<16}  "
          f"{'service':<28}  query")
    for job in jobs:
        print(_row(job))
    total = desk.count(phase=args.phase, service=args.service, text=args.text)
    if total > len(jobs):
        print(f"... {total - len(jobs)} more (use --limit)")
    return 0


def cmd_show(args) -> int:
    job = _job(_desk(args), args.id)
    if args.provenance:
        print(json.dumps(job.provenance(), indent=1))
        return 0
    if args.json:   # the record, the same object ``list --json`` prints
        print(json.dumps(job.record, indent=1))
        return 0
    r = job.record
    from jobdesk.desk import unreachable_note
    for name in ("id", "phase", "service", "job_url", "label", "rows", "truncated",
                 "result_bytes", "requests", "error", "error_detail", "notebook"):
        if r.get(name) is not None:
            value = r[name]
            if name == "truncated":
                value = "yes" if value else "no"
            print(f"{name:>13}: {value}")
    if unreachable_note(r):
        print(f"{'unreachable':>13}: {unreachable_note(r)}")
    if r["phase"] in phases.FAILED:
        print(f"{'next':>13}: `jobdesk resend {r['id']}` (same query, new job) or "
              f"`jobdesk forget {r['id']}`")
    print(f"{'created':>13}: {_when(r['created'])}")
    print("         ADQL:\n    " + r["adql"].strip().replace("\n", "\n    "))
    for h in job.desk.index.history(job.id):
        print(f"   {_when(h['at'])}  {h['phase']:<10} {h.get('note') or ''}")
    return 0


def cmd_submit(args) -> int:
    desk = _desk(args)
    job = desk.submit(args.service, args.adql, maxrec=args.maxrec, label=args.label,
                      refresh=args.refresh, check=not args.no_check)
    if args.wait:
        job.wait()
    print(json.dumps(job.record, indent=1) if args.json else _row(job))
    return 0


def cmd_wait(args) -> int:
    desk = _desk(args)
    ids = [desk.resolve(i) for i in args.ids] or [
        j.id for j in desk.jobs(phase=sorted(phases.ACTIVE | {phases.COMPLETED}), limit=None)
        if not j.ready]
    if not ids and not args.json:
        print("nothing is running")
    failed = 0
    records = []
    for job_id in ids:
        job = desk.job(job_id)
        if job.ready:   # finished already: nothing to wait for, one line
            records.append(job.record)
            if not args.json:
                print(_row(job))
            continue
        if job.phase == phases.UNREACHED:
            print(f"{job_id}: skipped: the service was never reached and no job exists there; "
                  f"`jobdesk resend {job_id}` or `jobdesk forget {job_id}`", file=sys.stderr)
            continue
        try:
            job.wait(timeout=args.timeout, progress=not args.json)
        except JobdeskError as exc:
            failed += 1
            print(f"{job_id}: {exc}", file=sys.stderr)
        records.append(job.record)
        if not args.json:
            print(_row(job))
    if args.json:
        _dump(records)
    return 1 if failed else 0


def _one_job(args, act) -> int:
    """Resolve the id, run ``act(desk, full_id) -> Job``, print the job's line or record."""
    desk = _desk(args)
    job = act(desk, desk.resolve(args.id))
    if args.json:
        _dump(job.record)
    else:
        print(_row(job))
    return 0


def cmd_abort(args) -> int:
    return _one_job(args, lambda desk, job_id: desk.abort(job_id))


def cmd_resend(args) -> int:
    return _one_job(args, lambda desk, job_id: desk.resend(job_id))


def cmd_forget(args) -> int:
    desk = _desk(args)
    job_id = desk.resolve(args.id)
    gone = desk.forget(job_id)   # JobNotFound (status 1) for an unknown id, as everywhere
    if args.json:
        _dump({"id": job_id, "forgotten": gone})
    else:
        print(f"forgot {job_id}" if gone else f"no job {job_id}")
    return 0 if gone else EXIT_NOT_FOUND


def cmd_export(args) -> int:
    job = _job(_desk(args), args.id)
    written = job.export(args.path, allow_truncated=args.allow_truncated, fmt=args.format,
                         name=args.name, overwrite=args.overwrite)
    if args.json:
        _dump({"id": job.id, "written": [str(p) for p in written]})
        return 0
    for path in written:
        print(path)
    return 0


def cmd_account(args) -> int:
    job = _job(_desk(args), args.id)
    if args.json:
        _dump({"id": job.id, "account": job.account()})
    else:
        print(job.account())
    return 0


def cmd_provenance(args) -> int:
    from jobdesk.provenance import to_prov_json
    job = _job(_desk(args), args.id)
    # --json is accepted for the same words everywhere: the output is JSON either way.
    _dump(job.provenance() if args.jobdesk else to_prov_json(job.provenance()))
    return 0


def cmd_pin(args) -> int:
    desk = _desk(args)
    job_id = desk.resolve(args.id)
    desk.pin(job_id, pinned=not args.unpin)
    if args.json:
        _dump({"id": job_id, "pinned": not args.unpin})
    else:
        print(f"{'unpinned' if args.unpin else 'pinned'} {job_id}"
              + ("" if args.unpin else ": prune keeps its record and files"))
    return 0


def cmd_publish(args) -> int:
    desk = _desk(args)
    job_id = desk.resolve(args.id)
    where = desk.publish(job_id, group=args.group)
    if args.json:
        _dump({"id": job_id, "published": where})
    else:
        print(f"published {job_id} to {where}")
    return 0


def cmd_prune(args) -> int:
    days = None if args.older_than_days is None else args.older_than_days * 86400
    done = _desk(args).prune(max_bytes=args.max_bytes, older_than=days, dry_run=args.dry_run)
    if args.json:
        _dump(done)
        return 0
    for job_id in done["dropped"]:
        print(f"{'would drop' if args.dry_run else 'dropped'} record {job_id}")
    print(f"{len(done['dropped'])} records, {len(done['removed'])} files, {_size(done['freed'])} "
          f"{'would be freed (dry run)' if args.dry_run else 'freed'}"
          + (f"; {len(done['pinned'])} pinned kept" if done["pinned"] else ""))
    return 0


def cmd_cache(args) -> int:
    summary = _desk(args).cache_summary()
    if args.json:
        print(json.dumps(summary, indent=1))
        return 0
    for layer in summary["layers"]:
        results = layer.get("results")
        count = "?" if results is None else f"{results} result{'' if results == 1 else 's'}"
        print(f"{layer['name']:<12} {count:>12}  {_size(layer['bytes']):>9}  {layer['location']}")
    return 0


def _report(report, args, verb: str) -> int:
    if args.json:
        print(json.dumps(report.as_dict(), indent=1))
    else:
        print(f"{report.manifests} manifests, {report.objects} objects, {_size(report.bytes)}")
        for line in report.problems:
            print(f"problem: {line}")
        for rel in report.removed:
            print(f"{verb}: {rel}")
        if report.removed:
            print(f"{len(report.removed)} files, {_size(report.freed)} {verb}")
    return 1 if report.problems else 0


def cmd_group_add_to_index(args) -> int:
    desk = _desk(args)
    added = desk.group_add_to_index()
    if args.json:
        _dump({"added": added, "root": str(desk.root)})
    else:
        print(f"{added} group results newly listed in {desk.root}")
    return 0


def cmd_group_verify(args) -> int:
    report = _desk(args).group_verify(args.group, location=args.location, hashes=not args.quick)
    return _report(report, args, "checked")


def cmd_group_prune(args) -> int:
    days = None if args.older_than_days is None else args.older_than_days * 86400
    report = _desk(args).group_prune(args.group, location=args.location, older_than=days,
                                     dry_run=args.dry_run)
    _report(report, args, "would remove" if args.dry_run else "removed")
    return 0


def cmd_group_init(args) -> int:
    from jobdesk.groups.maintain import init_group
    policy = init_group(args.location, name=args.name, umask=int(args.umask, 8),
                        unix_group=args.unix_group)
    print(json.dumps(policy, indent=1))
    return 0


def _query_text(source: str | None) -> str:
    """The ADQL of ``check``/``estimate``: a file, or standard input for ``-`` or nothing."""
    if source in (None, "-"):
        return sys.stdin.read()
    try:
        with open(source, encoding="utf-8") as f:
            return f.read()
    except OSError as exc:
        raise _Usage(f"cannot read the query file {source}: {exc.strerror or exc}") from None


class _Usage(Exception):
    """An argument the command cannot use (exit status 2, like argparse's own refusals)."""


def cmd_tables(args) -> int:
    desk = _desk(args)
    tables = desk.tables(args.service, refresh=args.refresh, limit=args.limit)
    if args.json:
        print(json.dumps(tables, indent=1))
        return 0
    for t in tables:
        rows = "" if t.get("nrows") is None else f"{t['nrows']:>12,} rows  "
        print(f"{t['name']:<40} {t['ncols']:>4} cols  {rows}{(t.get('description') or '')[:60]}")
    return 0


def cmd_columns(args) -> int:
    columns = _desk(args).columns(args.service, args.table)
    if args.json:
        print(json.dumps(columns, indent=1))
        return 0
    for c in columns:
        print(f"{c['name']:<28} {c.get('datatype') or '':<8} {c.get('unit') or '':<10} "
              f"{c.get('ucd') or '':<24} {(c.get('description') or '')[:60]}")
    return 0


def cmd_find(args) -> int:
    hits = _desk(args).find(args.service, args.text, limit=args.limit)
    if args.json:
        print(json.dumps(hits, indent=1))
        return 0
    if not hits:
        print(f"nothing matches {args.text!r}")
    for h in hits:
        name = h["table"] if h["column"] is None else f"{h['table']}.{h['column']}"
        print(f"{name:<48} {h.get('unit') or '':<10} {h.get('ucd') or '':<24} "
              f"{(h.get('description') or '')[:50]}")
    return 0


def cmd_check(args) -> int:
    findings = _desk(args).check(args.service, _query_text(args.file))
    if args.json:
        print(json.dumps([f.to_dict() for f in findings], indent=1))
    elif not findings:
        print("no findings")
    else:
        print("\n".join(str(f) for f in findings))
    return 1 if any(f.severity == "error" for f in findings) else 0


def cmd_estimate(args) -> int:
    found = _desk(args).estimate(args.service, _query_text(args.file), maxrec=args.maxrec,
                                 fmt=args.format, time_limit=args.time_limit)
    print(json.dumps(found.to_dict(), indent=1) if args.json else found)
    return 0


def cmd_analyses(args) -> int:
    desk = _desk(args)
    if args.name:
        jobs = desk.analysis_jobs(args.name)
        if args.json:
            print(json.dumps([j.record for j in jobs], indent=1))
        else:
            for n, job in enumerate(jobs, 1):
                print(f"{n:>3}  {_row(job)}")
        return 0
    listed = desk.analyses()
    if args.json:
        print(json.dumps(listed, indent=1))
        return 0
    if not listed:
        print(f"no analyses recorded in {desk.root}")
    for a in listed:
        plans = f"  re-run plans: {', '.join(a['plans'])}" if a["plans"] else ""
        print(f"{a['name']:<32} {a['steps']:>3} steps  last {_when(a['updated'])}{plans}")
    return 0


def _renames(pairs) -> dict[str, str]:
    out = {}
    for pair in pairs or []:
        old, sep, new = pair.partition("=")
        if not sep or not old.strip() or not new.strip():
            raise KeyError(f"--rename takes OLD=NEW, got {pair!r}")
        out[old.strip()] = new.strip()
    return out


def cmd_rerun(args) -> int:
    plan = _desk(args).rerun(args.name, rename=_renames(args.rename), service=args.service,
                             into=args.into)
    if args.start or args.wait:
        plan.start()
    if args.wait:
        plan.wait()
    if args.json:
        print(json.dumps(plan.as_dict(), indent=1, default=str))
        return 1 if plan.failed and plan.finished else 0
    print(f"re-run plan {plan.id}: {plan.analysis} -> {plan.into}")
    for s in plan.steps:
        print(f"\n step {s['step']} [{s['state']}] old job {s['old_job']}"
              + (f", new job {s['new_job']}" if s.get("new_job") else ""))
        if s["old_adql"] != s["new_adql"]:
            print("   old: " + s["old_adql"].strip().replace("\n", "\n        "))
        print("   new: " + s["new_adql"].strip().replace("\n", "\n        "))
    for f in plan.failed:
        print(f"step {f['step']} failed: {f['error']}", file=sys.stderr)
    if not (args.start or args.wait):
        print("\nnothing ran yet: add --start (or call plan.start() in Python)")
    return 1 if plan.failed and plan.finished else 0


def cmd_compare(args) -> int:
    desk = _desk(args)
    result = desk.compare(desk.resolve(args.old), desk.resolve(args.new), key=args.key,
                          tolerance=args.tolerance)
    if args.report:
        result.report(args.report)
    if args.json:
        summary = result.as_dict()
        summary.pop("sky", None)
        print(json.dumps(summary, indent=1))
        return 0
    print(f"key {result.key}: {result.rows_old} old rows, {result.rows_new} new rows")
    print(f"  matched {result.matched}, added {result.added}, removed {result.removed}, "
          f"matched rows changed {result.changed_rows}")
    for name, change in result.columns.items():
        if change.changed:
            spread = (f"  median |diff| {change.median_abs:.6g}, largest {change.max_abs:.6g}"
                      if change.max_abs is not None else "")
            print(f"  {name:<24} {change.changed:>9} changed{spread}")
    if result.columns_added or result.columns_removed:
        print(f"  columns added: {', '.join(result.columns_added) or '-'}; "
              f"removed: {', '.join(result.columns_removed) or '-'}")
    for r in result.columns_retyped:
        print(f"  column {r['name']}: {r['type_old']} [{r['unit_old'] or ''}] -> "
              f"{r['type_new']} [{r['unit_new'] or ''}]")
    if args.report:
        print(f"report: {args.report}")
    return 0


def cmd_settings(args) -> int:
    settings = _settings(args)
    values = settings.as_dict()
    if args.json:
        _dump({"settings": values, "sources": dict(settings.sources)})
        return 0
    for name, value in values.items():
        shown = "none" if value in (None, [], {}) else value
        print(f"{name:<14} {shown}   ({settings.sources.get(name, 'default')})")
    return 0


def cmd_demo(args) -> int:
    from jobdesk.demo import run
    return run(root=args.root, rows=args.rows)


def parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="jobdesk", description=DESCRIPTION,
        epilog="A job ID may be shortened to any prefix that names one job. Exit status: 0 "
               "done, 1 no such job or a failed outcome, 2 bad arguments or a refusal.")
    p.add_argument("--root", help="cache root (default: $JOBDESK_HOME or the user cache dir)")
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")

    s = sub.add_parser("list", help="list job records, newest first")
    s.add_argument("--phase", action="append", type=_phase,
                   help="only this phase, any case (repeatable)")
    s.add_argument("--service", help="only jobs of this TAP service URL")
    s.add_argument("--text", help="search labels and queries")
    s.add_argument("--limit", type=int, default=50)
    s.add_argument("--json", action="store_true")
    s.set_defaults(func=cmd_list)

    s = sub.add_parser("show", help="one job: record and phase history")
    s.add_argument("id")
    s.add_argument("--json", action="store_true", help="the record, as list --json prints it")
    s.add_argument("--provenance", action="store_true", help="the provenance record (JSON)")
    s.set_defaults(func=cmd_show)

    s = sub.add_parser("submit", help="submit an ADQL query as an async job")
    s.add_argument("service")
    s.add_argument("adql")
    s.add_argument("--maxrec", type=int)
    s.add_argument("--label")
    s.add_argument("--refresh", action="store_true", help="run anew even if cached")
    s.add_argument("--wait", action="store_true", help="wait for the result")
    s.add_argument("--no-check", action="store_true", help="send it without the local check")
    s.add_argument("--json", action="store_true")
    s.set_defaults(func=cmd_submit)

    s = sub.add_parser("tables", help="a service's tables (cached; --refresh reads them again)")
    s.add_argument("service")
    s.add_argument("--refresh", action="store_true")
    s.add_argument("--limit", type=int)
    s.add_argument("--json", action="store_true")
    s.set_defaults(func=cmd_tables)

    s = sub.add_parser("columns", help="one table's columns: type, unit, UCD, description")
    s.add_argument("service")
    s.add_argument("table")
    s.add_argument("--json", action="store_true")
    s.set_defaults(func=cmd_columns)

    s = sub.add_parser("find", help="search table and column names, descriptions, units, UCDs")
    s.add_argument("service")
    s.add_argument("text")
    s.add_argument("--limit", type=int, default=50)
    s.add_argument("--json", action="store_true")
    s.set_defaults(func=cmd_find)

    s = sub.add_parser("check", help="check ADQL (a file, or - for stdin) against the "
                                     "service's metadata; exit status 1 on errors")
    s.add_argument("service")
    s.add_argument("file", nargs="?", default="-")
    s.add_argument("--json", action="store_true")
    s.set_defaults(func=cmd_check)

    s = sub.add_parser("estimate", help="predicted rows, bytes, limits and duration of ADQL "
                                        "(a file, or - for stdin)")
    s.add_argument("service")
    s.add_argument("file", nargs="?", default="-")
    s.add_argument("--maxrec", type=int)
    s.add_argument("--format", default="votable", help="response format the job would use")
    s.add_argument("--time-limit", type=float, default=10.0,
                   help="seconds the COUNT(*) may take before a sample is used instead")
    s.add_argument("--json", action="store_true")
    s.set_defaults(func=cmd_estimate)

    s = sub.add_parser("wait", help="wait for (resume) the given or all unfinished jobs")
    s.add_argument("ids", nargs="*")
    s.add_argument("--timeout", type=float)
    s.add_argument("--json", action="store_true", help="the records once done, as list --json")
    s.set_defaults(func=cmd_wait)

    for name, func, text in (
            ("abort", cmd_abort, "abort a job on its service"),
            ("resend", cmd_resend, "send a failed or unreached job's query again (new job)"),
            ("forget", cmd_forget, "drop a job record"),
            ("publish", cmd_publish, "share a finished, complete result with a group cache now"),
            ("pin", cmd_pin, "keep a job's record and files through every prune")):
        s = sub.add_parser(name, help=text)
        s.add_argument("id")
        s.add_argument("--json", action="store_true")
        s.set_defaults(func=func)
        if name == "publish":
            s.add_argument("--group", help="the group cache's name (default: the first "
                                           "read-write one)")
        if name == "pin":
            s.add_argument("--unpin", action="store_true", help="let prune drop it again")

    s = sub.add_parser("prune", help="shrink the personal cache: drop finished, unpinned "
                                     "records (oldest first) and files nothing uses")
    s.add_argument("--max-bytes", type=int, help="drop the oldest until the files fit this")
    s.add_argument("--older-than-days", type=float, help="drop records finished longer ago")
    s.add_argument("--dry-run", action="store_true", help="only say what would go")
    s.add_argument("--json", action="store_true")
    s.set_defaults(func=cmd_prune)

    s = sub.add_parser("export", help="write a result with provenance "
                                      "(.fits .vot .parquet .h5 .csv .ecsv)")
    s.add_argument("id")
    s.add_argument("path")
    s.add_argument("--allow-truncated", action="store_true")
    s.add_argument("--name", help="the table's path inside an HDF5 file (default jobdesk/<id>)")
    s.add_argument("--overwrite", action="store_true",
                   help="replace an existing file (or HDF5 table)")
    s.add_argument("--format", help="fits, votable, parquet, hdf5, csv or ecsv (default: by "
                                    "the path's suffix)")
    s.add_argument("--json", action="store_true", help="the paths written, as JSON")
    s.set_defaults(func=cmd_export)

    s = sub.add_parser("account", help="plain-text account of how a result was made")
    s.add_argument("id")
    s.add_argument("--json", action="store_true")
    s.set_defaults(func=cmd_account)

    s = sub.add_parser("provenance", help="where a result came from, as W3C PROV-JSON")
    s.add_argument("id")
    s.add_argument("--jobdesk", action="store_true",
                   help="jobdesk's own provenance record instead (as show --provenance)")
    s.add_argument("--json", action="store_true", help="accepted; the output is JSON anyway")
    s.set_defaults(func=cmd_provenance)

    s = sub.add_parser("cache", help="what the cache holds")
    s.add_argument("--json", action="store_true")
    s.set_defaults(func=cmd_cache)

    g = sub.add_parser("group", help="group caches: set up, verify, prune, add to the index")
    gsub = g.add_subparsers(dest="group_command", required=True,
                            metavar="{add-to-index,verify,prune,init}")
    s = gsub.add_parser("add-to-index", help="list every group result in your personal index")
    s.add_argument("--json", action="store_true")
    s.set_defaults(func=cmd_group_add_to_index)
    # The old name, hidden (no help= keeps it out of the listing): scripts that use it still run.
    s = gsub.add_parser("rebuild-index")
    s.add_argument("--json", action="store_true")
    s.set_defaults(func=cmd_group_add_to_index)
    for name, func, text in (("verify", cmd_group_verify, "check manifests, checksums, modes"),
                             ("prune", cmd_group_prune, "remove what no manifest references")):
        s = gsub.add_parser(name, help=text)
        s.add_argument("--group", help="the group's name in this desk's configuration")
        s.add_argument("--location", help="or the group's path or fsspec URL")
        s.add_argument("--json", action="store_true")
        s.set_defaults(func=func)
        if name == "verify":
            s.add_argument("--quick", action="store_true", help="sizes only, no sha256")
        else:
            s.add_argument("--dry-run", action="store_true", help="only say what would go")
            s.add_argument("--older-than-days", type=float,
                           help="also remove manifests published longer ago than this")
    s = gsub.add_parser("init", help="create a group cache (layout, group.json, modes)")
    s.add_argument("location")
    s.add_argument("--name")
    s.add_argument("--umask", default="0002", help="group policy umask (0002 or 0022)")
    s.add_argument("--unix-group", help="group that owns the files (default: the directory's)")
    s.add_argument("--json", action="store_true", help="accepted; the output is JSON anyway")
    s.set_defaults(func=cmd_group_init)

    s = sub.add_parser("analyses", help="list analyses, or one analysis's jobs in step order")
    s.add_argument("name", nargs="?")
    s.add_argument("--json", action="store_true")
    s.set_defaults(func=cmd_analyses)

    s = sub.add_parser("rerun", help="plan (and --start) an analysis again with renamed tables "
                                     "and columns, e.g. on a new data release")
    s.add_argument("name")
    s.add_argument("--rename", action="append", metavar="OLD=NEW",
                   help="schema.table=schema.table or column=column (repeatable)")
    s.add_argument("--service", help="run the steps on this TAP service instead")
    s.add_argument("--into", help="name of the new analysis (default NAME@DATE)")
    s.add_argument("--start", action="store_true", help="submit the steps now")
    s.add_argument("--wait", action="store_true", help="submit and wait for every step")
    s.add_argument("--json", action="store_true")
    s.set_defaults(func=cmd_rerun)

    s = sub.add_parser("compare", help="what changed between two results, row by row by key")
    s.add_argument("old")
    s.add_argument("new")
    s.add_argument("--key", help="key column (default: the one with UCD meta.id;meta.main)")
    s.add_argument("--tolerance", type=float, default=0.0,
                   help="absolute tolerance for floats (default 0: exact)")
    s.add_argument("--report", help="write an HTML report here (and a .json twin)")
    s.add_argument("--json", action="store_true")
    s.set_defaults(func=cmd_compare)

    s = sub.add_parser("settings", help="the settings this command would use, and where each "
                                        "came from (docs/settings.md)")
    s.add_argument("--json", action="store_true")
    s.set_defaults(func=cmd_settings)

    s = sub.add_parser("demo", help="the whole story, offline, on the embedded TAP service "
                                    "(in a throwaway desk unless --root is given)")
    s.add_argument("--rows", type=int, default=20000, help="size of the demo catalogue")
    s.set_defaults(func=cmd_demo)
    return p


def reference() -> str:
    """docs/cli.md: every command's usage and help, read from the parser itself."""
    top = parser()
    out = ["# The `jobdesk` command", "",
           "Generated from the parser by `python -m jobdesk.cli --reference > docs/cli.md`; "
           "tests/test_cli.py fails when this page and the code differ.", "",
           top.description, "", top.epilog, "", "```", _usage(top), "```", ""]

    def walk(p: argparse.ArgumentParser, path: str, depth: int) -> None:
        for action in p._actions:
            if not isinstance(action, argparse._SubParsersAction):
                continue
            helps = {c.dest: c.help for c in action._choices_actions}
            for name, child in action.choices.items():
                if name not in helps:       # an old name kept hidden for scripts
                    continue
                out.extend([f"{'#' * depth} `{path} {name}`", "",
                            helps[name][0].upper() + helps[name][1:] + ".", "",
                            "```", _usage(child), "```", ""])
                walk(child, f"{path} {name}", depth + 1)

    walk(top, "jobdesk", 2)
    return "\n".join(out).rstrip() + "\n"


def _usage(p: argparse.ArgumentParser) -> str:
    """A parser's help without the terminal's width getting a say (fixed at 100 columns)."""
    p.formatter_class = lambda prog: argparse.HelpFormatter(prog, width=100)
    return p.format_help().rstrip()


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else list(argv)
    if argv == ["--reference"]:
        sys.stdout.write(reference())
        return 0
    try:
        args = parser().parse_args(argv)
    except SystemExit as exc:   # --help (0) or a bad argument (2, message already printed)
        return exc.code if isinstance(exc.code, int) else EXIT_USAGE
    try:
        return args.func(args)
    except JobNotFound as exc:  # JobIdAmbiguous too: the id does not name one job
        print(f"jobdesk: {exc}", file=sys.stderr)
        return EXIT_NOT_FOUND
    except JobdeskError as exc:
        print(f"jobdesk: {exc}", file=sys.stderr)
        return EXIT_USAGE
    except _Usage as exc:
        print(f"jobdesk: {exc}", file=sys.stderr)
        return EXIT_USAGE
    except KeyError as exc:
        print(f"jobdesk: {exc.args[0]}", file=sys.stderr)
        return EXIT_USAGE


if __name__ == "__main__":
    sys.exit(main())

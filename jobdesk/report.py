"""A comparison as a self-contained HTML page with inline SVG figures, and its JSON twin.

Why its own module: the report is what a person reads before trusting a new release, and what a
script reads (the JSON) to decide.  The page needs nothing but a browser: no script, no external
file; figures are drawn here as SVG (sky positions of added and removed rows, histograms of the
differences of every numeric column that changed).  Both results' provenance records are in both
files.  Written whole to a temporary file and renamed, like every file jobdesk writes.
"""

from __future__ import annotations

import datetime as _dt
import html
import json
import os
import tempfile
from pathlib import Path
from typing import TYPE_CHECKING

if TYPE_CHECKING:   # types only: compare calls this module, never the other way round
    from jobdesk.compare import Comparison


STYLE = """
body{font:14px/1.45 system-ui,sans-serif;margin:2em auto;max-width:72em;color:#1d2430}
h1{font-size:1.5em}h2{font-size:1.2em;margin-top:2em;border-bottom:1px solid #ccd}
table{border-collapse:collapse;margin:.5em 0}
td,th{padding:.2em .7em;border-bottom:1px solid #e4e6ee;text-align:right}th{background:#f2f4f8}td.l,th.l{text-align:left}
.figs{display:flex;flex-wrap:wrap;gap:1em}figure{margin:0}figcaption{font-size:.85em;color:#556}
pre{background:#f6f7fa;padding:.6em;overflow:auto;font-size:.85em}
.num{font-variant-numeric:tabular-nums}.warn{color:#a33}
"""
ADDED, REMOVED, BAR = "#1b7f5b", "#c0392b", "#3b5ba5"


def _e(value) -> str:
    return html.escape("" if value is None else str(value), quote=True)


def _fmt(value) -> str:
    if value is None:
        return "-"
    if isinstance(value, float):
        return f"{value:.6g}"
    return f"{value:,}" if isinstance(value, int) else str(value)


def sky_svg(sky: dict, width: int = 560, height: int = 300) -> str:
    """RA (increasing to the left, as on the sky) against Dec, added and removed rows."""
    pad = 34
    w, h = width - 2 * pad, height - 2 * pad

    def x(ra):
        return pad + (360.0 - ra) / 360.0 * w

    def y(dec):
        return pad + (90.0 - dec) / 180.0 * h

    parts = [f'<svg xmlns="http://www.w3.org/2000/svg" width="{width}" height="{height}" '
             f'viewBox="0 0 {width} {height}" role="img" aria-label="sky positions">',
             f'<rect x="{pad}" y="{pad}" width="{w}" height="{h}" fill="#fbfbfd" stroke="#99a"/>']
    for ra in (0, 90, 180, 270, 360):
        parts.append(f'<text x="{x(ra):.1f}" y="{height - pad + 14}" font-size="10" '
                     f'text-anchor="middle">{ra}</text>')
    for dec in (-90, -45, 0, 45, 90):
        parts.append(f'<text x="{pad - 4}" y="{y(dec) + 3:.1f}" font-size="10" '
                     f'text-anchor="end">{dec:+d}</text>')
    parts.append(f'<text x="{width / 2}" y="{height - 4}" font-size="11" text-anchor="middle">'
                 f'{_e(sky["ra"])} [deg]</text>')
    parts.append(f'<text x="10" y="{height / 2}" font-size="11" text-anchor="middle" '
                 f'transform="rotate(-90 10 {height / 2})">{_e(sky["dec"])} [deg]</text>')
    shown = sum(len((sky.get(k) or ([], []))[0]) for k in ("added", "removed"))
    radius = 3.0 if shown < 300 else 1.6          # few points: big enough to see
    for kind, colour in (("removed", REMOVED), ("added", ADDED)):
        ras, decs = sky.get(kind) or ([], [])
        dots = "".join(f'<circle cx="{x(r):.1f}" cy="{y(d):.1f}" r="{radius}"/>'
                       for r, d in zip(ras, decs) if r is not None and d is not None)
        parts.append(f'<g fill="{colour}" fill-opacity="0.75"><title>{kind}</title>{dots}</g>')
    parts.append(f'<g font-size="11"><circle cx="{pad + 8}" cy="{pad - 14}" r="4" fill="{ADDED}"/>'
                 f'<text x="{pad + 16}" y="{pad - 10}">added</text>'
                 f'<circle cx="{pad + 78}" cy="{pad - 14}" r="4" fill="{REMOVED}"/>'
                 f'<text x="{pad + 86}" y="{pad - 10}">removed</text></g></svg>')
    return "".join(parts)


def histogram_svg(name: str, hist: dict, width: int = 300, height: int = 170) -> str:
    """Counts of (new - old) over the rows whose value moved; unchanged rows are left out."""
    edges, counts = hist["edges"], hist["counts"]
    pad_l, pad_b, pad_t = 40, 28, 10
    w, h = width - pad_l - 8, height - pad_b - pad_t
    top = max(counts) or 1
    bar = w / len(counts)
    parts = [f'<svg xmlns="http://www.w3.org/2000/svg" width="{width}" height="{height}" '
             f'viewBox="0 0 {width} {height}" role="img" aria-label="differences of {_e(name)}">',
             f'<line x1="{pad_l}" y1="{pad_t + h}" x2="{pad_l + w}" y2="{pad_t + h}" '
             'stroke="#99a"/>']
    for i, c in enumerate(counts):
        bh = h * c / top
        parts.append(f'<rect x="{pad_l + i * bar:.1f}" y="{pad_t + h - bh:.1f}" '
                     f'width="{max(bar - 0.5, 0.5):.1f}" height="{bh:.1f}" fill="{BAR}">'
                     f'<title>{edges[i]:.4g} .. {edges[i + 1]:.4g}: {c}</title></rect>')
    parts.append(f'<text x="{pad_l}" y="{height - 12}" font-size="10">{edges[0]:.3g}</text>'
                 f'<text x="{pad_l + w}" y="{height - 12}" font-size="10" text-anchor="end">'
                 f'{edges[-1]:.3g}</text>'
                 f'<text x="{pad_l + w / 2}" y="{height - 2}" font-size="10" text-anchor="middle">'
                 f'new - old</text>'
                 f'<text x="{pad_l - 4}" y="{pad_t + 8}" font-size="10" '
                 f'text-anchor="end">{top}</text>'
                 "</svg>")
    return "".join(parts)


def _section(c: Comparison, title: str) -> str:
    d = c.as_dict()
    out = [f"<h2>{_e(title)}</h2>"]
    out.append("<table><tr><th class=l>old job</th><td class=l>"
               f"{_e(c.old.get('job'))}</td></tr><tr><th class=l>new job</th><td class=l>"
               f"{_e(c.new.get('job'))}</td></tr><tr><th class=l>key</th><td class=l>{_e(c.key)}"
               f"</td></tr><tr><th class=l>float tolerance</th><td class=l>{_fmt(c.tolerance)}"
               "</td></tr></table>")
    out.append("<table class=num><tr><th>rows old</th><th>rows new</th><th>matched</th>"
               "<th>added</th><th>removed</th><th>matched rows changed</th></tr><tr>"
               + "".join(f"<td>{_fmt(v)}</td>" for v in (c.rows_old, c.rows_new, c.matched,
                                                         c.added, c.removed, c.changed_rows))
               + "</tr></table>")
    if c.columns_added or c.columns_removed or c.columns_retyped:
        out.append("<p>")
        if c.columns_added:
            out.append(f"Columns added: <b>{_e(', '.join(c.columns_added))}</b>. ")
        if c.columns_removed:
            out.append(f"Columns removed: <b>{_e(', '.join(c.columns_removed))}</b>. ")
        for r in c.columns_retyped:
            out.append(f"Column <b>{_e(r['name'])}</b> changed from {_e(r['type_old'])} "
                       f"[{_e(r['unit_old'] or '')}] to {_e(r['type_new'])} "
                       f"[{_e(r['unit_new'] or '')}]. ")
        out.append("</p>")
    out.append("<table class=num><tr><th class=l>column</th><th>rows changed</th>"
               "<th>median |new - old|</th><th>largest |new - old|</th></tr>")
    for name, col in d["columns"].items():
        changed = col["changed"] if col["compared"] else "not compared"
        out.append(f"<tr><td class=l>{_e(name)}</td><td>{_fmt(changed)}</td>"
                   f"<td>{_fmt(col['median_abs'])}</td><td>{_fmt(col['max_abs'])}</td></tr>")
    out.append("</table>")
    figs = []
    if c.sky:
        figs.append(f"<figure>{sky_svg(c.sky)}<figcaption>Sky positions of added and removed "
                    f"rows (at most {len(c.sky.get('added', [[]])[0]) or 0} and "
                    f"{len(c.sky.get('removed', [[]])[0]) or 0} shown)</figcaption></figure>")
    for name, col in c.columns.items():
        if col.histogram:
            figs.append(f"<figure>{histogram_svg(name, col.histogram)}<figcaption>{_e(name)}: "
                        f"{col.changed:,} rows moved ({col.histogram['zero']:,} identical, not "
                        "drawn)</figcaption></figure>")
    if figs:
        out.append('<div class="figs">' + "".join(figs) + "</div>")
    for side in ("old", "new"):
        prov = getattr(c, side).get("provenance")
        if prov:
            out.append(f"<details><summary>Provenance of the {side} result</summary><pre>"
                       f"{_e(json.dumps(prov, indent=1, default=str))}</pre></details>")
    return "".join(out)


def write_report(comparisons: list[Comparison], path: Path, *, titles: list[str] | None = None,
                 heading: str = "What changed between two results", extra: dict | None = None
                 ) -> tuple[Path, Path]:
    """Write ``path`` (HTML) and ``path`` with suffix ``.json``; return both paths."""
    path = Path(path)
    json_path = path.with_suffix(".json") if path.suffix.lower() != ".json" else \
        path.with_name(path.name + ".json")
    titles = titles or [f"{c.old.get('job')} -> {c.new.get('job')}" for c in comparisons]
    made = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
    body = [f"<!DOCTYPE html><html lang=en><head><meta charset=utf-8><title>{_e(heading)}"
            f"</title><style>{STYLE}</style></head><body><h1>{_e(heading)}</h1>"
            f"<p>Written by jobdesk at {made}. Rows are matched by their key; values equal when "
            "both are missing or both present and equal (floats within the tolerance).</p>"]
    for problem in (extra or {}).get("problems", []):
        body.append(f"<p class=warn>{_e(problem)}</p>")
    for c, title in zip(comparisons, titles):
        body.append(_section(c, title))
    body.append("</body></html>")
    twin = {"made": made, "heading": heading, **(extra or {}),
            "comparisons": [dict(c.as_dict(), title=t) for c, t in zip(comparisons, titles)]}
    _atomic(path, "".join(body))
    _atomic(json_path, json.dumps(twin, indent=1, allow_nan=False, default=str))
    return path, json_path


def _atomic(path: Path, text: str) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise

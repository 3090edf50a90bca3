"""``python -m benchmarks.report RUN.json``: a run's table and machine as Markdown, for
docs/performance.md (so the page shows exactly what a run wrote, not a retyped copy)."""

from __future__ import annotations

import json
import sys
from pathlib import Path

from benchmarks.common import Row, table


def markdown(report: dict) -> str:
    rows = [Row(**r) for case in report["cases"].values() for r in case.get("rows", [])]
    m = report["machine"]
    lines = [table(rows, markdown=True), "",
             f"Run of {report['started']} ({'quick' if report['quick'] else 'full'}, "
             f"{report['seconds']:.0f} s) at commit `{m.get('commit')}` on: {m.get('cpu')}, "
             f"{m.get('cores')} cores, {m.get('ram_gb')} GB RAM; Python {m.get('python')}, "
             f"pyarrow {m.get('pyarrow')}, pyvo {m.get('pyvo')}, astropy {m.get('astropy')}, "
             f"numpy {m.get('numpy')}, sqlglot {m.get('sqlglot')}, curl {m.get('curl')}; "
             f"{m.get('platform')}."]
    failed = [name for name, case in report["cases"].items() if "error" in case]
    if failed:
        lines.append(f"\nFailed cases: {', '.join(failed)}.")
    return "\n".join(lines)


def main() -> None:
    print(markdown(json.loads(Path(sys.argv[1]).read_text())))


if __name__ == "__main__":
    main()

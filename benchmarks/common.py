"""What every case shares: the run's context, result rows, timing and the machine description.

A case returns ``Row``s (one measured figure each, with its baseline, the ratio between them and
the target it is read against) plus free-form details for the JSON.  Services and the big
catalogue are started once per run and shared through the ``Context``, so a case that needs a
large result does not build the catalogue again.
"""

from __future__ import annotations

import contextlib
import os
import platform
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any, Callable

MB = 1024 * 1024


def cache_dir() -> Path:
    """Where built catalogues are kept between runs (a 1M-row catalogue takes ~20 s to build)."""
    root = os.environ.get("JOBDESK_BENCH_CACHE") or Path.home() / ".cache" / "jobdesk-bench"
    path = Path(root)
    path.mkdir(parents=True, exist_ok=True)
    return path


# Each case's number and its name (``--only`` takes either); the table prints both.
CASE_NAMES = {
    "case1": "cache-hit",
    "case2": "download-memory",
    "case3": "throughput",
    "case4": "completion",
    "case5": "index-scale",
    "case6": "keys",
    "case7": "shaping",
    "case8": "compare",
    "case9": "rerun",
    "case10": "first-fetch",
    "case11": "quick-look",
}

# A comparison word and its opposite: a ratio below 1 is read the other way round, so that
# "0.0282x sooner" prints as "35.5x later".
OPPOSITES = {"faster": "slower", "sooner": "later", "fewer": "more", "less memory": "more memory"}
OPPOSITES.update({b: a for a, b in OPPOSITES.items()})


def ratio_words(ratio: float | None, means: str | None) -> str:
    """``62x faster``, ``35.5x later``, ``1.0x the floor's time``: the ratio as it reads right.

    A comparison (faster, sooner, fewer, less memory) is always said with a factor of at least
    1, in the direction that is true; a share ("the floor's time", "curl's throughput") is said
    as it is."""
    if ratio is None:
        return "-"
    means = means or ""
    if means in OPPOSITES and 0 < ratio < 1:
        ratio, means = 1 / ratio, OPPOSITES[means]
    if means in OPPOSITES and round(ratio, 2) == 1:
        return "about the same"
    return f"{number(ratio)}x {means}".strip()


def case_label(case: str) -> str:
    """``case4 completion``."""
    name = CASE_NAMES.get(case)
    return f"{case} {name}" if name else case


@dataclass
class Row:
    """One measured figure against its baseline.

    ``ratio`` with ``ratio_means`` reads as "62x faster" (baseline time / jobdesk time) or
    "1.2x the floor's time" (jobdesk time / floor time); below 1, a comparison is printed the
    other way round (see ``ratio_words``). ``met`` is None where no target applies.
    """

    case: str
    what: str
    figure: float
    unit: str
    baseline_name: str | None = None
    baseline: float | None = None
    ratio: float | None = None
    ratio_means: str | None = None
    target: str | None = None
    met: bool | None = None

    def to_json(self) -> dict:
        return asdict(self)


@dataclass
class CaseResult:
    rows: list[Row]
    details: dict[str, Any] = field(default_factory=dict)
    seconds: float = 0.0


class Context:
    """Settings of this run plus the shared, lazily started services."""

    def __init__(self, *, quick: bool, keep: bool = False, log: Callable[[str], None] = print):
        self.quick = quick
        self.cache = cache_dir()
        self.work = Path(tempfile.mkdtemp(prefix="jobdesk-bench-"))
        self.keep = keep
        self.log = log
        self.shared: dict[str, Any] = {}   # results one case leaves for another (job URLs)
        self._stack = contextlib.ExitStack()
        self._big_tap = None

    @property
    def catalogue_rows(self) -> int:
        return 100_000 if self.quick else 1_000_000

    def big_tap(self):
        """The service over the large catalogue, as a child process (its CPU work never shares
        the benchmark's interpreter), with MAXREC and execution limits raised for big results."""
        if self._big_tap is None:
            from jobdesk.localtap import spawn

            rows = self.catalogue_rows
            state = self.cache / f"tap-{rows}"
            started = time.perf_counter()
            self._big_tap = spawn(state=state, rows=rows, max_rec=20_000_000,
                                  execution_duration=0, max_running=8, destruction=6 * 3600,
                                  startup_timeout=300)
            self._stack.callback(self._big_tap.stop)
            self.log(f"  service over {rows:,} rows ready in {time.perf_counter() - started:.1f} s"
                     f" ({self._big_tap.url})")
        return self._big_tap

    def forget_later(self, job_url: str) -> None:
        """Delete a big job on the service when the run ends (the service state is cached
        between runs; its result files should not pile up there)."""
        def delete() -> None:
            from jobdesk.remote import Remote

            try:
                Remote(job_url.rsplit("/async/", 1)[0], attempts=1).delete(job_url)
            except Exception:  # noqa: BLE001 - cleanup only; the destruction time comes anyway
                pass
        self._stack.callback(delete)

    def enter(self, cm):
        return self._stack.enter_context(cm)

    def callback(self, fn, *args):
        self._stack.callback(fn, *args)

    def close(self) -> None:
        self._stack.close()
        if not self.keep:
            shutil.rmtree(self.work, ignore_errors=True)


def timed(fn: Callable[[], Any]) -> tuple[float, Any]:
    started = time.perf_counter()
    value = fn()
    return time.perf_counter() - started, value


def repeat(fn: Callable[[], Any], times: int, *, warmup: int = 0) -> list[float]:
    """Seconds of ``times`` calls of ``fn`` (after ``warmup`` untimed ones)."""
    for _ in range(warmup):
        fn()
    return [timed(fn)[0] for _ in range(times)]


def median(values) -> float:
    return float(statistics.median(values))


def faster(baseline: float, ours: float) -> float:
    """How many times less time (or memory) ours took than the baseline."""
    return baseline / ours if ours > 0 else float("inf")


def run_capture(args: list[str], *, env: dict | None = None, timeout: float = 1800) -> str:
    done = subprocess.run(args, capture_output=True, text=True, env=env, timeout=timeout)
    if done.returncode != 0:
        raise RuntimeError(f"{' '.join(args[:4])} ... failed ({done.returncode}):\n"
                           f"{done.stderr[-3000:]}")
    return done.stdout


# --- the machine ------------------------------------------------------------------------------


def machine() -> dict:
    """What the figures were measured on (they only compare within one run)."""
    info: dict[str, Any] = {"python": platform.python_version(), "platform": platform.platform(),
                            "cores": os.cpu_count()}
    try:
        out = subprocess.run(["lscpu"], capture_output=True, text=True, timeout=10).stdout
        for line in out.splitlines():
            name, _, value = line.partition(":")
            if name.strip() == "Model name":
                info["cpu"] = value.strip()
    except (OSError, subprocess.SubprocessError):
        pass
    try:
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemTotal:"):
                info["ram_gb"] = round(int(line.split()[1]) / 1024 / 1024, 1)
    except OSError:
        pass
    for module in ("pyarrow", "pyvo", "astropy", "numpy", "sqlglot", "requests", "tornado"):
        try:
            info[module] = __import__(module).__version__
        except Exception:  # noqa: BLE001 - a missing version is not worth failing over
            info[module] = None
    try:
        info["curl"] = subprocess.run(["curl", "--version"], capture_output=True, text=True,
                                      timeout=10).stdout.split()[1]
    except (OSError, subprocess.SubprocessError, IndexError):
        info["curl"] = None
    try:
        here = Path(__file__).resolve().parent.parent
        info["commit"] = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=here,
                                        capture_output=True, text=True, timeout=10).stdout.strip()
    except (OSError, subprocess.SubprocessError):
        info["commit"] = None
    info["python_executable"] = sys.executable
    return info


# --- the table --------------------------------------------------------------------------------


def number(value: float | None, unit: str = "") -> str:
    if value is None:
        return "-"
    if value != value or value in (float("inf"), float("-inf")):
        return str(value)
    magnitude = abs(value)
    if unit == "s" and magnitude < 1:
        return f"{value * 1000:.3g} ms"
    if magnitude >= 1000:
        text = f"{value:,.0f}"
    elif magnitude >= 100:
        text = f"{value:.0f}"
    elif magnitude >= 10:
        text = f"{value:.1f}"
    else:
        text = f"{value:.3g}"
    return f"{text} {unit}".strip()


def table(rows: list[Row], *, markdown: bool = False) -> str:
    """The rows as a fixed-width (or Markdown) table: case, what, figure, baseline, ratio,
    target, met?"""
    head = ["case", "what", "jobdesk", "baseline", "ratio", "target", "met?"]
    body = []
    for r in rows:
        base = "-" if r.baseline is None else f"{number(r.baseline, r.unit)} ({r.baseline_name})"
        ratio = ratio_words(r.ratio, r.ratio_means)
        met = {True: "yes", False: "NO", None: "-"}[r.met]
        body.append([case_label(r.case), r.what, number(r.figure, r.unit), base, ratio, r.target or "-", met])
    if markdown:
        lines = ["| " + " | ".join(head) + " |", "|" + "---|" * len(head)]
        lines += ["| " + " | ".join(cell.replace("|", "\\|") for cell in row) + " |"
                  for row in body]
        return "\n".join(lines)
    widths = [max(len(str(x)) for x in col) for col in zip(head, *body)]
    fmt = "  ".join(f"{{:{w}}}" for w in widths)
    lines = [fmt.format(*head), fmt.format(*("-" * w for w in widths))]
    lines += [fmt.format(*row) for row in body]
    return "\n".join(lines)

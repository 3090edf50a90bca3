"""Showing a job's progress while ``Job.wait()`` blocks: a card in a notebook, a line in a terminal.

Why a separate module: the Desk decides *what* happened to a job; this module only decides how
to show it wherever the code runs, and how the user can ask to stop.

API (what ``Job.wait`` calls)::

    progress = Progress.for_environment(job_label, job_id=None)   # card, line or nothing
    progress.update(phase, elapsed_seconds, rows, note="")         # as often as you like
    progress.transfer(done_bytes, total_bytes_or_None)             # while the result downloads
    if progress.cancelled: ...                                     # the user asked to abort
    progress.close(final_phase)                                    # once, when waiting ends

``for_environment`` picks:

* ``CardProgress`` inside a Jupyter kernel with ipywidgets: a small card with the label, a
  phase badge, elapsed time (ticking every second on a daemon thread, so it moves even while
  the Desk waits on the service), rows, a note and an "Abort job" button. A bar shows only
  progress that is known (bytes of a download whose length the service gave); otherwise a
  pulse says "working" without pretending to a percentage. The badge pairs a shape with its
  colour, as the sidebar does, and its colours pass WCAG 2.1 AA contrast in every theme.
  The kernel's main thread never blocks on the card, so an interrupt (``Kernel > Interrupt``)
  still stops ``wait()`` at once. While a cell runs, the kernel cannot receive the button's
  click, so the button also carries the job id in its CSS classes: the jobdesk lab extension
  sees the click in the browser and aborts the job through the server's REST API; ``wait()``
  then reads ABORTED from the index and stops. Where the kernel does get the click (an async
  cell, or no lab extension) ``cancelled`` becomes True and ``wait()`` aborts the job itself.
* ``LineProgress`` when stderr is a terminal: one line rewritten in place.
* ``LogProgress`` otherwise (pipes, CI logs): one line per phase change, nothing in between.

``cancel_hooks`` is a list of callables run once when the user presses "Abort job".
"""

from __future__ import annotations

import sys
import threading
import time
from collections.abc import Callable

from jobdesk import phases



def format_elapsed(seconds: float) -> str:
    """``42 s``, ``3 min 07 s``, ``2 h 05 min``: short enough for a badge or a status line."""
    seconds = max(0, int(seconds))
    if seconds < 60:
        return f"{seconds} s"
    minutes, seconds = divmod(seconds, 60)
    if minutes < 60:
        return f"{minutes} min {seconds:02d} s"
    hours, minutes = divmod(minutes, 60)
    return f"{hours} h {minutes:02d} min"


def _in_kernel() -> bool:
    shell = sys.modules.get("IPython")
    if shell is None:
        return False
    try:
        ip = shell.get_ipython()
    except AttributeError:
        return False
    return ip is not None and getattr(ip, "kernel", None) is not None


class Progress:
    """Base class: remembers the state, runs cancel hooks; shows nothing."""

    def __init__(self, label: str, job_id: str | None = None):
        self.label = label
        self.job_id = job_id
        self.phase: str | None = None
        self.elapsed = 0.0
        self.rows: int | None = None
        self.note = ""
        self.closed = False
        self.cancel_hooks: list[Callable[[], None]] = []
        self._cancelled = threading.Event()

    @staticmethod
    def for_environment(label: str, job_id: str | None = None) -> "Progress":
        """The right display for where the code runs (see the module docstring)."""
        if _in_kernel():
            try:
                return CardProgress(label, job_id)
            except ImportError:  # no ipywidgets in this kernel
                pass
        if hasattr(sys.stderr, "isatty") and sys.stderr.isatty():
            return LineProgress(label, job_id)
        return LogProgress(label, job_id)

    @property
    def cancelled(self) -> bool:
        return self._cancelled.is_set()

    def cancel(self) -> None:
        """The user asked to stop the job: remember it and run the hooks once."""
        if self._cancelled.is_set():
            return
        self._cancelled.set()
        for hook in self.cancel_hooks:
            hook()

    def update(self, phase: str, elapsed: float, rows: int | None, note: str = "") -> None:
        # An outage starting or ending is news too (a log shows it, not only phase changes).
        changed = phase != self.phase or bool(note) != bool(self.note)
        self.phase, self.elapsed, self.rows, self.note = phase, elapsed, rows, note
        self._show(changed)

    TRANSFER_EVERY = 0.25   # seconds between two shown download figures (the last always shows)

    def transfer(self, done: int, total: int | None) -> None:
        """Bytes of the result downloaded so far, and its full length when the service said."""
        now = time.monotonic()
        self.downloaded, self.total = done, total
        last = total is not None and done >= total
        if not last and now - self._transfer_shown < self.TRANSFER_EVERY:
            return
        self._transfer_shown = now
        self._show_transfer()

    downloaded: int | None = None
    total: int | None = None
    _transfer_shown = 0.0

    def transfer_words(self) -> str:
        """``downloading 1.2 MB of 3.4 MB (35 %)``, or without the total when it is unknown."""
        if self.downloaded is None:
            return ""
        if self.total:
            share = min(100, int(100 * self.downloaded / self.total))
            return (f"downloading {format_bytes(self.downloaded)} of "
                    f"{format_bytes(self.total)} ({share} %)")
        return f"downloading {format_bytes(self.downloaded)}"

    def close(self, final_phase: str | None = None) -> None:
        if self.closed:
            return
        self.closed = True
        if final_phase:
            self.phase = final_phase
        self._finish()

    def summary(self) -> str:
        """``EXECUTING · 12 s · 3,000 rows · note`` — the words every display shows."""
        parts = [self.phase or "…", format_elapsed(self.elapsed)]
        if self.rows is not None:
            parts.append(f"{self.rows:,} rows")
        if self.note:
            parts.append(self.note)
        if self.downloaded is not None and self.phase not in phases.TERMINAL:
            parts.append(self.transfer_words())
        return " · ".join(parts)

    def _show(self, phase_changed: bool) -> None:
        pass

    def _show_transfer(self) -> None:
        pass

    def _finish(self) -> None:
        pass


class LogProgress(Progress):
    """One line per phase change, for logs and pipes."""

    def __init__(self, label: str, job_id: str | None = None, stream=None):
        super().__init__(label, job_id)
        self.stream = stream or sys.stderr

    def _show(self, phase_changed: bool) -> None:
        if phase_changed:
            print(f"jobdesk: {self.label[:60]}: {self.summary()}", file=self.stream, flush=True)

    def _finish(self) -> None:
        print(f"jobdesk: {self.label[:60]}: {self._closing()}", file=self.stream, flush=True)

    def _closing(self) -> str:
        if self.phase in phases.TERMINAL:
            return self.summary()
        return f"stopped watching at {self.phase}; the job goes on (its record is kept)"


class LineProgress(LogProgress):
    """One status line rewritten in place on a terminal."""

    def _show_transfer(self) -> None:
        self._show(False)

    def _show(self, phase_changed: bool) -> None:
        text = f"jobdesk: {self.label[:40]}: {self.summary()}"
        self.stream.write("\r" + text[:110].ljust(110))
        self.stream.flush()

    def _finish(self) -> None:
        self.stream.write("\r" + f"jobdesk: {self.label[:40]}: {self._closing()}"[:110].ljust(110)
                          + "\n")
        self.stream.flush()


class CardProgress(Progress):
    """An ipywidgets card shown in the notebook output (see the module docstring)."""

    TICK_SECONDS = 1.0

    def __init__(self, label: str, job_id: str | None = None):
        import ipywidgets as w
        from IPython.display import display

        super().__init__(label, job_id)
        self._started = time.monotonic()
        self._lock = threading.Lock()
        self.title = w.HTML(value=_html_text(label[:120]))
        self.title.add_class("jobdesk-card-title")
        self.badge = w.HTML(value=_badge("…"))
        self.clock = w.Label(value="0 s")
        self.count = w.Label(value="")
        self.message = w.Label(value="")
        # Known progress only (a download of known length); hidden until there is some.
        self.bar = w.IntProgress(value=0, min=0, max=100, bar_style="info",
                                 layout=w.Layout(width="160px", display="none"))
        self.amount = w.Label(value="", layout=w.Layout(display="none"))
        # Unknown progress: a pulse that moves without claiming a percentage.
        self.pulse = w.HTML(value=_PULSE)
        self.button = w.Button(description="Abort job", icon="stop", button_style="warning",
                               tooltip="Abort this job on its service",
                               layout=w.Layout(width="auto"))
        self.button.add_class("jobdesk-cancel")
        if job_id:
            self.button.add_class(f"jobdesk-job-{job_id}")
        self.button.on_click(lambda _button: self.cancel())
        for part in (self.badge, self.clock, self.count, self.bar, self.amount, self.pulse):
            part.layout.margin = "0 12px 0 0"
        row = w.HBox([self.badge, self.clock, self.count, self.pulse, self.bar, self.amount,
                      self.button], layout=w.Layout(align_items="center"))
        self.card = w.VBox([self.title, row, self.message],
                           layout=w.Layout(border="1px solid var(--jp-border-color2, #ccc)",
                                           padding="6px 10px", margin="4px 0",
                                           width="fit-content"))
        self.card.add_class("jobdesk-card")
        display(self.card)
        self._stop = threading.Event()
        self._ticker = threading.Thread(target=self._tick, name="jobdesk-card", daemon=True)
        self._ticker.start()

    def cancel(self) -> None:
        self.button.disabled = True
        self.button.description = "Aborting…"
        super().cancel()

    def _tick(self) -> None:
        # The elapsed time keeps moving between the Desk's updates; runs off the main thread,
        # so the kernel stays interruptible. Nothing else moves on its own: the bar shows
        # only real figures, and the pulse is a CSS animation.
        while not self._stop.wait(self.TICK_SECONDS):
            with self._lock:
                base = self.elapsed + (time.monotonic() - self._updated_at)
                self.clock.value = format_elapsed(base)

    def _show(self, phase_changed: bool) -> None:
        with self._lock:
            self._updated_at = time.monotonic()
            if phase_changed:
                self.badge.value = _badge(self.phase or "…")
            self.clock.value = format_elapsed(self.elapsed)
            self.count.value = "" if self.rows is None else f"{self.rows:,} rows"
            self.message.value = self.note

    def _show_transfer(self) -> None:
        with self._lock:
            self.amount.value = self.transfer_words()
            self.amount.layout.display = None
            if self.total:   # known length: the bar is the share of bytes received
                self.bar.value = min(100, int(100 * (self.downloaded or 0) / self.total))
                self.bar.layout.display = None
                self.pulse.layout.display = "none"

    _updated_at = 0.0

    def _finish(self) -> None:
        self._stop.set()
        with self._lock:
            self.badge.value = _badge(self.phase or "…")
            for part in (self.bar, self.amount, self.pulse, self.button):
                part.layout.display = "none"
            self.clock.value = format_elapsed(self.elapsed)
            self.count.value = "" if self.rows is None else f"{self.rows:,} rows"
            if self.phase not in phases.TERMINAL:
                self.message.value = (f"Stopped watching at {self.phase}; the job goes on and "
                                      "its record is kept.")


def format_bytes(n: int) -> str:
    """``812 B``, ``1.2 MB``: decimal units, as the sidebar writes them."""
    value = float(n)
    for unit in ("B", "kB", "MB", "GB"):
        if value < 1000:
            return f"{int(value)} B" if unit == "B" else f"{value:.1f} {unit}"
        value /= 1000
    return f"{value:.1f} TB"


# --- the phase badge: a family per phase, each a shape and a colour pair --------------------------
#
# Fixed colours, not theme variables: the badge draws its own background, so its text contrast
# is the same in light and dark themes and can be checked (tests/server/test_progress.py
# computes the WCAG 2.1 contrast ratio of every pair; AA asks 4.5:1 for normal text).

FAMILIES = {   # phase -> family; the sidebar's families (labextension/src/format.ts)
    "UNSENT": "waiting", "SUBMITTED": "waiting", "PENDING": "waiting", "QUEUED": "waiting",
    "HELD": "waiting", "SUSPENDED": "waiting", "UNKNOWN": "waiting",
    "EXECUTING": "running",
    "COMPLETED": "done",
    "ERROR": "failed", "LOST": "failed", "UNREACHED": "failed",
    "ABORTED": "stopped", "ARCHIVED": "stopped",
}

BADGE_COLOURS = {   # family -> (text colour, background colour)
    "waiting": ("#37474f", "#eceff1"),
    "running": ("#0d47a1", "#e3f2fd"),
    "done": ("#1b5e20", "#e8f5e9"),
    "failed": ("#b71c1c", "#ffebee"),
    "stopped": ("#6d3d00", "#fff3e0"),   # a stop asked for is not an error: no red
}

_SHAPES = {   # family -> CSS of the mark before the phase name (as the sidebar draws it)
    "waiting": "border-radius:50%",                                  # hollow ring
    "running": "border-radius:50%;border-right-color:transparent",   # half ring
    "done": "border-radius:1px;background:{fg}",                     # filled square
    "failed": "transform:rotate(45deg) scale(0.85);background:{fg}", # filled diamond
    "stopped": "border-radius:0",                                    # hollow square
}


def phase_family(phase: str) -> str:
    return FAMILIES.get(phase, "waiting")


def _html_text(text: str) -> str:
    import html

    return f"<b>{html.escape(text)}</b>"


def _badge(phase: str) -> str:
    import html

    family = phase_family(phase)
    fg, bg = BADGE_COLOURS[family]
    mark = (f'<span aria-hidden="true" style="display:inline-block;width:8px;height:8px;'
            f'box-sizing:border-box;border:2px solid {fg};{_SHAPES[family].format(fg=fg)}">'
            f"</span>")
    return (f'<span class="jobdesk-badge jobdesk-badge-{family}" '
            f'title="UWS phase {html.escape(phase)}" '
            f'style="display:inline-flex;align-items:center;gap:5px;color:{fg};background:{bg};'
            f'border:1px solid {fg};border-radius:3px;padding:0 6px;'
            f'font-size:var(--jp-ui-font-size0, 11px);font-weight:600">'
            f"{mark}{html.escape(phase)}</span>")


# An indeterminate pulse: a short block sliding along a track, never a percentage. Still (a
# dimmed full track) for readers who ask for reduced motion.
_PULSE = """<style>
@keyframes jobdesk-pulse { 0% { left: -30%; } 100% { left: 100%; } }
.jobdesk-pulse { position: relative; overflow: hidden; width: 120px; height: 6px;
  border-radius: 3px; background: rgba(128, 128, 128, 0.25); }
.jobdesk-pulse > span { position: absolute; top: 0; left: -30%; width: 30%; height: 100%;
  border-radius: 3px; background: var(--jp-brand-color1, #1565c0);
  animation: jobdesk-pulse 1.4s ease-in-out infinite; }
@media (prefers-reduced-motion: reduce) {
  .jobdesk-pulse > span { animation: none; left: 0; width: 100%; opacity: 0.4; }
}
</style>
<div class="jobdesk-pulse" role="progressbar" aria-label="working, progress unknown">
<span></span></div>"""

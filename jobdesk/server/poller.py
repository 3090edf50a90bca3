"""The background poller: jobs keep moving while no kernel watches them.

A kernel that submitted a job may die, or its notebook may be closed, before the job finishes.
Every few seconds the Jupyter server process calls ``Desk.step`` on a thread of its own; the
Desk reads the service's phase of each active job that no live process drives, and downloads
results of finished ones. Jobs a live kernel is waiting on are skipped by the Desk itself (their
lease is held), so the poller never duplicates a kernel's work.

The poller has its own ``Desk`` (and so its own SQLite connection): a slow download never holds
up the REST handlers. One failed pass is logged and the next one runs as usual.
"""

from __future__ import annotations

import logging
import threading

from jobdesk.index import this_process


class Poller:
    """Calls ``Desk(root).step(owner=...)`` every ``interval`` seconds on a daemon thread
    (``Desk(settings=...)`` when given the server's settings)."""

    def __init__(self, root: str | None = None, *, settings=None, interval: float = 5.0,
                 log=None):
        self.settings = settings
        self.root = str(settings.root) if settings is not None else root
        self.interval = interval
        self.log = log or logging.getLogger("jobdesk.server.poller")
        self.owner = this_process()  # host:pid, so a dead server's lease is seen as free
        self.passes = 0
        self.moved = 0
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._desk = None

    def start(self) -> None:
        if self.interval <= 0 or (self._thread and self._thread.is_alive()):
            return
        self._stop.clear()
        self._thread = threading.Thread(target=self._loop, name="jobdesk-poller", daemon=True)
        self._thread.start()

    def stop(self, timeout: float = 5.0) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout)

    def step_once(self) -> int:
        """One pass: the number of jobs the Desk moved on."""
        if self._desk is None:
            from jobdesk.desk import Desk

            self._desk = (Desk(settings=self.settings) if self.settings is not None
                          else Desk(self.root))
        moved = self._desk.step(owner=self.owner) or 0
        self.passes += 1
        self.moved += moved
        return moved

    def _loop(self) -> None:
        while not self._stop.is_set():
            try:
                self.step_once()
            except Exception:  # noqa: BLE001 - one bad pass must not end the poller
                self.log.exception("jobdesk poller: a pass failed; retrying in %ss", self.interval)
            self._stop.wait(self.interval)

"""Long work off the kernel's main thread: progress, cancel, and a generation count.

A :class:`Worker` runs one task at a time in a thread (JAX releases the GIL
while XLA runs, so the kernel keeps handling widget messages). The task
receives a ``progress(done, total, what)`` callable, which the core calls
between its compiled calls (``progress=`` of ``descend``, ``basin_map``,
``evaluate_surface``); once :meth:`Worker.cancel` was called, that callable
raises :class:`Cancelled`, so the work stops at the next call boundary.

Every change of view bumps the generation (:meth:`Worker.bump`); a task
finishing for an older generation is told so (``current=False``) and must
not write the status of the current view.
"""

from __future__ import annotations

import threading
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

__all__ = ["Cancelled", "Progress", "Worker"]


class Cancelled(Exception):
    """Raised between two compiled calls of a cancelled task."""


@dataclass(frozen=True)
class Progress:
    """One progress report: ``done`` of ``total`` calls of ``what``."""

    done: int
    total: int
    what: str


class Worker:
    """One background task at a time, with cancel and a generation counter.

    Args:
        on_progress: called with a :class:`Progress` (from the worker thread).
        on_done: called as ``on_done(name, result, error, current, latest)``
            when a task ends: ``error`` is the exception or None (a
            :class:`Cancelled` when it was cancelled), ``current`` whether no
            view change happened since it started, ``latest`` whether no other
            task was started since.
        background: run tasks in a thread (False: in the caller, for scripts).
    """

    def __init__(
        self,
        on_progress: Callable[[Progress], Any],
        on_done: Callable[[str, Any, BaseException | None, bool, bool], Any],
        *,
        background: bool = True,
    ) -> None:
        self._on_progress = on_progress
        self._on_done = on_done
        self.background = background
        self.generation = 0
        self._cancel = threading.Event()
        self._thread: threading.Thread | None = None
        self._lock = threading.Lock()
        self.name: str | None = None
        self._started = 0

    @property
    def busy(self) -> bool:
        """Whether a task is running."""
        thread = self._thread
        return thread is not None and thread.is_alive()

    def bump(self) -> int:
        """A view change: results of tasks started before are now for older settings."""
        with self._lock:
            self.generation += 1
            return self.generation

    def progress(self, done: int, total: int, what: str) -> None:
        """The core's progress callback: report, or stop if cancelled."""
        if self._cancel.is_set():
            raise Cancelled(what)
        self._on_progress(Progress(int(done), int(total), str(what)))

    def start(
        self,
        name: str,
        task: Callable[[Callable[[int, int, str], None]], Any],
        *,
        background: bool | None = None,
    ) -> None:
        """Run ``task(progress)``; a task still running is cancelled first.

        ``background`` overrides the worker's default for this task.
        """
        self.cancel(wait=True)
        self._cancel.clear()
        self.name = name
        generation = self.generation
        self._started += 1
        task_id = self._started

        def run() -> None:
            result, error = None, None
            try:
                result = task(self.progress)
            except BaseException as exc:  # reported to on_done, never lost in a thread
                error = exc
            current = generation == self.generation and not self._cancel.is_set()
            self._on_done(name, result, error, current, task_id == self._started)

        if not (self.background if background is None else background):
            run()
            return
        self._thread = threading.Thread(target=run, name=f"basinview-{name}", daemon=True)
        self._thread.start()

    def cancel(self, *, wait: bool = False, timeout: float = 30.0) -> bool:
        """Ask the running task to stop at its next call boundary; True if one was running."""
        thread = self._thread
        running = thread is not None and thread.is_alive()
        if running:
            self._cancel.set()
            if wait and thread is not threading.current_thread():
                thread.join(timeout)
        return running

    def wait(self, timeout: float | None = None) -> None:
        """Block until the running task (if any) has ended."""
        thread = self._thread
        if thread is not None and thread is not threading.current_thread():
            thread.join(timeout)

"""The Explorer's long work: basin maps, step-size sweeps and slow surfaces.

Each runs through the Explorer's :class:`~basinview.explorer.tasks.Worker`:
in a thread when started from a button (the notebook stays responsive),
with a progress bar fed by the core's call-by-call progress and a cancel
button that stops it at the next call boundary. A control change during
long work cancels it (a slow surface of the same slice goes on); a result
that finishes for older settings never writes the status line.
"""

from __future__ import annotations

import hashlib
import json
import warnings
from typing import Any

import numpy as np

from ..core import MinimaWarning
from ..figures.text import significant
from .state import ViewState, stages_to_update
from .tasks import Cancelled, Progress

__all__ = ["LongWork", "letters", "view_key"]

_WHAT = {"descent": "descent", "surface": "surface", "sweep": "sweep"}


def letters(minima: Any) -> str:
    """`` · critical points A (minimum), B (saddle)`` for the status line."""
    if minima is None or not len(minima):
        return ""
    return " · critical points " + ", ".join(
        f"{name} ({kind})" for name, kind in zip(minima.labels, minima.kind)
    )


def view_key(name: str, state: ViewState) -> str:
    """A ``uirevision`` for figure ``name``: the same while the slice and span stay.

    Zoom and camera are kept across changes of learning rate, rule, starts
    and resolution; another plane, axis, origin or span starts a fresh view.
    """
    fields = (
        state.plane_kind,
        state.x_label,
        state.y_label,
        state.plane_seed,
        state.normalise,
        state.origin,
        state.span,
    )
    digest = hashlib.blake2b(json.dumps(fields, default=str).encode(), digest_size=6)
    return f"{name}-{digest.hexdigest()}"


class LongWork:
    """Mixin of :class:`~basinview.explorer.Explorer`: the work run by its worker."""

    # ------------------------------------------------------------ public
    def map_basins(self, resolution: int | None = None, *, wait: bool = True) -> Any:
        """Run descent from a grid of starts on the slice; show the basin map.

        Args:
            resolution: grid nodes per axis (default: the "basin grid" slider).
            wait: return when done (the BasinMap, or None if it failed or was
                cancelled); False runs it in the worker and returns at once
                (what the button does).
        """
        state = self.state
        res = int(resolution or self.basins_resolution.value)

        def task(progress: Any) -> Any:
            with warnings.catch_warnings(record=True) as caught:
                warnings.simplefilter("always", MinimaWarning)
                bm = self.computer.basins(res, progress=progress)
            return (
                state,
                bm,
                [str(c.message) for c in caught if issubclass(c.category, MinimaWarning)],
            )

        self._begin(f"mapping basins from {res * res} starts…")
        return self._run("basins", task, wait)

    def sweep_step_sizes(self, learning_rates: Any = None, *, wait: bool = True) -> Any:
        """Rerun the current starts over a range of learning rates; show the sweep.

        ``wait`` as for :meth:`map_basins`.
        """
        state = self.state
        rates = (
            learning_rates
            if learning_rates is not None
            else state.learning_rate * np.geomspace(1 / 30, 30, 15)
        )

        def task(progress: Any) -> Any:
            return state, self.computer.sweep(rates, progress=progress), []

        self._begin(f"sweeping {len(rates)} learning rates…")
        return self._run("sweep", task, wait)

    def cancel(self) -> bool:
        """Stop the long work running now (within about a second); the view stays as it was."""
        self._cancelled_by_user = True
        name = self.worker.name
        running = self.worker.cancel()
        if running:
            # The view is released at once: the task stops at its next call boundary in
            # the background, and whatever it returns is for an older generation.
            self.worker.bump()
            self._end()
            self._say(f"{name} cancelled; the view is unchanged · {self.describe()}")
        return running

    def wait(self, timeout: float | None = None) -> None:
        """Block until the long work running now (if any) has ended (for scripts and tests)."""
        self.worker.wait(timeout)

    @property
    def busy(self) -> bool:
        """Whether long work is running."""
        return self.worker.busy

    # ------------------------------------------------------------ internals
    def _run(self, name: str, task: Any, wait: bool) -> Any:
        self._cancelled_by_user = False
        self._task_result = self._task_error = None
        self.worker.start(name, task, background=None if not wait else False)
        if not wait:
            return None
        if self._task_error is not None and not isinstance(self._task_error, Cancelled):
            raise self._task_error  # called from code: the caller sees the error too
        return self._task_result

    def _begin(self, message: str) -> None:
        self._say(message)
        self.progress.value = 0
        self.progress.max = 1
        self.progress.layout.visibility = "visible"
        self.cancel_button.disabled = False

    def _end(self) -> None:
        self.progress.layout.visibility = "hidden"
        self.cancel_button.disabled = True

    def _before_change(self, state: ViewState) -> None:
        """A view change: long work for other settings is cancelled (waiting for it to stop)."""
        self.worker.bump()
        if not self.worker.busy:
            return
        same_slice = not ({"plane", "surface"} & set(stages_to_update(self.state, state)))
        if self.worker.name == "surface" and same_slice:
            return  # the full surface of this slice is still wanted
        self._cancelled_by_user = False
        self.worker.cancel(wait=True, timeout=5.0)
        self._end()

    def _start_surface(self, state: ViewState) -> None:
        """Compute the full-resolution surface of ``state`` in the worker (a preview shows)."""
        self._task_result = None

        def task(progress: Any) -> Any:
            return state, self.computer.full_surface(state, progress=progress), []

        self._cancelled_by_user = False
        self.progress.value, self.progress.max = 0, 1
        self.progress.layout.visibility = "visible"
        self.cancel_button.disabled = False
        self.worker.start("surface", task)

    def _on_progress(self, p: Progress) -> None:
        self.progress.max = max(1, p.total)
        self.progress.value = min(p.done, p.total)
        self.progress.description = f"{p.done}/{p.total}"

    def _on_task_done(
        self, name: str, result: Any, error: Any, current: bool, latest: bool
    ) -> None:
        """The worker's report (from its thread): draw and say what came, if still current."""
        try:
            self._finish(name, result, error, current)
        except Exception as exc:  # never a traceback in a thread
            self._report(exc)
        finally:
            if latest and not self._cancelled_by_user:
                self._end()  # (a cancel or a newer task has set the bar already)

    def _show_side(self, view: str) -> None:
        if self.view.value == view:
            self._draw_side()
        else:
            self.view.value = view  # its observer draws the side figure

    def _finish(self, name: str, result: Any, error: Any, current: bool) -> None:
        with self._lock:
            self._finish_locked(name, result, error, current)

    def _finish_locked(self, name: str, result: Any, error: Any, current: bool) -> None:
        self._task_error = error
        if isinstance(error, Cancelled) or (error is None and not current and name != "surface"):
            return  # cancelled (cancel() said so) or overtaken by a newer change (it says so)
        if error is not None:
            if current:
                self._report(error)
            return
        state, value, notes = result
        if name == "surface":
            if self.computer.adopt_surface(state, value):
                self._draw_main(self.results)
                self._draw_side()
                self._say(f"{self.describe()} · full resolution {len(value.a)} × {len(value.b)}")
            return
        if name == "basins":
            self._basins = (state, value)
            self._task_result = value
            self._show_side("basins")
            self._say(
                f"basin map: {len(value.minima)} critical points{letters(value.minima)}"
                f" from {value.label.size} starts · {self.describe()}"
                + "".join(f" · {n}" for n in notes)
            )
        else:
            self._sweep = (state, value)
            self._task_result = value
            self._show_side("step sizes")
            bound = "none" if value.predicted_bound is None else significant(value.predicted_bound)
            observed = value.observed_bound
            observed = "none" if observed is None else significant(observed)
            self._say(
                f"step sizes: predicted bound {bound}, largest rate without divergence "
                f"{observed} · {self.describe()}"
            )

"""The Explorer: controls, a status line and two figures for one problem.

The widget holds view state only. Its handlers read the controls into a
:class:`ViewState`, let :class:`ViewComputer` rerun just the stages the
change needs, build figures with the pure functions of
:mod:`basinview.figures` and show them in two :class:`PlotView` widgets
(figure state as data, drawn by plotly.js). Long work (basin maps, sweeps,
slow surfaces) runs in a worker thread with a progress bar and a cancel
button (:mod:`.long_work`). Errors are shown in the status line; the last
good view stays.
"""

from __future__ import annotations

import contextlib
import html
import threading
import time
import traceback
import warnings
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import ipywidgets as w
import pandas as pd
from IPython.display import display

from ..core import (
    BasinviewError,
    MinimaWarning,
    Problem,
    Settings,
    SettingsError,
    get_rule,
    upgrade_settings,
)
from .compute import ViewComputer, ViewResults
from .controls import Controls, respan
from .long_work import LongWork
from .options import initial_state
from .plot import PlotView
from .records import SnapshotLog
from .schemes import ALL_SCHEMES, resolve_schemes, schemes_from_settings
from .state import ViewState, state_from_settings
from .tasks import Worker
from .views import SCHEMES_VIEW, SIDE_VIEWS, Views

__all__ = ["SIDE_VIEWS", "Explorer"]


class Explorer(LongWork, Views):
    """Interactive loss-surface explorer for a :class:`~basinview.core.Problem`.

    Args:
        problem: the problem.
        plane: ``"axes"`` (default), ``"random"``, ``"hessian"`` or a Plane built
            with :func:`axes_plane`, :func:`random_plane` or :func:`hessian_plane`.
        background: run long work (basin maps, sweeps, slow surfaces started
            from the buttons or controls) in a worker thread, so the notebook
            stays responsive (default True). False runs it in the caller.
        **options: initial values of the view: ``x``, ``y`` (axes labels),
            ``span``, ``resolution``, ``optimizer``, ``learning_rate``,
            ``hyper`` (dict), ``steps``, ``n_starts``, ``start_scale``,
            ``start_seed``, ``starts`` (list of parameter pytrees),
            ``plane_seed``, ``normalise``, ``origin``, ``scheme`` (the scheme
            shown first; default all side by side), ``grouping``
            (``"auto"``, ``"critical points"`` or ``"connectivity"``).
        schemes: named initialisation schemes, as
            :func:`~basinview.core.scheme_starts` and
            :func:`~basinview.core.compare_schemes` take them (name -> explicit
            list of starts, a random draw such as ``random_starts(...)``, or an
            initialiser ``init(key) -> params``). A "scheme" control then chooses
            whose starts the runs come from (or all side by side, paths coloured
            by scheme), every run carries its scheme, and the "schemes" side view
            compares them (:meth:`scheme_comparison`). Clicked starts join as
            the scheme "clicked starts".
        init_count, init_seed: draws per initialiser scheme and their seed
            (``count`` and ``init_seed`` of compare_schemes).
        connect_options: keyword arguments of :func:`~basinview.core.connect_runs`
            (``tolerance``, ``symmetries``, ``samples``) used when solutions are
            grouped by connectivity.

    Display it in a notebook cell (``Explorer(problem)`` as the last line).
    Click the contour map to add a start there. ``Record`` stores the
    current settings as a snapshot, shown under the widget in the notebook
    and listed in :attr:`snapshots`; :meth:`from_settings` rebuilds a view.

    Caution: the map is a 2-D slice of the loss; paths leave the plane (hover
    shows how far) and a low point of the slice need not be a minimum.
    """

    def __init__(
        self,
        problem: Problem,
        plane: Any = None,
        *,
        background: bool = True,
        schemes: Any = None,
        init_count: int | None = None,
        init_seed: int = 0,
        connect_options: dict[str, Any] | None = None,
        **options: Any,
    ) -> None:
        self.problem = problem
        drawn = resolve_schemes(problem, schemes, count=init_count, seed=init_seed)
        self.computer = ViewComputer(
            problem, schemes=drawn, connect_options=dict(connect_options or {})
        )
        if drawn:
            options.setdefault("scheme", ALL_SCHEMES)
        self.log = SnapshotLog()
        self.last_error: str | None = None
        self._basins: tuple[ViewState, Any] | None = None
        self._sweep: tuple[ViewState, Any] | None = None
        self._quiet = False
        self._lock = threading.RLock()
        self._cancelled_by_user = False
        self._task_result: Any = None
        self._task_error: BaseException | None = None
        state = initial_state(problem, plane, dict(options))
        self.controls = Controls(problem, state, get_rule(state.optimizer), tuple(drawn))
        self.status = w.HTML(value="", layout=w.Layout(width="100%"))
        self.status.add_class("bv-status")
        self.progress = w.IntProgress(
            value=0, min=0, max=1, layout=w.Layout(width="200px", visibility="hidden")
        )
        self.progress.add_class("bv-progress")
        self.cancel_button = w.Button(
            description="cancel",
            disabled=True,
            tooltip="stop the long work running now (the view keeps its last good state)",
            layout=w.Layout(width="90px"),
        )
        self.cancel_button.add_class("bv-cancel")
        self.main = PlotView(height=560)
        self.main.add_class("bv-main")
        self.side = PlotView(height=460)
        self.side.add_class("bv-side")
        self.table = w.HTML(layout=w.Layout(display="none", max_height="460px", overflow="auto"))
        self.table.add_class("bv-table")
        views = [*SIDE_VIEWS, SCHEMES_VIEW] if drawn else list(SIDE_VIEWS)
        self.view = w.ToggleButtons(options=views, value="relief", description="view")
        self.basins_button = w.Button(
            description="map basins", tooltip="run descent from every node of a grid on the slice"
        )
        self.basins_resolution = w.IntSlider(
            value=31, min=5, max=121, description="basin grid", continuous_update=False
        )
        self.sweep_button = w.Button(
            description="sweep step sizes", tooltip="rerun the starts at a range of learning rates"
        )
        self.record_button = w.Button(
            description="record",
            button_style="info",
            tooltip="store the current settings as a snapshot",
        )
        self.note = w.Text(placeholder="note for this snapshot", layout=w.Layout(width="300px"))
        self.save_button = w.Button(
            description="save JSON", tooltip="write the latest snapshot to the file named here"
        )
        self.save_name = w.Text(value="basinview-settings.json", layout=w.Layout(width="300px"))
        self.worker = Worker(self._on_progress, self._on_task_done, background=background)
        self._wire()
        self._state_seed = state
        self._apply(state)

    # ------------------------------------------------------------ assembly
    def _wire(self) -> None:
        for c in self.controls.value_widgets():
            c.observe(self._on_control, names="value")
        self.controls.hyper_box.observe(self._on_hyper_children, names="children")
        self._observe_hyper()
        self.controls.clear_clicks.on_click(lambda _: self._guard(self._forget_clicks))
        self.view.observe(lambda _: self._guard(self._draw_side), names="value")
        self.basins_button.on_click(lambda _: self._guard(lambda: self.map_basins(wait=False)))
        self.sweep_button.on_click(lambda _: self._guard(lambda: self.sweep_step_sizes(wait=False)))
        self.cancel_button.on_click(lambda _: self._guard(self.cancel))
        self.record_button.on_click(lambda _: self._guard(lambda: self.record(self.note.value)))
        self.save_button.on_click(
            lambda _: self._guard(lambda: self.save_snapshot(self.save_name.value))
        )
        self.main.on_click(self._on_map_click)
        for plot in (self.main, self.side):
            plot.on_error(self._report)

    def _observe_hyper(self) -> None:
        for c in self.controls.hyper_box.children:
            c.observe(self._on_control, names="value")

    def _on_hyper_children(self, change: dict[str, Any]) -> None:
        self._observe_hyper()

    @property
    def widget(self) -> w.Widget:
        """The whole Explorer as one ipywidgets box.

        Left (or on top, when the page is narrower than about 1100 px): the
        status line, the progress of long work with its cancel button, the
        controls and the record actions. Right (or below): the figures, which
        fit the width they are given.
        """
        if not hasattr(self, "_widget"):
            busy = w.HBox(
                [self.progress, self.cancel_button], layout=w.Layout(align_items="center")
            )
            actions = w.VBox([self.record_button, self.note, self.save_button, self.save_name])
            panel = w.VBox([self.status, busy, self.controls.box(), actions])
            panel.add_class("bv-panel")
            side_tools = w.HBox(
                [self.basins_button, self.basins_resolution, self.sweep_button],
                layout=w.Layout(flex_flow="row wrap"),
            )
            right = w.VBox([self.main, self.view, side_tools, self.side, self.table])
            right.add_class("bv-figures")
            self._widget = w.HBox(
                [panel, right], layout=w.Layout(flex_flow="row wrap", width="100%")
            )
            self._widget.add_class("bv-explorer")
        return self._widget

    def _ipython_display_(self) -> None:
        display(self.widget)
        self.log.attach()

    # ------------------------------------------------------------ state
    @property
    def state(self) -> ViewState:
        """The state of the current (last good) view."""
        state = self.computer.state
        return state if state is not None else self._state_seed

    @property
    def results(self) -> ViewResults | None:
        return self.computer.results

    def set(self, **changes: Any) -> None:
        """Change the view programmatically (same path as moving the controls).

        ``span`` is read as :func:`~basinview.core.evaluate_surface` reads it,
        around the plane's centre (parameter values on an axes plane); without
        it the span follows the centre when the plane changes.
        """

        def apply() -> None:
            span = changes.pop("span", None)
            state = respan(self.problem, self.state, self.state.replace(**changes), span)
            self._apply(state, show=True)

        self._guard(apply)

    def _on_control(self, change: dict[str, Any]) -> None:
        if self._quiet:
            return
        if change["owner"] is self.controls.optimizer:
            rule = get_rule(change["new"])
            with self._suspended():
                self.controls.set_hyper(rule, rule.defaults)
        if change["owner"] is self.controls.plane_kind:
            self.controls.update_visibility()
        self._guard(lambda: self._apply(self.controls.read(self.state)))

    @contextlib.contextmanager
    def _suspended(self) -> Iterator[None]:
        quiet, self._quiet = self._quiet, True
        try:
            yield
        finally:
            self._quiet = quiet

    def _guard(self, action: Any) -> Any:
        """Run ``action``; show any error in the status line and keep the last good view."""
        try:
            return action()
        except Exception as exc:  # an observer must never die: report and keep going
            self._report(exc)
        return None

    def _report(self, exc: BaseException) -> None:
        """Show ``exc`` in the status line (never as a traceback in the kernel's log)."""
        if isinstance(exc, BasinviewError):
            self._error(str(exc))
            return
        self.last_error = "".join(traceback.format_exception(type(exc), exc, exc.__traceback__))
        self._error(f"unexpected {type(exc).__name__}: {exc}")

    def _error(self, message: str) -> None:
        self.status.value = (
            f"<span style='color:#B00020'>⚠ {html.escape(message)}</span> "
            "(the view shows the last good settings)"
        )
        with self._suspended():
            self.controls.show(self.state)

    def _say(self, message: str) -> None:
        self.status.value = html.escape(message)

    # ------------------------------------------------------------ compute
    def _apply(self, state: ViewState, *, show: bool = False) -> None:
        state.check()
        self._before_change(state)
        t0 = time.perf_counter()
        with self._lock, warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", MinimaWarning)
            slow = self.computer.state is not None and self.computer.wants_preview(state)
            later = slow and self.worker.background
            if later:
                results, stages = self.computer.update_without_surface(state)
            else:
                if slow:
                    self._say("coarse preview; computing full resolution…")
                    self._draw_main(self.computer.preview(state))
                results, stages = self.computer.update(state)
        notes = self._pass_on(caught)
        if show:
            with self._suspended():
                self.controls.show(state)
        if stages:
            self._draw_main(results)
            self._draw_side()
        elapsed = time.perf_counter() - t0
        self._say(self._summary(results, stages, elapsed, notes))
        if later:
            self._start_surface(state)

    @staticmethod
    def _pass_on(caught: list[warnings.WarningMessage]) -> list[str]:
        """Texts of the MinimaWarnings caught (for the status line); other warnings go on."""
        notes = []
        for item in caught:
            if issubclass(item.category, MinimaWarning):
                notes.append(str(item.message))
            else:
                warnings.warn_explicit(item.message, item.category, item.filename, item.lineno)
        return notes

    def _forget_clicks(self) -> None:
        self._apply(self.state.replace(start_points=()))

    def _on_map_click(self, a: float, b: float, uid: str) -> None:
        if uid != "slice-surface":
            return  # a click on a path or marker: not a place on the map
        self._guard(lambda: self.add_start(a, b))

    def add_start(self, a: float, b: float) -> None:
        """Add a start at plane coordinates ``(a, b)``, the numbers the map's axes show.

        On an axes plane these are the two parameters' values; on other
        planes, offsets along the plane's directions.
        """
        results = self.results
        if results is None:
            return
        point = results.plane.lift(float(a), float(b))
        self._apply(self.state.replace(start_points=(*self.state.start_points, tuple(point))))

    # ------------------------------------------------------------ records
    def record(self, note: str = "") -> Settings:
        """Store the current settings as a snapshot (shown under the widget) and return them."""
        settings = self.computer.settings(note=note)
        self.log.add(settings)
        self._say(f"recorded snapshot {len(self.log)} · {self.describe()}")
        return settings

    @property
    def snapshots(self) -> pd.DataFrame:
        """Table of recorded snapshots, one row each."""
        return self.log.table

    def save_snapshot(self, path: str | Path = "basinview-settings.json", index: int = -1) -> Path:
        """Write snapshot ``index`` (default: latest) as JSON to ``path`` (only there)."""
        if not len(self.log):
            raise SettingsError("there is no snapshot to save yet: press “record” first.")
        target = self.log[index].save(path)
        self._say(f"saved snapshot to {target}")
        return target

    @classmethod
    def from_settings(
        cls, problem: Problem, settings: Settings | str | Path, **options: Any
    ) -> Explorer:
        """An Explorer showing the view a Settings record (or JSON file) describes.

        A recorded grid of learning rates x hyper-parameters is run in full (the
        controls show its first values; moving one of them returns to a single
        setting), and the tolerances and minibatch settings are kept. What the
        Explorer cannot show raises (or, for a non-square grid, warns); see
        :func:`~basinview.explorer.state.state_from_settings`.

        Settings recorded from initialisation schemes show the recorded scheme
        (or all side by side) with the recorded schemes offered; pass
        ``schemes=`` (checked against the record) to offer the others too, and
        ``initializers={name: function}`` to rebuild initialiser schemes.
        """
        if not isinstance(settings, Settings):
            settings = Settings.load(settings, problem=problem)
        else:
            settings.check(problem)
        settings = upgrade_settings(problem, settings)
        state = state_from_settings(settings, problem=problem)
        if settings.starts.get("kind") == "schemes":
            # the recorded schemes (or the caller's, checked against the record)
            given = options.pop("schemes", None)
            options["schemes"] = schemes_from_settings(
                problem,
                settings.starts,
                None
                if given is None
                else resolve_schemes(
                    problem,
                    given,
                    count=options.pop("init_count", None),
                    seed=options.pop("init_seed", 0),
                ),
                initializers=options.pop("initializers", None),
            )
        fields = {f: getattr(state, f) for f in state.__dataclass_fields__ if f != "plane_kind"}
        if {"learning_rate", "hyper", "optimizer"} & set(options) and "grid" not in options:
            fields["grid"] = ()  # a rate or rule given here replaces the recorded grid
        fields.update(options)
        return cls(problem, state.plane_kind, **fields)

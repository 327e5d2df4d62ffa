"""The Explorer: an ipywidgets view of a problem's loss surface and descent runs.

The widget holds view state only. Its handlers read the controls into a
:class:`ViewState`, let :class:`ViewComputer` rerun just the stages the
change needs, build figures with the pure functions of
:mod:`basinview.figures` and copy them into two live figures. Errors are
shown in the status line; the last good view stays.
"""

from __future__ import annotations

import contextlib
import html
import time
import traceback
import warnings
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import ipywidgets as w
import numpy as np
import pandas as pd
import plotly.graph_objects as go
from IPython.display import display

from .. import figures
from ..core import (
    BasinviewError,
    MinimaWarning,
    Plane,
    Problem,
    Settings,
    SettingsError,
    get_rule,
    upgrade_settings,
)
from .compute import ViewComputer, ViewResults
from .controls import Controls, respan
from .records import SnapshotLog
from .state import ViewState, default_span, state_from_settings
from .sync import FigureView, source_uids, sync_figure

__all__ = ["SIDE_VIEWS", "Explorer"]

SIDE_VIEWS = ("relief", "loss curves", "basins", "step sizes", "runs", "minima")


def _letters(minima: Any) -> str:
    """`` · critical points A (minimum), B (saddle)`` for the status line (letters as in every view)."""
    if minima is None or not len(minima):
        return ""
    return " · critical points " + ", ".join(
        f"{name} ({kind})" for name, kind in zip(minima.labels, minima.kind)
    )


def _initial_state(problem: Problem, plane: Any, kw: dict[str, Any]) -> ViewState:
    kind, fields = "axes", {}
    if isinstance(plane, Plane):
        spec = plane.spec
        kind = spec.get("kind", "axes")
        fields["origin"] = spec.get("origin")
        if kind == "axes":
            fields.update(x_label=spec["x"], y_label=spec["y"])
        elif kind == "random":
            fields.update(plane_seed=spec.get("seed", 0), normalise=spec.get("normalise", "filter"))
        elif kind == "hessian":
            fields.update(plane_seed=spec.get("seed", 0))
        else:
            raise BasinviewError(
                f"the Explorer shows axes, random and Hessian planes; got a {kind!r} plane."
            )
    elif plane is not None:
        kind = str(plane)
    if kind == "axes" and "x_label" not in fields and "x_label" not in kw:
        labels = problem.labels
        fields.update(
            x_label=kw.pop("x", labels[0]), y_label=kw.pop("y", labels[min(1, len(labels) - 1)])
        )
    span = kw.pop("span", None)
    origin = kw.get("origin")
    if origin is not None:
        if isinstance(origin, (tuple, list)) and all(
            isinstance(v, (int, float, np.number)) for v in origin
        ):
            origin = np.asarray(origin, dtype=float)  # a flat vector (as ViewState stores it)
        kw["origin"] = problem.flatten(origin, what="plane origin")
    if "starts" in kw:
        starts = kw.pop("starts")
        fields["start_points"] = [problem.flatten(p, what="start") for p in starts]
    fields.update({k: v for k, v in kw.items()})
    state = ViewState(plane_kind=kind).replace(**fields)
    # Spans are plane coordinates (parameter values on an axes plane): a half-width, or
    # the default size, is taken around the plane's centre.
    state = respan(
        problem, state, state, span if span is not None else _default_half(problem, kind)
    )
    rule = get_rule(state.optimizer)
    return state.replace(optimizer=rule.name, hyper={**rule.defaults, **state.hyper_dict})


def _default_half(problem: Problem, kind: str) -> tuple[float, float]:
    """Half-widths of the first span (around the plane's centre)."""
    (a0, a1), (b0, b1) = default_span(problem, kind)
    return ((a1 - a0) / 2, (b1 - b0) / 2)


class Explorer:
    """Interactive loss-surface explorer for a :class:`~basinview.core.Problem`.

    Args:
        problem: the problem.
        plane: ``"axes"`` (default), ``"random"``, ``"hessian"`` or a Plane built
            with :func:`axes_plane`, :func:`random_plane` or :func:`hessian_plane`.
        **options: initial values of the view: ``x``, ``y`` (axes labels),
            ``span``, ``resolution``, ``optimizer``, ``learning_rate``,
            ``hyper`` (dict), ``steps``, ``n_starts``, ``start_scale``,
            ``start_seed``, ``starts`` (list of parameter pytrees),
            ``plane_seed``, ``normalise``, ``origin``.

    Display it in a notebook cell (``Explorer(problem)`` as the last line).
    Click the contour map to add a start there. ``Record`` stores the
    current settings as a snapshot, shown under the widget in the notebook
    and listed in :attr:`snapshots`; :meth:`from_settings` rebuilds a view.

    Caution: the map is a 2-D slice of the loss; paths leave the plane (hover
    shows how far) and a low point of the slice need not be a minimum.
    """

    def __init__(self, problem: Problem, plane: Any = None, **options: Any) -> None:
        self.problem = problem
        self.computer = ViewComputer(problem)
        self.log = SnapshotLog()
        self.last_error: str | None = None
        self._basins: tuple[ViewState, Any] | None = None
        self._sweep: tuple[ViewState, Any] | None = None
        self._quiet = False
        state = _initial_state(problem, plane, dict(options))
        self.controls = Controls(problem, state, get_rule(state.optimizer))
        self.status = w.HTML(value="")
        self.status.add_class("bv-status")
        self.progress = w.IntProgress(
            value=0, min=0, max=4, layout=w.Layout(width="300px", display="none")
        )
        self.main = FigureView(layout={"height": 560, "width": 720})
        self.main.add_class("bv-main")
        self.side = FigureView(layout={"height": 460, "width": 720})
        self.table = w.HTML(layout=w.Layout(display="none", max_height="460px", overflow="auto"))
        self.view = w.ToggleButtons(options=list(SIDE_VIEWS), value="relief", description="view")
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
        self.save_name = w.Text(value="basinview-settings.json", layout=w.Layout(width="260px"))
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
        self.basins_button.on_click(lambda _: self._guard(self.map_basins))
        self.sweep_button.on_click(lambda _: self._guard(self.sweep_step_sizes))
        self.record_button.on_click(lambda _: self._guard(lambda: self.record(self.note.value)))
        self.save_button.on_click(
            lambda _: self._guard(lambda: self.save_snapshot(self.save_name.value))
        )

    def _observe_hyper(self) -> None:
        for c in self.controls.hyper_box.children:
            c.observe(self._on_control, names="value")

    def _on_hyper_children(self, change: dict[str, Any]) -> None:
        self._observe_hyper()

    @property
    def widget(self) -> w.Widget:
        """The whole Explorer as one ipywidgets box."""
        if not hasattr(self, "_widget"):
            actions = w.HBox([self.record_button, self.note, self.save_button, self.save_name])
            side_tools = w.HBox([self.basins_button, self.basins_resolution, self.sweep_button])
            right = w.VBox([self.main, self.view, side_tools, self.side, self.table])
            self._widget = w.VBox(
                [
                    w.HBox([self.controls.box(), right]),
                    w.HBox([self.status, self.progress]),
                    actions,
                ]
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
        except BasinviewError as exc:
            self._error(str(exc))
        except Exception as exc:  # an observer must never die: report and keep going
            self.last_error = traceback.format_exc()
            self._error(f"unexpected {type(exc).__name__}: {exc}")
        finally:
            self.progress.layout.display = "none"
        return None

    def _error(self, message: str) -> None:
        self.status.value = f"<span style='color:#B00020'>⚠ {html.escape(message)}</span> (the view shows the last good settings)"
        with self._suspended():
            self.controls.show(self.state)

    def _say(self, message: str) -> None:
        self.status.value = html.escape(message)

    # ------------------------------------------------------------ compute
    def _apply(self, state: ViewState, *, show: bool = False) -> None:
        state.check()
        t0 = time.perf_counter()
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", MinimaWarning)
            if self.computer.state is not None and self.computer.wants_preview(state):
                self._say("coarse preview; computing full resolution…")
                self._draw_main(self.computer.preview(state))
            results, stages = self.computer.update(state)
        notes = self._pass_on(caught)
        if show:
            with self._suspended():
                self.controls.show(state)
        if stages:
            self._draw_main(results)
            if self.view.value in ("relief", "loss curves", "runs", "minima") or stages:
                self._draw_side()
        elapsed = time.perf_counter() - t0
        runs = results.runs
        counts = pd.Series(runs.status).value_counts().to_dict()
        summary = ", ".join(f"{v} {k}" for k, v in counts.items())
        found = _letters(results.minima)
        if results.minima is None and not notes and not (runs.status == "converged").any():
            notes.append(
                "no run converged, so no critical point is marked: run more steps or "
                "loosen the tolerance"
            )
        self._say(
            f"{len(runs)} runs: {summary}{found} · updated {', '.join(stages) or 'nothing'} "
            f"in {elapsed:.2f} s" + "".join(f" · {n}" for n in notes)
        )

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

    def _on_click(self, trace: Any, points: Any, selector: Any) -> None:
        if not points.point_inds:
            return
        self._guard(lambda: self.add_start(points.xs[0], points.ys[0]))

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

    # ------------------------------------------------------------ drawing
    def _draw_main(self, results: ViewResults) -> None:
        title = "coarse preview" if results.preview else None
        fig = figures.slice_figure(
            results.surface, results.runs, minima=results.minima, title=title
        )
        if sync_figure(self.main, fig) or not getattr(self, "_click_bound", False):
            for trace, uid in zip(self.main.data, source_uids(self.main)):
                if uid == "slice-surface":
                    trace.on_click(self._on_click)
            self._click_bound = True

    def _draw_side(self) -> None:
        results = self.results
        if results is None:
            return
        view = self.view.value
        self.table.layout.display = "none"
        self.side.layout.height = 460
        if view in ("runs", "minima"):
            frame = (
                results.runs.table
                if view == "runs"
                else (results.minima.table if results.minima is not None else pd.DataFrame())
            )
            self.table.value = frame.head(500).to_html(
                float_format=lambda x: f"{x:.4g}", index=False, border=0
            )
            self.table.layout.display = None
            sync_figure(self.side, go.Figure(layout={"height": 10}))
            return
        if view == "relief":
            fig = figures.relief_figure(results.surface, results.runs, minima=results.minima)
        elif view == "loss curves":
            fig = figures.loss_curves_figure(results.runs, minima=results.minima)
        elif view == "basins":
            fig = self._cached_figure(
                self._basins,
                figures.basin_figure,
                "press “map basins” to run descent from a grid of starts",
            )
        else:
            fig = self._cached_figure(
                self._sweep,
                figures.step_size_figure,
                "press “sweep step sizes” to rerun the starts over a range of learning rates",
            )
        sync_figure(self.side, fig)

    def _cached_figure(self, cached: Any, build: Any, hint: str) -> go.Figure:
        if cached is None:
            return go.Figure(layout={"title": {"text": hint}, "height": 200})
        state, value = cached
        fig = build(value)
        if state != self.state:
            fig.update_layout(
                title_text=f"{fig.layout.title.text or ''} (computed for earlier settings; press again to update)"
            )
        return fig

    # ------------------------------------------------------------ analyses
    def map_basins(self, resolution: int | None = None) -> Any:
        """Run descent from a grid of starts on the slice; show and return the basin map."""
        state = self.state
        res = int(resolution or self.basins_resolution.value)
        self._say(f"mapping basins from {res * res} starts…")
        self.progress.layout.display = None
        self.progress.value = 1
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", MinimaWarning)
            bm = self.computer.basins(res)
        notes = self._pass_on(caught)
        self.progress.value = 4
        self._basins = (state, bm)
        self.view.value = "basins"
        self._draw_side()
        self._say(
            f"basin map: {len(bm.minima)} critical points{_letters(bm.minima)} from "
            f"{res * res} starts" + "".join(f" · {n}" for n in notes)
        )
        return bm

    def sweep_step_sizes(self, learning_rates: Any = None) -> Any:
        """Rerun the current starts over a range of learning rates; show and return the sweep."""
        state = self.state
        rates = (
            learning_rates
            if learning_rates is not None
            else state.learning_rate * np.geomspace(1 / 30, 30, 15)
        )
        self._say(f"sweeping {len(rates)} learning rates…")
        self.progress.layout.display = None
        self.progress.value = 1
        sweep = self.computer.sweep(rates)
        self.progress.value = 4
        self._sweep = (state, sweep)
        self.view.value = "step sizes"
        self._draw_side()
        bound = "none" if sweep.predicted_bound is None else f"{sweep.predicted_bound:.4g}"
        self._say(
            f"step sizes: predicted bound {bound}, largest rate without divergence {sweep.observed_bound}"
        )
        return sweep

    # ------------------------------------------------------------ records
    def record(self, note: str = "") -> Settings:
        """Store the current settings as a snapshot (shown under the widget) and return them."""
        settings = self.computer.settings(note=note)
        self.log.add(settings)
        self._say(f"recorded snapshot {len(self.log)}")
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
        """
        if not isinstance(settings, Settings):
            settings = Settings.load(settings, problem=problem)
        else:
            settings.check(problem)
        settings = upgrade_settings(problem, settings)
        state = state_from_settings(settings, problem=problem)
        fields = {f: getattr(state, f) for f in state.__dataclass_fields__ if f != "plane_kind"}
        if {"learning_rate", "hyper", "optimizer"} & set(options) and "grid" not in options:
            fields["grid"] = ()  # a rate or rule given here replaces the recorded grid
        fields.update(options)
        return cls(problem, state.plane_kind, **fields)

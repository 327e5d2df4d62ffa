"""Recompute only what a change of view state needs (widget-free).

:class:`ViewComputer` keeps the last results of every stage (plane,
surface, starts, runs, minima) and, given a new :class:`ViewState`, reruns
just the stages :func:`stages_to_update` names. The stages are those of the
one analysis pipeline (:mod:`basinview.core.analysis`): the state becomes a
:class:`~basinview.core.ViewSpec` and each stage calls the same function
:func:`~basinview.core.analyse` does. On failure it raises and keeps the
previous results and state, so the last good view survives.
"""

from __future__ import annotations

import time
from collections import Counter
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..core import (
    Analysis,
    BasinMap,
    Minima,
    ParameterError,
    Plane,
    Problem,
    Runs,
    Solutions,
    Starts,
    StepSizeSweep,
    Surface,
    ViewSpec,
    axes_plane,
    combine_starts,
    compute_basins,
    compute_minima,
    compute_runs,
    compute_surface,
    compute_sweep,
    evaluate_surface,
    explicit_starts,
    hessian_plane,
    random_plane,
    random_starts,
    run_padding_floor,
)
from ..core.analysis import record_view
from ..core.settings import Settings
from .schemes import group_solutions, scheme_start_set
from .state import ViewState, stages_to_update

__all__ = ["PREVIEW_AFTER_SECONDS", "ViewComputer", "ViewResults"]

#: A surface that took longer than this is first redrawn at a coarse preview resolution.
PREVIEW_AFTER_SECONDS = 0.3
PREVIEW_RESOLUTION = 31


@dataclass(frozen=True, eq=False)
class ViewResults:
    """Results of the current view."""

    state: ViewState
    plane: Plane
    surface: Surface
    starts: Starts
    runs: Runs
    minima: Minima | None
    preview: bool = False
    #: Solutions grouped by connectivity (when the view's grouping uses them), else None.
    solutions: Solutions | None = None

    @property
    def analysis(self) -> Analysis:
        """These results as an :class:`~basinview.core.Analysis` (no settings attached)."""
        return Analysis(
            plane=self.plane,
            surface=self.surface,
            starts=self.starts,
            runs=self.runs,
            minima=self.minima,
        )


@dataclass
class ViewComputer:
    """Stage-wise computation of a view for one problem, with per-stage caching.

    Attributes:
        problem: the problem.
        schemes: the initialisation schemes the view may start from (name ->
            starts, drawn once; see :mod:`basinview.explorer.schemes`).
        connect_options: keyword arguments of :func:`~basinview.core.connect_runs`
            when solutions are grouped by connectivity.
        counts: how many times each stage ran (for tests and diagnostics).
        seconds: duration of the last run of each stage.
    """

    problem: Problem
    schemes: dict[str, Starts] = field(default_factory=dict)
    connect_options: dict[str, Any] = field(default_factory=dict)
    counts: Counter = field(default_factory=Counter)
    seconds: dict[str, float] = field(default_factory=dict)
    _state: ViewState | None = None
    _results: dict[str, Any] = field(default_factory=dict)

    @property
    def state(self) -> ViewState | None:
        """The state of the last successful update."""
        return self._state

    @property
    def results(self) -> ViewResults | None:
        if self._state is None:
            return None
        r = self._results
        return ViewResults(
            self._state,
            r["plane"],
            r["surface"],
            r["starts"],
            r["runs"],
            r.get("minima"),
            solutions=r.get("solutions"),
        )

    def stages_for(self, state: ViewState) -> tuple[str, ...]:
        return stages_to_update(self._state, state)

    def wants_preview(self, state: ViewState) -> bool:
        """Whether the surface must be recomputed and was slow last time."""
        return (
            "surface" in self.stages_for(state)
            and self.seconds.get("surface", 0.0) > PREVIEW_AFTER_SECONDS
        )

    def preview(self, state: ViewState) -> ViewResults:
        """A quick coarse look at ``state`` (surface at preview resolution; not cached)."""
        state.check()
        stages = self.stages_for(state)
        r = self._results
        plane = self._plane(state) if "plane" in stages else r["plane"]
        starts = (
            self._starts(state, plane) if "starts" in stages or "starts" not in r else r["starts"]
        )
        view = state.view_spec(plane, starts)
        coarse = min(state.resolution, PREVIEW_RESOLUTION)
        surface = compute_surface(self.problem, view, resolution=coarse)
        runs = self._runs(view) if "runs" in stages or "runs" not in r else r["runs"]
        return ViewResults(state, plane, surface, starts, runs, None, preview=True)

    def update(self, state: ViewState) -> tuple[ViewResults, tuple[str, ...]]:
        """Recompute the stages ``state`` needs; return the results and the stages run.

        On any error the previous state and results stay as they were.
        """
        state.check()
        stages = self.stages_for(state)
        new = dict(self._results)
        # The plane and the starts make the view; the other stages compute on it.
        for stage in ("plane", "starts", "surface", "runs", "minima"):
            if stage not in stages:
                continue
            t0 = time.perf_counter()
            if stage == "plane":
                new["plane"] = self._plane(state)
            elif stage == "starts":
                new["starts"] = self._starts(state, new["plane"])
            else:
                view = state.view_spec(new["plane"], new["starts"])
                if stage == "surface":
                    new["surface"] = compute_surface(self.problem, view)
                elif stage == "runs":
                    new["runs"] = self._runs(view)
                else:
                    self._minima(state, new)
            self.seconds[stage] = time.perf_counter() - t0
            self.counts[stage] += 1
        self._results = new
        self._state = state
        results = self.results
        assert results is not None
        return results, stages

    def view(self) -> ViewSpec:
        """The :class:`~basinview.core.ViewSpec` of the current view."""
        if self._state is None:
            raise RuntimeError("nothing has been computed yet")
        return self._state.view_spec(self._results["plane"], self._results["starts"])

    def settings(self, note: str = "") -> Settings:
        """A :class:`Settings` record of the current view."""
        return record_view(self.problem, self.view(), self._results["runs"], note=note)

    def basins(self, resolution: int, progress: Any = False) -> BasinMap:
        """A basin map of the current view at its (first) learning rate and hyper-parameters.

        ``progress(done, total, what)`` is called between the compiled calls
        (and may raise to stop the work there).
        """
        state = self.state
        assert state is not None
        return compute_basins(
            self.problem,
            self.view(),
            resolution=resolution,
            learning_rate=state.learning_rate,
            hyper=state.hyper_dict,
            progress=progress,
        )

    def sweep(self, rates: Any, progress: Any = None) -> StepSizeSweep:
        """A step-size sweep of the current starts over ``rates`` (the other hyper-parameters
        at their first values). ``progress`` is told before and after (one call)."""
        state = self.state
        assert state is not None
        if callable(progress):
            progress(0, 1, "sweep")
        sweep = compute_sweep(self.problem, self.view(), rates, hyper=state.hyper_dict)
        if callable(progress):
            progress(1, 1, "sweep")
        return sweep

    def full_surface(self, state: ViewState, progress: Any = None) -> Surface:
        """The surface of ``state`` (its plane must be the current one), call by call.

        Used for slow surfaces: computed apart from :meth:`update` (in a worker)
        and adopted with :meth:`adopt_surface` if the view is still ``state``.
        """
        view = state.view_spec(self._results["plane"], self._results["starts"])
        return evaluate_surface(
            self.problem,
            view.plane,
            span=view.span,
            resolution=view.resolution,
            progress=progress,
        )

    def adopt_surface(self, state: ViewState, surface: Surface) -> bool:
        """Keep ``surface`` as the current view's surface if its slice and span are still ``state``'s."""
        current = self._state
        if current is None or {"plane", "surface"} & set(stages_to_update(state, current)):
            return False  # the view moved to another slice or span meanwhile
        self._results = {**self._results, "surface": surface}
        self.counts["surface"] += 1
        return True

    def update_without_surface(self, state: ViewState) -> tuple[ViewResults, tuple[str, ...]]:
        """Like :meth:`update` but the surface stage shows a coarse preview, not the full grid.

        Returns the results (with ``preview=True`` when the surface is coarse) and the
        stages run; the full surface comes from :meth:`full_surface`.
        """
        state.check()
        stages = self.stages_for(state)
        if "surface" not in stages:
            return self.update(state)
        new = dict(self._results)
        for stage in ("plane", "starts", "runs", "minima"):
            if stage not in stages:
                continue
            t0 = time.perf_counter()
            if stage == "plane":
                new["plane"] = self._plane(state)
            elif stage == "starts":
                new["starts"] = self._starts(state, new["plane"])
            elif stage == "runs":
                new["runs"] = self._runs(state.view_spec(new["plane"], new["starts"]))
            else:
                self._minima(state, new)
            self.seconds[stage] = time.perf_counter() - t0
            self.counts[stage] += 1
        view = state.view_spec(new["plane"], new["starts"])
        coarse = min(state.resolution, PREVIEW_RESOLUTION)
        new["surface"] = compute_surface(self.problem, view, resolution=coarse)
        self._results = new
        self._state = state
        results = self.results
        assert results is not None
        return ViewResults(**{**results.__dict__, "preview": True}), stages

    # ---------------------------------------------------------------- stages
    def _plane(self, state: ViewState) -> Plane:
        origin = (
            None if state.origin is None else np.asarray(state.origin, dtype=self.problem.dtype)
        )
        if state.plane_kind == "axes":
            return axes_plane(self.problem, state.x_label, state.y_label, origin=origin)
        if state.plane_kind == "random":
            return random_plane(
                self.problem,
                seed=state.plane_seed,
                normalise=state.normalise,
                zero_bias=state.zero_bias,
                filter_axis=state.filter_axis,
                origin=origin,
            )
        return hessian_plane(self.problem, origin=origin, seed=state.plane_seed)

    def _minima(self, state: ViewState, new: dict[str, Any]) -> None:
        """Critical points of the runs, and their groups by connectivity if the grouping asks."""
        new["minima"] = compute_minima(self.problem, new["runs"])
        new["solutions"] = group_solutions(
            self.problem, new["runs"], state.grouping, self.connect_options
        )

    def _starts(self, state: ViewState, plane: Plane) -> Starts:
        if state.scheme:
            if not self.schemes:
                raise ParameterError(
                    f"the view asks for the scheme {state.scheme!r}, but this Explorer was "
                    "given no schemes; pass schemes={...} to the Explorer."
                )
            return scheme_start_set(self.problem, self.schemes, state.scheme, state.start_points)
        parts = []
        if state.n_starts:
            center = (
                None if state.origin is None else np.asarray(state.origin, dtype=self.problem.dtype)
            )
            parts.append(
                random_starts(
                    self.problem,
                    state.n_starts,
                    scale=state.start_scale,
                    seed=state.start_seed,
                    center=center,
                )
            )
        if state.start_points:
            parts.append(
                explicit_starts(
                    self.problem, np.asarray(state.start_points, dtype=self.problem.dtype)
                )
            )
        return combine_starts(*parts)

    @property
    def _run_floor(self) -> int:
        # Small models pad every sweep to 16 runs, so moving the start-count slider
        # or clicking starts rarely meets a run count that is not compiled yet.
        return int(
            self.problem.cached(("explorer-run-floor",), lambda: run_padding_floor(self.problem))
        )

    def _runs(self, view: ViewSpec) -> Runs:
        return compute_runs(self.problem, view, min_runs=self._run_floor)

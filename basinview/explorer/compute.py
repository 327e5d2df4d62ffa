"""Recompute only what a change of view state needs (widget-free).

:class:`ViewComputer` keeps the last results of every stage (plane,
surface, starts, runs, minima) and, given a new :class:`ViewState`, reruns
just the stages :func:`stages_to_update` names. On failure it raises and
keeps the previous results and state, so the last good view survives.
"""

from __future__ import annotations

import time
from collections import Counter
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..core import (
    Minima,
    Plane,
    Problem,
    Runs,
    Starts,
    Surface,
    axes_plane,
    combine_starts,
    descend,
    evaluate_surface,
    explicit_starts,
    find_minima,
    hessian_plane,
    random_plane,
    random_starts,
    record_settings,
    run_padding_floor,
)
from ..core.settings import Settings
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


@dataclass
class ViewComputer:
    """Stage-wise computation of a view for one problem, with per-stage caching.

    Attributes:
        problem: the problem.
        counts: how many times each stage ran (for tests and diagnostics).
        seconds: duration of the last run of each stage.
    """

    problem: Problem
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
            self._state, r["plane"], r["surface"], r["starts"], r["runs"], r.get("minima")
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
        plane = self._plane(state) if "plane" in stages else self._results["plane"]
        coarse = min(state.resolution, PREVIEW_RESOLUTION)
        surface = evaluate_surface(self.problem, plane, span=state.span, resolution=coarse)
        r = self._results
        starts = (
            self._starts(state, plane) if "starts" in stages or "starts" not in r else r["starts"]
        )
        runs = (
            self._runs(state, plane, starts) if "runs" in stages or "runs" not in r else r["runs"]
        )
        return ViewResults(state, plane, surface, starts, runs, None, preview=True)

    def update(self, state: ViewState) -> tuple[ViewResults, tuple[str, ...]]:
        """Recompute the stages ``state`` needs; return the results and the stages run.

        On any error the previous state and results stay as they were.
        """
        state.check()
        stages = self.stages_for(state)
        new = dict(self._results)
        for stage in stages:
            t0 = time.perf_counter()
            if stage == "plane":
                new["plane"] = self._plane(state)
            elif stage == "surface":
                new["surface"] = evaluate_surface(
                    self.problem, new["plane"], span=state.span, resolution=state.resolution
                )
            elif stage == "starts":
                new["starts"] = self._starts(state, new["plane"])
            elif stage == "runs":
                new["runs"] = self._runs(state, new["plane"], new["starts"])
            elif stage == "minima":
                new["minima"] = (
                    find_minima(self.problem, new["runs"])
                    if (new["runs"].status == "converged").any()
                    else None
                )
            self.seconds[stage] = time.perf_counter() - t0
            self.counts[stage] += 1
        self._results = new
        self._state = state
        results = self.results
        assert results is not None
        return results, stages

    def settings(self, note: str = "") -> Settings:
        """A :class:`Settings` record of the current view."""
        if self._state is None:
            raise RuntimeError("nothing has been computed yet")
        r = self._results
        return record_settings(
            self.problem,
            plane=r["plane"],
            span=self._state.span,
            resolution=self._state.resolution,
            starts=r["starts"],
            runs=r["runs"],
            note=note,
        )

    # ---------------------------------------------------------------- stages
    def _plane(self, state: ViewState) -> Plane:
        origin = (
            None if state.origin is None else np.asarray(state.origin, dtype=self.problem.dtype)
        )
        if state.plane_kind == "axes":
            return axes_plane(self.problem, state.x_label, state.y_label, origin=origin)
        if state.plane_kind == "random":
            return random_plane(
                self.problem, seed=state.plane_seed, normalise=state.normalise, origin=origin
            )
        return hessian_plane(self.problem, origin=origin, seed=state.plane_seed)

    def _starts(self, state: ViewState, plane: Plane) -> Starts:
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

    def _runs(self, state: ViewState, plane: Plane, starts: Starts) -> Runs:
        return descend(
            self.problem,
            starts,
            optimizer=state.optimizer,
            learning_rate=state.learning_rate,
            hyper=state.hyper_dict,
            steps=state.steps,
            plane=plane,
            min_runs=self._run_floor,
        )

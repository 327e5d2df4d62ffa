"""The Explorer's view state: a frozen record of every control, and what a change needs.

Pure and widget-free. A :class:`ViewState` holds the values of all controls;
:func:`stages_to_update` says which computations a change of state requires
(changing the learning rate reruns descent, not the surface), and
:func:`state_from_settings` / :func:`settings_fields` connect the state to
:class:`~basinview.core.Settings` records.
"""

from __future__ import annotations

import dataclasses
import warnings
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..core import (
    ParameterError,
    Plane,
    Problem,
    Settings,
    Starts,
    ViewSpec,
    default_tolerances,
    get_rule,
    plane_from_spec,
    starts_from_spec,
)
from .schemes import GROUPINGS, scheme_fields

__all__ = ["STAGES", "ViewState", "stages_to_update", "state_from_settings"]

#: Computation stages, upstream first.
STAGES = ("plane", "surface", "starts", "runs", "minima")

# Which fields of the state each stage reads directly.
_READS: dict[str, tuple[str, ...]] = {
    "plane": (
        "plane_kind",
        "x_label",
        "y_label",
        "plane_seed",
        "normalise",
        "zero_bias",
        "filter_axis",
        "origin",
    ),
    "surface": ("span", "resolution"),
    "starts": ("n_starts", "start_scale", "start_seed", "start_points", "scheme"),
    "runs": (
        "optimizer",
        "learning_rate",
        "hyper",
        "grid",
        "steps",
        "grad_tol",
        "loss_tol",
        "divergence_factor",
        "batch_size",
        "batch_seed",
    ),
    "minima": ("grouping",),
}
# Which stages each stage depends on.
_NEEDS: dict[str, tuple[str, ...]] = {
    "plane": (),
    "surface": ("plane",),
    "starts": ("plane",),
    "runs": ("starts", "plane"),
    "minima": ("runs",),
}

PLANE_KINDS = ("axes", "random", "hessian")


@dataclass(frozen=True)
class ViewState:
    """Everything the Explorer's controls describe.

    Attributes:
        plane_kind: ``"axes"``, ``"random"`` or ``"hessian"``.
        x_label, y_label: coordinates of an axes plane.
        plane_seed, normalise: seed and normalisation of a random plane.
        zero_bias, filter_axis: as in :func:`~basinview.core.random_plane`.
        origin: flat origin of the plane, or None for the problem's parameters.
        span: ``((a_min, a_max), (b_min, b_max))`` of the surface grid, in plane
            coordinates (parameter values on an axes plane).
        resolution: grid points per axis.
        optimizer: update-rule name.
        learning_rate: step size.
        hyper: other hyper-parameters as sorted ``(name, value)`` pairs.
        grid: a grid of hyper-parameter values as sorted ``(name, values)`` pairs
            (``"learning_rate"`` among them), e.g. from a recorded view; when
            set, runs cover every combination, and ``learning_rate`` and ``hyper``
            hold its first values (what the controls show). Changing the learning
            rate, a hyper-parameter or the optimizer returns to one setting.
        steps: step budget.
        grad_tol, loss_tol: convergence tolerances (None: by dtype).
        divergence_factor, batch_size, batch_seed: as ``divergence_factor``,
            ``batch_size`` and ``seed`` of :func:`~basinview.core.descend`.
        n_starts, start_scale, start_seed: random starts around the plane origin.
        start_points: extra starts (flat vectors), e.g. from clicks on the map.
        scheme: the initialisation scheme the runs start from (a name of the
            Explorer's ``schemes=``, or ``"all schemes"`` side by side); empty
            without schemes, when the random starts above are used.
        grouping: how solutions are named: ``"critical points"`` (letters),
            ``"connectivity"`` (groups ``S1``, ``S2``... joined by low
            segments) or ``"auto"`` (connectivity when fewer than half of the
            runs that did not diverge converged).
    """

    plane_kind: str = "axes"
    x_label: str = ""
    y_label: str = ""
    plane_seed: int = 0
    normalise: str = "filter"
    zero_bias: bool = True
    filter_axis: int = -1
    origin: tuple[float, ...] | None = None
    span: tuple[tuple[float, float], tuple[float, float]] = ((-1.0, 1.0), (-1.0, 1.0))
    resolution: int = 61
    optimizer: str = "gradient_descent"
    learning_rate: float = 0.01
    hyper: tuple[tuple[str, float], ...] = ()
    grid: tuple[tuple[str, tuple[float, ...]], ...] = ()
    steps: int = 200
    grad_tol: float | None = None
    loss_tol: float | None = None
    divergence_factor: float = 1e6
    batch_size: int | None = None
    batch_seed: int = 0
    n_starts: int = 8
    start_scale: float = 1.0
    start_seed: int = 0
    start_points: tuple[tuple[float, ...], ...] = ()
    scheme: str = ""
    grouping: str = "auto"

    def replace(self, **changes: Any) -> ViewState:
        """A copy with ``changes``; ``hyper`` and ``grid`` may be given as dicts.

        A grid is kept only while the single values (learning rate,
        hyper-parameters, optimizer) stay its first values.
        """
        if "hyper" in changes and isinstance(changes["hyper"], dict):
            changes["hyper"] = tuple(
                sorted((str(k), float(v)) for k, v in changes["hyper"].items())
            )
        if "grid" in changes:
            grid = dict(changes["grid"])
            changes["grid"] = tuple(
                sorted((str(k), tuple(float(x) for x in np.atleast_1d(v))) for k, v in grid.items())
            )
        if "start_points" in changes:
            changes["start_points"] = tuple(
                tuple(float(x) for x in p) for p in changes["start_points"]
            )
        if "origin" in changes and changes["origin"] is not None:
            changes["origin"] = tuple(float(x) for x in changes["origin"])
        new = dataclasses.replace(self, **changes)
        if new.grid and "grid" not in changes:
            if new.optimizer != self.optimizer or not new._grid_matches():
                new = dataclasses.replace(new, grid=())
        return new

    def _grid_matches(self) -> bool:
        single = {"learning_rate": self.learning_rate, **self.hyper_dict}
        return all(name in single and single[name] == values[0] for name, values in self.grid)

    @property
    def hyper_dict(self) -> dict[str, float]:
        return dict(self.hyper)

    @property
    def grid_size(self) -> int:
        """Hyper-parameter settings the runs cover (1 without a grid)."""
        return int(np.prod([len(v) for _, v in self.grid])) if self.grid else 1

    def view_spec(self, plane: Plane, starts: Starts) -> ViewSpec:
        """The :class:`~basinview.core.ViewSpec` of this state on ``plane`` from ``starts``."""
        grid = dict(self.grid)
        rates = grid.pop("learning_rate", (self.learning_rate,))
        hyper = {k: (v,) for k, v in self.hyper}
        hyper.update(grid)
        return ViewSpec(
            plane=plane,
            starts=starts,
            span=self.span,
            resolution=(self.resolution, self.resolution),
            optimizer=self.optimizer,
            learning_rate=rates,
            hyper=hyper,
            steps=self.steps,
            grad_tol=self.grad_tol,
            loss_tol=self.loss_tol,
            divergence_factor=self.divergence_factor,
            batch_size=self.batch_size,
            seed=self.batch_seed,
        )

    def check(self) -> None:
        """Raise ParameterError for values no computation can use."""
        if self.plane_kind not in PLANE_KINDS:
            raise ParameterError(
                f"plane kind must be one of {PLANE_KINDS}; got {self.plane_kind!r}."
            )
        if self.n_starts < 0:
            raise ParameterError(
                f"the number of random starts must be 0 or more; got {self.n_starts}."
            )
        if self.grouping not in GROUPINGS:
            raise ParameterError(f"grouping must be one of {GROUPINGS}; got {self.grouping!r}.")
        if self.n_starts == 0 and not self.start_points and not self.scheme:
            raise ParameterError(
                "there are no starts: set the number of random starts above 0 or click the map."
            )
        get_rule(self.optimizer)


def stages_to_update(old: ViewState | None, new: ViewState) -> tuple[str, ...]:
    """The stages whose results a change from ``old`` to ``new`` invalidates, upstream first."""
    if old is None:
        return STAGES
    dirty: set[str] = set()
    # The axis labels name an axes plane's coordinates; other planes do not read them
    # (the controls fill them in on a random or Hessian plane: that is no new plane).
    labels_unread = old.plane_kind != "axes" and new.plane_kind != "axes"
    for stage in STAGES:
        fields = _READS[stage]
        if stage == "plane" and labels_unread:
            fields = tuple(f for f in fields if f not in ("x_label", "y_label"))
        if any(getattr(old, f) != getattr(new, f) for f in fields) or any(
            d in dirty for d in _NEEDS[stage]
        ):
            dirty.add(stage)
    return tuple(s for s in STAGES if s in dirty)


def state_from_settings(
    settings: Settings, base: ViewState | None = None, *, problem: Problem | None = None
) -> ViewState:
    """The view state a :class:`Settings` record describes, with nothing left out.

    A grid of learning rates and hyper-parameters becomes the state's ``grid``
    (the controls show its first values); tolerances, divergence factor and
    minibatch settings are kept. Starts the controls cannot describe (random
    starts around another centre than the plane origin, several random
    draws, grid starts) are rebuilt from the record as clicked starts, which
    needs ``problem``. Starts from initialisation schemes give the scheme
    shown (its name, or ``"all schemes"`` when several were recorded) and the
    clicked starts; the schemes themselves are the Explorer's
    (:meth:`Explorer.from_settings <basinview.explorer.Explorer.from_settings>`
    rebuilds them from the record). What the Explorer cannot show at all (other plane
    kinds, a Hessian plane's solver, initialiser starts) raises
    :class:`ParameterError` naming it; a non-square surface grid warns and
    uses the finer resolution on both axes.
    """
    base = base or ViewState()
    plane = settings.plane
    kind = plane.get("kind")
    if kind not in PLANE_KINDS:
        raise ParameterError(
            f"the Explorer shows axes, random and Hessian planes; these settings use a {kind!r} plane. "
            "Rebuild that view with basinview.core.compute_view instead."
        )
    if kind == "axes" and "coordinates" not in plane:
        raise ParameterError(
            "these settings were recorded when spans on axes planes were offsets from the "
            "origin; convert them first with basinview.core.upgrade_record(problem, ...) "
            "or open them with Explorer.from_settings(problem, settings), which does."
        )
    ra, rb = (int(r) for r in settings.resolution)
    if ra != rb:
        warnings.warn(
            f"these settings use a {ra} x {rb} surface grid; the Explorer's grids are square, so "
            f"it shows {max(ra, rb)} x {max(ra, rb)}. compute_view(problem, settings) rebuilds "
            "the recorded grid.",
            UserWarning,
            stacklevel=2,
        )
    grid = {"learning_rate": settings.learning_rate, **settings.hyper}
    changes: dict[str, Any] = {
        "plane_kind": kind,
        "origin": plane.get("origin"),
        "span": settings.span,
        "resolution": max(ra, rb),
        "optimizer": settings.optimizer,
        "learning_rate": float(settings.learning_rate[0]),
        "hyper": {k: v[0] for k, v in settings.hyper.items()},
        "grid": grid if any(len(v) > 1 for v in grid.values()) else {},
        "steps": settings.steps,
        # tolerances equal to the dtype's defaults stay "default" (None), as the Explorer sets them
        **_tolerances(settings, problem),
        "divergence_factor": settings.divergence_factor,
        "batch_size": settings.batch_size,
        "batch_seed": settings.seed,
    }
    if kind == "axes":
        changes.update(x_label=plane["x"], y_label=plane["y"])
    elif kind == "random":
        changes.update(
            plane_seed=int(plane.get("seed", 0)),
            normalise=plane.get("normalise", "filter"),
            zero_bias=bool(plane.get("zero_bias", True)),
            filter_axis=int(plane.get("filter_axis", -1)),
        )
    else:
        if plane.get("method", "auto") != "auto":
            raise ParameterError(
                f"these settings use a Hessian plane found with method={plane['method']!r}; the "
                "Explorer finds it with method='auto'. Rebuild that view with "
                "basinview.core.compute_view instead."
            )
        changes.update(plane_seed=int(plane.get("seed", 0)))
    changes.update(_starts_fields(settings, problem))
    return base.replace(**changes)


def _tolerances(settings: Settings, problem: Problem | None) -> dict[str, float | None]:
    defaults = default_tolerances(problem.dtype) if problem is not None else {}
    return {
        name: None if defaults.get(name) == value else value
        for name, value in (("grad_tol", settings.grad_tol), ("loss_tol", settings.loss_tol))
    }


def _starts_fields(settings: Settings, problem: Problem | None) -> dict[str, Any]:
    spec = settings.starts
    if spec.get("kind") == "schemes":  # the scheme shown (Explorer.from_settings rebuilds them)
        return scheme_fields(spec)
    parts = spec["parts"] if spec.get("kind") == "combined" else [spec]
    kinds = [part.get("kind") for part in parts]
    origin = settings.plane.get("origin")
    # What the controls describe: one random draw around the plane origin, then clicked starts.
    simple = all(k == "explicit" for k in kinds[1:]) and kinds[0] in ("random", "explicit")
    if simple and kinds[0] == "random" and parts[0].get("center") != origin:
        simple = False  # the Explorer draws its random starts around the plane origin
    if simple:
        fields: dict[str, Any] = {"n_starts": 0}
        points: list[list[float]] = []
        for part in parts:
            if part["kind"] == "random":
                fields.update(
                    n_starts=int(part["count"]),
                    start_scale=float(part["scale"]),
                    start_seed=int(part["seed"]),
                )
            else:
                points.extend(part["points"])
        fields["start_points"] = tuple(tuple(float(x) for x in p) for p in points)
        return fields
    if "initializer" in kinds:
        raise ParameterError(
            "these settings use starts drawn by an initialiser, which the Explorer cannot redraw. "
            "Rebuild that view with basinview.core.compute_view(problem, settings, "
            "initializers=...) instead."
        )
    if problem is None:
        raise ParameterError(
            f"these settings use {kinds} starts, which the Explorer shows as clicked starts; "
            "pass problem= to rebuild them."
        )
    plane_obj = plane_from_spec(problem, settings.plane) if "grid" in kinds else None
    starts = starts_from_spec(problem, spec, plane=plane_obj)
    return {"n_starts": 0, "start_points": tuple(tuple(float(x) for x in p) for p in starts.points)}


def as_span(span: Any) -> tuple[tuple[float, float], tuple[float, float]]:
    """Normalise a span to ``((a0, a1), (b0, b1))`` (same rules as evaluate_surface)."""
    from ..core.surface import span_ranges

    return span_ranges(span)


def default_span(problem: Any, plane_kind: str) -> tuple[tuple[float, float], tuple[float, float]]:
    """A first span: 1 for normalised random planes, else scaled to the parameters."""
    if plane_kind == "random":
        return ((-1.0, 1.0), (-1.0, 1.0))
    scale = float(np.max(np.abs(problem.theta0))) if problem.size else 1.0
    half = max(1.0, 2.0 * scale)
    return ((-half, half), (-half, half))

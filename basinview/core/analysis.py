"""One analysis of one view: the pipeline every front end uses.

A view is described by a :class:`~basinview.core.view.ViewSpec` (the plane, span and resolution
of the slice, the starts, the update rule with its grid of learning rates
and hyper-parameters, the step budget and tolerances); :class:`Settings` is
its JSON record and :meth:`ViewSpec.from_settings` rebuilds it.
:func:`analyse` runs the pipeline

``surface -> runs -> minima -> basin map -> step-size sweep -> profile``

and returns an :class:`Analysis`, a frozen bundle of the results with the
:class:`Settings` that reproduce them. :func:`compute_view`, the command
line, the HTML report and the Explorer all go through this module; the
Explorer calls the stage functions (:func:`compute_surface`,
:func:`compute_runs`, :func:`compute_minima`, :func:`compute_basins`,
:func:`compute_sweep`, :func:`compute_profile`) one at a time so that a
change reruns only the stages it affects.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from .basins import BasinMap, basin_map
from .curvature import hessian_spectrum, stability_bound
from .density import SpectralDensity, hessian_density
from .descent import Runs, descend
from .errors import ParameterError
from .minima import Minima, find_minima
from .optimizers import get_rule
from .planes import Plane
from .problem import Problem
from .settings import Settings, record_settings
from .starts import Starts
from .stepsize import StepSizeSweep, step_size_sweep
from .surface import Profile, Surface, evaluate_surface, segment_profile
from .view import ViewSpec, upgrade_settings

__all__ = [
    "Analysis",
    "View",
    "analyse",
    "compute_basins",
    "compute_density",
    "compute_minima",
    "compute_profile",
    "compute_runs",
    "compute_surface",
    "compute_sweep",
    "compute_view",
    "record_view",
    "sweep_rates_around_bound",
]


@dataclass(frozen=True, eq=False)
class Analysis:
    """The results of one view, and the settings that reproduce them.

    Every field but ``plane`` may be None (not computed). Built by
    :func:`analyse` (or :func:`compute_view`); read by the report, the
    command line and the Explorer.

    Attributes:
        settings: the :class:`Settings` record of the view.
        plane: the plane of the slice (taken from the surface, runs or basin
            map when not given).
        surface: the loss on the plane.
        starts: the starts of the runs.
        runs: descent from every start at every hyper-parameter setting.
        minima: critical points reached by converged runs (None when no run
            converged or when not asked for).
        basin_map: descent from a grid of starts on the plane.
        sweep: step-size sweep from the same starts.
        profile: the loss along the segment between the two lowest minima.
        profile_labels: the names of the profile's ends.
        density: Hessian eigenvalue density at ``density_at`` (when asked).
        density_at: the name of that point (a critical point's label, or "run N").
    """

    settings: Settings | None = None
    plane: Plane | None = None
    surface: Surface | None = None
    starts: Starts | None = None
    runs: Runs | None = None
    minima: Minima | None = None
    basin_map: BasinMap | None = None
    sweep: StepSizeSweep | None = None
    profile: Profile | None = None
    profile_labels: tuple[str, str] | None = None
    density: SpectralDensity | None = None
    density_at: str | None = None

    def __post_init__(self) -> None:
        if self.plane is None:
            for part in (self.surface, self.runs, self.basin_map):
                plane = getattr(part, "plane", None)
                if plane is not None:
                    object.__setattr__(self, "plane", plane)
                    break

    def replace(self, **changes: Any) -> Analysis:
        """A copy with ``changes`` (e.g. a basin map computed later)."""
        return dataclasses.replace(self, **changes)


#: The result of :func:`compute_view` (an :class:`Analysis` without minima, basins,
#: sweep or profile); kept under its earlier name.
View = Analysis


# ------------------------------------------------------------------ stages
def compute_surface(problem: Problem, view: ViewSpec, *, resolution: Any = None) -> Surface:
    """The loss on the view's plane and span (``resolution`` overrides the view's)."""
    return evaluate_surface(
        problem,
        view.plane,
        span=view.span,
        resolution=view.resolution if resolution is None else resolution,
        sizes=view.sizes if resolution is None and "surface_chunk" in view.sizes else None,
    )


def compute_runs(
    problem: Problem, view: ViewSpec, *, min_runs: int = 1, sharpness_every: int = 0
) -> Runs:
    """Descent from the view's starts at every setting of its hyper-parameter grid.

    Sharpness is tracked every ``sharpness_every`` steps when given (see
    :func:`~basinview.core.descend`), else as the view records it
    (``view.sharpness``, from ``Settings.sharpness``).
    """
    track = dict(view.sharpness)
    if sharpness_every:
        track = {"every": int(sharpness_every)}
    return descend(
        problem,
        view.starts,
        optimizer=view.optimizer,
        learning_rate=list(view.learning_rate),
        hyper={k: list(v) for k, v in view.hyper.items()},
        steps=view.steps,
        plane=view.plane,
        grad_tol=view.grad_tol,
        loss_tol=view.loss_tol,
        divergence_factor=view.divergence_factor,
        batch_size=view.batch_size,
        seed=view.seed,
        min_runs=min_runs,
        sizes=view.sizes if "descent_runs_per_call" in view.sizes else None,
        sharpness_every=int(track.get("every", 0)),
        sharpness_iterations=int(track.get("iterations", 2)),  # 2: descend's default
    )


def compute_density(
    problem: Problem, runs: Runs, minima: Minima | None, *, probes: int = 4, steps: int = 60
) -> tuple[SpectralDensity, str]:
    """The Hessian eigenvalue density at the lowest minimum found (else the lowest run end)."""
    lows = [] if minima is None else [i for i, k in enumerate(minima.kind) if k == "minimum"]
    if minima is not None and lows:
        i = min(lows, key=lambda j: float(minima.loss[j]))
        point, name = minima.points[i], str(minima.labels[i])
    else:
        finite = np.where(np.isfinite(runs.final_loss), runs.final_loss, np.inf)
        r = int(np.argmin(finite))
        point, name = runs.final[r], f"end of run {r}"
    return hessian_density(problem, point, probes=probes, steps=steps), name


def compute_minima(problem: Problem, runs: Runs) -> Minima | None:
    """The critical points the converged runs reached; None when no run converged."""
    if not np.any(np.asarray(runs.status) == "converged"):
        return None
    return find_minima(problem, runs)


def _one_rate(view: ViewSpec, learning_rate: float | None, what: str) -> float:
    if learning_rate is not None:
        return float(learning_rate)
    if len(view.learning_rate) > 1:
        raise ParameterError(
            f"the view runs {len(view.learning_rate)} learning rates; {what} uses one. Pass "
            f"learning_rate= (e.g. {min(view.learning_rate)!r})."
        )
    return view.learning_rate[0]


def compute_basins(
    problem: Problem,
    view: ViewSpec,
    *,
    resolution: Any = 31,
    learning_rate: float | None = None,
    hyper: Mapping[str, float] | None = None,
    progress: bool | None = None,
) -> BasinMap:
    """A basin map on the view's plane and span, with the view's rule and step budget.

    A basin map uses one learning rate and one value per hyper-parameter:
    give them when the view holds several.
    """
    return basin_map(
        problem,
        view.plane,
        span=view.span,
        resolution=resolution,
        optimizer=view.optimizer,
        learning_rate=_one_rate(view, learning_rate, "a basin map"),
        hyper=view.single_hyper(hyper, "a basin map"),
        steps=view.steps,
        grad_tol=view.grad_tol,
        loss_tol=view.loss_tol,
        progress=progress,
    )


def sweep_rates_around_bound(
    problem: Problem, view: ViewSpec, count: int, *, at: Any = None, hyper: Any = None
) -> np.ndarray:
    """``count`` learning rates from 1/30 to 3 times the predicted stable bound.

    The bound comes from the top Hessian eigenvalue at ``at`` (default: the
    problem's parameters); rules without such a bound centre the range on the
    median of the view's learning rates.
    """
    point = problem.theta0 if at is None else at
    lam = hessian_spectrum(problem, point, k=1).lambda_max
    rule = get_rule(view.optimizer)
    bound = stability_bound(rule.name, lam, view.single_hyper(hyper, "a step-size sweep"))
    centre = bound if bound else float(np.median(view.learning_rate))
    return np.geomspace(centre / 30, centre * 3, int(count))


def compute_sweep(
    problem: Problem,
    view: ViewSpec,
    rates: Sequence[float] | int,
    *,
    minima: Minima | None = None,
    hyper: Mapping[str, float] | None = None,
) -> StepSizeSweep:
    """A step-size sweep from the view's starts.

    Args:
        problem: the problem.
        view: the view (starts, rule, step budget, tolerances).
        rates: the learning rates, or a count of rates spread around the
            predicted bound at the lowest critical point of ``minima`` (see
            :func:`sweep_rates_around_bound`).
        minima: critical points of the view's runs (where the bound is taken).
        hyper: one value per other hyper-parameter, when the view holds several.
    """
    chosen: Sequence[float]
    if isinstance(rates, bool):
        raise ParameterError(f"rates must be learning rates or their count; got {rates!r}.")
    if isinstance(rates, (int, np.integer)):
        at = None
        if minima is not None and "minimum" in list(minima.kind):
            at = minima.lowest()
        chosen = list(sweep_rates_around_bound(problem, view, int(rates), at=at, hyper=hyper))
    else:
        chosen = rates
    return step_size_sweep(
        problem,
        view.starts,
        learning_rates=chosen,
        optimizer=view.optimizer,
        hyper=view.single_hyper(hyper, "a step-size sweep"),
        steps=view.steps,
        grad_tol=view.grad_tol,
        loss_tol=view.loss_tol,
    )


def compute_profile(
    problem: Problem, minima: Minima | None
) -> tuple[Profile, tuple[str, str]] | None:
    """The segment profile between the first two minima of ``minima`` and their labels.

    None when fewer than two rows are of kind ``"minimum"``.
    """
    if minima is None:
        return None
    lows = [i for i in range(len(minima)) if minima.kind[i] == "minimum"]
    if len(lows) < 2:
        return None
    i, j = lows[0], lows[1]
    profile = segment_profile(problem, minima.points[i], minima.points[j])
    return profile, (str(minima.labels[i]), str(minima.labels[j]))


def record_view(
    problem: Problem,
    view: ViewSpec,
    runs: Runs,
    note: str | None = None,
    surface: Surface | None = None,
) -> Settings:
    """The :class:`Settings` of ``view`` once its runs (and surface) are computed."""
    return record_settings(
        problem,
        plane=view.plane,
        span=view.span,
        resolution=view.resolution,
        starts=view.starts,
        runs=runs,
        note=view.note if note is None else note,
        surface=surface,
    )


# ---------------------------------------------------------------- pipeline
def analyse(
    problem: Problem,
    view: ViewSpec | Settings,
    *,
    minima: bool = True,
    basin_resolution: int = 0,
    basin_rate: float | None = None,
    sweep_rates: Sequence[float] | int = 0,
    profile: bool = True,
    optimizer: Any = None,
    initializers: dict[str, Callable[[Any], Any]] | None = None,
    sharpness_every: int = 0,
    density: bool = False,
) -> Analysis:
    """Compute one view: surface, runs, minima, basin map, sweep and profile.

    Args:
        problem: the problem.
        view: a :class:`ViewSpec`, or a :class:`Settings` record (rebuilt with
            :meth:`ViewSpec.from_settings`; the analysis then keeps that record).
        minima: find the critical points the converged runs reached.
        basin_resolution: grid points per axis of a basin map; 0 skips it.
        basin_rate: the basin map's learning rate (needed when the view has several).
        sweep_rates: learning rates of a step-size sweep, or their count around
            the predicted bound; 0 skips it.
        profile: the segment profile between the two first minima (when there are two).
        optimizer, initializers: as in :meth:`ViewSpec.from_settings` (Settings only).
        sharpness_every: track each run's sharpness every this many steps (0: no).
        density: the Hessian eigenvalue density at the lowest minimum (:func:`compute_density`).

    Returns:
        An :class:`Analysis` whose ``settings`` reproduce the view.

    Example:
        >>> import numpy as np
        >>> from basinview.core import Problem, ViewSpec, analyse, axes_plane, explicit_starts
        >>> problem = Problem(lambda p: (p["x"] ** 2 - 1) ** 2 + p["y"] ** 2, {"x": 0.5, "y": 0.5})
        >>> starts = explicit_starts(problem, np.array([[0.5, 0.5], [-0.5, 0.2]], np.float32))
        >>> view = ViewSpec(plane=axes_plane(problem, "x", "y"), starts=starts, span=1.5,
        ...                 resolution=21, learning_rate=0.1, steps=300)
        >>> result = analyse(problem, view)
        >>> sorted(round(float(x), 2) for x in result.minima.points[:, 0])
        [-1.0, 1.0]
        >>> round(float(result.profile.barrier), 2)
        1.0
    """
    recorded: Settings | None = None
    if isinstance(view, Settings):
        recorded = upgrade_settings(problem, view)
        view = ViewSpec.from_settings(problem, view, optimizer=optimizer, initializers=initializers)
    surface = compute_surface(problem, view)
    runs = compute_runs(problem, view, sharpness_every=sharpness_every)
    found = compute_minima(problem, runs) if minima else None
    spectrum = compute_density(problem, runs, found) if density else None
    basins = (
        compute_basins(problem, view, resolution=basin_resolution, learning_rate=basin_rate)
        if basin_resolution
        else None
    )
    sweep = None
    if not (isinstance(sweep_rates, (int, np.integer)) and int(sweep_rates) == 0):
        sweep = compute_sweep(problem, view, sweep_rates, minima=found)
    seg = compute_profile(problem, found) if profile else None
    return Analysis(
        settings=(
            recorded if recorded is not None else record_view(problem, view, runs, surface=surface)
        ),
        plane=view.plane,
        surface=surface,
        starts=view.starts,
        runs=runs,
        minima=found,
        basin_map=basins,
        sweep=sweep,
        profile=None if seg is None else seg[0],
        profile_labels=None if seg is None else seg[1],
        density=None if spectrum is None else spectrum[0],
        density_at=None if spectrum is None else spectrum[1],
    )


def compute_view(
    problem: Problem,
    settings: Settings,
    *,
    optimizer: Any = None,
    initializers: dict[str, Callable[[Any], Any]] | None = None,
) -> Analysis:
    """Recompute the view that ``settings`` describe, on ``problem``: plane, surface, starts, runs.

    The same pipeline as :func:`analyse` without minima, basins, sweep or profile.

    Args:
        problem: the problem (warns if its fingerprint differs from the record).
        settings: the record.
        optimizer: the update rule object when the record names a custom
            (optax) rule; built-in rules are found by name.
        initializers: initialiser functions by name, when the starts came
            from one.
    """
    return analyse(
        problem,
        settings,
        minima=False,
        profile=False,
        optimizer=optimizer,
        initializers=initializers,
    )

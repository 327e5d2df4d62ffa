"""ViewSpec: one view described as objects (plane, starts, grid of hyper-parameters, budget).

:class:`~basinview.core.Settings` is its JSON record; :meth:`ViewSpec.from_settings`
rebuilds it on a problem, and :func:`~basinview.core.analyse` computes it.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .checks import check_resolution
from .errors import ParameterError, SettingsError
from .plane_specs import plane_from_spec, upgrade_record
from .planes import Plane
from .problem import Problem
from .settings import Settings
from .starts import Starts, starts_from_spec
from .surface import span_ranges

__all__ = ["ViewSpec"]

Span = tuple[tuple[float, float], tuple[float, float]]


def _floats(values: Any, what: str) -> tuple[float, ...]:
    arr = np.atleast_1d(np.asarray(values, dtype=object))
    if arr.ndim != 1 or arr.size == 0:
        raise ParameterError(
            f"{what} must be a number or a non-empty list of numbers; got {values!r}."
        )
    try:
        return tuple(float(v) for v in arr)
    except (TypeError, ValueError):
        raise ParameterError(f"{what} must be numbers; got {values!r}.") from None


@dataclass(frozen=True, eq=False)
class ViewSpec:
    """What one view computes, as objects (its JSON record is :class:`Settings`).

    Attributes:
        plane: the plane of the slice and of the recorded paths.
        starts: where the runs begin.
        span: half-width around ``plane.centre``, or ``((a_min, a_max), (b_min, b_max))``
            in plane coordinates (parameter values on an axes plane).
        resolution: ``(points along a, points along b)``.
        optimizer: a rule name, an :class:`UpdateRule` or an optax object.
        learning_rate: the learning rates (runs = starts x rates x hyper grid).
        hyper: values of the other hyper-parameters, each a tuple.
        steps: step budget per run.
        grad_tol, loss_tol: convergence tolerances (None: by dtype).
        divergence_factor, batch_size, seed: as in :func:`descend`.
        note: a note kept in the recorded settings.
        sizes: program sizes to reuse (``Settings.sizes`` of a record; empty:
            from the cost model), so a recorded view reruns the same programs.
        sharpness: sharpness tracking of the runs (``Settings.sharpness``:
            ``{"every": k, "iterations": i}``; empty: not tracked).
    """

    plane: Plane
    starts: Starts
    span: Span = ((-1.0, 1.0), (-1.0, 1.0))
    resolution: tuple[int, int] = (61, 61)
    optimizer: Any = "gradient_descent"
    learning_rate: tuple[float, ...] = (0.01,)
    hyper: Mapping[str, tuple[float, ...]] = field(default_factory=dict)
    steps: int = 200
    grad_tol: float | None = None
    loss_tol: float | None = None
    divergence_factor: float = 1e6
    batch_size: int | None = None
    seed: int = 0
    note: str = ""
    sizes: Mapping[str, int] = field(default_factory=dict)
    sharpness: Mapping[str, int] = field(default_factory=dict)

    def __post_init__(self) -> None:
        object.__setattr__(self, "span", span_ranges(self.span, self.plane.centre))
        object.__setattr__(self, "resolution", check_resolution(self.resolution))
        object.__setattr__(self, "learning_rate", _floats(self.learning_rate, "learning_rate"))
        hyper = {str(k): _floats(v, str(k)) for k, v in dict(self.hyper).items()}
        object.__setattr__(self, "hyper", hyper)

    def replace(self, **changes: Any) -> ViewSpec:
        """A copy with ``changes``."""
        return dataclasses.replace(self, **changes)

    @classmethod
    def from_settings(
        cls,
        problem: Problem,
        settings: Settings,
        *,
        optimizer: Any = None,
        initializers: dict[str, Callable[[Any], Any]] | None = None,
    ) -> ViewSpec:
        """The view a :class:`Settings` record describes, rebuilt on ``problem``.

        Args:
            problem: the problem (warns if its fingerprint differs from the record).
            settings: the record.
            optimizer: the update rule object when the record names a custom
                (optax) rule; built-in rules are found by name.
            initializers: initialiser functions by name, when the starts came
                from one.
        """
        settings.check(problem)
        settings = upgrade_settings(problem, settings)
        try:
            plane = plane_from_spec(problem, settings.plane)
        except ParameterError as exc:
            raise SettingsError(f"settings field 'plane' cannot be rebuilt: {exc}") from None
        try:
            starts = starts_from_spec(
                problem, settings.starts, plane=plane, initializers=initializers
            )
        except ParameterError as exc:
            raise SettingsError(f"settings field 'starts' cannot be rebuilt: {exc}") from None
        return cls(
            plane=plane,
            starts=starts,
            span=settings.span,
            resolution=settings.resolution,
            optimizer=optimizer if optimizer is not None else settings.optimizer,
            learning_rate=settings.learning_rate,
            hyper=settings.hyper,
            steps=settings.steps,
            grad_tol=settings.grad_tol,
            loss_tol=settings.loss_tol,
            divergence_factor=settings.divergence_factor,
            batch_size=settings.batch_size,
            seed=settings.seed,
            note=settings.note,
            sizes=dict(settings.sizes),
            sharpness=dict(settings.sharpness),
        )

    def single_hyper(self, hyper: Mapping[str, float] | None, what: str) -> dict[str, float]:
        """One value per hyper-parameter for ``what`` (a basin map, a sweep).

        ``hyper`` chooses them; without it every hyper-parameter of the view
        must have one value (a grid is refused rather than cut to its first entry).
        """
        if hyper is not None:
            return {str(k): float(v) for k, v in hyper.items()}
        several = {k: v for k, v in self.hyper.items() if len(v) > 1}
        if several:
            name, values = next(iter(several.items()))
            raise ParameterError(
                f"the view runs {len(values)} values of {name} ({list(values)}); {what} uses one "
                f"value per hyper-parameter. Pass hyper={{{name!r}: {values[0]!r}}} (or another)."
            )
        return {k: v[0] for k, v in self.hyper.items()}


def upgrade_settings(problem: Problem, settings: Settings) -> Settings:
    """``settings`` in today's coordinates (see :func:`~basinview.core.plane_specs.upgrade_record`).

    Records from before axes planes read in parameter values have their span and
    grids of starts shifted by the origin's two values; newer records come back unchanged.
    """
    try:
        plane_spec, span, starts_spec = upgrade_record(
            problem, settings.plane, settings.span, settings.starts
        )
    except ParameterError as exc:
        raise SettingsError(f"settings field 'plane' cannot be rebuilt: {exc}") from None
    if (plane_spec, span, starts_spec) == (settings.plane, settings.span, settings.starts):
        return settings
    return dataclasses.replace(settings, plane=plane_spec, span=span, starts=starts_spec)

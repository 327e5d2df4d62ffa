"""The Explorer's view state: a frozen record of every control, and what a change needs.

Pure and widget-free. A :class:`ViewState` holds the values of all controls;
:func:`stages_to_update` says which computations a change of state requires
(changing the learning rate reruns descent, not the surface), and
:func:`state_from_settings` / :func:`settings_fields` connect the state to
:class:`~basinview.core.Settings` records.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..core import ParameterError, Settings, get_rule

__all__ = ["STAGES", "ViewState", "stages_to_update", "state_from_settings"]

#: Computation stages, upstream first.
STAGES = ("plane", "surface", "starts", "runs", "minima")

# Which fields of the state each stage reads directly.
_READS: dict[str, tuple[str, ...]] = {
    "plane": ("plane_kind", "x_label", "y_label", "plane_seed", "normalise", "origin"),
    "surface": ("span", "resolution"),
    "starts": ("n_starts", "start_scale", "start_seed", "start_points"),
    "runs": ("optimizer", "learning_rate", "hyper", "steps"),
    "minima": (),
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
        origin: flat origin of the plane, or None for the problem's parameters.
        span: ``((a_min, a_max), (b_min, b_max))`` of the surface grid, in plane
            coordinates (parameter values on an axes plane).
        resolution: grid points per axis.
        optimizer: update-rule name.
        learning_rate: step size.
        hyper: other hyper-parameters as sorted ``(name, value)`` pairs.
        steps: step budget.
        n_starts, start_scale, start_seed: random starts around the plane origin.
        start_points: extra starts (flat vectors), e.g. from clicks on the map.
    """

    plane_kind: str = "axes"
    x_label: str = ""
    y_label: str = ""
    plane_seed: int = 0
    normalise: str = "filter"
    origin: tuple[float, ...] | None = None
    span: tuple[tuple[float, float], tuple[float, float]] = ((-1.0, 1.0), (-1.0, 1.0))
    resolution: int = 61
    optimizer: str = "gradient_descent"
    learning_rate: float = 0.01
    hyper: tuple[tuple[str, float], ...] = ()
    steps: int = 200
    n_starts: int = 8
    start_scale: float = 1.0
    start_seed: int = 0
    start_points: tuple[tuple[float, ...], ...] = ()

    def replace(self, **changes: Any) -> ViewState:
        """A copy with ``changes``; ``hyper`` may be given as a dict."""
        if "hyper" in changes and isinstance(changes["hyper"], dict):
            changes["hyper"] = tuple(
                sorted((str(k), float(v)) for k, v in changes["hyper"].items())
            )
        if "start_points" in changes:
            changes["start_points"] = tuple(
                tuple(float(x) for x in p) for p in changes["start_points"]
            )
        if "origin" in changes and changes["origin"] is not None:
            changes["origin"] = tuple(float(x) for x in changes["origin"])
        return dataclasses.replace(self, **changes)

    @property
    def hyper_dict(self) -> dict[str, float]:
        return dict(self.hyper)

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
        if self.n_starts == 0 and not self.start_points:
            raise ParameterError(
                "there are no starts: set the number of random starts above 0 or click the map."
            )
        get_rule(self.optimizer)


def stages_to_update(old: ViewState | None, new: ViewState) -> tuple[str, ...]:
    """The stages whose results a change from ``old`` to ``new`` invalidates, upstream first."""
    if old is None:
        return STAGES
    dirty: set[str] = set()
    for stage in STAGES:
        if any(getattr(old, f) != getattr(new, f) for f in _READS[stage]) or any(
            d in dirty for d in _NEEDS[stage]
        ):
            dirty.add(stage)
    return tuple(s for s in STAGES if s in dirty)


def state_from_settings(settings: Settings, base: ViewState | None = None) -> ViewState:
    """The view state a :class:`Settings` record describes (first learning rate if several)."""
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
    changes: dict[str, Any] = {
        "plane_kind": kind,
        "origin": plane.get("origin"),
        "span": settings.span,
        "resolution": int(settings.resolution[0]),
        "optimizer": settings.optimizer,
        "learning_rate": float(settings.learning_rate[0]),
        "hyper": {k: v[0] for k, v in settings.hyper.items()},
        "steps": settings.steps,
    }
    if kind == "axes":
        changes.update(x_label=plane["x"], y_label=plane["y"])
    elif kind == "random":
        changes.update(
            plane_seed=int(plane.get("seed", 0)), normalise=plane.get("normalise", "filter")
        )
    else:
        changes.update(plane_seed=int(plane.get("seed", 0)))
    changes.update(_starts_fields(settings.starts))
    return base.replace(**changes)


def _starts_fields(spec: dict[str, Any]) -> dict[str, Any]:
    parts = spec["parts"] if spec.get("kind") == "combined" else [spec]
    fields: dict[str, Any] = {"n_starts": 0, "start_points": ()}
    points: list[list[float]] = []
    for part in parts:
        kind = part.get("kind")
        if kind == "random":
            fields.update(
                n_starts=int(part["count"]),
                start_scale=float(part["scale"]),
                start_seed=int(part["seed"]),
            )
        elif kind == "explicit":
            points.extend(part["points"])
        else:
            raise ParameterError(
                f"the Explorer uses random and explicit starts; these settings use {kind!r} starts. "
                "Rebuild that view with basinview.core.compute_view instead."
            )
    fields["start_points"] = tuple(tuple(float(x) for x in p) for p in points)
    return fields


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

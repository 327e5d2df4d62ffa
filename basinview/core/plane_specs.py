"""Plane specs: rebuilding a plane from its JSON record, and reading older records.

A plane's ``spec`` (stored in Settings) says how it was made; :func:`plane_from_spec`
rebuilds it. This module sits above :mod:`.planes` and :mod:`.curvature` (the
Hessian plane needs the spectrum), so neither of those imports the other.

Older records. Before axes planes read in parameter values, their spans and
grids of starts were offsets from the origin's two values. Such a record has
an axes spec without a ``"coordinates"`` field; :func:`upgrade_record` turns
it into today's system (the numbers shifted by the origin's values), and
:func:`plane_from_spec` refuses it where the two systems differ, rather than
showing another region than the one recorded.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from .curvature import hessian_plane
from .errors import ParameterError
from .planes import Plane, axes_plane, flat_origin, random_plane, through_plane
from .problem import Problem

__all__ = ["plane_from_spec", "upgrade_record"]

Span = tuple[tuple[float, float], tuple[float, float]]


_SPEC_KEYS = {
    "axes": {"kind", "x", "y", "origin", "coordinates"},
    "random": {"kind", "seed", "normalise", "zero_bias", "filter_axis", "origin"},
    "through": {"kind", "points", "origin"},
    "hessian": {"kind", "method", "seed", "origin"},
}


_REQUIRED = object()


def _spec_error(what: str) -> ParameterError:
    return ParameterError(
        f"plane spec: {what} Rebuild the plane with axes_plane, random_plane, through_plane "
        "or hessian_plane and use its .spec."
    )


def _spec_get(spec: dict[str, Any], key: str, kinds: tuple[type, ...], default: Any) -> Any:
    if key not in spec:
        if default is _REQUIRED:
            raise _spec_error(f"the {spec.get('kind')!r} plane needs the field {key!r}.")
        return default
    value = spec[key]
    if isinstance(value, bool) and bool not in kinds:
        raise _spec_error(f"field {key!r} must be {kinds[0].__name__}; got {value!r}.")
    if not isinstance(value, kinds):
        raise _spec_error(f"field {key!r} must be {kinds[0].__name__}; got {type(value).__name__}.")
    return value


def _spec_vector(problem: Problem, value: Any, what: str) -> np.ndarray:
    if not isinstance(value, (list, tuple, np.ndarray)):
        raise _spec_error(f"{what} must be a list of {problem.size} numbers.")
    try:
        arr = np.asarray(value, dtype=np.float64)
    except (TypeError, ValueError):
        raise _spec_error(f"{what} must be a list of {problem.size} numbers.") from None
    if arr.shape != (problem.size,):
        raise _spec_error(
            f"{what} must be a list of {problem.size} numbers (one per parameter); got shape "
            f"{arr.shape}."
        )
    return arr.astype(problem.dtype)


def plane_from_spec(problem: Problem, spec: dict[str, Any]) -> Plane:
    """Rebuild a plane from its ``spec`` (as stored in Settings).

    The spec is data: every field is checked for its type before use, and
    fields that the plane kind does not have are refused.
    """
    if not isinstance(spec, dict):
        raise _spec_error(f"expected an object with a 'kind'; got {type(spec).__name__}.")
    kind = spec.get("kind")
    if kind not in _SPEC_KEYS:
        raise ParameterError(
            f"unknown plane kind {kind!r}; expected one of 'axes', 'random', 'through', "
            "'hessian'. Rebuild the plane with one of those functions and use its .spec."
        )
    unknown = sorted(map(str, set(spec) - _SPEC_KEYS[kind]))
    if unknown:
        raise _spec_error(f"the {kind!r} plane has no fields {unknown}.")
    origin = spec.get("origin")
    origin = None if origin is None else _spec_vector(problem, origin, "'origin'")
    if kind == "axes":
        x = _spec_get(spec, "x", (str,), _REQUIRED)
        y = _spec_get(spec, "y", (str,), _REQUIRED)
        plane = axes_plane(problem, x, y, origin=origin)
        coordinates = _spec_get(spec, "coordinates", (str,), None)
        if coordinates is None and plane.centre != (0.0, 0.0):
            raise _spec_error(
                "this axes plane was recorded when spans and grids on axes planes were "
                f"offsets from the origin (the spec has no 'coordinates' field), and here "
                f"the origin has {x} = {plane.centre[0]:.6g}, {y} = {plane.centre[1]:.6g}, so "
                "its numbers would now mean other points. Load the whole record with "
                "compute_view or Explorer.from_settings (they convert it), or convert it "
                "with upgrade_record(problem, plane_spec, span, starts_spec)."
            )
        if coordinates not in (None, "values"):
            raise _spec_error(f"an axes plane's 'coordinates' is 'values'; got {coordinates!r}.")
        return plane
    if kind == "random":
        return random_plane(
            problem,
            seed=_spec_get(spec, "seed", (int,), 0),
            normalise=_spec_get(spec, "normalise", (str,), "filter"),
            zero_bias=_spec_get(spec, "zero_bias", (bool,), True),
            filter_axis=_spec_get(spec, "filter_axis", (int,), -1),
            origin=origin,
        )
    if kind == "through":
        raw = _spec_get(spec, "points", (list,), _REQUIRED)
        if len(raw) != 3:
            raise _spec_error("a 'through' plane needs exactly three points.")
        pts = [_spec_vector(problem, p, f"point {i}") for i, p in enumerate(raw)]
        plane = through_plane(problem, *pts)
        return plane if origin is None else plane.with_origin(origin)
    return hessian_plane(
        problem,
        origin=origin,
        method=_spec_get(spec, "method", (str,), "auto"),
        seed=_spec_get(spec, "seed", (int,), 0),
    )


def _legacy_shift(problem: Problem, spec: dict[str, Any]) -> tuple[float, float] | None:
    """The origin's two values for an axes spec recorded in offsets; None for any other spec."""
    if not isinstance(spec, dict) or spec.get("kind") != "axes" or "coordinates" in spec:
        return None
    x = _spec_get(spec, "x", (str,), _REQUIRED)
    y = _spec_get(spec, "y", (str,), _REQUIRED)
    origin = spec.get("origin")
    origin = None if origin is None else _spec_vector(problem, origin, "'origin'")
    theta, _ = flat_origin(problem, origin)
    return float(theta[problem.index(x)]), float(theta[problem.index(y)])


def _shift_starts(spec: Any, sa: float, sb: float) -> Any:
    if not isinstance(spec, dict):
        return spec
    if spec.get("kind") == "grid" and isinstance(spec.get("span"), list):
        try:
            (a0, a1), (b0, b1) = spec["span"]
            span = [[float(a0) + sa, float(a1) + sa], [float(b0) + sb, float(b1) + sb]]
        except (TypeError, ValueError):
            return spec  # malformed: starts_from_spec reports it
        return {**spec, "span": span}
    if spec.get("kind") == "combined" and isinstance(spec.get("parts"), list):
        return {**spec, "parts": [_shift_starts(p, sa, sb) for p in spec["parts"]]}
    return spec


def upgrade_record(
    problem: Problem, plane_spec: dict[str, Any], span: Span, starts_spec: dict[str, Any]
) -> tuple[dict[str, Any], Span, dict[str, Any]]:
    """A recorded plane, span and starts in today's coordinates.

    Records made before axes planes read in parameter values hold spans and
    grids of starts as offsets from the origin's two values. For such a
    record (an axes spec without ``"coordinates"``) the span and every grid
    of starts are shifted by those values and the spec gains
    ``"coordinates": "values"``: the same points as recorded, now named by
    their parameter values. Any other record comes back unchanged.

    Args:
        problem: the problem the record belongs to (its parameters are the
            origin when the record has none).
        plane_spec: the recorded plane spec.
        span: the recorded ``((a_min, a_max), (b_min, b_max))``.
        starts_spec: the recorded starts spec.

    Returns:
        ``(plane_spec, span, starts_spec)`` in today's coordinates.
    """
    shift = _legacy_shift(problem, plane_spec)
    if shift is None:
        return plane_spec, span, starts_spec
    sa, sb = shift
    (a0, a1), (b0, b1) = span
    new_span = ((float(a0) + sa, float(a1) + sa), (float(b0) + sb, float(b1) + sb))
    return {**plane_spec, "coordinates": "values"}, new_span, _shift_starts(starts_spec, sa, sb)

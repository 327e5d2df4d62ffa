"""The first view state of an Explorer, read from its constructor's options."""

from __future__ import annotations

from typing import Any

import numpy as np

from ..core import BasinviewError, Plane, Problem, get_rule
from .controls import respan
from .state import ViewState, default_span

__all__ = ["initial_state"]


def initial_state(problem: Problem, plane: Any, kw: dict[str, Any]) -> ViewState:
    """The view state an Explorer starts from (``kw``: its options; consumed)."""
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

"""Argument checks shared by several core modules (one place, one message each).

Every check takes the user's value, returns it in the form the engine uses, and
raises :class:`~basinview.core.errors.ParameterError` with a message that says
what was expected, what came, and how to fix it.
"""

from __future__ import annotations

from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from .errors import ParameterError

__all__ = [
    "MAX_RESOLUTION",
    "check_int",
    "check_resolution",
    "check_seed",
    "finite_point",
    "require_plane",
]

MAX_RESOLUTION = 4001
"""Most grid points per axis of a surface or basin map."""


def check_int(value: Any, name: str, low: int, high: int, hint: str = "") -> int:
    """``value`` as an int from ``low`` to ``high`` (booleans refused); ``hint`` ends the message."""
    if (
        isinstance(value, bool)
        or not isinstance(value, (int, np.integer))
        or not low <= value <= high
    ):
        tail = f" {hint}" if hint else ""
        raise ParameterError(
            f"{name} must be an integer from {low} to {high}; got {value!r}.{tail}"
        )
    return int(value)


def check_resolution(resolution: Any) -> tuple[int, int]:
    """Grid points per axis, ``(along a, along b)``, from an int or a pair of ints."""
    res = np.asarray(resolution)
    if res.shape == ():
        res = np.array([res, res])
    if res.shape != (2,) or not np.issubdtype(res.dtype, np.integer):
        raise ParameterError(
            f"resolution must be an integer or a pair of integers; got {resolution!r}."
        )
    if np.any(res < 2) or np.any(res > MAX_RESOLUTION):
        raise ParameterError(
            f"resolution must be between 2 and {MAX_RESOLUTION} points per axis; got "
            f"{res.tolist()}. Larger grids take too much memory and time; zoom in "
            "with span instead."
        )
    return int(res[0]), int(res[1])


def check_seed(seed: Any, *, below: int | None = None) -> int:
    """A non-negative integer seed (of NumPy's ``default_rng``), less than ``below`` if given."""
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        if below is not None:
            raise ParameterError(
                f"seed must be an integer from 0 to {_power(below)} - 1; got {seed!r}."
            )
        raise ParameterError(f"seed must be a non-negative integer; got {seed!r}.")
    if below is not None and seed >= below:
        raise ParameterError(
            f"seed must be an integer from 0 to {_power(below)} - 1; got {seed!r}."
        )
    return int(seed)


def _power(value: int) -> str:
    """``2**31`` for 2147483648 (how the limits read in messages)."""
    k = value.bit_length() - 1
    return f"2**{k}" if value == 2**k else str(value)


def finite_point(problem: Any, theta: Any) -> jax.Array:
    """``theta`` (pytree or flat) as a flat array of the problem's dtype; NaN/inf refused."""
    flat = problem.flatten(theta, what="point")
    if not np.all(np.isfinite(flat)):
        raise ParameterError("the point contains NaN or inf; curvature needs a finite point.")
    return jnp.asarray(flat, dtype=problem.dtype)


def require_plane(problem: Any, what: str) -> None:
    """Raise a :class:`ParameterError` that can be followed if ``problem`` has one parameter.

    Called wherever a plane is needed (``what`` names the caller, e.g.
    ``"axes_plane"``); descent, step-size sweeps, minima and profiles need
    no plane and work with one parameter.
    """
    if problem.size >= 2:
        return
    label = problem.labels[0]
    raise ParameterError(
        f"{what} needs a plane of two coordinates, but this problem has one parameter "
        f"({label!r}): there is no 2-D slice to draw. Without a plane you can still use "
        "descend(problem, starts) (its paths record the parameter itself), "
        "step_size_sweep, find_minima and segment_profile(problem, a, b) for the loss "
        "along the line between two values; the Explorer and `python -m basinview "
        "report` draw planes, so give them a model with at least two parameters (e.g. "
        "add an intercept, {'w': w, 'b': 0.0})."
    )

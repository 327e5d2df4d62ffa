"""The loss on a grid over a plane, and along a segment between two points.

Grids are evaluated by :func:`~basinview.core.points.evaluate_points` in
compiled blocks sized by the cost model, so memory is bounded by ``chunk``
evaluations of the loss at a time whatever the grid or data size, and
changing the resolution or the span reuses compiled code.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from .checks import MAX_RESOLUTION, check_resolution
from .errors import ParameterError
from .planes import Plane
from .points import evaluate_points, evaluate_points_sized, points_sizes
from .problem import Problem

__all__ = [
    "MAX_RESOLUTION",
    "Profile",
    "Surface",
    "evaluate_points",
    "evaluate_surface",
    "points_sizes",
    "segment_profile",
    "span_ranges",
]



@dataclass(frozen=True, eq=False)
class Surface:
    """The loss on a rectangular grid of a plane.

    Attributes:
        plane: the plane that was sliced.
        a, b: grid coordinates along ``plane.d1`` and ``plane.d2`` (parameter
            values on an axes plane, offsets on other planes).
        loss: ``(len(b), len(a))`` array; ``loss[j, i]`` is the loss at
            ``plane.lift(a[i], b[j])``. Points where the loss is NaN or inf are
            NaN (gaps).
        sizes: the program sizes it was computed with (``surface_chunk``,
            ``surface_block``); pass them back as ``sizes=`` to recompute it
            with the same program.
    """

    plane: Plane
    a: np.ndarray
    b: np.ndarray
    loss: np.ndarray
    sizes: dict[str, int] | None = None

    @property
    def finite_fraction(self) -> float:
        """Share of grid points where the loss was finite."""
        return float(np.isfinite(self.loss).mean())

    def grid_minimum(self) -> tuple[float, float, float]:
        """``(a, b, loss)`` of the lowest grid point.

        This is a minimum of the slice on this grid only: it need not be a
        minimum (or even a critical point) of the full loss.
        """
        if not np.isfinite(self.loss).any():
            raise ParameterError("the loss is not finite anywhere on this grid.")
        j, i = np.unravel_index(np.nanargmin(self.loss), self.loss.shape)
        return float(self.a[i]), float(self.b[j]), float(self.loss[j, i])

    def to_frame(self) -> pd.DataFrame:
        """Tidy table: one row per grid point, columns ``a``, ``b``, ``loss``."""
        aa, bb = np.meshgrid(self.a, self.b)
        return pd.DataFrame({"a": aa.ravel(), "b": bb.ravel(), "loss": self.loss.ravel()})


@dataclass(frozen=True, eq=False)
class Profile:
    """The loss along ``(1 - t) * start + t * end``.

    Attributes:
        t: positions; 0 is ``start`` and 1 is ``end``.
        loss: loss at each ``t`` (NaN where not finite).
        barrier: highest loss on ``0 <= t <= 1`` minus the higher endpoint
            loss; 0 when the segment never rises above its ends.
    """

    t: np.ndarray
    loss: np.ndarray
    start: np.ndarray
    end: np.ndarray
    barrier: float

    def to_frame(self) -> pd.DataFrame:
        return pd.DataFrame({"t": self.t, "loss": self.loss})


_SPAN_FORMS = (
    "span must be a number s (grid centre +- s), a pair (sa, sb), or ((a_min, a_max), "
    "(b_min, b_max))"
)


def span_ranges(
    span: Any, centre: Sequence[float] = (0.0, 0.0)
) -> tuple[tuple[float, float], tuple[float, float]]:
    """The ``((a_min, a_max), (b_min, b_max))`` plane coordinates a span stands for, checked.

    A half-width ``s`` or a pair of half-widths ``(sa, sb)`` is taken around
    ``centre`` (a plane's :attr:`~basinview.core.Plane.centre`: the two
    parameters' values on an axes plane, ``(0, 0)`` on offset planes).
    Explicit ranges are plane coordinates as they stand (parameter values
    on an axes plane) and ignore ``centre``.

    >>> span_ranges(2.0)
    ((-2.0, 2.0), (-2.0, 2.0))
    >>> span_ranges((1.0, 3.0))
    ((-1.0, 1.0), (-3.0, 3.0))
    >>> span_ranges(1.0, centre=(3.0, 2.0))
    ((2.0, 4.0), (1.0, 3.0))
    >>> span_ranges(((0.0, 1.0), (-5.0, 5.0)), centre=(3.0, 2.0))
    ((0.0, 1.0), (-5.0, 5.0))
    """
    try:
        arr = np.asarray(span, dtype=float)
    except (TypeError, ValueError) as exc:
        raise ParameterError(f"{_SPAN_FORMS}; got {span!r}.") from exc
    try:
        c = np.asarray(centre, dtype=float).reshape(2)
    except (TypeError, ValueError) as exc:
        raise ParameterError(f"the span's centre must be two numbers; got {centre!r}.") from exc
    if not np.all(np.isfinite(c)):
        raise ParameterError(f"the span's centre must be finite; got {c.tolist()}.")
    if arr.shape == ():
        arr = np.array([arr, arr])
    if arr.shape == (2,):
        arr = np.array([[c[0] - arr[0], c[0] + arr[0]], [c[1] - arr[1], c[1] + arr[1]]])
    if arr.shape != (2, 2):
        raise ParameterError(f"{_SPAN_FORMS}; got shape {arr.shape}.")
    if not np.all(np.isfinite(arr)) or np.any(arr[:, 1] <= arr[:, 0]):
        raise ParameterError(
            f"span must be finite and each range must have min < max; got {arr.tolist()}. "
            "A half-width s must be positive."
        )
    if np.any(np.abs(arr) > 1e12):
        raise ParameterError(
            f"span {arr.tolist()} is absurdly large (beyond 1e12): no float grid can "
            "resolve the loss there. Choose a span below 1e12, around the scale of the "
            "parameters (e.g. a few times their largest magnitude)."
        )
    return (float(arr[0, 0]), float(arr[0, 1])), (float(arr[1, 0]), float(arr[1, 1]))




def evaluate_surface(
    problem: Problem,
    plane: Plane,
    *,
    span: float | Sequence[Any] = 1.0,
    resolution: int | Sequence[int] = 51,
    chunk_size: int | None = None,
    progress: bool | None = None,
    devices: Any = None,
    tune: bool = False,
    sizes: Any = None,
    affine: bool | None = None,
) -> Surface:
    """The loss on a ``resolution`` grid of ``plane`` over ``span``.

    Args:
        problem: the problem.
        plane: the slice (see :mod:`basinview.core.planes`).
        span: half-width ``s`` (grid ``centre +- s`` with the plane's
            ``centre``), half-widths ``(sa, sb)``, or explicit ranges
            ``((a_min, a_max), (b_min, b_max))`` in plane coordinates (see
            :func:`span_ranges`). On an axes plane all of these are
            parameter values.
        resolution: points per axis (2 to 4001), or ``(ra, rb)``.
        chunk_size: loss evaluations vectorised at once; bounds memory.
            Default: chosen per problem (see :func:`evaluate_points`).
        progress: show a progress bar (default: only for large grids).
        devices: devices that share the grid points: ``None`` (all that JAX
            shows), a count, or a list of devices.
        tune: time a few chunk sizes once per problem instead of the cost model.
        sizes: program sizes to reuse, as recorded in :attr:`Surface.sizes`.
        affine: compute the loss's affine intermediates once per plane
            (``True``), per point (``False``), or as the cost model says
            (``None``); see :func:`evaluate_points`. Same values either way.

    Caution: the surface is a 2-D slice of an n-dimensional loss. Its lowest
    point is not necessarily a minimum of the loss.

    Examples:
        >>> import jax.numpy as jnp
        >>> from basinview.core import Problem, axes_plane
        >>> prob = Problem(lambda p: p["x"] ** 2 + 3 * p["y"] ** 2, {"x": 0.0, "y": 0.0})
        >>> s = evaluate_surface(prob, axes_plane(prob, "x", "y"), span=1.0, resolution=3)
        >>> s.loss.tolist()
        [[4.0, 3.0, 4.0], [1.0, 0.0, 1.0], [4.0, 3.0, 4.0]]
        >>> at = Problem(prob.loss, {"x": 5.0, "y": 0.0})  # centred at x = 5
        >>> evaluate_surface(at, axes_plane(at, "x", "y"), span=1.0, resolution=3).a.tolist()
        [4.0, 5.0, 6.0]
    """
    if plane.size != problem.size:
        raise ParameterError(
            f"the plane has {plane.size} coordinates but the problem has {problem.size}; "
            "build the plane from this problem."
        )
    (a0, a1), (b0, b1) = span_ranges(span, plane.centre)
    ra, rb = check_resolution(resolution)
    a = np.linspace(a0, a1, ra)
    b = np.linspace(b0, b1, rb)
    aa, bb = np.meshgrid(a, b)
    ab = np.stack([aa.ravel(), bb.ravel()], axis=1)
    show = progress if progress is not None else (ra * rb > 250_000)
    loss, used = evaluate_points_sized(
        problem, plane.origin, plane.d1, plane.d2, ab, chunk_size=chunk_size, progress=show,
        devices=devices, tune=tune, sizes=sizes, affine=affine,
    )  # fmt: skip
    return Surface(plane=plane, a=a, b=b, loss=loss.reshape(rb, ra), sizes=used.record())


def segment_profile(
    problem: Problem,
    start: Any,
    end: Any,
    *,
    resolution: int = 101,
    extend: float = 0.25,
) -> Profile:
    """The loss along the straight segment from ``start`` to ``end``.

    Evaluates ``J((1 - t) start + t end)`` for ``t`` in ``[-extend, 1 + extend]``
    (``t = 0`` and ``t = 1`` are always on the grid) and reports the barrier:
    the highest loss between the endpoints above the higher endpoint.

    References:
        Goodfellow, I. J., Vinyals, O. & Saxe, A. M. (2015). Qualitatively
        characterizing neural network optimization problems. ICLR.
        arXiv:1412.6544.
    """
    p0 = problem.flatten(start, what="segment start").astype(np.float64)
    p1 = problem.flatten(end, what="segment end").astype(np.float64)
    if not (np.all(np.isfinite(p0)) and np.all(np.isfinite(p1))):
        raise ParameterError("segment endpoints must be finite.")
    res = check_resolution(resolution)[0]
    if not (np.isfinite(extend) and 0 <= extend <= 10):
        raise ParameterError(f"extend must be between 0 and 10; got {extend!r}.")
    inner = np.linspace(0.0, 1.0, res)
    step = 1.0 / (res - 1)
    n_out = int(np.floor(extend / step + 1e-9))
    t = np.concatenate([-step * np.arange(n_out, 0, -1), inner, 1 + step * np.arange(1, n_out + 1)])
    ab = np.stack([t, np.zeros_like(t)], axis=1)
    zero = np.zeros_like(p0)
    loss = evaluate_points(problem, p0, p1 - p0, zero, ab).astype(np.float64)
    within = (t >= -1e-12) & (t <= 1 + 1e-12)
    ends = max(loss[n_out], loss[n_out + res - 1])
    barrier = float(np.nanmax(loss[within]) - ends) if np.isfinite(ends) else float("nan")
    return Profile(t=t, loss=loss, start=p0, end=p1, barrier=max(barrier, 0.0))

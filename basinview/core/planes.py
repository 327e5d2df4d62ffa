"""Planes: two-dimensional slices through parameter space.

A :class:`Plane` is an origin and two directions in the flat parameter space.
``lift(a, b) = origin + a * d1 + b * d2`` maps plane coordinates to
parameters; ``project(theta)`` maps parameters back to the nearest point of
the plane and reports how far ``theta`` lies off it.

Coordinates. Every number on a plane (a span, a grid of starts, a click on a
map, ``Surface.a`` / ``b``, recorded paths, basin maps, figure axes) is a
plane coordinate ``(a, b)``, one system throughout:

* on an axes plane (:func:`axes_plane`) the coordinates are the two
  parameters' own values: ``(a, b) = (theta[x], theta[y])``
  (``plane.coordinates == "values"``);
* on every other plane (random, Hessian, through three points) they are
  offsets along ``d1`` and ``d2`` from the point the plane was built
  around, and the axis titles say so (``plane.coordinates == "offsets"``).

``plane.centre`` is that point's own coordinates (``(theta0[x], theta0[y])``
on an axes plane, ``(0, 0)`` on the others), so a span ``s`` means the
square ``centre +- s`` on every plane (see
:func:`~basinview.core.surface.span_ranges`).

Caution: a plane is a slice. The loss on it is not the whole loss, a minimum
of the slice need not be a minimum of the model, and descent paths leave the
plane; their projections can cross contours in ways the full dynamics do not.
The residual distance returned by :meth:`Plane.project` says how far off the
plane a point is.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .checks import check_seed, require_plane
from .errors import ParameterError
from .problem import Problem

__all__ = [
    "COORDINATES",
    "Plane",
    "axes_plane",
    "flat_origin",
    "random_plane",
    "through_plane",
]

NORMALISATIONS = ("filter", "layer", "none")
_OFFSET_TITLES = ("offset along direction 1", "offset along direction 2")
COORDINATES = ("values", "offsets")
"""What plane coordinates are: parameter values (axes planes) or offsets along d1, d2."""


@dataclass(frozen=True, eq=False)
class Plane:
    """An affine plane ``origin + a * d1 + b * d2`` in flat parameter space.

    Attributes:
        origin: the parameters at plane coordinates ``(0, 0)``. On an axes
            plane this is the held point with zeros in the two plane
            coordinates (so that ``lift(a, b)`` puts ``a`` and ``b`` there);
            the point the user gave is :attr:`centre_point`.
        d1, d2: flat directions of length ``n``.
        axis_titles: titles for the ``a`` and ``b`` axes (offset planes say
            "offset along ...").
        spec: JSON-ready description of how the plane was made (for Settings);
            its ``"origin"`` is the point the user gave (or None).
        centre: plane coordinates of the point the plane was built around:
            the two parameters' values on an axes plane, ``(0, 0)`` otherwise.
            A span ``s`` means ``centre +- s``.
        coordinates: ``"values"`` (coordinates are the values of the two
            parameters ``d1`` and ``d2`` pick out; axes planes) or
            ``"offsets"`` (offsets along ``d1`` and ``d2`` from ``origin``).
    """

    origin: np.ndarray
    d1: np.ndarray
    d2: np.ndarray
    axis_titles: tuple[str, str] = ("a", "b")
    spec: dict[str, Any] = field(default_factory=dict)
    centre: tuple[float, float] = (0.0, 0.0)
    coordinates: str = "offsets"

    def __post_init__(self) -> None:
        for name in ("origin", "d1", "d2"):
            # A private copy: freezing must never make the caller's own array read-only.
            arr = np.array(getattr(self, name), copy=True)
            arr.setflags(write=False)
            object.__setattr__(self, name, arr)
        n = self.origin.shape
        if self.d1.shape != n or self.d2.shape != n or len(n) != 1:
            raise ParameterError(
                f"plane origin and directions must be flat vectors of one length; got "
                f"{self.origin.shape}, {self.d1.shape}, {self.d2.shape}."
            )
        for name, d in (("d1", self.d1), ("d2", self.d2)):
            if not np.all(np.isfinite(d)) or not np.any(d):
                raise ParameterError(
                    f"plane direction {name} is zero or not finite; a plane needs two "
                    "non-zero directions. For a random plane with zero_bias=True on a "
                    "model whose parameters are all biases, pass zero_bias=False."
                )
        gram = self.gram
        cos = gram[0, 1] / np.sqrt(gram[0, 0] * gram[1, 1])
        if abs(cos) > 1 - 1e-6:
            raise ParameterError(
                "the two plane directions are parallel (|cos| = "
                f"{abs(cos):.8f}); they span a line, not a plane. Choose two "
                "different coordinates or directions."
            )
        self._check_coordinates()

    def _check_coordinates(self) -> None:
        if self.coordinates not in COORDINATES:
            raise ParameterError(
                f"plane coordinates must be one of {COORDINATES}; got {self.coordinates!r}."
            )
        try:
            centre = tuple(float(c) for c in self.centre)
        except (TypeError, ValueError):
            centre = ()
        if len(centre) != 2 or not all(np.isfinite(centre)):
            raise ParameterError(f"plane centre must be two finite numbers; got {self.centre!r}.")
        object.__setattr__(self, "centre", centre)
        if self.coordinates == "values" and self.axes is None:
            raise ParameterError(
                'a plane whose coordinates are "values" must move two single parameters: '
                "d1 and d2 must be unit coordinate vectors and the origin zero in those "
                'two coordinates. Build it with axes_plane, or use coordinates="offsets".'
            )
        if self.coordinates == "offsets" and centre != (0.0, 0.0):
            raise ParameterError(
                "on a plane of offsets the centre is (0, 0), the origin itself; got "
                f"{centre}. Move the origin instead (plane.with_origin(point))."
            )

    @property
    def axes(self) -> tuple[int, int] | None:
        """Indices of the two parameters an axes plane moves (None on other planes)."""
        idx = []
        for d in (self.d1, self.d2):
            nz = np.flatnonzero(d)
            if nz.size != 1 or d[nz[0]] != 1:
                return None
            idx.append(int(nz[0]))
        if self.origin[idx[0]] != 0 or self.origin[idx[1]] != 0:
            return None
        return idx[0], idx[1]

    @property
    def size(self) -> int:
        return int(self.origin.shape[0])

    @property
    def directions(self) -> np.ndarray:
        """Directions stacked as a ``(2, n)`` array."""
        return np.stack([self.d1, self.d2])

    @property
    def gram(self) -> np.ndarray:
        d = self.directions.astype(np.float64)
        return d @ d.T

    @property
    def projector(self) -> np.ndarray:
        """``(2, n)`` matrix P with ``(a, b) = P (theta - origin)`` (least squares)."""
        d = self.directions.astype(np.float64)
        return np.linalg.solve(self.gram, d).astype(self.origin.dtype)

    @property
    def centre_point(self) -> np.ndarray:
        """The parameters at :attr:`centre`: the point the plane was built around."""
        return self.lift(*self.centre)

    def lift(self, a: Any, b: Any) -> np.ndarray:
        """Parameters at plane coordinates ``(a, b)``; broadcasts, adds a last axis ``n``."""
        a = np.asarray(a, dtype=self.origin.dtype)[..., None]
        b = np.asarray(b, dtype=self.origin.dtype)[..., None]
        return self.origin + a * self.d1 + b * self.d2

    def project(self, theta: Any) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Plane coordinates of ``theta`` (``(..., n)``) and its distance off the plane.

        Returns:
            ``(a, b, residual)``: the coordinates of the nearest point of the
            plane and the Euclidean distance from ``theta`` to it.
        """
        theta = np.asarray(theta, dtype=np.float64)
        if theta.shape[-1] != self.size:
            raise ParameterError(
                f"cannot project a vector of length {theta.shape[-1]} on a plane in "
                f"{self.size} dimensions."
            )
        diff = theta - self.origin
        ab = diff @ self.projector.astype(np.float64).T
        resid = diff - ab @ self.directions.astype(np.float64)
        return ab[..., 0], ab[..., 1], np.linalg.norm(resid, axis=-1)

    def with_origin(self, origin: Any) -> Plane:
        """The same directions through another point, which becomes the centre.

        On an axes plane the coordinates stay parameter values (the new
        centre is the point's two values); on other planes they become
        offsets from the new point.
        """
        point = np.asarray(origin, dtype=self.origin.dtype)
        spec = dict(self.spec, origin=[float(x) for x in point])
        if self.coordinates == "values":
            i, j = self.axes  # type: ignore[misc]
            base = point.copy()
            base[[i, j]] = 0
            centre = (float(point[i]), float(point[j]))
            return Plane(base, self.d1, self.d2, self.axis_titles, spec, centre, "values")
        return Plane(point, self.d1, self.d2, self.axis_titles, spec)


def flat_origin(problem: Problem, origin: Any) -> tuple[np.ndarray, list[float] | None]:
    """A plane's origin as a flat vector (the problem's parameters when None), and its spec entry.

    Returns:
        ``(flat, listed)``: the flat vector and, for Settings, the user's
        origin as a list of floats (None when the default was used).
    """
    if origin is None:
        return np.array(problem.theta0), None
    flat = problem.flatten(origin, what="plane origin")
    if not np.all(np.isfinite(flat)):
        raise ParameterError("the plane origin contains NaN or inf.")
    return flat, [float(x) for x in flat]


def axes_plane(problem: Problem, x: str, y: str, *, origin: Any = None) -> Plane:
    """The plane of two named coordinates; all others are held at the origin.

    Args:
        problem: the problem whose parameters are sliced.
        x, y: coordinate labels, e.g. ``"w[0]"`` and ``"b"`` (see ``problem.labels``).
        origin: parameters (pytree or flat) for the held coordinates and the
            plane's centre; defaults to the problem's parameters.

    Plane coordinates are the values of ``x`` and ``y`` themselves: ``lift(a,
    b)`` is the origin with ``x = a`` and ``y = b``, and the plane's
    ``centre`` is the origin's values of ``x`` and ``y``. So a span ``s`` is
    the square ``centre +- s``, and explicit ranges, grid starts, clicks,
    ``Surface.a`` / ``b``, recorded paths and figure axes all read in
    parameter values.

    Examples:
        >>> import jax.numpy as jnp
        >>> from basinview.core import Problem
        >>> prob = Problem(lambda p: p["x"] ** 2 + p["y"] ** 2, {"x": 3.0, "y": 2.0})
        >>> plane = axes_plane(prob, "x", "y")
        >>> plane.centre
        (3.0, 2.0)
        >>> plane.lift(1.0, -1.0).tolist()
        [1.0, -1.0]
    """
    require_plane(problem, "axes_plane")
    if x == y:
        raise ParameterError(
            f"the two plane coordinates must differ; got {x!r} twice. Choose two "
            "different labels from problem.labels."
        )
    i, j = problem.index(x), problem.index(y)
    theta, origin_list = flat_origin(problem, origin)
    d1 = np.zeros_like(theta)
    d2 = np.zeros_like(theta)
    d1[i] = 1
    d2[j] = 1
    base = np.array(theta, copy=True)
    base[[i, j]] = 0
    centre = (float(theta[i]), float(theta[j]))
    spec = {"kind": "axes", "x": x, "y": y, "origin": origin_list, "coordinates": "values"}
    return Plane(base, d1, d2, (x, y), spec, centre, "values")


def _normalise(
    problem: Problem,
    direction: np.ndarray,
    theta: np.ndarray,
    how: str,
    zero_bias: bool,
    filter_axis: int,
) -> np.ndarray:
    out = np.array(direction)
    leaves = problem.flattener.leaves
    has_matrices = any(len(leaf.shape) >= 2 for leaf in leaves)
    for leaf in leaves:
        sl = slice(leaf.start, leaf.stop)
        is_bias = has_matrices and len(leaf.shape) <= 1
        if is_bias and zero_bias:
            out[sl] = 0
            continue
        d = out[sl].reshape(leaf.shape)
        t = theta[sl].reshape(leaf.shape)
        if how == "layer" or len(leaf.shape) <= 1:
            scale = np.linalg.norm(t) / max(np.linalg.norm(d), 1e-300)
            d = d * scale
        else:
            axis = filter_axis % len(leaf.shape)
            d_f = np.moveaxis(d, axis, 0).reshape(leaf.shape[axis], -1)
            t_f = np.moveaxis(t, axis, 0).reshape(leaf.shape[axis], -1)
            scale = np.linalg.norm(t_f, axis=1) / np.maximum(np.linalg.norm(d_f, axis=1), 1e-300)
            d_f = d_f * scale[:, None]
            shape_moved = (leaf.shape[axis], *np.delete(np.array(leaf.shape), axis))
            d = np.moveaxis(d_f.reshape(shape_moved), 0, axis)
        out[sl] = d.ravel()
    return out


def random_plane(
    problem: Problem,
    *,
    seed: int = 0,
    normalise: str = "filter",
    zero_bias: bool = True,
    filter_axis: int = -1,
    origin: Any = None,
) -> Plane:
    """A random plane through ``origin``, scaled to the parameters.

    Two Gaussian directions are drawn with ``numpy.random.default_rng(seed)``
    (host side, so no compilation) in the shape of the
    parameters and rescaled so that distances on the plane are comparable
    to the size of the weights:

    * ``"filter"``: every filter (the weights feeding one output unit) of the
      direction gets the norm of the matching filter of the origin (Li et
      al. 2018). Filters run along ``filter_axis`` of each leaf with two or
      more dimensions; the default ``-1`` suits JAX layers whose kernels are
      ``(inputs, outputs)``; use ``0`` for ``(outputs, inputs)`` weights.
    * ``"layer"``: every leaf gets the norm of the matching leaf.
    * ``"none"``: the raw standard-normal draw.

    With ``zero_bias=True`` (default) and a model that has matrix-shaped
    leaves, the directions of bias-like leaves (vectors and scalars) are set
    to zero, as Li et al. do; models whose leaves are all vectors or scalars
    have no such distinction and every leaf is normalised as one filter.

    Coordinates are offsets along the two directions from the origin (the
    axis titles say so); ``(0, 0)`` is the origin.

    Caution: the origin's scale enters the directions; a leaf that is zero
    at the origin gets a zero direction under "filter" and "layer".

    References:
        Li, H., Xu, Z., Taylor, G., Studer, C. & Goldstein, T. (2018).
        Visualizing the loss landscape of neural nets. NeurIPS.
        arXiv:1712.09913.
    """
    require_plane(problem, "random_plane")
    if normalise not in NORMALISATIONS:
        raise ParameterError(f"normalise must be one of {NORMALISATIONS}; got {normalise!r}.")
    theta, origin_list = flat_origin(problem, origin)
    seed = check_seed(seed)
    draws = np.random.default_rng(seed).standard_normal((2, problem.size))
    dirs = []
    for d in draws:
        if normalise != "none":
            d = _normalise(problem, d, theta.astype(np.float64), normalise, zero_bias, filter_axis)
        dirs.append(d.astype(problem.dtype))
    if normalise != "none" and not all(np.any(d) for d in dirs):
        biases = " (biases are left out by zero_bias=True)" if zero_bias else ""
        raise ParameterError(
            f"normalise={normalise!r} scales each direction to the size of the origin's "
            f"weights, but the origin is zero in every coordinate the plane would move"
            f"{biases}, so the directions are zero. Use normalise='none', or pass an "
            "origin with non-zero weights (e.g. initialised or trained parameters)."
        )
    spec = {
        "kind": "random",
        "seed": seed,
        "normalise": normalise,
        "zero_bias": bool(zero_bias),
        "filter_axis": int(filter_axis),
        "origin": origin_list,
    }
    try:
        return Plane(theta, dirs[0], dirs[1], _OFFSET_TITLES, spec)
    except ParameterError as exc:
        if normalise == "none":
            raise
        zero = [
            leaf.name
            for leaf in problem.flattener.leaves
            if not np.any(theta[leaf.start : leaf.stop])
        ]
        where = f" (zero at the origin: {zero[:8]})" if zero else ""
        raise ParameterError(
            f"{exc} normalise={normalise!r} gives each leaf the size of the origin's leaf, so "
            f"leaves that are zero there cannot move{where}; with few leaves the two "
            "directions can become parallel. Use normalise='none' or another origin."
        ) from None


def through_plane(problem: Problem, p0: Any, p1: Any, p2: Any) -> Plane:
    """The plane through three parameter vectors (e.g. three minima).

    The origin is ``p0``; ``d1 = p1 - p0`` puts ``p1`` at ``(1, 0)``; ``d2``
    is the part of ``p2 - p0`` orthogonal to ``d1``, scaled to the length of
    ``d1``, so that distances are not distorted and ``p2`` lies at
    ``(project(p2))`` with ``b > 0``. Coordinates are offsets from ``p0`` in
    units of ``|p1 - p0|``.
    """
    require_plane(problem, "through_plane")
    pts = [
        problem.flatten(p, what=f"point p{i}").astype(np.float64)
        for i, p in enumerate((p0, p1, p2))
    ]
    d1 = pts[1] - pts[0]
    e2 = pts[2] - pts[0]
    n1 = np.linalg.norm(d1)
    if n1 == 0:
        raise ParameterError("p0 and p1 are the same point; the plane needs three distinct points.")
    ortho = e2 - (e2 @ d1) / n1**2 * d1
    if np.linalg.norm(ortho) <= 100 * np.finfo(problem.dtype).eps * max(n1, np.linalg.norm(e2)):
        raise ParameterError(
            "the three points lie on one line (or coincide); they do not define a plane. "
            "Choose a third point off the line through the first two."
        )
    d2 = ortho / np.linalg.norm(ortho) * n1
    spec = {"kind": "through", "points": [[float(x) for x in p] for p in pts]}
    dtype = problem.dtype
    titles = ("offset towards p1", "offset towards p2")
    return Plane(pts[0].astype(dtype), d1.astype(dtype), d2.astype(dtype), titles, spec)


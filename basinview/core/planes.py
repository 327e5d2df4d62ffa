"""Planes: two-dimensional slices through parameter space.

A :class:`Plane` is an origin and two directions in the flat parameter space.
``lift(a, b) = origin + a * d1 + b * d2`` maps plane coordinates to
parameters; ``project(theta)`` maps parameters back to the nearest point of
the plane and reports how far ``theta`` lies off it.

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

from .errors import ParameterError
from .problem import Problem, require_plane

__all__ = [
    "Plane",
    "axes_plane",
    "hessian_plane",
    "plane_from_spec",
    "random_plane",
    "through_plane",
]

NORMALISATIONS = ("filter", "layer", "none")


@dataclass(frozen=True, eq=False)
class Plane:
    """An affine plane ``origin + a * d1 + b * d2`` in flat parameter space.

    Attributes:
        origin, d1, d2: flat vectors of length ``n``.
        axis_titles: titles for the ``a`` and ``b`` axes.
        spec: JSON-ready description of how the plane was made (for Settings).
    """

    origin: np.ndarray
    d1: np.ndarray
    d2: np.ndarray
    axis_titles: tuple[str, str] = ("a", "b")
    spec: dict[str, Any] = field(default_factory=dict)

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
        """The same directions through another origin."""
        origin = np.asarray(origin, dtype=self.origin.dtype)
        spec = dict(self.spec, origin=[float(x) for x in origin])
        return Plane(origin, self.d1, self.d2, self.axis_titles, spec)


def _origin(problem: Problem, origin: Any) -> tuple[np.ndarray, list[float] | None]:
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
            plane's ``(0, 0)``; defaults to the problem's parameters.

    Plane coordinates are then offsets of the two coordinates from the origin.
    """
    require_plane(problem, "axes_plane")
    if x == y:
        raise ParameterError(
            f"the two plane coordinates must differ; got {x!r} twice. Choose two "
            "different labels from problem.labels."
        )
    i, j = problem.index(x), problem.index(y)
    theta, origin_list = _origin(problem, origin)
    d1 = np.zeros_like(theta)
    d2 = np.zeros_like(theta)
    d1[i] = 1
    d2[j] = 1
    spec = {"kind": "axes", "x": x, "y": y, "origin": origin_list}
    return Plane(theta, d1, d2, (x, y), spec)


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
    theta, origin_list = _origin(problem, origin)
    seed = _check_seed(seed)
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
        return Plane(theta, dirs[0], dirs[1], ("direction 1", "direction 2"), spec)
    except ParameterError as exc:
        if normalise == "none":
            raise
        zero = [leaf.name for leaf in problem.flattener.leaves if not np.any(theta[leaf.start : leaf.stop])]
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
    ``(project(p2))`` with ``b > 0``.
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
    return Plane(
        pts[0].astype(dtype), d1.astype(dtype), d2.astype(dtype), ("towards p1", "towards p2"), spec
    )


def hessian_plane(
    problem: Problem, *, origin: Any = None, method: str = "auto", seed: int = 0
) -> Plane:
    """The plane of the two top Hessian eigenvectors at ``origin``.

    Along these directions the loss curves most steeply upward near the
    origin, so this slice shows the directions that limit the step size.
    ``method`` and ``seed`` are passed to
    :func:`basinview.core.curvature.hessian_spectrum`.
    """
    from .curvature import hessian_plane_impl

    require_plane(problem, "hessian_plane")
    return hessian_plane_impl(problem, origin=origin, method=method, seed=seed)


def _check_seed(seed: Any) -> int:
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise ParameterError(f"seed must be a non-negative integer; got {seed!r}.")
    return int(seed)


_SPEC_KEYS = {
    "axes": {"kind", "x", "y", "origin"},
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
        return axes_plane(problem, x, y, origin=origin)
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

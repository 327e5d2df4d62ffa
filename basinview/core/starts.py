"""Starting points for descent runs.

Four ways to choose where runs begin, each returning :class:`Starts` (an
``(S, n)`` array of flat vectors plus a JSON-ready spec for Settings):

* :func:`explicit_starts`: the user's own list of parameter pytrees or vectors;
* :func:`grid_starts`: a regular grid on a plane (for basin maps);
* :func:`random_starts`: seeded Gaussian draws around a point;
* :func:`initializer_starts`: draws from the user's own initialiser
  ``init(key) -> params``, so initialisation schemes can be compared.

:func:`scheme_starts` joins several such sets under names (initialisation
schemes); :func:`scheme_of` gives each start its scheme's name.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import jax
import numpy as np

from .checks import check_resolution, check_seed
from .cost_model import bucket
from .errors import BasinviewError, ParameterError
from .planes import Plane
from .problem import Problem, loss_name
from .surface import span_ranges

__all__ = [
    "MAX_STARTS",
    "Starts",
    "as_starts",
    "combine_starts",
    "explicit_starts",
    "grid_starts",
    "initializer_starts",
    "random_starts",
    "scheme_of",
    "scheme_starts",
    "starts_from_spec",
]

MAX_STARTS = 1_000_000


@dataclass(frozen=True, eq=False)
class Starts:
    """Starting points as flat vectors, with a record of how they were chosen."""

    points: np.ndarray
    spec: dict[str, Any] = field(default_factory=dict)

    def __post_init__(self) -> None:
        # A private copy: freezing must never make the caller's own array read-only.
        pts = np.array(self.points, copy=True)
        if pts.ndim != 2 or pts.shape[0] == 0:
            raise ParameterError(f"starts must be a non-empty (S, n) array; got shape {pts.shape}.")
        if not np.all(np.isfinite(pts)):
            bad = int(np.flatnonzero(~np.isfinite(pts).all(axis=1))[0])
            raise ParameterError(f"start {bad} contains NaN or inf; starts must be finite.")
        pts.setflags(write=False)
        object.__setattr__(self, "points", pts)

    def __len__(self) -> int:
        return int(self.points.shape[0])


def explicit_starts(problem: Problem, points: Any) -> Starts:
    """Starts given by the user: one pytree, a list of pytrees, or an ``(S, n)`` array."""
    if isinstance(points, (np.ndarray, jax.Array)) and np.ndim(points) == 2:
        arr = np.asarray(points)
        if arr.shape[1] != problem.size:
            raise ParameterError(
                f"starts as an array must have shape (S, {problem.size}); got {arr.shape}."
            )
        flat = arr.astype(problem.dtype)
    elif isinstance(points, (list, tuple)) and points and _is_list_of_starts(problem, points):
        flat = np.stack([problem.flatten(p, what=f"start {i}") for i, p in enumerate(points)])
    else:
        flat = problem.flatten(points, what="start")[None, :]
    if flat.shape[0] > MAX_STARTS:
        raise ParameterError(f"at most {MAX_STARTS} starts are supported; got {flat.shape[0]}.")
    spec = {"kind": "explicit", "points": [[float(x) for x in row] for row in flat]}
    return Starts(flat, spec)


def _is_list_of_starts(problem: Problem, points: Sequence[Any]) -> bool:
    """Whether a list/tuple holds several starts rather than being one start."""
    treedef = problem.flattener.treedef
    try:
        one = jax.tree_util.tree_structure(points)
    except Exception:
        return True
    if one == treedef:
        # The list itself has the shape of one parameter pytree.
        return False
    return True


def grid_starts(plane: Plane, *, span: Any = 1.0, resolution: Any = 21) -> Starts:
    """A ``resolution`` grid of starts on ``plane`` over ``span`` (row-major in b, then a).

    ``span`` is read as by :func:`~basinview.core.evaluate_surface`: a
    half-width around the plane's centre, or explicit ranges in plane
    coordinates (parameter values on an axes plane). The grid's ranges are
    kept in ``spec`` (as plane coordinates) so basin maps can be drawn.

    Examples:
        >>> from basinview.core import Problem, axes_plane
        >>> prob = Problem(lambda p: p["x"] ** 2 + p["y"] ** 2, {"x": 3.0, "y": 2.0})
        >>> grid_starts(axes_plane(prob, "x", "y"), span=1.0, resolution=3).points[:3].tolist()
        [[2.0, 1.0], [3.0, 1.0], [4.0, 1.0]]
    """
    (a0, a1), (b0, b1) = span_ranges(span, plane.centre)
    ra, rb = check_resolution(resolution)
    if ra * rb > MAX_STARTS:
        raise ParameterError(
            f"a {ra} x {rb} grid has more than {MAX_STARTS} starts; lower the resolution "
            "(e.g. 101 per axis) or zoom in with span."
        )
    a = np.linspace(a0, a1, ra)
    b = np.linspace(b0, b1, rb)
    aa, bb = np.meshgrid(a, b)
    pts = plane.lift(aa.ravel(), bb.ravel())
    spec = {
        "kind": "grid",
        "span": [[a0, a1], [b0, b1]],
        "resolution": [ra, rb],
    }
    return Starts(pts.astype(plane.origin.dtype), spec)


def random_starts(
    problem: Problem,
    count: int,
    *,
    scale: float = 1.0,
    seed: int = 0,
    center: Any = None,
) -> Starts:
    """``count`` seeded draws ``center + scale * N(0, I)`` (center defaults to the problem's parameters).

    Draws come from ``numpy.random.default_rng(seed)`` on the host, so new
    counts never compile anything.
    """
    count = _check_count(count)
    if not (np.isfinite(scale) and scale > 0):
        raise ParameterError(f"scale must be a positive number; got {scale!r}.")
    seed = check_seed(seed)
    c = problem.theta0 if center is None else problem.flatten(center, what="center")
    noise = np.random.default_rng(seed).standard_normal((count, problem.size))
    pts = (c.astype(np.float64) + scale * noise).astype(problem.dtype)
    spec = {
        "kind": "random",
        "count": count,
        "scale": float(scale),
        "seed": seed,
        "center": None if center is None else [float(x) for x in c],
    }
    return Starts(pts, spec)


def initializer_starts(
    problem: Problem,
    init: Callable[[jax.Array], Any],
    count: int,
    *,
    seed: int = 0,
    name: str | None = None,
) -> Starts:
    """``count`` starts drawn from the user's initialiser ``init(key) -> params``.

    Keys are ``jax.random.split(jax.random.key(seed), count)``, so the same
    seed gives the same starts. Compare schemes by running each with the
    same seed and count.
    """
    count = _check_count(count)
    seed = check_seed(seed)
    if not callable(init):
        raise ParameterError("init must be a function init(key) -> params.")
    keys = _split_keys(seed, count)
    rows = []
    for i in range(count):
        try:
            params = init(jax.random.wrap_key_data(keys[i]))
        except Exception as exc:
            raise ParameterError(
                f"the initialiser {loss_name(init)} raised {type(exc).__name__} for key {i}: "
                f"{exc}. Check that it runs on its own, e.g. init(jax.random.key(0)), and "
                "returns parameters shaped like the problem's."
            ) from exc
        rows.append(problem.flatten(params, what=f"initialiser output {i}"))
    spec = {"kind": "initializer", "name": name or loss_name(init), "count": count, "seed": seed}
    return Starts(np.stack(rows), spec)


def _split_keys(seed: int, count: int) -> np.ndarray:
    """The key data of ``jax.random.split(jax.random.key(seed), count)``, on the host.

    With JAX's partitionable threefry (its default) the first ``count`` keys of a
    larger split are the same keys, so the split is made at a bucket size and
    new counts within a bucket compile nothing.
    """
    prefix_stable = bool(getattr(jax.config, "jax_threefry_partitionable", False))
    size = bucket(count) if prefix_stable else count
    return np.asarray(jax.random.key_data(_split(jax.random.key(seed), size)))[:count]


_split = jax.jit(jax.random.split, static_argnums=1)


def _check_count(count: Any) -> int:
    if (
        isinstance(count, bool)
        or not isinstance(count, (int, np.integer))
        or not 1 <= count <= MAX_STARTS
    ):
        raise ParameterError(f"count must be an integer from 1 to {MAX_STARTS}; got {count!r}.")
    return int(count)


def combine_starts(*parts: Starts) -> Starts:
    """One set of starts made of several (e.g. random draws plus hand-picked points)."""
    parts = tuple(p for p in parts if p is not None)
    if not parts:
        raise ParameterError("combine_starts needs at least one set of starts.")
    sizes = {p.points.shape[1] for p in parts}
    if len(sizes) != 1:
        raise ParameterError(
            f"cannot combine starts of different parameter counts {sorted(sizes)}."
        )
    if len(parts) == 1:
        return parts[0]
    spec = {"kind": "combined", "parts": [p.spec for p in parts]}
    return Starts(np.concatenate([p.points for p in parts]), spec)


def scheme_starts(
    problem: Problem,
    schemes: Mapping[str, Any],
    *,
    count: int | None = None,
    seed: int = 0,
) -> Starts:
    """One set of starts made of several named ones (initialisation schemes).

    Each value of ``schemes`` is one scheme's starts: a :class:`Starts`
    (from :func:`explicit_starts`, :func:`random_starts` or
    :func:`initializer_starts`), an array or list of parameter pytrees
    (explicit starts), or an initialiser ``init(key) -> params``, drawn
    ``count`` times with ``seed`` (the same keys for every such scheme, so
    schemes are compared on common random numbers). Every start keeps its
    scheme's name (:func:`scheme_of`), and so does every run that
    :func:`~basinview.core.descend` makes from it; the spec records the names,
    counts, seeds and initialisers' qualified names.

    Examples:
        >>> import numpy as np
        >>> from basinview.core import Problem
        >>> prob = Problem(lambda p: p[0] ** 2 + p[1] ** 2, np.zeros(2, np.float32))
        >>> st = scheme_starts(prob, {"origin": np.zeros((1, 2)), "wide": random_starts(prob, 2, scale=3.0)})
        >>> scheme_of(st).tolist()
        ['origin', 'wide', 'wide']
    """
    if not isinstance(schemes, Mapping) or not schemes:
        raise ParameterError(
            "schemes must be a non-empty mapping from a scheme's name to its starts, e.g. "
            "{'small normal': random_starts(problem, 32, scale=0.01), 'fan-in': init}."
        )
    parts: list[tuple[str, Starts]] = []
    for name, value in schemes.items():
        if not isinstance(name, str) or not name.strip():
            raise ParameterError(f"scheme names must be non-empty strings; got {name!r}.")
        if isinstance(value, Starts):
            part = as_starts(problem, value)
        elif isinstance(value, tuple) and value and callable(value[0]):
            raise ParameterError(
                f"the scheme {name!r} is a tuple holding an initialiser; pass the initialiser "
                "itself (it is drawn count= times from seed=; init_count= and init_seed= in "
                "the Explorer), or initializer_starts(problem, init, count, seed=...) for a "
                "seed of its own."
            )
        elif callable(value):
            if count is None:
                raise ParameterError(
                    f"the scheme {name!r} is an initialiser; give count= (how many starts to "
                    "draw per scheme), or pass initializer_starts(problem, init, count, seed=...)."
                )
            part = initializer_starts(problem, value, count, seed=seed)
        else:
            try:
                part = explicit_starts(problem, value)
            except BasinviewError as exc:
                raise ParameterError(f"the starts of scheme {name!r}: {exc}") from None
        parts.append((name, part))
    spec = {
        "kind": "schemes",
        "schemes": [{"name": n, "count": len(p), "starts": p.spec} for n, p in parts],
    }
    return Starts(np.concatenate([p.points for _, p in parts]), spec)


def scheme_of(starts: Starts) -> np.ndarray | None:
    """Each start's scheme name (an object array), or None if ``starts`` has no schemes."""
    if starts.spec.get("kind") != "schemes":
        return None
    names = [s["name"] for s in starts.spec["schemes"]]
    counts = [int(s["count"]) for s in starts.spec["schemes"]]
    return np.repeat(np.asarray(names, dtype=object), counts)


def as_starts(problem: Problem, starts: Any) -> Starts:
    """Coerce ``starts`` (Starts, array, pytree, list of pytrees, or a mapping of named
    start sets, see :func:`scheme_starts`) to :class:`Starts`."""
    if (
        isinstance(starts, Mapping)
        and starts
        and all(
            isinstance(v, (Starts, np.ndarray, jax.Array, list, tuple)) or callable(v)
            for v in starts.values()
        )
        and _not_one_start(problem, starts)
    ):
        return scheme_starts(problem, starts)
    if isinstance(starts, Starts):
        if starts.points.shape[1] != problem.size:
            raise ParameterError(
                f"these starts have {starts.points.shape[1]} coordinates; the problem has {problem.size}."
            )
        return starts
    return explicit_starts(problem, starts)


def starts_from_spec(
    problem: Problem,
    spec: dict[str, Any],
    *,
    plane: Plane | None = None,
    initializers: dict[str, Callable[[jax.Array], Any]] | None = None,
) -> Starts:
    """Rebuild starts from their spec (as stored in Settings).

    The spec is data: a missing or mistyped field is reported as a
    :class:`ParameterError` naming it, never as a raw ``KeyError``.
    """
    if not isinstance(spec, dict):
        raise ParameterError(
            f"starts spec: expected an object with a 'kind'; got {type(spec).__name__}."
        )
    try:
        return _starts_from_spec(problem, spec, plane=plane, initializers=initializers)
    except BasinviewError:
        raise
    except (KeyError, TypeError, ValueError, IndexError, RecursionError) as exc:
        what = f"lacks the field {exc}" if isinstance(exc, KeyError) else f"is malformed ({exc})"
        raise ParameterError(
            f"the {spec.get('kind')!r} starts spec {what}. Rebuild the starts with "
            "explicit_starts, random_starts, grid_starts or initializer_starts and use "
            "their .spec."
        ) from None


def _starts_from_spec(
    problem: Problem,
    spec: dict[str, Any],
    *,
    plane: Plane | None,
    initializers: dict[str, Callable[[jax.Array], Any]] | None,
) -> Starts:
    kind = spec.get("kind")
    if kind == "explicit":
        return explicit_starts(problem, np.asarray(spec["points"], dtype=problem.dtype))
    if kind == "random":
        center = spec.get("center")
        return random_starts(
            problem,
            spec["count"],
            scale=spec["scale"],
            seed=spec["seed"],
            center=None if center is None else np.asarray(center, dtype=problem.dtype),
        )
    if kind == "grid":
        if plane is None:
            raise ParameterError("grid starts need the plane they were laid on.")
        return grid_starts(plane, span=spec["span"], resolution=tuple(spec["resolution"]))
    if kind == "initializer":
        fn = (initializers or {}).get(spec["name"])
        if fn is None:
            raise ParameterError(
                f"these starts came from the initialiser {spec['name']!r}; pass it as "
                f"initializers={{{spec['name']!r}: function}} to rebuild them."
            )
        return initializer_starts(problem, fn, spec["count"], seed=spec["seed"], name=spec["name"])
    if kind == "schemes":
        rows = spec["schemes"]
        if not isinstance(rows, list) or not rows:
            raise ParameterError("scheme starts need a non-empty list of schemes.")
        return scheme_starts(
            problem,
            {
                row["name"]: starts_from_spec(
                    problem, row["starts"], plane=plane, initializers=initializers
                )
                for row in rows
            },
        )
    if kind == "combined":
        parts = spec.get("parts")
        if not isinstance(parts, list) or not parts:
            raise ParameterError("combined starts need a non-empty list of parts.")
        return combine_starts(
            *(
                starts_from_spec(problem, part, plane=plane, initializers=initializers)
                for part in parts
            )
        )
    raise ParameterError(
        f"unknown starts kind {kind!r}; expected 'explicit', 'random', 'grid', 'initializer', "
        "'combined' or 'schemes'."
    )


def _not_one_start(problem: Problem, starts: Mapping[str, Any]) -> bool:
    """Whether a mapping is a set of named schemes rather than one dict of parameters."""
    try:
        return jax.tree_util.tree_structure(dict(starts)) != problem.flattener.treedef
    except Exception:
        return True

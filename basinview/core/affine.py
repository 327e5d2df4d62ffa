"""Plane-affine evaluation: the loss on a plane with its linear part computed once.

On a plane, ``theta(a, b) = origin + a d1 + b d2``. Every intermediate of
the loss that is affine in ``theta`` (the linear predictor ``X @ theta`` of a
regression or GLM, a first layer's ``x @ W + b``, sums, reshapes, slices and
broadcasts of those) is then ``c0 + a c1 + b c2`` with coefficients that do
not depend on the grid point. :func:`plane_plan` reads the loss's program
once (``jax.make_jaxpr``; nothing is compiled) and tags every value:

* ``const``: does not depend on ``theta`` (the data and what is computed
  from them alone);
* ``affine``: ``c0 + a c1 + b c2``; produced by a linear primitive whose
  operands are affine or constant (see ``ADDITIVE_PRIMITIVES``, ``_ONE_FACTOR``,
  ``_LINEAR_OPERAND``: ``dot_general``/``mul`` with one constant factor,
  ``add``/``sub``, ``neg``, ``div`` by a constant, reshapes, broadcasts,
  transposes, slices, ``split``, ``concatenate``, ``select_n`` with a
  constant mask, ``pad``, ``reduce_sum``, ``cumsum``, floating
  ``convert_element_type``, ``gather``/``dynamic_slice`` at constant
  indices);
* ``general``: anything else (a non-linear primitive, a product of two
  affine values, a loop such as the ``scan`` of ``data_chunk_rows``).

Calls (``jit``/``pjit``, ``closed_call``, ``remat``) and the bodies of
functions with custom derivatives (``custom_jvp_call``, ``custom_vjp_call``:
a surface only evaluates the loss, so the primal body is what counts) are
opened and their equations tagged one by one; every other primitive with a
sub-program (``scan``, ``cond``, ``while``) is one general equation,
evaluated as it stands. Nothing is
unsupported: at the first general use of an affine value it is
materialised per grid point as ``c0 + a c1 + b c2`` and the rest of the
program runs as the user wrote it (re-interpreted equation by equation with
``eqn.primitive.bind(*invals, **eqn.params)``, the documented way to write
a jaxpr interpreter). The constant and affine equations run once per
compiled call (three times each for the coefficients), the general ones
per grid point, vectorised over a chunk of points with the point axis
outermost (rows inner).

:func:`affine_wins` decides from the plan's shapes whether this beats the
plain path (``loss(origin + a d1 + b d2)`` per point); see its docstring.
The evaluation itself is in :mod:`basinview.core.affine_eval`.
A loss with side effects (callbacks, prints) always takes the plain path.

The plain path and this one compute the same function of ``(a, b)``;
rounding differs (``X @ origin + a X @ d1`` is not ``X @ (origin + a d1)``
bit for bit), at the level of float rounding of the affine intermediates.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import jax
import jax.extend.core as jcore
import jax.numpy as jnp
import numpy as np

__all__ = [
    "ADDITIVE_PRIMITIVES",
    "AFFINE",
    "AFFINE_GAIN",
    "CONST",
    "GENERAL",
    "PlanEquation",
    "PlanLiteral",
    "PlanePlan",
    "affine_wins",
    "plane_plan",
]

AFFINE_GAIN = 1.25
"""Estimated plain cost / affine cost per point from which the affine path is taken."""
TRANSCENDENTAL_WEIGHT = 8
"""FLOPs one element of a transcendental function counts for in the estimates."""
SMALL_CONTRACTION = 4
"""A matrix product contracting fewer coordinates is counted as if it contracted this many."""
AFFINE_GAIN_STREAMED = 1.4
"""The gain required instead of :data:`AFFINE_GAIN` when the coefficients leave the cache."""
CACHE_BYTES = 256 * 1024
"""Coefficient bytes (``c0, c1, c2`` of every materialised element) that stay in cache."""
_TRANSCENDENTAL = frozenset(
    {"exp", "exp2", "log", "log1p", "expm1", "tanh", "logistic", "sin", "cos", "tan", "erf",
     "erfc", "erf_inv", "lgamma", "digamma", "pow", "sqrt", "rsqrt", "cbrt", "atan2", "asin",
     "acos", "atan", "sinh", "cosh", "asinh", "acosh", "atanh"}
)  # fmt: skip

CONST, AFFINE, GENERAL = "const", "affine", "general"

# Primitives whose every operand may be affine (the constant ones enter c0 only).
ADDITIVE_PRIMITIVES = frozenset({"add", "sub", "add_any", "concatenate"})
# Exactly one operand affine, the other a constant factor.
_ONE_FACTOR = frozenset({"mul", "dot_general"})
# Linear in the first operand; every other operand must be constant.
_LINEAR_OPERAND = frozenset(
    {
        "neg", "reshape", "broadcast_in_dim", "transpose", "squeeze", "expand_dims", "slice",
        "rev", "copy", "copy_p", "reduce_sum", "cumsum", "split", "div", "gather",
        "dynamic_slice", "convert_element_type",
    }
)  # fmt: skip
# Calls opened and tagged equation by equation.
_INLINE = frozenset(
    {"jit", "pjit", "closed_call", "core_call", "custom_jvp_call", "custom_vjp_call", "remat2",
     "checkpoint"}
)  # fmt: skip


def _callee(eqn: Any) -> tuple[Any, Sequence[Any]] | None:
    """``(jaxpr, consts)`` of a call to open, else None.

    Only the primal program matters on a surface (nothing is differentiated
    there), so the body of a function with a custom derivative is opened too.
    """
    if eqn.primitive.name not in _INLINE:
        return None
    sub = eqn.params.get("jaxpr", eqn.params.get("call_jaxpr"))
    if isinstance(sub, jcore.ClosedJaxpr):
        return sub.jaxpr, sub.consts
    if isinstance(sub, jcore.Jaxpr) and not sub.constvars:
        return sub, ()
    return None


@dataclass(frozen=True)
class PlanEquation:
    """One equation of the flattened program (variables renamed to integers)."""

    primitive: Any
    params: dict[str, Any]
    ins: tuple[Any, ...]  # int keys or PlanLiteral
    outs: tuple[int, ...]


@dataclass(frozen=True)
class PlanLiteral:
    """A literal operand (a constant written into the program)."""

    value: Any


@dataclass(frozen=True, eq=False)
class PlanePlan:
    """How a loss splits into a once-per-plane part and a per-point part.

    Attributes:
        affine_elements: elements of the affine values materialised per grid
            point (each costs two multiply-adds).
        point_flops: weighted FLOPs of the general equations per point (a
            matrix product counts ``2 m n k``, a transcendental function
            :data:`TRANSCENDENTAL_WEIGHT` per element, any other equation
            one per output element, a ``scan`` body times its length).
        plane_flops: FLOPs of the constant and affine equations, paid once
            per compiled call (affine ones three times).
        plain_flops: weighted FLOPs of one plain evaluation: the general and
            affine equations, a matrix product with a contraction below
            :data:`SMALL_CONTRACTION` counted as if it had that many.
        opened: names of the calls that were opened (``jit``...).
        general: primitive names of the general equations, in order.
    """

    theta: int
    data: tuple[int, ...]
    consts: tuple[tuple[int, Any], ...]
    eqns: tuple[PlanEquation, ...]
    tags: dict[int, str]
    output: Any
    materialised: tuple[int, ...]
    affine_elements: int
    point_flops: int
    plane_flops: int
    plain_flops: int
    opened: tuple[str, ...]
    general: tuple[str, ...]

    @property
    def point_cost(self) -> int:
        """Estimated FLOPs per grid point on the affine path."""
        return 4 * self.affine_elements + self.point_flops

    def describe(self) -> dict[str, Any]:
        """The plan's numbers as a plain mapping (for benchmarks and reports)."""
        return {
            "affine_elements": self.affine_elements,
            "point_flops": self.point_flops,
            "plane_flops": self.plane_flops,
            "plain_flops": self.plain_flops,
            "point_cost": self.point_cost,
            "opened_calls": list(self.opened),
            "general_primitives": sorted(set(self.general)),
        }


# ------------------------------------------------------------------- tagging
def _is_float(aval: Any) -> bool:
    return jnp.issubdtype(getattr(aval, "dtype", np.int32), jnp.floating)


def _tag(prim: str, params: dict[str, Any], tags: Sequence[str]) -> str:
    """The tag of an equation's outputs from its operands' tags."""
    if all(t == CONST for t in tags):
        return CONST
    if GENERAL in tags:
        return GENERAL
    if prim in ADDITIVE_PRIMITIVES:
        return AFFINE
    if prim in _ONE_FACTOR:
        return AFFINE if sorted(tags) == [AFFINE, CONST] else GENERAL
    if prim == "select_n":
        return AFFINE if tags[0] == CONST else GENERAL
    if prim == "pad":
        return AFFINE
    if prim in _LINEAR_OPERAND:
        if prim == "convert_element_type" and not jnp.issubdtype(
            params.get("new_dtype", np.int32), jnp.floating
        ):
            return GENERAL
        return AFFINE if all(t == CONST for t in tags[1:]) else GENERAL
    return GENERAL


def _flatten(closed: Any) -> tuple[Any, ...]:
    """Equations with ``jit`` calls opened, variables renamed to integers."""
    counter = iter(range(1 << 62))
    avals: dict[int, Any] = {}
    eqns: list[PlanEquation] = []
    consts: list[tuple[int, Any]] = []
    opened: list[str] = []

    def atom(env: dict[Any, Any], v: Any) -> Any:
        if isinstance(v, jcore.Literal):
            return PlanLiteral(v.val)
        return env[v]

    def walk(jaxpr: Any, const_vals: Sequence[Any], ins: Sequence[Any]) -> list[Any]:
        env: dict[Any, Any] = {}
        for var, val in zip(jaxpr.constvars, const_vals):
            key = next(counter)
            consts.append((key, val))
            env[var] = key
        for var, key in zip(jaxpr.invars, ins):
            env[var] = key
        for eqn in jaxpr.eqns:
            callee = _callee(eqn)
            args = [atom(env, v) for v in eqn.invars]
            if callee is not None:
                keys = []
                for a in args:  # a literal argument becomes a constant of the call
                    if isinstance(a, PlanLiteral):
                        key = next(counter)
                        consts.append((key, a.value))
                        a = key
                    keys.append(a)
                opened.append(eqn.primitive.name)
                outs = walk(callee[0], callee[1], keys)
                for var, val in zip(eqn.outvars, outs):
                    env[var] = val
                continue
            outs_k = tuple(next(counter) for _ in eqn.outvars)
            for var, key in zip(eqn.outvars, outs_k):
                env[var] = key
                avals[key] = var.aval
            eqns.append(PlanEquation(eqn.primitive, dict(eqn.params), tuple(args), outs_k))
        return [atom(env, v) for v in jaxpr.outvars]

    n_in = len(closed.jaxpr.invars)
    in_keys = [next(counter) for _ in range(n_in)]
    (out,) = walk(closed.jaxpr, closed.consts, in_keys)
    return eqns, consts, in_keys, out, opened, avals


def plane_plan(problem: Any) -> PlanePlan | None:
    """The plane-affine plan of ``problem``'s loss, read once and kept with the problem.

    Returns None when the loss has side effects (then only the plain path
    is correct) or when it is not affine anywhere (every equation that
    touches ``theta`` is general from the start).
    """
    return problem.cached(("plane-plan",), lambda: _build_plan(problem))


def _weighted_flops(eqn: PlanEquation, ins: Sequence[Any], outs: Sequence[Any], plain: bool) -> int:
    from .cost_model import equation_flops

    name = eqn.primitive.name
    flops = equation_flops(name, eqn.params, ins, outs)
    if name in _TRANSCENDENTAL:
        return flops * TRANSCENDENTAL_WEIGHT
    if plain and name == "dot_general":
        (lc, _rc), _batch = eqn.params["dimension_numbers"]
        k = int(np.prod([ins[0].shape[i] for i in lc], dtype=np.int64)) if lc else 1
        return flops * max(k, SMALL_CONTRACTION) // max(k, 1)
    return flops


_RECOMPUTE = frozenset({"add", "sub", "add_any", "mul", "neg", "div", "convert_element_type"})


def _demote(eqns: Sequence[PlanEquation], tags: dict[int, str], out: Any) -> set[int]:
    """The affine values to materialise per point, after cheap ones are recomputed.

    An element-wise affine equation whose results only general equations
    read, and whose affine operands are materialised anyway (``0 - z`` or
    ``y * z`` beside ``z``), is cheaper to redo per point (one operation
    per element) than to materialise (two multiply-adds): it becomes general.
    """

    def users() -> dict[int, list[PlanEquation]]:
        by: dict[int, list[PlanEquation]] = {}
        for e in eqns:
            for a in e.ins:
                if not isinstance(a, PlanLiteral):
                    by.setdefault(a, []).append(e)
        return by

    def materialised() -> set[int]:
        m = {
            a
            for e in eqns
            if tags[e.outs[0]] == GENERAL
            for a in e.ins
            if not isinstance(a, PlanLiteral) and tags[a] == AFFINE
        }
        if not isinstance(out, PlanLiteral) and tags[out] == AFFINE:
            m.add(out)
        return m

    by = users()
    changed = True
    while changed:
        changed = False
        mat = materialised()
        for e in eqns:
            (key,) = e.outs if len(e.outs) == 1 else (None,)
            if key is None or tags[key] != AFFINE or e.primitive.name not in _RECOMPUTE:
                continue
            if key == out or any(tags[u.outs[0]] != GENERAL for u in by.get(key, [])):
                continue
            affine_ins = [a for a in e.ins if not isinstance(a, PlanLiteral) and tags[a] == AFFINE]
            if affine_ins and all(a in mat for a in affine_ins):
                tags[key] = GENERAL
                changed = True
    return materialised()


def _build_plan(problem: Any) -> PlanePlan | None:
    theta_s = jax.ShapeDtypeStruct((problem.size,), problem.dtype)
    data_s = jax.tree_util.tree_map(lambda a: jax.ShapeDtypeStruct(a.shape, a.dtype), problem.data)
    closed = jax.make_jaxpr(problem.flat_loss)(theta_s, data_s)
    if closed.effects:
        return None
    eqns, consts, in_keys, out, opened, out_avals = _flatten(closed)
    avals: dict[int, Any] = {}
    for var, key in zip(closed.jaxpr.invars, in_keys):
        avals[key] = var.aval
    for key, val in consts:
        avals[key] = jax.ShapeDtypeStruct(np.shape(val), jnp.result_type(val))
    tags: dict[int, str] = {k: CONST for k in in_keys[1:]}
    tags[in_keys[0]] = AFFINE
    for key, _ in consts:
        tags[key] = CONST

    def tag_of(a: Any) -> str:
        return CONST if isinstance(a, PlanLiteral) else tags[a]

    def aval_of(a: Any) -> Any:
        if isinstance(a, PlanLiteral):
            return jax.ShapeDtypeStruct(np.shape(a.value), jnp.result_type(a.value))
        return avals[a]

    for eqn in eqns:  # pass 1: tags
        tag = _tag(eqn.primitive.name, eqn.params, [tag_of(a) for a in eqn.ins])
        outs = [out_avals[i] for i in eqn.outs]
        if tag == AFFINE and not all(_is_float(o) for o in outs):
            tag = GENERAL
        for key, aval in zip(eqn.outs, outs):
            tags[key] = tag
            avals[key] = aval
    if not isinstance(out, PlanLiteral):
        avals.setdefault(out, out_avals.get(out))
    mat = _demote(eqns, tags, out)
    if not mat:  # theta never reaches the loss through an affine value
        return None
    point_flops = plane_flops = plain_flops = 0
    general: list[str] = []
    for eqn in eqns:  # pass 2: costs
        tag = tags[eqn.outs[0]]
        ins = [aval_of(a) for a in eqn.ins]
        outs = [avals[k] for k in eqn.outs]
        flops = _weighted_flops(eqn, ins, outs, plain=False)
        if tag != CONST:
            plain_flops += _weighted_flops(eqn, ins, outs, plain=True)
        if tag == GENERAL:
            point_flops += flops
            general.append(eqn.primitive.name)
        else:
            plane_flops += flops * (3 if tag == AFFINE else 1)
    elements = sum(int(np.prod(avals[k].shape, dtype=np.int64)) for k in mat)
    return PlanePlan(
        theta=in_keys[0],
        data=tuple(in_keys[1:]),
        consts=tuple(consts),
        eqns=tuple(eqns),
        tags=tags,
        output=out,
        materialised=tuple(sorted(mat)),
        affine_elements=elements,
        point_flops=point_flops,
        plane_flops=plane_flops,
        plain_flops=max(plain_flops, 1),
        opened=tuple(opened),
        general=tuple(general),
    )


def affine_wins(plan: PlanePlan | None, points_per_call: int) -> bool:
    """Whether the plane-affine path is estimated to beat the plain one.

    Per grid point the plain path costs ``plain_flops``; the affine path
    costs ``4 x affine_elements`` (two multiply-adds per materialised
    element) plus ``point_flops``, and ``plane_flops / points_per_call``
    for the once-per-call part. The affine path is taken when the plain
    estimate is at least :data:`AFFINE_GAIN` times the affine one
    (:data:`AFFINE_GAIN_STREAMED` when the coefficients outgrow the cache:
    :func:`affine_gain_needed`).

    The weights were set from measurements on a 2-core CPU (see
    ``benchmarks/affine.py``): transcendental functions cost the same on
    both paths and dominate neural networks, so they count
    :data:`TRANSCENDENTAL_WEIGHT` FLOPs per element; a batched matrix
    product with a contraction over two or three coordinates (``X @ theta``
    with two parameters) streams memory at the speed of a larger one
    (:data:`SMALL_CONTRACTION`). With these, a straight-line regression
    in the ``X @ theta`` form and a logistic regression take the affine
    path, and so do tanh networks whose first layer's output is not small
    next to the rest of the work while their coefficients fit in cache (the
    2-16-1 network of ``benchmarks/`` on 200 rows: estimate 1.35, measured
    1.5x; on 2,000 rows it keeps the plain path); the same regression written per row
    (``t0 + t1 * x``: one multiply-add per row either way; estimate 0.8,
    measured 0.9x) keeps the plain one.
    """
    if plan is None:
        return False
    affine = plan.point_cost + plan.plane_flops / max(points_per_call, 1)
    plain = plan.plain_flops
    return bool(plain >= affine_gain_needed(plan) * affine)


def affine_gain_needed(plan: PlanePlan, itemsize: int = 4) -> float:
    """:data:`AFFINE_GAIN`, or :data:`AFFINE_GAIN_STREAMED` when the coefficients leave the cache.

    Every grid point reads the three coefficient arrays of each materialised
    element; once they outgrow :data:`CACHE_BYTES`, those reads stream from
    memory, which the FLOP estimate does not see. Measured on the 2-core VM
    (``python -m benchmarks.affine`` and ``benchmarks.digits_mlp``, quiet
    machine): the 2-16-1 network (estimate 1.35) ran 1.53x on the affine
    path with 200 rows (38 KB of coefficients) and 0.90x with 2,000 rows
    (375 KB); the 64-128-128-10 digits network (estimate 1.42, 2.9 MB)
    1.05x; the straight line in the ``X @ theta`` form (estimate 1.99,
    1.2 MB) 3.6x. Five points set this threshold, not a model of the cache.
    """
    streamed = 3 * plan.affine_elements * itemsize > CACHE_BYTES
    return AFFINE_GAIN_STREAMED if streamed else AFFINE_GAIN

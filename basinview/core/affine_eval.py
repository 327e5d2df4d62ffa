"""Evaluation of a :class:`~basinview.core.affine.PlanePlan`: once per plane, then per point.

:func:`plane_point_fn` runs the plan's constant and affine equations once
(each affine one three times, for ``c0``, ``c1`` and ``c2``: the constant
operands of a sum enter ``c0`` only, a constant factor multiplies all
three) and returns the per-point function, which materialises the affine
values the general equations read as ``c0 + a c1 + b c2`` and runs the
general equations as written, each with
``eqn.primitive.bind(*invals, **eqn.params)``.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from .affine import (
    ADDITIVE_PRIMITIVES,
    AFFINE,
    CONST,
    GENERAL,
    PlanePlan,
    PlanEquation,
    PlanLiteral,
)

__all__ = ["plane_point_fn"]


def _value(env: dict[int, Any], a: Any) -> Any:
    return a.value if isinstance(a, PlanLiteral) else env[a]


def _affine_apply(
    eqn: PlanEquation, parts: list[Any], tags: list[str]
) -> list[tuple[Any, Any, Any]]:
    """The coefficients ``(c0, c1, c2)`` of every output of an affine equation."""
    name = eqn.primitive.name
    zeros = name in ADDITIVE_PRIMITIVES or name == "pad" or name == "select_n"
    out: list[list[Any]] = []
    for k in range(3):
        ops = []
        for i, (p, t) in enumerate(zip(parts, tags)):
            if t == AFFINE:
                ops.append(p[k])
            elif k == 0 or not zeros or (name == "select_n" and i == 0):
                ops.append(p)
            else:
                ops.append(jnp.zeros(np.shape(p), jnp.result_type(p)))
        res = eqn.primitive.bind(*ops, **eqn.params)
        out.append(list(res) if eqn.primitive.multiple_results else [res])
    return [(out[0][j], out[1][j], out[2][j]) for j in range(len(out[0]))]


def _plane_stage(plan: PlanePlan, origin: Any, d1: Any, d2: Any, data: Sequence[Any]) -> Any:
    """Constants and coefficients the per-point stage reads (once per plane)."""
    env: dict[int, Any] = {plan.theta: (origin, d1, d2)}
    env.update(zip(plan.data, data))
    env.update(plan.consts)
    for eqn in plan.eqns:
        tag = plan.tags[eqn.outs[0]]
        if tag == GENERAL:
            continue
        parts = [_value(env, a) for a in eqn.ins]
        if tag == CONST:
            res = eqn.primitive.bind(*parts, **eqn.params)
            res = list(res) if eqn.primitive.multiple_results else [res]
        else:
            tags = [CONST if isinstance(a, PlanLiteral) else plan.tags[a] for a in eqn.ins]
            res = _affine_apply(eqn, parts, tags)
        env.update(zip(eqn.outs, res))
    needed = set(plan.materialised)
    for eqn in plan.eqns:
        if plan.tags[eqn.outs[0]] == GENERAL:
            needed.update(a for a in eqn.ins if not isinstance(a, PlanLiteral))
    if not isinstance(plan.output, PlanLiteral):
        needed.add(plan.output)
    return {k: env[k] for k in needed if k in env}


def _point_stage(plan: PlanePlan, pre: dict[int, Any], a: Any, b: Any) -> Any:
    """The loss at plane point ``(a, b)`` from the plane stage's values."""
    env = dict(pre)
    for k in plan.materialised:
        c0, c1, c2 = pre[k]
        env[k] = c0 + a.astype(c1.dtype) * c1 + b.astype(c2.dtype) * c2
    for eqn in plan.eqns:
        if plan.tags[eqn.outs[0]] != GENERAL:
            continue
        res = eqn.primitive.bind(*(_value(env, x) for x in eqn.ins), **eqn.params)
        env.update(zip(eqn.outs, list(res) if eqn.primitive.multiple_results else [res]))
    return _value(env, plan.output)


def plane_point_fn(
    plan: PlanePlan, origin: Any, d1: Any, d2: Any, data: Any
) -> Callable[[jax.Array], jax.Array]:
    """``p -> loss(origin + p[0] d1 + p[1] d2)`` with the plane stage computed now.

    Call inside a traced function (``jit``); the returned function is
    meant for ``jax.lax.map``/``jax.vmap`` over points ``p = (a, b)``.
    """
    pre = _plane_stage(plan, origin, d1, d2, jax.tree_util.tree_leaves(data))

    def point(p: jax.Array) -> jax.Array:
        return _point_stage(plan, pre, p[0], p[1])

    return point

"""Loss lint: patterns that run without error but can give a wrong answer.

:func:`lint_loss` traces the user's loss once on abstract inputs
(``jax.make_jaxpr`` on ``jax.ShapeDtypeStruct``; nothing is compiled or
run) and reads the traced program. Each finding is a warning of its own
class (see :mod:`basinview.core.errors`), names the fix, and has a short
name to silence it with (``Problem(..., lint={"ignore": [name]})``):

- ``row-broadcast`` (:class:`RowBroadcastWarning`): an element-wise
  operation or broadcast turns arrays with at most one axis of the data's
  row count ``n`` into one with two such axes, the classic ``y - pred``
  with ``y`` of shape ``(n,)`` and ``pred`` of shape ``(n, 1)``, which
  compares every row with every other row. Matrix products (``X @ X.T``)
  and losses given an ``(n, n)`` input are not flagged.
- ``closed-over-data`` (:class:`ClosedOverDataWarning`): the loss uses a
  constant array of at least :data:`LARGE_CONSTANT` elements that it closes
  over instead of taking it as data.
- ``discarded-precision`` (:class:`DiscardedPrecisionWarning`): values
  computed from parameters or data are cast to a lower floating precision
  (or parameters to integers) inside the loss.
- ``mixed-precision`` (:class:`MixedPrecisionWarning`): the loss computes
  in a higher precision than the parameters have (float64 data with float32
  parameters under x64), or parameter leaves differ in precision.
- ``integer-data`` (:class:`IntegerDataWarning`): integer data converted to
  a float type that cannot hold their values exactly (above ``2**24`` in
  float32).
"""

from __future__ import annotations

import inspect
from collections.abc import Callable, Iterator
from typing import TYPE_CHECKING, Any

import jax
import jax.extend.core as jcore
import jax.numpy as jnp
import numpy as np

from .errors import (
    LINT_CHECKS,
    ClosedOverDataWarning,
    DiscardedPrecisionWarning,
    IntegerDataWarning,
    LossLintWarning,
    MixedPrecisionWarning,
    ParameterError,
    RowBroadcastWarning,
)

if TYPE_CHECKING:
    from .pytrees import Flattener

__all__ = ["LARGE_CONSTANT", "LINT_CHECKS", "MIN_ROWS", "lint_ignored", "lint_loss"]

LARGE_CONSTANT = 1000
"""Elements from which a closed-over constant array is reported."""

MIN_ROWS = 4
"""Row counts below this are too likely to equal other sizes to lint on."""

_NO_ROW_LINT = frozenset({"dot_general", "conv_general_dilated"})
_EMPTY: frozenset[str] = frozenset()


def lint_ignored(lint: Any) -> frozenset[str] | None:
    """The checks to skip for ``Problem(..., lint=...)``; None skips them all.

    ``lint`` is True (all checks), False (none) or ``{"ignore": [names]}``.
    """
    if lint is True:
        return _EMPTY
    if lint is False:
        return None
    names = sorted(LINT_CHECKS)
    if isinstance(lint, dict) and set(lint) <= {"ignore"}:
        ignore = lint.get("ignore", ())
        if isinstance(ignore, str):
            ignore = (ignore,)
        unknown = [x for x in ignore if x not in LINT_CHECKS]
        if not unknown:
            return frozenset(ignore)
        raise ParameterError(
            f"lint ignores unknown checks {unknown}; the checks are {names}. Write e.g. "
            "lint={'ignore': ['row-broadcast']}, or lint=False to skip the lint."
        )
    raise ParameterError(
        f"lint must be True, False or {{'ignore': [names]}}; got {lint!r}. The checks "
        f"are {names}, e.g. lint={{'ignore': ['row-broadcast']}}."
    )


# ---------------------------------------------------------------- the program
def _data_names(loss: Callable[..., Any], data: tuple[Any, ...]) -> list[str]:
    """One name per data leaf: the loss's own argument names where it has them."""
    try:
        args = [
            p.name
            for p in inspect.signature(loss).parameters.values()
            if p.kind in (p.POSITIONAL_ONLY, p.POSITIONAL_OR_KEYWORD)
        ][1:]
    except (TypeError, ValueError):
        args = []
    names = []
    for i, d in enumerate(data):
        base = args[i] if i < len(args) else f"data[{i}]"
        for path, _ in jax.tree_util.tree_flatten_with_path(d)[0]:
            names.append(base + jax.tree_util.keystr(path))
    return names


def _abstract(leaf: Any) -> jax.ShapeDtypeStruct:
    return jax.ShapeDtypeStruct(np.shape(leaf), jnp.result_type(leaf))


def _jaxprs(jaxpr: Any) -> Iterator[Any]:
    yield jaxpr
    for eqn in jaxpr.eqns:
        for sub in jcore.jaxprs_in_params(eqn.params):
            yield from _jaxprs(sub)


def _shape(var: Any) -> tuple[int, ...]:
    return tuple(getattr(getattr(var, "aval", None), "shape", ()) or ())


def _dtype(var: Any) -> np.dtype | None:
    dtype = getattr(getattr(var, "aval", None), "dtype", None)
    try:
        return np.dtype(dtype) if dtype is not None else None
    except TypeError:  # extended dtypes (random keys)
        return None


def _is_float(dtype: np.dtype | None) -> bool:
    return dtype is not None and jnp.issubdtype(dtype, jnp.floating)


def _taint(jaxpr: Any, taint: dict[Any, frozenset[str]], visit: Callable[..., None]) -> None:
    """Propagate which inputs each value is computed from; call visit on each equation."""
    for eqn in jaxpr.eqns:
        srcs = [
            _EMPTY if isinstance(v, jcore.Literal) else taint.get(v, _EMPTY) for v in eqn.invars
        ]
        union = frozenset().union(*srcs)
        visit(eqn, union)
        for sub in jcore.jaxprs_in_params(eqn.params):
            inner: dict[Any, frozenset[str]] = {}
            if len(sub.invars) == len(eqn.invars):
                inner.update(zip(sub.invars, srcs))
            else:
                inner.update((v, union) for v in sub.invars)
            _taint(sub, inner, visit)
        for v in eqn.outvars:
            taint[v] = union


# ---------------------------------------------------------------- the checks
def _row_broadcast(jaxpr: Any, inputs: list[Any], rows: set[int]) -> str:
    for n in sorted(rows, reverse=True):
        if any(sum(s == n for s in _shape(v)) >= 2 for v in inputs):
            continue  # the loss is given pairwise (n x n) data: pairs are intended
        for sub in _jaxprs(jaxpr):
            for eqn in sub.eqns:
                if eqn.primitive.name in _NO_ROW_LINT:
                    continue
                out = [s for s in map(_shape, eqn.outvars) if sum(d == n for d in s) >= 2]
                ins = [_shape(v) for v in eqn.invars]
                if (
                    out
                    and all(sum(d == n for d in s) < 2 for s in ins)
                    and any(n in s for s in ins)
                ):
                    shapes = " and ".join(str(s) for s in ins if s)
                    return (
                        f"builds a {out[0]} array from {shapes} ({eqn.primitive.name}): two "
                        f"axes of the data's {n} rows. This is usually a target of shape "
                        f"({n},) combined with a prediction of shape ({n}, 1), which "
                        "broadcasts to every pair of rows and fits nonsense without an "
                        f"error. Fix: give both the same shape, e.g. pred[:, 0] or "
                        "pred.ravel() (or y[:, None]). If the loss compares pairs of rows "
                        "on purpose (a kernel or distance matrix), silence this check "
                        "with lint={'ignore': ['row-broadcast']}."
                    )
    return ""


def _constant_name(loss: Callable[..., Any], const: Any) -> str:
    try:
        found = inspect.getclosurevars(inspect.unwrap(loss))
    except (TypeError, ValueError):
        return ""
    for scope in (found.nonlocals, found.globals):
        for name, value in scope.items():
            if value is const or (
                isinstance(value, (np.ndarray, jax.Array))
                and np.shape(value) == np.shape(const)
                and np.dtype(value.dtype) == np.dtype(const.dtype)
            ):
                return f" ({name!r})"
    return ""


def _same_array(a: Any, b: Any) -> bool:
    if a is b:
        return True
    if np.shape(a) != np.shape(b):
        return False
    try:
        return bool(np.array_equal(np.asarray(a), np.asarray(b)))
    except (TypeError, ValueError):  # extended dtypes (random keys)
        return False


def _closed_over(loss: Callable[..., Any], closed: Any, fixed: tuple[Any, ...]) -> str:
    consts = list(closed.consts)
    for sub in _jaxprs(closed.jaxpr):
        for eqn in sub.eqns:
            for value in eqn.params.values():
                if isinstance(value, jcore.ClosedJaxpr):
                    consts.extend(value.consts)
    for const in consts:
        size = int(np.size(const))
        if size < LARGE_CONSTANT or not hasattr(const, "shape"):
            continue
        if any(_same_array(f, const) for f in fixed):
            continue  # a fixed part of the user's model (e.g. an integer buffer)
        return (
            f"uses a constant array of shape {tuple(const.shape)} ({const.dtype})"
            f"{_constant_name(loss, const)} that it closes over (a global or enclosing "
            "variable) instead of taking it as data. basinview cannot see such an array: "
            "the fingerprint and recorded settings do not cover it, data_chunk_rows and "
            "minibatches do not split it, and changing the variable later is ignored by "
            "the compiled functions. Fix: pass it as data, Problem(loss, params, X, y) "
            "with loss(params, X, y). If it is a fixed part of the model (a basis, frozen "
            "weights), silence this check with lint={'ignore': ['closed-over-data']}."
        )
    return ""


def _precision(closed: Any, names: list[str], n_params: int, data: list[Any]) -> tuple[str, str]:
    """(discarded-precision message, integer-data message) from one pass over the program."""
    jaxpr = closed.jaxpr
    params = set(names[:n_params])
    taint = {v: frozenset([name]) for v, name in zip(jaxpr.invars, names)}
    leaf_of = dict(zip(names[n_params:], data))
    casts: list[tuple[frozenset[str], np.dtype, np.dtype]] = []
    to_int: set[str] = set()
    int_uses: dict[str, np.dtype] = {}

    def visit(eqn: Any, src: frozenset[str]) -> None:
        if not src or eqn.primitive.name != "convert_element_type":
            return
        before, after = _dtype(eqn.invars[0]), _dtype(eqn.outvars[0])
        if before is None or after is None:
            return
        if _is_float(before) and _is_float(after) and after.itemsize < before.itemsize:
            casts.append((src, before, after))
        elif _is_float(before) and not _is_float(after) and src & params:
            to_int.update(src & params)
        elif not _is_float(before) and _is_float(after):
            for name in src - params:
                if name in leaf_of and jnp.issubdtype(before, jnp.integer):
                    int_uses.setdefault(name, after)

    _taint(jaxpr, taint, visit)
    discarded = ""
    if casts:
        src, before, after = casts[0]
        what = ", ".join(sorted(src))
        discarded = (
            f"casts values computed from {what} from {before} to {after}, so the extra "
            f"digits of {before} are discarded: the loss resolves only {after} while "
            f"grids, steps and tolerances assume {before}. Fix: give the parameters and "
            f"data in the precision the loss computes in (e.g. jnp.asarray(x, "
            f"jnp.{after})), or remove the cast from the loss. To study a "
            "lower-precision model on purpose, silence this check with "
            "lint={'ignore': ['discarded-precision']}."
        )
    elif to_int:
        what = ", ".join(sorted(to_int))
        discarded = (
            f"converts values computed from the parameters {what} to integers, which "
            "discards every digit after the point: the gradient through that conversion "
            "is zero, so where the loss depends on the parameters only through it, descent "
            "cannot move them and the surface is a staircase. Fix: use a smooth function "
            "of the parameters instead (jnp.round and jnp.floor have a zero gradient too). "
            "If the integers only pick an index beside a smooth part (interpolation), "
            "silence this check with lint={'ignore': ['discarded-precision']}."
        )
    integer = ""
    for name, ftype in sorted(int_uses.items()):
        exact = 2 ** (jnp.finfo(ftype).nmant + 1)
        leaf = np.asarray(leaf_of[name])
        top = int(np.max(np.abs(leaf.astype(np.float64)))) if leaf.size else 0
        if top > exact:
            integer = (
                f"converts the integer data {name} to {ftype}, which holds integers "
                f"exactly only up to 2**{jnp.finfo(ftype).nmant + 1} = {exact}, but "
                f"{name} reaches {top}: neighbouring values become equal and the loss "
                "rounds them without an error. Fix: rescale or centre them before "
                f"building the problem (e.g. (x - x.min()) / scale as {ftype} data), or "
                "enable float64 (jax.config.update('jax_enable_x64', True)) before "
                "creating the arrays."
            )
            break
    return discarded, integer


def _mixed(flattener: Flattener, out_dtype: np.dtype, names: list[str], data: list[Any]) -> str:
    leaf_types: dict[str, list[str]] = {}
    for info, leaf in zip(flattener.leaves, jax.tree_util.tree_leaves(flattener.view_arrays)):
        leaf_types.setdefault(str(np.dtype(jnp.result_type(leaf))), []).append(info.name)
    if len(leaf_types) > 1:
        listing = "; ".join(f"{k}: {', '.join(v[:4])}" for k, v in sorted(leaf_types.items()))
        return (
            f"receives parameter leaves of different precisions ({listing}). The flat "
            f"parameter vector is {flattener.dtype}, and each leaf is cast back to its own "
            "type inside the loss, so steps smaller than a leaf's precision are lost. "
            "Fix: give every leaf the same floating type, e.g. "
            f"jax.tree_util.tree_map(lambda a: jnp.asarray(a, jnp.{flattener.dtype}), params)."
        )
    if np.dtype(out_dtype).itemsize > flattener.dtype.itemsize:
        wide = [n for n, d in zip(names, data) if np.dtype(d.dtype) == np.dtype(out_dtype)]
        because = f" (data {', '.join(wide[:4])} are {out_dtype})" if wide else ""
        return (
            f"computes in {out_dtype}{because} but the parameters are {flattener.dtype}: "
            f"the parameter vector, grid spacing, steps and tolerances have "
            f"{flattener.dtype} resolution, so the analysis is not the {out_dtype} one "
            "it looks like. Fix: make the parameters "
            f"{out_dtype}, jax.tree_util.tree_map(lambda a: jnp.asarray(a, "
            f"jnp.{out_dtype}), params), or give the data as {flattener.dtype}."
        )
    return ""


# ---------------------------------------------------------------- entry point
def lint_loss(
    loss: Callable[..., Any],
    flattener: Flattener,
    data: tuple[Any, ...],
    *,
    name: str = "",
    ignore: frozenset[str] = _EMPTY,
) -> tuple[LossLintWarning, ...]:
    """Warnings about ``loss`` on these parameters and data (not emitted).

    Traces ``loss(params, *data)`` once on abstract inputs (no compilation,
    no evaluation). :class:`~basinview.core.Problem` calls it when built and
    emits each warning; call it yourself to inspect the findings.

    Args:
        loss: the user's ``loss(params, *data)``.
        flattener: the problem's :class:`~basinview.core.pytrees.Flattener`.
        data: the data passed after the parameters (arrays or pytrees).
        name: the loss's name, for the messages.
        ignore: names of checks to skip (see :data:`LINT_CHECKS`).

    Returns:
        One warning instance per check that found something (at most one each).
    """
    view = flattener.view
    combine = view.combine if view is not None else (lambda a: a)
    arrays = flattener.view_arrays
    data_leaves = jax.tree_util.tree_leaves(data)
    names = [info.name for info in flattener.leaves] + _data_names(loss, data)
    try:
        closed = jax.make_jaxpr(lambda a, *d: loss(combine(a), *d))(
            jax.tree_util.tree_map(_abstract, arrays),
            *jax.tree_util.tree_map(_abstract, data),
        )
    except Exception:  # the loss was checked already; a lint never blocks a problem
        return ()
    n_params = len(flattener.leaves)
    if len(closed.jaxpr.invars) != len(names):
        return ()
    rows = {int(d.shape[0]) for d in data_leaves if np.ndim(d) >= 1 and d.shape[0] >= MIN_ROWS}
    found: dict[type[LossLintWarning], str] = {}
    if RowBroadcastWarning.check not in ignore and rows:
        found[RowBroadcastWarning] = _row_broadcast(closed.jaxpr, closed.jaxpr.invars, rows)
    if ClosedOverDataWarning.check not in ignore:
        fixed = view.fixed if view is not None else ()
        found[ClosedOverDataWarning] = _closed_over(loss, closed, fixed)
    discarded, integer = _precision(closed, names, n_params, data_leaves)
    found[DiscardedPrecisionWarning] = discarded
    found[IntegerDataWarning] = integer
    out = _dtype(closed.jaxpr.outvars[0]) if closed.jaxpr.outvars else None
    if out is not None and _is_float(out):
        found[MixedPrecisionWarning] = _mixed(flattener, out, names[n_params:], data_leaves)
    label = name or "the loss"
    return tuple(
        cls(f"{label} {message} [{cls.__name__}: {cls.check!r}]")
        for cls, message in found.items()
        if message and cls.check not in ignore
    )

"""Losses over the rows of the data, accumulated in chunks of rows.

:func:`accumulate_rows` evaluates a loss that is a mean or a sum of one term
per row on chunks of the rows, so memory no longer grows with the number of
rows; :class:`~basinview.core.Problem` uses it with ``data_chunk_rows``.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from .errors import ParameterError

__all__ = ["REDUCTIONS", "accumulate_rows"]

REDUCTIONS = ("mean", "sum")
"""How a loss combines its rows: ``"mean"`` (e.g. ``jnp.mean``) or ``"sum"``."""


def row_count(data: tuple[Any, ...]) -> int:
    return int(jax.tree_util.tree_leaves(data)[0].shape[0])


def accumulate_rows(
    loss: Callable[..., Any], params: Any, data: tuple[Any, ...], rows: int, reduction: str
) -> jax.Array:
    """``loss(params, *data)`` accumulated over chunks of ``rows`` rows of the data.

    Valid when the loss is a mean (``reduction="mean"``) or a sum
    (``"sum"``) of one term per row: then the whole-data loss is the
    row-weighted mean, or the sum, of the chunk losses. The chunks run in a
    ``lax.scan`` whose body is rematerialised (``jax.checkpoint``), so the
    memory of the loss, its gradient and Hessian-vector products grows with
    ``rows``, not with the number of rows of the data. A last, shorter
    chunk takes the remaining rows.
    """
    n = row_count(data)
    full, rest = divmod(n, rows)
    if full == 0 or (full == 1 and rest == 0):
        return loss(params, *data)
    piece = jax.checkpoint(lambda p, chunk: loss(p, *chunk))
    head = jax.tree_util.tree_map(
        lambda a: a[: full * rows].reshape((full, rows, *a.shape[1:])), data
    )
    first = jax.tree_util.tree_map(lambda a: a[0], head)
    out = jax.eval_shape(piece, params, first)

    def body(total: jax.Array, chunk: Any) -> tuple[jax.Array, None]:
        return total + piece(params, chunk), None

    total, _ = jax.lax.scan(body, jnp.zeros(out.shape, out.dtype), head)
    if reduction == "mean":
        total = total * jnp.asarray(rows / n, out.dtype)
    if rest:
        tail = jax.tree_util.tree_map(lambda a: a[full * rows :], data)
        value = piece(params, tail)
        if reduction == "mean":
            value = value * jnp.asarray(rest / n, out.dtype)
        total = total + value
    return total


def check_chunking(
    data: tuple[Any, ...], rows: Any, reduction: Any
) -> tuple[int | None, str | None]:
    if rows is None:
        if reduction is not None:
            raise ParameterError(
                "reduction= only matters with data_chunk_rows=...; give both or neither."
            )
        return None, None
    if isinstance(rows, bool) or not isinstance(rows, (int, np.integer)) or rows < 1:
        raise ParameterError(f"data_chunk_rows must be a positive integer; got {rows!r}.")
    if reduction not in REDUCTIONS:
        raise ParameterError(
            f"data_chunk_rows needs reduction='mean' or 'sum' (how the loss combines its "
            f"rows: jnp.mean or jnp.sum over them); got reduction={reduction!r}."
        )
    leaves = jax.tree_util.tree_leaves(data)
    if not leaves:
        raise ParameterError("data_chunk_rows needs data, but the problem has none.")
    lead = sorted({int(leaf.shape[0]) if leaf.ndim else -1 for leaf in leaves})
    if len(lead) != 1 or lead[0] < 1:
        raise ParameterError(
            "data_chunk_rows splits every data array along its first axis (rows), so all "
            f"data arrays must have the same number of rows; got leading sizes {lead} "
            "(-1: a scalar). Pass constants to the loss with functools.partial instead."
        )
    return int(rows), str(reduction)

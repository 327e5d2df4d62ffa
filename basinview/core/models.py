"""Model libraries as they come: equinox and flax.nnx modules as parameters.

A model object mixes what is explored (floating-point weight arrays) with
what is not (activation functions, sizes, integer buffers, batch statistics,
random-number state). :func:`model_view` separates the two once, when a
problem is built: the flat vector is made from the weight arrays only, and
the loss is always called with a whole model rebuilt from them, so the
user's ``loss(model, *data)`` needs no change.

- **equinox**: the parameters are the module's inexact (floating) arrays,
  ``eqx.partition(model, eqx.is_inexact_array)``; everything else (Python
  floats and ints, functions, integer arrays) is held fixed and put back
  with ``eqx.combine``. An equinox module may sit inside a dict or list with
  other parameters; only the module's own leaves are filtered.
- **flax.nnx**: the parameters are the module's ``nnx.Param`` variables
  (``nnx.split(model, nnx.Param, ...)``), as a pure dict of arrays, so
  labels read ``layers[0].kernel[2,1]`` with no ``.value`` suffix; other
  variables (batch statistics, random-number state) are held fixed and the
  model is rebuilt with ``nnx.merge``. The module must be the whole of the
  parameters.
- anything else is a plain pytree and is used as it is.

Neither library is imported here: a model can only be one of theirs if the
user has imported the library already.
"""

from __future__ import annotations

import sys
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import jax
import numpy as np

from .errors import ParameterError

__all__ = ["ModelView", "model_view"]


def _identity(tree: Any) -> Any:
    return tree


@dataclass(frozen=True)
class ModelView:
    """The explored arrays of a parameter object and how to rebuild it.

    Attributes:
        kind: ``"pytree"``, ``"equinox"`` or ``"nnx"``.
        arrays: the pytree of explored arrays (the flat vector is made of it).
        combine: arrays pytree (same structure, any values, traced or not)
            -> the object the loss receives (a whole model).
        split: an object of the same kind (e.g. a start given as a model)
            -> its arrays pytree.
        fixed: the arrays held fixed inside the model (not explored), e.g.
            integer buffers or batch statistics; the loss closes over them.
        index_keys: whether integer dict keys are list positions (nnx's pure
            dicts), labelled ``layers[0]`` rather than ``layers.0``.
    """

    kind: str
    arrays: Any
    combine: Callable[[Any], Any] = _identity
    split: Callable[[Any], Any] = _identity
    fixed: tuple[Any, ...] = ()
    index_keys: bool = False


def _array_leaves(tree: Any) -> tuple[Any, ...]:
    return tuple(
        leaf
        for leaf in jax.tree_util.tree_leaves(tree)
        if isinstance(leaf, (np.ndarray, jax.Array))
    )


def _equinox_view(eqx: Any, params: Any) -> ModelView | None:
    def is_module(node: Any) -> bool:
        return isinstance(node, eqx.Module)

    if not any(map(is_module, jax.tree_util.tree_leaves(params, is_leaf=is_module))):
        return None

    def spec_of(tree: Any) -> Any:
        # Inside a module only floating arrays are parameters; outside, every leaf is.
        return jax.tree_util.tree_map(
            lambda node: eqx.is_inexact_array if is_module(node) else True, tree, is_leaf=is_module
        )

    arrays, static = eqx.partition(params, spec_of(params))
    return ModelView(
        kind="equinox",
        arrays=arrays,
        combine=lambda a: eqx.combine(a, static),
        split=lambda model: eqx.partition(model, spec_of(model))[0],
        fixed=_array_leaves(static),
    )


def _nnx_view(nnx: Any, params: Any) -> ModelView | None:
    if not isinstance(params, nnx.Module):
        return None
    graphdef, state, rest = nnx.split(params, nnx.Param, ...)
    state_def = jax.tree_util.tree_structure(state)

    def pure(st: Any) -> Any:
        to_pure = getattr(nnx, "to_pure_dict", None)  # newer flax; older: a State method
        return to_pure(st) if to_pure is not None else st.to_pure_dict()

    arrays = pure(state)
    if len(jax.tree_util.tree_leaves(arrays)) != len(jax.tree_util.tree_leaves(state)):
        raise ParameterError(
            "the nnx.Param variables of this flax module cannot be read as plain arrays "
            "(nnx.to_pure_dict gave a different number of leaves). Pass the parameters "
            "as a dict of arrays and call nnx.merge inside the loss instead."
        )

    def combine(a: Any) -> Any:
        rebuilt = jax.tree_util.tree_unflatten(state_def, jax.tree_util.tree_leaves(a))
        return nnx.merge(graphdef, rebuilt, rest)

    def split(model: Any) -> Any:
        if not isinstance(model, nnx.Module):
            return model
        return pure(nnx.split(model, nnx.Param, ...)[1])

    return ModelView(
        kind="nnx",
        arrays=arrays,
        combine=combine,
        split=split,
        fixed=_array_leaves(rest),
        index_keys=True,
    )


def model_view(params: Any) -> ModelView:
    """Separate the explored arrays of ``params`` from the rest (see the module doc)."""
    nnx = sys.modules.get("flax.nnx")
    if nnx is not None:
        view = _nnx_view(nnx, params)
        if view is not None:
            return view
    eqx = sys.modules.get("equinox")
    if eqx is not None:
        view = _equinox_view(eqx, params)
        if view is not None:
            return view
    return ModelView(kind="pytree", arrays=params)

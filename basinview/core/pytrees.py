"""Flat views of parameter pytrees: one vector, one label per coordinate.

The user's parameters can be any JAX pytree (dicts, lists, tuples, scalars,
registered dataclasses such as equinox or flax modules). The engine works on
one flat vector; this module maps between the two and names every flat
coordinate in the user's own terms (``w[0]``, ``layer1.bias[3]``, ``b``).
Model objects of equinox and flax.nnx are first split into their explored
arrays and the rest (:mod:`basinview.core.models`); the flat vector holds
the arrays, and unflattening gives a whole model again.

Parameters are float32 or float64. Half precision (float16, bfloat16) is
refused with a clear error: the engine's tolerances, divergence threshold
and grid spacing would sit at or beyond what half precision resolves (the
divergence threshold alone, 1e6 times the starting loss, overflows
float16's largest value 65504), so runs would never converge and surfaces
would be quantised. Explore the model in float32 and cast inside the loss
to study half-precision arithmetic.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
from jax.flatten_util import ravel_pytree

from .errors import ParameterError
from .models import ModelView, model_view

__all__ = ["HALF_PRECISION", "Flattener", "LeafInfo", "make_flattener"]

ROOT = "theta"

HALF_PRECISION = ("float16", "bfloat16")
"""Floating dtypes refused as parameters (see the module doc)."""


@dataclass(frozen=True)
class LeafInfo:
    """Where one leaf of the parameter pytree sits in the flat vector."""

    name: str
    shape: tuple[int, ...]
    start: int

    @property
    def size(self) -> int:
        return int(np.prod(self.shape, dtype=np.int64))

    @property
    def stop(self) -> int:
        return self.start + self.size


def _key_text(key: Any, index_keys: bool = False) -> tuple[str, bool]:
    """Text of one path entry and whether it is an index (bracketed)."""
    if isinstance(key, jax.tree_util.DictKey):
        is_index = index_keys and isinstance(key.key, (int, np.integer))
        return str(key.key), is_index
    if isinstance(key, jax.tree_util.GetAttrKey):
        return str(key.name), False
    if isinstance(key, jax.tree_util.SequenceKey):
        return str(key.idx), True
    if isinstance(key, jax.tree_util.FlattenedIndexKey):
        return str(key.key), True
    return str(key), False


def leaf_name(path: tuple[Any, ...], index_keys: bool = False) -> str:
    """Readable name of a leaf path: ``layer1.bias``, ``layers[0].w``, ``theta``.

    With ``index_keys`` an integer dict key reads as a list position (``[0]``).
    """
    text = ""
    for key in path:
        part, is_index = _key_text(key, index_keys)
        if is_index:
            text = (text or ROOT) + f"[{part}]"
        else:
            text = f"{text}.{part}" if text else part
    return text or ROOT


def element_labels(name: str, shape: tuple[int, ...]) -> list[str]:
    """Labels of the elements of one leaf in row-major (ravel) order."""
    if shape == ():
        return [name]
    return [f"{name}[{','.join(map(str, idx))}]" for idx in np.ndindex(*shape)]


def _check_leaf(name: str, leaf: Any) -> None:
    dtype = jnp.result_type(leaf)
    if jnp.issubdtype(dtype, jnp.complexfloating):
        raise ParameterError(
            f"parameter {name!r} is complex ({dtype}); basinview needs real "
            "floating-point parameters. Split it into real and imaginary parts, "
            "e.g. {'re': z.real, 'im': z.imag}."
        )
    if not jnp.issubdtype(dtype, jnp.floating):
        raise ParameterError(
            f"parameter {name!r} has dtype {dtype}, but gradients need floating-point "
            f"parameters. Convert it, e.g. jnp.asarray(value, dtype=float) or write "
            f"1.0 instead of 1; keep integer settings (sizes, counts) out of the "
            f"parameters and pass them to the loss with functools.partial."
        )
    if str(np.dtype(dtype)) in HALF_PRECISION:
        raise ParameterError(
            f"parameter {name!r} is {dtype} (half precision); basinview explores "
            "parameters in float32 or float64, because its tolerances, divergence "
            "threshold and grid spacing need more range and digits than half precision "
            "has (float16 overflows above 65504). Convert the parameters, e.g. "
            "jax.tree_util.tree_map(lambda a: a.astype(jnp.float32), params) (for an "
            "equinox model: jax.tree_util.tree_map(lambda a: a.astype(jnp.float32) if "
            "eqx.is_inexact_array(a) else a, model)); to study half-precision "
            "arithmetic, cast inside the loss and silence the lint with "
            "lint={'ignore': ['discarded-precision']}."
        )


@dataclass(frozen=True)
class Flattener:
    """Maps a parameter pytree to a flat vector and back.

    Attributes:
        treedef: structure of the user's parameters.
        leaves: position of every leaf in the flat vector.
        labels: one readable label per flat coordinate.
        dtype: floating dtype of the flat vector.
    """

    treedef: Any
    leaves: tuple[LeafInfo, ...]
    labels: tuple[str, ...]
    dtype: np.dtype
    unravel: Callable[[jax.Array], Any]
    view: ModelView | None = None

    @property
    def size(self) -> int:
        return len(self.labels)

    @property
    def view_arrays(self) -> Any:
        """The pytree of explored arrays (for a model object: without its fixed parts)."""
        if self.view is not None:
            return self.view.arrays
        return self.unravel(jnp.zeros(self.size, self.dtype))

    @property
    def kind(self) -> str:
        """``"pytree"``, or the model library the parameters come from."""
        return self.view.kind if self.view is not None else "pytree"

    def flatten(self, params: Any, *, what: str = "parameters") -> np.ndarray:
        """Flat vector of ``params``, which must have the problem's structure."""
        if (
            isinstance(params, (np.ndarray, jax.Array))
            and np.ndim(params) == 1
            and (self.treedef.num_leaves != 1 or self.leaves[0].shape != np.shape(params))
        ):
            flat = np.asarray(params)
            if flat.shape != (self.size,):
                raise ParameterError(
                    f"{what}: a flat vector must have {self.size} entries (one per "
                    f"parameter), got shape {flat.shape}. Pass a vector of length "
                    f"{self.size} (see problem.labels) or a pytree shaped like the "
                    "initial parameters."
                )
            return flat.astype(self.dtype)
        if self.view is not None:
            params = self.view.split(params)
        leaves, treedef = jax.tree_util.tree_flatten(params)
        if treedef != self.treedef:
            raise ParameterError(
                f"{what}: the structure differs from the problem's parameters.\n"
                f"  expected: {self.treedef}\n  received: {treedef}\n"
                "Pass a pytree shaped like the initial parameters, or a flat "
                f"vector of length {self.size}."
            )
        for info, leaf in zip(self.leaves, leaves):
            if tuple(np.shape(leaf)) != info.shape:
                raise ParameterError(
                    f"{what}: leaf {info.name!r} has shape {tuple(np.shape(leaf))}, "
                    f"expected {info.shape}. Give every leaf the shape it has in the "
                    "initial parameters (problem.params)."
                )
        flat = (
            np.concatenate([np.ravel(np.asarray(leaf)) for leaf in leaves])
            if leaves
            else (np.zeros(0))
        )
        return flat.astype(self.dtype)

    def index(self, label: str) -> int:
        """Flat index of a coordinate given by its label (``"w[0]"``)."""
        if not isinstance(label, str):
            raise ParameterError(
                f"a coordinate label must be a string such as {self.labels[0]!r}; got a "
                f"{type(label).__name__} ({label!r}). See problem.labels for all of them."
            )
        try:
            return self.labels.index(label)
        except ValueError:
            close = [lab for lab in self.labels if label.split("[")[0] in lab][:8]
            hint = f" Similar labels: {close}." if close else ""
            shown = list(self.labels[:12]) + (["..."] if self.size > 12 else [])
            raise ParameterError(
                f"unknown coordinate label {label!r}.{hint} Labels of this problem "
                f"({self.size}): {shown}. See problem.labels for all of them."
            ) from None


_EMPTY_MODEL = {
    "equinox": " An equinox module contributes its floating-point arrays only "
    "(eqx.is_inexact_array); Python floats and integer arrays in it stay fixed, so "
    "store the weights to explore as jnp arrays, e.g. jnp.asarray(0.5).",
    "nnx": " A flax.nnx module contributes its nnx.Param variables only; wrap the "
    "weights to explore in nnx.Param(...).",
}


def make_flattener(params: Any) -> tuple[Flattener, np.ndarray]:
    """Validate ``params`` and build its :class:`Flattener` and flat vector."""
    view = model_view(params)
    arrays = view.arrays
    path_leaves, treedef = jax.tree_util.tree_flatten_with_path(arrays)
    if not path_leaves:
        raise ParameterError(
            "the parameters contain no arrays (an empty pytree). Pass the "
            "parameters to explore, e.g. {'w': jnp.zeros(3), 'b': 0.0}."
            + _EMPTY_MODEL.get(view.kind, "")
        )
    infos, labels = [], []
    start = 0
    for path, leaf in path_leaves:
        name = leaf_name(path, view.index_keys)
        if not hasattr(leaf, "shape") and not isinstance(leaf, (int, float, complex, bool)):
            raise ParameterError(
                f"parameter {name!r} is a {type(leaf).__name__}, not an array or a "
                "number. Parameters must be arrays (or pytrees of arrays)."
            )
        _check_leaf(name, leaf)
        shape = tuple(int(s) for s in np.shape(leaf))
        info = LeafInfo(name, shape, start)
        infos.append(info)
        labels.extend(element_labels(name, shape))
        start += info.size
    if start == 0:
        raise ParameterError("the parameters have no entries (all arrays are empty).")
    flat, unravel_arrays = ravel_pytree(jax.tree_util.tree_map(jnp.asarray, arrays))
    if view.kind == "pytree":
        unravel = unravel_arrays
    else:
        combine = view.combine

        def unravel(theta: jax.Array) -> Any:
            return combine(unravel_arrays(theta))

    flattener = Flattener(
        treedef=treedef,
        leaves=tuple(infos),
        labels=tuple(labels),
        dtype=np.dtype(flat.dtype),
        unravel=unravel,
        view=view,
    )
    return flattener, np.asarray(flat)

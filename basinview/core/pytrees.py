"""Flat views of parameter pytrees: one vector, one label per coordinate.

The user's parameters can be any JAX pytree (dicts, lists, tuples, scalars,
registered dataclasses such as equinox or flax modules). The engine works on
one flat vector; this module maps between the two and names every flat
coordinate in the user's own terms (``w[0]``, ``layer1.bias[3]``, ``b``).
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

__all__ = ["Flattener", "LeafInfo", "make_flattener"]

ROOT = "theta"


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


def _key_text(key: Any) -> tuple[str, bool]:
    """Text of one path entry and whether it is an index (bracketed)."""
    if isinstance(key, jax.tree_util.DictKey):
        return str(key.key), False
    if isinstance(key, jax.tree_util.GetAttrKey):
        return str(key.name), False
    if isinstance(key, jax.tree_util.SequenceKey):
        return str(key.idx), True
    if isinstance(key, jax.tree_util.FlattenedIndexKey):
        return str(key.key), True
    return str(key), False


def leaf_name(path: tuple[Any, ...]) -> str:
    """Readable name of a leaf path: ``layer1.bias``, ``layers[0].w``, ``theta``."""
    text = ""
    for key in path:
        part, is_index = _key_text(key)
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

    @property
    def size(self) -> int:
        return len(self.labels)

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


def make_flattener(params: Any) -> tuple[Flattener, np.ndarray]:
    """Validate ``params`` and build its :class:`Flattener` and flat vector."""
    path_leaves, treedef = jax.tree_util.tree_flatten_with_path(params)
    if not path_leaves:
        raise ParameterError(
            "the parameters contain no arrays (an empty pytree). Pass the "
            "parameters to explore, e.g. {'w': jnp.zeros(3), 'b': 0.0}."
        )
    infos, labels = [], []
    start = 0
    for path, leaf in path_leaves:
        name = leaf_name(path)
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
    flat, unravel = ravel_pytree(jax.tree_util.tree_map(jnp.asarray, params))
    flattener = Flattener(
        treedef=treedef,
        leaves=tuple(infos),
        labels=tuple(labels),
        dtype=np.dtype(flat.dtype),
        unravel=unravel,
    )
    return flattener, np.asarray(flat)

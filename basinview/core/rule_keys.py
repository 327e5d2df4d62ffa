"""Stable keys for update rules, so equal optimisers share one compiled program.

An optax factory such as ``optax.adamw`` is the same object every time, but
a transformation (``optax.sgd(1.0)``, an ``optax.chain``) is rebuilt with
new closures on every call. :func:`stable_key` compares such objects by how
they were built (code, defaults and closed-over values), never by ``id()``.
"""

from __future__ import annotations

import functools
import inspect
from collections.abc import Hashable
from typing import Any

import jax
import numpy as np

__all__ = ["construction_key", "stable_key"]


class _Unkeyable(Exception):
    pass


_PLAIN = (bool, int, float, complex, str, bytes, type(None))


def construction_key(obj: Any, seen: tuple[int, ...] = ()) -> Hashable:
    """A hashable value that is equal for two objects built the same way.

    Functions compare by code, defaults and the fingerprints of the values
    they close over; numbers and strings by value; tuples, lists, dicts and
    NamedTuples (such as optax transformations) element by element; small
    arrays by shape, dtype and bytes. Anything else raises ``_Unkeyable``.
    """
    if id(obj) in seen:  # a function that refers to itself
        return ("cycle", seen.index(id(obj)))
    seen = (*seen, id(obj))
    if isinstance(obj, _PLAIN):
        return (type(obj).__name__, obj)
    if isinstance(obj, (np.generic,)):
        return ("np", obj.dtype.str, obj.item())
    if isinstance(obj, (np.ndarray, jax.Array)):
        arr = np.asarray(obj)
        if arr.size > 4096:
            raise _Unkeyable
        return ("array", arr.shape, arr.dtype.str, arr.tobytes())
    if isinstance(obj, (tuple, list)):
        return (type(obj).__qualname__, tuple(construction_key(x, seen) for x in obj))
    if isinstance(obj, dict):
        return (
            "dict",
            tuple((construction_key(k, seen), construction_key(v, seen)) for k, v in obj.items()),
        )
    if isinstance(obj, functools.partial):
        return ("partial", construction_key(obj.func, seen), construction_key(obj.args, seen),
                construction_key(obj.keywords, seen))  # fmt: skip
    if inspect.isfunction(obj):
        cells = tuple(construction_key(c.cell_contents, seen) for c in (obj.__closure__ or ()))
        return ("function", obj.__module__, obj.__code__, construction_key(obj.__defaults__, seen),
                construction_key(obj.__kwdefaults__, seen), cells)  # fmt: skip
    if inspect.isbuiltin(obj) or inspect.isclass(obj) or inspect.ismodule(obj):
        return ("named", getattr(obj, "__module__", None), getattr(obj, "__qualname__", repr(obj)))
    raise _Unkeyable


def stable_key(*parts: Any) -> Hashable | None:
    try:
        key = tuple(construction_key(p) for p in parts)
        hash(key)
    except (_Unkeyable, TypeError):
        return None
    return key

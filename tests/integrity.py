"""Helpers that prove nothing the user had was lost or changed.

``snapshot(obj)`` takes a deep, independent copy of a result object (frozen
dataclasses of NumPy arrays, pandas tables, dicts, lists); ``assert_same``
compares a later state with it bit for bit (NaN equals NaN in the same
place). ``folder_state`` records every file under a folder with its bytes
and modification time, so a failed call can be shown to have written,
renamed or deleted nothing.
"""

from __future__ import annotations

import copy
import dataclasses
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

__all__ = ["assert_same", "folder_state", "snapshot"]


def snapshot(obj: Any) -> Any:
    """A deep copy of ``obj`` that later changes to ``obj`` cannot reach."""
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        return (
            type(obj).__name__,
            {f.name: snapshot(getattr(obj, f.name)) for f in dataclasses.fields(obj)},
        )
    if isinstance(obj, np.ndarray) or type(obj).__module__.startswith("jax"):
        return np.array(obj, copy=True)
    if isinstance(obj, pd.DataFrame):
        return obj.copy(deep=True)
    if isinstance(obj, dict):
        return {k: snapshot(v) for k, v in obj.items()}
    if isinstance(obj, tuple) and hasattr(obj, "_fields"):  # a NamedTuple
        return type(obj)(*(snapshot(v) for v in obj))
    if isinstance(obj, (list, tuple)):
        return type(obj)(snapshot(v) for v in obj)
    return copy.deepcopy(obj)


def assert_same(now: Any, saved: Any, where: str = "value") -> None:
    """Assert that ``snapshot(now)`` equals ``saved`` exactly (NaN == NaN)."""
    _compare(snapshot(now), saved, where)


def _compare(a: Any, b: Any, where: str) -> None:
    assert type(a) is type(b), f"{where}: type {type(a).__name__} != {type(b).__name__}"
    if isinstance(a, np.ndarray):
        assert a.shape == b.shape and a.dtype == b.dtype, f"{where}: shape or dtype changed"
        if a.dtype == object:
            assert a.tolist() == b.tolist(), f"{where}: contents changed"
        else:
            assert np.array_equal(a, b, equal_nan=a.dtype.kind in "fc"), f"{where}: values changed"
    elif isinstance(a, pd.DataFrame):
        pd.testing.assert_frame_equal(a, b, check_exact=True, obj=where)
    elif isinstance(a, dict):
        assert a.keys() == b.keys(), f"{where}: keys changed"
        for key in a:
            _compare(a[key], b[key], f"{where}[{key!r}]")
    elif isinstance(a, (list, tuple)):
        assert len(a) == len(b), f"{where}: length changed"
        for i, (x, y) in enumerate(zip(a, b)):
            _compare(x, y, f"{where}[{i}]")
    elif isinstance(a, float) and a != a:
        assert b != b, f"{where}: NaN became {b!r}"
    else:
        assert a == b, f"{where}: {a!r} != {b!r}"


def folder_state(folder: Path) -> dict[str, tuple[bytes, int]]:
    """Every file under ``folder``: relative path -> (bytes, mtime in ns)."""
    return {
        str(p.relative_to(folder)): (p.read_bytes(), p.stat().st_mtime_ns)
        for p in sorted(folder.rglob("*"))
        if p.is_file()
    }

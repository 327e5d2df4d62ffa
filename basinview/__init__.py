"""basinview: see the loss surface of your own model in Jupyter.

The engine lives in :mod:`basinview.core` (JAX, NumPy, optax, pandas). The
figure layer (plotly) and the widget layer (ipywidgets) are imported lazily,
on first use of ``basinview.figures`` or ``basinview.Explorer``, so that
``import basinview`` stays light.
"""

from __future__ import annotations

import importlib
from typing import Any

from ._version import __version__
from .core import *  # noqa: F403
from .core import __all__ as _core_all

_LAZY_MODULES = ("figures", "explorer", "report", "scenarios")
_LAZY_ATTRS = {"Explorer": "explorer", "write_report": "report", "report_html": "report"}

__all__ = [*_core_all, *_LAZY_MODULES, *_LAZY_ATTRS, "__version__"]


def __getattr__(name: str) -> Any:
    if name in _LAZY_MODULES:
        return importlib.import_module(f".{name}", __name__)
    if name in _LAZY_ATTRS:
        module = importlib.import_module(f".{_LAZY_ATTRS[name]}", __name__)
        return getattr(module, name)
    raise AttributeError(f"module 'basinview' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))

"""What can go wrong with a user's loss, and the messages that say how to fix it.

Trace-time errors (Python control flow on traced values), errors the loss
raises while a compiled batch runs, and a signature that cannot take
``(params, *data)``: each becomes a :class:`~basinview.core.errors.LossError`
whose message quotes the user's own text and names the fix.
"""

from __future__ import annotations

import contextlib
import functools
import inspect
import re
from collections.abc import Callable, Iterator
from typing import Any

import jax

from .errors import LossError

__all__ = [
    "RAISED_HELP",
    "TRACE_ERRORS",
    "TRACE_HELP",
    "check_signature",
    "loss_name",
    "loss_runtime_errors",
]

TRACE_ERRORS = (
    jax.errors.ConcretizationTypeError,
    jax.errors.TracerBoolConversionError,
    jax.errors.TracerIntegerConversionError,
    jax.errors.TracerArrayConversionError,
)

TRACE_HELP = (
    "JAX evaluates the loss on abstract (traced) arrays, so the loss must not "
    "branch on parameter or data values with Python `if`/`while`, convert them "
    "with float()/int()/bool(), or call NumPy (np.*) on them. Use jnp.where, "
    "jax.lax.cond or jax.lax.fori_loop and jax.numpy instead."
)


def loss_name(loss: Callable[..., Any]) -> str:
    """Qualified name of a loss function, for records (``module.function``)."""
    target = loss
    while isinstance(target, functools.partial):
        target = target.func
    module = getattr(target, "__module__", None) or "?"
    qual = getattr(target, "__qualname__", None) or type(target).__qualname__
    return f"{module}.{qual}"


RAISED_HELP = "Call loss(params, *data) yourself on the same inputs to see the full traceback."

_ERROR_LINE = re.compile(r"^\s*([A-Za-z_][\w.]*(?:Error|Exception)): (.+)$")


def _runtime_reason(exc: BaseException) -> str:
    """The user's error message out of a JAX run-time error (last ``XxxError: msg`` line)."""
    lines = str(exc).splitlines()
    found = [m for m in map(_ERROR_LINE.match, lines) if m]
    if found:
        return f"{found[-1].group(1).lstrip('_')}: {found[-1].group(2)}"
    return lines[0] if lines else type(exc).__name__


@contextlib.contextmanager
def loss_runtime_errors(problem: Any, what: str) -> Iterator[None]:
    """Turn an error raised while a compiled loss runs into a :class:`LossError`.

    A loss may check its inputs at run time (``equinox.error_if``, a host
    callback that raises); JAX then stops the whole batch with a
    ``JaxRuntimeError`` whose message buries the user's own text.
    """
    try:
        yield
    except jax.errors.JaxRuntimeError as exc:
        raise LossError(
            f"the loss {problem.name} raised an error while computing {what}: "
            f"{_runtime_reason(exc)}. An error stops the whole batch; to let only the "
            "affected points stop, return NaN there instead, e.g. "
            "jnp.where(bad, jnp.nan, value), and basinview marks them (gaps in a "
            "surface, 'diverged' runs)."
        ) from exc


def check_signature(loss: Callable[..., Any], n_data: int) -> None:
    try:
        sig = inspect.signature(loss)
    except (TypeError, ValueError):
        return
    try:
        sig.bind(object(), *([object()] * n_data))
    except TypeError as exc:
        raise LossError(
            f"the loss must accept (params, *data) with {n_data} data argument(s); "
            f"{loss_name(loss)}{sig} cannot be called that way ({exc}). Pass the data "
            "in the order the loss expects, or wrap the loss, e.g. "
            "lambda params, x, y: my_loss(x, y, params)."
        ) from None

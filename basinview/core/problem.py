"""Problem: the user's loss, parameters and data behind a flat-vector API.

A :class:`Problem` wraps ``loss(params, *data) -> scalar`` where ``params``
is any JAX pytree. It validates everything once, at the edge, and then
offers jitted ``value``, ``grad``, ``value_and_grad`` and ``hvp`` on flat
parameter vectors, plus the mapping back to the user's structure and a
readable label for every coordinate.
"""

from __future__ import annotations

import hashlib
import warnings
from collections.abc import Callable, Hashable
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from .errors import LossError, ParameterError
from .lint import lint_ignored, lint_loss
from .loss_checks import (
    RAISED_HELP,
    TRACE_ERRORS,
    TRACE_HELP,
    check_signature,
    loss_name,
    loss_runtime_errors,
)
from .pytrees import Flattener, make_flattener
from .rows import REDUCTIONS, accumulate_rows, check_chunking, row_count

__all__ = [
    "REDUCTIONS",
    "Problem",
    "accumulate_rows",
    "loss_name",
    "loss_runtime_errors",
]

COMPILED_MEMO_SIZE = 32
"""Compiled functions a Problem keeps (least recently used ones are dropped)."""


def _as_data(data: tuple[Any, ...]) -> tuple[Any, ...]:
    def convert(leaf: Any) -> jax.Array:
        try:
            arr = jnp.asarray(leaf)
        except TypeError as exc:
            raise ParameterError(
                f"data must be arrays or pytrees of arrays; got a "
                f"{type(leaf).__name__} ({exc}). Pass constants to the loss with "
                "functools.partial(loss, constant=...) instead of as data."
            ) from None
        if arr.dtype == object:
            raise ParameterError("data arrays must be numeric, got dtype=object.")
        return arr

    return tuple(jax.tree_util.tree_map(convert, d) for d in data)


class Problem:
    """A loss, its parameters and its data, seen as a function of one flat vector.

    Args:
        loss: ``loss(params, *data) -> scalar``, written with ``jax.numpy``.
        params: the reference (e.g. initial) parameters, any pytree of floating
            arrays or Python floats. Defines the structure, the dtype and the
            default origin of planes.
        *data: arrays (or pytrees of arrays) passed to the loss after ``params``.
        name: a name for records; defaults to the loss's qualified name.
        data_chunk_rows: if given, the loss is evaluated on chunks of this
            many rows of the data at a time and the results are combined, so
            memory no longer grows with the number of rows (see
            :func:`accumulate_rows`). Needs ``reduction``.
        reduction: ``"mean"`` if the loss is a mean over the rows of the data
            (``jnp.mean`` of per-row terms), ``"sum"`` if it is a sum. With
            ``"mean"`` a term that does not depend on the data (a penalty on
            the weights) is also kept exact, since the chunk weights add up to
            one; with ``"sum"`` it would be counted once per chunk, so leave
            such terms out or use ``"mean"``. The contract is checked on the
            first rows of the data when the problem is built.
        lint: run the loss lint (:mod:`basinview.core.lint`) once now: True
            (default), False, or ``{"ignore": ["row-broadcast", ...]}`` to
            skip checks by name. Each finding is a
            :class:`~basinview.core.errors.LossLintWarning` subclass.

    ``params`` may also be an equinox module (its floating arrays are
    explored, the rest is held fixed) or a flax.nnx module (its
    ``nnx.Param`` variables); the loss is always called with a whole model
    (see :mod:`basinview.core.models`). Parameters are float32 or float64;
    half precision is refused with an error that says how to convert.

    The problem is immutable. Compiled functions are built once per problem
    and per static configuration and reused; changing only values (parameters,
    learning rates, starts) never recompiles.

    Examples:
        >>> import jax.numpy as jnp
        >>> def mse(p, x, y):
        ...     return jnp.mean((p["w"] * x + p["b"] - y) ** 2)
        >>> x = jnp.linspace(0, 1, 5); y = 2 * x + 1
        >>> prob = Problem(mse, {"w": 0.0, "b": 0.0}, x, y)
        >>> prob.labels
        ('b', 'w')
        >>> float(prob.value(prob.theta0))
        4.5
    """

    def __init__(
        self,
        loss: Callable[..., Any],
        params: Any,
        *data: Any,
        name: str | None = None,
        data_chunk_rows: int | None = None,
        reduction: str | None = None,
        lint: Any = True,
    ) -> None:
        if not callable(loss):
            raise LossError(
                f"loss must be a function loss(params, *data) -> scalar; got a "
                f"{type(loss).__name__}."
            )
        check_signature(loss, len(data))
        ignore = lint_ignored(lint)
        flattener, theta0 = make_flattener(params)
        self._loss = loss
        self._params = params
        self._flat = flattener
        self._data = _as_data(data)
        self._chunk_rows, self._reduction = check_chunking(self._data, data_chunk_rows, reduction)
        self._name = name or loss_name(loss)
        self._compiled: dict[Hashable, Callable[..., Any]] = {}
        self._cache: dict[Hashable, Any] = {}
        self._fingerprint: str | None = None
        self._theta0 = theta0
        theta0.setflags(write=False)
        self._check_loss()
        if ignore is not None:
            for finding in lint_loss(loss, flattener, self._data, name=self._name, ignore=ignore):
                warnings.warn(finding, stacklevel=2)

    # ------------------------------------------------------------------ basics
    @property
    def loss(self) -> Callable[..., Any]:
        """The user's loss function."""
        return self._loss

    @property
    def params(self) -> Any:
        """The reference parameters, as the user gave them."""
        return self._params

    @property
    def data(self) -> tuple[Any, ...]:
        """The data passed to the loss after the parameters (as JAX arrays)."""
        return self._data

    @property
    def name(self) -> str:
        return self._name

    @property
    def theta0(self) -> np.ndarray:
        """The reference parameters as a flat (read-only) vector."""
        return self._theta0

    @property
    def size(self) -> int:
        """Number of scalar parameters ``n``."""
        return self._flat.size

    @property
    def labels(self) -> tuple[str, ...]:
        """One readable label per flat coordinate, e.g. ``layer1.bias[3]``."""
        return self._flat.labels

    @property
    def kind(self) -> str:
        """Where the parameters come from: ``"pytree"``, ``"equinox"`` or ``"nnx"``."""
        return self._flat.kind

    @property
    def dtype(self) -> np.dtype:
        """Floating dtype of the flat parameter vector (float32 or float64)."""
        return self._flat.dtype

    @property
    def flattener(self) -> Flattener:
        return self._flat

    @property
    def data_chunk_rows(self) -> int | None:
        """Rows per chunk when the loss is accumulated over chunks of the data, else None."""
        return self._chunk_rows

    @property
    def reduction(self) -> str | None:
        """``"mean"`` or ``"sum"`` with :attr:`data_chunk_rows`, else None."""
        return self._reduction

    def __repr__(self) -> str:
        return f"Problem({self._name}, n={self.size}, dtype={self.dtype})"

    # ------------------------------------------------------------ structure
    def flatten(self, params: Any, *, what: str = "parameters") -> np.ndarray:
        """Flat vector of a pytree shaped like :attr:`params` (or a flat vector)."""
        return self._flat.flatten(params, what=what)

    def unflatten(self, theta: Any) -> Any:
        """The user's pytree for a flat vector ``theta``."""
        theta = jnp.asarray(theta, dtype=self.dtype)
        if theta.shape != (self.size,):
            raise ParameterError(
                f"a flat parameter vector must have shape ({self.size},), got {theta.shape}."
            )
        return self._flat.unravel(theta)

    def index(self, label: str) -> int:
        """Flat index of the coordinate called ``label``."""
        return self._flat.index(label)

    # ------------------------------------------------------------ functions
    def flat_loss(self, theta: jax.Array, data: tuple[Any, ...]) -> jax.Array:
        """Pure loss of a flat vector; ``data`` is passed explicitly (traceable).

        With :attr:`data_chunk_rows` the loss is accumulated over chunks of
        the rows of ``data`` (see :func:`accumulate_rows`).
        """
        params = self._flat.unravel(theta)
        if self._chunk_rows is None:
            return self._loss(params, *data)
        assert self._reduction is not None
        return accumulate_rows(self._loss, params, data, self._chunk_rows, self._reduction)

    def compiled(
        self, key: Hashable, build: Callable[[], Callable[..., Any]]
    ) -> Callable[..., Any]:
        """The compiled function for ``key``, built once by ``build()`` and reused.

        The memo keeps the ``COMPILED_MEMO_SIZE`` most recently used functions
        (least recently used ones are dropped and rebuilt when needed again).
        """
        fn = self._compiled.pop(key, None)
        if fn is None:
            fn = build()
        self._compiled[key] = fn  # (re)inserted last: most recently used
        while len(self._compiled) > COMPILED_MEMO_SIZE:
            del self._compiled[next(iter(self._compiled))]
        return fn

    def cached(self, key: Hashable, build: Callable[[], Any]) -> Any:
        """A value derived from this problem (a tuned size, a copy of the data on
        some devices), computed once by ``build()`` and kept with the problem."""
        if key not in self._cache:
            self._cache[key] = build()
        return self._cache[key]

    def check_differentiable(self) -> None:
        """Raise :class:`LossError` unless JAX can differentiate the loss.

        Traces the gradient once (no compilation) and remembers the answer.
        A loss can be evaluated but not differentiated when it calls NumPy
        through ``jax.pure_callback`` or another primitive without a
        derivative rule; surfaces still work, descent and curvature do not.
        """

        def check() -> str:
            try:
                jax.eval_shape(jax.grad(self.flat_loss), jnp.asarray(self._theta0), self._data)
            except Exception as exc:  # any failure to trace the derivative
                first = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
                return (
                    f"JAX cannot differentiate the loss {self._name}: {first}. Write the "
                    "loss with jax.numpy operations, or give the non-JAX part a derivative "
                    "rule with jax.custom_jvp (or jax.custom_vjp). Surfaces still work; "
                    "descent and curvature need gradients."
                )
            return ""

        message = self.cached(("differentiable",), check)
        if message:
            raise LossError(message)

    def _differentiable(self, fn: Callable[..., Any]) -> Callable[..., Any]:
        """``jax.jit(fn)`` after checking that the loss has a gradient (built once)."""
        self.check_differentiable()
        return jax.jit(fn)

    def _vec(self, theta: Any) -> jax.Array:
        theta = jnp.asarray(theta, dtype=self.dtype)
        if theta.shape != (self.size,):
            raise ParameterError(
                f"expected a flat parameter vector of shape ({self.size},), got "
                f"{theta.shape}; use problem.flatten(params) to convert a pytree."
            )
        return theta

    def value(self, theta: Any) -> jax.Array:
        """Loss at the flat vector ``theta``."""
        fn = self.compiled("value", lambda: jax.jit(self.flat_loss))
        return fn(self._vec(theta), self._data)

    def grad(self, theta: Any) -> jax.Array:
        """Gradient of the loss at ``theta`` (flat)."""
        fn = self.compiled("grad", lambda: self._differentiable(jax.grad(self.flat_loss)))
        return fn(self._vec(theta), self._data)

    def value_and_grad(self, theta: Any) -> tuple[jax.Array, jax.Array]:
        """Loss and gradient at ``theta`` in one pass."""
        fn = self.compiled(
            "value_and_grad", lambda: self._differentiable(jax.value_and_grad(self.flat_loss))
        )
        return fn(self._vec(theta), self._data)

    def hvp(self, theta: Any, v: Any) -> jax.Array:
        """Hessian-vector product ``H(theta) v`` without forming ``H``.

        Forward-over-reverse differentiation: ``d/dr grad f(theta + r v)`` at
        ``r = 0``, exact to rounding and as cheap as a few gradients.

        References:
            Pearlmutter, B. A. (1994). Fast exact multiplication by the Hessian.
            Neural Computation 6(1):147-160.
        """

        def build() -> Callable[..., Any]:
            grad = jax.grad(self.flat_loss)

            def hvp(theta: jax.Array, v: jax.Array, data: tuple[Any, ...]) -> jax.Array:
                return jax.jvp(lambda t: grad(t, data), (theta,), (v,))[1]

            return self._differentiable(hvp)

        return self.compiled("hvp", build)(self._vec(theta), self._vec(v), self._data)

    # ------------------------------------------------------------ identity
    @property
    def fingerprint(self) -> str:
        """SHA-256 (hex, 16 chars) of the parameter structure, initial values and data."""
        if self._fingerprint is None:
            h = hashlib.sha256()
            h.update(str(self._flat.treedef).encode())
            h.update("|".join(self.labels).encode())
            h.update(np.ascontiguousarray(self._theta0).tobytes())
            for leaf in jax.tree_util.tree_leaves(self._data):
                arr = np.asarray(leaf)
                h.update(f"{arr.dtype}{arr.shape}".encode())
                h.update(np.ascontiguousarray(arr).tobytes())
            self._fingerprint = h.hexdigest()[:16]
        return self._fingerprint

    # ------------------------------------------------------------ validation
    def _check_loss(self) -> None:
        theta = jnp.asarray(self._theta0)
        try:
            out = jax.eval_shape(self.flat_loss, theta, self._data)
        except TRACE_ERRORS as exc:
            raise LossError(
                f"the loss {self._name} cannot be traced by JAX: "
                f"{type(exc).__name__}. {TRACE_HELP}\nOriginal error: "
                f"{str(exc).splitlines()[0]}"
            ) from exc
        except TypeError as exc:
            text = str(exc)
            if any(k in text for k in ("shape", "broadcast", "dot_general", "incompatible")):
                raise LossError(
                    f"the data do not fit the loss {self._name}: {text.splitlines()[0]}. "
                    f"Check the shapes of the data {self._data_shapes()} and of the "
                    "parameters against what the loss expects (e.g. X @ w needs "
                    "X.shape[1] == w.shape[0])."
                ) from exc
            raise LossError(
                f"the loss {self._name} raised TypeError on the given parameters and data: "
                f"{text.splitlines()[0] if text else exc!r}. {RAISED_HELP}"
            ) from exc
        except Exception as exc:
            raise LossError(
                f"the loss {self._name} raised {type(exc).__name__} on the given "
                f"parameters and data: {str(exc).splitlines()[0] if str(exc) else exc!r}. "
                + RAISED_HELP
            ) from exc
        if not hasattr(out, "shape") or out.shape != ():
            shape = getattr(out, "shape", type(out).__name__)
            raise LossError(
                f"the loss must return a scalar, but {self._name} returned shape {shape}. "
                "Reduce it, e.g. return jnp.mean(residuals ** 2) or .sum()."
            )
        if not jnp.issubdtype(out.dtype, jnp.floating):
            raise LossError(
                f"the loss must return a real floating-point scalar; {self._name} "
                f"returned dtype {out.dtype}. Convert the result, e.g. "
                "return jnp.asarray(value, dtype=float), and avoid rounding or casting "
                "to integers inside the loss (it has no useful gradient)."
            )
        if self._chunk_rows is not None:
            self._check_row_contract(out.dtype)
        value = float(self.value(self._theta0))
        if not np.isfinite(value):
            raise LossError(
                f"the loss is {value} at the initial parameters. Check the data for "
                "NaN/inf and the loss for log(0), division by zero or overflow; or "
                "start from other parameters."
            )

    def _check_row_contract(self, dtype: Any) -> None:
        """The chunked loss equals the whole loss on the first few rows."""
        rows = min(row_count(self._data), 7)
        if rows < 2:
            return
        sub = jax.tree_util.tree_map(lambda a: a[:rows], self._data)
        params = self._flat.unravel(jnp.asarray(self._theta0))
        whole = float(self._loss(params, *sub))
        assert self._reduction is not None
        parts = float(accumulate_rows(self._loss, params, sub, 3, self._reduction))
        tol = 1e-4 if np.dtype(dtype).itemsize <= 4 else 1e-9
        if np.isfinite(whole) and not abs(parts - whole) <= tol * max(abs(whole), 1.0):
            raise LossError(
                f"data_chunk_rows needs a loss that is a {self._reduction} over the rows of "
                f"the data, but {self._name} is not: on the first {rows} rows the loss is "
                f"{whole!r} while combining chunks of 3 rows gives {parts!r}. Use "
                f"reduction='{'sum' if self._reduction == 'mean' else 'mean'}' if the loss "
                "takes the other reduction, or build the problem without data_chunk_rows."
            )

    def _data_shapes(self) -> list[Any]:
        return [jax.tree_util.tree_map(lambda a: tuple(a.shape), d) for d in self._data]

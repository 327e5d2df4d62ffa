"""The validated settings of one :func:`~basinview.core.descend` call.

:func:`descent_config` checks every argument once, at the edge, before
anything is traced or compiled, and returns a frozen :class:`DescentConfig`.
The engine reads only the config; :meth:`DescentConfig.record` is the
JSON-ready dict that :class:`~basinview.core.Settings` stores.
Default tolerances are defined here, once (:func:`default_tolerances`).
"""

from __future__ import annotations

import itertools
import warnings
from collections.abc import Mapping
from dataclasses import dataclass, field, replace
from typing import Any

import jax
import numpy as np

from .checks import check_int
from .cost_model import DescentSizes
from .errors import ParameterError
from .optimizers import UpdateRule, check_hyper
from .sharpness import SharpnessTracking, sharpness_tracking

__all__ = ["MAX_STEPS", "DescentConfig", "default_tolerances", "descent_config"]

MAX_STEPS = 1_000_000
"""Largest step budget of one call."""
MAX_RUN_FLOOR = 4096


def default_tolerances(dtype: Any) -> dict[str, float]:
    """Default ``grad_tol`` and ``loss_tol`` for a float dtype.

    A run converges when the gradient norm is at most ``grad_tol`` and the
    last loss change is at most ``loss_tol * max(1, |loss|)``.
    """
    if np.dtype(dtype) == np.float64:
        return {"grad_tol": 1e-6, "loss_tol": 1e-12}
    return {"grad_tol": 1e-4, "loss_tol": 1e-6}  # common practice: ~ sqrt of float32 eps


@dataclass(frozen=True)
class DescentConfig:
    """Everything one descent call was asked to do, validated.

    Attributes:
        optimizer: name of the update rule.
        hyper: every hyper-parameter of the rule (``learning_rate`` first, in
            the rule's order) with its values in the order given.
        steps: step budget per run.
        grad_tol, loss_tol: convergence tolerances.
        divergence_factor: a run diverges when its loss rises more than this
            times ``max(1, |loss at start|)`` above its start.
        batch_size: minibatch rows per step, or None for full gradients.
        seed: seed of the minibatch sampler.
        min_runs: smallest compiled run count (padding floor).
        tune: time a few vectorisation sizes instead of using the cost model.
        sizes: the program sizes the call ran with (None until it ran, or the
            recorded sizes to reuse).
        sharpness: how sharpness is tracked along the runs (None: not tracked).
        compact: run the budget in segments and gather the live runs into
            smaller calls between them (None: where the cost model says it
            pays; see :mod:`basinview.core.compaction`). Results do not
            depend on it, so it is not part of :meth:`record`.
    """

    optimizer: str
    hyper: Mapping[str, tuple[float, ...]]
    steps: int
    grad_tol: float
    loss_tol: float
    divergence_factor: float
    batch_size: int | None
    seed: int
    min_runs: int = 1
    tune: bool = False
    sizes: DescentSizes | None = field(default=None)
    sharpness: SharpnessTracking | None = None
    compact: bool | None = None

    @property
    def learning_rate(self) -> tuple[float, ...]:
        return self.hyper["learning_rate"]

    def settings(self) -> list[dict[str, float]]:
        """Every hyper-parameter setting: the Cartesian product of the values."""
        names = list(self.hyper)
        return [dict(zip(names, c)) for c in itertools.product(*self.hyper.values())]

    def with_sizes(self, sizes: DescentSizes) -> DescentConfig:
        return replace(self, sizes=sizes)

    def get(self, key: str, default: Any = None) -> Any:
        """``record().get(key, default)``: read the record like the dict it replaces."""
        return self.record().get(key, default)

    def __getitem__(self, key: str) -> Any:
        return self.record()[key]

    def record(self) -> dict[str, Any]:
        """The JSON-ready record of the call that Settings store (sorted distinct values)."""
        out = {
            "optimizer": self.optimizer,
            "learning_rate": sorted(set(self.learning_rate)),
            "hyper": {k: sorted(set(v)) for k, v in self.hyper.items() if k != "learning_rate"},
            "steps": self.steps,
            "grad_tol": self.grad_tol,
            "loss_tol": self.loss_tol,
            "divergence_factor": self.divergence_factor,
            "batch_size": self.batch_size,
            "seed": self.seed,
        }
        if self.sharpness is not None:
            out["sharpness"] = self.sharpness.record()
        return out


def _positive_int(name: str, value: Any, low: int, high: int, hint: str) -> int:
    return check_int(value, name, low, high, hint)


def _check_steps(steps: Any) -> int:
    if isinstance(steps, bool) or not isinstance(steps, (int, np.integer)):
        raise ParameterError(f"steps must be a positive integer; got {steps!r}.")
    if not 1 <= steps <= MAX_STEPS:
        raise ParameterError(f"steps must be between 1 and {MAX_STEPS}; got {steps}.")
    return int(steps)


def _batch_rows(data: Any, batch_size: Any) -> int | None:
    if batch_size is None:
        return None
    leaves = jax.tree_util.tree_leaves(data)
    if not leaves:
        raise ParameterError(
            "minibatches need data: this problem has none. Pass the data to "
            "Problem(loss, params, *data), or leave batch_size=None for full gradients."
        )
    rows = {int(leaf.shape[0]) if leaf.ndim else -1 for leaf in leaves}
    if len(rows) != 1 or -1 in rows:
        raise ParameterError(
            "minibatches need every data array to have the same number of rows (first "
            f"axis); got leading sizes {sorted(rows)}."
        )
    n_rows = rows.pop()
    return _positive_int("batch_size", batch_size, 1, n_rows, f"({n_rows} is the rows of data.)")


def _hyper_values(
    rule: UpdateRule, learning_rate: Any, hyper: Mapping[str, Any] | None
) -> dict[str, tuple[float, ...]]:
    given = dict(hyper or {})
    if "learning_rate" in given:
        raise ParameterError("give the learning rate as learning_rate=..., not inside hyper.")
    given["learning_rate"] = learning_rate
    values = check_hyper(rule, given)
    out = {}
    for name in rule.hyper:
        distinct = tuple(dict.fromkeys(values[name]))
        if len(distinct) < len(values[name]):
            repeated = sorted({v for v in values[name] if values[name].count(v) > 1})
            warnings.warn(
                f"{name} repeats the values {repeated}: every repeat runs the same runs again "
                "(kept, so run numbers follow the values as given). Pass distinct values, "
                "e.g. sorted(set(values)), to avoid the repeated work.",
                UserWarning,
                stacklevel=4,
            )
        out[name] = tuple(values[name])
    return out


def descent_config(
    rule: UpdateRule,
    data: Any,
    dtype: Any,
    *,
    learning_rate: Any,
    hyper: Mapping[str, Any] | None,
    steps: Any,
    grad_tol: Any,
    loss_tol: Any,
    divergence_factor: Any,
    batch_size: Any,
    seed: Any,
    min_runs: Any,
    tune: Any = False,
    sizes: Any = None,
    sharpness_every: Any = 0,
    sharpness_iterations: Any = 2,
    compact: Any = None,
) -> DescentConfig:
    """Validate the arguments of :func:`~basinview.core.descend` into a :class:`DescentConfig`.

    Duplicate values of a hyper-parameter are kept (run numbers follow the
    values as given) with a warning that they repeat work.
    """
    values = _hyper_values(rule, learning_rate, hyper)
    steps = _check_steps(steps)
    batch = _batch_rows(data, batch_size)
    tol = default_tolerances(dtype)
    grad_tol = tol["grad_tol"] if grad_tol is None else grad_tol
    loss_tol = tol["loss_tol"] if loss_tol is None else loss_tol
    for tname, tval in (("grad_tol", grad_tol), ("loss_tol", loss_tol)):
        if not (np.isfinite(tval) and tval >= 0):
            raise ParameterError(f"{tname} must be a non-negative number; got {tval!r}.")
    if not (np.isfinite(divergence_factor) and divergence_factor > 0):
        raise ParameterError(f"divergence_factor must be positive; got {divergence_factor!r}.")
    min_runs = _positive_int(
        "min_runs",
        min_runs,
        1,
        MAX_RUN_FLOOR,
        "Leave it at 1 unless you want fewer compiled shapes as the number of runs changes.",
    )
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or not (0 <= seed < 2**32):
        raise ParameterError(
            f"seed must be an integer from 0 to 2**32 - 1; got {seed!r}. Take it modulo "
            "2**32 if it comes from elsewhere."
        )
    if not isinstance(tune, (bool, np.bool_)):
        raise ParameterError(f"tune must be True or False; got {tune!r}.")
    if compact is not None and not isinstance(compact, (bool, np.bool_)):
        raise ParameterError(
            f"compact must be True, False or None (decide by the cost model); got {compact!r}."
        )
    return DescentConfig(
        optimizer=rule.name,
        hyper=values,
        steps=steps,
        grad_tol=float(grad_tol),
        loss_tol=float(loss_tol),
        divergence_factor=float(divergence_factor),
        batch_size=batch,
        seed=int(seed),
        min_runs=min_runs,
        tune=bool(tune),
        sizes=DescentSizes.from_record(sizes) if sizes is not None else None,
        sharpness=sharpness_tracking(sharpness_every, sharpness_iterations, steps=steps),
        compact=None if compact is None else bool(compact),
    )

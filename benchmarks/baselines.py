"""The code a data scientist would otherwise write, for side-by-side timing.

Baseline (a): the usual notebook code. Python loops over grid points, or
over starts, learning rates and steps, calling a jitted JAX loss (or a
jitted ``jax.value_and_grad``) once per point or step. The parameters are
formed on the host with NumPy (cheaper than one JAX operation per
parameter) and the data live on the device once, so the baseline pays
only what the loop itself costs: one dispatch and one read-back per call.

Baseline (b): the same loops in plain NumPy with hand-derived gradients.

Both record what basinview records for a sweep: the loss at every iterate
and the 2-D projection of every iterate on the plane, and both freeze a run
that diverges with basinview's rule (non-finite, or risen by more than
``divergence_factor * max(1, |loss at start|)``).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any

import numpy as np

__all__ = ["Sweep", "descent_loop", "surface_loop"]


def surface_loop(
    loss_at: Callable[[Any], float],
    params_at: Callable[[float, float], Any],
    a: np.ndarray,
    b: np.ndarray,
) -> np.ndarray:
    """``loss[j, i] = loss_at(params_at(a[i], b[j]))``, one call per grid point."""
    out = np.empty((len(b), len(a)))
    for j, bj in enumerate(b):
        for i, ai in enumerate(a):
            out[j, i] = loss_at(params_at(float(ai), float(bj)))
    return out


class Sweep:
    """Results of a looped sweep: per run, the loss and plane coordinates per iterate."""

    def __init__(self, n_runs: int, steps: int) -> None:
        self.losses = np.full((n_runs, steps + 1), np.nan)
        self.path = np.full((n_runs, steps + 1, 2), np.nan)
        self.final: list[np.ndarray] = []
        self.stop_step = np.zeros(n_runs, dtype=int)


def descent_loop(
    value_and_grad: Callable[[Any], tuple[float, Any]],
    update: Callable[[Any, Any, float], Any],
    flat: Callable[[Any], np.ndarray],
    starts: Sequence[Any],
    learning_rates: Sequence[float],
    steps: int,
    origin: np.ndarray,
    projector: np.ndarray,
    divergence_factor: float = 1e6,
) -> Sweep:
    """Gradient descent from every start at every learning rate, one step at a time.

    Runs are ordered like basinview's: all starts for the first learning
    rate, then all starts for the next one.

    Args:
        value_and_grad: ``params -> (loss, gradient)`` (loss as a Python float).
        update: ``(params, gradient, learning_rate) -> params``.
        flat: ``params -> flat vector`` in basinview's coordinate order.
        starts: starting parameters.
        learning_rates: step sizes.
        steps: steps per run.
        origin, projector: the plane, as in :attr:`basinview.core.Plane.projector`.
        divergence_factor: basinview's divergence rule.
    """
    sweep = Sweep(len(starts) * len(learning_rates), steps)
    run = 0
    for lr in learning_rates:
        for start in starts:
            params = start
            f, g = value_and_grad(params)
            f0 = f
            threshold = divergence_factor * max(abs(f0), 1.0)
            sweep.losses[run, 0] = f
            sweep.path[run, 0] = projector @ (flat(params) - origin)
            k = 0
            while k < steps and np.isfinite(f) and f - f0 <= threshold:
                params = update(params, g, lr)
                f, g = value_and_grad(params)
                k += 1
                sweep.losses[run, k] = f
                sweep.path[run, k] = projector @ (flat(params) - origin)
            sweep.stop_step[run] = k
            sweep.final.append(flat(params))
            run += 1
    return sweep

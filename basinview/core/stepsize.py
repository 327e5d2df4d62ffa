"""Step-size analysis: sweep learning rates, compare with the curvature bound.

A sweep runs one update rule from the same starts at many learning rates
(one compiled call) and summarises each rate: how many runs converged,
diverged or ran out of steps, whether they zig-zagged, the median final loss
and steps to tolerance, and a regime:

* ``crawl``: most runs still moving without zig-zag when the budget ends;
* ``converge``: most runs converged without persistent zig-zag;
* ``oscillate``: most runs zig-zag (converging or not) but do not diverge;
* ``diverge``: most runs diverged.

Next to it stand the bound predicted from the Hessian at a point
(:func:`basinview.core.curvature.stability_bound`) and the largest rate at
which no run diverged in the sweep. On a quadratic the two agree; on other
losses the prediction is local: exceeding it at a minimum means the minimum
is not a stable fixed point, not that runs must blow up.

Adam and RMSProp have no fixed bound: they divide the step by a diagonal
``P`` that the run itself adapts. For them each rate's row carries the
preconditioned sharpness ``lambda_max(P^-1 H)`` at the end of that rate's
best run, with ``P`` from the run's final state, and the column
``stability_ratio`` = ``lr * lambda_max(P^-1 H) / threshold``
(:func:`basinview.core.curvature.adaptive_threshold`): below 1 the final
state is locally stable, near 1 the run sits at the edge of stability. For
the fixed-step rules ``stability_ratio`` is ``lr / predicted_bound``.
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from .curvature import (
    Spectrum,
    adaptive_threshold,
    hessian_spectrum,
    preconditioned_sharpness,
    stability_bound,
)
from .descent import Runs, descend
from .errors import ParameterError
from .optimizers import get_rule
from .problem import Problem

__all__ = ["REGIMES", "StepSizeSweep", "regime_of", "step_size_sweep"]

REGIMES = ("crawl", "converge", "oscillate", "diverge")


@dataclass(frozen=True, eq=False)
class StepSizeSweep:
    """Per-learning-rate summary of a sweep, with predicted and observed bounds.

    Attributes:
        learning_rates: the swept rates, ascending.
        table: one row per rate (see module docstring for ``regime``).
        predicted_bound: largest stable rate predicted from the Hessian at the
            curvature point (None if the rule has no such bound).
        observed_bound: largest swept rate at which no run diverged (None if
            every rate had a diverging run).
        lambda_max: top Hessian eigenvalue at the curvature point.
        spectrum: the Hessian spectrum at that point.
        point: the flat point where the curvature was measured.
        runs: all runs of the sweep.
        optimizer: rule name.
        sharpness_threshold: for adaptive rules, the threshold of ``lr *
            lambda_max(P^-1 H)`` (see module docstring); None otherwise.
    """

    learning_rates: np.ndarray
    table: pd.DataFrame
    predicted_bound: float | None
    observed_bound: float | None
    lambda_max: float
    spectrum: Spectrum
    point: np.ndarray
    runs: Runs
    optimizer: str
    sharpness_threshold: float | None = None

    def to_frame(self) -> pd.DataFrame:
        return self.table


def regime_of(statuses: Sequence[str], oscillating: Sequence[bool]) -> str:
    """The majority regime of a group of runs (see module docstring)."""
    status = np.asarray(statuses)
    osc = np.asarray(oscillating, dtype=bool)
    n = max(len(status), 1)
    if (status == "diverged").sum() * 2 > n:
        return "diverge"
    if (osc & (status != "diverged")).sum() * 2 > n:
        return "oscillate"
    if (status == "converged").sum() * 2 > n:
        return "converge"
    if (status == "max_steps").sum() * 2 > n:
        return "crawl"
    # no majority: report the most severe behaviour present
    if (status == "diverged").any():
        return "diverge"
    return "oscillate" if osc.any() else "crawl"


def step_size_sweep(
    problem: Problem,
    starts: Any,
    *,
    learning_rates: Sequence[float],
    optimizer: Any = "gradient_descent",
    hyper: Mapping[str, float] | None = None,
    steps: int = 500,
    at: Any = None,
    grad_tol: float | None = None,
    loss_tol: float | None = None,
) -> StepSizeSweep:
    """Run ``optimizer`` at each learning rate from the same starts and summarise.

    Args:
        problem: the problem.
        starts: starting points (see :func:`descend`).
        learning_rates: rates to try (at least one; any order; a rate given
            twice is swept once, with a warning).
        optimizer: update rule; its other hyper-parameters are fixed by ``hyper``.
        hyper: one value per other hyper-parameter (e.g. ``{"momentum": 0.9}``).
        steps: step budget per run.
        at: point where the curvature bound is computed; default: the end
            point of the lowest-loss converged run (a minimum found by the
            sweep), else the problem's parameters.
        grad_tol, loss_tol: convergence tolerances.

    References:
        Polyak (1964) and Nesterov (1983) for the momentum bounds; Cohen, J. et
        al. (2021). Gradient descent on neural networks typically occurs at the
        edge of stability. ICLR. arXiv:2103.00065 (why full-batch training of
        networks hovers near ``2 / lr``).
    """
    if np.ndim(learning_rates) > 1:
        raise ParameterError(
            f"learning_rates must be a 1-D list of rates; got an array of shape "
            f"{np.shape(learning_rates)}. Give the rates as a flat list, e.g. "
            "learning_rates=numpy.ravel(rates)."
        )
    given = [float(r) for r in np.ravel(learning_rates)]
    rates = np.asarray(sorted(set(given)), dtype=np.float64)
    if rates.size < len(given):
        warnings.warn(
            f"learning_rates lists {len(given) - rates.size} rate(s) more than once; each rate "
            "is swept once (its row summarises all its runs). Pass distinct rates to silence this.",
            UserWarning,
            stacklevel=2,
        )
    if rates.size == 0:
        raise ParameterError(
            "learning_rates needs at least one value; give a list of positive rates, e.g. "
            "learning_rates=numpy.geomspace(1e-3, 1.0, 13)."
        )
    if any(np.ndim(v) != 0 for v in (hyper or {}).values()):
        raise ParameterError(
            "a step-size sweep fixes one value per other hyper-parameter; sweep them separately."
        )
    rule = get_rule(optimizer)
    runs = descend(
        problem,
        starts,
        optimizer=rule,
        learning_rate=list(rates),
        hyper=hyper,
        steps=steps,
        grad_tol=grad_tol,
        loss_tol=loss_tol,
    )
    table = runs.table
    rows = []
    for lr in rates:
        sub = table[np.isclose(table.learning_rate, lr, rtol=1e-12, atol=0)]
        rows.append(
            {
                "learning_rate": lr,
                "runs": len(sub),
                "converged": int((sub.status == "converged").sum()),
                "diverged": int((sub.status == "diverged").sum()),
                "max_steps": int((sub.status == "max_steps").sum()),
                "oscillating": int(sub.oscillating.sum()),
                "median_final_loss": float(np.nanmedian(sub.final_loss.to_numpy(dtype=float)))
                if (sub.status != "diverged").any()
                else np.nan,
                "median_steps_to_tol": float(
                    np.nanmedian(sub.steps_to_tol.to_numpy(dtype=float, na_value=np.nan))
                )
                if (sub.status == "converged").any()
                else np.nan,
                "regime": regime_of(sub.status.to_numpy(), sub.oscillating.to_numpy()),
                "preconditioned_sharpness": _final_sharpness(problem, runs, sub),
            }
        )
    summary = pd.DataFrame(rows)
    if at is None:
        conv = table[table.status == "converged"]
        point = runs.final[int(conv.final_loss.idxmin())] if len(conv) else problem.theta0
    else:
        point = problem.flatten(at, what="curvature point")
    spectrum = hessian_spectrum(problem, point, k=1)
    settings = {**rule.defaults, **{k: float(v) for k, v in (hyper or {}).items()}}
    predicted = stability_bound(rule.name, spectrum.lambda_max, settings)
    threshold = None
    if runs.preconditioner is not None:
        threshold = adaptive_threshold(rule.name, settings)
        sharp = summary.preconditioned_sharpness.to_numpy()
        summary["stability_ratio"] = rates * sharp / threshold if threshold is not None else np.nan
    else:
        summary["stability_ratio"] = rates / predicted if predicted is not None else np.nan
    stable = summary[summary.diverged == 0].learning_rate
    observed = float(stable.max()) if len(stable) else None
    return StepSizeSweep(
        learning_rates=rates,
        table=summary,
        predicted_bound=predicted,
        observed_bound=observed,
        lambda_max=spectrum.lambda_max,
        spectrum=spectrum,
        point=np.asarray(point),
        runs=runs,
        optimizer=rule.name,
        sharpness_threshold=threshold,
    )


def _final_sharpness(problem: Problem, runs: Runs, sub: pd.DataFrame) -> float:
    """``lambda_max(P^-1 H)`` at the end of the lowest-loss run of ``sub`` that did not
    diverge (NaN for rules without a preconditioner or when there is no such run)."""
    if runs.preconditioner is None:
        return np.nan
    kept = sub[sub.status != "diverged"]
    loss = kept.final_loss.to_numpy(dtype=float)
    if not np.isfinite(loss).any():
        return np.nan
    run = int(kept.index[int(np.nanargmin(loss))])
    precond = runs.preconditioner[run]
    if not (np.all(np.isfinite(precond)) and np.all(precond > 0)):
        return np.nan
    return preconditioned_sharpness(problem, runs.final[run], precond)

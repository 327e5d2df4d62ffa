"""Initialisation schemes side by side: where each scheme's runs end, how fast, how sharp.

Does the initialisation decide the answer? :func:`compare_schemes` runs
descent from several named start sets at once (see
:func:`~basinview.core.scheme_starts`: explicit lists, random draws, or the
user's own initialiser with a seed), with one update rule and one setting of
its hyper-parameters, and answers per scheme:

* the share of its runs that reached each solution, with a Wilson interval
  (a solution is a critical point's letter from
  :func:`~basinview.core.find_minima`, or any per-run label the caller
  gives, e.g. connectivity groups);
* the median final loss, and how many steps the runs took to reach a loss;
* the divergence rate (with its interval);
* the sharpness at the end: the largest Hessian eigenvalue at each end point
  (:func:`top_hessian_eigenvalues`, power iteration on Hessian-vector
  products, all end points in one compiled call).

The result, :class:`SchemeComparison`, holds per-run arrays and gives the
tables ``shares`` (scheme x solution), ``summary`` (one row per scheme) and
``per_run``. Shares are counts over the runs drawn, not probabilities of the
scheme: the intervals say how far they may be from the scheme's own share.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from .descent import Runs, descend
from .errors import ParameterError
from .intervals import wilson_interval
from .minima import OUTCOMES, Minima, find_minima
from .planes import Plane
from .power_iteration import top_hessian_eigenvalues
from .problem import Problem
from .starts import Starts, scheme_starts

__all__ = ["SchemeComparison", "compare_schemes"]


# ------------------------------------------------------------------ result
@dataclass(frozen=True, eq=False)
class SchemeComparison:
    """Where each initialisation scheme's runs ended, how fast and how sharp.

    Attributes:
        runs: the runs (``runs.scheme`` names each run's scheme).
        schemes: the scheme names, in the order given.
        solution: ``(R,)`` each run's solution: a critical point's letter,
            an outcome (``"diverged"``, ``"max_steps"``, ``"not stationary"``),
            or the caller's own label.
        solutions: the distinct solutions, in table order.
        minima: the critical points found, when solutions came from
            :func:`~basinview.core.find_minima` (else None).
        sharpness: ``(R,)`` largest Hessian eigenvalue at each end point
            (NaN for diverged runs; None when not asked for).
        loss_below: the loss that ``steps_to_loss`` counts steps to.
        confidence: coverage of the intervals (e.g. 0.95).
    """

    runs: Runs
    schemes: tuple[str, ...]
    solution: np.ndarray
    solutions: tuple[str, ...]
    minima: Minima | None
    sharpness: np.ndarray | None
    loss_below: float
    confidence: float

    @property
    def scheme(self) -> np.ndarray:
        """``(R,)`` each run's scheme name."""
        assert self.runs.scheme is not None
        return self.runs.scheme

    @property
    def steps_to_loss(self) -> pd.array:
        """Steps each run took to reach :attr:`loss_below` (``<NA>``: never)."""
        if np.isnan(self.loss_below):  # no run left a finite loss to aim at
            return pd.array([pd.NA] * len(self.runs), dtype="Int64")
        return self.runs.steps_to_loss(self.loss_below)

    @property
    def shares(self) -> pd.DataFrame:
        """One row per scheme and solution: runs, share and its interval (zeros included)."""
        rows = []
        for s in self.schemes:
            mine = self.scheme == s
            n = int(mine.sum())
            for sol in self.solutions:
                rows.append(
                    {
                        "scheme": s,
                        "solution": sol,
                        "runs": int(np.sum(mine & (self.solution == sol))),
                        "of": n,
                    }
                )
        frame = pd.DataFrame(rows, columns=["scheme", "solution", "runs", "of"])
        frame["share"] = frame["runs"] / frame["of"].clip(lower=1)
        low, high = wilson_interval(frame["runs"], frame["of"], confidence=self.confidence)
        frame["share_low"], frame["share_high"] = low, high
        return frame

    @property
    def summary(self) -> pd.DataFrame:
        """One row per scheme: runs, most common solution, losses, speed, divergence, sharpness.

        Medians of the final loss and the sharpness are over runs that did
        not diverge; the median of ``steps_to_loss`` is over runs that reached
        :attr:`loss_below` (``reached`` counts them).
        """
        steps = self.steps_to_loss
        final = np.asarray(self.runs.final_loss, dtype=np.float64)
        diverged = np.asarray(self.runs.status) == "diverged"
        rows = []
        for s in self.schemes:
            mine = self.scheme == s
            n = int(mine.sum())
            labels, counts = np.unique(self.solution[mine].astype(str), return_counts=True)
            top = int(np.argmax(counts))
            ok = mine & ~diverged
            hit = mine & ~np.asarray(pd.isna(steps))
            row = {
                "scheme": s,
                "runs": n,
                "solutions": int(labels.size),
                "top_solution": str(labels[top]),
                "top_share": counts[top] / n,
                "median_final_loss": _median(final[ok]),
                "reached": int(hit.sum()),
                "median_steps_to_loss": _median(np.asarray(steps[hit], dtype=np.float64)),
                "diverged": int(np.sum(mine & diverged)),
            }
            if self.sharpness is not None:
                row["median_sharpness"] = _median(self.sharpness[ok])
            rows.append(row)
        frame = pd.DataFrame(rows)
        frame["divergence_rate"] = frame["diverged"] / frame["runs"]
        low, high = wilson_interval(frame["diverged"], frame["runs"], confidence=self.confidence)
        frame["divergence_low"], frame["divergence_high"] = low, high
        return frame

    @property
    def per_run(self) -> pd.DataFrame:
        """The runs' table with each run's solution, steps to :attr:`loss_below` and sharpness."""
        frame = self.runs.table
        frame.insert(frame.columns.get_loc("steps_to_tol") + 1, "steps_to_loss", self.steps_to_loss)
        at = frame.columns.get_loc("status")
        frame.insert(at, "solution", pd.Series(self.solution, dtype=object))
        if self.sharpness is not None:
            frame["sharpness"] = self.sharpness
        return frame

    @property
    def table(self) -> pd.DataFrame:
        """:attr:`summary`."""
        return self.summary

    def to_frame(self) -> pd.DataFrame:
        return self.summary


def _median(values: np.ndarray) -> float:
    values = values[np.isfinite(values)]
    return float(np.median(values)) if values.size else float("nan")


# ------------------------------------------------------------------ comparison
def compare_schemes(
    problem: Problem,
    schemes: Mapping[str, Any] | Starts | Runs,
    *,
    solutions: Any = None,
    loss_below: float | None = None,
    sharpness: bool = True,
    sharpness_iterations: int = 60,
    confidence: float = 0.95,
    include_unconverged: bool = False,
    count: int | None = None,
    init_seed: int = 0,
    optimizer: Any = "gradient_descent",
    learning_rate: float = 0.01,
    hyper: Mapping[str, Any] | None = None,
    steps: int = 500,
    plane: Plane | None = None,
    grad_tol: float | None = None,
    loss_tol: float | None = None,
    divergence_factor: float = 1e6,
    batch_size: int | None = None,
    min_runs: int = 1,
    progress: bool | None = None,
) -> SchemeComparison:
    """Run several initialisation schemes with one update rule and compare where they end.

    Args:
        problem: the problem.
        schemes: named start sets ``{"name": starts}`` (each a
            :class:`~basinview.core.Starts`, a list or array of starts, or an
            initialiser ``init(key) -> params`` drawn ``count`` times with
            ``init_seed``; see :func:`~basinview.core.scheme_starts`), the
            :class:`~basinview.core.Starts` that function returns, or
            :class:`~basinview.core.Runs` already made from such starts (then
            no descent is run and the descent arguments are ignored).
        solutions: what a run's solution is. ``None``: the critical point
            :func:`~basinview.core.find_minima` assigns it (its letter), or
            its outcome; a :class:`~basinview.core.Minima` of these runs; an
            ``(R,)`` array of labels (e.g. connectivity groups); or a function
            ``labels(runs) -> (R,) labels``.
        loss_below: the loss that ``steps_to_loss`` counts steps to. Default:
            90% of the way from the median start loss down to the lowest final
            loss of any run that did not diverge.
        sharpness: compute the top Hessian eigenvalue at every end point
            (:func:`top_hessian_eigenvalues`).
        sharpness_iterations: power steps per pass for it.
        confidence: coverage of the Wilson intervals.
        include_unconverged: passed to find_minima (refine the end points of
            runs that spent their step budget too).
        count, init_seed: draws per initialiser scheme and their seed.
        optimizer, learning_rate, hyper, steps, plane, grad_tol, loss_tol,
        divergence_factor, batch_size, min_runs, progress: as for
            :func:`~basinview.core.descend`; one learning rate and one value
            per hyper-parameter (compare schemes at one setting).

    Returns:
        :class:`SchemeComparison`; ``.summary``, ``.shares`` and ``.per_run``
        are pandas tables.

    Note:
        For adaptive rules (Adam, RMSProp) the plain Hessian's top eigenvalue
        describes the loss at the end point, not the stability of the rule,
        which divides its steps by a preconditioner
        (:func:`~basinview.core.preconditioned_sharpness`).

    Examples:
        >>> import numpy as np
        >>> from basinview.core import Problem, random_starts
        >>> prob = Problem(lambda p: (p[0] ** 2 - 1.0) ** 2 + p[1] ** 2, np.zeros(2, np.float32))
        >>> cmp = compare_schemes(prob, {
        ...     "left": random_starts(prob, 8, scale=0.1, center=np.array([-1.0, 0.0])),
        ...     "right": random_starts(prob, 8, scale=0.1, center=np.array([1.0, 0.0])),
        ... }, learning_rate=0.05, steps=400)
        >>> cmp.summary[["scheme", "top_share", "diverged"]].values.tolist()
        [['left', 1.0, 0], ['right', 1.0, 0]]
    """
    if isinstance(schemes, Runs):
        runs = schemes
        if runs.scheme is None:
            raise ParameterError(
                "these runs carry no scheme names; run descend on named start sets, e.g. "
                "descend(problem, {'zeros': ..., 'fan-in': ...}), or pass the schemes here."
            )
    else:
        if np.ndim(learning_rate) != 0 or any(np.ndim(v) != 0 for v in (hyper or {}).values()):
            raise ParameterError(
                "compare_schemes uses one learning rate and one value per hyper-parameter; "
                "call it once per setting."
            )
        start_set = (
            schemes
            if isinstance(schemes, Starts) and schemes.spec.get("kind") == "schemes"
            else _named(problem, schemes, count, init_seed)
        )
        runs = descend(
            problem,
            start_set,
            optimizer=optimizer,
            learning_rate=learning_rate,
            hyper=hyper,
            steps=steps,
            plane=plane,
            grad_tol=grad_tol,
            loss_tol=loss_tol,
            divergence_factor=divergence_factor,
            batch_size=batch_size,
            min_runs=min_runs,
            progress=progress,
        )
    assert runs.scheme is not None
    if any(np.unique(v).size > 1 for v in runs.hyper.values()):
        raise ParameterError(
            "these runs mix several hyper-parameter settings; compare schemes at one setting "
            "(descend with one learning rate and one value per hyper-parameter)."
        )
    if not (isinstance(confidence, float) and 0.0 < confidence < 1.0):
        raise ParameterError(f"confidence must be a number between 0 and 1; got {confidence!r}.")
    minima, labels = _solutions(problem, runs, solutions, include_unconverged)
    names = tuple(dict.fromkeys(runs.scheme.tolist()))
    ends = np.where(
        (np.asarray(runs.status) == "diverged")[:, None], np.nan, np.asarray(runs.final)
    )
    sharp = (
        top_hessian_eigenvalues(problem, ends, iterations=sharpness_iterations)
        if sharpness
        else None
    )
    return SchemeComparison(
        runs=runs,
        schemes=names,
        solution=labels,
        solutions=_order(labels, minima),
        minima=minima,
        sharpness=sharp,
        loss_below=_target(runs, loss_below),
        confidence=float(confidence),
    )


def _named(problem: Problem, schemes: Any, count: int | None, seed: int) -> Starts:
    if isinstance(schemes, Starts):
        raise ParameterError(
            "these starts carry no scheme names; pass {'name': starts, ...} or the result of "
            "scheme_starts(problem, {...})."
        )
    return scheme_starts(problem, schemes, count=count, seed=seed)


def _solutions(
    problem: Problem, runs: Runs, solutions: Any, include_unconverged: bool
) -> tuple[Minima | None, np.ndarray]:
    """The critical points (if they define the solutions) and each run's solution label."""
    if solutions is None:
        solutions = find_minima(problem, runs, include_unconverged=include_unconverged)
    if isinstance(solutions, Minima):
        if solutions.assignment.shape != (len(runs),):
            raise ParameterError(
                f"these minima assign {solutions.assignment.size} runs; the comparison has "
                f"{len(runs)}. Pass find_minima(problem, runs) of these runs."
            )
        names = np.asarray([*solutions.labels, ""], dtype=object)
        a = solutions.assignment
        labels = np.where(a >= 0, names[np.maximum(a, 0)], "")
        for code, name in OUTCOMES.items():
            labels = np.where(a == code, name, labels)
        return solutions, np.asarray(labels, dtype=object)
    if callable(solutions):
        solutions = solutions(runs)
    labels = np.asarray(solutions)
    if labels.shape != (len(runs),):
        raise ParameterError(
            f"solutions must give one label per run, shape ({len(runs)},); got shape "
            f"{labels.shape}."
        )
    return None, np.asarray([str(x) for x in labels.tolist()], dtype=object)


def _order(labels: np.ndarray, minima: Minima | None) -> tuple[str, ...]:
    """Critical points by loss, then outcomes; the caller's labels in order of appearance."""
    seen = list(dict.fromkeys(labels.tolist()))
    if minima is None:
        return tuple(seen)
    order = [n for n in minima.labels if n in seen]
    order += [OUTCOMES[c] for c in sorted(OUTCOMES, reverse=True) if OUTCOMES[c] in seen]
    return tuple(order)


def _target(runs: Runs, loss_below: float | None) -> float:
    if loss_below is not None:
        try:
            value = float(loss_below)
        except (TypeError, ValueError):
            raise ParameterError(f"loss_below must be a number; got {loss_below!r}.") from None
        if not np.isfinite(value):
            raise ParameterError(f"loss_below must be finite; got {value}.")
        return value
    final = np.asarray(runs.final_loss, dtype=np.float64)
    final = final[(np.asarray(runs.status) != "diverged") & np.isfinite(final)]
    start = np.asarray(runs.losses[:, 0], dtype=np.float64)
    start = start[np.isfinite(start)]
    if not final.size or not start.size:
        return float("nan")
    low, top = float(final.min()), float(np.median(start))
    return low + 0.1 * max(top - low, 0.0)

"""Distinct critical points from run end points, their type, and basin maps.

Where did the runs end? End points of converged runs are grouped into
distinct points; each group's lowest end point is refined until the
gradient norm is below a tolerance (:func:`~basinview.core.stationary.refine_point`)
and classified from its Hessian eigenvalues (minimum, saddle, maximum or
degenerate). Every row of a :class:`Minima` table is such a stationary
point, with its gradient norm. A group whose end point refinement cannot
bring to a stationary point is no row: its runs are labelled
:data:`NOT_STATIONARY_LABEL` ("not stationary").

Every run gets one outcome in ``Minima.assignment`` (and every start one in
``BasinMap.label``): the row index of the point it reached, or

- :data:`DIVERGED_LABEL` (``-1``, "diverged"): status ``"diverged"``;
- :data:`MAX_STEPS_LABEL` (``-2``, "max_steps"): status ``"max_steps"``, the
  step budget was spent before convergence (and ``include_unconverged`` was
  not asked for);
- :data:`NOT_STATIONARY_LABEL` (``-3``, "not stationary"): the end point is
  not a stationary point and refinement did not reach one.

:data:`OUTCOMES` maps these labels to their names, which tables, figures,
the Explorer and the command line all use.

Points keep their letters across calls on the same problem: see
:mod:`basinview.core.identities`.

Caution: a basin map is drawn on a 2-D slice of the starts, but the runs
move in all ``n`` dimensions: the map says where starts *on this plane* go,
not how the whole parameter space is divided.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from .descent import Runs
from .errors import MinimaWarning, NoCriticalPointError, ParameterError
from .identities import critical_points, default_rtol, length_scale
from .intervals import wilson_interval
from .problem import Problem
from .stationary import CriticalPoint, classify, refine, refine_point
from .symmetries import resolve_symmetries, warn_if_not_symmetric

__all__ = [
    "DIVERGED_LABEL",
    "MAX_STEPS_LABEL",
    "NOT_STATIONARY_LABEL",
    "OUTCOMES",
    "CriticalPoint",
    "Minima",
    "classify",
    "find_minima",
    "outcome_rows",
    "refine",
]

DIVERGED_LABEL = -1
MAX_STEPS_LABEL = -2
NOT_STATIONARY_LABEL = -3
#: Name of each outcome label (status names where the outcome is a run status).
OUTCOMES: dict[int, str] = {
    DIVERGED_LABEL: "diverged",
    MAX_STEPS_LABEL: "max_steps",
    NOT_STATIONARY_LABEL: "not stationary",
}
KINDS = ("minimum", "saddle", "maximum", "degenerate")


def outcome_rows(minima: Minima, label: np.ndarray) -> pd.DataFrame:
    """Share of ``label`` per point, then one row per outcome label.

    ``share_low`` / ``share_high`` bound each share with a 95% Wilson interval
    (the starts are a sample of the plane's grid or of a random draw).
    """
    label = np.asarray(label).ravel()
    total = max(label.size, 1)
    rows = [
        {"point": name, "kind": kind, "loss": float(loss), "runs": int((label == i).sum())}
        for i, (name, kind, loss) in enumerate(zip(minima.labels, minima.kind, minima.loss))
    ]
    for code in (MAX_STEPS_LABEL, NOT_STATIONARY_LABEL, DIVERGED_LABEL):
        rows.append(
            {
                "point": OUTCOMES[code],
                "kind": "",
                "loss": np.nan,
                "runs": int((label == code).sum()),
            }
        )
    frame = pd.DataFrame(rows)
    frame["share"] = frame["runs"] / total
    low, high = wilson_interval(frame["runs"].to_numpy(), label.size)
    frame["share_low"], frame["share_high"] = low, high
    return frame


@dataclass(frozen=True, eq=False)
class Minima:
    """Distinct stationary points reached by a batch of runs.

    Attributes:
        points: ``(K, n)`` refined critical points, ordered by loss.
        loss: ``(K,)`` loss at each point.
        kind: ``(K,)`` ``"minimum"``, ``"saddle"``, ``"maximum"`` or ``"degenerate"``.
        grad_norm: ``(K,)`` gradient norm at each point (at most ``grad_tol``).
        grad_tol: ``(K,)`` the tolerance each point was refined to.
        lambda_min, lambda_max: ``(K,)`` extreme Hessian eigenvalues.
        count: ``(K,)`` runs that reached each point.
        share: ``(K,)`` ``count / number of runs``.
        assignment: ``(R,)`` per run, the row of its point, or an outcome
            label (:data:`OUTCOMES`: ``-1`` diverged, ``-2`` max_steps, ``-3``
            not stationary).
        param_labels: the problem's coordinate labels.
        names: ``(K,)`` each point's letter in the problem's registry
            (:mod:`basinview.core.identities`); the same point has the same
            letter in every result on the problem.
        colour_index: ``(K,)`` each point's colour index in that registry.
        copies: ``(K,)`` distinct symmetric copies among the end points of
            each point's runs, when symmetries were declared (else None).

    An empty result (no run converged) has ``K = 0`` and well-formed
    arrays and tables; :meth:`lowest` then raises a clear error.
    """

    points: np.ndarray
    loss: np.ndarray
    kind: np.ndarray
    grad_norm: np.ndarray
    grad_tol: np.ndarray
    lambda_min: np.ndarray
    lambda_max: np.ndarray
    count: np.ndarray
    share: np.ndarray
    assignment: np.ndarray
    param_labels: tuple[str, ...]
    names: tuple[str, ...]
    colour_index: np.ndarray
    copies: np.ndarray | None = None

    def __len__(self) -> int:
        return int(self.points.shape[0])

    @property
    def labels(self) -> list[str]:
        """The points' letters ("A", "B", ..., "Z", "AA", ...), stable on the problem."""
        return list(self.names)

    @property
    def table(self) -> pd.DataFrame:
        """One row per stationary point, with its gradient norm and its location in the user's labels."""
        frame = pd.DataFrame(
            {
                "point": pd.Series(self.labels, dtype=object),
                "kind": pd.Series(list(self.kind), dtype=object),
                "loss": np.asarray(self.loss, dtype=np.float64),
                "grad_norm": np.asarray(self.grad_norm, dtype=np.float64),
                "runs": np.asarray(self.count, dtype=np.int64),
                "share": np.asarray(self.share, dtype=np.float64),
                "lambda_min": np.asarray(self.lambda_min, dtype=np.float64),
                "lambda_max": np.asarray(self.lambda_max, dtype=np.float64),
            }
        )
        if self.copies is not None:
            frame["copies"] = np.asarray(self.copies, dtype=np.int64)
        coords = pd.DataFrame(
            self.points.astype(np.float64).reshape(len(self), len(self.param_labels)),
            columns=list(self.param_labels),
        )
        return pd.concat([frame, coords], axis=1)

    @property
    def outcomes(self) -> pd.DataFrame:
        """Runs per point, then per outcome (max_steps, not stationary, diverged), with shares."""
        return outcome_rows(self, self.assignment)

    def to_frame(self) -> pd.DataFrame:
        return self.table

    def lowest(self, kind: str | None = "minimum") -> np.ndarray:
        """The lowest point of type ``kind`` (``None``: of any type).

        Raises:
            NoCriticalPointError: no such point was found (the message says
                how to find one).
        """
        rows = [i for i in range(len(self)) if kind is None or self.kind[i] == kind]
        if not rows:
            what = "critical point" if kind is None else kind
            found = ", ".join(f"{n} ({k})" for n, k in zip(self.labels, self.kind)) or "none"
            raise NoCriticalPointError(
                f"no {what} was found (points found: {found}). Run more steps, pass "
                "include_unconverged=True to find_minima, or loosen grad_tol; "
                "minima.outcomes says where the runs ended."
            )
        return self.points[min(rows, key=lambda i: float(self.loss[i]))]


def _near(points: np.ndarray, p: np.ndarray, xtol: float, scale: float) -> np.ndarray:
    """Which ``points`` lie within ``xtol * max(|p|, |q|, scale)`` of ``p``."""
    tol = xtol * np.maximum(np.maximum(np.linalg.norm(points, axis=1), np.linalg.norm(p)), scale)
    return np.linalg.norm(points - p, axis=1) <= tol


def _loss_near(losses: np.ndarray, fp: float, ftol: float | None, fscale: float) -> np.ndarray:
    if ftol is None:
        return np.ones(np.shape(losses), dtype=bool)
    return np.abs(losses - fp) <= ftol * np.maximum(np.maximum(np.abs(losses), abs(fp)), fscale)


def _empty_warning(runs: Runs, include_unconverged: bool, unresolved: int) -> str:
    status = np.asarray(runs.status)
    n, spent = len(status), int(np.sum(status == "max_steps"))
    diverged = int(np.sum(status == "diverged"))
    if unresolved:
        return (
            f"find_minima: refinement brought the end points of none of the {n} runs to a "
            f"stationary point ({unresolved} groups not stationary), so the result is empty. "
            "To find critical points: run more steps (descend(..., steps=...)) so the runs get "
            "closer, raise refine_steps, or loosen grad_tol. Runs that end near but not at "
            "critical points (e.g. Adam on a network) are grouped by connect_runs(problem, "
            "runs), which asks whether the loss stays low between end points."
        )
    if diverged == n:
        return (
            f"find_minima: all {n} runs diverged, so no critical point was found and the result "
            "is empty. Lower the learning rate (descend(..., learning_rate=...))."
        )
    fixes = (
        "run more steps (descend(..., steps=...)), pass include_unconverged=True to refine "
        "the end points of runs that spent their step budget, or use a looser tolerance "
        "(descend(..., grad_tol=..., loss_tol=...))"
    )
    if include_unconverged:
        fixes = "run more steps (descend(..., steps=...)) or lower the learning rate"
    return (
        f"find_minima: none of the {n} runs converged ({spent} max_steps, {diverged} diverged), "
        f"so no critical point was found and the result is empty. To find some: {fixes}."
    )


def find_minima(
    problem: Problem,
    runs: Runs,
    *,
    xtol: float | None = None,
    ftol: float | None = None,
    grad_tol: float | None = None,
    refine_steps: int = 50,
    include_unconverged: bool = False,
    symmetries: Any = None,
) -> Minima:
    """Group the end points of converged runs into distinct, classified stationary points.

    Two end points belong together when ``|p - q| <= xtol * max(|p|, |q|, L)``,
    where ``L`` is a length of the problem (:func:`~basinview.core.identities.length_scale`
    of the end points and the reference parameters), so the tolerance follows the
    parameter scale. Each group's lowest end point is refined until its gradient
    norm is at most ``grad_tol`` (:func:`~basinview.core.stationary.refine_point`),
    groups whose refined points coincide are merged, and each point is classified
    with :func:`classify`. A group that refinement cannot bring to a stationary
    point is no row: its runs get :data:`NOT_STATIONARY_LABEL`. Points get their
    letters and colours from the problem's registry (stable across calls).

    Args:
        problem: the problem the runs minimised.
        runs: the runs (see :func:`descend`).
        xtol: relative grouping tolerance (default ``1e-2`` in float32, ``1e-4``
            in float64).
        ftol: optional relative loss tolerance, also required for grouping
            (``|f_p - f_q| <= ftol * max(|f_p|, |f_q|, spread of end losses)``).
        grad_tol: gradient norm of a stationary point (default: the descent
            default of the dtype).
        refine_steps: most refinement steps per point (0: judge the raw end point).
        include_unconverged: also use the end points of runs that ran out of
            steps (not diverged ones); each is assigned to the stationary point
            refinement reaches from it, which it may not have been heading for.
            Runs that end near but not at critical points (Adam on a network)
            are better grouped by :func:`~basinview.core.connect_runs`.
        symmetries: declared symmetries (:mod:`basinview.core.symmetries`):
            end points and refined points are compared modulo them (each is
            moved to its copy nearest the other), a copy of a point named in
            an earlier call keeps that point's letter, and ``Minima.copies``
            counts the copies merged.

    Warns:
        MinimaWarning: when no point is found although there were runs; the
            message names the fixes. The result is then empty but well-formed.
    """
    if runs.final.shape[1] != problem.size:
        raise ParameterError(
            f"these runs belong to a problem with {runs.final.shape[1]} parameters; this "
            f"problem has {problem.size}. Pass the problem the runs were made with."
        )
    if (
        isinstance(refine_steps, bool)
        or not isinstance(refine_steps, (int, np.integer))
        or refine_steps < 0
    ):
        raise ParameterError(f"refine_steps must be a whole number >= 0; got {refine_steps!r}.")
    xtol = default_rtol(problem.dtype) if xtol is None else float(xtol)
    syms = resolve_symmetries(problem, symmetries)
    n_runs = len(runs)
    status = np.asarray(runs.status)
    assignment = np.where(status == "diverged", DIVERGED_LABEL, MAX_STEPS_LABEL).astype(np.int64)
    usable = (status != "diverged") if include_unconverged else (status == "converged")
    ends = np.asarray(runs.final, dtype=np.float64)
    final_loss = np.asarray(runs.final_loss, dtype=np.float64)
    conv = np.flatnonzero(usable & np.all(np.isfinite(ends), axis=1) & np.isfinite(final_loss))
    if conv.size:
        warn_if_not_symmetric(syms, problem, ends[conv[np.argmin(final_loss[conv])]])
    scale = length_scale(ends[conv], problem.theta0)
    fl = final_loss[conv]
    fscale = float(np.ptp(fl)) if fl.size and np.ptp(fl) > 0 else 1.0
    # 1. group raw end points: the lowest unassigned end point leads a group of
    #    every unassigned end point close to it (vectorised leader clustering)
    leaders: list[int] = []
    group_of: dict[int, int] = {}
    pending = conv[np.argsort(final_loss[conv], kind="stable")]
    while pending.size:
        lead = int(pending[0])
        seen = (
            ends[pending]
            if syms is None
            else np.stack([syms.align(ends[r], ends[lead])[0] for r in pending])
        )
        near = _near(seen, ends[lead], xtol, scale) & _loss_near(
            final_loss[pending], final_loss[lead], ftol, fscale
        )
        near[0] = True
        for r in pending[near]:
            group_of[int(r)] = len(leaders)
        leaders.append(lead)
        pending = pending[~near]
    # 2. refine each group's leader to a stationary point, 3. merge coincident points
    refined: list[tuple[CriticalPoint, float]] = []
    merged_index: list[int] = []
    for lead in leaders:
        ref = refine_point(problem, runs.final[lead], steps=int(refine_steps), grad_tol=grad_tol)
        if not ref.stationary:
            merged_index.append(NOT_STATIONARY_LABEL)
            continue
        cp = classify(problem, ref.point)
        for k, (other, _) in enumerate(refined):
            here = cp.point.astype(np.float64)
            if syms is not None:
                here = syms.align(here, other.point)[0]
            same = _near(other.point[None].astype(np.float64), here, xtol, scale)
            if same[0] and _loss_near(np.array([other.loss]), cp.loss, ftol, fscale)[0]:
                merged_index.append(k)
                break
        else:
            merged_index.append(len(refined))
            refined.append((cp, ref.grad_tol))
    for r, gi in group_of.items():
        assignment[r] = merged_index[gi]
    # order points by loss; letters and colours come from the problem's registry
    order = np.argsort([cp.loss for cp, _ in refined], kind="stable")
    remap = np.zeros(len(refined), dtype=np.int64)
    remap[order] = np.arange(len(refined))
    assignment = np.where(
        assignment >= 0, remap[np.maximum(assignment, 0)] if len(refined) else 0, assignment
    )
    pts = [refined[i] for i in order]
    n = problem.size
    points = np.array([cp.point for cp, _ in pts]).reshape(len(pts), n)
    loss = np.array([cp.loss for cp, _ in pts], dtype=np.float64)
    kind = np.array([cp.kind for cp, _ in pts], dtype=object)
    # a symmetric copy of a point named in an earlier call keeps that point's letter
    align = None if syms is None else (lambda p, q: syms.align(p, q)[0])
    ids = critical_points(problem).identify(points.reshape(len(pts), n), loss, kind, align=align)
    copies = None
    if syms is not None:
        copies = np.zeros(len(pts), dtype=np.int64)
        for i in range(len(pts)):
            members = np.flatnonzero(assignment == i)
            copies[i] = len({syms.align(ends[r], points[i])[1] for r in members})
    count = np.array([(assignment == i).sum() for i in range(len(pts))], dtype=np.int64)
    if not len(pts) and n_runs:
        unresolved = int(np.sum(np.asarray(merged_index) == NOT_STATIONARY_LABEL))
        warnings.warn(
            _empty_warning(runs, include_unconverged, unresolved), MinimaWarning, stacklevel=2
        )
    return Minima(
        points=points,
        loss=loss,
        kind=kind,
        grad_norm=np.array([cp.grad_norm for cp, _ in pts], dtype=np.float64),
        grad_tol=np.array([tol for _, tol in pts], dtype=np.float64),
        lambda_min=np.array([cp.lambda_min for cp, _ in pts], dtype=np.float64),
        lambda_max=np.array([cp.lambda_max for cp, _ in pts], dtype=np.float64),
        count=count,
        share=count / max(n_runs, 1),
        assignment=assignment,
        param_labels=problem.labels,
        names=tuple(critical_points(problem).letters[i] for i in ids),
        colour_index=ids,
        copies=copies,
    )

"""Distinct critical points from run end points, their type, and basin maps.

Where did the runs end? End points of converged runs are grouped into
distinct critical points, each polished with a few Newton steps and
classified from its Hessian eigenvalues (minimum, saddle, maximum or
degenerate). A basin map runs descent from every node of a grid on a plane
and colours each start by the critical point it reached.

Caution: a basin map is drawn on a 2-D slice of the starts, but the runs
move in all ``n`` dimensions: the map says where starts *on this plane* go,
not how the whole parameter space is divided.
"""

from __future__ import annotations

import string
from dataclasses import dataclass
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
import pandas as pd

from .curvature import EXACT_LIMIT, hessian_spectrum
from .descent import Runs, descend
from .errors import ParameterError
from .planes import Plane
from .problem import Problem
from .starts import grid_starts
from .surface import _resolution, span_ranges

__all__ = [
    "DIVERGED_LABEL",
    "NOT_CONVERGED_LABEL",
    "BasinMap",
    "CriticalPoint",
    "Minima",
    "basin_map",
    "classify",
    "find_minima",
    "refine",
]

DIVERGED_LABEL = -1
NOT_CONVERGED_LABEL = -2
KINDS = ("minimum", "saddle", "maximum", "degenerate")


@dataclass(frozen=True)
class CriticalPoint:
    """A refined point with its type and extreme Hessian eigenvalues."""

    point: np.ndarray
    loss: float
    grad_norm: float
    kind: str
    lambda_min: float
    lambda_max: float


def _eig_tol(dtype: Any) -> float:
    return 1e-8 if np.dtype(dtype) == np.float64 else 1e-4  # common practice: ~ sqrt(eps)


def classify(problem: Problem, theta: Any) -> CriticalPoint:
    """Type of the critical point at ``theta`` from the signs of its Hessian eigenvalues.

    ``minimum`` if every eigenvalue is positive, ``maximum`` if every one is
    negative, ``saddle`` if both signs occur, ``degenerate`` if the smallest
    eigenvalue in magnitude is zero to within ``sqrt(eps)`` of the largest
    (the second-order test cannot decide).
    """
    flat = problem.flatten(theta, what="point")
    value, grad = problem.value_and_grad(flat)
    spec = hessian_spectrum(problem, flat, k=1)
    lo, hi = spec.lambda_min, spec.lambda_max
    scale = max(abs(lo), abs(hi), 1e-300)
    tol = _eig_tol(problem.dtype) * scale
    if lo > tol:
        kind = "minimum"
    elif hi < -tol:
        kind = "maximum"
    elif lo < -tol and hi > tol:
        kind = "saddle"
    else:
        kind = "degenerate"
    return CriticalPoint(
        point=np.asarray(flat),
        loss=float(value),
        grad_norm=float(jnp.linalg.norm(grad)),
        kind=kind,
        lambda_min=float(lo),
        lambda_max=float(hi),
    )


def refine(problem: Problem, theta: Any, *, steps: int = 8) -> np.ndarray:
    """Polish a point near a critical point with Newton steps.

    Newton's method converges quadratically to the nearby critical point of
    any type. A step is kept only if it lowers the gradient norm; otherwise
    a gradient step of size ``1 / lambda_max`` is tried, and refinement stops
    when neither helps. For more than :data:`EXACT_LIMIT` parameters the
    Newton system is solved by conjugate gradients on Hessian-vector products.
    """
    x = np.asarray(problem.flatten(theta, what="point"), dtype=np.float64)
    dtype = problem.dtype
    g = np.asarray(problem.grad(x), dtype=np.float64)
    gn = np.linalg.norm(g)
    for _ in range(steps):
        if not np.isfinite(gn) or gn == 0:
            break
        step = _newton_step(problem, x, g)
        candidates = [] if step is None else [x - step]
        lam = hessian_spectrum(problem, x, k=1).lambda_max if problem.size <= EXACT_LIMIT else None
        if lam and lam > 0:
            candidates.append(x - g / lam)
        moved = False
        for cand in candidates:
            cand_g = np.asarray(problem.grad(cand.astype(dtype)), dtype=np.float64)
            cand_n = np.linalg.norm(cand_g)
            if np.isfinite(cand_n) and cand_n < gn:
                x, g, gn = cand, cand_g, cand_n
                moved = True
                break
        if not moved:
            break
    return x.astype(dtype)


def _newton_step(problem: Problem, x: np.ndarray, g: np.ndarray) -> np.ndarray | None:
    if problem.size <= EXACT_LIMIT:
        from .curvature import hessian_matrix

        h = hessian_matrix(problem, x)
        try:
            step = np.linalg.lstsq(h, g, rcond=None)[0]
        except np.linalg.LinAlgError:
            return None
        return step if np.all(np.isfinite(step)) else None
    point = jnp.asarray(x, problem.dtype)
    step, _ = jax.scipy.sparse.linalg.cg(
        lambda v: problem.hvp(point, v), jnp.asarray(g, problem.dtype), maxiter=50
    )
    step = np.asarray(step, dtype=np.float64)
    return step if np.all(np.isfinite(step)) else None


@dataclass(frozen=True, eq=False)
class Minima:
    """Distinct critical points reached by a batch of runs.

    Attributes:
        points: ``(K, n)`` refined critical points, ordered by loss.
        loss: ``(K,)`` loss at each point.
        kind: ``(K,)`` ``"minimum"``, ``"saddle"``, ``"maximum"`` or ``"degenerate"``.
        lambda_min, lambda_max: ``(K,)`` extreme Hessian eigenvalues.
        count: ``(K,)`` runs that reached each point.
        share: ``(K,)`` ``count / number of runs``.
        assignment: ``(R,)`` per run, the index of its point; ``-1`` diverged,
            ``-2`` did not converge within the step budget.
        param_labels: the problem's coordinate labels.
    """

    points: np.ndarray
    loss: np.ndarray
    kind: np.ndarray
    lambda_min: np.ndarray
    lambda_max: np.ndarray
    count: np.ndarray
    share: np.ndarray
    assignment: np.ndarray
    param_labels: tuple[str, ...]

    def __len__(self) -> int:
        return int(self.points.shape[0])

    @property
    def labels(self) -> list[str]:
        """Short names "A", "B", ... (then "P27", ...) for legends."""
        letters = string.ascii_uppercase
        return [letters[i] if i < len(letters) else f"P{i + 1}" for i in range(len(self))]

    @property
    def table(self) -> pd.DataFrame:
        """One row per critical point, with its location in the user's labels."""
        frame = pd.DataFrame(
            {
                "point": self.labels,
                "kind": self.kind,
                "loss": self.loss,
                "runs": self.count,
                "share": self.share,
                "lambda_min": self.lambda_min,
                "lambda_max": self.lambda_max,
            }
        )
        coords = pd.DataFrame(self.points.astype(np.float64), columns=list(self.param_labels))
        return pd.concat([frame, coords], axis=1)

    def to_frame(self) -> pd.DataFrame:
        return self.table


def _same(p: np.ndarray, q: np.ndarray, fp: float, fq: float, xtol: float, ftol: float) -> bool:
    scale = max(1.0, float(np.linalg.norm(p)), float(np.linalg.norm(q)))
    return bool(
        np.linalg.norm(p - q) <= xtol * scale and abs(fp - fq) <= ftol * max(1.0, abs(fp), abs(fq))
    )


def _close_to(
    points: np.ndarray, losses: np.ndarray, p: np.ndarray, fp: float, xtol: float, ftol: float
) -> np.ndarray:
    scale = np.maximum(1.0, np.maximum(np.linalg.norm(points, axis=1), np.linalg.norm(p)))
    fscale = np.maximum(1.0, np.maximum(np.abs(losses), abs(fp)))
    return (np.linalg.norm(points - p, axis=1) <= xtol * scale) & (
        np.abs(losses - fp) <= ftol * fscale
    )


def find_minima(
    problem: Problem,
    runs: Runs,
    *,
    xtol: float | None = None,
    ftol: float | None = None,
    refine_steps: int = 8,
    include_unconverged: bool = False,
) -> Minima:
    """Group the end points of converged runs into distinct, classified critical points.

    Two end points belong to the same critical point when they are within
    ``xtol * max(1, |p|)`` of each other and their losses within
    ``ftol * max(1, |loss|)``. Each group's lowest end point is refined with
    :func:`refine`, groups whose refined points coincide are merged, and each
    point is classified with :func:`classify`.

    Args:
        problem: the problem the runs minimised.
        runs: the runs (see :func:`descend`).
        xtol, ftol: grouping tolerances (defaults: 1e-2 and 1e-3 for float32,
            1e-4 and 1e-6 for float64).
        refine_steps: Newton steps per point (0 keeps the raw end points).
        include_unconverged: also group the end points of runs that ran out of
            steps (not diverged ones); each is assigned to the critical point
            that refinement reaches from it, which it may not have been
            heading for.
    """
    dtype = np.dtype(problem.dtype)
    if xtol is None:
        xtol = 1e-4 if dtype == np.float64 else 1e-2
    if ftol is None:
        ftol = 1e-6 if dtype == np.float64 else 1e-3
    if runs.final.shape[1] != problem.size:
        raise ParameterError(
            f"these runs belong to a problem with {runs.final.shape[1]} parameters; this "
            f"problem has {problem.size}. Pass the problem the runs were made with."
        )
    n_runs = len(runs)
    assignment = np.where(runs.status == "diverged", DIVERGED_LABEL, NOT_CONVERGED_LABEL).astype(
        np.int64
    )
    usable = (runs.status != "diverged") if include_unconverged else (runs.status == "converged")
    conv = np.flatnonzero(usable & np.all(np.isfinite(runs.final), axis=1))
    final_loss = runs.final_loss.astype(np.float64)
    # 1. group raw end points: the lowest unassigned end point leads a group of
    #    every unassigned end point close to it (vectorised leader clustering)
    leaders: list[int] = []
    group_of: dict[int, int] = {}
    pending = conv[np.argsort(final_loss[conv], kind="stable")]
    ends = runs.final.astype(np.float64)
    while pending.size:
        lead = int(pending[0])
        near = _close_to(
            ends[pending], final_loss[pending], ends[lead], final_loss[lead], xtol, ftol
        )
        near[0] = True
        for r in pending[near]:
            group_of[int(r)] = len(leaders)
        leaders.append(lead)
        pending = pending[~near]
    # 2. refine each group's leader, 3. merge coincident refined points
    refined: list[CriticalPoint] = []
    merged_index: list[int] = []
    for lead in leaders:
        x = (
            refine(problem, runs.final[lead], steps=refine_steps)
            if refine_steps
            else runs.final[lead]
        )
        cp = classify(problem, x)
        for k, other in enumerate(refined):
            if _same(cp.point, other.point, cp.loss, other.loss, xtol, ftol):
                merged_index.append(k)
                break
        else:
            merged_index.append(len(refined))
            refined.append(cp)
    for r, gi in group_of.items():
        assignment[r] = merged_index[gi]
    # order points by loss
    order = np.argsort([cp.loss for cp in refined], kind="stable")
    remap = np.full(len(refined) + 2, 0, dtype=np.int64)
    for new, old in enumerate(order):
        remap[old] = new
    assignment = np.where(assignment >= 0, remap[np.maximum(assignment, 0)], assignment)
    pts = [refined[i] for i in order]
    count = np.array([(assignment == i).sum() for i in range(len(pts))], dtype=np.int64)
    n = problem.size
    return Minima(
        points=np.array([cp.point for cp in pts]).reshape(len(pts), n),
        loss=np.array([cp.loss for cp in pts]),
        kind=np.array([cp.kind for cp in pts], dtype=object),
        lambda_min=np.array([cp.lambda_min for cp in pts]),
        lambda_max=np.array([cp.lambda_max for cp in pts]),
        count=count,
        share=count / max(n_runs, 1),
        assignment=assignment,
        param_labels=problem.labels,
    )


@dataclass(frozen=True, eq=False)
class BasinMap:
    """Which critical point each start on a grid of a plane reaches.

    Attributes:
        plane: the plane of the starts.
        a, b: grid coordinates.
        label: ``(len(b), len(a))``; index into ``minima.points``, ``-1``
            diverged, ``-2`` did not converge.
        minima: the critical points found.
        runs: the runs, one per grid node (row-major in b, then a).
    """

    plane: Plane
    a: np.ndarray
    b: np.ndarray
    label: np.ndarray
    minima: Minima
    runs: Runs

    @property
    def shares(self) -> pd.DataFrame:
        """Share of starts per basin, plus rows for diverged and not converged."""
        total = self.label.size
        rows = [
            {
                "point": name,
                "kind": kind,
                "loss": loss,
                "share": float((self.label == i).sum()) / total,
            }
            for i, (name, kind, loss) in enumerate(
                zip(self.minima.labels, self.minima.kind, self.minima.loss)
            )
        ]
        rows.append(
            {
                "point": "diverged",
                "kind": "",
                "loss": np.nan,
                "share": float((self.label == DIVERGED_LABEL).sum()) / total,
            }
        )
        rows.append(
            {
                "point": "not converged",
                "kind": "",
                "loss": np.nan,
                "share": float((self.label == NOT_CONVERGED_LABEL).sum()) / total,
            }
        )
        return pd.DataFrame(rows)


def basin_map(
    problem: Problem,
    plane: Plane,
    *,
    span: Any = 1.0,
    resolution: Any = 41,
    optimizer: Any = "gradient_descent",
    learning_rate: float = 0.01,
    hyper: dict[str, Any] | None = None,
    steps: int = 1000,
    grad_tol: float | None = None,
    loss_tol: float | None = None,
    xtol: float | None = None,
    ftol: float | None = None,
    progress: bool | None = None,
) -> BasinMap:
    """Run descent from every node of a grid on ``plane`` and label each by where it ends.

    One learning rate and one hyper-parameter setting (a basin map for a
    sweep would mix basins of different dynamics). Runs are batched and
    split into bounded calls; ``progress`` shows a bar for long maps.
    """
    lr = np.asarray(learning_rate, dtype=float)
    if lr.ndim != 0:
        raise ParameterError("a basin map uses one learning rate; call basin_map once per rate.")
    if any(np.ndim(v) != 0 for v in (hyper or {}).values()):
        raise ParameterError("a basin map uses one value per hyper-parameter.")
    (a0, a1), (b0, b1) = span_ranges(span, plane.centre)
    ra, rb = _resolution(resolution)
    starts = grid_starts(plane, span=((a0, a1), (b0, b1)), resolution=(ra, rb))
    show = progress if progress is not None else ra * rb > 4096
    runs = descend(
        problem,
        starts,
        optimizer=optimizer,
        learning_rate=float(lr),
        hyper=hyper,
        steps=steps,
        plane=plane,
        grad_tol=grad_tol,
        loss_tol=loss_tol,
        progress=show,
    )
    minima = find_minima(problem, runs, xtol=xtol, ftol=ftol)
    return BasinMap(
        plane=plane,
        a=np.linspace(a0, a1, ra),
        b=np.linspace(b0, b1, rb),
        label=minima.assignment.reshape(rb, ra),
        minima=minima,
        runs=runs,
    )

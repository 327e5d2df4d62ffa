"""Solutions grouped by connectivity: end points joined by low straight segments.

Runs of Adam on a network end near, not at, critical points, so grouping by
critical point (:func:`~basinview.core.find_minima`) cannot say which runs
found the same solution. :func:`connect_runs` asks the loss instead: two end
points are one solution when the loss along the straight segment between
them stays within ``tolerance`` of the line between their end losses (the
segment's *barrier*, :mod:`basinview.core.segments`, is at most
``tolerance``), and a group is every end point joined by a chain of such
segments. With declared symmetries (:mod:`basinview.core.symmetries`) each
end point is first moved to its copy nearest the other end.

The strategy is sub-quadratic: end points are taken lowest loss first, in
blocks; each is compared with the current *representatives* of the groups
only (one batched call per block), and one that joins none becomes a new
representative. A second sweep compares every end point with every final
representative (the pairs not yet measured), so an end point connected to
two representatives joins their groups (a chain), and every group's lowest
barrier to each other group is measured. Cost: about ``2 K G`` segments for
``K`` end points and ``G`` representatives.

What it proves: a low segment proves that its two end points are connected
by a low path, so a group is one connected low region (modulo the declared
symmetries). What it does not: a high straight segment does not prove that
two groups are separated; the low path may be curved
(:func:`~basinview.core.curved_path` looks for one), or lie through end
points no run reached.

Groups keep their names (``S1``, ``S2``, ...) and colour indices on a
problem: representatives are kept with the problem (:func:`solution_groups`)
and a later call compares its end points with them first.

References:
    Frankle, J., Dziugaite, G. K., Roy, D. M. & Carbin, M. (2020). Linear
    mode connectivity and the lottery ticket hypothesis. ICML.

    Garipov, T., Izmailov, P., Podoprikhin, D., Vetrov, D. & Wilson, A. G.
    (2018). Loss surfaces, mode connectivity, and fast ensembling of DNNs.
    NeurIPS. Draxler, F., Veschgini, K., Salmhofer, M. & Hamprecht, F. (2018).
    Essentially no barriers in neural network energy landscape. ICML.
"""

from __future__ import annotations

import warnings
from typing import Any

import numpy as np

from .errors import MinimaWarning, ParameterError
from .intervals import wilson_interval
from .minima import DIVERGED_LABEL, MAX_STEPS_LABEL
from .segments import _check_samples, segment_barriers, segment_losses
from .solutions import Solutions, group_name, solution_groups
from .symmetries import Symmetries, resolve_symmetries, warn_if_not_symmetric

__all__ = ["Solutions", "connect_runs", "default_tolerance", "solution_groups"]


def _inputs(problem: Any, runs: Any, include_unconverged: bool) -> tuple[Any, ...]:
    """End points ``(R, n)``, their losses (or None), per-run outcome codes, loss drop."""
    n = problem.size
    if hasattr(runs, "final") and hasattr(runs, "status"):
        if runs.final.shape[1] != n:
            raise ParameterError(
                f"these runs belong to a problem with {runs.final.shape[1]} parameters; this "
                f"problem has {n}. Pass the problem the runs were made with."
            )
        pts = np.asarray(runs.final, dtype=np.float64)
        loss = np.asarray(runs.final_loss, dtype=np.float64)
        status = np.asarray(runs.status)
        code = np.where(status == "diverged", DIVERGED_LABEL, 0)
        if not include_unconverged:
            code = np.where(status == "max_steps", MAX_STEPS_LABEL, code)
        first = np.asarray(runs.losses, dtype=np.float64)[:, 0]
        drop = float(np.nanmedian(first) - np.nanmedian(loss)) if np.any(np.isfinite(loss)) else 0.0
        return pts, loss, code, max(drop, 0.0) if np.isfinite(drop) else 0.0
    try:
        pts = np.asarray(runs, dtype=np.float64)
    except (TypeError, ValueError):
        pts = np.stack([problem.flatten(p, what="end point") for p in runs]).astype(np.float64)
    if pts.ndim != 2 or pts.shape[1] != n:
        raise ParameterError(
            f"connect_runs takes Runs (from descend) or end points as an array (K, {n}); "
            f"got shape {pts.shape}."
        )
    return pts, None, np.zeros(pts.shape[0], dtype=np.int64), 0.0


def default_tolerance(end_loss: np.ndarray, drop: float) -> float:
    """``0.1 * m + 0.02 * min(drop, 5 m)`` with ``m`` the median ``|end loss|``.

    ``drop`` is the loss gained by training (median start loss minus median
    end loss). It is capped at five times the end loss: starts drawn far from
    the data (start losses in the thousands on a regression) must not make
    every barrier look small.
    """
    fin = end_loss[np.isfinite(end_loss)]
    m = float(np.median(np.abs(fin))) if fin.size else 0.0
    # 2% of the loss gained by training, after the 2% error barrier under which
    # Frankle et al. (2020) call two networks linearly connected (from memory)
    return float(0.1 * m + 0.02 * min(max(drop, 0.0), 5.0 * m))


class _Pairs:
    """Barriers measured so far between end points (rows) and representatives (columns)."""

    def __init__(
        self, problem: Any, syms: Symmetries | None, samples: int, call_size: int | None
    ) -> None:
        self.problem, self.syms, self.samples = problem, syms, samples
        self.call_size = call_size
        self.value: dict[tuple[int, int], float] = {}
        self.rep_of: dict[int, int] = {}  # end point -> the representative it is
        self.row_of: dict[int, int] = {}  # representative -> the end point it is

    def lead(self, k: int, r: int) -> None:
        """End point ``k`` becomes representative ``r``."""
        self.rep_of[k], self.row_of[r] = r, k
        self.value[(k, r)] = 0.0

    def measure(
        self, pairs: list[tuple[int, int]], pts: np.ndarray, reps: list[np.ndarray]
    ) -> None:
        todo = []
        for k, r in pairs:
            if (k, r) in self.value:
                continue
            # two representatives: the segment one way was measured the other way
            other = (self.row_of.get(r, -1), self.rep_of.get(k, -1))
            if other in self.value:
                self.value[(k, r)] = self.value[other]
            else:
                todo.append((k, r))
        if not todo:
            return
        ends = np.empty((len(todo), pts.shape[1]))
        for i, (k, r) in enumerate(todo):
            ends[i] = pts[k] if self.syms is None else self.syms.align(pts[k], reps[r])[0]
        starts = np.stack([reps[r] for _, r in todo])
        barrier, _, _ = segment_barriers(
            self.problem, starts, ends, samples=self.samples, call_size=self.call_size
        )
        for pr, b in zip(todo, barrier):
            self.value[pr] = float(b)

    def row(self, k: int, nreps: int) -> np.ndarray:
        return np.array([self.value.get((k, r), np.inf) for r in range(nreps)])


def connect_runs(
    problem: Any,
    runs: Any,
    *,
    tolerance: float | None = None,
    symmetries: Any = None,
    samples: int = 17,
    block: int = 128,
    include_unconverged: bool = True,
    call_size: int | None = None,
) -> Solutions:
    """Group end points into solutions joined by low straight segments.

    Args:
        problem: the problem.
        runs: :class:`~basinview.core.Runs` (their end points; diverged runs are
            left out), or end points as a ``(K, n)`` array or a list of pytrees.
        tolerance: largest barrier (loss units) that counts as connected.
            Default: ``0.1 * median |end loss| + 0.02 * (median start loss -
            median end loss)`` (the second term only for Runs: a path that
            gives back 2% of what training gained still counts as low).
        symmetries: declarations from :mod:`basinview.core.symmetries`; end
            points are aligned to each representative before the segment.
        samples: points along each segment (``t = 0`` and ``1`` included).
        block: end points compared with the representatives per batched call.
        include_unconverged: also group runs that spent their step budget.
        call_size: segments per compiled call (see
            :func:`~basinview.core.segments.segment_losses`): a fixed size
            compiles one program for any number of runs (the Explorer uses it).

    Warns:
        MinimaWarning: when no two end points are connected (every group has
            one member): the tolerance may be too tight, or the solutions are
            joined only by curved paths or through symmetries not declared.

    Examples:
        >>> import jax.numpy as jnp
        >>> from basinview.core import Problem
        >>> prob = Problem(lambda p: (p[0] ** 2 - 1) ** 2 + p[1] ** 2, jnp.zeros(2))
        >>> ends = [[-1.0, 0.0], [-0.99, 0.01], [1.0, 0.0]]
        >>> sol = connect_runs(prob, ends, tolerance=0.05)
        >>> sol.names, sol.label.tolist(), round(float(sol.barrier[0, 1]), 2)
        (('S1', 'S2'), [0, 0, 1], 1.0)

    References:
        Frankle et al. (2020); Garipov et al. (2018); Draxler et al. (2018);
        Ainsworth, Hayase & Srinivasa (2023) for the alignment.
    """
    samples = _check_samples(samples)
    if isinstance(block, bool) or not isinstance(block, (int, np.integer)) or block < 1:
        raise ParameterError(f"block must be a whole number >= 1; got {block!r}.")
    pts, loss, code, drop = _inputs(problem, runs, include_unconverged)
    syms = resolve_symmetries(problem, symmetries)
    if loss is None:
        loss = (
            segment_losses(problem, pts, pts, samples=3, call_size=call_size)[:, 0]
            if len(pts)
            else np.zeros(0)
        )
    finite = np.all(np.isfinite(pts), axis=1) & np.isfinite(loss)
    code = np.where((code == 0) & ~finite, DIVERGED_LABEL, code)
    cand = np.flatnonzero(code == 0)
    cand = cand[np.argsort(loss[cand], kind="stable")]
    if cand.size:
        warn_if_not_symmetric(syms, problem, pts[cand[0]])
    if tolerance is None:
        tolerance = default_tolerance(loss[cand], drop)
        if not tolerance > 0:
            raise ParameterError(
                "connect_runs: the end losses are all zero, so no default tolerance follows "
                "from them; pass tolerance= (the largest barrier, in loss units, that counts "
                "as connected)."
            )
    elif not (isinstance(tolerance, (int, float, np.floating)) and tolerance >= 0):
        raise ParameterError(f"tolerance must be a number >= 0 (loss units); got {tolerance!r}.")
    tol = float(tolerance)
    registry = solution_groups(problem)
    reps = [p for p in registry.points]
    rep_gid = list(registry.owners)
    rep_row = [-1] * len(reps)  # the end point each representative is (-1: registered earlier)
    pairs = _Pairs(problem, syms, samples, call_size)
    # 1. representatives: each block against the current ones; the rest lead new groups
    for lo in range(0, cand.size, int(block)):
        part = [int(k) for k in cand[lo : lo + int(block)]]
        pairs.measure([(k, r) for k in part for r in range(len(reps))], pts, reps)
        left = [k for k in part if not np.any(pairs.row(k, len(reps)) <= tol)]
        while left:
            lead, left = left[0], left[1:]
            reps.append(pts[lead])
            rep_gid.append(-1)
            rep_row.append(lead)
            r = len(reps) - 1
            pairs.lead(lead, r)
            pairs.measure([(k, r) for k in left], pts, reps)
            left = [k for k in left if pairs.value[(k, r)] > tol]
    # 2. every end point against every representative: chains and cross-group barriers
    nreps = len(reps)
    pairs.measure([(int(k), r) for k in cand for r in range(nreps)], pts, reps)
    rows = np.array([pairs.row(int(k), nreps) for k in cand]).reshape(cand.size, nreps)
    parent = list(range(nreps))

    def find(r: int) -> int:
        while parent[r] != r:
            parent[r] = parent[parent[r]]
            r = parent[r]
        return r

    first_rep: dict[int, int] = {}
    for r, gid in enumerate(rep_gid):  # groups already known to be one stay one
        if gid >= 0:
            a, b = find(first_rep.setdefault(gid, r)), find(r)
            parent[max(a, b)] = min(a, b)
    rep_loss = np.array(
        [registry.losses[r] if rep_row[r] < 0 else loss[rep_row[r]] for r in range(nreps)]
    ).reshape(nreps)
    for i in range(cand.size):
        # A chain joins two groups only through an end point at their level: a run that
        # stopped high on a slope reaches both valleys downhill without a barrier.
        hit = np.flatnonzero((rows[i] <= tol) & (np.abs(rep_loss - loss[cand[i]]) <= tol))
        for r in hit[1:]:
            a, b = find(int(hit[0])), find(int(r))
            if a != b:
                parent[max(a, b)] = min(a, b)
    nearest = np.argmin(rows, axis=1) if nreps else np.zeros(0, dtype=int)
    comp_of_cand = np.array([find(int(r)) for r in nearest], dtype=np.int64)
    comps = sorted(set(comp_of_cand.tolist()), key=lambda c: loss[cand[comp_of_cand == c][0]])
    # identities: a component keeps the earliest registered id among its representatives
    gid_of: dict[int, int] = {}
    unkept = 0
    for c in comps:
        members = [r for r in range(nreps) if find(r) == c]
        known = [rep_gid[r] for r in members if rep_gid[r] >= 0]
        gid = registry.merge(known) if known else registry.new_group()
        gid_of[c] = gid
        for r in members:
            if rep_gid[r] < 0 and not registry.add(gid, reps[r], loss[rep_row[r]]):
                unkept += 1
    g = len(comps)
    index = {c: j for j, c in enumerate(comps)}
    label = np.where(code != 0, code, 0).astype(np.int64)
    label[cand] = [index[c] for c in comp_of_cand]
    run_barrier = np.full(label.size, np.nan)
    run_barrier[cand] = rows[np.arange(cand.size), nearest] if cand.size else []
    rep_comp = np.array([index.get(find(r), -1) for r in range(nreps)], dtype=np.int64)
    barrier = np.full((g, g), np.inf)
    if g and cand.size:
        colmin = np.stack(
            [
                rows[:, rep_comp == b].min(axis=1)
                if np.any(rep_comp == b)
                else np.full(cand.size, np.inf)
                for b in range(g)
            ],
            axis=1,
        )
        # Between groups, only end points at their group's lowest level count: one that
        # stopped high on a slope reaches the other valley downhill, with no barrier.
        floor = np.array([loss[cand][label[cand] == j].min() for j in range(g)])
        level = loss[cand] - floor[label[cand]] <= tol
        np.minimum.at(barrier, label[cand][level], colmin[level])
        barrier = np.minimum(barrier, barrier.T)
    count = np.array([np.sum(label == j) for j in range(g)], dtype=np.int64)
    total = max(label.size, 1)
    low, high = wilson_interval(count, label.size)
    inside = np.array([np.nanmax(run_barrier[label == j]) for j in range(g)])
    barrier[np.arange(g), np.arange(g)] = inside
    copies = np.ones(g, dtype=np.int64)
    if syms is not None:
        for j, c in enumerate(comps):
            principal = min(r for r in range(nreps) if find(r) == c)
            keys = {syms.align(pts[k], reps[principal])[1] for k in cand[comp_of_cand == c]}
            copies[j] = len(keys)
    best = np.array([pts[cand[comp_of_cand == c][0]] for c in comps]).reshape(g, problem.size)
    member_loss = [loss[label == j] for j in range(g)]
    ids = np.array([gid_of[c] for c in comps], dtype=np.int64)
    if unkept:
        warnings.warn(
            f"connect_runs: this problem's registry of solution names is full "
            f"({len(registry.owners)} representatives), so {unkept} new solution"
            f"{'s are' if unkept != 1 else ' is'} named for this call only; a later call may "
            "name them differently (memory and comparison cost stay bounded).",
            MinimaWarning,
            stacklevel=2,
        )
    if cand.size > 1 and g == cand.size:
        warnings.warn(
            f"connect_runs: none of the {cand.size} end points is connected to another "
            f"within tolerance {tol:.3g}, so every group has one member. Loosen tolerance=, "
            "declare the model's symmetries (symmetries=...), or look for curved paths "
            "(curved_path); a high straight segment does not prove that two runs found "
            "different solutions.",
            MinimaWarning,
            stacklevel=2,
        )
    return Solutions(
        label=label,
        names=tuple(group_name(i) for i in ids),
        colour_index=ids,
        count=count,
        share=count / total,
        share_low=np.asarray(low, dtype=np.float64).reshape(g),
        share_high=np.asarray(high, dtype=np.float64).reshape(g),
        loss_min=np.array([v.min() for v in member_loss]),
        loss_median=np.array([np.median(v) for v in member_loss]),
        loss_max=np.array([v.max() for v in member_loss]),
        barrier_inside=inside,
        barrier=barrier,
        copies=copies,
        representatives=np.array([np.sum(rep_comp == j) for j in range(g)], dtype=np.int64),
        best=best,
        run_barrier=run_barrier,
        end_loss=loss,
        tolerance=tol,
        samples=samples,
        symmetries=() if syms is None else syms.names,
    )

"""One view computed by several processes: the batch axis split over all of them.

Grid points of a surface and runs of a sweep or basin map are independent,
so each process of a :class:`~basinview.core.cluster.Cluster` computes a
contiguous share of them on its own devices (with the single-process
engine: :func:`~basinview.core.evaluate_points`, :func:`~basinview.core.descend`)
and the shares are gathered in process order. Shares are whole *units*: a
chunk of grid points (the points vectorised together) or a call's worth of
runs per device (``descent_runs_per_call``), both taken from the cost model
for the **whole** view, never for one process's share. Every run and grid
point therefore sits at the same place in a program of the same shape as
in a one-process run, and the numbers do not depend on the process count.

Before computing, and before every gather, the processes agree
(:func:`~basinview.core.cluster.agree`): a process whose share failed
reports its error, and every process stops with it, instead of waiting for
rows that will never come.
"""

from __future__ import annotations

import dataclasses
import time
from collections.abc import Callable, Mapping
from typing import Any, TypeVar

import jax
import numpy as np

from .analysis import Analysis, compute_minima, compute_profile, record_view
from .basins import BasinMap
from .checks import check_resolution
from .cluster import Cluster, agree, gather_rows, unit_share
from .cost_model import DescentSizes, bucket, chunk_size_for, descent_sizes
from .descent import Runs, descend
from .descent_config import descent_config
from .errors import ClusterError
from .minima import find_minima
from .optimizers import get_rule
from .planes import Plane
from .points import evaluate_points, points_sizes
from .problem import Problem
from .runs import STATUSES
from .starts import Starts, grid_starts
from .surface import Surface, span_ranges
from .view import ViewSpec

__all__ = ["analyse_shared", "shared_basin_map", "shared_runs", "shared_surface"]

T = TypeVar("T")


class _Clock:
    """Seconds since the previous call, stored under each stage's name."""

    def __init__(self, into: dict[str, float] | None) -> None:
        self.into, self.last = into, time.perf_counter()

    def __call__(self, stage: str) -> None:
        now = time.perf_counter()
        if self.into is not None:
            self.into[stage] = round(now - self.last, 4)
        self.last = now


def _local(cluster: Cluster, what: str, fn: Callable[[], T]) -> T:
    """``fn()`` on this process, then agreement that every process's share succeeded."""
    result: Any = None
    error = ""
    try:
        result = fn()
    except ClusterError:
        raise
    except Exception as exc:  # reported to every process, which all stop with it
        error = " ".join(str(exc).split()) or type(exc).__name__
        if cluster.process_count == 1:
            raise
    agree(cluster, what, "", error)
    return result


def shared_surface(
    problem: Problem,
    plane: Plane,
    cluster: Cluster,
    *,
    span: Any = 1.0,
    resolution: Any = 51,
    sizes: Mapping[str, int] | None = None,
) -> Surface:
    """:func:`~basinview.core.evaluate_surface` with the grid points split over the processes.

    Every process returns the whole surface. ``sizes`` (``surface_chunk``)
    reuses a recorded chunk; otherwise the cost model's chunk for the problem.
    """
    (a0, a1), (b0, b1) = span_ranges(span, plane.centre)
    ra, rb = check_resolution(resolution)
    a, b = np.linspace(a0, a1, ra), np.linspace(b0, b1, rb)
    aa, bb = np.meshgrid(a, b)
    ab = np.stack([aa.ravel(), bb.ravel()], axis=1).astype(problem.dtype)
    total = ab.shape[0]
    chunk = (
        int(sizes["surface_chunk"])
        if sizes and "surface_chunk" in sizes
        else chunk_size_for(problem)
    )
    lo, hi = unit_share(-(-total // chunk), cluster)
    plo, phi = min(lo * chunk, total), min(hi * chunk, total)

    def compute() -> np.ndarray:
        if phi <= plo:
            return np.zeros(0, problem.dtype)
        return evaluate_points(
            problem, plane.origin, plane.d1, plane.d2, ab[plo:phi], chunk_size=chunk, progress=False
        )

    local = _local(cluster, "evaluating the surface", compute)
    loss = gather_rows(cluster, {"loss": local}, "gathering the surface")["loss"]
    used = points_sizes(problem, total, chunk_size=chunk).record()
    return Surface(plane=plane, a=a, b=b, loss=loss.reshape(rb, ra), sizes=used)


def _row_fields(runs: Runs) -> dict[str, np.ndarray]:
    """The per-run arrays of ``runs`` (status as codes), by field name."""
    m = len(runs)
    out: dict[str, np.ndarray] = {}
    for f in dataclasses.fields(runs):
        value = getattr(runs, f.name)
        if f.name in ("starts", "start_index", "hyper") or not isinstance(value, np.ndarray):
            continue
        if value.shape[:1] != (m,):
            continue
        if f.name == "status":
            value = np.array([STATUSES.index(s) for s in value], np.int8).reshape(m)
        out[f.name] = value
    return out


def shared_runs(
    problem: Problem,
    starts: Starts,
    cluster: Cluster,
    *,
    optimizer: Any = "gradient_descent",
    learning_rate: Any = 0.01,
    hyper: Mapping[str, Any] | None = None,
    steps: int = 200,
    plane: Plane | None = None,
    grad_tol: float | None = None,
    loss_tol: float | None = None,
    divergence_factor: float = 1e6,
    batch_size: int | None = None,
    seed: int = 0,
    sizes: Mapping[str, int] | None = None,
) -> Runs:
    """:func:`~basinview.core.descend` with the starts split over the processes.

    Runs are numbered as :func:`descend` numbers them (every start at the
    first hyper-parameter setting, then the next setting). Each process runs
    its share of the starts at every setting; every process returns all runs.
    ``sizes`` (``descent_runs_per_call``, ``descent_group``) reuses recorded
    program sizes; otherwise the cost model's for the whole sweep.
    """
    rule = get_rule(optimizer)
    config = descent_config(
        rule, problem.data, problem.dtype, learning_rate=learning_rate, hyper=hyper,
        steps=steps, grad_tol=grad_tol, loss_tol=loss_tol,
        divergence_factor=divergence_factor, batch_size=batch_size, seed=seed, min_runs=1,
    )  # fmt: skip
    if config.batch_size is not None and cluster.process_count > 1:
        raise ClusterError(
            "minibatch views (batch_size) are seeded per start, and a share's starts would be "
            "numbered from 0 on every process; run a minibatch view in one process (with all "
            "its cores: --devices), or record the view without batch_size."
        )
    settings = config.settings()
    n_starts = len(starts)
    if sizes and "descent_runs_per_call" in sizes:
        plan = DescentSizes.from_record(sizes)
    else:
        share = 1.0
        if config.batch_size is not None:
            rows = jax.tree_util.tree_leaves(problem.data)[0].shape[0]
            share = config.batch_size / rows
        steps_b = bucket(config.steps, minimum=8)
        plan = descent_sizes(problem, n_starts * len(settings), steps_b, share)
    per = plan.runs_per_call
    lo, hi = unit_share(-(-n_starts // per), cluster)
    slo, shi = min(lo * per, n_starts), min(hi * per, n_starts)
    common: dict[str, Any] = dict(
        optimizer=rule, steps=config.steps, plane=plane, grad_tol=config.grad_tol,
        loss_tol=config.loss_tol, divergence_factor=config.divergence_factor,
        batch_size=config.batch_size, seed=config.seed, sizes=plan.record(), progress=False,
    )  # fmt: skip

    def compute() -> dict[str, np.ndarray]:
        rows: dict[str, np.ndarray] = {}
        for k, setting in enumerate(settings):
            rate = setting["learning_rate"]
            others = {n: v for n, v in setting.items() if n != "learning_rate"}
            # A process without starts still runs one (and keeps none), so that it
            # knows the shapes of the rows it contributes.
            pts = starts.points[slo:shi] if shi > slo else starts.points[:1]
            part = descend(problem, pts, learning_rate=rate, hyper=others, **common)
            for name, value in _row_fields(part).items():
                rows[f"{k:04d}:{name}"] = value[: shi - slo]
        return rows

    local = _local(cluster, "running descent", compute)
    every = gather_rows(cluster, local, "gathering the runs")
    names = sorted({key.split(":", 1)[1] for key in every})
    joined = {
        n: np.concatenate([every[f"{k:04d}:{n}"] for k in range(len(settings))]) for n in names
    }
    joined["status"] = np.asarray(STATUSES, dtype=object)[joined["status"].astype(np.int64)]
    known = {f.name for f in dataclasses.fields(Runs)}
    return Runs(
        rule=rule.name,
        hyper={
            name: np.repeat([s[name] for s in settings], n_starts).astype(np.float64)
            for name in rule.hyper
        },
        start_index=np.tile(np.arange(n_starts), len(settings)),
        starts=np.asarray(starts.points),
        plane=plane,
        config=config.with_sizes(plan),
        **{k: v for k, v in joined.items() if k in known},
    )


def shared_basin_map(
    problem: Problem,
    plane: Plane,
    cluster: Cluster,
    *,
    span: Any = 1.0,
    resolution: Any = 41,
    optimizer: Any = "gradient_descent",
    learning_rate: float = 0.01,
    hyper: dict[str, Any] | None = None,
    steps: int = 1000,
    grad_tol: float | None = None,
    loss_tol: float | None = None,
) -> BasinMap | None:
    """:func:`~basinview.core.basin_map` with the grid of starts split over the processes.

    The critical points are found on process 0 only (from all the runs);
    other processes return None.
    """
    (a0, a1), (b0, b1) = span_ranges(span, plane.centre)
    ra, rb = check_resolution(resolution)
    starts = grid_starts(plane, span=((a0, a1), (b0, b1)), resolution=(ra, rb))
    runs = shared_runs(
        problem, starts, cluster, optimizer=optimizer, learning_rate=float(learning_rate),
        hyper=hyper, steps=steps, plane=plane, grad_tol=grad_tol, loss_tol=loss_tol,
    )  # fmt: skip
    if not cluster.is_writer:
        return None
    minima = find_minima(problem, runs)
    return BasinMap(
        plane=plane,
        a=np.linspace(a0, a1, ra),
        b=np.linspace(b0, b1, rb),
        label=minima.assignment.reshape(rb, ra),
        minima=minima,
        runs=runs,
    )


def analyse_shared(
    problem: Problem,
    view: ViewSpec,
    cluster: Cluster,
    *,
    basin_resolution: Any = 0,
    basin_rate: float | None = None,
    minima: bool = True,
    profile: bool = True,
    timings: dict[str, float] | None = None,
) -> Analysis | None:
    """:func:`~basinview.core.analyse` of ``view`` (surface, runs, basin map) over the processes.

    Process 0 returns the :class:`Analysis` (minima and the profile between
    the two lowest minima found on it, from all the runs); the others None.
    No step-size sweep. ``timings``, if given, receives the seconds of each
    stage (``surface``, ``runs``, ``basin_map``, ``minima``) on this process.
    """
    clock = _Clock(timings)
    surface = shared_surface(
        problem, view.plane, cluster, span=view.span, resolution=view.resolution,
        sizes=view.sizes,
    )  # fmt: skip
    clock("surface")
    runs = shared_runs(
        problem, view.starts, cluster, optimizer=view.optimizer,
        learning_rate=list(view.learning_rate), hyper={k: list(v) for k, v in view.hyper.items()},
        steps=view.steps, plane=view.plane, grad_tol=view.grad_tol, loss_tol=view.loss_tol,
        divergence_factor=view.divergence_factor, batch_size=view.batch_size, seed=view.seed,
        sizes=view.sizes,
    )  # fmt: skip
    clock("runs")
    basins = None
    if basin_resolution:
        rate = basin_rate if basin_rate is not None else min(view.learning_rate)
        basins = shared_basin_map(
            problem, view.plane, cluster, span=view.span, resolution=basin_resolution,
            optimizer=view.optimizer, learning_rate=rate,
            hyper=view.single_hyper(None, "a basin map"), steps=view.steps,
            grad_tol=view.grad_tol, loss_tol=view.loss_tol,
        )  # fmt: skip
        clock("basin_map")
    if not cluster.is_writer:
        return None
    found = compute_minima(problem, runs) if minima else None
    seg = compute_profile(problem, found) if profile else None
    clock("minima")
    return Analysis(
        settings=record_view(problem, view, runs, surface=surface),
        plane=view.plane,
        surface=surface,
        starts=view.starts,
        runs=runs,
        minima=found,
        basin_map=basins,
        profile=None if seg is None else seg[0],
        profile_labels=None if seg is None else seg[1],
    )

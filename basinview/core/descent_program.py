"""The compiled program of a batch of descent runs: one run's step, vmapped.

:func:`build_program` returns a jitted function stepping ``n_runs`` runs
(per device) for up to ``n_steps`` steps. The step is written for ONE run
(:func:`run_step`: evaluate, update, check convergence and divergence,
freeze once stopped) and batched with ``vmap`` (or ``lax.map`` over groups
of runs). A ``while_loop`` steps all runs together until the step budget
is spent or every run has stopped; the loop carries a :class:`LoopState`.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from .optimizers import Oracle, UpdateRule
from .sharding import shard_batch
from .sharpness import SharpnessTracking, loop_tracker

__all__ = [
    "LoopState",
    "Records",
    "RunFunctions",
    "RunState",
    "Segment",
    "blank_segment_inputs",
    "build_program",
    "build_segment_program",
    "run_functions",
    "run_keys",
    "segment_state_shapes",
]

CODE_RUNNING, CODE_CONVERGED, CODE_DIVERGED = 0, 1, 2  # index into STATUSES


class RunState(NamedTuple):
    """The state of one run (batched: every field gains a leading run axis)."""

    theta: jax.Array
    opt_state: Any
    loss: jax.Array
    grad: jax.Array
    status: jax.Array  # int32 code: 0 running / max_steps, 1 converged, 2 diverged
    running: jax.Array  # bool
    stop: jax.Array  # int32 steps taken when it stopped
    start_loss: jax.Array  # loss at iterate 0
    threshold: jax.Array  # rise above start_loss at which the run diverges


class Row(NamedTuple):
    """What one step records for one run (NaN once the run has stopped)."""

    loss: jax.Array
    grad_norm: jax.Array
    a: jax.Array
    b: jax.Array
    off_plane: jax.Array
    cosine: jax.Array


class Records(NamedTuple):
    """Recorded series, ``(T + 1, runs)`` each (``cosine``: ``(T, runs)``; the
    sharpness records ``(T // k + 1, runs)``, or ``(0, runs)`` when not tracked)."""

    loss: jax.Array
    grad_norm: jax.Array
    a: jax.Array
    b: jax.Array
    off_plane: jax.Array
    cosine: jax.Array
    sharpness: jax.Array
    pre_sharpness: jax.Array


class LoopState(NamedTuple):
    """The carry of the step loop."""

    step: jax.Array
    runs: RunState
    records: Records
    probes: Any  # sharpness tracking: (vector, preconditioned vector) per run, or ()


class Shared(NamedTuple):
    """Arguments every run of a call shares (host arrays until put on the devices)."""

    max_steps: Any
    tols: tuple[Any, ...]  # grad_tol, loss_tol, divergence factor
    origin: Any
    proj: Any
    dirs: Any
    seed: Any


class RunFunctions(NamedTuple):
    """The per-run pieces of the loop, written for ONE run (see :func:`run_functions`)."""

    run_start: Callable[..., Any]
    run_step: Callable[..., Any]
    batched: Callable[..., Any]


def run_functions(
    flat_loss: Callable[..., jax.Array],
    rule: UpdateRule,
    n_runs: int,
    batch: int | None,
    group: int = 0,
) -> RunFunctions:
    """One run's start and step, and how a batch of ``n_runs`` is vectorised.

    Shared by the whole-budget program (:func:`build_program`) and the
    segment program (:func:`build_segment_program`), so both compute the very
    same arithmetic per run.
    """
    vg = jax.value_and_grad(flat_loss)

    def batched(fn: Callable[..., Any], *args: Any) -> Any:
        if not group or group >= n_runs:
            return jax.vmap(fn)(*args)
        return jax.lax.map(lambda a: fn(*a), args, batch_size=group)

    def data_for(key: jax.Array, k: jax.Array, data: Any) -> Any:
        if batch is None:
            return data
        n_rows = jax.tree_util.tree_leaves(data)[0].shape[0]
        idx = jax.random.randint(jax.random.fold_in(key, k), (batch,), 0, n_rows)
        return jax.tree_util.tree_map(lambda d: d[idx], data)

    def project(theta: jax.Array, sh: Shared) -> tuple[jax.Array, jax.Array]:
        diff = theta - sh.origin
        ab = sh.proj @ diff
        return ab, jnp.linalg.norm(diff - ab @ sh.dirs)

    def run_start(theta, hyper, active, key, sh, data):
        """One run at iterate 0: its state and its first recorded row."""
        grad_tol, _loss_tol, div_factor = sh.tols
        f0, g0 = vg(theta, data_for(key, 0, data))
        gn0 = jnp.linalg.norm(g0)
        ab, off = project(theta, sh)
        bad = ~jnp.isfinite(f0) | ~jnp.isfinite(gn0)
        status = jnp.where(bad, CODE_DIVERGED, jnp.where(gn0 <= grad_tol, CODE_CONVERGED, 0))
        state = RunState(
            theta=theta,
            opt_state=rule.init(theta, hyper),
            loss=f0,
            grad=g0,
            status=status.astype(jnp.int32),
            running=active & (status == 0),
            stop=jnp.int32(0),
            start_loss=f0,
            threshold=div_factor * jnp.maximum(jnp.abs(f0), 1.0),
        )
        return state, Row(f0, gn0, ab[0], ab[1], off, jnp.array(jnp.nan, theta.dtype))

    def run_step(rs: RunState, hyper, key, k, sh: Shared, data) -> tuple[RunState, Row]:
        """One step of one run; a stopped run keeps its state and records NaN."""
        grad_tol, loss_tol, _div = sh.tols
        batch_data = data_for(key, k, data)

        def partial(th, i):
            e = jnp.zeros_like(th).at[i].set(1)
            return jax.jvp(lambda t: flat_loss(t, batch_data), (th,), (e,))[1]

        theta1, opt1 = rule.step(rs.theta, rs.grad, rs.opt_state, hyper, Oracle(partial))
        f1, g1 = vg(theta1, data_for(key, k + 1, data))
        gn1, gn = jnp.linalg.norm(g1), jnp.linalg.norm(rs.grad)
        diverged = ~jnp.isfinite(f1) | ~jnp.isfinite(gn1) | (f1 - rs.start_loss > rs.threshold)
        converged = (gn1 <= grad_tol) & (
            jnp.abs(f1 - rs.loss) <= loss_tol * jnp.maximum(1.0, jnp.abs(f1))
        )
        new_status = jnp.where(diverged, CODE_DIVERGED, jnp.where(converged, CODE_CONVERGED, 0))
        on = rs.running

        def keep(new, old):
            return jnp.where(on, new, old)

        ab, off = project(theta1, sh)
        nan = jnp.array(jnp.nan, theta1.dtype)
        cosine = jnp.sum(rs.grad * g1) / (gn * gn1)
        row = Row(*(jnp.where(on, x, nan) for x in (f1, gn1, ab[0], ab[1], off, cosine)))
        new = RunState(
            theta=keep(theta1, rs.theta),
            opt_state=jax.tree_util.tree_map(keep, opt1, rs.opt_state),
            loss=keep(f1, rs.loss),
            grad=keep(g1, rs.grad),
            status=keep(new_status, rs.status).astype(jnp.int32),
            running=on & (new_status == 0),
            stop=keep(k + 1, rs.stop).astype(jnp.int32),
            start_loss=rs.start_loss,
            threshold=rs.threshold,
        )
        return new, row

    return RunFunctions(run_start, run_step, batched)


def run_keys(seed: jax.Array, start_index: jax.Array) -> jax.Array:
    """The minibatch key of each run: its start's, so runs from one start see one stream."""
    base = jax.random.key(seed)
    return jax.vmap(lambda i: jax.random.fold_in(base, i))(start_index)


def build_program(
    flat_loss: Callable[..., jax.Array],
    rule: UpdateRule,
    n_runs: int,
    n_steps: int,
    batch: int | None,
    devices: tuple[Any, ...],
    group: int = 0,
    tracking: SharpnessTracking | None = None,
) -> Any:
    """Compile-once function running ``n_runs`` runs per device for up to ``n_steps`` steps.

    The function takes ``(theta0, hyper, active, shared, start_index, data)``
    and returns ``(final theta, status codes, stop steps, Records[,
    preconditioner])``. Runs are vectorised ``group`` at a time (0: all).
    With several devices each device runs its share in its own loop.
    With ``tracking``, the loop also records the sharpness every
    ``tracking.every`` steps (see :mod:`basinview.core.sharpness`).
    """
    fns = run_functions(flat_loss, rule, n_runs, batch, group)
    run_start, _run_step, batched = fns

    def program(theta0, hyper, active, sh: Shared, start_index, data):
        keys = run_keys(sh.seed, start_index)
        runs0, row0 = batched(
            lambda t, h, a, key: run_start(t, h, a, key, sh, data), theta0, hyper, active, keys
        )
        tracker = loop_tracker(flat_loss, rule, tracking, batched, n_runs, n_steps)
        probes, sharp0, pre0 = tracker.start(runs0.theta, hyper, data)
        records = _records(row0, n_runs, n_steps, sharp0, pre0)
        init = LoopState(jnp.int32(0), runs0, records, probes)
        body = _loop_body(fns, tracker, hyper, keys, sh, data, 0, 0)
        end = jax.lax.while_loop(_until(sh.max_steps), body, init)
        runs = end.runs
        stop = jnp.where(runs.running, end.step, runs.stop)
        out = (runs.theta, runs.status, stop, end.records)
        if rule.preconditioner is None:
            return out
        return (*out, jax.vmap(rule.preconditioner)(runs.opt_state, hyper))

    # Batch axis of each argument / output: runs are split, the rest is whole.
    in_batch = (0, 0, 0, None, 0, None)
    out_batch = (0, 0, 0, 1) if rule.preconditioner is None else (0, 0, 0, 1, 0)
    return shard_batch(program, devices, in_batch, out_batch)


def _records(row0: Row, n_runs: int, length: int, sharp0: Any, pre0: Any) -> Records:
    """Record buffers of ``length`` steps: NaN, with ``row0`` as row 0."""

    def series(first: jax.Array) -> jax.Array:
        return jnp.full((length + 1, n_runs), jnp.nan, first.dtype).at[0].set(first)

    cosine = jnp.full((length, n_runs), jnp.nan, row0.loss.dtype)
    return Records._make([*(series(x) for x in row0[:5]), cosine, sharp0, pre0])


def _until(end: jax.Array) -> Callable[[LoopState], jax.Array]:
    def cond(ls: LoopState) -> jax.Array:
        return (ls.step < end) & jnp.any(ls.runs.running)

    return cond


def _loop_body(
    fns: RunFunctions, tracker: Any, hyper: Any, keys: Any, sh: Shared, data: Any,
    first_step: Any, first_record: Any,
) -> Callable[[LoopState], LoopState]:  # fmt: skip
    """One step of every run, recorded at row ``k + 1 - first_step`` of the buffers
    (the sharpness at record ``j - first_record``)."""

    def body(ls: LoopState) -> LoopState:
        k = ls.step
        runs, row = fns.batched(
            lambda rs, h, key: fns.run_step(rs, h, key, k, sh, data), ls.runs, hyper, keys
        )
        rec = ls.records
        i = k - first_step
        records = Records._make(
            [
                *(r.at[i + 1].set(x) for r, x in zip(rec[:5], row[:5])),
                rec.cosine.at[i].set(row.cosine),
                rec.sharpness,
                rec.pre_sharpness,
            ]
        )
        probes, sharp, pre = tracker.step(
            k, ls.runs, runs, hyper, ls.probes, rec.sharpness, rec.pre_sharpness, data,
            offset=first_record,
        )  # fmt: skip
        records = records._replace(sharpness=sharp, pre_sharpness=pre)
        return LoopState(k + 1, runs, records, probes)

    return body


class Segment(NamedTuple):
    """What a segment program returns (batched over its runs)."""

    runs: RunState
    probes: Any
    records: Records  # rows: iterates first_step .. first_step + length
    end: jax.Array  # (devices,) the step each device's loop stopped at
    preconditioner: Any  # (runs, n), or () for rules without one


def build_segment_program(
    flat_loss: Callable[..., jax.Array],
    rule: UpdateRule,
    n_runs: int,
    length: int,
    batch: int | None,
    devices: tuple[Any, ...],
    group: int = 0,
    tracking: SharpnessTracking | None = None,
) -> Any:
    """Compile-once function stepping ``n_runs`` runs per device by at most ``length`` steps.

    The function takes ``(runs, probes, hyper, active, start_index, first_step,
    shared, data)`` and returns a :class:`Segment`: the runs after steps
    ``first_step .. first_step + length - 1`` (or fewer: the budget or every
    run stopped), with their records in buffers of ``length + 1`` rows (row
    ``i``: iterate ``first_step + i``). With ``first_step == 0`` the runs
    start from ``runs.theta`` (``active`` marks the real ones; the rest of
    ``runs`` and ``probes`` are ignored, see :func:`blank_segment_inputs`).
    Each run's arithmetic is that of :func:`build_program`'s loop, so a run
    gives the same numbers whichever runs share its segment. ``length`` must
    be a multiple of ``tracking.every``.
    """
    fns = run_functions(flat_loss, rule, n_runs, batch, group)
    every = tracking.every if tracking is not None else 1
    if length % every:
        raise ValueError(f"segment length {length} is not a multiple of {every}")

    def program(runs, probes, hyper, active, start_index, first_step, sh: Shared, data):
        keys = run_keys(sh.seed, start_index)
        tracker = loop_tracker(flat_loss, rule, tracking, fns.batched, n_runs, length)
        dtype = runs.theta.dtype
        n_rec = length // every + 1

        def fresh(_: Any) -> tuple[Any, ...]:
            runs0, row0 = fns.batched(
                lambda t, h, a, key: fns.run_start(t, h, a, key, sh, data),
                runs.theta, hyper, active, keys,
            )  # fmt: skip
            probes0, sharp0, pre0 = tracker.start(runs0.theta, hyper, data)
            return runs0, probes0, _records(row0, n_runs, length, sharp0, pre0)

        def resume(_: Any) -> tuple[Any, ...]:
            nan = jnp.full((n_rec if tracking is not None else 0, n_runs), jnp.nan, dtype)
            row = Row(*(jnp.full((n_runs,), jnp.nan, dtype) for _ in Row._fields))
            return runs, probes, _records(row, n_runs, length, nan, nan)

        runs1, probes1, records = jax.lax.cond(first_step == 0, fresh, resume, None)
        body = _loop_body(fns, tracker, hyper, keys, sh, data, first_step, first_step // every)
        init = LoopState(first_step, runs1, records, probes1)
        end = jax.lax.while_loop(_until(jnp.minimum(first_step + length, sh.max_steps)), body, init)
        pre = (
            ()
            if rule.preconditioner is None
            else jax.vmap(rule.preconditioner)(end.runs.opt_state, hyper)
        )
        return Segment(end.runs, end.probes, end.records, end.step[None], pre)

    in_batch = (0, 0, 0, 0, 0, None, None, None)
    # runs, probes, records (time-major), loop ends, preconditioner
    out_batch: Any = Segment._make([0, 0, 1, 0, () if rule.preconditioner is None else 0])
    return shard_batch(program, devices, in_batch, out_batch)


def segment_state_shapes(
    flat_loss: Callable[..., jax.Array],
    rule: UpdateRule,
    batch: int | None,
    args: tuple[Any, ...],
) -> RunState:
    """Shapes and dtypes of ONE run's :class:`RunState` (no run axis).

    ``args`` are ``(theta0, hyper, active, start_index, shared, data)`` of one
    run (arrays or shape structs); its start is traced, not compiled or run.
    """

    def start(theta0, hyper, active, start_index, sh, data):
        fns = run_functions(flat_loss, rule, 1, batch)
        key = run_keys(sh.seed, start_index[None])[0]
        return fns.run_start(theta0, hyper, active, key, sh, data)[0]

    return jax.eval_shape(start, *args)


def blank_segment_inputs(
    shapes: RunState, theta0: np.ndarray, rule: UpdateRule, tracking: SharpnessTracking | None
) -> tuple[RunState, Any]:
    """``(runs, probes)`` for a first segment: ``theta0`` (``(runs, n)``) and zeros of
    the shapes the program carries (one run's: :func:`segment_state_shapes`); a first
    segment reads only ``theta``."""
    n_runs = theta0.shape[0]
    runs = jax.tree_util.tree_map(lambda x: np.zeros((n_runs, *x.shape), x.dtype), shapes)
    runs = runs._replace(theta=np.asarray(theta0))
    adaptive = rule.preconditioner is not None
    probes = () if tracking is None else tuple(np.zeros_like(theta0) for _ in range(1 + adaptive))
    return runs, probes

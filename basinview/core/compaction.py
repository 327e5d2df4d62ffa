"""Work proportional to live runs: descent in segments, live runs gathered between them.

A run that converges or diverges is frozen by masking, but in one compiled
loop it still costs a step until the slowest run of its call stops. With
compaction, :func:`~basinview.core.descend` runs the step budget in
*segments* of ``length`` steps (:func:`segment_length`). After each segment
the runs still running are gathered on the host and packed into fewer,
smaller calls; the records of the frozen ones are already on the host and
stay there. Sizes come from a fixed ladder (:func:`size_ladder`: the call
size halved, down to the vectorisation width and the padding floor), so a
sweep compiles at most one segment program per rung, and any later sweep
reuses them.

Why a width: XLA's CPU kernels round differently for different batch widths
(a run vectorised with 16 others and with 2048 others differs in the last
bits; measured here for matrix and element-wise forms alike), but the same
width gives the same bits whatever the run's position or neighbours. With
the default sizes (``descent_group`` 0: a call's runs vectorised all at
once) calls therefore never shrink: the live runs of many calls are packed
into fewer full calls. ``compact=True`` on a sweep without recorded sizes
vectorises in groups of an eighth of a call (:func:`compaction_group`,
recorded in ``runs.config.sizes``), so a call can shrink to two groups.

Each run's arithmetic is the same as in the whole-budget loop
(:mod:`basinview.core.descent_program` builds both from one run's step, at
the same vectorisation width), and the first segment splits the runs into
exactly the calls the whole-budget engine uses. Results (losses, paths,
statuses, stop steps, final iterates, optimiser preconditioners, sharpness
records, minibatch streams) are therefore identical, bit for bit, to those
of ``compact=False`` with the same sizes.

When it pays (:func:`compaction_pays`): the sweep must be long enough to
have segment boundaries, its calls must have room to shrink, and it must be
large enough (``COMPACT_MIN_FLOPS`` of value-and-gradient work by the cost
model) that a segment's fixed costs (a dispatch, a host round trip, a
gather) and a first compile per rung are small beside the work saved. At a
boundary the live runs are compacted when the new layout holds at most
``COMPACT_SHARE`` of the current capacity; calls whose runs have all
stopped are dropped at every boundary.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import jax
import numpy as np

from ._tuning import progress_counter
from .cost_model import loss_cost
from .descent_program import (
    Segment,
    blank_segment_inputs,
    build_segment_program,
    segment_state_shapes,
)
from .sharpness import SharpnessTracking

__all__ = [
    "COMPACT_MIN_FLOPS",
    "COMPACT_SHARE",
    "SEGMENT_MIN_STEPS",
    "compaction_group",
    "compaction_pays",
    "descend_in_segments",
    "run_segments",
    "segment_length",
    "size_ladder",
]

SEGMENT_MIN_STEPS = 32
"""Shortest segment: a segment's fixed costs must stay small beside its steps."""
COMPACT_SHARE = 0.5
"""Compact when the live runs fit in at most this share of the current capacity."""
COMPACT_MIN_FLOPS = 2**34
"""Value-and-gradient work (FLOPs) from which ``compact=None`` segments a sweep."""

_SERIES = ("loss", "grad_norm", "a", "b", "off_plane")


def segment_length(steps_bucket: int, tracking: SharpnessTracking | None = None) -> int:
    """Steps per segment: a sixteenth of the step bucket, at least ``SEGMENT_MIN_STEPS``,
    a multiple of the sharpness stride (static: it shapes the segment program)."""
    length = max(SEGMENT_MIN_STEPS, steps_bucket // 16)
    if tracking is not None:
        length = tracking.every * -(-length // tracking.every)
    return int(length)


def size_ladder(per_device: int, width: int, floor: int = 1) -> tuple[int, ...]:
    """Runs per device a compacted call may have: ``per_device`` halved while the
    result stays a multiple of ``width`` (the runs vectorised together) and at
    least ``floor``.

    >>> size_ladder(48, 6, 4)
    (48, 24, 12, 6)
    >>> size_ladder(48, 48)
    (48,)
    """
    sizes = [int(per_device)]
    while sizes[-1] % 2 == 0 and (sizes[-1] // 2) % width == 0 and sizes[-1] // 2 >= floor:
        sizes.append(sizes[-1] // 2)
    return tuple(sizes)


def compaction_group(per_device: int) -> int:
    """The vectorisation width ``compact=True`` gives a call with none: an eighth of it.

    A run's float rounding depends on how many runs XLA vectorises together,
    so compacted calls must keep that width: smaller calls then run whole
    groups (``lax.map`` over ``vmap``'d groups), bit for bit as in the full call.
    A call never shrinks below two groups: a map over one group is no loop
    for XLA, and it fuses (and rounds) the step differently (measured).
    """
    return per_device // 8 if per_device >= 16 and per_device % 8 == 0 else 0


def compaction_pays(
    problem: Any, capacity: int, steps: int, length: int, ladder: tuple[int, ...], share: float
) -> bool:
    """Whether ``compact=None`` runs a sweep in segments (see the module docstring).

    ``capacity`` is the runs of all calls (padding included), ``share`` the
    fraction of the data a step reads.
    """
    if steps <= length or (len(ladder) < 2 and capacity <= ladder[0]):
        return False
    flops = loss_cost(problem, gradient=True).flops * share
    return bool(capacity * steps * flops >= COMPACT_MIN_FLOPS)


@dataclass
class _Call:
    """One call of a segment: its real runs and where they sit in its arrays."""

    ids: np.ndarray  # run numbers of its real runs
    slots: np.ndarray  # their positions in the call's arrays
    size: int  # runs per device
    runs: Any  # RunState (device or host arrays, with the padding)
    probes: Any
    hyper: dict[str, np.ndarray]
    start_index: np.ndarray
    active: np.ndarray
    live: np.ndarray  # bool per real run: running at the start of the segment
    out: Segment | None = None


def _spread(count: int, parts: int, size: int) -> np.ndarray:
    """Slots for ``count`` runs over ``parts`` devices of ``size`` each, evenly spread."""
    return np.concatenate(
        [
            d * size + np.arange(len(g))
            for d, g in enumerate(np.array_split(np.arange(count), parts))
        ]
    )


def _layout(n_live: int, per_device: int, n_devs: int, ladder: tuple[int, ...]) -> list[int]:
    """Runs per device of each call holding ``n_live`` runs: full calls, then one rung."""
    per_call = per_device * n_devs
    full, rest = divmod(n_live, per_call)
    sizes = [per_device] * full
    if rest:
        need = -(-rest // n_devs)
        sizes.append(min((s for s in ladder if s >= need), default=per_device))
    return sizes


def run_segments(
    *,
    program_for: Callable[[int], Any],
    put: Callable[[Any, int], Any],
    shapes: Any,
    rule: Any,
    tracking: SharpnessTracking | None,
    steps: int,
    length: int,
    per_device: int,
    n_devs: int,
    ladder: tuple[int, ...],
    shared: Any,
    data: Any,
    theta_all: np.ndarray,
    hyper_rows: dict[str, np.ndarray],
    start_index: np.ndarray,
    progress: Any,
) -> tuple[Any, ...]:
    """Run every run segment by segment; returns ``(final, status, stop, records,
    [preconditioner])`` with run-major records (``records[name]``: ``(runs, T + 1)``).

    ``program_for(size)`` is the compiled segment program for ``size`` runs per
    device; ``put(tree, size)`` places a call's host arrays on its devices.
    """
    dtype = theta_all.dtype
    n_runs = theta_all.shape[0]
    every = tracking.every if tracking is not None else 1
    n_rec = steps // every + 1 if tracking is not None else 0
    rec = {name: np.full((n_runs, steps + 1), np.nan, dtype) for name in _SERIES}
    rec["cosine"] = np.full((n_runs, steps), np.nan, dtype)
    rec["sharpness"] = np.full((n_runs, n_rec), np.nan, dtype)
    rec["pre_sharpness"] = np.full((n_runs, n_rec), np.nan, dtype)
    final = np.array(theta_all)
    status = np.zeros(n_runs, np.int32)
    stop = np.zeros(n_runs, np.int32)
    precond = None if rule.preconditioner is None else np.zeros_like(theta_all)

    per_call = per_device * n_devs
    calls = []
    for lo in range(0, n_runs, per_call):  # the calls of the whole-budget engine
        hi = min(lo + per_call, n_runs)
        idx = np.concatenate([np.arange(lo, hi), np.full(per_call - (hi - lo), lo)])
        runs, probes = blank_segment_inputs(shapes, theta_all[idx], rule, tracking)
        calls.append(
            _Call(
                ids=np.arange(lo, hi),
                slots=np.arange(hi - lo),
                size=per_device,
                runs=runs,
                probes=probes,
                hyper={k: v[idx].astype(dtype) for k, v in hyper_rows.items()},
                start_index=start_index[idx].astype(np.int32),
                active=np.arange(per_call) < (hi - lo),
                live=np.ones(hi - lo, bool),
            )
        )

    def launch(call: _Call, k0: int) -> Segment:
        moved = put((call.runs, call.probes, call.hyper, call.active, call.start_index), call.size)
        call.runs, call.probes, call.hyper, call.active, call.start_index = moved
        fn = program_for(call.size)
        return fn(*moved, np.int32(k0), shared, data)

    def harvest(call: _Call, k0: int, last: bool) -> np.ndarray:
        """Copy the segment's records and the final values of runs that stopped in it."""
        out = call.out
        assert out is not None
        running = np.asarray(out.runs.running)[call.slots]
        end = int(np.max(np.asarray(out.end)))
        took = end - k0
        sel = call.live
        ids, slots = call.ids[sel], call.slots[sel]
        r = out.records
        first = 0 if k0 == 0 else 1
        for name in _SERIES:
            local = np.asarray(getattr(r, name))
            rec[name][ids, k0 + first : k0 + took + 1] = local[first : took + 1][:, slots].T
        rec["cosine"][ids, k0:end] = np.asarray(r.cosine)[:took][:, slots].T
        if tracking is not None:
            j0 = k0 // every
            hi = min(length // every, end // every - j0, n_rec - 1 - j0)
            for name in ("sharpness", "pre_sharpness"):
                local = np.asarray(getattr(r, name))
                rec[name][ids, j0 + first : j0 + hi + 1] = local[first : hi + 1][:, slots].T
        done = sel & ~running if not last else sel
        if done.any():
            ids_d, slots_d = call.ids[done], call.slots[done]
            final[ids_d] = np.asarray(out.runs.theta)[slots_d]
            status[ids_d] = np.asarray(out.runs.status)[slots_d]
            run_stop = np.asarray(out.runs.stop)[slots_d]
            stop[ids_d] = np.where(running[done], end, run_stop)
            if precond is not None:
                precond[ids_d] = np.asarray(out.preconditioner)[slots_d]
        return running

    n_segments = -(-steps // length)
    with progress_counter(total=n_segments, show=progress, desc="descent") as bar:
        k0, done_segments = 0, 0
        while calls:
            for call in calls:
                call.out = launch(call, k0)
            k1 = min(k0 + length, steps)
            last = k1 >= steps
            live_flags = [harvest(call, k0, last) for call in calls]
            bar.update(1)
            done_segments += 1
            if last:
                break
            calls = _next_calls(calls, live_flags, per_device, n_devs, ladder)
            k0 = k1
        bar.update(n_segments - done_segments)
    out: tuple[Any, ...] = (final, status, stop, rec)
    return out if precond is None else (*out, precond)


def _next_calls(
    calls: list[_Call],
    live_flags: list[np.ndarray],
    per_device: int,
    n_devs: int,
    ladder: tuple[int, ...],
) -> list[_Call]:
    """The calls of the next segment: the same ones (minus any with no live run) or,
    when that pays, the live runs gathered into the smallest layout of the ladder."""
    kept = []
    for call, live in zip(calls, live_flags):
        if live.any():
            call.live = live
            kept.append(call)
    if not kept:
        return []
    n_live = int(sum(int(c.live.sum()) for c in kept))
    capacity = sum(c.size * n_devs for c in kept)
    sizes = _layout(n_live, per_device, n_devs, ladder)
    if sum(sizes) * n_devs > COMPACT_SHARE * capacity:
        for call in kept:
            assert call.out is not None
            call.runs, call.probes = call.out.runs, call.out.probes
            call.out = None
        return kept
    return _gather(kept, sizes, n_devs)


def _gather(calls: list[_Call], sizes: list[int], n_devs: int) -> list[_Call]:
    """The live runs of ``calls`` packed into calls of ``sizes`` runs per device."""

    def pick(*leaves: Any) -> np.ndarray:
        parts = [np.asarray(leaf)[c.slots[c.live]] for leaf, c in zip(leaves, calls)]
        return np.concatenate(parts)

    pool_runs = jax.tree_util.tree_map(pick, *[c.out.runs for c in calls])  # type: ignore[union-attr]
    pool_probes = jax.tree_util.tree_map(pick, *[c.out.probes for c in calls])  # type: ignore[union-attr]
    pool_hyper = jax.tree_util.tree_map(pick, *[c.hyper for c in calls])
    pool_start = pick(*[c.start_index for c in calls])
    pool_ids = np.concatenate([c.ids[c.live] for c in calls])
    out, lo = [], 0
    for size in sizes:
        total = size * n_devs
        count = min(total, len(pool_ids) - lo)
        slots = _spread(count, n_devs, size)
        idx = np.full(total, lo)
        idx[slots] = lo + np.arange(count)

        def take(x: np.ndarray, idx: np.ndarray = idx) -> np.ndarray:
            return x[idx]

        runs = jax.tree_util.tree_map(take, pool_runs)
        running = np.zeros(total, bool)
        running[slots] = True
        runs = runs._replace(running=running)
        out.append(
            _Call(
                ids=pool_ids[lo : lo + count],
                slots=slots,
                size=size,
                runs=runs,
                probes=jax.tree_util.tree_map(take, pool_probes),
                hyper=jax.tree_util.tree_map(take, pool_hyper),
                start_index=take(pool_start),
                active=running.copy(),
                live=np.ones(count, bool),
            )
        )
        lo += count
    return out


def descend_in_segments(
    problem: Any,
    rule: Any,
    rule_key: Any,
    devs: tuple[Any, ...],
    placed: tuple[Any, Any, Any],
    per_device: int,
    length: int,
    ladder: tuple[int, ...],
    config: Any,
    theta_all: np.ndarray,
    hyper_rows: dict[str, np.ndarray],
    start_index: np.ndarray,
    progress: Any,
) -> tuple[Any, ...]:
    """:func:`~basinview.core.descend`'s sweep in segments (see :func:`run_segments`).

    ``placed`` is ``(sharding of a call's runs, shared arguments, data)`` on
    ``devs``; segment programs are kept in the problem's compile memo, one per
    rung of ``ladder``.
    """
    shared_on, shared, data = placed
    dtype = problem.dtype
    group = config.sizes.group if config.sizes is not None else 0
    batch, tracking = config.batch_size, config.sharpness

    def program_for(size: int) -> Any:
        key = ("descent-segment", rule_key, size, length, batch, tracking, devs, group)
        return problem.compiled(
            key,
            lambda: build_segment_program(
                problem.flat_loss, rule, size, length, batch, devs, group, tracking
            ),
        )

    def state_shapes() -> Any:
        one = (
            jax.ShapeDtypeStruct((problem.size,), dtype),
            {k: jax.ShapeDtypeStruct((), dtype) for k in hyper_rows},
            jax.ShapeDtypeStruct((), np.bool_),
            jax.ShapeDtypeStruct((), np.int32),
            shared,
            data,
        )
        return segment_state_shapes(problem.flat_loss, rule, batch, one)

    shapes = problem.cached(("segment-state", rule_key, batch, tuple(hyper_rows)), state_shapes)
    n_calls = -(-len(theta_all) // (per_device * len(devs)))
    return run_segments(
        program_for=program_for,
        put=lambda tree, size: jax.device_put(tree, shared_on),
        shapes=shapes,
        rule=rule,
        tracking=tracking,
        steps=config.steps,
        length=length,
        per_device=per_device,
        n_devs=len(devs),
        ladder=ladder,
        shared=shared,
        data=data,
        theta_all=theta_all,
        hyper_rows=hyper_rows,
        start_index=start_index,
        progress=progress if progress is not None else n_calls > 4,
    )

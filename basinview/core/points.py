"""The loss at many points of a plane, in compiled blocks sized by the cost model.

Each compiled call maps the loss over ``block`` points per device with
``jax.lax.map(..., batch_size=chunk)``, so memory is bounded by ``chunk``
evaluations at a time whatever the grid or data size. Both sizes come from
:mod:`basinview.core.cost_model` (or are timed with ``tune=True``, or given
as recorded ``sizes``). A large grid runs as several calls, one queued ahead
of the one being read, so a progress bar advances as they finish.
"""

from __future__ import annotations

from typing import Any

import jax
import numpy as np

from ._tuning import fastest, pipelined, progress_counter
from .affine import affine_wins, plane_plan
from .affine_eval import plane_point_fn
from .cost_model import (
    SurfaceSizes,
    chunk_size_for,
    evaluation_bytes,
    surface_block,
    surface_sizes_from,
)
from .errors import ParameterError
from .problem import Problem, loss_runtime_errors
from .sharding import batch_devices, replicated, shard_batch, split

__all__ = ["evaluate_points", "evaluate_points_sized", "points_sizes", "uses_affine"]

_TUNE_CHUNKS = (2, 8, 64)
_TUNE_POINTS = 512
# Tuning never tries chunks whose intermediates would exceed this (per device).
_TUNE_MAX_CHUNK_BYTES = 128 * 2**20


def _block_fn(
    problem: Problem, chunk: int, block: int, devices: tuple[Any, ...], affine: bool = False
) -> Any:
    """Compiled loss over ``block`` points per device, ``chunk`` vectorised at a time.

    With ``affine`` the loss's plane-affine plan (:mod:`basinview.core.affine`)
    computes the affine intermediates' coefficients once per call.
    """
    plan = plane_plan(problem) if affine else None

    def build() -> Any:
        def run(
            ab: jax.Array, origin: jax.Array, d1: jax.Array, d2: jax.Array, data: Any
        ) -> jax.Array:
            if plan is not None:
                point = plane_point_fn(plan, origin, d1, d2, data)
            else:

                def point(p: jax.Array) -> jax.Array:
                    return problem.flat_loss(origin + p[0] * d1 + p[1] * d2, data)

            return jax.lax.map(point, ab, batch_size=chunk)

        return shard_batch(run, devices, (0, None, None, None, None), 0)

    key = ("surface-block", chunk, block, devices) + (("affine",) if plan is not None else ())
    return problem.compiled(key, build)


class _Grid:
    """Points, constants and data placed on the devices of one evaluation."""

    def __init__(self, problem: Problem, devices: tuple[Any, ...], consts: list[np.ndarray]):
        self.problem = problem
        self.devices = devices
        if len(devices) == 1:
            self.consts = [jax.device_put(c, devices[0]) for c in consts]
            self.data = problem.cached(
                ("data-on", devices), lambda: jax.device_put(problem.data, devices[0])
            )
        else:
            rep = replicated(devices)
            self.consts = [jax.device_put(c, rep) for c in consts]
            self.data = problem.cached(
                ("data-on", devices), lambda: jax.device_put(problem.data, rep)
            )

    def launch(self, chunk: int, block: int, piece: np.ndarray, affine: bool = False) -> jax.Array:
        """Start the evaluation of ``piece`` (``block * len(devices)`` points)."""
        fn = _block_fn(self.problem, chunk, block, self.devices, affine)
        if len(self.devices) == 1:
            placed = jax.device_put(piece, self.devices[0])
        else:
            placed = jax.device_put(piece, split(self.devices))
        return fn(placed, *self.consts, self.data)


def _padded(ab: np.ndarray, lo: int, size: int) -> np.ndarray:
    piece = ab[lo : lo + size]
    if piece.shape[0] < size:
        piece = np.concatenate([piece, np.zeros((size - piece.shape[0], 2), dtype=ab.dtype)])
    return piece


def _tuned_chunk(problem: Problem, grid: _Grid, ab: np.ndarray) -> int:
    """With ``tune=True``: the fastest chunk size for this problem, timed once and kept.

    Every candidate evaluates the same ``_TUNE_POINTS`` points per device.
    """

    def tune() -> int:
        most = max(1, _TUNE_MAX_CHUNK_BYTES // evaluation_bytes(problem))
        candidates = sorted({chunk_size_for(problem), *(c for c in _TUNE_CHUNKS if c <= most)})
        candidates = [c for c in candidates if _TUNE_POINTS % c == 0]
        piece = _padded(ab, 0, _TUNE_POINTS * len(grid.devices))

        def run(chunk: int) -> Any:
            return lambda: grid.launch(chunk, _TUNE_POINTS, piece).block_until_ready()

        return int(fastest(candidates, run))

    return int(problem.cached(("surface-chunk",), tune))


def _check_size(name: str, value: Any) -> None:
    if value is not None and (
        isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1
    ):
        raise ParameterError(f"{name} must be a positive integer; got {value!r}.")


def points_sizes(
    problem: Problem,
    n_points: int,
    *,
    chunk_size: int | None = None,
    tune: bool = False,
    sizes: Any = None,
    devices: Any = None,
    ab: np.ndarray | None = None,
) -> SurfaceSizes:
    """The program sizes :func:`evaluate_points` uses for ``n_points`` points.

    Recorded ``sizes`` win; else ``chunk_size`` or the cost model's chunk
    (:func:`~basinview.core.cost_model.chunk_size_for`, or timed with
    ``tune=True``), and a block from the cost model
    (:func:`~basinview.core.cost_model.surface_block`).
    """
    if sizes is not None:
        return surface_sizes_from(sizes)
    _check_size("chunk_size", chunk_size)
    devs = batch_devices(devices)
    if chunk_size is not None:
        chunk = int(chunk_size)
    elif tune:
        grid = _Grid(problem, devs, [np.zeros(problem.size, problem.dtype)] * 3)
        pts = np.zeros((1, 2), problem.dtype) if ab is None else ab
        chunk = _tuned_chunk(problem, grid, pts)
    else:
        chunk = chunk_size_for(problem)
    return SurfaceSizes(chunk, surface_block(problem, chunk, -(-n_points // len(devs))))


def evaluate_points(
    problem: Problem,
    origin: np.ndarray,
    d1: np.ndarray,
    d2: np.ndarray,
    ab: np.ndarray,
    *,
    chunk_size: int | None = None,
    progress: bool | None = None,
    devices: Any = None,
    tune: bool = False,
    sizes: Any = None,
    affine: bool | None = None,
) -> np.ndarray:
    """Loss at ``origin + a * d1 + b * d2`` for each row ``(a, b)`` of ``ab``.

    Non-finite values come back as NaN. Work is done in compiled calls of
    ``block`` points per device, ``chunk`` of them vectorised at a time, both
    from the cost model (see :mod:`basinview.core.cost_model` and
    :func:`points_sizes`): the same problem and point count always give the
    same program. ``tune=True`` times a few chunk sizes once per problem
    instead; ``sizes`` (as recorded in :attr:`Surface.sizes`) reuses given
    sizes. A large grid runs in several calls; ``progress`` shows a bar that
    advances as each call finishes, and an interrupt between calls leaves
    the problem and earlier results intact. ``devices`` (default: all
    devices JAX shows, see :func:`use_all_cores`) share the points; the
    values do not depend on how many devices there are.

    ``affine`` chooses how each point is computed: ``None`` (default) lets
    :func:`~basinview.core.affine.affine_wins` decide from the loss's
    shapes, ``True`` computes the loss's affine intermediates once per
    call and each point from their coefficients (see
    :mod:`basinview.core.affine`; the plain path where the loss has no
    plan), ``False`` evaluates ``loss(origin + a d1 + b d2)`` per point.
    Both give the same values to float rounding.
    """
    return evaluate_points_sized(
        problem, origin, d1, d2, ab, chunk_size=chunk_size, progress=progress, devices=devices,
        tune=tune, sizes=sizes, affine=affine,
    )[0]  # fmt: skip


def uses_affine(problem: Problem, block: int, affine: bool | None = None) -> bool:
    """Whether a call of ``block`` points per device takes the plane-affine path."""
    if affine is not None and not isinstance(affine, bool):
        raise ParameterError(f"affine must be None, True or False; got {affine!r}.")
    if affine is False:
        return False
    plan = plane_plan(problem)
    if plan is None:
        return False
    return True if affine else affine_wins(plan, block)


def evaluate_points_sized(
    problem: Problem,
    origin: np.ndarray,
    d1: np.ndarray,
    d2: np.ndarray,
    ab: np.ndarray,
    *,
    chunk_size: int | None,
    progress: bool | None,
    devices: Any,
    tune: bool,
    sizes: Any,
    affine: bool | None = None,
) -> tuple[np.ndarray, SurfaceSizes]:
    """:func:`evaluate_points`, also returning the sizes it used."""
    dtype = problem.dtype
    ab = np.asarray(ab, dtype=dtype).reshape(-1, 2)
    total = ab.shape[0]
    devs = batch_devices(devices)
    plan = points_sizes(
        problem, total, chunk_size=chunk_size, tune=tune, sizes=sizes, devices=devs, ab=ab
    )
    use = uses_affine(problem, plan.block, affine)
    grid = _Grid(problem, devs, [np.asarray(x, dtype=dtype) for x in (origin, d1, d2)])
    step = plan.block * len(devs)
    n_calls = -(-total // step)
    out = np.empty(n_calls * step, dtype=dtype)

    def launch(i: int) -> Any:
        return grid.launch(plan.chunk, plan.block, _padded(ab, i * step, step), use)

    def collect(i: int, result: Any) -> None:
        out[i * step : (i + 1) * step] = np.asarray(result)

    with loss_runtime_errors(problem, "the surface"):
        with progress_counter(total=n_calls, show=progress, desc="surface") as bar:
            pipelined(n_calls, launch, collect, bar)
    out = out[:total]
    out[~np.isfinite(out)] = np.nan
    return out, plan

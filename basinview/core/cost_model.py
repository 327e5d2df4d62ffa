"""The cost model that sizes every compiled program (no timing, no compilation).

One evaluation of the loss is traced once (``jax.make_jaxpr``; nothing is
compiled) and two numbers are read off its program:

* **bytes**: the bytes of every intermediate it writes (the body of a loop
  counts once: its buffers are reused);
* **FLOPs**: floating-point operations, ``2 m n k`` for a matrix product
  (``dot_general``), one per output element for every other operation, a
  ``scan`` body times its length.

From these, with the budgets below:

* **surface chunk** (grid points vectorised at once): the largest power of
  two up to 1024 whose intermediates fit ``CHUNK_BUDGET_BYTES``, but never
  below ``CHUNK_FLOOR`` (16) unless that many would exceed
  ``CHUNK_MEMORY_CAP``: vectorising a few points keeps matrix products
  matrix-shaped, so a mid-sized network gets 16, not 1.
* **surface block** (points per device and compiled call): whole chunks,
  about ``CALL_FLOPS`` of work per call (at most 65536 points), bucketed.
  Large grids thus run in several calls, so progress moves and an interrupt
  between calls keeps the problem's state intact.
* **descent runs per call**: bucketed run count, capped so that one step's
  value-and-gradient intermediates fit ``RUN_BUDGET_BYTES`` (floor 16 unless
  ``RUN_MEMORY_CAP`` is exceeded), the recorded series fit
  ``RECORD_BUDGET_BYTES`` and the whole call is about ``CALL_FLOPS * 4``.
  Every run of a call is vectorised together (group 0).

The same problem, grid and run count therefore always give the same
program, in any session. ``tune=True`` (surfaces and descent) times a few
candidate sizes instead, once per problem; the sizes used are recorded in
the results and in :class:`~basinview.core.Settings` so a recorded view can
be recomputed with exactly the same program.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any, NamedTuple

import jax
import jax.extend.core
import numpy as np

from .errors import ParameterError

__all__ = [
    "CALL_FLOPS",
    "CHUNK_BUDGET_BYTES",
    "CHUNK_FLOOR",
    "CHUNK_MEMORY_CAP",
    "RUN_BUDGET_BYTES",
    "DescentSizes",
    "LossCost",
    "SurfaceSizes",
    "chunk_size_for",
    "descent_sizes",
    "equation_flops",
    "evaluation_bytes",
    "loss_cost",
    "runs_per_call_for",
    "surface_block",
]

CHUNK_BUDGET_BYTES = 8 * 2**20
"""Bytes of loss intermediates one vectorised chunk of grid points aims at."""
CHUNK_FLOOR = 16
"""Smallest chunk the model picks while ``CHUNK_MEMORY_CAP`` allows it."""
CHUNK_MEMORY_CAP = 256 * 2**20
"""Bytes of intermediates a chunk (or a step of a call's runs) may never exceed."""
RUN_BUDGET_BYTES = 12 * 2**20
"""Bytes of value-and-gradient intermediates one step of a call's runs aims at."""
RUN_MEMORY_CAP = CHUNK_MEMORY_CAP
RECORD_BUDGET_BYTES = 256 * 2**20
"""Bytes of recorded per-step series (6 per run and step) one call may hold."""
CALL_FLOPS = 2**32
"""Work of one compiled surface call (about a second or less on one core)."""
MAX_POINTS_PER_CALL = 65536
_DATA_BUDGET_BYTES = 64 * 2**20


class LossCost(NamedTuple):
    """Bytes of intermediates and FLOPs of one (unbatched) evaluation."""

    bytes: int
    flops: int


class SurfaceSizes(NamedTuple):
    """Sizes of a surface program: points vectorised at once, points per device and call."""

    chunk: int
    block: int

    def record(self) -> dict[str, int]:
        return {"surface_chunk": self.chunk, "surface_block": self.block}


class DescentSizes(NamedTuple):
    """Sizes of a descent program: runs per device and call, and runs vectorised
    together within a step (0: all of the call's runs)."""

    runs_per_call: int
    group: int = 0

    def record(self) -> dict[str, int]:
        return {"descent_runs_per_call": self.runs_per_call, "descent_group": self.group}

    @classmethod
    def from_record(cls, sizes: Any) -> DescentSizes:
        """The descent sizes of a recorded ``sizes`` mapping (see :meth:`record`)."""
        if isinstance(sizes, DescentSizes):
            return sizes
        rpc = _size_entry(sizes, "descent_runs_per_call", 1)
        group = _size_entry(sizes, "descent_group", 0)
        if group and rpc % group:
            raise ParameterError(
                f"sizes: descent_group ({group}) must divide descent_runs_per_call ({rpc})."
            )
        return cls(rpc, group)


def _size_entry(sizes: Any, key: str, low: int) -> int:
    if not isinstance(sizes, Mapping) or key not in sizes:
        raise ParameterError(
            f"sizes must be a mapping with {key!r} (as recorded in Settings.sizes or "
            f"results' sizes); got {sizes!r}."
        )
    v = sizes[key]
    if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or not low <= v <= 2**20:
        raise ParameterError(f"sizes[{key!r}] must be an integer from {low} to 2**20; got {v!r}.")
    return int(v)


def surface_sizes_from(sizes: Any) -> SurfaceSizes:
    """The surface sizes of a recorded ``sizes`` mapping."""
    if isinstance(sizes, SurfaceSizes):
        return sizes
    chunk = _size_entry(sizes, "surface_chunk", 1)
    block = _size_entry(sizes, "surface_block", 1)
    if block % chunk:
        raise ParameterError(
            f"sizes: surface_block ({block}) must be a multiple of surface_chunk ({chunk})."
        )
    return SurfaceSizes(chunk, block)


def _dot_flops(eqn: Any) -> int:
    (lc, _rc), _batch = eqn.params["dimension_numbers"]
    lhs = eqn.invars[0].aval.shape
    k = int(np.prod([lhs[i] for i in lc], dtype=np.int64)) if lc else 1
    out = int(np.prod(eqn.outvars[0].aval.shape, dtype=np.int64))
    return 2 * out * k


def _walk(jaxpr: Any) -> tuple[int, int]:
    total_bytes = 0
    flops = 0
    for eqn in jaxpr.eqns:
        out_elems = 0
        for var in eqn.outvars:
            aval = getattr(var, "aval", None)
            shape = getattr(aval, "shape", None)
            dtype = getattr(aval, "dtype", None)
            if shape is not None and dtype is not None:
                n = int(np.prod(shape, dtype=np.int64))
                out_elems += n
                total_bytes += n * np.dtype(dtype).itemsize
        if eqn.primitive.name == "dot_general":
            flops += _dot_flops(eqn)
        else:
            flops += out_elems
        repeat = int(eqn.params.get("length", 1)) if eqn.primitive.name == "scan" else 1
        for sub in jax.extend.core.jaxprs_in_params(eqn.params):
            b, f = _walk(sub)
            total_bytes += b
            flops += f * repeat
    return total_bytes, flops


def equation_flops(name: str, params: Any, in_avals: Any, out_avals: Any) -> int:
    """FLOPs of one equation by the counting rules above (used by :mod:`basinview.core.affine`).

    ``in_avals``/``out_avals`` carry ``.shape``; a sub-program in ``params``
    (a ``scan`` body, a custom-derivative call) adds its own count, a
    ``scan`` body times its length.
    """
    out = sum(int(np.prod(a.shape, dtype=np.int64)) for a in out_avals)
    if name == "dot_general":
        (lc, _rc), _batch = params["dimension_numbers"]
        lhs = in_avals[0].shape
        k = int(np.prod([lhs[i] for i in lc], dtype=np.int64)) if lc else 1
        return 2 * out * k
    repeat = int(params.get("length", 1)) if name == "scan" else 1
    inner = sum(_walk(sub)[1] for sub in jax.extend.core.jaxprs_in_params(params))
    return out + inner * repeat


def loss_cost(problem: Any, *, gradient: bool = False) -> LossCost:
    """Bytes and FLOPs of one evaluation of the loss (and gradient), read off its jaxpr.

    Traced once per problem (no compilation) and kept with the problem.
    """

    def build() -> LossCost:
        fn = jax.value_and_grad(problem.flat_loss) if gradient else problem.flat_loss
        theta = jax.ShapeDtypeStruct((problem.size,), problem.dtype)
        data = jax.tree_util.tree_map(
            lambda a: jax.ShapeDtypeStruct(a.shape, a.dtype), problem.data
        )
        jaxpr = jax.make_jaxpr(fn)(theta, data)
        b, f = _walk(jaxpr.jaxpr)
        return LossCost(max(b, 8 * problem.size, 64), max(f, problem.size, 1))

    return problem.cached(("loss-cost", gradient), build)


def evaluation_bytes(problem: Any, *, gradient: bool = False) -> int:
    """Bytes of intermediates one evaluation of the loss (and gradient) writes."""
    return int(loss_cost(problem, gradient=gradient).bytes)


def _pow2_floor(x: float) -> int:
    return int(2 ** math.floor(math.log2(max(x, 1.0))))


def _floored(budget_size: int, per_item: int, floor: int, cap_bytes: int, most: int) -> int:
    size = min(budget_size, most)
    allowed = _pow2_floor(cap_bytes / per_item)
    return int(max(size, min(floor, allowed), 1))


def chunk_size_for(problem: Any) -> int:
    """Grid points to vectorise at once (a power of two from 1 to 1024; see module doc)."""
    per = evaluation_bytes(problem)
    return _floored(_pow2_floor(CHUNK_BUDGET_BYTES / per), per, CHUNK_FLOOR, CHUNK_MEMORY_CAP, 1024)


def bucket(value: int, *, minimum: int = 1) -> int:
    """Smallest size >= ``value`` of the form ``2**k`` or ``3 * 2**k``.

    Padding batches to these sizes wastes at most a third of the work and
    keeps the number of distinct compiled shapes logarithmic.

    >>> [bucket(v) for v in (1, 3, 5, 7, 9, 13, 100)]
    [1, 3, 6, 8, 12, 16, 128]
    """
    value = max(int(value), int(minimum), 1)
    size = 1
    while True:
        if size >= value:
            return size
        if size >= 2 and size * 3 // 2 >= value:
            return size * 3 // 2
        size *= 2


def surface_block(problem: Any, chunk: int, per_device: int) -> int:
    """Points per device and call: whole chunks, a bucketed count, about ``CALL_FLOPS``.

    When the points need several calls, the block is the bucket size between
    half the largest and the largest that pads the last call least (ties: the
    larger), so a grid a little over a multiple of the largest block does not
    compute a nearly empty call in full: a 51 x 51 grid of the 26,122-parameter
    digits network in chunks of 16 is 163 chunks, 6 calls of 32 chunks (192,
    18% padding) or 7 of 24 (168, 3%). Sizes stay on the bucket ladder, so
    the programs a grid can use remain few.

    >>> [_least_padding(n, 32) for n in (163, 64, 65, 100, 20)]
    [24, 32, 24, 16, 24]
    """
    n_chunks = -(-per_device // chunk)
    points = CALL_FLOPS // loss_cost(problem).flops
    points = min(max(points, chunk), MAX_POINTS_PER_CALL)
    return chunk * _least_padding(n_chunks, max(1, points // chunk))


def _least_padding(n_chunks: int, most: int) -> int:
    """Chunks per call for ``n_chunks`` chunks, at most ``most`` (see :func:`surface_block`)."""
    if bucket(n_chunks, minimum=1) <= most:
        return bucket(n_chunks, minimum=1)
    sizes = [s for s in (bucket(v) for v in range(max(1, most // 2), most + 1)) if s <= most]
    return min(sorted(set(sizes), reverse=True), key=lambda s: -(-n_chunks // s) * s)


def runs_per_call_for(problem: Any) -> int:
    """Descent runs to step together in one compiled loop (a power of two, 1 to 4096).

    As many as keep one step's value-and-gradient intermediates within
    ``RUN_BUDGET_BYTES``, but at least 16 unless that exceeds ``RUN_MEMORY_CAP``.
    """
    per = evaluation_bytes(problem, gradient=True)
    return _floored(_pow2_floor(RUN_BUDGET_BYTES / per), per, 16, RUN_MEMORY_CAP, 4096)


def _data_bytes(problem: Any) -> int:
    return int(
        sum(np.dtype(x.dtype).itemsize * x.size for x in jax.tree_util.tree_leaves(problem.data))
    )


def descent_sizes(problem: Any, n_runs: int, steps_bucket: int, share: float = 1.0) -> DescentSizes:
    """Runs per device and call for ``n_runs`` runs of ``steps_bucket`` steps (see module doc).

    ``share`` is the fraction of the data one step reads (minibatches).
    """
    per_run = 6 * max(_data_bytes(problem), 8 * problem.size, 1)
    cap = max(8, min(4096, _DATA_BUDGET_BYTES // per_run))
    cap = min(_pow2_floor(cap), runs_per_call_for(problem))
    itemsize = np.dtype(problem.dtype).itemsize
    cap = min(cap, _pow2_floor(RECORD_BUDGET_BYTES / (6 * (steps_bucket + 1) * itemsize)))
    work = steps_bucket * loss_cost(problem, gradient=True).flops * share
    cap = min(cap, max(4, _pow2_floor(4 * CALL_FLOPS / max(work, 1.0))))
    return DescentSizes(min(bucket(n_runs), max(cap, 1)), 0)

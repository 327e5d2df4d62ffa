"""Small helpers that keep compiled shapes few, memory bounded and work cache-sized.

Sizes of vectorised batches are chosen from the bytes one evaluation of the
loss writes (its intermediates, read off the traced program) so that a
batch stays within a few MiB: on a CPU, keeping the working set near the
caches matters more than vector width. For large surfaces a few candidate
chunk sizes are timed once and the fastest is kept with the problem.
"""

from __future__ import annotations

import contextlib
import math
import time
from collections.abc import Callable, Iterable, Iterator, Sequence
from typing import Any

import jax
import jax.extend.core
import jax.monitoring
import numpy as np

__all__ = [
    "TUNE_WORK_BYTES",
    "CompileCounter",
    "bucket",
    "chunk_size_for",
    "count_compilations",
    "evaluation_bytes",
    "fastest",
    "progress_bar",
    "runs_per_call_for",
]

# What JAX reports while it compiles: tracing, lowering, then XLA's backend compile.
_COMPILE_EVENTS = (
    "/jax/core/compile/jaxpr_trace_duration",
    "/jax/core/compile/jaxpr_to_mlir_module_duration",
    "/jax/core/compile/backend_compile_duration",
)

# Bytes of loss intermediates one vectorised chunk of grid points may write.
CHUNK_BUDGET_BYTES = 8 * 2**20
# Bytes of value-and-gradient intermediates one step of a batch of runs may write.
RUN_BUDGET_BYTES = 12 * 2**20
# Work (bytes of intermediates written in total) from which timing a few
# vectorisation sizes once per problem pays off: a few seconds of computing.
TUNE_WORK_BYTES = 16 * 2**30


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


def data_bytes(problem: Any) -> int:
    """Total bytes of the problem's data arrays."""
    return int(
        sum(
            np.dtype(leaf.dtype).itemsize * leaf.size
            for leaf in jax.tree_util.tree_leaves(problem.data)
        )
    )


def _jaxpr_bytes(jaxpr: Any) -> int:
    total = 0
    for eqn in jaxpr.eqns:
        for var in eqn.outvars:
            aval = getattr(var, "aval", None)
            shape = getattr(aval, "shape", None)
            dtype = getattr(aval, "dtype", None)
            if shape is not None and dtype is not None:
                total += int(np.prod(shape, dtype=np.int64)) * np.dtype(dtype).itemsize
        for sub in jax.extend.core.jaxprs_in_params(eqn.params):
            total += _jaxpr_bytes(sub)
    return total


def evaluation_bytes(problem: Any, *, gradient: bool = False) -> int:
    """Bytes of intermediates one evaluation of the loss (and gradient) writes.

    Read off the traced program of one unbatched evaluation (no compilation)
    and kept with the problem. The body of a loop (chunked data) counts once.
    """

    def build() -> int:
        fn = jax.value_and_grad(problem.flat_loss) if gradient else problem.flat_loss
        theta = jax.ShapeDtypeStruct((problem.size,), problem.dtype)
        data = jax.tree_util.tree_map(
            lambda a: jax.ShapeDtypeStruct(a.shape, a.dtype), problem.data
        )
        jaxpr = jax.make_jaxpr(fn)(theta, data)
        return max(_jaxpr_bytes(jaxpr.jaxpr), 8 * problem.size, 64)

    return int(problem.cached(("evaluation-bytes", gradient), build))


def _pow2_floor(x: float) -> int:
    return int(2 ** np.floor(np.log2(max(x, 1.0))))


def chunk_size_for(problem: Any) -> int:
    """Grid points to vectorise at once (a power of two from 1 to 1024).

    As many as keep the intermediates of one chunk within
    ``CHUNK_BUDGET_BYTES`` (see :func:`evaluation_bytes`).
    """
    chunk = _pow2_floor(CHUNK_BUDGET_BYTES / evaluation_bytes(problem))
    return int(min(max(chunk, 1), 1024))


def runs_per_call_for(problem: Any) -> int:
    """Descent runs to step together in one compiled loop (a power of two, 4 to 4096).

    As many as keep one step's value-and-gradient intermediates within
    ``RUN_BUDGET_BYTES``; more runs only stream more memory per step, fewer
    pay the per-step cost of the loop more often.
    """
    runs = _pow2_floor(RUN_BUDGET_BYTES / evaluation_bytes(problem, gradient=True))
    return int(min(max(runs, 4), 4096))


def fastest(
    candidates: Sequence[Any],
    run: Callable[[Any], Callable[[], Any]],
    *,
    rounds: int = 3,
    min_seconds: float = 0.01,
) -> Any:
    """The candidate whose workload runs fastest.

    ``run(candidate)`` prepares (and compiles) the candidate's workload and
    returns a function that executes it once and blocks until it is done.
    Every candidate is warmed up first; then the candidates are timed in
    interleaved rounds (so a change in the machine's load hits all of them
    alike), each timing repeating the workload for at least ``min_seconds``,
    and the best time per execution decides.
    """
    goes = []
    for candidate in candidates:
        go = run(candidate)
        go()  # compile and warm up
        start = time.perf_counter()
        go()
        once = max(time.perf_counter() - start, 1e-6)
        goes.append((go, max(1, math.ceil(min_seconds / once))))
    best = [float("inf")] * len(candidates)
    for _ in range(rounds):
        for i, (go, reps) in enumerate(goes):
            start = time.perf_counter()
            for _ in range(reps):
                go()
            best[i] = min(best[i], (time.perf_counter() - start) / reps)
    return candidates[int(np.argmin(best))]


def progress_bar(
    iterable: Iterable[Any], *, total: int, show: bool | None, desc: str
) -> Iterable[Any]:
    """``tqdm.auto`` progress around ``iterable`` when ``show`` is true."""
    if not show:
        return iterable
    from tqdm.auto import tqdm

    return tqdm(iterable, total=total, desc=desc, leave=False)


class CompileCounter:
    """XLA compilations seen while the counter was active, and the time they took.

    Attributes:
        count: backend (XLA) compilations.
        seconds: time spent tracing, lowering and compiling.
    """

    def __init__(self) -> None:
        self.count = 0
        self.seconds = 0.0

    def _listener(self, event: str, duration_secs: float, **kwargs: str | int) -> None:
        if event in _COMPILE_EVENTS:
            self.seconds += duration_secs
            if event == _COMPILE_EVENTS[-1]:
                self.count += 1


@contextlib.contextmanager
def count_compilations() -> Iterator[CompileCounter]:
    """Count XLA backend compilations inside a ``with`` block.

    >>> with count_compilations() as c:
    ...     pass
    >>> c.count
    0
    """
    counter = CompileCounter()
    jax.monitoring.register_event_duration_secs_listener(counter._listener)
    try:
        yield counter
    finally:
        jax.monitoring.unregister_event_duration_listener(counter._listener)

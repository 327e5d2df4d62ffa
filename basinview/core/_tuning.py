"""Timing (only with ``tune=True``), progress bars and compilation counting.

Program sizes come from the cost model in :mod:`basinview.core.cost_model`
(re-exported here: ``bucket``, ``chunk_size_for``, ``evaluation_bytes``,
``runs_per_call_for``); :func:`fastest` times candidates only when a caller
asks for tuning explicitly.
"""

from __future__ import annotations

import contextlib
import math
import time
from collections.abc import Callable, Iterable, Iterator, Sequence
from typing import Any

import jax
import jax.monitoring
import numpy as np

from .cost_model import bucket, chunk_size_for, evaluation_bytes, runs_per_call_for

__all__ = [
    "TUNE_WORK_BYTES",
    "CompileCounter",
    "bucket",
    "chunk_size_for",
    "count_compilations",
    "evaluation_bytes",
    "fastest",
    "pipelined",
    "progress_bar",
    "progress_counter",
    "runs_per_call_for",
]

# What JAX reports while it compiles: tracing, lowering, then XLA's backend compile.
_COMPILE_EVENTS = (
    "/jax/core/compile/jaxpr_trace_duration",
    "/jax/core/compile/jaxpr_to_mlir_module_duration",
    "/jax/core/compile/backend_compile_duration",
)

# Work from which tune=True's timing is worth it (kept for callers that test it).
TUNE_WORK_BYTES = 16 * 2**30


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


class _CallbackBar:
    """A bar that reports each finished call to ``report(done, total, desc)``."""

    def __init__(self, report: Callable[[int, int, str], Any], total: int, desc: str) -> None:
        self._report, self._total, self._desc, self._done = report, total, desc, 0

    def update(self, n: int = 1) -> None:
        self._done += n
        self._report(self._done, self._total, self._desc)

    def close(self) -> None:
        pass


class _NoBar:
    def update(self, n: int = 1) -> None:
        pass

    def close(self) -> None:
        pass


@contextlib.contextmanager
def progress_counter(*, total: int, show: Any, desc: str) -> Iterator[Any]:
    """A ``tqdm.auto`` bar of ``total`` calls (advanced with ``.update(1)`` as each
    finishes) when ``show`` is true, else an object whose ``update`` does nothing.

    ``show`` may also be a callable ``show(done, total, desc)``: it is called
    once before the first call and after each call finishes (a widget's
    progress bar). An exception it raises stops the work between two calls
    (a cancel button); what was collected stays collected.
    """
    if callable(show):
        show(0, total, desc)
        yield _CallbackBar(show, total, desc)
        return
    if not show:
        yield _NoBar()
        return
    from tqdm.auto import tqdm

    bar = tqdm(total=total, desc=desc, leave=False)
    try:
        yield bar
    finally:
        bar.close()


def pipelined(
    count: int, launch: Callable[[int], Any], collect: Callable[[int, Any], None], bar: Any
) -> None:
    """Run ``count`` compiled calls, keeping one call queued ahead of the one being read.

    ``launch(i)`` dispatches call ``i`` (JAX runs it asynchronously);
    ``collect(i, result)`` reads it back; the bar advances after each. An
    interrupt (Ctrl-C) between calls stops the loop: what was collected stays
    collected and nothing else is modified.
    """
    queued: list[tuple[int, Any]] = []
    for i in range(count):
        queued.append((i, launch(i)))
        if len(queued) > 1:
            j, result = queued.pop(0)
            collect(j, result)
            bar.update(1)
    for j, result in queued:
        collect(j, result)
        bar.update(1)


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

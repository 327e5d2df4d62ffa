"""Small helpers that keep compiled shapes few and memory bounded."""

from __future__ import annotations

import contextlib
from collections.abc import Iterable, Iterator
from typing import Any

import jax
import jax.monitoring
import numpy as np

__all__ = ["CompileCounter", "bucket", "chunk_size_for", "count_compilations", "progress_bar"]

_COMPILE_EVENT = "/jax/core/compile/backend_compile_duration"

# Bytes of loss intermediates one vectorised chunk may touch; a few MiB keeps
# a chunk inside the CPU caches, which matters more than vector width here.
CHUNK_BUDGET_BYTES = 8 * 2**20


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


def chunk_size_for(problem: Any) -> int:
    """Loss evaluations to vectorise at once (a power of two from 1 to 1024).

    The cost of one loss evaluation is estimated from the data size (a loss
    touches each data value a few times) and the parameter count.
    """
    per_point = 2 * max(data_bytes(problem), 8 * problem.size, 1)
    chunk = CHUNK_BUDGET_BYTES // per_point
    chunk = int(2 ** np.floor(np.log2(max(chunk, 1))))
    return int(min(max(chunk, 1), 1024))


def progress_bar(
    iterable: Iterable[Any], *, total: int, show: bool | None, desc: str
) -> Iterable[Any]:
    """``tqdm.auto`` progress around ``iterable`` when ``show`` is true."""
    if not show:
        return iterable
    from tqdm.auto import tqdm

    return tqdm(iterable, total=total, desc=desc, leave=False)


class CompileCounter:
    """Number of XLA compilations seen while the counter was active."""

    def __init__(self) -> None:
        self.count = 0

    def _listener(self, event: str, duration: float, **kwargs: Any) -> None:
        if event == _COMPILE_EVENT:
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

"""The loss along many straight segments at once, and the barrier on each.

One compiled call evaluates the loss at ``samples`` points of each of a
fixed number of segments: ``jax.vmap`` over the samples of one segment,
``jax.lax.map`` over segments in batches sized by the cost model, so memory
is bounded by about one surface chunk of loss evaluations at a time. Calls
have a few sizes per problem and ``samples``: :data:`SMALL_CALL` segments
times a power of 4, up to 64 batches (between 256 and :data:`MAX_PAIRS`
segments); requests are padded and split to these, so calls with other
numbers of segments or other end points reuse at most five compiled programs.

The barrier of a segment from ``p`` to ``q`` is the largest excess of the
loss over the straight line between the end losses,
``max_t L((1 - t) p + t q) - ((1 - t) L(p) + t L(q))`` on the sampled ``t``
(``t = 0`` and ``1`` included): 0 for a segment that never rises above
its ends, ``inf`` when the loss is not finite somewhere on it.

References:
    Frankle, J., Dziugaite, G. K., Roy, D. M. & Carbin, M. (2020). Linear
    mode connectivity and the lottery ticket hypothesis. ICML.
    arXiv:1912.05671.

    Entezari, R., Sedghi, H., Saukh, O. & Neyshabur, B. (2022). The role of
    permutation invariance in linear mode connectivity of neural networks.
    ICLR. arXiv:2110.06296 (the barrier over the interpolated end losses).
"""

from __future__ import annotations

import math
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from .cost_model import chunk_size_for
from .errors import ParameterError

__all__ = ["MAX_PAIRS", "SMALL_CALL", "segment_barriers", "segment_losses"]

#: Most segments one compiled call evaluates.
MAX_PAIRS = 2048
#: Segments in a call for small requests.
SMALL_CALL = 16


def _segment_fn(problem: Any, pairs: int, samples: int, batch: int) -> Any:
    def build() -> Any:
        def run(p: jax.Array, q: jax.Array, t: jax.Array, data: Any) -> jax.Array:
            def one(pq: tuple[jax.Array, jax.Array]) -> jax.Array:
                a, b = pq
                pts = (1 - t)[:, None] * a[None, :] + t[:, None] * b[None, :]
                return jax.vmap(lambda x: problem.flat_loss(x, data))(pts)

            return jax.lax.map(one, (p, q), batch_size=batch)

        return jax.jit(run)

    return problem.compiled(("segment-losses", pairs, samples, batch), build)


def _check_samples(samples: Any) -> int:
    if (
        isinstance(samples, bool)
        or not isinstance(samples, (int, np.integer))
        or not (3 <= samples <= 1025)
    ):
        raise ParameterError(
            f"samples (points along each segment) must be a whole number from 3 to 1025; "
            f"got {samples!r}. 17 is usually enough to see a barrier."
        )
    return int(samples)


def segment_losses(
    problem: Any, starts: Any, ends: Any, *, samples: int = 17, call_size: int | None = None
) -> np.ndarray:
    """``(M, samples)`` loss along each segment ``starts[i] -> ends[i]`` (flat ``(M, n)``).

    ``call_size`` fixes the number of segments per compiled call (requests are
    padded and split to it), so every request uses one program: for
    interactive use, where a request of a new size would otherwise compile.
    None picks the size from the request (at most five programs).

    Examples:
        >>> import jax.numpy as jnp
        >>> from basinview.core import Problem
        >>> prob = Problem(lambda p: jnp.sum(p**2), jnp.zeros(2))
        >>> segment_losses(prob, [[-1.0, 0.0]], [[1.0, 0.0]], samples=3).tolist()
        [[1.0, 0.0, 1.0]]
    """
    s = _check_samples(samples)
    n = problem.size
    p = np.asarray(starts, dtype=np.float64).reshape(-1, n)
    q = np.asarray(ends, dtype=np.float64).reshape(-1, n)
    if p.shape != q.shape:
        raise ParameterError(
            f"segment starts and ends must pair up: got {p.shape[0]} starts and {q.shape[0]} ends."
        )
    m = p.shape[0]
    out = np.empty((m, s), dtype=np.float64)
    if not m:
        return out
    batch = max(1, 2 ** math.floor(math.log2(max(chunk_size_for(problem) / s, 1.0))))
    t = jnp.asarray(np.linspace(0.0, 1.0, s), dtype=problem.dtype)
    data = problem.data
    if call_size is None:
        call = int(min(max(64 * batch, 256), MAX_PAIRS))
    elif isinstance(call_size, bool) or not isinstance(call_size, (int, np.integer)) or not (
        1 <= call_size <= MAX_PAIRS
    ):
        raise ParameterError(
            f"call_size (segments per compiled call) must be a whole number from 1 to "
            f"{MAX_PAIRS}, or None to choose from the request; got {call_size!r}."
        )
    else:
        call = int(call_size)
    pending: list[tuple[int, int, Any]] = []
    for lo in range(0, m, call):
        hi = min(lo + call, m)
        size = call if call_size is not None else SMALL_CALL
        while size < hi - lo:
            size = min(size * 4, call)
        pp = np.empty((size, n), dtype=problem.dtype)
        qq = np.empty((size, n), dtype=problem.dtype)
        pp[: hi - lo], qq[: hi - lo] = p[lo:hi], q[lo:hi]
        pp[hi - lo :], qq[hi - lo :] = p[lo], q[lo]
        fn = _segment_fn(problem, size, s, min(batch, size))
        pending.append((lo, hi, fn(jnp.asarray(pp), jnp.asarray(qq), t, data)))
        if len(pending) > 1:  # keep one call queued ahead of the one being read
            a, b, res = pending.pop(0)
            out[a:b] = np.asarray(res)[: b - a]
    for a, b, res in pending:
        out[a:b] = np.asarray(res)[: b - a]
    return out


def segment_barriers(
    problem: Any, starts: Any, ends: Any, *, samples: int = 17, call_size: int | None = None
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Barrier on each segment, and the loss at its two ends (``call_size``: as in
    :func:`segment_losses`).

    Returns:
        ``(barrier, loss_start, loss_end)``, each ``(M,)``; ``barrier`` is
        ``inf`` where the loss is not finite on the segment.

    Examples:
        >>> import jax.numpy as jnp
        >>> from basinview.core import Problem
        >>> prob = Problem(lambda p: (jnp.sum(p**2) - 1.0) ** 2, jnp.zeros(2))
        >>> b, l0, l1 = segment_barriers(prob, [[-1.0, 0.0]], [[1.0, 0.0]], samples=5)
        >>> float(b[0]), float(l0[0]), float(l1[0])
        (1.0, 0.0, 0.0)
    """
    losses = segment_losses(problem, starts, ends, samples=samples, call_size=call_size)
    t = np.linspace(0.0, 1.0, losses.shape[1])
    line = (1 - t)[None, :] * losses[:, :1] + t[None, :] * losses[:, -1:]
    with np.errstate(invalid="ignore"):
        barrier = np.max(losses - line, axis=1)
    barrier = np.where(np.all(np.isfinite(losses), axis=1), np.maximum(barrier, 0.0), np.inf)
    return barrier, losses[:, 0], losses[:, -1]

"""The largest Hessian eigenvalue at many points at once (power iteration on HVPs).

Sharpness at the end of a run, the top eigenvalue of the Hessian there, says
how curved the loss is where the run settled (and, for gradient descent, the
largest stable step ``2 / lambda_max``). :func:`top_hessian_eigenvalues`
estimates it at every end point of a sweep in one compiled program, without
forming any Hessian.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from .cost_model import bucket
from .errors import ParameterError
from .problem import Problem

__all__ = ["top_hessian_eigenvalues"]

_CHUNK = 256  # points per compiled call


def _power_program(flat_loss: Callable[..., Any]) -> Callable[..., Any]:
    grad = jax.grad(flat_loss)

    def one(theta: jax.Array, v0: jax.Array, iters: jax.Array, data: Any) -> jax.Array:
        start = v0 / jnp.linalg.norm(v0)

        def body(i: jax.Array, carry: tuple[jax.Array, ...]) -> tuple[jax.Array, ...]:
            v, shift, _ = carry
            hv = jax.jvp(lambda t: grad(t, data), (theta,), (v,))[1]
            value = v @ hv  # Rayleigh quotient of H at the unit vector v
            # After the first pass: if the dominant eigenvalue is negative (a saddle),
            # restart on H - value * I, whose dominant eigenvalue is the top one.
            switch = i == iters
            shift = jnp.where(switch, jnp.minimum(value, 0), shift)
            w = jnp.where(switch & (value < 0), start, hv - shift * v)
            norm = jnp.linalg.norm(w)
            v = jnp.where(norm > 0, w / jnp.where(norm > 0, norm, 1), v)
            return v, shift, value

        zero = jnp.zeros((), theta.dtype)
        return jax.lax.fori_loop(0, 2 * iters + 1, body, (start, zero, zero))[2]

    return jax.jit(jax.vmap(one, in_axes=(0, 0, None, None)))


def top_hessian_eigenvalues(
    problem: Problem, points: Any, *, iterations: int = 60, seed: int = 0
) -> np.ndarray:
    """The largest Hessian eigenvalue at each of ``points`` (``(R, n)``), batched.

    Power iteration on Hessian-vector products for all points at once (one
    compiled program per bucket of point counts; the iteration count is
    traced). If the dominant eigenvalue is negative (a saddle or maximum),
    a second pass on ``H - lambda I`` finds the top one. The value is a
    Rayleigh quotient, so it never exceeds the true top eigenvalue; it is
    accurate when the top two eigenvalues are well separated, and
    ``iterations`` more passes tighten it. Rows that are not finite give NaN.

    Args:
        problem: the problem.
        points: ``(R, n)`` flat parameter vectors.
        iterations: power steps per pass (two passes).
        seed: seed of the start vectors.

    References:
        Golub, G. H. & Van Loan, C. F., Matrix Computations, section 8.2
        (the power method). Pearlmutter, B. A. (1994). Fast exact
        multiplication by the Hessian. Neural Computation 6(1):147-160.
    """
    problem.check_differentiable()
    pts = np.asarray(points)
    if pts.ndim != 2 or pts.shape[1] != problem.size:
        raise ParameterError(
            f"points must be an (R, {problem.size}) array of flat vectors; got shape {pts.shape}."
        )
    if isinstance(iterations, bool) or not isinstance(iterations, (int, np.integer)):
        raise ParameterError(f"iterations must be a positive integer; got {iterations!r}.")
    if not 1 <= iterations <= 100_000:
        raise ParameterError(f"iterations must be from 1 to 100000; got {iterations}.")
    out = np.full(pts.shape[0], np.nan)
    good = np.flatnonzero(np.all(np.isfinite(pts), axis=1))
    if not good.size:
        return out
    fn = problem.compiled(("top-eigenvalues",), lambda: _power_program(problem.flat_loss))
    rng = np.random.default_rng(seed)
    dtype = problem.dtype
    for lo in range(0, good.size, _CHUNK):
        idx = good[lo : lo + _CHUNK]
        size = bucket(idx.size)
        padded = np.concatenate([idx, np.full(size - idx.size, idx[0])])
        v0 = rng.standard_normal((size, problem.size)).astype(dtype)
        vals = fn(
            jnp.asarray(pts[padded], dtype), jnp.asarray(v0), np.int32(iterations), problem.data
        )
        out[idx] = np.asarray(vals, dtype=np.float64)[: idx.size]
    return out

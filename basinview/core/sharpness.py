"""Sharpness along descent runs: the top Hessian eigenvalue every ``k`` steps, in the loop.

``descend(..., sharpness_every=k)`` estimates, at iterates ``0, k, 2k, ...``
of every run, the largest Hessian eigenvalue ``lambda_max(H)`` (the
*sharpness*) by a few Lanczos steps on Hessian-vector products, inside the
compiled loop. Each record starts from the Ritz vector of the run's previous
record (carried in the loop state), so a few steps per record suffice while
the Hessian changes slowly; the first record of a run starts cold from a fixed
random vector and takes more steps. For adaptive rules with a diagonal
preconditioner ``P`` (Adam, RMSProp) the loop also estimates the
*preconditioned sharpness* ``lambda_max(P^-1 H)``, as the top eigenvalue of
``P^-1/2 H P^-1/2``, with ``P`` from the rule's state at that iterate (the
``P`` its last step divided by; none exists at iterate 0, which records NaN).

Lanczos gives the algebraically largest eigenvalue (not the largest in
magnitude, as plain power iteration would): where negative curvature
dominates, the sharpness is still the top of the spectrum. Its Ritz value
never exceeds ``lambda_max`` and never falls below the Rayleigh quotient of
its start vector, so a warm start can only improve on the previous estimate
of a Hessian that did not change.

The stability threshold that each run's sharpness is compared with
(:func:`sharpness_threshold`) is ``2 / lr`` for gradient descent,
``(2 + 2 beta) / lr`` for heavy-ball momentum,
``(2 + 2 beta) / ((1 + 2 beta) lr)`` for Nesterov momentum, and
:func:`~basinview.core.curvature.adaptive_threshold` ``/ lr`` on the
preconditioned sharpness for Adam and RMSProp. Full-batch gradient descent on
neural networks typically sharpens until the sharpness reaches ``2 / lr`` and
then hovers there (the edge of stability); adaptive rules do the same with the
preconditioned sharpness.

Cost and memory: each record linearises the gradient at the run's iterate
once (about a gradient's work) and then costs ``iterations`` tangent
products (about a gradient each; twice that for adaptive rules, which also
track the preconditioned operator), on the full data even when runs take
minibatch steps. The loop carries one (two for
adaptive rules) vector of ``n`` per run; a record needs an
``(iterations, n)`` Lanczos basis per run while it runs; the records are
``runs x (steps / k + 1)`` numbers. ``k``, ``iterations`` and
``first_iterations`` shape the compiled program (static): changing them
compiles again; learning rates, starts and the step budget do not.

Caution: a few warm-started Lanczos steps track the top eigenvalue only while
it stays the top one; when another eigenvalue overtakes it between records,
the estimate can lag for a record or two (it is a lower bound throughout).
Early in an Adam or RMSProp run ``P`` moves by several percent per step, so
the preconditioned operator changes more between records than ``H`` does:
3 steps per record lagged by up to 0.7% there (measured on a 24-parameter
quadratic, 10 steps apart), 6 steps by 1e-4; raise ``sharpness_iterations``
(default 2) when that matters.

References:
    Cohen, J. M., Kaur, S., Li, Y., Kolter, J. Z. & Talwalkar, A. (2021).
    Gradient descent on neural networks typically occurs at the edge of
    stability. ICLR. arXiv:2103.00065.
    Cohen, J. M. et al. (2022). Adaptive gradient methods at the edge of
    stability. arXiv:2207.14484.
    Lanczos, C. (1950). An iteration method for the solution of the eigenvalue
    problem of linear differential and integral operators. J. Res. Nat. Bur.
    Standards 45:255-282.
    Pearlmutter, B. A. (1994). Fast exact multiplication by the Hessian.
    Neural Computation 6(1):147-160.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np
import pandas as pd

from .checks import check_int
from .curvature import adaptive_threshold, stability_bound
from .errors import ParameterError

__all__ = [
    "LoopTracker",
    "SharpnessTracking",
    "loop_tracker",
    "sharpness_frame",
    "sharpness_threshold",
    "sharpness_tracking",
    "top_eigenpair",
]

MAX_ITERATIONS = 64
UNROLL_STEPS = 8  # Lanczos steps written out rather than looped (see _lanczos_unrolled)


@dataclass(frozen=True)
class SharpnessTracking:
    """How :func:`~basinview.core.descend` tracks sharpness along its runs (static).

    Attributes:
        every: record at iterates ``0, every, 2 * every, ...``.
        iterations: warm-started Lanczos steps (Hessian-vector products) per record.
        first_iterations: Lanczos steps of a run's first record, which starts
            cold from a fixed random vector (and of the first preconditioned
            record, at iterate ``every``).
    """

    every: int
    iterations: int = 2
    first_iterations: int = 16

    def record(self) -> dict[str, int]:
        return {
            "every": self.every,
            "iterations": self.iterations,
            "first_iterations": self.first_iterations,
        }

    def steps(self, budget: int) -> np.ndarray:
        """The recorded iterates of a run with step budget ``budget``."""
        return np.arange(0, budget + 1, self.every)


def sharpness_tracking(
    every: Any, iterations: Any = 2, first_iterations: Any = None, *, steps: int
) -> SharpnessTracking | None:
    """Validated :class:`SharpnessTracking` (None when ``every`` is 0 or None: no tracking)."""
    if every is None or (
        isinstance(every, (int, np.integer)) and not isinstance(every, bool) and every == 0
    ):
        return None
    k = check_int(
        every,
        "sharpness_every",
        1,
        max(1, steps),
        "It is the stride in steps between sharpness records (0 or None: none); it cannot "
        "exceed the step budget.",
    )
    m = check_int(
        iterations,
        "sharpness_iterations",
        1,
        MAX_ITERATIONS,
        "Each record costs this many Hessian-vector products per run; 2-6 is usual.",
    )
    m0 = max(16, 4 * m) if first_iterations is None else first_iterations
    m0 = check_int(
        m0,
        "sharpness_first_iterations",
        m,
        4 * MAX_ITERATIONS,
        "The first record of a run starts cold and needs at least as many steps as the others.",
    )
    return SharpnessTracking(every=k, iterations=m, first_iterations=m0)


def top_eigenpair(
    matvec: Callable[[jax.Array], jax.Array],
    start: jax.Array,
    steps: Any,
    max_steps: int | None = None,
) -> tuple[jax.Array, jax.Array]:
    """Top Ritz pair after ``steps`` Lanczos steps from ``start`` (jittable, one run).

    ``steps`` may be traced when ``max_steps`` (static, the size of the
    basis) is given. Full reorthogonalisation (classical Gram-Schmidt,
    twice). When the Krylov space closes early (``start`` already an
    eigenvector) or fewer than ``max_steps`` steps run, the unused rows of the
    tridiagonal matrix repeat the Rayleigh quotient of ``start``, which cannot
    exceed the top Ritz value, so the answer is unchanged. The Ritz vector is
    unit length; a non-finite result keeps ``start``.

    References:
        Lanczos, C. (1950). J. Res. Nat. Bur. Standards 45:255-282. Golub, G. H.
        & Van Loan, C. F., Matrix Computations, ch. 10 (from memory).
    """
    m = int(steps if max_steps is None else max_steps)
    n = start.shape[0]
    dtype = start.dtype
    eps = jnp.finfo(dtype).eps
    tiny = jnp.finfo(dtype).tiny
    q0 = start / jnp.maximum(jnp.linalg.norm(start), tiny)
    if max_steps is None and m <= UNROLL_STEPS:
        return _ritz_pair(*_lanczos_unrolled(matvec, q0, m), q0)
    basis = jnp.zeros((m, n), dtype).at[0].set(q0)

    def body(j: jax.Array, carry: tuple[jax.Array, ...]) -> tuple[jax.Array, ...]:
        basis, alpha, beta, alive = carry
        q = basis[j]
        w = matvec(q)
        size = jnp.linalg.norm(w)
        a = q @ w
        w = w - basis.T @ (basis @ w)
        w = w - basis.T @ (basis @ w)
        b = jnp.linalg.norm(w)
        ok = alive & (b > 64 * eps * (size + tiny))
        nxt = jnp.where(ok, w / jnp.where(ok, b, 1), 0)
        basis = basis.at[j + 1].set(nxt, mode="drop")
        alpha = alpha.at[j].set(jnp.where(alive, a, alpha[0]))
        beta = beta.at[j].set(jnp.where(ok, b, 0))
        return basis, alpha, beta, ok

    count = jnp.minimum(jnp.asarray(steps, jnp.int32), m)
    init = (basis, jnp.zeros(m, dtype), jnp.zeros(m, dtype), jnp.array(True))
    basis, alpha, beta, _ = jax.lax.fori_loop(0, count, body, init)
    rows = jnp.arange(m)
    alpha = jnp.where(rows >= count, alpha[0], alpha)
    off = jnp.where(rows >= count - 1, 0, beta)[: m - 1]
    basis = jnp.where((rows >= count)[:, None], 0, basis)
    return _ritz_pair(basis, alpha, off, q0)


def _lanczos_unrolled(
    matvec: Callable[[jax.Array], jax.Array], q0: jax.Array, m: int
) -> tuple[jax.Array, jax.Array, jax.Array]:
    """``m`` Lanczos steps written out (``m`` small and static): ``(basis, alpha, beta)``.

    The same arithmetic as :func:`top_eigenpair`'s loop, without a loop: each
    step's basis is the list so far, and the last step's residual, which only
    the next step would use, is not reorthogonalised. Measured on a
    1,185-parameter network (16 runs, 2 steps): 2.7 ms against 3.5 ms for the
    loop, whose dynamic slices of the basis cost more than the two
    Hessian-vector products' other work.
    """
    dtype = q0.dtype
    eps = jnp.finfo(dtype).eps
    tiny = jnp.finfo(dtype).tiny
    qs: list[jax.Array] = [q0]
    alphas: list[jax.Array] = []
    betas: list[jax.Array] = []
    alive = jnp.array(True)
    for j in range(m):
        q = qs[j]
        w = matvec(q)
        a = q @ w
        alphas.append(a if j == 0 else jnp.where(alive, a, alphas[0]))
        if j + 1 == m:
            break
        size = jnp.linalg.norm(w)
        basis = jnp.stack(qs)
        w = w - basis.T @ (basis @ w)
        w = w - basis.T @ (basis @ w)
        b = jnp.linalg.norm(w)
        ok = alive & (b > 64 * eps * (size + tiny))
        qs.append(jnp.where(ok, w / jnp.where(ok, b, 1), 0))
        betas.append(jnp.where(ok, b, 0))
        alive = ok
    off = jnp.stack(betas) if betas else jnp.zeros(0, dtype)
    return jnp.stack(qs), jnp.stack(alphas), off


def _ritz_pair(
    basis: jax.Array, alpha: jax.Array, off: jax.Array, q0: jax.Array
) -> tuple[jax.Array, jax.Array]:
    """Top Ritz value and unit Ritz vector of a Lanczos basis and tridiagonal matrix."""
    tri = jnp.diag(alpha) + jnp.diag(off, 1) + jnp.diag(off, -1)
    values, vectors = jnp.linalg.eigh(tri)
    ritz = basis.T @ vectors[:, -1]
    size = jnp.linalg.norm(ritz)
    good = jnp.isfinite(values[-1]) & (size > 0.5) & jnp.all(jnp.isfinite(ritz))
    vec = jnp.where(good, ritz / jnp.where(good, size, 1), q0)
    return values[-1], vec


class LoopTracker(NamedTuple):
    """The two hooks of the descent loop (batched over runs; see :func:`loop_tracker`).

    ``start(theta, hyper, data) -> (probes, sharpness, preconditioned)`` before
    the loop; ``step(k, before, after, hyper, probes, sharpness,
    preconditioned, data, offset=0)`` after step ``k`` of the loop (``before``
    and ``after``: the batched run states around it). ``offset`` is the record
    index held in row 0 of ``sharpness`` (a segment of the loop writes its own
    rows, see :mod:`basinview.core.compaction`).
    """

    start: Callable[..., Any]
    step: Callable[..., Any]


def loop_tracker(
    flat_loss: Callable[..., jax.Array],
    rule: Any,
    tracking: SharpnessTracking | None,
    batched: Callable[..., Any],
    n_runs: int,
    n_steps: int,
) -> LoopTracker:
    """The sharpness hooks of the compiled descent loop (no-ops without ``tracking``).

    A record is a branch of the loop taken at recorded iterates only (its
    predicate depends on the step, not on the run, so skipped steps cost
    nothing). Cold records (a run's first, and for adaptive rules the first
    preconditioned one) run ``first_iterations`` Lanczos steps, warm ones
    ``iterations``, each with a basis of exactly that size. Each record
    linearises the gradient once at the run's iterate (about one gradient's
    work) and then pays only the tangent part of each Hessian-vector
    product; for adaptive rules the plain and the preconditioned operators
    share that linearisation and run side by side (vmapped). Iterate 0 is
    recorded in the loop's first pass (before the loop when ``every == 1``),
    so a call in which no run takes a step (all converged at their starts)
    records NaN there.
    """
    if tracking is None:

        def start_off(theta: jax.Array, hyper: Any, data: Any) -> tuple[Any, ...]:
            empty = jnp.full((0, n_runs), jnp.nan, theta.dtype)
            return (), empty, empty

        def step_off(k, before, after, hyper, probes, sharp, pre, data, offset=0):
            return probes, sharp, pre

        return LoopTracker(start_off, step_off)
    every, m, m0 = tracking.every, tracking.iterations, tracking.first_iterations
    n_rec = n_steps // every + 1
    adaptive = rule.preconditioner is not None
    grad = jax.grad(flat_loss)
    first_in_loop = every > 1

    def measure(theta, opt_state, hyper, probes, sizes, data):
        """One run: ``(probes, lambda, lambda_pre)`` after ``sizes`` (static) Lanczos steps.

        ``sizes = (plain, preconditioned)``: the steps of each operator, each
        with a basis of exactly that size, so a warm record pays for
        ``iterations`` steps only (its reorthogonalisation and tridiagonal
        eigenproblem too), not for a cold start's ``first_iterations``. A
        preconditioned size of 0 skips that operator (iterate 0 has no ``P``).
        """
        # One linearisation of the gradient at ``theta`` serves every Lanczos step
        # (and both operators of an adaptive rule): each step then pays only the
        # tangent part of a Hessian-vector product, not the gradient again.
        _, hv = jax.linearize(lambda t: grad(t, data), theta)
        size, size_pre = sizes
        nan = jnp.array(jnp.nan, theta.dtype)
        if not adaptive:
            lam, v = top_eigenpair(hv, probes[0], size)
            return (v,), lam, nan
        if not size_pre:
            lam, v = top_eigenpair(hv, probes[0], size)
            return (v, probes[1]), lam, nan
        scale = jax.lax.rsqrt(rule.preconditioner(opt_state, hyper))

        def pre(q: jax.Array) -> jax.Array:
            return scale * hv(scale * q)

        if size != size_pre:  # the first preconditioned record: only that one starts cold
            lam, v = top_eigenpair(hv, probes[0], size)
            lam_p, v_p = top_eigenpair(pre, probes[1], size_pre)
            return (v, v_p), lam, lam_p
        scales = jnp.stack([jnp.ones_like(scale), scale])

        def one(s: jax.Array, q0: jax.Array) -> tuple[jax.Array, jax.Array]:
            return top_eigenpair(lambda q: s * hv(s * q), q0, size)

        lams, vecs = jax.vmap(one)(scales, jnp.stack(probes))
        return (vecs[0], vecs[1]), lams[0], lams[1]

    def start(theta: jax.Array, hyper: Any, data: Any) -> tuple[Any, ...]:
        # a fixed random start (the same for every run: results do not depend on the seed)
        v0 = jax.random.normal(jax.random.key(20260), theta.shape[1:], theta.dtype)
        probes = tuple(jnp.broadcast_to(v0, theta.shape) for _ in range(1 + adaptive))
        sharp = jnp.full((n_rec, n_runs), jnp.nan, theta.dtype)
        if not first_in_loop:  # every == 1: iterate 0 is recorded here, cold, plain only
            probes, lam, _ = batched(
                lambda t, q: measure(t, None, None, q, (m0, 0), data), theta, probes
            )
            sharp = sharp.at[0].set(lam)
        return probes, sharp, jnp.full((n_rec, n_runs), jnp.nan, theta.dtype)

    def step(k, before, after, hyper, probes, sharp, pre, data, offset=0):
        first = (k == 0) if first_in_loop else jnp.array(False)
        due = ((k + 1) % every == 0) | first

        def go(operand: tuple[Any, ...]) -> tuple[Any, ...]:
            probes, sharp, pre = operand

            def pick(a: jax.Array, b: jax.Array) -> jax.Array:
                return jnp.where(first, a, b)

            theta = pick(before.theta, after.theta)
            opt_state = jax.tree_util.tree_map(pick, before.opt_state, after.opt_state)
            # A cold record (a run's first, and for adaptive rules the first
            # preconditioned one, at iterate ``every``) takes ``first_iterations``
            # steps for the operator that starts cold and ``iterations`` for a warm
            # one; iterate 0 of an adaptive rule measures the plain operator only
            # (no ``P`` exists yet). The predicates depend on the step only, so
            # this is a branch, not a select over runs.
            def measured(sizes: tuple[int, int]) -> Callable[[Any], tuple[Any, ...]]:
                def run(args: tuple[Any, ...]) -> tuple[Any, ...]:
                    th, st, p = args
                    return batched(
                        lambda t, s, h, q: measure(t, s, h, q, sizes, data), th, st, hyper, p
                    )

                return run

            if adaptive:
                branch = jnp.where(first, 1, jnp.where(k + 1 == every, 2, 0))
                new, lam, lam_p = jax.lax.switch(
                    branch,
                    [measured((m, m)), measured((m0, 0)), measured((m, m0))],
                    (theta, opt_state, probes),
                )
            else:
                new, lam, lam_p = jax.lax.cond(
                    first, measured((m0, 0)), measured((m, 0)), (theta, opt_state, probes)
                )
            mask = before.running | first
            nan = jnp.array(jnp.nan, lam.dtype)
            kept = [jnp.where(mask[:, None], new[0], probes[0])]
            if adaptive:  # no preconditioner at iterate 0: keep the cold start vector
                kept.append(jnp.where((mask & ~first)[:, None], new[1], probes[1]))
            j = jnp.where(first, 0, (k + 1) // every) - offset
            return (
                tuple(kept),
                sharp.at[j].set(jnp.where(mask, lam, nan)),
                pre.at[j].set(jnp.where(mask & ~first, lam_p, nan)),
            )

        return jax.lax.cond(due, go, lambda operand: operand, (probes, sharp, pre))

    return LoopTracker(start, step)


def sharpness_threshold(optimizer: str, hyper: Mapping[str, float]) -> tuple[float | None, str]:
    """The sharpness above which a run at these hyper-parameters is locally unstable.

    Returns ``(threshold, quantity)``: ``quantity`` is ``"sharpness"``
    (``lambda_max(H)``) for gradient descent and the momentum rules, and
    ``"preconditioned_sharpness"`` (``lambda_max(P^-1 H)``) for Adam and
    RMSProp. ``threshold`` is None for rules without a published one (the
    sequential variant, optax rules).

    * gradient descent: ``2 / lr``;
    * heavy-ball momentum ``beta``: ``(2 + 2 beta) / lr``;
    * Nesterov momentum ``beta``: ``(2 + 2 beta) / ((1 + 2 beta) lr)``;
    * Adam with ``b1``: ``(2 + 2 b1) / ((1 - b1) lr)`` (``38 / lr`` for
      ``b1 = 0.9``); RMSProp: ``2 / lr``, both on the preconditioned sharpness.

    References:
        Cohen, J. M., Kaur, S., Li, Y., Kolter, J. Z. & Talwalkar, A. (2021).
        Gradient descent on neural networks typically occurs at the edge of
        stability. ICLR. arXiv:2103.00065.
        Cohen, J. M. et al. (2022). Adaptive gradient methods at the edge of
        stability. arXiv:2207.14484.
        Polyak, B. T. (1964). USSR Comput. Math. Math. Phys. 4(5):1-17.
    """
    lr = float(hyper["learning_rate"])
    adaptive = adaptive_threshold(optimizer, hyper)
    if adaptive is not None:
        return adaptive / lr, "preconditioned_sharpness"
    # stability_bound(rule, 1, hyper) is the constant c of the bound lr < c / lambda_max
    c = stability_bound(optimizer, 1.0, hyper)
    return (None if c is None else c / lr), "sharpness"


def sharpness_frame(runs: Any) -> pd.DataFrame:
    """Tidy table of the sharpness records: one row per run and recorded iterate.

    Columns: ``run``, ``step``, the run's hyper-parameters, ``status``,
    ``sharpness``, ``preconditioned_sharpness`` (NaN for rules without a
    preconditioner), ``threshold`` (see :func:`sharpness_threshold`; NaN when
    none) and ``ratio`` (the compared quantity over the threshold: 1 is the
    edge of stability). Rows after a run stopped are left out.
    """
    if runs.sharpness is None or runs.sharpness_steps is None:
        raise ParameterError(
            "these runs did not track sharpness; run descend(..., sharpness_every=k) "
            "(e.g. k=10) to record it."
        )
    steps = runs.sharpness_steps
    r, j = runs.sharpness.shape
    pre = runs.preconditioned_sharpness
    pre_values = np.full((r, j), np.nan) if pre is None else pre
    frame: dict[str, Any] = {
        "run": np.repeat(np.arange(r), j),
        "step": np.tile(steps, r),
    }
    for name, values in runs.hyper.items():
        frame[name] = np.repeat(values, j)
    frame["status"] = np.repeat(runs.status, j)
    frame["sharpness"] = runs.sharpness.ravel()
    frame["preconditioned_sharpness"] = pre_values.ravel()
    thresholds = np.full(r, np.nan)
    compared = np.empty((r, j))
    for i in range(r):
        hyper = {k: float(v[i]) for k, v in runs.hyper.items()}
        value, quantity = sharpness_threshold(runs.rule, hyper)
        thresholds[i] = np.nan if value is None else value
        compared[i] = pre_values[i] if quantity == "preconditioned_sharpness" else runs.sharpness[i]
    frame["threshold"] = np.repeat(thresholds, j)
    frame["ratio"] = (compared / thresholds[:, None]).ravel()
    out = pd.DataFrame(frame)
    keep = out["step"].to_numpy() <= np.repeat(runs.stop_step, j)
    return out[keep].reset_index(drop=True)

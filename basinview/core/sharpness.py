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

Cost and memory: each record costs ``iterations`` Hessian-vector products per
run (about 2-3 gradients each; twice that for adaptive rules), on the full
data even when runs take minibatch steps. The loop carries one (two for
adaptive rules) vector of ``n`` per run; a record needs an
``(iterations, n)`` Lanczos basis per run while it runs; the records are
``runs x (steps / k + 1)`` numbers. ``k``, ``iterations`` and
``first_iterations`` shape the compiled program (static): changing them
compiles again; learning rates, starts and the step budget do not.

Caution: a few warm-started Lanczos steps track the top eigenvalue only while
it stays the top one; when another eigenvalue overtakes it between records,
the estimate can lag for a record or two (it is a lower bound throughout).

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
from typing import TYPE_CHECKING, Any

import jax
import jax.numpy as jnp
import numpy as np
import pandas as pd

from .curvature import adaptive_threshold, stability_bound
from .errors import ParameterError

if TYPE_CHECKING:  # pragma: no cover
    from .runs import Runs

__all__ = [
    "SharpnessTracking",
    "sharpness_frame",
    "sharpness_threshold",
    "sharpness_tracking",
    "top_eigenpair",
]

MAX_ITERATIONS = 64


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
    iterations: int = 4
    first_iterations: int = 20

    def record(self) -> dict[str, int]:
        return {
            "every": self.every,
            "iterations": self.iterations,
            "first_iterations": self.first_iterations,
        }

    def steps(self, budget: int) -> np.ndarray:
        """The recorded iterates of a run with step budget ``budget``."""
        return np.arange(0, budget + 1, self.every)


def _count(value: Any, name: str, low: int, high: int, hint: str) -> int:
    if (
        isinstance(value, bool)
        or not isinstance(value, (int, np.integer))
        or not low <= value <= high
    ):
        raise ParameterError(f"{name} must be an integer from {low} to {high}; got {value!r}. {hint}")
    return int(value)


def sharpness_tracking(
    every: Any, iterations: Any = 4, first_iterations: Any = None, *, steps: int
) -> SharpnessTracking | None:
    """Validated :class:`SharpnessTracking` (None when ``every`` is 0 or None: no tracking)."""
    if every is None or (isinstance(every, (int, np.integer)) and not isinstance(every, bool) and every == 0):
        return None
    k = _count(
        every,
        "sharpness_every",
        1,
        max(1, steps),
        "It is the stride in steps between sharpness records (0 or None: none); it cannot "
        "exceed the step budget.",
    )
    m = _count(
        iterations,
        "sharpness_iterations",
        1,
        MAX_ITERATIONS,
        "Each record costs this many Hessian-vector products per run; 3-6 is usual.",
    )
    m0 = 5 * m if first_iterations is None else first_iterations
    m0 = _count(
        m0,
        "sharpness_first_iterations",
        m,
        4 * MAX_ITERATIONS,
        "The first record of a run starts cold and needs at least as many steps as the others.",
    )
    return SharpnessTracking(every=k, iterations=m, first_iterations=m0)


def top_eigenpair(
    matvec: Callable[[jax.Array], jax.Array], start: jax.Array, steps: int
) -> tuple[jax.Array, jax.Array]:
    """Top Ritz pair after ``steps`` Lanczos steps from ``start`` (jittable, one run).

    Full reorthogonalisation (classical Gram-Schmidt, twice). When the Krylov
    space closes early (``start`` already an eigenvector, or ``steps`` exceeds
    its dimension) the unused rows of the tridiagonal matrix repeat the
    Rayleigh quotient of ``start``, which cannot exceed the top Ritz value, so
    the answer is unchanged. The Ritz vector is unit length; a non-finite
    result keeps ``start``.

    References:
        Lanczos, C. (1950). J. Res. Nat. Bur. Standards 45:255-282. Golub, G. H.
        & Van Loan, C. F., Matrix Computations, ch. 10 (from memory).
    """
    m = int(steps)
    n = start.shape[0]
    dtype = start.dtype
    eps = jnp.finfo(dtype).eps
    tiny = jnp.finfo(dtype).tiny
    q0 = start / jnp.maximum(jnp.linalg.norm(start), tiny)
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

    init = (basis, jnp.zeros(m, dtype), jnp.zeros(m, dtype), jnp.array(True))
    basis, alpha, beta, _ = jax.lax.fori_loop(0, m, body, init)
    off = beta[: m - 1]
    tri = jnp.diag(alpha) + jnp.diag(off, 1) + jnp.diag(off, -1)
    values, vectors = jnp.linalg.eigh(tri)
    ritz = basis.T @ vectors[:, -1]
    size = jnp.linalg.norm(ritz)
    good = jnp.isfinite(values[-1]) & (size > 0.5) & jnp.all(jnp.isfinite(ritz))
    vec = jnp.where(good, ritz / jnp.where(good, size, 1), q0)
    return values[-1], vec


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


def sharpness_frame(runs: Runs) -> pd.DataFrame:
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

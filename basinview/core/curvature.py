"""Curvature: Hessian spectra from Hessian-vector products, and step-size bounds.

The Hessian at a point tells why a step size fails. For gradient descent on
a quadratic, every eigen-direction of the Hessian is multiplied by
``1 - lr * lambda`` per step, so the run is stable only if
``lr < 2 / lambda_max``; momentum methods have their own bounds. This module
computes the top (and bottom) of the spectrum without forming the Hessian for
large models (Lanczos on Hessian-vector products) and exactly for small ones.

Caution: on a non-quadratic loss the bound at a minimum says whether that
minimum is a stable fixed point of the update rule. Exceeding it means the
run cannot settle there, not that it must blow up: it may oscillate, settle
elsewhere, or diverge.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from .checks import finite_point, require_plane
from .errors import ParameterError
from .planes import Plane, flat_origin
from .problem import Problem

__all__ = [
    "EXACT_LIMIT",
    "LANCZOS_TOL",
    "Spectrum",
    "adaptive_threshold",
    "gauss_newton_matrix",
    "hessian_matrix",
    "hessian_plane",
    "hessian_spectrum",
    "optimal_fixed_step",
    "preconditioned_sharpness",
    "stability_bound",
    "standard_errors",
]

EXACT_LIMIT = 400
"""Largest parameter count for which the dense Hessian is formed by default."""


@dataclass(frozen=True, eq=False)
class Spectrum:
    """Extreme Hessian eigenvalues at a point.

    Attributes:
        values: the ``k`` largest eigenvalues, descending.
        vectors: ``(k, n)`` unit eigenvectors matching ``values``.
        lambda_min: the smallest eigenvalue (negative at saddles and maxima).
        method: ``"exact"`` (dense Hessian + eigh) or ``"lanczos"``.
        matvecs: Hessian-vector products Lanczos used (None for ``"exact"``).
    """

    values: np.ndarray
    vectors: np.ndarray
    lambda_min: float
    method: str
    matvecs: int | None = None

    @property
    def lambda_max(self) -> float:
        return float(self.values[0])

    @property
    def condition(self) -> float:
        """``lambda_max / lambda_min`` when the Hessian is positive definite, else inf."""
        if self.lambda_min <= 0:
            return math.inf
        return self.lambda_max / self.lambda_min


def hessian_matrix(problem: Problem, theta: Any) -> np.ndarray:
    """The dense ``(n, n)`` Hessian at ``theta`` (use for small ``n`` only)."""
    problem.check_differentiable()
    fn = problem.compiled("hessian", lambda: jax.jit(jax.hessian(problem.flat_loss)))
    h = np.asarray(fn(finite_point(problem, theta), problem.data), dtype=np.float64)
    return 0.5 * (h + h.T)


LANCZOS_TOL = 1e-10
"""Residual bound, relative to the largest Ritz value, at which Lanczos stops."""


def _lanczos(
    matvec: Callable[[np.ndarray], np.ndarray],
    n: int,
    iterations: int,
    seed: int,
    k: int | None = None,
    tol: float = LANCZOS_TOL,
    smallest: bool = True,
) -> tuple[np.ndarray, np.ndarray, int]:
    """Ritz values and vectors by Lanczos (full reorthogonalisation), and the step count.

    With ``k`` the iteration stops as soon as the ``k`` largest Ritz values
    and (with ``smallest``) the smallest one have converged: for a Ritz pair ``(theta_i, y_i)``
    of the ``m``-step tridiagonal matrix, ``|beta_m s_mi|`` (``s_mi`` the
    last component of its eigenvector) is the residual norm
    ``||H y_i - theta_i y_i||`` and bounds ``theta_i``'s distance to an
    eigenvalue; each must be below ``tol`` times the largest ``|theta|``.
    Otherwise (or if they never converge) it runs ``iterations`` steps.
    """
    rng = np.random.default_rng(seed)
    q = rng.standard_normal(n)
    q /= np.linalg.norm(q)
    basis = np.zeros((iterations, n))
    alpha = np.zeros(iterations)
    beta = np.zeros(iterations)
    m = iterations
    for j in range(iterations):
        basis[j] = q
        w = matvec(q)
        alpha[j] = q @ w
        w = w - basis[: j + 1].T @ (basis[: j + 1] @ w)
        w = w - basis[: j + 1].T @ (basis[: j + 1] @ w)
        b = np.linalg.norm(w)
        if j + 1 < iterations:
            if b < 1e-12 * max(1.0, abs(alpha[j])):
                m = j + 1
                break
            if (
                k is not None
                and j + 1 >= k + 1
                and _converged(alpha[: j + 1], beta[:j], float(b), k, tol, smallest)
            ):
                m = j + 1
                break
            beta[j] = b
            q = w / b
    t = np.diag(alpha[:m]) + np.diag(beta[: m - 1], 1) + np.diag(beta[: m - 1], -1)
    vals, vecs = np.linalg.eigh(t)
    ritz = vecs.T @ basis[:m]
    return vals, ritz, m


def _converged(
    alpha: np.ndarray, beta: np.ndarray, b: float, k: int, tol: float, smallest: bool = True
) -> bool:
    """Whether the top-``k`` (and the smallest) Ritz values of ``T`` have residual bounds below tol."""
    t = np.diag(alpha) + np.diag(beta, 1) + np.diag(beta, -1)
    vals, vecs = np.linalg.eigh(t)
    bounds = np.abs(b * vecs[-1])
    scale = max(float(np.abs(vals).max()), np.finfo(float).tiny)
    watched = np.arange(len(vals) - min(k, len(vals)), len(vals))
    if smallest:
        watched = np.r_[watched, 0]
    return bool(np.all(bounds[watched] <= tol * scale))


def hessian_spectrum(
    problem: Problem,
    theta: Any,
    k: int = 2,
    *,
    method: str = "auto",
    iterations: int | None = None,
    seed: int = 0,
    tol: float = LANCZOS_TOL,
    smallest: bool = True,
) -> Spectrum:
    """Top-``k`` Hessian eigenpairs and the smallest eigenvalue at ``theta``.

    Args:
        problem: the problem.
        theta: the point (pytree or flat vector).
        k: number of largest eigenpairs to return.
        method: ``"exact"`` forms the Hessian and calls ``eigh``; ``"lanczos"``
            runs Lanczos iterations on Hessian-vector products (memory O(n x
            iterations)); ``"auto"`` is exact up to :data:`EXACT_LIMIT` parameters.
        iterations: most Lanczos steps (default ``min(n, max(4k + 40, 60))``).
            Lanczos stops earlier once the ``k`` largest Ritz values and the
            smallest have converged (residual bound ``|beta_m s_mi|`` below
            ``tol`` times the largest Ritz value); :attr:`Spectrum.matvecs`
            says how many Hessian-vector products it used.
        seed: seed of the Lanczos start vector.
        tol: relative residual bound at which Lanczos stops.
        smallest: whether Lanczos also waits for the smallest Ritz value to
            converge (the default). With False it stops once the top ``k``
            have, which in a network's crowded bulk of small eigenvalues can
            take several times fewer products (on the 26,122-parameter digits
            network: 20 against 60); ``lambda_min`` is then the smallest Ritz
            value reached, an upper bound on the smallest eigenvalue (so a
            negative one still proves negative curvature, but a positive one
            does not prove a minimum).

    References:
        Lanczos, C. (1950). An iteration method for the solution of the eigenvalue
        problem of linear differential and integral operators. J. Res. Nat. Bur.
        Standards 45:255-282. Golub, G. H. & Van Loan, C. F., Matrix Computations,
        ch. 10 (the residual bound of a Ritz pair). Parlett, B. N. (1998). The
        Symmetric Eigenvalue Problem. SIAM, ch. 13. Pearlmutter, B. A. (1994). Fast exact multiplication by the
        Hessian. Neural Computation 6(1):147-160.
    """
    n = problem.size
    if isinstance(k, bool) or not isinstance(k, (int, np.integer)) or not 1 <= k <= n:
        raise ParameterError(
            f"k must be an integer from 1 to {n} (the parameter count); got {k!r}."
        )
    if method not in ("auto", "exact", "lanczos"):
        raise ParameterError(f"method must be 'auto', 'exact' or 'lanczos'; got {method!r}.")
    if isinstance(tol, bool) or not isinstance(tol, (int, float)) or not 0 < tol < 1:
        raise ParameterError(f"tol must be a number between 0 and 1, e.g. 1e-10; got {tol!r}.")
    point = finite_point(problem, theta)
    value = float(problem.value(point))
    if not np.isfinite(value):
        raise ParameterError(
            f"the loss is {value} at this point, so its curvature means nothing there (a "
            "NaN branch of jnp.where even has a zero Hessian); choose a point where the "
            "loss is finite, e.g. a converged run's end point."
        )
    if method == "exact" or (method == "auto" and n <= EXACT_LIMIT):
        h = hessian_matrix(problem, point)
        if not np.all(np.isfinite(h)):
            raise ParameterError(
                "the Hessian is not finite at this point (the loss or its derivatives are "
                "NaN or inf there); choose a point where the loss is finite, e.g. a "
                "converged run's end point."
            )
        vals, vecs = np.linalg.eigh(h)
        order = np.argsort(vals)[::-1][:k]
        return Spectrum(vals[order], vecs[:, order].T, float(vals[0]), "exact")
    steps = iterations or min(n, max(4 * k + 40, 60))
    dtype = problem.dtype

    def matvec(v: np.ndarray) -> np.ndarray:
        return np.asarray(problem.hvp(point, np.asarray(v, dtype)), dtype=np.float64)

    vals, ritz, used = _lanczos(matvec, n, steps, seed, k=k, tol=tol, smallest=bool(smallest))
    if not np.all(np.isfinite(vals)):
        raise ParameterError(
            "Hessian-vector products are not finite at this point; choose a point where "
            "the loss is finite, e.g. a converged run's end point."
        )
    order = np.argsort(vals)[::-1][:k]
    vecs = ritz[order]
    vecs /= np.linalg.norm(vecs, axis=1, keepdims=True)
    return Spectrum(vals[order], vecs, float(vals.min()), "lanczos", used)


def stability_bound(
    optimizer: str, lambda_max: float, hyper: Mapping[str, float] | None = None
) -> float | None:
    """Largest stable learning rate predicted at a point with top eigenvalue ``lambda_max``.

    * gradient descent: ``2 / lambda_max``;
    * heavy-ball momentum ``beta``: ``2 (1 + beta) / lambda_max``;
    * Nesterov momentum ``beta``: ``(2 + 2 beta) / ((1 + 2 beta) lambda_max)``.

    Returns None for update rules without a fixed bound in ``lambda_max``
    alone (Adam, RMSProp, the sequential variant: see
    :func:`preconditioned_sharpness` and :func:`sequential_bound`) and when
    ``lambda_max <= 0`` (no curvature limits the step).

    References:
        Polyak, B. T. (1964). Some methods of speeding up the convergence of
        iteration methods. USSR Comput. Math. Math. Phys. 4(5):1-17.
        Nesterov, Y. (1983). A method of solving a convex programming problem
        with convergence rate O(1/k^2). Soviet Math. Dokl. 27:372-376.
    """
    hyper = dict(hyper or {})
    if not math.isfinite(lambda_max) or lambda_max <= 0:
        return None
    name = optimizer.lower()
    if name in ("gradient_descent", "gd"):
        return 2.0 / lambda_max
    beta = float(hyper.get("momentum", 0.9))
    if name in ("momentum", "heavy_ball"):
        return 2.0 * (1.0 + beta) / lambda_max
    if name in ("nesterov", "nag"):
        return (2.0 + 2.0 * beta) / ((1.0 + 2.0 * beta) * lambda_max)
    return None


def sequential_bound(hessian: np.ndarray) -> float | None:
    """A learning rate below which the sequential variant surely converges on a quadratic.

    Coordinate-by-coordinate updates with step ``lr`` on a quadratic with
    symmetric positive definite Hessian ``H`` form the splitting
    ``M = I / lr + L`` (``L`` the strictly lower part of ``H``). By the
    Householder-John theorem the iteration converges from every start when
    ``M + M^T - H = 2 I / lr - diag(H)`` is positive definite, i.e. for
    ``lr < 2 / max_i H_ii``. This is sufficient, not necessary: the exact
    threshold (where the iteration matrix's spectral radius reaches 1) can be
    higher. It is never below gradient descent's ``2 / lambda_max``.

    References:
        Ortega, J. M. (1972). Numerical Analysis: A Second Course. Academic
        Press (Householder-John theorem; from memory).
    """
    h = np.asarray(hessian, dtype=np.float64)
    diag = np.diag(h)
    if np.any(np.linalg.eigvalsh(h) <= 0) or diag.max() <= 0:
        return None
    return float(2.0 / diag.max())


def optimal_fixed_step(lambda_max: float, lambda_min: float) -> float | None:
    """``2 / (L + mu)``, the fixed step that contracts fastest on a quadratic (mu > 0).

    References:
        Nesterov, Y. (2004). Introductory Lectures on Convex Optimization,
        Theorem 2.1.15.
    """
    if not (lambda_min > 0 and lambda_max >= lambda_min):
        return None
    return 2.0 / (lambda_max + lambda_min)


def adaptive_threshold(optimizer: str, hyper: Mapping[str, float] | None = None) -> float | None:
    """Stability threshold of ``lr * lambda_max(P^-1 H)`` for adaptive rules.

    For Adam with first-moment decay ``b1`` the threshold is
    ``(2 + 2 b1) / (1 - b1)`` (38 for ``b1 = 0.9``); RMSProp has no momentum
    and the threshold 2 of gradient descent on the preconditioned problem.
    The preconditioner ``P = diag(sqrt(v) + eps)`` changes during a run, so
    this is a statement about the current state, not a fixed learning rate.

    References:
        Cohen, J. M. et al. (2022). Adaptive gradient methods at the edge of
        stability. arXiv:2207.14484.
    """
    hyper = dict(hyper or {})
    name = optimizer.lower()
    if name == "adam":
        b1 = float(hyper.get("b1", 0.9))
        return (2.0 + 2.0 * b1) / (1.0 - b1)
    if name == "rmsprop":
        return 2.0
    return None


def preconditioned_sharpness(
    problem: Problem, theta: Any, precond: Any, *, method: str = "auto", seed: int = 0
) -> float:
    """``lambda_max(P^-1 H)`` for a positive diagonal preconditioner ``P`` at ``theta``.

    Computed as the top eigenvalue of the symmetric ``P^-1/2 H P^-1/2`` (same
    spectrum): exactly up to :data:`EXACT_LIMIT` parameters, else by Lanczos
    on scaled Hessian-vector products. An adaptive rule whose state divides
    the gradient by ``P`` is locally stable while ``lr`` times this value
    stays below :func:`adaptive_threshold`.

    Args:
        problem: the problem.
        theta: the point (pytree or flat vector).
        precond: the diagonal of ``P`` (pytree or flat vector), positive, e.g.
            ``Runs.preconditioner[i]`` of an Adam or RMSProp run.
        method: ``"auto"``, ``"exact"`` or ``"lanczos"`` as in :func:`hessian_spectrum`.
        seed: seed of the Lanczos start vector.

    References:
        Cohen, J. M. et al. (2022). Adaptive gradient methods at the edge of
        stability. arXiv:2207.14484.
    """
    p = np.asarray(problem.flatten(precond, what="preconditioner"), dtype=np.float64)
    if np.any(p <= 0) or not np.all(np.isfinite(p)):
        raise ParameterError(
            "the preconditioner must be positive and finite; pass the diagonal P an "
            "adaptive rule divides by (e.g. Runs.preconditioner of a run that did not diverge)."
        )
    if method not in ("auto", "exact", "lanczos"):
        raise ParameterError(f"method must be 'auto', 'exact' or 'lanczos'; got {method!r}.")
    s = 1.0 / np.sqrt(p)
    n = problem.size
    if method == "exact" or (method == "auto" and n <= EXACT_LIMIT):
        h = hessian_matrix(problem, theta)
        return float(np.linalg.eigvalsh(h * s[:, None] * s[None, :])[-1])
    point = finite_point(problem, theta)
    dtype = problem.dtype

    def matvec(v: np.ndarray) -> np.ndarray:
        hv = problem.hvp(point, jnp.asarray(s * v, dtype))
        return s * np.asarray(hv, dtype=np.float64)

    vals, _, _ = _lanczos(matvec, n, min(n, 60), seed, k=1)
    return float(vals.max())


def gauss_newton_matrix(problem: Problem, theta: Any, residuals: Callable[..., Any]) -> np.ndarray:
    """``J^T J`` for ``residuals(params, *data) -> vector`` at ``theta``.

    For a loss ``sum(residuals**2)`` the Hessian is ``2 J^T J`` plus terms
    weighted by the residuals; near a good fit ``2 J^T J`` dominates.
    """
    point = finite_point(problem, theta)

    def flat_res(t: jax.Array) -> jax.Array:
        return jnp.ravel(residuals(problem.flattener.unravel(t), *problem.data))

    j = np.asarray(jax.jacfwd(flat_res)(point), dtype=np.float64)
    return j.T @ j


def standard_errors(problem: Problem, theta: Any, residuals: Callable[..., Any]) -> np.ndarray:
    """Standard errors ``sqrt(s^2 diag((J^T J)^-1))`` of a least-squares fit.

    ``s^2 = RSS / (m - n)`` with ``m`` residuals and ``n`` parameters: the
    usual asymptotic standard errors of nonlinear least squares.

    References:
        Bates, D. M. & Watts, D. G. (1988). Nonlinear Regression Analysis and
        Its Applications. Wiley, ch. 2 (from memory).
    """
    point = finite_point(problem, theta)
    r = np.ravel(
        np.asarray(residuals(problem.flattener.unravel(point), *problem.data), dtype=np.float64)
    )
    m, n = r.size, problem.size
    if m <= n:
        raise ParameterError(f"standard errors need more residuals ({m}) than parameters ({n}).")
    jtj = gauss_newton_matrix(problem, point, residuals)
    s2 = float(r @ r) / (m - n)
    return np.sqrt(s2 * np.diag(np.linalg.inv(jtj)))


def hessian_plane(
    problem: Problem, *, origin: Any = None, method: str = "auto", seed: int = 0
) -> Plane:
    """The plane of the two top Hessian eigenvectors at ``origin``.

    Along these directions the loss curves most steeply upward near the
    origin, so this slice shows the directions that limit the step size.
    The directions have unit length; coordinates are offsets along them from
    the origin (the axis titles say so). ``method`` and ``seed`` are passed
    to :func:`hessian_spectrum`.

    Args:
        problem: the problem.
        origin: parameters (pytree or flat) where the Hessian is taken, and
            the plane's ``(0, 0)``; defaults to the problem's parameters.
        method: ``"auto"``, ``"exact"`` or ``"lanczos"``.
        seed: seed of the Lanczos start vector.

    References:
        Pearlmutter, B. A. (1994). Fast exact multiplication by the Hessian.
        Neural Computation 6(1), 147-160.
    """
    require_plane(problem, "hessian_plane")
    theta, origin_list = flat_origin(problem, origin)
    spec = hessian_spectrum(problem, theta, k=2, method=method, seed=seed)
    d1, d2 = (spec.vectors[i].astype(problem.dtype) for i in range(2))
    titles = (
        f"offset along eigenvector 1 (λ = {spec.values[0]:.4g})",
        f"offset along eigenvector 2 (λ = {spec.values[1]:.4g})",
    )
    plane_spec = {"kind": "hessian", "method": method, "seed": int(seed), "origin": origin_list}
    return Plane(theta, d1, d2, titles, plane_spec)

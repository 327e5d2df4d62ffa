"""Bringing a point to a stationary point of the loss, and the type of that point.

:func:`refine_point` polishes an end point of descent until the gradient
norm is below a tolerance, or says that it could not: each step tries a
damped Newton step (kept only if it lowers the gradient norm), inside a
trust radius of the size of the parameters, and falls back to a gradient
step on the loss with a backtracking (Armijo) line search. For at most
:data:`~basinview.core.curvature.EXACT_LIMIT` parameters the Newton step
comes from the dense Hessian (its pseudo-inverse, so saddles and maxima are
found as well as minima); beyond, from a small Krylov space of
Hessian-vector products (minimal residual, which suits indefinite
Hessians), never forming the Hessian. :func:`classify` then reads the type
from the signs of the extreme Hessian eigenvalues.

References:
    Nocedal, J. & Wright, S. J. (2006). Numerical Optimization, 2nd ed.,
    Springer: ch. 3 (backtracking line search, Armijo condition), ch. 4
    (trust regions), ch. 7 (Newton-Krylov methods).

    Saad, Y. & Schultz, M. H. (1986). GMRES: a generalized minimal residual
    algorithm for solving nonsymmetric linear systems. SIAM J. Sci. Stat.
    Comput. 7(3):856-869.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from .curvature import EXACT_LIMIT, hessian_matrix, hessian_spectrum
from .descent import default_tolerances
from .identities import length_scale
from .problem import Problem

__all__ = ["CriticalPoint", "Refinement", "classify", "refine", "refine_point"]

KINDS = ("minimum", "saddle", "maximum", "degenerate")
KRYLOV_DIM = 20
"""Largest Krylov space of one Newton-Krylov step (Hessian-vector products per step)."""


@dataclass(frozen=True)
class CriticalPoint:
    """A refined point with its type and extreme Hessian eigenvalues."""

    point: np.ndarray
    loss: float
    grad_norm: float
    kind: str
    lambda_min: float
    lambda_max: float


@dataclass(frozen=True)
class Refinement:
    """The outcome of :func:`refine_point`.

    Attributes:
        point: the last point (the problem's dtype).
        loss, grad_norm: loss and gradient norm there.
        grad_tol: the tolerance it was held to (the requested one, raised to
            the rounding floor of the dtype where that is larger).
        stationary: ``grad_norm <= grad_tol``.
        steps: refinement steps taken.
    """

    point: np.ndarray
    loss: float
    grad_norm: float
    grad_tol: float
    stationary: bool
    steps: int


def _eig_tol(dtype: Any) -> float:
    return 1e-8 if np.dtype(dtype) == np.float64 else 1e-4  # common practice: ~ sqrt(eps)


def _inertia_extremes(h: np.ndarray) -> tuple[float, float]:
    """Extreme eigenvalues of ``D H D`` with ``D = diag(|H_ii|^-1/2)`` (1 where ``H_ii = 0``).

    By Sylvester's law of inertia ``D H D`` has as many positive, negative and
    zero eigenvalues as ``H``, but parameters in very different units (a slope
    per day next to an offset) no longer make a well-determined small
    eigenvalue look like zero next to a large one.
    """
    d = np.abs(np.diag(h))
    scale = np.where(d > 0, 1.0 / np.sqrt(np.where(d > 0, d, 1.0)), 1.0)
    values = np.linalg.eigvalsh(h * scale[:, None] * scale[None, :])
    return float(values[0]), float(values[-1])


def classify(problem: Problem, theta: Any) -> CriticalPoint:
    """Type of the critical point at ``theta`` from the signs of its Hessian eigenvalues.

    ``minimum`` if every eigenvalue is positive, ``maximum`` if every one is
    negative, ``saddle`` if both signs occur, ``degenerate`` if the smallest
    eigenvalue in magnitude is zero to within ``sqrt(eps)`` of the largest
    (the second-order test cannot decide). Up to
    :data:`~basinview.core.curvature.EXACT_LIMIT` parameters the signs are read
    from the Jacobi-scaled Hessian ``D H D`` (same signs, by Sylvester's law of
    inertia), so the test does not depend on the parameters' units; above it,
    from the Lanczos extremes of ``H``. The test assumes ``theta`` is a
    stationary point (see :func:`refine_point`).

    References:
        Golub, G. H. & Van Loan, C. F. (2013). Matrix Computations, 4th ed.,
        Theorem 8.1.17 (Sylvester's law of inertia).
    """
    flat = problem.flatten(theta, what="point")
    value, grad = problem.value_and_grad(flat)
    if problem.size <= EXACT_LIMIT:
        h = hessian_matrix(problem, flat)
        values = np.linalg.eigvalsh(h)
        lo, hi = float(values[0]), float(values[-1])
        test_lo, test_hi = _inertia_extremes(h)
    else:
        spec = hessian_spectrum(problem, flat, k=1)
        lo, hi = spec.lambda_min, spec.lambda_max
        test_lo, test_hi = lo, hi
    scale = max(abs(test_lo), abs(test_hi), 1e-300)
    tol = _eig_tol(problem.dtype) * scale
    if test_lo > tol:
        kind = "minimum"
    elif test_hi < -tol:
        kind = "maximum"
    elif test_lo < -tol and test_hi > tol:
        kind = "saddle"
    else:
        kind = "degenerate"
    return CriticalPoint(
        point=np.asarray(flat),
        loss=float(value),
        grad_norm=float(np.linalg.norm(np.asarray(grad, dtype=np.float64))),
        kind=kind,
        lambda_min=float(lo),
        lambda_max=float(hi),
    )


def _krylov_step(matvec: Any, g: np.ndarray, dim: int) -> tuple[np.ndarray, np.ndarray]:
    """Minimal-residual solution of ``H s = g`` over a Krylov space, and its Ritz values."""
    beta = float(np.linalg.norm(g))
    basis = [g / beta]
    hess = np.zeros((dim + 1, dim))
    k = dim
    for j in range(dim):
        w = matvec(basis[j])
        for i in range(j + 1):  # modified Gram-Schmidt (Arnoldi; Lanczos in exact arithmetic)
            hess[i, j] = basis[i] @ w
            w = w - hess[i, j] * basis[i]
        hess[j + 1, j] = float(np.linalg.norm(w))
        if hess[j + 1, j] <= 1e-12 * beta or not np.isfinite(hess[j + 1, j]):
            k = j + 1
            break
        basis.append(w / hess[j + 1, j])
    rhs = np.zeros(k + 1)
    rhs[0] = beta
    y = np.linalg.lstsq(hess[: k + 1, :k], rhs, rcond=None)[0]
    ritz = np.linalg.eigvalsh(0.5 * (hess[:k, :k] + hess[:k, :k].T))
    return np.stack(basis[:k], axis=1) @ y, ritz


def _newton(problem: Problem, x: np.ndarray, g: np.ndarray) -> tuple[np.ndarray, float, float]:
    """A Newton step for a critical point of any type, the top eigenvalue and ``max |lambda|``."""
    if problem.size <= EXACT_LIMIT:
        lam, vec = np.linalg.eigh(hessian_matrix(problem, x.astype(problem.dtype)))
        top = float(np.max(np.abs(lam))) if lam.size else 0.0
        keep = np.abs(lam) > 1e-10 * max(top, 1e-300)
        inv = np.where(keep, 1.0 / np.where(keep, lam, 1.0), 0.0)
        return vec @ (inv * (vec.T @ g)), float(lam[-1]), top
    point = x.astype(problem.dtype)

    def matvec(v: np.ndarray) -> np.ndarray:
        return np.asarray(problem.hvp(point, v.astype(problem.dtype)), dtype=np.float64)

    step, ritz = _krylov_step(matvec, g, min(KRYLOV_DIM, problem.size))
    return step, float(ritz[-1]), float(np.max(np.abs(ritz)))


def refine_point(
    problem: Problem,
    theta: Any,
    *,
    steps: int = 50,
    grad_tol: float | None = None,
) -> Refinement:
    """Refine ``theta`` to a nearby stationary point (gradient norm at most ``grad_tol``).

    Each step tries the Newton step ``H^+ g`` (damped: full, half, quarter,
    eighth; capped at a trust radius of the parameters' size) and keeps it
    if it lowers the gradient norm; otherwise it takes a gradient step on the
    loss (``1 / lambda_max``, halved until the loss falls by the Armijo
    condition). It stops when the gradient norm is below the tolerance,
    when neither step helps, or after ``steps`` steps.

    Args:
        problem: the problem.
        theta: the start (pytree or flat vector).
        steps: most refinement steps.
        grad_tol: gradient-norm tolerance (default: the descent default of the
            dtype, see :func:`~basinview.core.default_tolerances`); raised to
            ``64 eps max|lambda| max(|theta|, L)``, the smallest gradient the
            dtype can resolve there, where that is larger (``L``: the size of
            the reference parameters).
    """
    dtype = problem.dtype
    eps = float(np.finfo(dtype).eps)
    tol0 = default_tolerances(dtype)["grad_tol"] if grad_tol is None else float(grad_tol)
    x = np.asarray(problem.flatten(theta, what="point"), dtype=np.float64)

    def evaluate(p: np.ndarray) -> tuple[float, np.ndarray]:
        v, gr = problem.value_and_grad(p.astype(dtype))
        return float(v), np.asarray(gr, dtype=np.float64)

    f, g = evaluate(x)
    gn = float(np.linalg.norm(g))
    radius = length_scale(x[None], problem.theta0)
    tol = tol0
    taken = 0
    for taken in range(steps + 1):
        if not np.isfinite(gn) or gn <= tol or taken == steps:
            break
        try:
            step, lam_top, lam_abs = _newton(problem, x, g)
        except np.linalg.LinAlgError:  # a non-finite Hessian: no Newton step here
            step, lam_top, lam_abs = np.zeros_like(x), 0.0, 0.0
        tol = max(tol0, 64 * eps * lam_abs * max(float(np.linalg.norm(x)), radius))
        if gn <= tol:
            break
        moved = False
        size = float(np.linalg.norm(step))
        if np.all(np.isfinite(step)) and size > 0:
            if size > radius:
                step = step * (radius / size)
            for t in (1.0, 0.5, 0.25, 0.125):
                cf, cg = evaluate(x - t * step)
                cn = float(np.linalg.norm(cg))
                if np.isfinite(cf) and np.isfinite(cn) and cn < gn:
                    x, f, g, gn, moved = x - t * step, cf, cg, cn, True
                    break
        if not moved:
            t = 1.0 / lam_top if lam_top > 0 else radius / gn
            t = min(t, radius / gn)
            for _ in range(30):
                cand = x - t * g
                cf, cg = evaluate(cand)
                if np.isfinite(cf) and cf <= f - 1e-4 * t * gn * gn and np.all(np.isfinite(cg)):
                    x, f, g, gn, moved = cand, cf, cg, float(np.linalg.norm(cg)), True
                    break
                t *= 0.5
        if not moved:
            break
    return Refinement(
        point=x.astype(dtype),
        loss=f,
        grad_norm=gn,
        grad_tol=tol,
        stationary=bool(np.isfinite(gn) and gn <= tol),
        steps=taken,
    )


def refine(
    problem: Problem, theta: Any, *, steps: int = 50, grad_tol: float | None = None
) -> np.ndarray:
    """The point :func:`refine_point` reaches from ``theta`` (flat, the problem's dtype).

    Check ``refine_point(...).stationary`` (or the ``grad_norm`` column of
    :attr:`Minima.table <basinview.core.Minima.table>`) before calling it a
    critical point.
    """
    return refine_point(problem, theta, steps=steps, grad_tol=grad_tol).point

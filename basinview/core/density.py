"""The whole Hessian spectrum at a point: eigenvalue density by stochastic Lanczos quadrature.

A few random probes ``z`` (Rademacher: entries +-1) each start ``m`` steps of
Lanczos on Hessian-vector products, with full reorthogonalisation. The
eigen-decomposition ``T = S diag(theta) S^T`` of each probe's tridiagonal
matrix gives a Gauss quadrature of the probe's spectral measure: nodes
``theta_k`` (Ritz values) with weights ``S[0, k]^2``, which sum to one. The
average over probes estimates the eigenvalue distribution of the Hessian;
smoothed with a Gaussian kernel and multiplied by ``n`` it is a density of
eigenvalue counts. The same probes give Hutchinson's trace estimate
``z^T H z = n * T[0, 0]``.

All Lanczos steps of all probes and the small ``m x m`` eigen-decompositions
run in one compiled call; the point and the probes (drawn with NumPy on the
host) are data, so another point or seed never recompiles. Memory: the
``(probes, n)`` probes and one ``(m, n)`` Lanczos basis at a time (the
probes run one after another inside the call).

Caution: the density is smoothed by a kernel of width ``width``; features
narrower than that (a cluster of near-zero eigenvalues, two close
outliers) are merged. Weights of single eigenvalues are random (a probe
sees eigenvalue ``i`` with weight ``(u_i . z)^2 / n``): the count an
outlier stands for is uncertain by about ``sqrt(2 / probes)`` eigenvalues,
while shares of many eigenvalues (the negative mass) have errors that
shrink like ``1 / sqrt(probes * n)``. Ritz values that have not converged
sit between eigenvalues; only converged ones are reported as outliers.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
import pandas as pd

from .checks import check_int, check_seed, finite_point
from .errors import ParameterError
from .problem import Problem, loss_runtime_errors

__all__ = ["SpectralDensity", "hessian_density"]


@dataclass(frozen=True, eq=False)
class SpectralDensity:
    """Estimated Hessian eigenvalue distribution at a point.

    Attributes:
        nodes: ``(probes, m)`` Ritz values of each probe, ascending.
        weights: ``(probes, m)`` quadrature weights; each row sums to one.
        residuals: ``(probes, m)`` Lanczos residual bounds ``|beta_m S[m-1, k]|``:
            a Ritz value with a small residual is an eigenvalue to that accuracy.
        size: number of parameters ``n`` (eigenvalues in all).
        grid, density: the smoothed density of eigenvalue counts on ``grid``
            (integrates to about ``n``).
        width: standard deviation of the Gaussian smoothing kernel.
        trace: Hutchinson's estimate of the trace (mean over probes).
        trace_probes: each probe's ``z^T H z``.
        outliers: table of converged eigenvalues far outside the bulk
            (``value``, ``count``: eigenvalues it stands for, ``probes``: probes
            that found it); see ``gap`` and ``tail`` of :func:`hessian_density`.
        negative_mass: estimated share of eigenvalues below zero (below
            ``-zero_tolerance``, to ignore rounding of zero eigenvalues).
        zero_tolerance: the threshold used for ``negative_mass``.
        settings: probes, steps and seed.
    """

    nodes: np.ndarray
    weights: np.ndarray
    residuals: np.ndarray
    size: int
    grid: np.ndarray
    density: np.ndarray
    width: float
    trace: float
    trace_probes: np.ndarray
    outliers: pd.DataFrame
    negative_mass: float
    zero_tolerance: float
    settings: dict[str, Any]

    @property
    def negative_count(self) -> float:
        """Estimated number of eigenvalues below zero (``n * negative_mass``)."""
        return self.size * self.negative_mass

    @property
    def trace_standard_error(self) -> float:
        """Standard error of :attr:`trace` from the spread of the probes (NaN for one probe)."""
        p = self.trace_probes.size
        return float(np.std(self.trace_probes, ddof=1) / np.sqrt(p)) if p > 1 else float("nan")

    @property
    def negative_mass_standard_error(self) -> float:
        """Standard error of :attr:`negative_mass` from the spread of the probes."""
        per = np.sum(np.where(self.nodes < -self.zero_tolerance, self.weights, 0.0), axis=1)
        p = per.size
        return float(np.std(per, ddof=1) / np.sqrt(p)) if p > 1 else float("nan")

    def mass_below(self, value: float) -> float:
        """Estimated share of eigenvalues below ``value`` (from the quadrature nodes)."""
        return float(np.mean(np.sum(np.where(self.nodes < value, self.weights, 0.0), axis=1)))

    def to_frame(self) -> pd.DataFrame:
        """The smoothed density: columns ``eigenvalue`` and ``density`` (counts per unit)."""
        return pd.DataFrame({"eigenvalue": self.grid, "density": self.density})

    def nodes_frame(self) -> pd.DataFrame:
        """Every quadrature node: ``probe``, ``node``, ``weight``, ``residual``."""
        p, m = self.nodes.shape
        return pd.DataFrame(
            {
                "probe": np.repeat(np.arange(p), m),
                "node": self.nodes.ravel(),
                "weight": self.weights.ravel(),
                "residual": self.residuals.ravel(),
            }
        )


def _slq_fn(problem: Problem, probes: int, m: int) -> Any:
    """Compiled: ``m`` Lanczos steps from each of ``probes`` probes, one after another.

    Returns per probe the quadrature nodes, weights, residual bounds
    ``|beta_m S[m-1, k]|`` and ``alpha_0 = q0' H q0``.
    """

    def build() -> Any:
        grad = jax.grad(problem.flat_loss)
        n = problem.size

        def hvp(theta: jax.Array, v: jax.Array, data: Any) -> jax.Array:
            return jax.jvp(lambda t: grad(t, data), (theta,), (v,))[1]

        def lanczos(theta: jax.Array, q0: jax.Array, data: Any) -> tuple[jax.Array, ...]:
            dtype = q0.dtype
            eps = jnp.finfo(dtype).eps
            basis = jnp.zeros((m, n), dtype).at[0].set(q0)
            alpha = jnp.zeros(m, dtype)
            beta = jnp.zeros(m, dtype)

            def body(j: jax.Array, carry: tuple[jax.Array, ...]) -> tuple[jax.Array, ...]:
                basis, alpha, beta = carry
                q = basis[j]
                w = hvp(theta, q, data)
                size = jnp.linalg.norm(w)
                a = q @ w
                # full reorthogonalisation, twice (classical Gram-Schmidt; rows > j are zero)
                w = w - basis.T @ (basis @ w)
                w = w - basis.T @ (basis @ w)
                b = jnp.linalg.norm(w)
                ok = b > 64 * eps * (size + jnp.finfo(dtype).tiny)
                nxt = jnp.where(ok, w / jnp.where(ok, b, 1), 0)
                basis = basis.at[j + 1].set(nxt, mode="drop")
                return basis, alpha.at[j].set(a), beta.at[j].set(jnp.where(ok, b, 0))

            _, alpha, beta = jax.lax.fori_loop(0, m, body, (basis, alpha, beta))
            # Gauss quadrature of the probe's spectral measure: T = S diag(nodes) S^T
            off = beta[: m - 1]
            tri = jnp.diag(alpha) + jnp.diag(off, 1) + jnp.diag(off, -1)
            nodes, vecs = jnp.linalg.eigh(tri)
            resid = jnp.abs(beta[m - 1] * vecs[m - 1])
            return nodes, vecs[0] ** 2, resid, alpha[0]

        def run(theta: jax.Array, probes_: jax.Array, data: Any) -> tuple[jax.Array, ...]:
            scale = 1 / jnp.sqrt(jnp.asarray(n, theta.dtype))
            return jax.lax.map(lambda z: lanczos(theta, z * scale, data), probes_)

        problem.check_differentiable()
        return jax.jit(run)

    return problem.compiled(("hessian-density", probes, m), build)


def _bulk(flat: np.ndarray, w: np.ndarray, tail: float) -> tuple[float, float]:
    """Shortest interval of sorted nodes holding at least ``1 - tail`` of the weight."""
    cum = np.concatenate([[0.0], np.cumsum(w)])
    need = cum[-1] * (1 - tail)
    ends = np.searchsorted(cum, cum[:-1] + need - 1e-12, side="left") - 1
    ok = ends < flat.size
    starts = np.flatnonzero(ok)
    widths = flat[ends[ok]] - flat[starts]
    k = int(np.argmin(widths))
    return float(flat[starts[k]]), float(flat[ends[ok][k]])


def _outliers(
    nodes: np.ndarray, weights: np.ndarray, resid: np.ndarray, n: int, gap: float, tail: float
) -> pd.DataFrame:
    """Converged Ritz values far outside the bulk (the shortest interval of most of the mass)."""
    empty = pd.DataFrame({"value": [], "count": [], "probes": []})
    p = nodes.shape[0]
    probe_of = np.repeat(np.arange(p), nodes.shape[1])
    flat, w, r = nodes.ravel(), weights.ravel() / p, resid.ravel()
    keep = w > 0
    flat, w, r, probe_of = flat[keep], w[keep], r[keep], probe_of[keep]
    order = np.argsort(flat)
    flat, w, r, probe_of = flat[order], w[order], r[order], probe_of[order]
    spread = float(flat[-1] - flat[0]) if flat.size else 0.0
    if spread <= 0:
        return empty
    lo, hi = _bulk(flat, w, tail)
    scale = float(np.max(np.abs(flat)))
    far = (flat < lo - gap * spread) | (flat > hi + gap * spread)
    # converged only: a Ritz value within 1e-3 of the spectral radius of an eigenvalue
    sub = np.flatnonzero(far & (r <= 1e-3 * scale))
    if sub.size == 0:
        return empty
    rows = []
    # one eigenvalue seen by several probes: nodes that agree closely
    for piece in np.split(sub, np.flatnonzero(np.diff(flat[sub]) > 1e-3 * scale) + 1):
        rows.append(
            {
                "value": float(np.average(flat[piece], weights=w[piece])),
                "count": float(n * w[piece].sum()),
                "probes": int(np.unique(probe_of[piece]).size),
            }
        )
    return pd.DataFrame(rows).sort_values("value", ascending=False, ignore_index=True)




def hessian_density(
    problem: Problem,
    theta: Any,
    *,
    probes: int = 4,
    steps: int = 60,
    seed: int = 0,
    width: float | None = None,
    grid_size: int = 1001,
    gap: float = 0.05,
    tail: float = 0.05,
) -> SpectralDensity:
    """Hessian eigenvalue density at ``theta`` by stochastic Lanczos quadrature.

    Args:
        problem: the problem.
        theta: the point (pytree or flat vector), e.g. a converged run's end.
        probes: Rademacher probes (static; more probes, less sampling error).
        steps: Lanczos steps per probe (static; capped at ``n``). ``m``
            steps integrate polynomials of degree ``2m - 1`` exactly.
        seed: seed of the probes (drawn with NumPy on the host: never recompiles).
        width: standard deviation of the Gaussian kernel that smooths the
            density (default: 1/200 of the range of the nodes).
        grid_size: points of the density grid.
        gap, tail: the bulk is the shortest interval that holds ``1 - tail``
            of the estimated mass; converged Ritz values farther than ``gap``
            times the range of the nodes outside it are reported as outliers
            (so at most about ``tail * n`` eigenvalues can be outliers).

    Returns:
        A :class:`SpectralDensity`.

    References:
        Ubaru, S., Chen, J. & Saad, Y. (2017). Fast estimation of tr(f(A)) via
        stochastic Lanczos quadrature. SIAM J. Matrix Anal. Appl. 38(4):1075-1099.
        Ghorbani, B., Krishnan, S. & Xiao, Y. (2019). An investigation into neural
        net optimization via Hessian eigenvalue density. ICML. Hutchinson, M. F.
        (1989). A stochastic estimator of the trace of the influence matrix for
        Laplacian smoothing splines. Commun. Stat. Simul. Comput. 18(3):1059-1076.
        Avron, H. & Toledo, S. (2011). Randomized algorithms for estimating the
        trace of an implicit symmetric positive semi-definite matrix. J. ACM 58(2).
    """
    n = problem.size
    n_probes = check_int(probes, "probes", 1, 4096)
    m = min(check_int(steps, "steps", 1, 100_000), n)
    check_seed(seed, below=2**31)
    n_grid = check_int(grid_size, "grid_size", 16, 100_000)
    if not (isinstance(gap, (int, float)) and 0 < gap < 1):
        raise ParameterError(f"gap must be a number between 0 and 1; got {gap!r}.")
    if not (isinstance(tail, (int, float)) and 0 <= tail < 1):
        raise ParameterError(f"tail must be a number from 0 to below 1; got {tail!r}.")
    if width is not None and not (
        isinstance(width, (int, float)) and np.isfinite(width) and width > 0
    ):
        raise ParameterError(f"width must be a positive number (or None); got {width!r}.")
    point = finite_point(problem, theta)
    value = float(problem.value(point))
    if not np.isfinite(value):
        raise ParameterError(
            f"the loss is {value} at this point, so its curvature means nothing there; "
            "choose a point where the loss is finite, e.g. a converged run's end point."
        )
    fn = _slq_fn(problem, n_probes, m)
    # Rademacher probes drawn on the host (NumPy, seeded): no random-number program to compile
    rng = np.random.default_rng(int(seed))
    z = rng.integers(0, 2, size=(n_probes, n), dtype=np.int8).astype(problem.dtype) * 2 - 1
    with loss_runtime_errors(problem, "the Hessian density"):
        out = fn(point, jnp.asarray(z, problem.dtype), problem.data)
    nodes, weights, resid, alpha0 = (np.asarray(x, dtype=np.float64) for x in out)
    if not (np.all(np.isfinite(nodes)) and np.all(np.isfinite(weights))):
        raise ParameterError(
            "Hessian-vector products are not finite at this point; choose a point where "
            "the loss and its derivatives are finite."
        )
    lo, hi = float(nodes.min()), float(nodes.max())
    spread = hi - lo
    scale = max(abs(lo), abs(hi))
    sigma = (
        float(width)
        if width is not None
        else (spread / 200 if spread > 0 else max(scale, 1.0) * 1e-3)
    )
    grid = np.linspace(lo - 5 * sigma, hi + 5 * sigma, n_grid)
    kern = np.exp(-0.5 * ((grid[:, None] - nodes.ravel()[None, :]) / sigma) ** 2)
    kern /= sigma * np.sqrt(2 * np.pi)
    density = n * kern @ weights.ravel() / n_probes
    zero_tol = 1e-6 * scale
    negative = float(np.mean(np.sum(np.where(nodes < -zero_tol, weights, 0.0), axis=1)))
    return SpectralDensity(
        nodes=nodes,
        weights=weights,
        residuals=resid,
        size=n,
        grid=grid,
        density=density,
        width=sigma,
        trace=float(n * alpha0.mean()),
        trace_probes=n * alpha0,
        outliers=_outliers(nodes, weights, resid, n, float(gap), float(tail)),
        negative_mass=negative,
        zero_tolerance=zero_tol,
        settings={"probes": n_probes, "steps": m, "seed": int(seed)},
    )

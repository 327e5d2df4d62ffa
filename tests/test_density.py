"""Hessian eigenvalue density by stochastic Lanczos quadrature (core/density.py).

The reference is the exact spectrum from ``numpy.linalg.eigh``; distributions
are compared in the 1-Wasserstein distance of ``scipy.stats.wasserstein_distance``.

Tolerance for that distance (stated once, used by every check): the expected
distance between the estimate and the exact distribution is at most

    J + R,   J = pi (lambda_max - lambda_min) / (4 m),
             R = sum_k (lambda_(k+1) - lambda_(k)) sqrt(Var_k / probes) / n,
             Var_k = 2 (||P_k||_F^2 - sum_i (P_k)_ii^2),

with ``m`` Lanczos steps, ``n`` eigenvalues and ``P_k`` the projector on the
eigenvectors of the ``k`` smallest eigenvalues.

* ``J``: the ``m``-node Gauss quadrature of each probe's spectral measure is
  exact for polynomials of degree ``2m - 1``; a 1-Lipschitz function on
  ``[a, b]`` is within ``pi (b - a) / (4 (d + 1))`` of a polynomial of degree
  ``d`` (Jackson's theorem, from memory), so the quadrature moves mass by at
  most ``2 * pi (b - a) / (8 m)`` in the 1-Wasserstein distance (its dual
  form: the largest difference of means of 1-Lipschitz functions).
* ``R``: W1 is the integral of the absolute difference of the two CDFs; the
  probes' CDF at ``x`` between the ``k``-th and ``k+1``-th eigenvalues is
  ``mean_l z_l' P_k z_l / n``, unbiased for ``k / n`` with the Rademacher
  variance ``Var_k / (n^2 probes)`` (the same formula as Hutchinson's, below);
  ``E|X - EX| <= sd(X)`` gives ``R``.

It bounds the expected distance of a random draw; the seeded draws here sit
well below it, and a spectrum shifted by the bound fails it (checked).
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy.stats import wasserstein_distance

from basinview.core import (
    ParameterError,
    Problem,
    count_compilations,
    hessian_density,
    hessian_matrix,
)


def quadratic(theta, a):
    return 0.5 * theta @ (a @ theta)


def mlp(p, x, y):
    h = jnp.tanh(x @ p["w1"] + p["b1"])
    return jnp.mean((h @ p["w2"] + p["b2"] - y) ** 2)


def w1_bound(lam: np.ndarray, vecs: np.ndarray, probes: int, steps: int) -> float:
    """The expected-distance bound J + R of the module docstring."""
    order = np.argsort(lam)
    lam, vecs = lam[order], vecs[:, order]
    n = lam.size
    diag = np.cumsum(vecs**2, axis=1)  # diag[:, k] = diagonal of P_(k+1)
    var = 2 * (np.arange(1, n + 1) - np.sum(diag**2, axis=0))
    r = np.sum(np.diff(lam) * np.sqrt(np.maximum(var[:-1], 0) / probes)) / n
    return float(np.pi * (lam[-1] - lam[0]) / (4 * steps) + r)


def hutchinson_variance(h: np.ndarray) -> float:
    # Source: Avron, H. & Toledo, S. (2011), J. ACM 58(2): the variance of z' H z for a
    # Rademacher z is 2 (||H||_F^2 - sum_i H_ii^2) (recalled, from memory).
    return float(2 * (np.sum(h**2) - np.sum(np.diag(h) ** 2)))


@pytest.fixture(scope="module")
def planted():
    """A quadratic with a known spectrum: a bulk with negatives and three outliers."""
    with jax.enable_x64(True):
        rng = np.random.default_rng(1)
        n = 80
        lam = np.concatenate([rng.uniform(-0.5, 2.0, n - 3), [8.0, 10.0, 12.0]])
        q, _ = np.linalg.qr(rng.standard_normal((n, n)))
        a = (q * lam) @ q.T
        a = 0.5 * (a + a.T)
        problem = Problem(quadratic, jnp.zeros(n), jnp.asarray(a))
        est = hessian_density(problem, np.zeros(n), probes=8, steps=30, seed=0)
    exact, vecs = np.linalg.eigh(a)
    return problem, a, exact, vecs, est


def test_distribution_matches_the_exact_eigenvalues(planted):
    _, _, exact, vecs, est = planted
    # Source: numpy.linalg.eigh for the exact spectrum, scipy.stats.wasserstein_distance
    # for the distance; the tolerance is the bound derived in the module docstring.
    dist = wasserstein_distance(est.nodes.ravel(), exact, est.weights.ravel())
    tol = w1_bound(exact, vecs, probes=8, steps=30)
    assert dist <= tol
    # the tolerance can fail: the same spectrum shifted by the tolerance is too far
    shifted = wasserstein_distance(est.nodes.ravel(), exact + 1.5 * tol, est.weights.ravel())
    assert shifted > tol
    np.testing.assert_allclose(est.weights.sum(axis=1), 1.0, atol=1e-10)
    # the smoothed density counts eigenvalues: it integrates to n
    integral = np.sum(0.5 * (est.density[1:] + est.density[:-1]) * np.diff(est.grid))
    assert integral == pytest.approx(exact.size, rel=1e-3)


def test_every_ritz_value_is_within_its_residual_of_an_eigenvalue(planted):
    _, _, exact, _, est = planted
    # Source: for symmetric H and a Ritz pair (theta, y) with ||H y - theta y|| = r, some
    # eigenvalue lies within r of theta (Parlett, The Symmetric Eigenvalue Problem,
    # Theorem 4.5.1, from memory); the residual is |beta_m s_mk| in exact Lanczos.
    gap = np.min(np.abs(est.nodes[..., None] - exact[None, None, :]), axis=-1)
    assert np.all(gap <= est.residuals + 1e-8)
    converged = est.residuals < 1e-8
    assert converged.sum() >= 3 * est.nodes.shape[0]  # at least the outliers, every probe


def test_outliers_and_negative_mass(planted):
    _, _, exact, vecs, est = planted
    found = est.outliers["value"].to_numpy()
    np.testing.assert_allclose(found, [12.0, 10.0, 8.0], atol=1e-8)
    assert set(est.outliers["probes"]) == {8}
    # negative mass: unbiased for the share of negative eigenvalues, with the
    # Rademacher variance of z' P z / n for the projector P on negative eigenvectors
    share = float(np.mean(exact < 0))
    p = vecs[:, exact < 0] @ vecs[:, exact < 0].T
    sd = np.sqrt(hutchinson_variance(p) / est.nodes.shape[0]) / exact.size
    # common practice: Chebyshev, |X - EX| > 4 sd has probability at most 1/16
    assert abs(est.negative_mass - share) <= 4 * sd
    assert est.negative_count == pytest.approx(exact.size * est.negative_mass)
    assert est.mass_below(0.0) == pytest.approx(est.negative_mass, abs=1e-12)
    assert est.mass_below(100.0) == pytest.approx(1.0)


def test_trace_within_the_hutchinson_bound(planted):
    _, a, _, _, est = planted
    sd = np.sqrt(hutchinson_variance(a) / 8)
    # common practice: Chebyshev with 4 standard deviations (probability of failure <= 1/16)
    assert abs(est.trace - np.trace(a)) <= 4 * sd
    np.testing.assert_allclose(est.trace_probes.mean(), est.trace)
    assert est.trace_standard_error == pytest.approx(np.std(est.trace_probes, ddof=1) / np.sqrt(8))


def test_probe_variance_is_the_hutchinson_variance(planted, x64):
    problem, a, *_ = planted
    # 64 seeds x 8 probes: 512 draws of z' H z, with the compiled program of the fixture
    draws = np.concatenate(
        [
            hessian_density(problem, np.zeros(a.shape[0]), probes=8, steps=30, seed=s).trace_probes
            for s in range(100, 164)
        ]
    )
    ratio = np.var(draws, ddof=1) / hutchinson_variance(a)
    # the sample variance of 512 draws is within about 3 x sqrt(2 / 512) = 19% of the
    # true one for a near-Gaussian quadratic form (common practice)
    assert 0.75 < ratio < 1.25
    assert np.mean(draws) == pytest.approx(np.trace(a), abs=4 * np.sqrt(np.var(draws) / 512))


def test_a_small_network_against_eigh(x64):
    rng = np.random.default_rng(2)
    x = rng.standard_normal((40, 3))
    y = np.sin(x[:, :1])
    params = {
        "w1": jnp.asarray(rng.standard_normal((3, 12))),
        "b1": jnp.asarray(0.1 * rng.standard_normal(12)),
        "w2": jnp.asarray(rng.standard_normal((12, 1))),
        "b2": jnp.zeros(1),
    }
    problem = Problem(mlp, params, x, y)
    est = hessian_density(problem, problem.theta0, probes=8, steps=30, seed=0)
    h = hessian_matrix(problem, problem.theta0)
    exact, vecs = np.linalg.eigh(h)
    assert problem.size == 61 and np.any(exact < 0)
    # Source: numpy.linalg.eigh of the dense Hessian (jax.hessian), compared with
    # scipy.stats.wasserstein_distance; tolerance derived in the module docstring.
    dist = wasserstein_distance(est.nodes.ravel(), exact, est.weights.ravel())
    assert dist <= w1_bound(exact, vecs, probes=8, steps=30)
    assert abs(est.trace - np.trace(h)) <= 4 * np.sqrt(hutchinson_variance(h) / 8)
    assert est.negative_mass > 0
    with count_compilations() as counter:
        other = hessian_density(problem, problem.theta0 * 0.9, probes=8, steps=30, seed=7)
    assert counter.count == 0
    assert not np.allclose(other.nodes, est.nodes)


def test_traced_values_never_recompile(planted, x64):
    problem, a, *_ = planted
    with count_compilations() as counter:
        hessian_density(problem, np.ones(a.shape[0]), probes=8, steps=30, seed=11)
    assert counter.count == 0


def test_bad_inputs_are_named(planted, x64):
    problem, a, *_ = planted
    n = a.shape[0]
    with pytest.raises(ParameterError, match="probes"):
        hessian_density(problem, np.zeros(n), probes=0)
    with pytest.raises(ParameterError, match="steps"):
        hessian_density(problem, np.zeros(n), steps=0)
    with pytest.raises(ParameterError, match="width"):
        hessian_density(problem, np.zeros(n), width=-1.0)
    with pytest.raises(ParameterError, match="NaN or inf"):
        hessian_density(problem, np.full(n, np.nan))
    with pytest.raises(ParameterError, match="seed"):
        hessian_density(problem, np.zeros(n), seed=-2)
    with pytest.raises(ParameterError, match="gap"):
        hessian_density(problem, np.zeros(n), gap=2.0)

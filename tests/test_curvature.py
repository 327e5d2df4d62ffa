"""Curvature: Hessian spectra, stability bounds, the Hessian plane."""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import pytest
import scipy.sparse.linalg

from basinview.core import (
    ParameterError,
    Problem,
    adaptive_threshold,
    descend,
    hessian_matrix,
    hessian_plane,
    hessian_spectrum,
    optimal_fixed_step,
    plane_from_spec,
    preconditioned_sharpness,
    sequential_bound,
    stability_bound,
)

from .conftest import quadratic, rosenbrock


def rosenbrock_n(x):
    return jnp.sum(100.0 * (x[1:] - x[:-1] ** 2) ** 2 + (1.0 - x[:-1]) ** 2)


def test_rosenbrock_lambda_max_at_the_minimum(x64):
    # Source: from the definition (Rosenbrock 1960, from memory), the Hessian at (1, 1) is
    # [[802, -400], [-400, 200]] with eigenvalues 501 +- sqrt(250601) (REFERENCES.md A,
    # verified): lambda_max = 1001.6006392325123, GD bound 2/lambda_max = 0.0019968038.
    prob = Problem(rosenbrock, jnp.array([1.0, 1.0]))
    np.testing.assert_allclose(
        hessian_matrix(prob, prob.theta0), [[802, -400], [-400, 200]], rtol=1e-14
    )
    spec = hessian_spectrum(prob, prob.theta0)
    assert spec.lambda_max == pytest.approx(501 + np.sqrt(250601), rel=1e-13)
    assert spec.lambda_min == pytest.approx(501 - np.sqrt(250601), rel=1e-10)
    assert stability_bound("gradient_descent", spec.lambda_max) == pytest.approx(
        0.0019968038, abs=1e-10
    )
    assert spec.condition == pytest.approx(spec.lambda_max / spec.lambda_min)


def test_lanczos_on_hvps_matches_dense_and_scipy(x64, rng):
    # References: jax.hessian + numpy.linalg.eigh, and scipy.sparse.linalg.eigsh on a
    # LinearOperator whose matvec is the Hessian-vector product (REFERENCES.md D).
    n = 200
    prob = Problem(rosenbrock_n, jnp.asarray(rng.standard_normal(n)))
    point = prob.theta0
    dense = np.linalg.eigvalsh(np.asarray(jax.hessian(rosenbrock_n)(jnp.asarray(point))))
    lanczos = hessian_spectrum(prob, point, k=3, method="lanczos", iterations=120)
    np.testing.assert_allclose(lanczos.values, dense[::-1][:3], rtol=1e-9)
    assert lanczos.lambda_min == pytest.approx(dense[0], rel=1e-6)
    op = scipy.sparse.linalg.LinearOperator(
        (n, n), matvec=lambda v: np.asarray(prob.hvp(point, v)), dtype=np.float64
    )
    eigsh = np.sort(scipy.sparse.linalg.eigsh(op, k=3, which="LA", tol=1e-12)[0])[::-1]
    np.testing.assert_allclose(lanczos.values, eigsh, rtol=1e-9)
    # eigenvectors: unit and satisfying H v = lambda v
    v = lanczos.vectors[0]
    np.testing.assert_allclose(
        np.asarray(prob.hvp(point, v)), lanczos.values[0] * v, atol=1e-6 * lanczos.values[0]
    )


def test_float32_spectrum_is_close_to_float64(rng):
    prob = Problem(rosenbrock_n, jnp.asarray(rng.standard_normal(20), jnp.float32))
    spec = hessian_spectrum(prob, prob.theta0, k=2)
    with jax.enable_x64(True):
        ref = np.linalg.eigvalsh(
            np.asarray(jax.hessian(rosenbrock_n)(jnp.asarray(prob.theta0, jnp.float64)))
        )
    np.testing.assert_allclose(spec.values, ref[::-1][:2], rtol=1e-5)


@pytest.mark.parametrize(
    ("optimizer", "beta", "boundary"),
    [
        # Source: Zhang et al., Dive into Deep Learning, "Momentum" (read: 0 < eta lambda <
        # 2 + 2 beta); REFERENCES.md C4 check values 3.0, 3.8, 3.98.
        ("momentum", 0.5, 3.0),
        ("momentum", 0.9, 3.8),
        ("momentum", 0.99, 3.98),
        # Source: REFERENCES.md C6 (derived from the characteristic polynomial, verified):
        # boundaries 1.5, 1.357142857, 1.335570470.
        ("nesterov", 0.5, 1.5),
        ("nesterov", 0.9, 1.357142857),
        ("nesterov", 0.99, 1.335570470),
    ],
)
def test_momentum_bounds_match_the_published_boundaries(optimizer, beta, boundary):
    assert stability_bound(optimizer, 1.0, {"momentum": beta}) == pytest.approx(boundary, rel=1e-9)
    assert stability_bound(optimizer, 4.0, {"momentum": beta}) == pytest.approx(
        boundary / 4, rel=1e-9
    )


def test_bounds_for_rules_without_a_fixed_one():
    assert stability_bound("adam", 10.0) is None
    assert stability_bound("gradient_descent", -1.0) is None  # no positive curvature
    # Source: Cohen et al. (2022), arXiv:2207.14484 (read: Adam with beta1 = 0.9
    # equilibrates at preconditioned sharpness 38/eta); general (2 + 2 b1)/(1 - b1).
    assert adaptive_threshold("adam", {"b1": 0.9}) == pytest.approx(38.0)
    assert adaptive_threshold("rmsprop") == 2.0


def test_optimal_fixed_step():
    # Source: REFERENCES.md C2 check (Nesterov 2004, Theorem 2.1.15, from memory):
    # mu = 1, L = 100 -> alpha* = 0.019802.
    assert optimal_fixed_step(100.0, 1.0) == pytest.approx(0.019802, abs=1e-6)
    assert optimal_fixed_step(100.0, 0.0) is None


def _sequential_radius(a, lr):
    """Spectral radius of the coordinate-update iteration matrix I - (I/lr + L)^-1 A."""
    m = np.eye(len(a)) / lr + np.tril(a, -1)
    return np.abs(np.linalg.eigvals(np.eye(len(a)) - np.linalg.solve(m, a))).max()


def test_sequential_bound_on_a_coupled_quadratic(x64):
    # Source: Householder-John theorem (from memory; e.g. Ortega, Numerical Analysis, 1972):
    # for SPD A the splitting A = M - N converges if M + M' - A is positive definite. For
    # coordinate updates M = I/lr + L, which guarantees convergence for lr < 2 / max diag(A).
    a = np.array([[4.0, 1.5, 0.0], [1.5, 3.0, 1.0], [0.0, 1.0, 2.0]])
    b = np.array([1.0, 0.0, -1.0])
    bound = sequential_bound(a)
    assert bound == pytest.approx(0.5)
    assert bound > 2 / np.linalg.eigvalsh(a)[-1]  # more permissive than gradient descent
    # The exact threshold: where the iteration matrix's spectral radius (numpy) crosses 1.
    lo, hi = bound, 10.0
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        lo, hi = (mid, hi) if _sequential_radius(a, mid) < 1 else (lo, mid)
    exact = lo
    assert exact >= bound
    prob = Problem(quadratic, jnp.zeros(3), a, b)
    starts = np.random.default_rng(1).standard_normal((3, 3))
    rates = [0.98 * bound, 0.98 * exact, 1.02 * exact]
    runs = descend(
        prob,
        starts,
        optimizer="sequential",
        learning_rate=rates,
        steps=5000,
        grad_tol=1e-8,
        loss_tol=0.0,
    )
    table = runs.table
    assert set(table[table.learning_rate < exact].status) == {"converged"}
    assert set(table[table.learning_rate > exact].status) == {"diverged"}


def test_preconditioned_sharpness_of_a_diagonal_quadratic(x64):
    prob = Problem(lambda p: 0.5 * (4.0 * p[0] ** 2 + 9.0 * p[1] ** 2), jnp.zeros(2))
    # P = diag(4, 9) makes P^-1/2 H P^-1/2 the identity.
    assert preconditioned_sharpness(prob, prob.theta0, np.array([4.0, 9.0])) == pytest.approx(1.0)
    with pytest.raises(ParameterError, match="positive"):
        preconditioned_sharpness(prob, prob.theta0, np.array([0.0, 1.0]))


def test_hessian_plane_spans_the_top_eigenvectors(x64, rng):
    q, _ = np.linalg.qr(rng.standard_normal((5, 5)))
    eig = np.array([10.0, 7.0, 3.0, 2.0, 1.0])
    a = q @ np.diag(eig) @ q.T
    prob = Problem(quadratic, jnp.zeros(5), a, np.zeros(5))
    plane = hessian_plane(prob)
    assert abs(plane.d1 @ q[:, 0]) == pytest.approx(1.0)
    assert abs(plane.d2 @ q[:, 1]) == pytest.approx(1.0)
    assert "10" in plane.axis_titles[0]
    rebuilt = plane_from_spec(prob, plane.spec)
    np.testing.assert_allclose(rebuilt.d1, plane.d1)
    lanczos = hessian_plane(prob, method="lanczos")
    assert abs(lanczos.d1 @ plane.d1) == pytest.approx(1.0)


def test_spectrum_input_errors():
    prob = Problem(lambda p: jnp.sum(p**2), jnp.ones(3))
    with pytest.raises(ParameterError, match="k must be"):
        hessian_spectrum(prob, prob.theta0, k=5)
    with pytest.raises(ParameterError, match="method"):
        hessian_spectrum(prob, prob.theta0, method="power")
    with pytest.raises(ParameterError, match="NaN"):
        hessian_spectrum(prob, np.array([np.nan, 0.0, 0.0]))

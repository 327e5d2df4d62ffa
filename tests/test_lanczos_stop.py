"""Lanczos in hessian_spectrum stops when the requested Ritz values have converged.

The reference is scipy.sparse.linalg.eigsh (ARPACK's implicitly restarted
Lanczos) on a LinearOperator whose matvec is the same Hessian-vector
product and counts its calls: basinview must use at most 1.2 times as many
products for the same top-5 eigenvalues, to the same digits.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import pytest
import scipy.sparse.linalg
from sklearn.datasets import load_breast_cancer, load_digits

from basinview.core import Problem, hessian_spectrum
from basinview.core.errors import ParameterError


def ridge_logistic(w, x, y):
    z = x @ w
    return jnp.mean(jnp.logaddexp(0.0, z) - y * z) + 1e-3 * jnp.sum(w**2)


def _problem(loader):
    x, y = loader(return_X_y=True)
    x = (x - x.mean(0)) / np.maximum(x.std(0), 1e-9)
    x = np.c_[np.ones(len(x)), x]
    w = 0.1 * np.random.default_rng(0).standard_normal(x.shape[1])
    return Problem(ridge_logistic, w, x, (y % 2).astype(np.float64))


@pytest.mark.parametrize("loader", [load_breast_cancer, load_digits])
def test_top5_with_at_most_1_2x_eigsh_matvecs(x64, loader):
    prob = _problem(loader)
    point = prob.theta0
    calls = [0]

    def matvec(v):
        calls[0] += 1
        return np.asarray(prob.hvp(point, np.ravel(v)))

    op = scipy.sparse.linalg.LinearOperator((prob.size, prob.size), matvec=matvec, dtype=float)
    # Source: scipy.sparse.linalg.eigsh (ARPACK), top 5 algebraic eigenvalues, default tol
    ref = np.sort(scipy.sparse.linalg.eigsh(op, k=5, which="LA")[0])[::-1]
    spec = hessian_spectrum(prob, point, k=5, method="lanczos")
    assert spec.matvecs <= 1.2 * calls[0]
    np.testing.assert_allclose(spec.values, ref, rtol=1e-10)
    # Source: jax.hessian + numpy.linalg.eigvalsh (the dense spectrum)
    dense = np.linalg.eigvalsh(
        np.asarray(jax.hessian(prob.flat_loss)(jnp.asarray(point), prob.data))
    )
    assert spec.lambda_min == pytest.approx(dense[0], rel=1e-8)


@pytest.mark.parametrize("loader", [load_breast_cancer, load_digits])
def test_top_values_only_stop_no_later_and_bound_the_smallest(x64, loader):
    prob = _problem(loader)
    point = prob.theta0
    both = hessian_spectrum(prob, point, k=5, method="lanczos")
    top = hessian_spectrum(prob, point, k=5, method="lanczos", smallest=False)
    assert top.matvecs <= both.matvecs
    # Source: scipy.sparse.linalg.eigsh (ARPACK), top 5 algebraic eigenvalues
    ref = np.sort(scipy.sparse.linalg.eigsh(prob_operator(prob, point), k=5, which="LA")[0])
    np.testing.assert_allclose(top.values, ref[::-1], rtol=1e-10)
    # a Ritz value lies inside the spectrum: the smallest one reached bounds the smallest
    # eigenvalue from above (Source: Cauchy interlacing, Golub & Van Loan ch. 8, from memory;
    # the reference value from jax.hessian + numpy.linalg.eigvalsh)
    dense = np.linalg.eigvalsh(
        np.asarray(jax.hessian(prob.flat_loss)(jnp.asarray(point), prob.data))
    )
    assert top.lambda_min >= dense[0] - 1e-12 * np.abs(dense).max()


def prob_operator(prob, point):
    return scipy.sparse.linalg.LinearOperator(
        (prob.size, prob.size), matvec=lambda v: np.asarray(prob.hvp(point, np.ravel(v))),
        dtype=float,
    )  # fmt: skip


def test_a_loose_tolerance_stops_sooner_and_bad_tolerances_are_refused(x64):
    prob = _problem(load_digits)
    tight = hessian_spectrum(prob, prob.theta0, k=2, method="lanczos")
    loose = hessian_spectrum(prob, prob.theta0, k=2, method="lanczos", tol=1e-3)
    assert loose.matvecs < tight.matvecs
    # the residual bound 1e-3 * lambda_max bounds the error of each value
    np.testing.assert_allclose(loose.values, tight.values, rtol=1e-3)
    for bad in (0.0, 1.5, True, "1e-8"):
        with pytest.raises(ParameterError, match="tol must be a number"):
            hessian_spectrum(prob, prob.theta0, k=2, method="lanczos", tol=bad)

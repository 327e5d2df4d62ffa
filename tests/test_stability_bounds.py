"""Step-size stability on quadratics: textbook bounds, checked just below and above."""

from __future__ import annotations

import jax.numpy as jnp
import numpy as np
import pytest

from basinview.core import Problem, descend

from .conftest import quadratic


def _quadratic_problem(eigs, rng):
    q, _ = np.linalg.qr(rng.standard_normal((len(eigs), len(eigs))))
    a = q @ np.diag(eigs) @ q.T
    b = a @ rng.standard_normal(len(eigs))  # minimiser a^{-1} b is a random point
    return Problem(quadratic, jnp.zeros(len(eigs)), a, b)


def _statuses(prob, optimizer, rates, hyper=None, steps=4000):
    starts = np.random.default_rng(0).standard_normal((3, prob.size)) * 3
    runs = descend(
        prob,
        starts,
        optimizer=optimizer,
        learning_rate=rates,
        hyper=hyper,
        steps=steps,
        grad_tol=1e-7,
        loss_tol=0.0,
    )
    table = runs.table
    return {lr: set(table[table.learning_rate == lr].status) for lr in rates}


def test_gradient_descent_bound_two_over_l(x64, rng):
    # Source: Polyak (1987), Introduction to Optimization, ch. 1; Nesterov (2004),
    # Introductory Lectures on Convex Optimization (from memory for sections); Zhang et al.,
    # Dive into Deep Learning, "Momentum" (read: "0 < eta lambda < 2 for gradient descent").
    # GD converges on a quadratic iff 0 < alpha < 2/L.
    L = 20.0
    prob = _quadratic_problem([0.5, 3.0, L], rng)
    below, above = 0.99 * 2 / L, 1.01 * 2 / L
    status = _statuses(prob, "gradient_descent", [below, above])
    assert status[below] == {"converged"}
    assert status[above] == {"diverged"}


@pytest.mark.parametrize("beta", [0.5, 0.9])
def test_heavy_ball_bound(x64, rng, beta):
    # Source: Zhang et al., Dive into Deep Learning, "Momentum" (read: "0 < eta lambda <
    # 2 + 2 beta"); Polyak (1964), USSR Comput. Math. Math. Phys. 4(5):1-17.
    L = 10.0
    prob = _quadratic_problem([1.0, L], rng)
    bound = 2 * (1 + beta) / L
    below, above = 0.99 * bound, 1.01 * bound
    status = _statuses(prob, "momentum", [below, above], {"momentum": beta}, steps=6000)
    assert status[below] == {"converged"}
    assert status[above] == {"diverged"}


@pytest.mark.parametrize(("beta", "boundary"), [(0.5, 1.5), (0.9, 1.357142857)])
def test_nesterov_bound(x64, rng, beta, boundary):
    # Source: REFERENCES.md C6 — derived from the characteristic polynomial
    # z^2 - (1+beta)(1-alpha lambda) z + beta (1-alpha lambda): stable iff
    # alpha lambda < (2 + 2 beta)/(1 + 2 beta) [verified]; method: Nesterov (1983),
    # Soviet Math. Dokl. 27:372-376. Boundaries 1.5 (beta 0.5) and 1.357142857 (0.9).
    assert (2 + 2 * beta) / (1 + 2 * beta) == pytest.approx(boundary)
    L = 10.0
    prob = _quadratic_problem([1.0, L], rng)
    below, above = 0.99 * boundary / L, 1.01 * boundary / L
    status = _statuses(prob, "nesterov", [below, above], {"momentum": beta}, steps=6000)
    assert status[below] == {"converged"}
    assert status[above] == {"diverged"}


def test_eigenmode_multiplier_one_minus_alpha_lambda(x64):
    # Source: REFERENCES.md C1 (Polyak 1987, ch. 1): under GD each eigen-mode of a quadratic
    # is multiplied by (1 - alpha lambda) per step. With one mode lambda = 4 and alpha =
    # 0.4, the iterate flips sign and shrinks by 0.6 per step.
    prob = Problem(lambda p: 2.0 * p[0] ** 2 + 0.0 * p[1], jnp.array([1.0, 0.0]))
    runs = descend(
        prob, np.array([1.0, 0.0]), learning_rate=0.4, steps=10, grad_tol=0.0, loss_tol=0.0
    )
    losses = runs.losses[0]
    np.testing.assert_allclose(losses, 2.0 * (-0.6) ** (2 * np.arange(11)), rtol=1e-12)
    table = runs.table
    assert table.gradient_reversal[0] == 1.0  # the gradient flips every step


def test_optimal_fixed_step_rate(x64, rng):
    # Source: Nesterov (2004), Theorem 2.1.15 (from memory for the number): with
    # alpha* = 2/(L + mu) the error contracts by (kappa - 1)/(kappa + 1) per step.
    # REFERENCES.md C2 check: mu = 1, L = 100 gives alpha* = 0.019802, rate 0.980198.
    mu, L = 1.0, 100.0
    alpha = 2 / (L + mu)
    assert alpha == pytest.approx(0.019802, abs=1e-6)
    prob = Problem(lambda p: 0.5 * (mu * p[0] ** 2 + L * p[1] ** 2), jnp.zeros(2))
    runs = descend(
        prob, np.array([1.0, 1.0]), learning_rate=alpha, steps=50, grad_tol=0.0, loss_tol=0.0
    )
    # Both coordinates contract by exactly the same factor, 0.980198 in magnitude.
    f = runs.losses[0]
    ratio = np.sqrt(f[1:] / f[:-1])
    np.testing.assert_allclose(ratio, (L / mu - 1) / (L / mu + 1), rtol=1e-10)

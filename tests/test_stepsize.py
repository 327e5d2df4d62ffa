"""Step-size sweeps: predicted bound from curvature against what the runs show."""

from __future__ import annotations

import jax.numpy as jnp
import numpy as np
import pytest
import sklearn.datasets

from basinview.core import ParameterError, Problem, random_starts, regime_of, step_size_sweep

from .conftest import quadratic


def test_diabetes_least_squares_bound_is_one(x64):
    # Source: sklearn's bundled diabetes data (Efron, Hastie, Johnstone & Tibshirani 2004,
    # Ann. Stat., from memory), whose features are centred with unit column norm; for the
    # loss (1/n)|X b - y|^2 with an intercept the Hessian 2 X'X / n has lambda_max = 2
    # exactly (intercept direction), so GD is stable iff lr < 1 (REFERENCES.md E, verified
    # with numpy lstsq).
    x, y = sklearn.datasets.load_diabetes(return_X_y=True)
    xi = np.column_stack([np.ones(len(y)), x])

    def loss(b, xi, y):
        return jnp.mean((xi @ b - y) ** 2)

    prob = Problem(loss, jnp.zeros(11), xi, y)
    starts = random_starts(prob, 4, scale=10.0, seed=0)
    sweep = step_size_sweep(prob, starts, learning_rates=[0.5, 0.9, 0.99, 1.01, 1.1, 1.5], steps=3000)
    assert sweep.lambda_max == pytest.approx(2.0, rel=1e-12)
    assert sweep.predicted_bound == pytest.approx(1.0, rel=1e-12)
    assert sweep.observed_bound == pytest.approx(0.99)  # largest swept rate with no divergence
    table = sweep.table.set_index("learning_rate")
    assert table.loc[1.01, "regime"] == "diverge"
    # Below the bound GD is stable but slow: lambda_min = 3.873633e-05 (REFERENCES.md E).
    assert sweep.spectrum.lambda_min == pytest.approx(3.873633e-05, rel=1e-5)
    assert table.loc[0.99, "diverged"] == 0
    # The reference solution from numpy lstsq: the intercept is 152.1334841629.
    coef = np.linalg.lstsq(xi, y, rcond=None)[0]
    assert coef[0] == pytest.approx(152.1334841629, rel=1e-10)


def test_quadratic_sweep_regimes(x64, rng):
    q, _ = np.linalg.qr(rng.standard_normal((3, 3)))
    a = q @ np.diag([0.5, 1.0, 10.0]) @ q.T
    prob = Problem(quadratic, jnp.zeros(3), a, np.ones(3))
    starts = rng.standard_normal((6, 3))
    rates = [1e-4, 0.05, 0.195, 0.21]
    sweep = step_size_sweep(prob, starts, learning_rates=rates, steps=3000, grad_tol=1e-6)
    assert sweep.predicted_bound == pytest.approx(0.2)  # 2 / lambda_max (Polyak 1987, ch. 1)
    regimes = dict(zip(sweep.table.learning_rate, sweep.table.regime))
    assert regimes[1e-4] == "crawl"
    assert regimes[0.05] == "converge"
    assert regimes[0.195] == "oscillate"  # the stiff mode flips sign each step
    assert regimes[0.21] == "diverge"
    assert sweep.observed_bound == pytest.approx(0.195)


def test_momentum_sweep_uses_its_own_bound(x64):
    prob = Problem(lambda p: 0.5 * (p[0] ** 2 + 4.0 * p[1] ** 2), jnp.zeros(2))
    sweep = step_size_sweep(prob, np.array([[1.0, 1.0]]), learning_rates=[0.5, 0.94, 0.96], optimizer="momentum", hyper={"momentum": 0.9}, steps=4000)
    # Source: Dive into Deep Learning, "Momentum" (read: 0 < eta lambda < 2 + 2 beta):
    # 3.8 / 4 = 0.95.
    assert sweep.predicted_bound == pytest.approx(0.95)
    assert sweep.observed_bound == pytest.approx(0.94)


def test_fixed_step_stability_ratio_is_rate_over_bound(x64):
    prob = Problem(lambda p: 0.5 * (p[0] ** 2 + 4.0 * p[1] ** 2), jnp.zeros(2))
    sweep = step_size_sweep(prob, np.array([[1.0, 1.0]]), learning_rates=[0.1, 0.3], steps=200)
    # Source: the GD bound 2 / lambda_max = 2 / 4 (Polyak 1987, ch. 1, from memory).
    np.testing.assert_allclose(sweep.table.stability_ratio, [0.2, 0.6])
    assert sweep.sharpness_threshold is None
    assert sweep.table.preconditioned_sharpness.isna().all()


def test_rmsprop_settles_at_the_edge_of_stability(x64):
    # RMSProp divides the step by P = sqrt(v + eps). On a quadratic the iterate
    # shrinks, so v and P shrink and lr * lambda / P grows until the stiff
    # direction is no longer contracted: x -> (1 - lr lambda / P) x stops
    # shrinking exactly when lr lambda / P = 2, a period-2 oscillation. So the
    # run must end with lr * lambda_max(P^-1 H) = 2 (RMSProp's threshold),
    # i.e. stability_ratio = 1, whatever the rate. Source: Cohen, J. M. et al.
    # (2022), Adaptive gradient methods at the edge of stability,
    # arXiv:2207.14484 (from memory); the 2-cycle argument is common practice.
    prob = Problem(lambda p: 0.5 * (p[0] ** 2 + 10.0 * p[1] ** 2), jnp.zeros(2))
    rates = [1e-3, 1e-2, 1e-1]
    sweep = step_size_sweep(
        prob, np.array([[1.0, 1.0], [-2.0, 0.5]]), learning_rates=rates,
        optimizer="rmsprop", steps=3000, grad_tol=0.0, loss_tol=0.0,
    )
    assert sweep.sharpness_threshold == 2.0
    assert sweep.predicted_bound is None  # no fixed bound for an adaptive rule
    np.testing.assert_allclose(sweep.table.stability_ratio, 1.0, rtol=1e-3)
    # The sharpness itself scales as 1 / lr: P adapts to the rate.
    np.testing.assert_allclose(
        sweep.table.preconditioned_sharpness * np.array(rates), 2.0, rtol=1e-3
    )


def test_adam_sweep_reports_its_threshold(x64):
    prob = Problem(lambda p: 0.5 * (p[0] ** 2 + 10.0 * p[1] ** 2), jnp.zeros(2))
    sweep = step_size_sweep(
        prob, np.array([[1.0, 1.0]]), learning_rates=[1e-2, 1e-1],
        optimizer="adam", hyper={"b1": 0.5}, steps=500,
    )
    # Source: Cohen et al. (2022), arXiv:2207.14484: (2 + 2 b1) / (1 - b1) (from memory).
    assert sweep.sharpness_threshold == pytest.approx(6.0)
    runs = sweep.runs
    for i, lr in enumerate(sweep.learning_rates):
        best = int(sweep.runs.table[sweep.runs.table.learning_rate == lr].final_loss.idxmin())
        # lambda_max(P^-1 H) of a diagonal H is max(h_i / p_i).
        expected = np.max(np.array([1.0, 10.0]) / runs.preconditioner[best])
        assert sweep.table.preconditioned_sharpness[i] == pytest.approx(expected, rel=1e-9)
        assert sweep.table.stability_ratio[i] == pytest.approx(lr * expected / 6.0, rel=1e-9)


def test_regime_majority_rules():
    assert regime_of(["diverged", "diverged", "converged"], [False] * 3) == "diverge"
    assert regime_of(["converged", "converged", "max_steps"], [True, True, False]) == "oscillate"
    assert regime_of(["max_steps"] * 3, [False] * 3) == "crawl"
    assert regime_of(["converged", "max_steps", "diverged"], [False] * 3) == "diverge"


def test_sweep_argument_errors():
    prob = Problem(lambda p: jnp.sum(p**2), jnp.ones(2))
    with pytest.raises(ParameterError, match="at least one"):
        step_size_sweep(prob, np.ones(2), learning_rates=[])
    with pytest.raises(ParameterError, match="one value per other hyper-parameter"):
        step_size_sweep(prob, np.ones(2), learning_rates=[0.1], optimizer="momentum", hyper={"momentum": [0.5, 0.9]})
    with pytest.raises(ParameterError, match="positive"):
        step_size_sweep(prob, np.ones(2), learning_rates=[-0.1, 0.1])

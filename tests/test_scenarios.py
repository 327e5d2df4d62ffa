"""The demo scenarios do what their docstrings promise.

The scenarios are invented data for the demo and the notebooks; these tests
check their claims against independent computations (numpy, scipy,
scikit-learn), never against values copied from a run of basinview.
"""

from __future__ import annotations

import itertools

import jax
import numpy as np
import pytest
import scipy.optimize
from sklearn.metrics import log_loss

import basinview as bv
from basinview.core import BasinviewError
from basinview.scenarios import (
    beacon,
    gauges_loss,
    mlp_apply,
    mlp_init,
    mlp_loss,
    twin_gauges,
    wavy_band,
    wavy_band_data,
)

# ----------------------------------------------------------------- beacon


def _beacon_loss_numpy(p, receivers, ranges):
    return np.mean((np.hypot(p[0] - receivers[:, 0], p[1] - receivers[:, 1]) - ranges) ** 2)


def test_beacon_has_two_mirror_minima_found_by_scipy_and_basinview():
    sc = beacon()
    rec, rng = sc.extras["receivers"], sc.extras["ranges"]
    # Source: scipy.optimize.minimize (BFGS) as an independent reference minimiser.
    ends = [
        scipy.optimize.minimize(_beacon_loss_numpy, x0, args=(rec, rng), method="BFGS").x
        for x0 in ([5.0, 3.0], [5.0, -3.0])
    ]
    upper, lower = ends
    assert upper[1] > 2 and lower[1] < -2  # one on each side of the receivers' line
    assert np.linalg.norm(upper - sc.extras["true_position"]) < 0.2
    problem = sc.problem
    plane = bv.axes_plane(problem, "x", "y", origin=sc.plane_origin)
    starts = bv.grid_starts(plane, span=sc.span, resolution=7)
    runs = bv.descend(problem, starts, learning_rate=0.2, steps=400, plane=plane)
    minima = bv.find_minima(problem, runs)
    assert list(minima.kind) == ["minimum", "minimum"]
    found = minima.points[np.argsort(-minima.points[:, 1])]  # upper first
    np.testing.assert_allclose(found, np.array([upper, lower]), atol=2e-3)


# ------------------------------------------------------------ twin gauges


def test_twin_gauges_is_reproducible_and_seeded():
    a, b, c = twin_gauges(seed=7), twin_gauges(seed=7), twin_gauges(seed=8)
    np.testing.assert_array_equal(a.extras["readings"], b.extras["readings"])
    assert a.problem.fingerprint == b.problem.fingerprint != c.problem.fingerprint


@pytest.mark.parametrize("correlation", [0.5, 0.95])
def test_twin_gauges_correlation_and_scale(correlation):
    readings = twin_gauges(correlation=correlation, n=4000, scale=2.0).extras["readings"]
    # common practice: the sample correlation of n = 4000 pairs is within a few
    # standard errors (1 - r^2) / sqrt(n) <= 0.012 of the population value.
    assert np.corrcoef(readings.T)[0, 1] == pytest.approx(correlation, abs=0.04)
    assert readings[:, 1].std() / readings[:, 0].std() == pytest.approx(2.0, rel=0.05)


def test_twin_gauges_minimum_is_the_least_squares_fit(x64):
    sc = twin_gauges()
    x, y = sc.extras["readings"], sc.extras["flow"]
    problem = bv.Problem(gauges_loss, {"a": 0.0, "b": 0.0}, x, y)
    # Source: numpy.linalg.lstsq, the closed-form least-squares solution.
    expected = np.linalg.lstsq(x, y, rcond=None)[0]
    runs = bv.descend(
        problem,
        {"a": 0.0, "b": 0.0},
        optimizer="momentum",
        learning_rate=0.1,
        hyper={"momentum": 0.6},
        steps=5000,
        grad_tol=1e-10,
    )
    assert runs.status[0] == "converged"
    np.testing.assert_allclose(runs.final[0], expected, atol=1e-8)
    # common practice: the Hessian of mean((X w - y)^2) is 2 X^T X / n, everywhere.
    h = bv.hessian_matrix(problem, problem.theta0)
    np.testing.assert_allclose(h, 2 * x.T @ x / len(y), rtol=1e-10)
    eig = np.linalg.eigvalsh(h)
    assert 40 < eig[-1] / eig[0] < 70  # "condition number about 54 with the defaults"


def test_twin_gauges_rejects_impossible_correlation():
    with pytest.raises(BasinviewError, match="correlation"):
        twin_gauges(correlation=1.0)


# ---------------------------------------------------------- wavy band MLP


def test_wavy_band_data_labels_follow_the_curve():
    x, y = wavy_band_data(seed=3, n=500)
    assert x.shape == (500, 2) and y.shape == (500,)
    assert x.dtype == np.float32 and y.dtype == np.float32
    assert np.all(np.abs(x) <= 2)
    np.testing.assert_array_equal(y, (x[:, 1] > 0.8 * np.sin(1.8 * x[:, 0])).astype(np.float32))
    assert 0.3 < y.mean() < 0.7
    np.testing.assert_array_equal(wavy_band_data(seed=3, n=500)[0], x)


@pytest.mark.parametrize("widths", [(2, 32, 32, 1), (2, 5, 1), (3, 4, 4, 4, 2)])
def test_mlp_parameter_count(widths):
    params = mlp_init(jax.random.key(0), widths)
    n = sum(np.size(leaf) for leaf in jax.tree_util.tree_leaves(params))
    # common practice: a dense layer from m to k units has (m + 1) * k parameters.
    assert n == sum((m + 1) * k for m, k in itertools.pairwise(widths))


def _forward_numpy(params, x):
    h = np.asarray(x, dtype=np.float64)
    names = [f"layer{i}" for i in range(1, len(params) + 1)]
    for name in names[:-1]:
        h = np.tanh(h @ np.asarray(params[name]["w"]) + np.asarray(params[name]["b"]))
    last = params[names[-1]]
    return (h @ np.asarray(last["w"]) + np.asarray(last["b"]))[:, 0]


def test_mlp_apply_and_loss_match_independent_implementations():
    x, y = wavy_band_data(seed=5, n=64)
    params = mlp_init(jax.random.key(3), (2, 8, 8, 1))
    logits = np.asarray(mlp_apply(params, x))
    np.testing.assert_allclose(logits, _forward_numpy(params, x), rtol=1e-4, atol=1e-5)
    decay = 1e-3
    penalty = sum(
        float(np.sum(np.asarray(layer["w"], np.float64) ** 2)) for layer in params.values()
    )
    # Source: scikit-learn's log_loss (binary cross-entropy of probabilities).
    expected = log_loss(y, 1 / (1 + np.exp(-_forward_numpy(params, x))), labels=[0, 1])
    assert float(mlp_loss(params, x, y, decay=decay)) == pytest.approx(
        expected + decay * penalty, rel=1e-4
    )


def test_wavy_band_scenario_problem_and_initialiser():
    sc = wavy_band(seed=3)
    assert sc.problem.size == 1185
    assert sc.problem.labels[0].startswith("layer1.")
    starts = bv.initializer_starts(sc.problem, sc.extras["init"], 2, seed=1)
    assert starts.points.shape == (2, 1185)
    assert not np.allclose(starts.points[0], starts.points[1])
    # a random plane treats each (inputs, outputs) kernel column as one unit's filter
    plane = bv.random_plane(sc.problem, seed=0, origin=sc.problem.theta0)
    w = sc.problem.unflatten(plane.d1)["layer2"]["w"]
    w0 = sc.problem.unflatten(sc.problem.theta0)["layer2"]["w"]
    np.testing.assert_allclose(np.linalg.norm(w, axis=0), np.linalg.norm(w0, axis=0), rtol=1e-4)

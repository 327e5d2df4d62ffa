"""Distinct minima, critical-point types and basin maps."""

from __future__ import annotations

import jax.numpy as jnp
import numpy as np
import pytest
import scipy.optimize
import sklearn.datasets
import sklearn.linear_model

from basinview.core import (
    DIVERGED_LABEL,
    MAX_STEPS_LABEL,
    NOT_STATIONARY_LABEL,
    MinimaWarning,
    Problem,
    axes_plane,
    basin_map,
    classify,
    descend,
    find_minima,
    random_starts,
    refine,
)

from .conftest import himmelblau
from .test_reference_minima import HIMMELBLAU_MINIMA, branin

# Source: REFERENCES.md A (Himmelblau): the maximum (-0.2708445907, -0.9230385565),
# f = 181.616521523 (secondary, verified); the four saddles are [computed] there (no
# published source), so each is cross-checked below with scipy.optimize.root on the
# gradient (reference library) before its type is tested.
HIMMELBLAU_MAX = (-0.2708445907, -0.9230385565)
HIMMELBLAU_SADDLES = [
    (3.3851541836, 0.0738518798),
    (0.0866775046, 2.8842547012),
    (-3.0730257508, -0.0813530443),
    (-0.1279613467, -1.9537149802),
]


def _himmelblau_grad(v):
    x, y = v
    return [
        4 * x * (x**2 + y - 11) + 2 * (x + y**2 - 7),
        2 * (x**2 + y - 11) + 4 * y * (x + y**2 - 7),
    ]


def test_himmelblau_critical_points_are_classified(x64):
    prob = Problem(himmelblau, {"x": 0.0, "y": 0.0})
    cases = [(p, "minimum") for p in HIMMELBLAU_MINIMA] + [(HIMMELBLAU_MAX, "maximum")]
    for s in HIMMELBLAU_SADDLES:
        ref = scipy.optimize.root(_himmelblau_grad, s, tol=1e-14)
        np.testing.assert_allclose(ref.x, s, atol=1e-8)
        cases.append((s, "saddle"))
    for point, kind in cases:
        # start a little off the point; refinement must find it again
        near = np.asarray(point) + np.array([0.03, -0.02])
        x = refine(prob, near)
        np.testing.assert_allclose(x, point, atol=1e-8)
        cp = classify(prob, x)
        assert cp.kind == kind, (point, cp)
    assert classify(prob, np.array(HIMMELBLAU_MAX)).loss == pytest.approx(181.616521523, rel=1e-9)


def test_himmelblau_minima_and_basin_shares(x64):
    prob = Problem(himmelblau, {"x": 0.0, "y": 0.0})
    plane = axes_plane(prob, "x", "y")
    bm = basin_map(prob, plane, span=5.0, resolution=61, learning_rate=0.005, steps=3000)
    minima = bm.minima
    assert len(minima) == 4
    assert set(minima.kind) == {"minimum"}
    for p in HIMMELBLAU_MINIMA:
        assert np.min(np.linalg.norm(minima.points - np.asarray(p), axis=1)) < 1e-6
    assert minima.share.sum() == pytest.approx(1.0)
    # Reference: the same gradient descent written as a plain NumPy loop over the grid.
    a = np.linspace(-5, 5, 61)
    xx, yy = np.meshgrid(a, a)
    x, y = xx.ravel().copy(), yy.ravel().copy()
    for _ in range(3000):
        gx, gy = _himmelblau_grad((x, y))
        x, y = x - 0.005 * gx, y - 0.005 * gy
    ref = np.argmin(
        np.linalg.norm(np.stack([x, y], 1)[:, None, :] - minima.points[None], axis=2), axis=1
    )
    agree = np.mean(ref.reshape(61, 61) == bm.label)
    assert agree > 0.995
    # Cross-check only (REFERENCES.md A, [computed] there on a 301 x 301 grid): shares
    # 0.2555 (3, 2), 0.2598 (-2.81, 3.13), 0.2375 (-3.78, -3.28), 0.2472 (3.58, -1.85).
    expected = {
        (3.0, 2.0): 0.2555,
        (-2.81, 3.13): 0.2598,
        (-3.78, -3.28): 0.2375,
        (3.58, -1.85): 0.2472,
    }
    for where, share in expected.items():
        k = int(np.argmin(np.linalg.norm(minima.points - np.asarray(where), axis=1)))
        assert minima.share[k] == pytest.approx(share, abs=0.015)
    shares = bm.shares
    assert shares.share.sum() == pytest.approx(1.0)
    assert shares.set_index("point").loc["diverged", "share"] == 0.0


def test_branin_three_minima_with_equal_value(x64):
    # Source: Surjanovic & Bingham, SFU Virtual Library, branin.html (three global minima,
    # f* = 0.397887); exact value 5/(4 pi) (REFERENCES.md A, verified).
    prob = Problem(branin, jnp.zeros(2))
    starts = random_starts(prob, 60, scale=1.0, seed=0, center=np.array([2.5, 7.5]))
    starts = np.clip(
        starts.points * np.array([3.0, 3.0]) - np.array([5.0, 15.0]), [-5, 0], [10, 15]
    )
    runs = descend(prob, starts, learning_rate=0.05, steps=20000, grad_tol=1e-9, loss_tol=0.0)
    minima = find_minima(prob, runs)
    lowest = minima.table[np.isclose(minima.table.loss, 5 / (4 * np.pi), rtol=1e-10)]
    assert len(lowest) == 3
    found = sorted(map(tuple, np.round(minima.points[lowest.index], 5)))
    assert found == sorted([(-3.14159, 12.275), (3.14159, 2.275), (9.42478, 2.475)])
    assert set(lowest.kind) == {"minimum"}


def test_convex_problem_has_one_basin(x64):
    # Source: sklearn's bundled breast cancer data; L2-regularised logistic regression
    # (mean NLL + (lambda/2)|w|^2, lambda = 1/n, intercept unpenalised) is strictly convex,
    # so every start must reach one minimum. Reference optimum: sklearn
    # LogisticRegression(C=1), the same objective scaled by C*n (REFERENCES.md E).
    data = sklearn.datasets.load_breast_cancer()
    x = (data.data - data.data.mean(0)) / data.data.std(0)
    y = data.target.astype(float)
    n = len(y)

    def loss(p, x, y):
        z = x @ p["w"] + p["b"]
        return jnp.mean(jnp.logaddexp(0.0, z) - y * z) + 0.5 / n * jnp.sum(p["w"] ** 2)

    prob = Problem(loss, {"w": jnp.zeros(30), "b": 0.0}, x, y)
    starts = random_starts(prob, 12, scale=1.0, seed=4)
    runs = descend(
        prob,
        starts,
        optimizer="nesterov",
        learning_rate=0.2,
        hyper={"momentum": 0.95},
        steps=20000,
        grad_tol=1e-8,
        loss_tol=0.0,
    )
    assert (runs.status == "converged").all()
    minima = find_minima(prob, runs)
    assert len(minima) == 1
    assert minima.kind[0] == "minimum"
    assert minima.share[0] == 1.0
    ref = sklearn.linear_model.LogisticRegression(C=1.0, tol=1e-12, max_iter=10000).fit(x, y)
    ref_obj = float(loss({"w": jnp.asarray(ref.coef_[0]), "b": float(ref.intercept_[0])}, x, y))
    assert minima.loss[0] == pytest.approx(ref_obj, abs=1e-9)
    assert minima.loss[0] == pytest.approx(0.0663601862247, abs=2e-6)  # REFERENCES.md E (verified)


def test_unconverged_and_diverged_runs_are_labelled():
    prob = Problem(himmelblau, {"x": 0.0, "y": 0.0})
    runs = descend(
        prob, np.array([[2.5, 2.5], [1.0, 1.0], [4.0, 4.0]]), learning_rate=[0.001, 0.05], steps=30
    )
    with pytest.warns(MinimaWarning, match="more steps"):
        minima = find_minima(prob, runs)
    status = runs.status
    assert np.all(minima.assignment[status == "diverged"] == DIVERGED_LABEL)
    assert np.all(minima.assignment[status == "max_steps"] == MAX_STEPS_LABEL)
    with_crawlers = find_minima(prob, runs, include_unconverged=True)
    # each crawler is assigned to the stationary point refinement reaches, or reported as
    # not stationary; never a row of its own that is not a stationary point
    spent = with_crawlers.assignment[status == "max_steps"]
    assert np.all((spent >= 0) | (spent == NOT_STATIONARY_LABEL))
    assert np.all(with_crawlers.grad_norm <= with_crawlers.grad_tol)


def test_table_has_the_users_labels():
    prob = Problem(
        lambda p: (p["w"][0] - 1) ** 2 + (p["w"][1] + 2) ** 2 + p["b"] ** 2,
        {"w": jnp.zeros(2), "b": 0.0},
    )
    runs = descend(prob, random_starts(prob, 4, seed=0), learning_rate=0.2, steps=500)
    table = find_minima(prob, runs).table
    assert list(table.columns[-3:]) == ["b", "w[0]", "w[1]"]
    assert table.point.tolist() == ["A"]
    np.testing.assert_allclose(
        table[["b", "w[0]", "w[1]"]].to_numpy()[0], [0.0, 1.0, -2.0], atol=1e-4
    )

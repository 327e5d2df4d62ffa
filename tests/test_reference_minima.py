"""Published minima of standard test functions, reached by the batched engine.

Each check names its source. Runs use float64 so tolerances can be tight.
"""

from __future__ import annotations

import jax.numpy as jnp
import numpy as np
import pytest
import scipy.optimize

from basinview.core import Problem, descend

from .conftest import himmelblau, rosenbrock

# Source: Himmelblau, D. M. (1972), Applied Nonlinear Programming, McGraw-Hill (from memory
# for the book); the four minima (f = 0) as tabulated by several secondary references,
# e.g. Jamil & Yang (2013), Int. J. Math. Modelling & Num. Optimisation 4(2):150-194;
# ten digits as verified in REFERENCES.md A (beware printed typos 3.584458, 3.283186).
HIMMELBLAU_MINIMA = [
    (3.0, 2.0),
    (-2.8051180870, 3.1313125183),
    (-3.7793102534, -3.2831859913),
    (3.5844283403, -1.8481265270),
]


def test_himmelblau_four_minima_from_suitable_starts(x64):
    prob = Problem(himmelblau, {"x": 0.0, "y": 0.0})
    starts = np.array([[2.5, 2.5], [-2.0, 2.0], [-3.0, -3.0], [3.0, -1.0]])
    runs = descend(prob, starts, learning_rate=0.005, steps=5000, grad_tol=1e-10, loss_tol=0.0)
    assert (runs.status == "converged").all()
    # labels are sorted dict keys: ("x", "y")
    np.testing.assert_allclose(runs.final, HIMMELBLAU_MINIMA, atol=2e-6)
    np.testing.assert_allclose(runs.final_loss, 0.0, atol=1e-12)
    # Reference minimiser from the same starts agrees (scipy.optimize, BFGS).
    for start, end in zip(starts, runs.final):
        ref = scipy.optimize.minimize(
            lambda v: float(himmelblau({"x": v[0], "y": v[1]})), start, method="BFGS", tol=1e-12
        )
        np.testing.assert_allclose(end, ref.x, atol=1e-5)


def branin(p):
    b, c = 5.1 / (4 * np.pi**2), 5 / np.pi
    return (
        (p[1] - b * p[0] ** 2 + c * p[0] - 6) ** 2 + 10 * (1 - 1 / (8 * np.pi)) * jnp.cos(p[0]) + 10
    )


def test_branin_three_global_minima(x64):
    # Source: Surjanovic & Bingham, Virtual Library of Simulation Experiments, SFU,
    # branin.html: a=1, b=5.1/(4 pi^2), c=5/pi, r=6, s=10, t=1/(8 pi); three global minima
    # f* = 0.397887 at (-pi, 12.275), (pi, 2.275), (9.42478, 2.475).
    prob = Problem(branin, jnp.zeros(2))
    starts = np.array([[-3.0, 12.0], [3.0, 2.0], [9.5, 2.5]])
    runs = descend(prob, starts, learning_rate=0.05, steps=20000, grad_tol=1e-9, loss_tol=0.0)
    assert (runs.status == "converged").all()
    np.testing.assert_allclose(
        runs.final, [[-np.pi, 12.275], [np.pi, 2.275], [9.42478, 2.475]], atol=1e-5
    )
    np.testing.assert_allclose(runs.final_loss, 0.397887, atol=1e-6)
    # Exact value 5/(4 pi) (REFERENCES: verified by hand from the definition).
    np.testing.assert_allclose(runs.final_loss, 5 / (4 * np.pi), rtol=1e-12)


@pytest.mark.parametrize(
    ("optimizer", "lr", "hyper"),
    [
        ("momentum", 1e-3, {"momentum": 0.9}),
        ("nesterov", 1e-3, {"momentum": 0.9}),
        ("adam", 0.01, {}),
    ],
)
def test_rosenbrock_minimum(x64, optimizer, lr, hyper):
    # Source: Rosenbrock, H. H. (1960), The Computer Journal 3(3):175-184 (from memory):
    # minimum f(1, 1) = 0; start (-1.2, 1) is the customary one (from memory).
    prob = Problem(rosenbrock, jnp.array([-1.2, 1.0]))
    runs = descend(
        prob,
        prob.params,
        optimizer=optimizer,
        learning_rate=lr,
        hyper=hyper,
        steps=20000,
        grad_tol=1e-8,
        loss_tol=0.0,
    )
    assert runs.status[0] == "converged"
    np.testing.assert_allclose(runs.final[0], [1.0, 1.0], atol=1e-7)


def beale(p):
    x, y = p[0], p[1]
    return (1.5 - x + x * y) ** 2 + (2.25 - x + x * y**2) ** 2 + (2.625 - x + x * y**3) ** 2


def test_beale_minimum(x64):
    # Source: Surjanovic & Bingham, SFU Virtual Library (beale), as quoted in optimisation
    # library docs (secondary): global minimum f(3, 0.5) = 0 on [-4.5, 4.5]^2.
    prob = Problem(beale, jnp.array([1.0, 1.0]))
    runs = descend(
        prob,
        np.array([[1.0, 1.0], [2.0, 0.0], [4.0, 1.0]]),
        learning_rate=0.01,
        steps=20000,
        grad_tol=1e-9,
        loss_tol=0.0,
    )
    assert (runs.status == "converged").all()
    np.testing.assert_allclose(runs.final, [[3.0, 0.5]] * 3, atol=1e-6)


def test_beale_plateau_on_x_equal_zero(x64):
    # Source: REFERENCES.md A (verified from the definition): f(0, y) = 1.5^2 + 2.25^2 +
    # 2.625^2 = 14.203125 for every y, and the gradient there is not zero in x, so a run
    # starting on the line leaves it.
    prob = Problem(beale, jnp.array([0.0, 0.0]))
    for y in (-3.0, 0.0, 2.0):
        assert float(prob.value(np.array([0.0, y]))) == pytest.approx(14.203125)
    runs = descend(
        prob, np.array([0.0, 0.5]), learning_rate=0.01, steps=20000, grad_tol=1e-9, loss_tol=0.0
    )
    assert runs.status[0] == "converged"
    np.testing.assert_allclose(runs.final[0], [3.0, 0.5], atol=1e-6)

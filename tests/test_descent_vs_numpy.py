"""The batched engine equals a plain per-run NumPy loop of the same update rule.

The NumPy reference implementations below are written from the published
update rules, independently of basinview's code:

* gradient descent: x+ = x - a g (Cauchy 1847; common practice);
* heavy ball: x+ = x - a g(x) + b (x - x_prev) (Polyak 1964);
* Nesterov: y = x + b (x - x_prev), x+ = y - a g(y) (Nesterov 1983); basinview
  records the look-ahead points y, so the reference records y too;
* Adam (Kingma & Ba 2015, Algorithm 1): m, v moments with bias correction,
  x -= a m_hat / (sqrt(v_hat) + eps);
* RMSProp as defined by optax.rmsprop: v = d v + (1 - d) g^2, x -= a g / sqrt(v + eps);
* sequential coordinate updates: x_i -= a d_i f(x) with x already updated in
  coordinates < i (Gauss-Seidel order; common practice).
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from basinview.core import Problem, descend

from .conftest import quadratic


def np_gd(a, b, x, lr, steps, **_):
    out = [x.copy()]
    for _ in range(steps):
        x = x - lr * (a @ x - b)
        out.append(x.copy())
    return np.array(out)


def np_heavy_ball(a, b, x, lr, steps, momentum, **_):
    prev = x.copy()
    out = [x.copy()]
    for _ in range(steps):
        x, prev = x - lr * (a @ x - b) + momentum * (x - prev), x
        out.append(x.copy())
    return np.array(out)


def np_nesterov(a, b, x, lr, steps, momentum, **_):
    prev = x.copy()
    out = [x.copy()]  # y_0 = x_0
    for _ in range(steps):
        y = x + momentum * (x - prev)
        x_new = y - lr * (a @ y - b)
        prev, x = x, x_new
        out.append(x + momentum * (x - prev))  # the next look-ahead point
    return np.array(out)


def np_adam(a, b, x, lr, steps, b1=0.9, b2=0.999, eps=1e-8, final=None, **_):
    m = np.zeros_like(x)
    v = np.zeros_like(x)
    out = [x.copy()]
    for t in range(1, steps + 1):
        g = a @ x - b
        m = b1 * m + (1 - b1) * g
        v = b2 * v + (1 - b2) * g * g
        m_hat = m / (1 - b1**t)
        v_hat = v / (1 - b2**t)
        x = x - lr * m_hat / (np.sqrt(v_hat) + eps)
        out.append(x.copy())
    if final is not None:
        final["preconditioner"] = np.sqrt(v_hat) + eps
    return np.array(out)


def np_rmsprop(a, b, x, lr, steps, decay=0.9, eps=1e-8, final=None, **_):
    v = np.zeros_like(x)
    out = [x.copy()]
    for _ in range(steps):
        g = a @ x - b
        v = decay * v + (1 - decay) * g * g
        x = x - lr * g / np.sqrt(v + eps)
        out.append(x.copy())
    if final is not None:
        final["preconditioner"] = np.sqrt(v + eps)
    return np.array(out)


def np_sequential(a, b, x, lr, steps, **_):
    out = [x.copy()]
    for _ in range(steps):
        x = x.copy()
        for i in range(len(x)):
            x[i] -= lr * (a[i] @ x - b[i])
        out.append(x.copy())
    return np.array(out)


REFERENCE = {
    "gradient_descent": np_gd,
    "momentum": np_heavy_ball,
    "nesterov": np_nesterov,
    "adam": np_adam,
    "rmsprop": np_rmsprop,
    "sequential": np_sequential,
}


@st.composite
def quadratic_case(draw):
    n = draw(st.integers(2, 5))
    seed = draw(st.integers(0, 2**31 - 1))
    rng = np.random.default_rng(seed)
    m = rng.standard_normal((n, n))
    a = m @ m.T / n + draw(st.floats(0.05, 2.0)) * np.eye(n)
    b = rng.standard_normal(n)
    starts = rng.standard_normal((draw(st.integers(1, 4)), n)) * draw(st.floats(0.1, 5.0))
    return a, b, starts


def _batched_runs_equal_numpy_loops(case, rule, lr_scale, momentum):
    a, b, starts = case
    steps = 25
    lam_max = np.linalg.eigvalsh(a)[-1]
    lr = lr_scale / lam_max if rule not in ("adam", "rmsprop") else 0.05 * lr_scale
    hyper = {"momentum": momentum} if rule in ("momentum", "nesterov") else {}
    with jax.enable_x64(True):
        prob = Problem(quadratic, jnp.zeros(len(b)), a, b)
        runs = descend(
            prob,
            starts,
            optimizer=rule,
            learning_rate=lr,
            hyper=hyper,
            steps=steps,
            grad_tol=0.0,
            loss_tol=0.0,
            divergence_factor=1e300,
        )
    for r in range(len(starts)):
        final: dict = {}
        ref = REFERENCE[rule](a, b, starts[r].copy(), lr, steps, final=final, **hyper)
        ref_loss = np.array([0.5 * x @ a @ x - b @ x for x in ref])
        np.testing.assert_allclose(runs.losses[r], ref_loss, rtol=1e-9, atol=1e-9)
        np.testing.assert_allclose(runs.final[r], ref[-1], rtol=1e-9, atol=1e-9)
        if rule in ("adam", "rmsprop"):
            # The diagonal the final state divides the step by (same sources as above).
            np.testing.assert_allclose(
                runs.preconditioner[r], final["preconditioner"], rtol=1e-9, atol=1e-12
            )
        else:
            assert runs.preconditioner is None


@settings(max_examples=10, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    case=quadratic_case(),
    rule=st.sampled_from(sorted(REFERENCE)),
    lr_scale=st.floats(0.05, 0.9),
    momentum=st.floats(0.0, 0.95),
)
def test_batched_runs_equal_numpy_loops(case, rule, lr_scale, momentum):
    _batched_runs_equal_numpy_loops(case, rule, lr_scale, momentum)


@pytest.mark.slow
@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    case=quadratic_case(),
    rule=st.sampled_from(sorted(REFERENCE)),
    lr_scale=st.floats(0.05, 0.9),
    momentum=st.floats(0.0, 0.95),
)
def test_batched_runs_equal_numpy_loops_many_examples(case, rule, lr_scale, momentum):
    _batched_runs_equal_numpy_loops(case, rule, lr_scale, momentum)


def test_sequential_differs_from_simultaneous_only_when_coordinates_couple(x64):
    coupled = np.array([[2.0, 0.9], [0.9, 1.0]])
    separable = np.diag([2.0, 1.0])
    b = np.array([1.0, -1.0])
    start = np.array([[3.0, 2.0]])
    finals = {}
    for name, a in (("coupled", coupled), ("separable", separable)):
        prob = Problem(quadratic, jnp.zeros(2), a, b)
        for rule in ("gradient_descent", "sequential"):
            runs = descend(
                prob, start, optimizer=rule, learning_rate=0.3, steps=5, grad_tol=0.0, loss_tol=0.0
            )
            finals[name, rule] = runs.final[0]
    # Uncoupled coordinates: the order of updates cannot matter.
    np.testing.assert_allclose(
        finals["separable", "sequential"], finals["separable", "gradient_descent"], rtol=1e-14
    )
    # Coupled: the sequential variant uses partly updated vectors, a different algorithm.
    assert (
        np.abs(finals["coupled", "sequential"] - finals["coupled", "gradient_descent"]).max() > 1e-3
    )
    np.testing.assert_allclose(
        finals["coupled", "sequential"],
        np_sequential(coupled, b, start[0].copy(), 0.3, 5)[-1],
        rtol=1e-12,
    )

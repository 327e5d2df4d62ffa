"""The plane-affine path (core/affine.py) against the plain path and NumPy.

Every surface below is computed three ways: with the affine intermediates'
coefficients computed once per call (``affine=True``), per point
(``affine=False``), and in NumPy in float64 from the loss's formula at each
grid point (the outside reference). Sizes are small so that each
hypothesis example compiles two small programs.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from sklearn.datasets import load_breast_cancer
from sklearn.metrics import log_loss

from basinview.core import Problem, axes_plane, count_compilations, evaluate_surface, random_plane
from basinview.core.affine import affine_wins, plane_plan
from basinview.core.points import uses_affine

SETTINGS = settings(
    max_examples=2, deadline=None, suppress_health_check=[HealthCheck.too_slow], derandomize=True
)
RES = 5
SPAN = 0.7


def _grid_thetas(problem: Problem, plane: object, surface: object) -> np.ndarray:
    aa, bb = np.meshgrid(surface.a, surface.b)
    return (
        np.asarray(plane.origin, np.float64)[None]
        + aa.reshape(-1, 1) * np.asarray(plane.d1, np.float64)[None]
        + bb.reshape(-1, 1) * np.asarray(plane.d2, np.float64)[None]
    )


def _both(problem: Problem, plane: object) -> tuple[object, object]:
    fast = evaluate_surface(problem, plane, span=SPAN, resolution=RES, affine=True)
    plain = evaluate_surface(problem, plane, span=SPAN, resolution=RES, affine=False)
    return fast, plain


def _close(x: np.ndarray, ref: np.ndarray, tol: float = 2e-5) -> None:
    x, ref = np.asarray(x, np.float64), np.asarray(ref, np.float64)
    np.testing.assert_allclose(x, ref, rtol=tol, atol=tol * max(1.0, float(np.abs(ref).max())))


def _data(seed: int, rows: int, cols: int) -> tuple[np.ndarray, np.random.Generator]:
    rng = np.random.default_rng(seed)
    return rng.standard_normal((rows, cols)).astype(np.float32), rng


# ------------------------------------------------------------ linear models
def mse_matrix(theta, x, y):
    return jnp.mean((x @ theta - y) ** 2)


def mse_rows(p, x, y):
    return jnp.mean((p["b"] + p["w0"] * x[:, 0] + p["w1"] * x[:, 1] - y) ** 2)


@SETTINGS
@given(seed=st.integers(0, 10_000), rows=st.sampled_from([7, 30]), cols=st.sampled_from([2, 5]))
def test_linear_regression_matrix_form_matches_numpy(seed, rows, cols):
    x, rng = _data(seed, rows, cols)
    y = rng.standard_normal(rows).astype(np.float32)
    prob = Problem(mse_matrix, rng.standard_normal(cols).astype(np.float32), x, y)
    plane = random_plane(prob, seed=seed, normalise="none")
    fast, plain = _both(prob, plane)
    th = _grid_thetas(prob, plane, fast)
    # Source: numpy, the mean squared residual computed directly in float64
    ref = np.mean((th @ x.astype(np.float64).T - y.astype(np.float64)) ** 2, axis=1)
    _close(fast.loss.ravel(), ref)
    _close(fast.loss, plain.loss)


@SETTINGS
@given(seed=st.integers(0, 10_000), rows=st.sampled_from([7, 30]))
def test_linear_regression_per_row_form_matches_numpy(seed, rows):
    x, rng = _data(seed, rows, 2)
    y = rng.standard_normal(rows).astype(np.float32)
    prob = Problem(mse_rows, {"b": 0.1, "w0": -0.3, "w1": 0.2}, x, y)
    plane = random_plane(prob, seed=seed, normalise="none")
    fast, plain = _both(prob, plane)
    th = _grid_thetas(prob, plane, fast)  # leaves in key order: b, w0, w1
    pred = th[:, :1] + th[:, 1:2] * x[:, 0].astype(np.float64) + th[:, 2:3] * x[:, 1]
    # Source: numpy, the mean squared residual computed directly in float64
    ref = np.mean((pred - y.astype(np.float64)) ** 2, axis=1)
    _close(fast.loss.ravel(), ref)
    _close(fast.loss, plain.loss)


# --------------------------------------------------------------------- GLMs
def logistic(p, x, y):
    z = x @ p["w"] + p["b"]
    return jnp.mean(jnp.logaddexp(0.0, z) - y * z)


def poisson(p, x, y):
    z = x @ p["w"] + p["b"]
    return jnp.mean(jnp.exp(z) - y * z)


@SETTINGS
@given(seed=st.integers(0, 10_000), rows=st.sampled_from([9, 30]), cols=st.sampled_from([1, 4]))
def test_logistic_and_poisson_regression_match_numpy(seed, rows, cols):
    x, rng = _data(seed, rows, cols)
    x = 0.5 * x
    yb = (rng.random(rows) < 0.5).astype(np.float32)
    yc = rng.poisson(1.5, rows).astype(np.float32)
    params = {"b": np.float32(0.1), "w": (0.3 * rng.standard_normal(cols)).astype(np.float32)}
    for loss, y in ((logistic, yb), (poisson, yc)):
        prob = Problem(loss, params, x, y)
        plane = random_plane(prob, seed=seed, normalise="none")
        fast, plain = _both(prob, plane)
        th = _grid_thetas(prob, plane, fast)  # leaves: b, then w
        z = th[:, :1] + th[:, 1:] @ x.astype(np.float64).T
        y64 = y.astype(np.float64)
        if loss is logistic:
            # Source: numpy, log(1 + e^z) - y z, the Bernoulli negative log-likelihood
            ref = np.mean(np.logaddexp(0.0, z) - y64 * z, axis=1)
        else:
            # Source: numpy, e^z - y z, the Poisson negative log-likelihood without log(y!)
            ref = np.mean(np.exp(z) - y64 * z, axis=1)
        _close(fast.loss.ravel(), ref)
        _close(fast.loss, plain.loss)


def test_breast_cancer_logistic_surface_matches_sklearn_log_loss():
    x, y = load_breast_cancer(return_X_y=True)
    x = ((x - x.mean(0)) / x.std(0)).astype(np.float32)
    rng = np.random.default_rng(3)
    params = {"b": np.float32(0.0), "w": (0.1 * rng.standard_normal(30)).astype(np.float32)}
    prob = Problem(logistic, params, x, y.astype(np.float32))
    plane = random_plane(prob, seed=4, normalise="none")
    assert uses_affine(prob, 4096)  # 30 features: the cost model takes the affine path
    fast, plain = _both(prob, plane)
    th = _grid_thetas(prob, plane, fast)
    probs = 1.0 / (1.0 + np.exp(-(th[:, :1] + th[:, 1:] @ x.astype(np.float64).T)))
    # Source: sklearn.metrics.log_loss (the mean Bernoulli negative log-likelihood)
    ref = np.array([log_loss(y, p, labels=[0, 1]) for p in probs])
    _close(fast.loss.ravel(), ref, tol=1e-4)
    _close(fast.loss, plain.loss)


# --------------------------------------------------------------------- MLPs
def mlp(p, x, y):
    h = jnp.tanh(x @ p["w1"] + p["b1"])
    out = (h @ p["w2"])[:, 0] + p["b2"][0]
    return jnp.mean((out - y) ** 2)


@SETTINGS
@given(seed=st.integers(0, 10_000), rows=st.sampled_from([6, 20]), hidden=st.sampled_from([2, 5]))
def test_tanh_network_matches_numpy(seed, rows, hidden):
    x, rng = _data(seed, rows, 3)
    y = rng.standard_normal(rows).astype(np.float32)
    params = {
        "b1": np.zeros(hidden, np.float32),
        "b2": np.zeros(1, np.float32),
        "w1": (rng.standard_normal((3, hidden)) / 2).astype(np.float32),
        "w2": (rng.standard_normal((hidden, 1)) / 2).astype(np.float32),
    }
    prob = Problem(mlp, params, x, y)
    plane = random_plane(prob, seed=seed, normalise="none")
    fast, plain = _both(prob, plane)
    refs = []
    for t in _grid_thetas(prob, plane, fast):
        p = {k: np.asarray(v, np.float64) for k, v in prob.unflatten(t).items()}
        h = np.tanh(x.astype(np.float64) @ p["w1"] + p["b1"])
        # Source: numpy, the network's forward pass in float64
        refs.append(np.mean(((h @ p["w2"])[:, 0] + p["b2"][0] - y) ** 2))
    _close(fast.loss.ravel(), np.array(refs))
    _close(fast.loss, plain.loss)


# ------------------------------------------------- linear primitives, x64
def many_linear_ops(theta, x, mask, y):
    u = jnp.concatenate([theta[:2], -theta[2:]])  # concatenate, slice, neg
    z = (x @ u).reshape(-1, 2).T  # dot_general, reshape, transpose
    z = jnp.where(mask, z, 0.5)  # select_n with a constant mask
    z = jnp.cumsum(z, axis=1) / 3.0 + jnp.pad(z, ((0, 0), (1, 0)))[:, 1:]  # cumsum, div, pad
    s = jnp.sum(z, axis=0) * 2.0 - y  # reduce_sum, mul by a constant, sub
    return jnp.mean(jnp.log1p(s**2)) + jax.jit(jnp.sum)(theta**2)  # an opened jit call


def test_many_linear_primitives_in_float64(x64):
    rng = np.random.default_rng(0)
    x = rng.standard_normal((12, 4))
    mask = rng.random((2, 6)) < 0.6
    y = rng.standard_normal(6)
    prob = Problem(many_linear_ops, rng.standard_normal(4), x, mask, y)
    plan = plane_plan(prob)
    assert plan is not None and "jit" in plan.opened
    assert plan.affine_elements < 40  # the whole linear part stays affine (s, u: 6 + 4 ...)
    plane = random_plane(prob, seed=1, normalise="none")
    fast, plain = _both(prob, plane)
    refs = [
        float(many_linear_ops(jnp.asarray(t), x, mask, y)) for t in _grid_thetas(prob, plane, fast)
    ]
    # Source: the loss itself evaluated point by point in float64 (JAX, no plane, no vmap)
    np.testing.assert_allclose(fast.loss.ravel(), refs, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(fast.loss, plain.loss, rtol=1e-12, atol=1e-12)


def test_pytree_data_and_a_loss_linear_in_theta():
    rng = np.random.default_rng(1)
    data = {"x": rng.standard_normal((8, 3)).astype(np.float32), "w": np.ones(8, np.float32)}

    def weighted(theta, d):
        return jnp.sum(d["w"] * (d["x"] @ theta))  # linear: the output itself is affine

    prob = Problem(weighted, np.zeros(3, np.float32), data)
    plane = random_plane(prob, seed=2, normalise="none")
    fast, plain = _both(prob, plane)
    th = _grid_thetas(prob, plane, fast)
    # Source: numpy, sum_i w_i x_i . theta in float64
    _close(fast.loss.ravel(), th @ (data["x"].astype(np.float64).T @ data["w"]))
    _close(fast.loss, plain.loss)


# ---------------------------------------------------- plans and decisions
def test_plans_read_off_the_program():
    rng = np.random.default_rng(2)
    x = rng.standard_normal((500, 2)).astype(np.float32)
    y = rng.standard_normal(500).astype(np.float32)
    design = np.stack([np.ones(500, np.float32), x[:, 0]], axis=1)
    matrix = Problem(mse_matrix, np.zeros(2, np.float32), design, y)
    rows = Problem(lambda p, x, y: jnp.mean((p[0] + p[1] * x - y) ** 2), np.zeros(2, np.float32),
                   x[:, 0], y)  # fmt: skip
    for prob in (matrix, rows):
        plan = plane_plan(prob)
        assert plan.affine_elements == 500  # only the residual is materialised per point
        assert set(plan.general) == {"integer_pow", "reduce_sum", "div"}
    # X @ theta with two columns: the plain path runs a batched product per point
    assert affine_wins(plane_plan(matrix), 4096) and uses_affine(matrix, 4096)
    # t0 + t1 * x: one multiply-add per row either way, the plain path is kept
    assert not affine_wins(plane_plan(rows), 4096) and not uses_affine(rows, 4096)
    assert uses_affine(rows, 4096, affine=True) and not uses_affine(matrix, 4096, affine=False)


def test_a_network_whose_coefficients_outgrow_the_cache_keeps_the_plain_path():
    # The decision rule of affine_gain_needed, from the quiet-machine measurements in
    # benchmarks/results_affine.json (2-16-1 tanh network: 1.53x on the affine path with
    # 200 rows, 0.90x with 2,000): the estimate is the same for both (FLOPs scale with the
    # rows), but with 2,000 rows the coefficients c0, c1, c2 (375 KB) stream from memory.
    from basinview.core.affine import CACHE_BYTES, affine_gain_needed
    from benchmarks.workloads import mlp_data, mlp_init, mlp_loss

    plans = {}
    for rows in (200, 2000):
        data = mlp_data(rows)
        prob = Problem(mlp_loss, jax.tree.map(jnp.asarray, mlp_init(0)), data.x, data.y)
        plans[rows] = (prob, plane_plan(prob))
    (small, p_small), (large, p_large) = plans[200], plans[2000]
    ratio = [p.plain_flops / p.point_cost for p in (p_small, p_large)]
    assert ratio[0] == pytest.approx(ratio[1], rel=0.01)
    assert 3 * 4 * p_small.affine_elements < CACHE_BYTES < 3 * 4 * p_large.affine_elements
    assert affine_gain_needed(p_large) > affine_gain_needed(p_small)
    assert uses_affine(small, 4096) and not uses_affine(large, 4096)


def test_losses_without_a_plan_take_the_plain_path():
    def printing(theta):
        jax.debug.print("t {}", theta[0])
        return jnp.sum(theta**2)

    p1 = Problem(printing, np.zeros(2, np.float32), lint=False)
    assert plane_plan(p1) is None  # a side effect: only the plain path is right
    p2 = Problem(lambda t: jnp.sum(jnp.sin(t)), np.zeros(3, np.float32))
    # theta goes straight into a non-linear function: nothing to gain, the plain path stays
    assert not uses_affine(p2, 4096)
    s = evaluate_surface(p2, random_plane(p2, seed=0, normalise="none"), resolution=3, affine=True)
    assert np.isfinite(s.loss).all()
    with pytest.raises(Exception, match="affine must be None, True or False"):
        uses_affine(p2, 16, affine="yes")


def test_rows_accumulated_in_chunks_stay_correct():
    rng = np.random.default_rng(5)
    x = rng.standard_normal((30, 2)).astype(np.float32)
    y = rng.standard_normal(30).astype(np.float32)
    prob = Problem(mse_matrix, np.zeros(2, np.float32), x, y, data_chunk_rows=8, reduction="mean")
    plan = plane_plan(prob)
    assert plan is not None and "scan" in plan.general  # the row loop is one general step
    plane = axes_plane(prob, "theta[0]", "theta[1]")
    fast, plain = _both(prob, plane)
    th = _grid_thetas(prob, plane, fast)
    # Source: numpy, the mean squared residual over all rows in float64
    _close(fast.loss.ravel(), np.mean((th @ x.astype(np.float64).T - y) ** 2, axis=1))
    _close(fast.loss, plain.loss)


def test_changing_the_plane_and_span_compiles_nothing():
    rng = np.random.default_rng(6)
    x = rng.standard_normal((64, 3)).astype(np.float32)
    y = (rng.random(64) < 0.5).astype(np.float32)
    prob = Problem(logistic, {"b": np.float32(0.0), "w": np.zeros(3, np.float32)}, x, y)
    first = random_plane(prob, seed=0, normalise="none")
    evaluate_surface(prob, first, span=1.0, resolution=7, affine=True)
    with count_compilations() as c:
        for seed, span in ((1, 0.5), (2, 2.0), (3, 1.5)):
            plane = random_plane(prob, seed=seed, normalise="none")
            evaluate_surface(prob, plane, span=span, resolution=7, affine=True)
    assert c.count == 0

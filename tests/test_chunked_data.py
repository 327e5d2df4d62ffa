"""Losses accumulated over chunks of the data rows: same values, bounded memory."""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import pytest

from basinview.core import (
    LossError,
    ParameterError,
    Problem,
    axes_plane,
    descend,
    evaluate_surface,
)
from basinview.core.problem import accumulate_rows


def mse(w, x, y):
    return jnp.mean((x @ w - y) ** 2)


def sse(w, x, y):
    return jnp.sum((x @ w - y) ** 2)


@pytest.fixture
def regression(rng):
    x = rng.standard_normal((1003, 3))
    y = x @ np.array([1.0, -2.0, 0.5]) + 0.3 * rng.standard_normal(1003)
    return x, y


@pytest.mark.parametrize("rows", [1, 100, 334, 1002, 1003, 5000])
def test_chunked_mse_value_gradient_and_hvp_match_least_squares(x64, regression, rows):
    # 1003 rows in chunks of 100 leave a remainder chunk of 3 rows; 1002 leaves 1;
    # 1003 and 5000 are one chunk (no accumulation at all).
    x, y = regression
    whole = Problem(mse, jnp.zeros(3), x, y)
    chunked = Problem(mse, jnp.zeros(3), x, y, data_chunk_rows=rows, reduction="mean")
    w = np.array([0.3, -0.7, 1.1])
    r = x @ w - y
    # Source: least-squares calculus (normal equations): f = |Xw - y|^2 / N,
    # grad f = 2 X^T (Xw - y) / N, Hessian = 2 X^T X / N; evaluated with numpy.
    n = len(y)
    np.testing.assert_allclose(float(chunked.value(w)), r @ r / n, rtol=1e-12)
    np.testing.assert_allclose(np.asarray(chunked.grad(w)), 2 * x.T @ r / n, rtol=1e-11)
    v = np.array([1.0, 2.0, -1.0])
    np.testing.assert_allclose(np.asarray(chunked.hvp(w, v)), 2 * x.T @ (x @ v) / n, rtol=1e-11)
    np.testing.assert_allclose(float(chunked.value(w)), float(whole.value(w)), rtol=1e-13)
    np.testing.assert_allclose(np.asarray(chunked.grad(w)), np.asarray(whole.grad(w)), rtol=1e-12)


def test_float32_chunks_agree_within_rounding(regression):
    x, y = (a.astype(np.float32) for a in regression)
    whole = Problem(mse, jnp.zeros(3), x, y)
    chunked = Problem(mse, jnp.zeros(3), x, y, data_chunk_rows=64, reduction="mean")
    w = np.array([0.3, -0.7, 1.1], np.float32)
    np.testing.assert_allclose(float(chunked.value(w)), float(whole.value(w)), rtol=1e-5)
    np.testing.assert_allclose(np.asarray(chunked.grad(w)), np.asarray(whole.grad(w)), rtol=1e-4)


def test_sum_reduction_and_a_weight_penalty_with_mean(x64, regression):
    x, y = regression
    w = np.array([0.3, -0.7, 1.1])
    r = x @ w - y
    chunked = Problem(sse, jnp.zeros(3), x, y, data_chunk_rows=100, reduction="sum")
    # Source: the same least-squares algebra without the 1/N (numpy reference).
    np.testing.assert_allclose(float(chunked.value(w)), r @ r, rtol=1e-12)
    np.testing.assert_allclose(np.asarray(chunked.grad(w)), 2 * x.T @ r, rtol=1e-11)

    def ridge(w, x, y):
        return jnp.mean((x @ w - y) ** 2) + 0.1 * jnp.sum(w**2)

    ridged = Problem(ridge, jnp.zeros(3), x, y, data_chunk_rows=100, reduction="mean")
    # The chunk weights of a mean add up to one, so the penalty is counted once.
    np.testing.assert_allclose(float(ridged.value(w)), r @ r / len(y) + 0.1 * w @ w, rtol=1e-12)


def test_pytree_data_are_split_row_wise(x64, rng):
    x = rng.standard_normal((257, 2))
    y = rng.standard_normal(257)

    def loss(p, batch):
        return jnp.mean((batch["x"] @ p["w"] + p["b"] - batch["y"]) ** 2)

    params = {"w": jnp.zeros(2), "b": 0.0}
    data = {"x": x, "y": y}
    whole = Problem(loss, params, data)
    chunked = Problem(loss, params, data, data_chunk_rows=50, reduction="mean")
    theta = np.array([0.2, -0.4, 0.9])
    np.testing.assert_allclose(float(chunked.value(theta)), float(whole.value(theta)), rtol=1e-13)
    np.testing.assert_allclose(
        np.asarray(chunked.grad(theta)), np.asarray(whole.grad(theta)), rtol=1e-12
    )


def test_surfaces_and_descent_see_the_same_loss(x64, regression):
    x, y = regression
    whole = Problem(mse, jnp.zeros(3), x, y)
    chunked = Problem(mse, jnp.zeros(3), x, y, data_chunk_rows=128, reduction="mean")
    plane = axes_plane(whole, "theta[0]", "theta[2]")
    s1 = evaluate_surface(whole, plane, span=2.0, resolution=9)
    s2 = evaluate_surface(
        chunked, axes_plane(chunked, "theta[0]", "theta[2]"), span=2.0, resolution=9
    )
    np.testing.assert_allclose(s2.loss, s1.loss, rtol=1e-12)
    kw = dict(learning_rate=[0.05, 0.2], steps=150)
    r1 = descend(whole, np.zeros((2, 3)), **kw)
    r2 = descend(chunked, np.zeros((2, 3)), **kw)
    np.testing.assert_allclose(r2.losses, r1.losses, rtol=1e-10)
    # Source: numpy least squares; descent with 2/L-stable steps ends near it.
    w_ls = np.linalg.lstsq(x, y, rcond=None)[0]
    np.testing.assert_allclose(r2.final[1], w_ls, atol=1e-3)


def test_chunked_gradient_memory_does_not_grow_with_the_rows(rng):
    x = rng.standard_normal((200_000, 4)).astype(np.float32)
    y = rng.standard_normal(200_000).astype(np.float32)

    def loss(w, x, y):
        return jnp.mean(jnp.tanh(x @ w - y) ** 2)

    def temp_bytes(problem):
        fn = jax.jit(jax.value_and_grad(problem.flat_loss))
        compiled = fn.lower(jnp.zeros(4), problem.data).compile()
        return compiled.memory_analysis().temp_size_in_bytes

    whole = temp_bytes(Problem(loss, jnp.zeros(4), x, y))
    chunked = temp_bytes(Problem(loss, jnp.zeros(4), x, y, data_chunk_rows=1000, reduction="mean"))
    # One residual per row is 800 kB in float32; chunks of 1000 rows need ~4 kB each.
    assert whole >= 200_000 * 4
    assert chunked < whole / 20


def test_accumulate_rows_weights_a_remainder_chunk_by_its_rows():
    # Mean of 0..9 in chunks of 4, 4, 2: (4*1.5 + 4*5.5 + 2*8.5) / 10 = 4.5.
    data = (jnp.arange(10.0),)
    value = accumulate_rows(lambda p, a: jnp.mean(a) * p, 1.0, data, 4, "mean")
    assert float(value) == pytest.approx(4.5)  # common practice: mean of 0..9
    total = accumulate_rows(lambda p, a: jnp.sum(a) * p, 1.0, data, 4, "sum")
    assert float(total) == pytest.approx(45.0)


@pytest.mark.parametrize(
    ("kwargs", "error", "message"),
    [
        (dict(data_chunk_rows=100), ParameterError, "reduction='mean' or 'sum'"),
        (dict(reduction="mean"), ParameterError, "give both or neither"),
        (dict(data_chunk_rows=0, reduction="mean"), ParameterError, "positive integer"),
        (dict(data_chunk_rows=2.5, reduction="mean"), ParameterError, "positive integer"),
        (dict(data_chunk_rows=10, reduction="median"), ParameterError, "'mean' or 'sum'"),
        (dict(data_chunk_rows=10, reduction="sum"), LossError, "is not"),
    ],
)
def test_bad_chunking_is_explained(regression, kwargs, error, message):
    x, y = regression
    with pytest.raises(error, match=message):
        Problem(mse, jnp.zeros(3), x, y, **kwargs)


def test_rows_must_match_across_data(rng):
    x = rng.standard_normal((10, 3))
    with pytest.raises(ParameterError, match="same number of rows"):
        Problem(mse, jnp.zeros(3), x, rng.standard_normal(9), data_chunk_rows=4, reduction="mean")
    with pytest.raises(ParameterError, match="same number of rows"):
        Problem(
            lambda w, x, s: mse(w, x, x[:, 0]) * s,
            jnp.zeros(3),
            x,
            2.0,
            data_chunk_rows=4,
            reduction="mean",
        )

"""Problem: pytrees, labels, flat-vector API, dtypes and input validation."""

from __future__ import annotations

import dataclasses

import jax
import jax.numpy as jnp
import numpy as np
import pytest

from basinview.core import LossError, ParameterError, Problem


def test_labels_follow_the_users_structure():
    params = {
        "layer1": {"w": jnp.zeros((2, 3)), "bias": jnp.zeros(3)},
        "b": 0.0,
        "scales": [1.0, (2.0, jnp.ones(2))],
    }
    prob = Problem(lambda p: jnp.sum(jax.flatten_util.ravel_pytree(p)[0] ** 2), params)
    assert prob.size == 6 + 3 + 1 + 1 + 1 + 2
    assert "b" in prob.labels
    assert "layer1.bias[2]" in prob.labels
    assert "layer1.w[1,2]" in prob.labels
    assert "scales[0]" in prob.labels
    assert "scales[1][1][0]" in prob.labels
    assert len(set(prob.labels)) == prob.size
    # Each label points at the coordinate it names.
    theta = np.arange(prob.size, dtype=np.float32)
    back = prob.unflatten(theta)
    assert float(back["layer1"]["w"][1, 2]) == theta[prob.index("layer1.w[1,2]")]
    assert float(back["scales"][1][1][0]) == theta[prob.index("scales[1][1][0]")]


def test_list_and_scalar_roots_get_readable_labels():
    assert Problem(lambda p: p[0] ** 2 + p[1] ** 2, [1.0, 2.0]).labels == ("theta[0]", "theta[1]")
    assert Problem(lambda p: p**2, 3.0).labels == ("theta",)
    assert Problem(lambda p: jnp.sum(p**2), jnp.ones(3)).labels == (
        "theta[0]",
        "theta[1]",
        "theta[2]",
    )


@jax.tree_util.register_dataclass
@dataclasses.dataclass(frozen=True)
class Linear:
    """A module-style model: a frozen dataclass registered as a pytree."""

    weight: jax.Array
    bias: jax.Array

    def __call__(self, x):
        return x @ self.weight + self.bias


def test_module_style_pytree_parameters():
    model = Linear(jnp.ones((2, 1)), jnp.zeros(1))
    x = jnp.array([[1.0, 2.0], [3.0, 4.0]])
    y = jnp.array([[1.0], [2.0]])

    def loss(m, x, y):
        return jnp.mean((m(x) - y) ** 2)

    prob = Problem(loss, model, x, y)
    assert prob.labels == ("weight[0,0]", "weight[1,0]", "bias[0]")
    rebuilt = prob.unflatten(prob.theta0)
    assert isinstance(rebuilt, Linear)
    np.testing.assert_allclose(float(prob.value(prob.theta0)), float(loss(model, x, y)))


def test_equinox_module_if_available():
    eqx = pytest.importorskip("equinox")

    class Model(eqx.Module):
        w: jax.Array
        b: jax.Array

    m = Model(jnp.ones(2), jnp.zeros(()))
    prob = Problem(lambda m, x: jnp.sum((x @ m.w + m.b) ** 2), m, jnp.ones((3, 2)))
    assert prob.labels == ("w[0]", "w[1]", "b")


def test_flat_api_matches_jax(rng):
    a = rng.standard_normal((4, 4))
    a = a @ a.T + np.eye(4)

    def loss(p):
        return jnp.sin(p["u"][0]) * p["v"] + 0.5 * p["u"] @ (a @ p["u"]) + p["v"] ** 4

    prob = Problem(loss, {"u": jnp.asarray(rng.standard_normal(4), jnp.float32), "v": 0.3})
    theta = prob.theta0
    f = lambda t: prob.flat_loss(t, ())
    np.testing.assert_allclose(prob.value(theta), f(theta), rtol=1e-6)
    np.testing.assert_allclose(prob.grad(theta), jax.grad(f)(theta), rtol=1e-5)
    v, g = prob.value_and_grad(theta)
    np.testing.assert_allclose(v, f(theta), rtol=1e-6)
    np.testing.assert_allclose(g, jax.grad(f)(theta), rtol=1e-5)
    # Source: Pearlmutter (1994), Neural Computation 6(1):147-160 — Hv equals the
    # full Hessian times v; reference Hessian from jax.hessian.
    vec = rng.standard_normal(prob.size).astype(np.float32)
    np.testing.assert_allclose(
        prob.hvp(theta, vec), jax.hessian(f)(theta) @ vec, rtol=1e-4, atol=1e-5
    )


def test_float64_when_enabled_and_flag_untouched(x64):
    prob = Problem(lambda p: jnp.sum(p**2), np.ones(3))
    assert prob.dtype == np.float64
    assert prob.value(prob.theta0).dtype == np.float64
    assert jax.config.jax_enable_x64


def test_float32_by_default_and_problem_never_enables_x64():
    before = jax.config.jax_enable_x64
    prob = Problem(lambda p: jnp.sum(p**2), np.ones(3))  # float64 numpy input
    assert prob.dtype == np.float32
    assert jax.config.jax_enable_x64 == before


def test_flatten_checks_structure():
    prob = Problem(lambda p: p["a"] ** 2 + jnp.sum(p["b"] ** 2), {"a": 1.0, "b": jnp.ones(2)})
    np.testing.assert_array_equal(prob.flatten({"a": 2.0, "b": jnp.array([3.0, 4.0])}), [2, 3, 4])
    np.testing.assert_array_equal(prob.flatten(np.array([5.0, 6.0, 7.0])), [5, 6, 7])
    with pytest.raises(ParameterError, match="structure"):
        prob.flatten({"a": 1.0})
    with pytest.raises(ParameterError, match="shape"):
        prob.flatten({"a": 1.0, "b": jnp.ones(3)})
    with pytest.raises(ParameterError, match="3 entries"):
        prob.flatten(np.ones(4))


def test_fingerprint_tracks_data_and_parameters():
    x = jnp.arange(5.0)
    base = Problem(lambda p, x: jnp.sum((p - x) ** 2), 0.0, x)
    assert base.fingerprint == Problem(lambda p, x: jnp.sum((p - x) ** 2), 0.0, x).fingerprint
    assert base.fingerprint != Problem(lambda p, x: jnp.sum((p - x) ** 2), 1.0, x).fingerprint
    assert base.fingerprint != Problem(lambda p, x: jnp.sum((p - x) ** 2), 0.0, x + 1).fingerprint


# ----------------------------------------------------------------- bad input
def test_non_scalar_loss_is_explained():
    with pytest.raises(LossError, match=r"scalar.*shape \(3,\).*mean"):
        Problem(lambda p: p**2, jnp.ones(3))


def test_non_finite_start_is_explained():
    with pytest.raises(LossError, match="nan at the initial parameters"):
        Problem(lambda p: jnp.log(p), -1.0)
    with pytest.raises(LossError, match="inf"):
        Problem(lambda p: 1.0 / p, 0.0)


def test_integer_and_complex_parameters_rejected():
    with pytest.raises(ParameterError, match="int32.*floating-point.*1.0 instead of 1"):
        Problem(lambda p: p["n"] ** 2, {"n": jnp.array(1)})
    with pytest.raises(ParameterError, match="complex"):
        Problem(lambda p: jnp.abs(p) ** 2, jnp.array(1 + 1j))


def test_untraceable_loss_is_explained():
    def loss(p):
        if p > 0:  # Python control flow on a traced value
            return p**2
        return -p

    with pytest.raises(LossError, match=r"cannot be traced.*jnp\.where"):
        Problem(loss, 1.0)

    def numpy_loss(p):
        return np.sum(np.asarray(p) ** 2)

    with pytest.raises(LossError, match="NumPy"):
        Problem(numpy_loss, jnp.ones(2))


def test_data_that_does_not_fit_is_explained():
    x = jnp.ones((5, 3))
    with pytest.raises(LossError, match=r"data do not fit.*\(5, 3\)"):
        Problem(lambda w, x: jnp.sum(x @ w), jnp.ones(4), x)


def test_wrong_signature_is_explained():
    with pytest.raises(LossError, match=r"\(params, \*data\) with 2 data"):
        Problem(lambda p, x: jnp.sum(p * x), 1.0, jnp.ones(2), jnp.ones(2))
    with pytest.raises(LossError, match="must be a function"):
        Problem(3.0, 1.0)


def test_loss_that_raises_is_reported():
    def loss(p):
        raise RuntimeError("database offline")

    with pytest.raises(LossError, match="RuntimeError.*database offline"):
        Problem(loss, 1.0)


def test_unknown_label_lists_the_labels():
    prob = Problem(lambda p: p["w"] @ p["w"], {"w": jnp.ones(3)})
    with pytest.raises(ParameterError, match=r"unknown coordinate label 'w\[7\]'.*w\[0\]"):
        prob.index("w[7]")


def test_empty_and_non_array_parameters_rejected():
    with pytest.raises(ParameterError, match="empty"):
        Problem(lambda p: 0.0, {})
    with pytest.raises(ParameterError, match="str"):
        Problem(lambda p: 0.0, {"a": "x"})


def test_a_loss_without_gradient_still_gives_a_surface_but_no_descent():
    from basinview.core import axes_plane, descend, evaluate_surface, hessian_spectrum

    from .conftest import callback_loss

    prob = Problem(callback_loss, {"x": 1.0, "y": 2.0})
    surf = evaluate_surface(prob, axes_plane(prob, "x", "y"), span=1.0, resolution=3)
    # x^2 + y^2 on the grid (1 + {-1, 0, 1}) x (2 + {-1, 0, 1}), computed by hand.
    expected = np.add.outer((1.0 + np.array([-1, 0, 1])) ** 2, (2.0 + np.array([-1, 0, 1])) ** 2)
    np.testing.assert_allclose(surf.loss, expected.T, rtol=1e-6)
    for call in (
        lambda: descend(prob, prob.theta0, steps=2),
        lambda: prob.grad(prob.theta0),
        lambda: hessian_spectrum(prob, prob.theta0),
    ):
        with pytest.raises(LossError, match="cannot differentiate.*custom_jvp"):
            call()


def test_one_parameter_problem_works_without_a_plane_and_says_so_where_one_is_needed():
    from basinview.core import (
        axes_plane,
        descend,
        find_minima,
        hessian_plane,
        random_plane,
        segment_profile,
        step_size_sweep,
        through_plane,
    )

    x = np.array([1.0, 2.0, 4.0, 7.0], np.float32)
    prob = Problem(lambda p, x: jnp.mean((p - x) ** 2), 0.0, x)
    runs = descend(prob, np.array([[0.0], [10.0]], np.float32), learning_rate=0.25, steps=200)
    # Source: the least-squares location estimate is the sample mean (numpy.mean).
    np.testing.assert_allclose(runs.final[:, 0], np.mean(x), rtol=1e-4)
    assert set(runs.status) == {"converged"}
    np.testing.assert_allclose(find_minima(prob, runs).points[:, 0], np.mean(x), rtol=1e-4)
    assert len(step_size_sweep(prob, np.zeros((1, 1)), learning_rates=[0.1, 2.0], steps=50).table) == 2
    profile = segment_profile(prob, np.zeros(1), np.array([2 * np.mean(x)]), resolution=5)
    np.testing.assert_allclose(np.min(profile.loss), np.var(x), rtol=1e-5)
    for call in (
        lambda: axes_plane(prob, "theta", "theta"),
        lambda: random_plane(prob),
        lambda: hessian_plane(prob),
        lambda: through_plane(prob, np.zeros(1), np.ones(1), 2 * np.ones(1)),
    ):
        with pytest.raises(ParameterError, match=r"one parameter \('theta'\).*segment_profile"):
            call()


def test_kind_names_where_the_parameters_come_from():
    assert Problem(lambda p: jnp.sum(p**2), jnp.ones(2)).kind == "pytree"
    eqx = pytest.importorskip("equinox")
    lin = eqx.nn.Linear(2, 1, key=jax.random.PRNGKey(0))
    prob = Problem(lambda m: jnp.sum(m(jnp.ones(2)) ** 2), lin)
    assert prob.kind == "equinox" and prob.labels == ("weight[0,0]", "weight[0,1]", "bias[0]")

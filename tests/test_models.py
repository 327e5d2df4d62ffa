"""Model libraries as they come: equinox and flax.nnx modules equal plain pytrees."""

from __future__ import annotations

import equinox as eqx
import jax
import jax.numpy as jnp
import numpy as np
import pytest
from sklearn.datasets import load_diabetes

from basinview.core import ParameterError, Problem, axes_plane, descend, evaluate_surface

nnx = pytest.importorskip("flax.nnx")


@pytest.fixture(scope="module")
def diabetes():
    # Source: scikit-learn's bundled diabetes data (sklearn.datasets.load_diabetes),
    # Efron et al. (2004); the first 3 features and the first 60 rows, target scaled.
    data = load_diabetes()
    x = data.data[:60, :3].astype(np.float32) * 10
    y = ((data.target[:60] - data.target.mean()) / data.target.std()).astype(np.float32)
    return x, y


def _mlp_dict(layers):
    """A tanh MLP written as a dict of arrays: the plain-pytree twin of the models."""

    def forward(p, x):
        h = x
        for i, layer in enumerate(p["layers"]):
            h = h @ layer["kernel"] + layer["bias"]
            if i < len(p["layers"]) - 1:
                h = jnp.tanh(h)
        return h[:, 0]

    return forward


def plain_loss(p, x, y):
    return jnp.mean((_mlp_dict(p["layers"])(p, x) - y) ** 2)


def _compare(model_prob, plain_prob, x_label, y_label, start_scale=0.1):
    """Labels, values, a surface and descent runs agree between two problems."""
    assert sorted(model_prob.labels) == sorted(plain_prob.labels)
    order = np.array([plain_prob.index(lab) for lab in model_prob.labels])
    np.testing.assert_array_equal(model_prob.theta0, plain_prob.theta0[order])
    np.testing.assert_allclose(
        float(model_prob.value(model_prob.theta0)),
        float(plain_prob.value(plain_prob.theta0)),
        rtol=1e-6,
    )
    np.testing.assert_allclose(
        model_prob.grad(model_prob.theta0),
        plain_prob.grad(plain_prob.theta0)[order],
        rtol=1e-5,
        atol=1e-7,
    )
    surfaces = [
        evaluate_surface(p, axes_plane(p, x_label, y_label), span=0.5, resolution=7)
        for p in (model_prob, plain_prob)
    ]
    np.testing.assert_allclose(surfaces[0].loss, surfaces[1].loss, rtol=1e-5)
    rng = np.random.default_rng(3)
    starts = model_prob.theta0 + start_scale * rng.standard_normal((3, model_prob.size))
    runs = [
        descend(
            p,
            s.astype(np.float32),
            learning_rate=0.05,
            steps=40,
            plane=axes_plane(p, x_label, y_label),
        )
        for p, s in ((model_prob, starts), (plain_prob, starts[:, np.argsort(order)]))
    ]
    np.testing.assert_allclose(runs[0].losses, runs[1].losses, rtol=1e-4)
    np.testing.assert_array_equal(runs[0].status, runs[1].status)


def test_equinox_mlp_equals_the_dict_of_arrays(diabetes):
    x, y = diabetes
    mlp = eqx.nn.MLP(3, 1, 8, 2, activation=jnp.tanh, key=jax.random.PRNGKey(0))

    def loss(model, x, y):
        return jnp.mean((jax.vmap(model)(x)[:, 0] - y) ** 2)

    prob = Problem(loss, mlp, x, y)
    assert prob.kind == "equinox"
    assert prob.size == (3 * 8 + 8) + (8 * 8 + 8) + (8 * 1 + 1)
    assert "layers[0].weight[3,1]" in prob.labels and "layers[2].bias[0]" in prob.labels
    # Source: equinox itself — the loss of the model and eqx.filter_grad's gradient.
    np.testing.assert_allclose(float(prob.value(prob.theta0)), float(loss(mlp, x, y)), rtol=1e-6)
    grads = eqx.filter_grad(loss)(mlp, x, y)
    flat = np.concatenate(
        [np.ravel(g) for g in jax.tree_util.tree_leaves(eqx.filter(grads, eqx.is_inexact_array))]
    )
    np.testing.assert_allclose(prob.grad(prob.theta0), flat, rtol=1e-5, atol=1e-7)
    # A model given back (a start, an origin) flattens; a flat vector unflattens to a model.
    np.testing.assert_array_equal(prob.flatten(mlp), prob.theta0)
    rebuilt = prob.unflatten(prob.theta0)
    assert isinstance(rebuilt, eqx.nn.MLP) and rebuilt.activation is jnp.tanh
    # The same network as a dict of arrays (equinox weights are (out, in): transpose).
    plain = {
        "layers": [
            {"kernel": np.asarray(layer.weight).T, "bias": np.asarray(layer.bias)}
            for layer in mlp.layers
        ]
    }
    plain_prob = Problem(plain_loss, plain, x, y)
    transposed = {lab: lab for lab in plain_prob.labels}
    for lab in plain_prob.labels:  # kernel[i,j] of the dict is weight[j,i] of equinox
        if ".kernel[" in lab:
            i, j = lab.split("[")[-1].rstrip("]").split(",")
            transposed[lab] = lab.split(".kernel")[0] + f".weight[{j},{i}]"
    renamed = [transposed[lab] for lab in plain_prob.labels]
    assert sorted(renamed) == sorted(prob.labels)
    order = np.array(
        [
            plain_prob.index(next(k for k, v in transposed.items() if v == lab))
            for lab in prob.labels
        ]
    )
    np.testing.assert_array_equal(prob.theta0, plain_prob.theta0[order])
    a, b = "layers[0].weight[3,1]", "layers[2].bias[0]"
    surfaces = [
        evaluate_surface(prob, axes_plane(prob, a, b), span=0.5, resolution=7),
        evaluate_surface(
            plain_prob, axes_plane(plain_prob, "layers[0].kernel[1,3]", b), span=0.5, resolution=7
        ),
    ]
    np.testing.assert_allclose(surfaces[0].loss, surfaces[1].loss, rtol=1e-5)
    starts = prob.theta0 + 0.1 * np.random.default_rng(3).standard_normal((3, prob.size))
    back = np.empty_like(starts)
    back[:, order] = starts
    runs = [
        descend(prob, starts.astype(np.float32), learning_rate=0.05, steps=40),
        descend(plain_prob, back.astype(np.float32), learning_rate=0.05, steps=40),
    ]
    np.testing.assert_allclose(runs[0].losses, runs[1].losses, rtol=1e-4)
    np.testing.assert_array_equal(runs[0].status, runs[1].status)


class TwoLayer(nnx.Module):
    def __init__(self, rngs):
        self.layers = nnx.List([nnx.Linear(3, 8, rngs=rngs), nnx.Linear(8, 1, rngs=rngs)])

    def __call__(self, x):
        return self.layers[1](jnp.tanh(self.layers[0](x)))


def test_flax_nnx_module_equals_the_dict_of_arrays(diabetes):
    x, y = diabetes
    net = TwoLayer(nnx.Rngs(0))

    def loss(model, x, y):
        return jnp.mean((model(x)[:, 0] - y) ** 2)

    prob = Problem(loss, net, x, y)
    assert prob.kind == "nnx"
    assert not any(".value" in lab or "raw" in lab for lab in prob.labels)
    assert "layers[0].kernel[2,1]" in prob.labels and "layers[1].bias[0]" in prob.labels
    # Source: flax itself — the loss of the module and nnx.grad's gradient.
    np.testing.assert_allclose(float(prob.value(prob.theta0)), float(loss(net, x, y)), rtol=1e-6)
    grads = nnx.grad(loss)(net, x, y)
    flat = np.concatenate([np.ravel(g) for g in jax.tree_util.tree_leaves(nnx.to_pure_dict(grads))])
    np.testing.assert_allclose(prob.grad(prob.theta0), flat, rtol=1e-5, atol=1e-7)
    np.testing.assert_array_equal(prob.flatten(net), prob.theta0)
    assert isinstance(prob.unflatten(prob.theta0), TwoLayer)
    plain = {
        "layers": [
            {"kernel": np.asarray(layer.kernel[...]), "bias": np.asarray(layer.bias[...])}
            for layer in net.layers
        ]
    }
    plain_prob = Problem(plain_loss, plain, x, y)
    assert prob.labels == plain_prob.labels
    _compare(prob, plain_prob, "layers[0].kernel[2,1]", "layers[1].bias[0]")


def test_equinox_fixed_fields_stay_fixed_and_python_floats_outside_modules_are_explored():
    class Scaled(eqx.Module):
        w: jax.Array
        scale: float  # a Python float inside a module: fixed, as eqx.is_inexact_array says
        idx: jax.Array  # an integer array: fixed

    model = Scaled(jnp.array([1.0, 2.0]), 3.0, jnp.array([1, 0]))
    params = {"model": model, "shift": 0.5}

    def loss(p):
        m = p["model"]
        return jnp.sum((m.scale * m.w[m.idx] - p["shift"]) ** 2)

    prob = Problem(loss, params)
    assert prob.labels == ("model.w[0]", "model.w[1]", "shift")
    # by hand: w[idx] = (2, 1); 3 * (2, 1) - 0.5 = (5.5, 2.5); 5.5^2 + 2.5^2 = 36.5
    assert float(prob.value(prob.theta0)) == pytest.approx(36.5)
    with pytest.raises(ParameterError, match=r"no arrays.*is_inexact_array"):
        Problem(lambda m: m.scale * jnp.sum(m.w**2), Scaled(jnp.array([1, 2]), 1.0, jnp.array([0])))


@pytest.mark.parametrize("dtype", ["float16", "bfloat16"])
def test_half_precision_parameters_get_a_clear_error(dtype):
    # IEEE 754 binary16 tops out at 65504 (numpy's finfo), so the default divergence
    # threshold of 1e6 x the starting loss cannot even be represented.
    # Source: IEEE 754-2008, binary16; numpy.finfo(numpy.float16).max
    assert float(np.finfo(np.float16).max) == 65504.0 < 1e6
    with pytest.raises(
        ParameterError, match=rf"'w' is {dtype} \(half precision\).*astype\(jnp.float32\)"
    ):
        Problem(lambda p: jnp.sum(p["w"].astype(jnp.float32) ** 2), {"w": jnp.ones(3, dtype)})
    model = eqx.nn.Linear(2, 1, key=jax.random.PRNGKey(0), dtype=jnp.dtype(dtype))
    with pytest.raises(ParameterError, match="half precision.*eqx.is_inexact_array"):
        Problem(lambda m: jnp.sum(m(jnp.ones(2, dtype)).astype(jnp.float32) ** 2), model)

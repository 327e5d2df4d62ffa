"""Initialisation schemes side by side: named start sets, compare_schemes, figures, settings."""

from __future__ import annotations

import json

import jax
import jax.numpy as jnp
import numpy as np
import plotly.graph_objects as go
import pytest
from statsmodels.stats.proportion import proportion_confint

from basinview import core
from basinview import figures as F
from basinview.core import (
    ParameterError,
    Problem,
    Settings,
    compare_schemes,
    count_compilations,
    descend,
    explicit_starts,
    initializer_starts,
    random_starts,
    record_settings,
    scheme_of,
    scheme_starts,
    starts_from_spec,
    top_hessian_eigenvalues,
)

from .conftest import himmelblau

# Source: Himmelblau, D. M. (1972), Applied Nonlinear Programming, McGraw-Hill (from memory
# for the book); the four minima (f = 0) as tabulated by several secondary references,
# e.g. Jamil & Yang (2013), Int. J. Math. Modelling & Num. Optimisation 4(2):150-194.
HIMMELBLAU_MINIMA = {
    "near (3, 2)": (3.0, 2.0),
    "near (-2.81, 3.13)": (-2.805118, 3.131312),
    "near (-3.78, -3.28)": (-3.779310, -3.283186),
    "near (3.58, -1.85)": (3.584428, -1.848126),
}


def box_around(centre, half=0.4):
    """An initialiser drawing uniformly from the square ``centre +- half``."""

    def init(key):
        offset = jax.random.uniform(key, (2,), minval=-half, maxval=half)
        return {"x": centre[0] + offset[0], "y": centre[1] + offset[1]}

    return init


@pytest.fixture(scope="module")
def himmel():
    prob = Problem(himmelblau, {"x": 0.0, "y": 0.0})
    schemes = {name: box_around(c) for name, c in HIMMELBLAU_MINIMA.items()}
    cmp = compare_schemes(prob, schemes, count=10, init_seed=4, learning_rate=0.005, steps=600)
    return prob, cmp


def test_box_around_each_published_minimum_lands_there(himmel):
    _, cmp = himmel
    shares = cmp.shares
    assert cmp.schemes == tuple(HIMMELBLAU_MINIMA)
    for name, centre in HIMMELBLAU_MINIMA.items():
        mine = shares[shares["scheme"] == name]
        top = mine.loc[mine["share"].idxmax()]
        assert top["share"] == 1.0 and top["runs"] == 10
        k = cmp.minima.labels.index(top["solution"])
        np.testing.assert_allclose(cmp.minima.points[k], centre, atol=2e-3)
        assert cmp.minima.kind[k] == "minimum"
        # every other solution has no run of this scheme
        assert (mine["runs"].sum(), (mine["runs"] > 0).sum()) == (10, 1)
    summary = cmp.summary
    assert summary["top_share"].tolist() == [1.0] * 4
    assert summary["diverged"].tolist() == [0] * 4
    assert summary["solutions"].tolist() == [1] * 4


def test_shares_intervals_match_statsmodels(himmel):
    _, cmp = himmel
    shares = cmp.shares
    # Source: statsmodels.stats.proportion.proportion_confint(method="wilson") (reference
    # implementation of Wilson 1927).
    low, high = proportion_confint(shares["runs"], shares["of"], alpha=0.05, method="wilson")
    np.testing.assert_allclose(shares["share_low"], low, atol=1e-12)
    np.testing.assert_allclose(shares["share_high"], high, atol=1e-12)
    s = cmp.summary
    low, high = proportion_confint(s["diverged"], s["runs"], alpha=0.05, method="wilson")
    np.testing.assert_allclose(s["divergence_low"], low, atol=1e-12)
    np.testing.assert_allclose(s["divergence_high"], high, atol=1e-12)


def test_sharpness_at_the_minima_matches_the_closed_form_hessian(himmel):
    _, cmp = himmel
    got = dict(zip(cmp.summary["scheme"], cmp.summary["median_sharpness"]))
    for name, (x, y) in HIMMELBLAU_MINIMA.items():
        # common practice: at a zero-residual point of a sum of squares r1^2 + r2^2 the
        # Hessian is 2 J^T J, with J = [[2x, 1], [1, 2y]] from the formula; at (3, 2) its
        # eigenvalues are 54 +- sqrt(800). Eigenvalues by numpy.linalg.eigvalsh.
        jac = np.array([[2 * x, 1.0], [1.0, 2 * y]])
        top = np.linalg.eigvalsh(2 * jac.T @ jac).max()
        np.testing.assert_allclose(got[name], top, rtol=2e-3)
    np.testing.assert_allclose(got["near (3, 2)"], 54 + np.sqrt(800), rtol=2e-3)


def test_top_eigenvalue_at_a_maximum_and_a_saddle_against_eigh(himmel):
    prob, _ = himmel
    # Source: the local maximum of Himmelblau's function, (-0.270845, -0.923039), as listed by
    # Jamil & Yang (2013) (both eigenvalues negative), a saddle near (3.385, 0.074) found with
    # scipy.optimize.root on the gradient (from memory), and a minimum; reference values
    # from numpy.linalg.eigvalsh of the dense Hessian.
    pts = np.array([[-0.2708445907, -0.9230385565], [3.3851541836, 0.0738518798], [3.0, 2.0]])
    want = [np.linalg.eigvalsh(np.asarray(core.hessian_matrix(prob, p))).max() for p in pts]
    assert want[0] < 0 < want[1]  # the maximum's top eigenvalue is negative
    got = top_hessian_eigenvalues(prob, pts, iterations=80)
    np.testing.assert_allclose(got, want, rtol=1e-4)
    with_nan = top_hessian_eigenvalues(prob, np.vstack([pts[:1], [np.nan, 0.0]]))
    assert np.isnan(with_nan[1]) and np.isfinite(with_nan[0])


# ------------------------------------------------------------------ tanh MLP
def tanh_mlp(p, x, y):
    h = jnp.tanh(x @ p["w1"] + p["b1"])
    return jnp.mean((h @ p["w2"] + p["b2"] - y) ** 2)


MLP_STEPS, MLP_RUNS = 30, 24  # every MLP sweep here shares one compiled program


@pytest.fixture(scope="module")
def mlp():
    rng = np.random.default_rng(0)
    x = rng.normal(size=(32, 3)).astype(np.float32)
    y = (np.sin(x[:, 0]) + 0.5 * x[:, 1]).astype(np.float32)
    params = {"w1": np.zeros((3, 5), np.float32), "b1": np.zeros(5, np.float32),
              "w2": np.zeros(5, np.float32), "b2": np.float32(0.3)}  # fmt: skip
    return Problem(tanh_mlp, params, x, y), y


def test_zeros_init_stays_at_the_symmetric_point(mlp):
    prob, y = mlp
    zeros = {"w1": np.zeros((3, 5)), "b1": np.zeros(5), "w2": np.zeros(5), "b2": 0.3}
    const = {"w1": np.full((3, 5), 0.2), "b1": np.full(5, 0.1), "w2": np.full(5, 0.3), "b2": 0.0}
    lr, steps = 0.1, MLP_STEPS
    runs = descend(prob, {"zeros": [zeros], "constant": [const]}, learning_rate=lr, steps=steps,
                   grad_tol=0.0, loss_tol=0.0, min_runs=MLP_RUNS)  # fmt: skip
    assert runs.table["scheme"].tolist() == ["zeros", "constant"]
    end = [prob.unflatten(runs.final[i]) for i in range(2)]
    # common practice: with all weights zero, tanh(0) = 0 makes the output weights' gradient
    # h^T r = 0, and the hidden layer's gradient carries the factor w2 = 0, so only the
    # output bias moves: b <- b - lr * 2 * mean(b - y), i.e.
    # b_t = mean(y) + (1 - 2 lr)^t (b_0 - mean(y)).
    for key in ("w1", "b1", "w2"):
        assert np.all(np.asarray(end[0][key]) == 0.0)
    b_t = y.mean() + (1 - 2 * lr) ** steps * (0.3 - y.mean())
    np.testing.assert_allclose(float(end[0]["b2"]), b_t, rtol=1e-5)
    # common practice: hidden units that start equal get equal gradients and stay equal.
    w1 = np.asarray(end[1]["w1"])
    np.testing.assert_allclose(w1, np.repeat(w1[:, :1], 5, axis=1), rtol=1e-6)
    np.testing.assert_allclose(np.asarray(end[1]["w2"]), float(end[1]["w2"][0]), rtol=1e-6)
    assert not np.allclose(w1, 0.2)  # they did move


def test_schemes_do_not_recompile_when_seeds_or_counts_change(mlp):
    prob, _ = mlp

    def schemes(seed, count):
        return {
            "zeros": [prob.params],
            "small normal": random_starts(prob, count, scale=0.01, seed=seed),
            "fan-in": initializer_starts(prob, fan_in, count, seed=seed + 1),
        }

    def run(seed, count):
        labels = lambda runs: np.where(runs.final_loss < 0.5, "low", "high")
        return compare_schemes(prob, schemes(seed, count), solutions=labels,
                               learning_rate=0.05, steps=MLP_STEPS, min_runs=MLP_RUNS)  # fmt: skip

    run(0, 9)  # 19 runs, padded to 24 (keys split 12 at a time)
    with count_compilations() as c:
        cmp = run(5, 11)  # 23 runs: the same buckets
    assert c.count == 0
    assert cmp.summary["runs"].tolist() == [1, 11, 11]


def fan_in(key):
    k1, k2 = jax.random.split(key)
    return {"w1": jax.random.normal(k1, (3, 5)) / jnp.sqrt(3.0), "b1": jnp.zeros(5),
            "w2": jax.random.normal(k2, (5,)) / jnp.sqrt(5.0), "b2": 0.0}  # fmt: skip


# ------------------------------------------------------------------ starts, labels, settings
def test_scheme_starts_keep_names_and_rebuild_from_settings(mlp):
    prob, _ = mlp
    st = scheme_starts(
        prob,
        {"zeros": [prob.params], "normal": random_starts(prob, 3, scale=0.1, seed=2),
         "fan-in": fan_in},
        count=2, seed=7,
    )  # fmt: skip
    assert scheme_of(st).tolist() == ["zeros", "normal", "normal", "normal", "fan-in", "fan-in"]
    runs = descend(prob, st, learning_rate=0.05, steps=MLP_STEPS, min_runs=MLP_RUNS)
    assert runs.scheme.tolist() == scheme_of(st).tolist()
    assert list(runs.table.columns[:3]) == ["run", "start", "scheme"]
    plane = core.default_plane(prob)
    settings = record_settings(prob, plane=plane, span=1.0, resolution=5, starts=st, runs=runs)
    back = Settings.from_json(settings.to_json(), problem=prob)
    assert back == settings
    rows = {r["name"]: r for r in back.schemes}
    assert rows["normal"] == {"name": "normal", "kind": "random", "count": 3, "seed": 2,
                              "initializer": None}  # fmt: skip
    assert rows["fan-in"]["initializer"] == f"{__name__}.fan_in"
    assert rows["fan-in"]["seed"] == 7 and rows["zeros"]["kind"] == "explicit"
    with pytest.raises(ParameterError, match="initializers="):
        starts_from_spec(prob, back.starts)
    again = starts_from_spec(prob, back.starts, initializers={f"{__name__}.fan_in": fan_in})
    np.testing.assert_array_equal(again.points, st.points)
    assert scheme_of(again).tolist() == scheme_of(st).tolist()
    # settings written before schemes existed have none
    old = json.loads(settings.to_json())
    old["starts"] = explicit_starts(prob, prob.params).spec
    assert Settings.from_json(json.dumps(old)).schemes == []


def test_own_labels_and_bad_inputs(himmel):
    prob, cmp = himmel
    labels = np.where(cmp.runs.final[:, 0] > 0, "east", "west")
    own = compare_schemes(prob, cmp.runs, solutions=labels, sharpness=False)
    assert own.minima is None and own.sharpness is None
    assert set(own.solutions) == {"east", "west"}
    east = own.shares[own.shares["solution"] == "east"].set_index("scheme")["share"]
    assert east["near (3, 2)"] == 1.0 and east["near (-2.81, 3.13)"] == 0.0
    assert "median_sharpness" not in own.summary
    per_run = cmp.per_run
    assert {"scheme", "solution", "steps_to_loss", "sharpness"} <= set(per_run.columns)
    with pytest.raises(ParameterError, match="one label per run"):
        compare_schemes(prob, cmp.runs, solutions=labels[:3])
    plain = descend(prob, np.array([[1.0, 1.0]]), learning_rate=0.005, steps=5)
    with pytest.raises(ParameterError, match="no scheme names"):
        compare_schemes(prob, plain)
    with pytest.raises(ParameterError, match="count="):
        compare_schemes(prob, {"a": box_around((3.0, 2.0))})
    with pytest.raises(ParameterError, match="one learning rate"):
        compare_schemes(prob, {"a": [{"x": 3.0, "y": 2.0}]}, learning_rate=[0.1, 0.2])
    with pytest.raises(ParameterError, match="non-empty mapping"):
        scheme_starts(prob, {})


def test_an_initialiser_in_a_tuple_is_refused_with_the_fix(mlp):
    prob, _ = mlp
    with pytest.raises(ParameterError, match="pass the initialiser itself"):
        scheme_starts(prob, {"fan-in": (fan_in, 3)}, count=2)


def test_scheme_figures_validate_and_show_the_table(himmel):
    _, cmp = himmel
    shares_fig = F.scheme_shares_figure(cmp)
    steps_fig = F.scheme_steps_figure(cmp)
    for fig in (shares_fig, steps_fig):
        go.Figure(fig.to_dict())  # plotly's full schema validation: raises on any bad property
        assert all(t.uid for t in fig.data)
    shares = cmp.shares
    for i, name in enumerate(cmp.schemes):
        bar = shares_fig.data[i]
        rows = shares[shares["scheme"] == name]
        np.testing.assert_allclose(bar.y, rows["share"])
        np.testing.assert_allclose(np.asarray(bar.y) + bar.error_y.array, rows["share_high"])
        np.testing.assert_allclose(np.asarray(bar.y) - bar.error_y.arrayminus, rows["share_low"])
    hit = [t for t in steps_fig.data if t.uid.startswith("schemes-hit")]
    steps = cmp.steps_to_loss
    assert sum(len(t.x) for t in hit) == int((~steps.isna()).sum())
    assert F.scheme_colours(cmp)[cmp.schemes[0]] == shares_fig.data[0].marker.color


def test_top_eigenvalue_on_a_network_against_eigh(mlp):
    prob, _ = mlp
    points = random_starts(prob, MLP_RUNS, scale=0.7, seed=11).points  # same bucket as above
    got = top_hessian_eigenvalues(prob, points, iterations=300)
    # Source: numpy.linalg.eigvalsh of the dense Hessian (jax.hessian) at each point.
    want = [np.linalg.eigvalsh(core.hessian_matrix(prob, p)).max() for p in points[:6]]
    np.testing.assert_allclose(got[:6], want, rtol=1e-3)

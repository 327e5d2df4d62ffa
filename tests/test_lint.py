"""Loss lint: each check fires on its bad pattern, stays silent on the good form."""

from __future__ import annotations

import warnings

import equinox as eqx
import jax
import jax.numpy as jnp
import numpy as np
import pytest
import statsmodels.api as sm
from sklearn.datasets import load_diabetes

from basinview.core import (
    LINT_CHECKS,
    ClosedOverDataWarning,
    DiscardedPrecisionWarning,
    IntegerDataWarning,
    LossLintWarning,
    MixedPrecisionWarning,
    ParameterError,
    Problem,
    RowBroadcastWarning,
    lint_loss,
)


@pytest.fixture(scope="module")
def longley():
    # Source: statsmodels.datasets.longley (Longley 1967, JASA 62:819-841), 16 rows;
    # the exogenous columns are standardised so float32 OLS is well conditioned.
    data = sm.datasets.longley.load()
    x = np.asarray(data.exog, dtype=np.float64)
    x = (x - x.mean(0)) / x.std(0)
    y = np.asarray(data.endog, dtype=np.float64)
    y = (y - y.mean()) / y.std()
    return sm.add_constant(x), y


def ols(w, x, y):
    return jnp.mean((y - x @ w) ** 2)


def ols_broadcast(w, x, y):
    return jnp.mean((y - x @ w[:, None]) ** 2)  # (16,) - (16, 1) -> (16, 16)


def findings(loss, params, *data, **kw):
    with warnings.catch_warnings(record=True) as rec:
        warnings.simplefilter("always")
        prob = Problem(loss, params, *data, **kw)
    return prob, [r.message for r in rec if isinstance(r.message, LossLintWarning)]


def test_row_broadcast_fires_on_the_classic_mistake_and_not_on_ols(longley):
    x, y = longley
    w0 = np.zeros(x.shape[1], np.float32)
    xs, ys = x.astype(np.float32), y.astype(np.float32)
    with pytest.warns(
        RowBroadcastWarning, match=r"\(16, 16\).*two axes of the data's 16 rows.*pred\[:, 0\]"
    ):
        bad = Problem(ols_broadcast, w0, xs, ys)
    prob, found = findings(ols, w0, xs, ys)
    assert found == []
    # The broadcast loss is another function: at the OLS solution it is far above the
    # residual mean square.
    # Source: statsmodels OLS on the Longley data (ssr / n at its solution).
    fit = sm.OLS(y, x).fit()
    w = fit.params.astype(np.float32)
    np.testing.assert_allclose(float(prob.value(w)), fit.ssr / len(y), rtol=1e-3)
    assert float(bad.value(w)) > 100 * fit.ssr / len(y)


def test_pairwise_data_and_gram_matrices_are_not_flagged(longley):
    x, y = longley
    xs, ys = x.astype(np.float32), y.astype(np.float32)
    kernel = np.exp(-((xs[:, None, 1] - xs[None, :, 1]) ** 2))  # an (n, n) input

    def kernel_ridge(a, k, y):
        return jnp.mean((k @ a - y) ** 2) + 1e-3 * a @ k @ a

    def gram(w, x, y):
        return jnp.mean((y - x @ w) ** 2) + 1e-6 * jnp.sum((x @ x.T) ** 2)

    assert findings(kernel_ridge, np.zeros(16, np.float32), kernel, ys)[1] == []
    assert findings(gram, np.zeros(x.shape[1], np.float32), xs, ys)[1] == []


def test_every_check_can_be_silenced_by_name_flag_or_filter(longley):
    x, y = longley
    args = (
        ols_broadcast,
        np.zeros(x.shape[1], np.float32),
        x.astype(np.float32),
        y.astype(np.float32),
    )
    assert findings(*args, lint={"ignore": ["row-broadcast"]})[1] == []
    assert findings(*args, lint=False)[1] == []
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        warnings.simplefilter("ignore", RowBroadcastWarning)
        Problem(*args)
    assert [type(w) for w in findings(*args)[1]] == [RowBroadcastWarning]
    # the names the option accepts are the warning classes' own
    assert {cls.check for cls in LINT_CHECKS.values()} == set(LINT_CHECKS)
    for bad in ({"ignore": ["row-brodcast"]}, "off", {"skip": ["row-broadcast"]}):
        with pytest.raises(ParameterError, match="row-broadcast"):
            Problem(*args, lint=bad)


@pytest.fixture(scope="module")
def diabetes():
    # Source: scikit-learn's bundled diabetes data (sklearn.datasets.load_diabetes).
    data = load_diabetes()
    return data.data.astype(np.float32), (data.target / data.target.std()).astype(np.float32)


DIABETES_X = load_diabetes().data.astype(np.float32)  # 442 x 10: a global a loss may grab


def test_closed_over_data_fires_and_names_the_variable(diabetes):
    x, y = diabetes

    def grabs(w, y):
        return jnp.mean((DIABETES_X @ w - y) ** 2)

    with pytest.warns(ClosedOverDataWarning, match=r"\(442, 10\).*'DIABETES_X'.*pass it as data"):
        Problem(grabs, np.zeros(10, np.float32), y)
    assert findings(ols, np.zeros(10, np.float32), x, y)[1] == []
    small = jnp.arange(10.0)  # a small constant is fine

    def weighted(w, x, y):
        return jnp.mean((x @ (w * small) - y) ** 2)

    assert findings(weighted, np.zeros(10, np.float32), x, y)[1] == []


def test_fixed_arrays_of_a_model_are_not_closed_over_data(diabetes):
    x, y = diabetes

    class Picked(eqx.Module):
        w: jax.Array
        rows: jax.Array  # 2000 integer indices: a fixed part of the model

    model = Picked(jnp.zeros(10), jnp.arange(2000) % 442)

    def loss(m, x, y):
        return jnp.mean((x[m.rows] @ m.w - y[m.rows]) ** 2)

    assert findings(loss, model, x, y)[1] == []


def test_discarded_precision(x64, longley):
    x, y = longley

    def casts(w, x, y):
        return jnp.mean((y - x.astype(jnp.float32) @ w.astype(jnp.float32)) ** 2)

    with pytest.warns(DiscardedPrecisionWarning, match="from float64 to float32.*remove the cast"):
        Problem(casts, np.zeros(x.shape[1]), x, y)
    assert findings(ols, np.zeros(x.shape[1]), x, y)[1] == []

    def rounds(w, x, y):
        return jnp.mean((y - x @ w.astype(jnp.int32)) ** 2)

    with pytest.warns(
        DiscardedPrecisionWarning, match="to integers.*gradient through that conversion is zero"
    ):
        Problem(rounds, np.zeros(x.shape[1]), x, y)


def test_mixed_precision(x64, longley):
    x, y = longley  # float64 under x64
    with pytest.warns(
        MixedPrecisionWarning,
        match=r"computes in float64 \(data x, y are float64\) but the parameters are float32",
    ):
        Problem(ols, np.zeros(x.shape[1], np.float32), x, y)
    assert findings(ols, np.zeros(x.shape[1]), x, y)[1] == []
    assert (
        findings(ols, np.zeros(x.shape[1], np.float32), x.astype(np.float32), y.astype(np.float32))[
            1
        ]
        == []
    )

    def split(p, x, y):
        return jnp.mean((y - x[:, 0] * p["b"] - x[:, 1:] @ p["w"]) ** 2)

    with pytest.warns(MixedPrecisionWarning, match="different precisions.*float32: b"):
        Problem(split, {"b": np.float32(0.0), "w": np.zeros(x.shape[1] - 1)}, x, y)


def test_integer_data_beyond_float32_digits():
    # Source: IEEE 754 binary32 has a 24-bit significand: 2**24 + 1 is not representable.
    assert np.float32(2**24 + 1) == np.float32(2**24)
    ids = np.arange(2**25, 2**25 + 40, dtype=np.int32)  # e.g. timestamps or account numbers
    target = np.linspace(0.0, 1.0, 40, dtype=np.float32)

    def trend(p, t, y):
        return jnp.mean((p["a"] + p["b"] * 1e-7 * t - y) ** 2)

    with pytest.warns(
        IntegerDataWarning, match=r"integer data t to float32.*2\*\*24 = 16777216.*reaches 33554471"
    ):
        Problem(trend, {"a": 0.0, "b": 0.0}, ids, target)
    assert findings(trend, {"a": 0.0, "b": 0.0}, ids - 2**25, target)[1] == []


@pytest.mark.slow
def test_the_projects_own_scenarios_and_test_losses_lint_clean():
    from basinview import scenarios

    from .conftest import himmelblau, quadratic

    names = [n for n in dir(scenarios) if n in ("beacon", "twin_gauges", "wavy_band")]
    assert len(names) == 3
    for name in names:
        prob = getattr(scenarios, name)().problem
        assert lint_loss(prob.loss, prob.flattener, prob.data, name=prob.name) == (), name

    def range_misfit(params, receivers, ranges):  # the quickstart notebook's loss
        dx = params["x"] - receivers[:, 0]
        dy = params["y"] - receivers[:, 1]
        return jnp.mean((jnp.sqrt(dx**2 + dy**2 + 1e-12) - ranges) ** 2)

    extras = scenarios.beacon(seed=2026).extras
    for loss, params, data in (
        (range_misfit, {"x": 1.0, "y": 1.0}, (extras["receivers"], extras["ranges"])),
        (himmelblau, {"x": 0.0, "y": 0.0}, ()),
        (quadratic, jnp.zeros(3), (np.diag([1.0, 2.0, 3.0]), np.array([1.0, 0.0, -1.0]))),
    ):
        prob = Problem(loss, params, *data)
        assert lint_loss(prob.loss, prob.flattener, prob.data) == ()


def test_findings_point_at_the_users_line_and_lint_loss_only_returns_them(longley):
    x, y = longley
    args = (
        ols_broadcast,
        np.zeros(x.shape[1], np.float32),
        x.astype(np.float32),
        y.astype(np.float32),
    )
    with warnings.catch_warnings(record=True) as rec:
        warnings.simplefilter("always")
        prob = Problem(*args)
        found = lint_loss(prob.loss, prob.flattener, prob.data, name=prob.name)
    assert len(rec) == 1 and rec[0].filename == __file__  # raised once, at Problem(...)
    assert [type(f) for f in found] == [RowBroadcastWarning]
    assert "'row-broadcast'" in str(found[0])

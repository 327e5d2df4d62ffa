"""Least squares on the Longley data against NIST's certified coefficients."""

from __future__ import annotations

import math

import jax
import jax.numpy as jnp
import numpy as np
import pytest
import statsmodels.api as sm

from basinview.core import Problem, descend

from .conftest import DATA, read_nist_certified


def _nist_data():
    lines = (DATA / "Longley.dat").read_text().splitlines()
    rows = [list(map(float, line.split())) for line in lines[60:76]]  # "Data (lines 61 to 76)"
    return np.array(rows)


def test_statsmodels_longley_is_the_nist_data():
    # Source: NIST StRD "Longley" file (tests/data/Longley.dat) and statsmodels'
    # bundled copy (statsmodels.datasets.longley): the same 16 observations.
    nist = _nist_data()
    d = sm.datasets.longley.load_pandas()
    np.testing.assert_allclose(d.endog.to_numpy(), nist[:, 0])
    np.testing.assert_allclose(d.exog.to_numpy(), nist[:, 1:])


def test_longley_fit_matches_certified_coefficients(x64):
    # Source: NIST Statistical Reference Datasets, Longley (certified values, lines 31-51
    # of tests/data/Longley.dat): B0 = -3482258.63459582, ..., B6 = 1829.15146461355.
    certified = read_nist_certified(DATA / "Longley.dat")
    expected = np.array([certified[f"B{i}"] for i in range(7)])
    assert expected[0] == pytest.approx(-3482258.63459582)

    d = sm.datasets.longley.load_pandas()
    x = d.exog.to_numpy(float)
    y = d.endog.to_numpy(float)
    # A modeller standardises the predictors and the response before descending
    # (common practice); coefficients are mapped back afterwards.
    mu, sd = x.mean(0), x.std(0)
    z = (x - mu) / sd
    ym, ys = y.mean(), y.std()
    t = (y - ym) / ys

    def loss(p, z, t):
        return jnp.mean((z @ p["w"] + p["b"] - t) ** 2)

    prob = Problem(loss, {"w": jnp.zeros(6), "b": 0.0}, z, t)
    hess = jax.hessian(lambda th: prob.flat_loss(th, prob.data))(jnp.asarray(prob.theta0))
    eig = np.linalg.eigvalsh(np.asarray(hess))
    lo, hi = eig[0], eig[-1]
    # Source: Polyak (1964); REFERENCES.md C5 (from memory for the formulas): optimal
    # heavy ball alpha* = 4/(sqrt L + sqrt mu)^2, beta* = ((sqrt k - 1)/(sqrt k + 1))^2.
    kappa = hi / lo
    alpha = 4 / (math.sqrt(hi) + math.sqrt(lo)) ** 2
    beta = ((math.sqrt(kappa) - 1) / (math.sqrt(kappa) + 1)) ** 2
    runs = descend(
        prob,
        prob.params,
        optimizer="momentum",
        learning_rate=alpha,
        hyper={"momentum": beta},
        steps=20000,
        grad_tol=1e-13,
        loss_tol=0.0,
    )
    assert runs.status[0] == "converged"
    fitted = prob.unflatten(runs.final[0])
    slopes = np.asarray(fitted["w"]) * ys / sd
    intercept = ym + ys * float(fitted["b"]) - slopes @ mu
    coef = np.concatenate([[intercept], slopes])
    # Certified to 15 digits; descent in float64 recovers >= 9 significant digits.
    np.testing.assert_allclose(coef, expected, rtol=1e-9)
    # The certified residual sum of squares, 836424.055505915.
    rss = np.sum((y - intercept - x @ slopes) ** 2)
    assert rss == pytest.approx(836424.055505915, rel=1e-10)
    # Reference library: statsmodels OLS agrees.
    ols = sm.OLS(y, sm.add_constant(x)).fit()
    np.testing.assert_allclose(coef, ols.params, rtol=1e-9)

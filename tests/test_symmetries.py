"""Declared symmetries: grouping modulo label switching, periods, signs and unit order."""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import plotly.graph_objects as go
import pytest
import statsmodels.api as sm
from sklearn.datasets import load_diabetes, load_iris
from sklearn.mixture import GaussianMixture

from basinview import core
from basinview.core.connectivity import connect_runs
from basinview.core.errors import ParameterError
from basinview.core.segments import segment_barriers
from basinview.core.symmetries import (
    exchangeable,
    hidden_units,
    periodic,
    resolve_symmetries,
    sign_flip,
)
from basinview.figures.groups import solutions_figure

# ------------------------------------------------------------------ mixture
PETAL = jnp.asarray(load_iris().data[:, 2], dtype=jnp.float32)  # petal length, cm
COMPONENTS = exchangeable([["mu[0]", "log_sd[0]", "logit[0]"], ["mu[1]", "log_sd[1]", "logit[1]"]])


def mixture_nll(p, x):
    log_w = jax.nn.log_softmax(p["logit"])
    z = (x[:, None] - p["mu"]) / jnp.exp(p["log_sd"])
    log_comp = log_w - p["log_sd"] - 0.5 * z**2 - 0.5 * jnp.log(2 * jnp.pi)
    # common practice: logits summing to zero remove their shift invariance (no effect
    # on the likelihood), so each minimum is isolated up to the label switch.
    return -jnp.mean(jax.nn.logsumexp(log_comp, axis=1)) + jnp.sum(p["logit"]) ** 2


@pytest.fixture(scope="module")
def mixture():
    init = {"mu": jnp.zeros(2), "log_sd": jnp.zeros(2), "logit": jnp.zeros(2)}
    prob = core.Problem(mixture_nll, init, PETAL)
    # two starts and their label-switched copies: the runs reach both copies
    a = [1.5, 5.0, -1.0, -0.5, 0.5, -0.5]  # mu0 mu1 log_sd0 log_sd1 logit0 logit1
    b = [2.5, 4.0, -0.5, -0.5, 0.0, 0.0]
    order = [prob.index(k) for k in ("mu[0]", "mu[1]", "log_sd[0]", "log_sd[1]")]
    order += [prob.index("logit[0]"), prob.index("logit[1]")]
    starts = np.zeros((4, prob.size))
    for row, v in enumerate([a, b]):
        swapped = [v[1], v[0], v[3], v[2], v[5], v[4]]
        starts[2 * row, order], starts[2 * row + 1, order] = v, swapped
    runs = core.descend(prob, starts, optimizer="adam", learning_rate=0.05, steps=1500)
    return prob, runs


def test_mixture_fit_matches_sklearn_and_label_switches_merge(mixture):
    prob, runs = mixture
    plain = core.find_minima(prob, runs, include_unconverged=True)
    assert len(plain) == 2  # the two label-switched copies are listed apart
    merged = core.find_minima(prob, runs, include_unconverged=True, symmetries=COMPONENTS)
    assert len(merged) == 1 and merged.count.tolist() == [4]
    assert merged.copies.tolist() == [2] and merged.table.loc[0, "copies"] == 2
    # Source: sklearn.mixture.GaussianMixture (EM) on the same column of sklearn's
    # iris data; the maximum likelihood fit is the same whatever the optimiser.
    gm = GaussianMixture(2, tol=1e-10, max_iter=2000, random_state=0)
    gm.fit(np.asarray(PETAL, dtype=np.float64)[:, None])
    ref = np.argsort(gm.means_.ravel())
    p = prob.unflatten(merged.points[0])
    ours = np.argsort(np.asarray(p["mu"]))
    np.testing.assert_allclose(np.asarray(p["mu"])[ours], gm.means_.ravel()[ref], rtol=2e-3)
    sd = np.exp(np.asarray(p["log_sd"]))[ours]
    np.testing.assert_allclose(sd, np.sqrt(gm.covariances_.ravel()[ref]), rtol=5e-3)
    w = np.asarray(jax.nn.softmax(p["logit"]))[ours]
    np.testing.assert_allclose(w, gm.weights_[ref], atol=2e-3)
    # by connectivity: one group of 4 runs and 2 copies modulo the label switch; two
    # groups without it (between the copies the two components coincide)
    groups = connect_runs(prob, runs, symmetries=COMPONENTS)
    assert len(groups) == 1 and groups.copies.tolist() == [2] and groups.count.tolist() == [4]
    apart = connect_runs(prob, runs)
    assert len(apart) == 2 and apart.barrier[0, 1] > 10 * apart.tolerance
    fig = solutions_figure(groups)
    go.Figure(fig.to_dict())  # full plotly validation (one group, a symmetry note)
    assert "copies merged: 1" in " ".join(a.text for a in fig.layout.annotations)


# ----------------------------------------------------------------- sinusoid
SUN = sm.datasets.sunspots.load_pandas().data
T = jnp.asarray(SUN["YEAR"].to_numpy() - 1700.0, dtype=jnp.float32)
Y = jnp.asarray(SUN["SUNACTIVITY"].to_numpy(), dtype=jnp.float32)
OMEGA = 2 * np.pi / 11.0  # common practice: the sunspot cycle is about 11 years


def cycle_mse(p, t, y):
    return jnp.mean((y - p["c"] - p["a"] * jnp.sin(OMEGA * t + p["phase"])) ** 2)


def test_sinusoid_phase_copies_are_one_group():
    prob = core.Problem(cycle_mse, {"a": 1.0, "c": 0.0, "phase": 0.0}, T, Y)
    # Source: numpy.linalg.lstsq on y ~ c + alpha sin(wt) + beta cos(wt), the same
    # model written linearly: a = hypot(alpha, beta), phase = atan2(beta, alpha).
    t, y = np.asarray(T, np.float64), np.asarray(Y, np.float64)
    design = np.stack([np.ones_like(t), np.sin(OMEGA * t), np.cos(OMEGA * t)], axis=1)
    (c, alpha, beta), *_ = np.linalg.lstsq(design, y, rcond=None)
    best = {"a": np.hypot(alpha, beta), "c": c, "phase": np.arctan2(beta, alpha)}
    flat = prob.flatten(best).astype(np.float64)
    grad = np.asarray(prob.grad(flat.astype(np.float32)))
    assert np.max(np.abs(grad)) < 1e-2 * float(prob.value(flat.astype(np.float32)))
    copy = flat.copy()
    copy[prob.index("phase")] += 2 * np.pi
    ends = np.stack([flat, copy, flat + 1e-3, copy - 1e-3])
    tol = 1e-3 * float(prob.value(flat.astype(np.float32)))
    cycle = periodic("phase", 2 * np.pi)
    groups = connect_runs(prob, ends, tolerance=tol, symmetries=cycle)
    assert len(groups) == 1 and groups.copies.tolist() == [2]
    apart = connect_runs(prob, ends, tolerance=tol)
    assert len(apart) == 2
    syms = resolve_symmetries(prob, cycle)
    np.testing.assert_allclose(syms.canonical(copy)[0], syms.canonical(flat)[0], atol=1e-9)
    assert syms.canonical(copy)[1] != syms.canonical(flat)[1]


# --------------------------------------------------------------------- MLP
DIAB = load_diabetes()
X = jnp.asarray(DIAB.data[:, :4] * 10.0, dtype=jnp.float32)
Z = jnp.asarray((DIAB.target - DIAB.target.mean()) / DIAB.target.std(), dtype=jnp.float32)
H = 8
UNITS = {"w1": 1, "b1": 0, "w2": 0}


def mlp_mse(p, x, y):
    out = jnp.tanh(x @ p["w1"] + p["b1"]) @ p["w2"] + p["b2"]
    return jnp.mean((out[:, 0] - y) ** 2)


@pytest.fixture(scope="module")
def mlp():
    init = {"w1": jnp.zeros((4, H)), "b1": jnp.zeros(H), "w2": jnp.zeros((H, 1)), "b2": 0.0}
    prob = core.Problem(mlp_mse, init, X, Z)
    rng = np.random.default_rng(3)
    table = resolve_symmetries(prob, hidden_units(UNITS)).items[0].table
    perm = rng.permutation(H)
    first = 0.7 * rng.normal(size=prob.size)
    permuted = first.copy()
    permuted[table] = first[table[perm]]
    others = 0.7 * rng.normal(size=(4, prob.size))
    starts = np.vstack([first[None], permuted[None], others])
    runs = core.descend(prob, starts, optimizer="adam", learning_rate=0.02, steps=600)
    return prob, runs, table, perm


def test_permuted_training_is_the_same_solution_to_float_tolerance(mlp):
    # Source: the model's formula: permuting hidden units (columns of w1, entries
    # of b1, rows of w2) leaves the output unchanged, and descent from permuted
    # starts stays permuted (every update is coordinate-wise or equivariant).
    prob, runs, _, perm = mlp
    syms = resolve_symmetries(prob, [hidden_units(UNITS)])
    assert syms.check(prob, runs.final[0]) < 1e-5
    e0, e1 = np.asarray(runs.final[0], np.float64), np.asarray(runs.final[1], np.float64)
    aligned, key = syms.align(e1, e0)
    np.testing.assert_allclose(aligned, e0, atol=1e-4 * np.max(np.abs(e0)))
    assert np.array_equal(np.asarray(key[0])[perm], np.arange(H))  # undoes the permutation
    assert abs(runs.final_loss[0] - runs.final_loss[1]) <= 1e-5 * abs(runs.final_loss[0])
    groups = connect_runs(prob, runs.final[:2], tolerance=1e-4, symmetries=hidden_units(UNITS))
    assert len(groups) == 1 and groups.copies.tolist() == [2]
    assert groups.barrier_inside[0] < 1e-5


def test_sign_flips_of_tanh_units_leave_the_loss(mlp):
    # Source: tanh is odd, so flipping a unit's incoming weights, bias and outgoing
    # weights together leaves the output unchanged.
    prob, runs, _, _ = mlp
    syms = resolve_symmetries(prob, sign_flip(UNITS))
    assert syms.check(prob, runs.final[2], copies=6) < 1e-5
    wrong = resolve_symmetries(prob, sign_flip({"w1": 1, "b1": 0}))
    assert wrong.check(prob, runs.final[2], copies=6) > 1e-3  # a wrong declaration shows


def test_alignment_lowers_the_barrier_between_independent_trainings(mlp):
    # Source: Ainsworth, Hayase & Srinivasa (2023), Git Re-Basin, ICLR: weight
    # matching lowers the loss barrier on the segment between independently trained
    # networks (from memory; checked here on four pairs of trainings). tanh is odd,
    # so units are matched up to sign (hidden_units(..., odd=True)).
    prob, runs, _, _ = mlp
    syms = resolve_symmetries(prob, hidden_units(UNITS, odd=True))
    e0 = np.asarray(runs.final[0], np.float64)
    others = np.asarray(runs.final[2:], np.float64)
    aligned = np.stack([syms.align(e, e0)[0] for e in others])
    ref = np.repeat(e0[None], len(others), axis=0)
    before, _, _ = segment_barriers(prob, ref, others, samples=33)
    after, _, ends = segment_barriers(prob, ref, aligned, samples=33)
    assert np.all(after < before)
    assert np.median(after) < 0.5 * np.median(before)
    np.testing.assert_allclose(ends, runs.final_loss[2:], rtol=1e-4)  # the same functions


def test_bad_declarations(mlp):
    prob = mlp[0]
    with pytest.raises(ParameterError, match="no leaf called"):
        resolve_symmetries(prob, hidden_units({"w9": 1}))
    with pytest.raises(ParameterError, match="same units"):
        resolve_symmetries(prob, hidden_units({"w1": 0, "b1": 0}))
    with pytest.raises(ParameterError, match="same size"):
        resolve_symmetries(prob, exchangeable([["w1[0,0]"], ["b1[0]", "b1[1]"]]))
    with pytest.raises(ParameterError, match="period"):
        periodic("b2", -1.0)
    with pytest.raises(ParameterError, match="declarations"):
        resolve_symmetries(prob, ["b2"])
    with pytest.raises(ParameterError, match="twice"):
        resolve_symmetries(prob, exchangeable([["b1[0]"], ["b1[0]"]]))

"""Compaction of live runs (descend(compact=...)): same results, less work, no recompiles.

The reference is the whole-budget engine (``compact=False``) at the same
program sizes, compared bit for bit, and a NumPy loop of gradient descent on
a quadratic (float64), compared to rounding.
"""

from __future__ import annotations

import jax.numpy as jnp
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from basinview.core import Problem, count_compilations, descend
from basinview.core.compaction import _layout, size_ladder

from .conftest import quadratic

FIELDS = ("final", "losses", "grad_norms", "path", "off_plane", "cosines", "stop_step", "status")
EXTRA = ("sharpness", "preconditioned_sharpness", "preconditioner")


def _rows(seed: int = 0):
    rng = np.random.default_rng(seed)
    x = rng.standard_normal((48, 3)).astype(np.float32)
    y = (np.tanh(x @ np.array([1.0, -2.0, 0.5])) + 0.1 * rng.standard_normal(48)).astype(np.float32)
    return x, y


def _fit(w, x, y):
    """A small non-linear least-squares fit: run lengths vary widely with the start."""
    return jnp.mean((jnp.tanh(x @ w) - y) ** 2) + 0.01 * jnp.sum(w**4)


@pytest.fixture(scope="module")
def fit():
    return Problem(_fit, jnp.zeros(3), *_rows())


@pytest.fixture(scope="module")
def starts():
    return np.random.default_rng(1).uniform(-2, 2, (12, 3)).astype(np.float32)


def _same(a, b):
    for name in FIELDS + EXTRA:
        x, y = getattr(a, name), getattr(b, name)
        if x is None or y is None:
            assert x is None and y is None, name
            continue
        if x.dtype == object:
            np.testing.assert_array_equal(x, y, err_msg=name)
        else:
            np.testing.assert_array_equal(x, y, err_msg=name)  # NaN equal to NaN


SIZES = {"descent_runs_per_call": 32, "descent_group": 8}  # rungs 32 and 16: two programs
RATES = [0.02, 0.3, 2.0, 40.0]
CASES = {
    "gd with sharpness": dict(learning_rate=RATES, sharpness_every=7),
    "adam with sharpness": dict(
        optimizer="adam", learning_rate=[0.01, 0.2, 3.0], sharpness_every=10
    ),
    "minibatch gd": dict(learning_rate=RATES, batch_size=8, seed=7, grad_tol=0.05, loss_tol=1.0),
}


# GD with sharpness runs by default; the Adam and minibatch cases with the slow tests.
@pytest.mark.parametrize(
    "kw",
    [
        pytest.param(kw, id=name, marks=() if name == "gd with sharpness" else pytest.mark.slow)
        for name, kw in CASES.items()
    ],
)
def test_compacted_runs_equal_the_whole_budget_engine_bit_for_bit(fit, starts, kw):
    kw = dict(steps=150, sizes=SIZES, **kw)
    packed = descend(fit, starts, compact=True, **kw)
    whole = descend(fit, starts, compact=False, **kw)
    _same(packed, whole)
    assert len(np.unique(packed.stop_step)) > 2  # runs stop at different steps


def test_compact_true_picks_a_width_and_records_it(fit, starts):
    kw = dict(learning_rate=RATES, steps=150)
    packed = descend(fit, starts[:4], compact=True, **kw)
    assert packed.config.sizes.group > 0  # calls may shrink to one group
    whole = descend(fit, starts[:4], compact=False, sizes=packed.config.sizes.record(), **kw)
    _same(packed, whole)


def test_frozen_runs_keep_their_records(fit, starts):
    runs = descend(fit, starts, learning_rate=RATES, steps=150, sizes=SIZES, compact=True)
    assert {"converged", "diverged", "max_steps"} <= set(runs.status)
    assert runs.stop_step.max() - runs.stop_step.min() > 60  # widely different stops
    for r in range(len(runs)):
        s = runs.stop_step[r]
        assert np.isfinite(runs.losses[r, : s + 1]).all() or runs.status[r] == "diverged"
        assert np.isfinite(runs.losses[r, :s]).all()
        assert np.isnan(runs.losses[r, s + 1 :]).all()  # nothing after the stop
        assert np.isnan(runs.path[r, s + 1 :]).all()
    diverged = runs.status == "diverged"
    assert (runs.stop_step[diverged] < 150).all()


def test_many_calls_pack_into_fewer_at_the_default_width(fit, starts):
    """Default sizes (descent_group 0): calls keep their size, live runs are packed."""
    sizes = {"descent_runs_per_call": 8, "descent_group": 0}
    kw = dict(learning_rate=RATES, steps=150, sizes=sizes)
    packed = descend(fit, starts, compact=True, **kw)
    whole = descend(fit, starts, compact=False, **kw)
    assert packed.config.sizes.group == 0
    _same(packed, whole)


def test_no_recompilation_after_warm_up_across_live_counts(fit, starts):
    kw = dict(steps=150, sizes=SIZES, compact=True)
    with count_compilations() as warm:
        descend(fit, starts, learning_rate=RATES, **kw)
        descend(fit, starts[:4], learning_rate=[0.3, 40.0], **kw)  # one call, shrinks to 16
    assert warm.count <= 2  # at most one program per rung (32, 16)
    with count_compilations() as counter:
        live = []
        for lrs in ([0.05, 0.2, 1.0, 30.0], [0.01, 0.5, 3.0, 50.0], [0.3, 0.31, 0.02, 0.04]):
            runs = descend(fit, starts, learning_rate=lrs, **kw)
            live.append(int((runs.stop_step > 32).sum()))
    assert counter.count == 0
    assert len(set(live)) > 1  # the live counts at the boundaries differed


def test_gradient_descent_matches_a_numpy_loop(x64):
    # Source: common practice -- gradient descent on 0.5 t'At - b't is t <- t - lr (At - b);
    # the stop rule is descend's (gradient norm and loss change within tolerances).
    a = np.diag([1.0, 4.0, 25.0])
    b = np.array([1.0, -1.0, 2.0])
    prob = Problem(quadratic, jnp.zeros(3), a, b)
    rng = np.random.default_rng(3)
    starts = rng.uniform(-3, 3, (20, 3))
    lrs = [0.005, 0.05, 0.079, 0.0805]  # last rate above 2 / 25: diverges
    runs = descend(prob, starts, learning_rate=lrs, steps=400, compact=True,
                   grad_tol=1e-6, loss_tol=1e-12)  # fmt: skip
    assert len(np.unique(runs.stop_step)) > 5
    i = 0
    for lr in lrs:
        for s in starts:
            t = s.copy()
            f = 0.5 * t @ a @ t - b @ t
            f0, k = f, 0
            while k < 400:
                t = t - lr * (a @ t - b)
                k += 1
                f1 = 0.5 * t @ a @ t - b @ t
                g = np.linalg.norm(a @ t - b)
                if not np.isfinite(f1) or f1 - f0 > 1e6 * max(1.0, abs(f0)):
                    break
                if g <= 1e-6 and abs(f1 - f) <= 1e-12 * max(1.0, abs(f1)):
                    break
                f = f1
            assert runs.stop_step[i] == k
            np.testing.assert_allclose(runs.final[i], t, rtol=1e-9, atol=1e-9)
            i += 1


@settings(
    max_examples=4, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(scale=st.floats(0.2, 3.0), shift=st.floats(-1.0, 1.0))
def test_any_starts_give_the_whole_budget_results(fit, starts, scale, shift):
    st_ = (starts * scale + shift).astype(np.float32)
    kw = dict(learning_rate=RATES, steps=150, sizes=SIZES)
    packed = descend(fit, st_, compact=True, **kw)
    whole = descend(fit, st_, compact=False, **kw)
    _same(packed, whole)


def test_ladder_and_layout():
    assert size_ladder(192, 24) == (192, 96, 48, 24)
    assert size_ladder(192, 192) == (192,)  # no group: calls never shrink
    assert size_ladder(64, 8, 16) == (64, 32, 16)
    ladder = size_ladder(64, 8)
    assert _layout(150, 64, 1, ladder) == [64, 64, 32]
    assert _layout(5, 64, 2, ladder) == [8]  # 5 runs over 2 devices: 8 per device
    assert _layout(130, 64, 1, (64,)) == [64, 64, 64]


def test_compact_must_be_a_flag(fit, starts):
    from basinview.core.errors import ParameterError

    with pytest.raises(ParameterError, match="compact must be True, False or None"):
        descend(fit, starts, compact="yes")

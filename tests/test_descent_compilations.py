"""Compile counts of descent: changing values compiles nothing, for every kind of optimiser.

Each row of the table is an optimiser as a user passes it: a built-in rule
name, an optax factory, or an optax transformation rebuilt on every call
(as in a notebook cell that is run again). After one warm-up call, a call
that changes only the learning rate (and builds the optimiser object anew)
must compile nothing, and must still use the new learning rate.
"""

from __future__ import annotations

import jax.numpy as jnp
import numpy as np
import optax
import pytest

from basinview.core import Problem, count_compilations, descend, optax_rule
from basinview.core.problem import COMPILED_MEMO_SIZE

from .conftest import quadratic


@pytest.fixture(scope="module")
def bowl():
    a = np.diag([1.0, 10.0]).astype(np.float32)
    b = np.array([1.0, 2.0], np.float32)
    return Problem(quadratic, jnp.zeros(2), a, b)


OPTIMIZERS = {
    "gradient_descent": lambda: "gradient_descent",
    "momentum": lambda: "momentum",
    "adam": lambda: "adam",
    "optax.adamw factory": lambda: optax.adamw,
    "optax.sgd factory": lambda: optax.sgd,
    "optax.sgd(1.0) transformation": lambda: optax.sgd(1.0),
    "optax.adam(1.0) transformation": lambda: optax.adam(1.0),
    "optax.chain": lambda: optax.chain(optax.clip_by_global_norm(1.0), optax.sgd(1.0)),
    "optax_rule(optax.rmsprop)": lambda: optax_rule(optax.rmsprop),
}


@pytest.mark.parametrize("make", OPTIMIZERS.values(), ids=list(OPTIMIZERS))
def test_a_new_learning_rate_compiles_nothing(bowl, make):
    starts = np.array([[1.0, 1.0], [-2.0, 0.5]], np.float32)
    kw = {"steps": 40, "grad_tol": 0.0, "loss_tol": 0.0}
    first = descend(bowl, starts, optimizer=make(), learning_rate=0.01, **kw)
    with count_compilations() as counter:
        second = descend(bowl, starts, optimizer=make(), learning_rate=0.02, **kw)
    assert counter.count == 0
    # The reused program ran with the new rate: other iterates than the first call.
    np.testing.assert_allclose(second.hyper["learning_rate"], 0.02)
    assert not np.allclose(second.final, first.final)
    # ... and the same numbers as a fresh problem that compiles its own program.
    fresh = Problem(quadratic, jnp.zeros(2), *bowl.data)
    again = descend(fresh, starts, optimizer=make(), learning_rate=0.02, **kw)
    np.testing.assert_array_equal(second.final, again.final)


def test_equal_optax_objects_share_a_key_and_different_ones_do_not():
    assert optax_rule(optax.adamw).key == optax_rule(optax.adamw).key
    assert optax_rule(optax.sgd(1.0)).key == optax_rule(optax.sgd(1.0)).key
    # A transformation with another baked-in value is another program.
    assert optax_rule(optax.sgd(0.5)).key != optax_rule(optax.sgd(1.0)).key
    assert optax_rule(optax.adamw).key != optax_rule(optax.adam).key
    assert optax_rule(optax.sgd, nesterov=True).key != optax_rule(optax.sgd).key


def test_another_baked_in_value_compiles_once_and_is_used(bowl):
    starts = np.array([[1.0, 1.0]], np.float32)
    kw = {"learning_rate": 1.0, "steps": 30, "grad_tol": 0.0, "loss_tol": 0.0}
    slow = descend(bowl, starts, optimizer=optax.sgd(0.01), **kw)
    with count_compilations() as counter:
        fast = descend(bowl, starts, optimizer=optax.sgd(0.05), **kw)
    assert counter.count == 1
    plain = descend(
        bowl, starts, learning_rate=0.05, **{k: v for k, v in kw.items() if k != "learning_rate"}
    )
    np.testing.assert_allclose(fast.losses, plain.losses, rtol=1e-6)
    assert slow.final_loss[0] > fast.final_loss[0]


def test_the_compile_memo_is_bounded_and_keeps_recent_entries(bowl):
    fresh = Problem(quadratic, jnp.zeros(2), *bowl.data)
    builds = []

    def build(i):
        builds.append(i)
        return lambda: i

    fresh.compiled(("probe", 0), lambda: build(0))
    for i in range(1, COMPILED_MEMO_SIZE + 5):
        fresh.compiled(("probe", i), lambda i=i: build(i))
        fresh.compiled(("probe", 1), lambda: build(1))  # kept in use: never dropped
    n = len(builds)
    assert fresh.compiled(("probe", 1), lambda: build(1))() == 1
    assert len(builds) == n  # recently used: still there
    assert fresh.compiled(("probe", 0), lambda: build(0))() == 0
    assert len(builds) == n + 1  # least recently used: dropped, rebuilt

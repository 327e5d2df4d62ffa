"""Learning-rate inputs (repeats, 2-D arrays) and steps to reach a loss."""

from __future__ import annotations

import jax.numpy as jnp
import numpy as np
import pandas as pd
import pytest

from basinview.core import ParameterError, Problem, descend, step_size_sweep


@pytest.fixture(scope="module")
def circle():
    return Problem(lambda p: p[0] ** 2 + p[1] ** 2, jnp.zeros(2))


def test_repeated_learning_rates_warn_and_keep_run_numbers(circle):
    with pytest.warns(UserWarning, match=r"learning_rate repeats the values \[0.1\]"):
        runs = descend(circle, np.array([[1.0, 0.5]]), learning_rate=[0.1, 0.2, 0.1], steps=30)
    np.testing.assert_allclose(runs.hyper["learning_rate"], [0.1, 0.2, 0.1])
    np.testing.assert_array_equal(runs.final[0], runs.final[2])  # the same run, twice
    assert runs.config.record()["learning_rate"] == [0.1, 0.2]  # Settings record each rate once


def test_a_sweep_merges_repeated_rates_with_a_warning(circle):
    with pytest.warns(UserWarning, match="more than once"):
        sweep = step_size_sweep(
            circle, np.array([1.0, 0.5]), learning_rates=[0.1, 0.1, 0.3], steps=50
        )
    assert sweep.table.learning_rate.tolist() == [0.1, 0.3]


@pytest.mark.parametrize(
    "rates", [np.full((2, 3), 0.1), [[0.1, 0.2], [0.3, 0.4]], [[0.1, 0.2], [0.3]]]
)
def test_a_two_dimensional_learning_rate_is_named_as_such(circle, rates):
    with pytest.raises(ParameterError, match="1-D list of numbers; got (an array of shape|nested)"):
        descend(circle, np.zeros(2), learning_rate=rates)


def test_a_two_dimensional_sweep_is_named_as_such(circle):
    with pytest.raises(ParameterError, match=r"shape \(2, 2\)"):
        step_size_sweep(circle, np.zeros(2), learning_rates=np.full((2, 2), 0.1))


def test_steps_to_loss_follow_the_closed_form_on_a_quadratic(circle):
    # common practice: gradient descent on f(x) = |x|^2 with rate lr maps x -> (1 - 2 lr) x,
    # so the loss after k steps is (1 - 2 lr)^(2k) f(x0).
    rates = [0.05, 0.25, 0.4]
    runs = descend(circle, np.array([[1.0, 0.0]]), learning_rate=rates, steps=200)
    target = 1e-3
    expected = [int(np.ceil(np.log(target) / (2 * np.log(1 - 2 * lr)))) for lr in rates]
    assert list(runs.steps_to_loss(target)) == expected
    table = runs.table_with(loss_below=target)
    assert table.steps_to_loss.tolist() == expected
    assert "steps_to_loss" not in runs.table  # the plain table keeps its fixed columns
    # A run that never gets there reports <NA>; a start already below gives 0.
    never = runs.steps_to_loss(-1.0)
    assert never.isna().all() and isinstance(never, pd.api.extensions.ExtensionArray)
    assert list(runs.steps_to_loss(2.0)) == [0, 0, 0]
    with pytest.raises(ParameterError, match="target must be a number"):
        runs.steps_to_loss("low")

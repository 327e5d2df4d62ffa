"""Descent engine: statuses, freezing, isolation, recording, starts, optax, compiles."""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import optax
import pandas as pd
import pytest

from basinview.core import (
    ParameterError,
    Problem,
    axes_plane,
    count_compilations,
    descend,
    grid_starts,
    initializer_starts,
    optax_rule,
    random_plane,
    random_starts,
    run_padding_floor,
)

from .conftest import himmelblau, quadratic


@pytest.fixture
def bowl():
    a = np.diag([1.0, 10.0]).astype(np.float32)
    b = np.array([1.0, 2.0], np.float32)
    return Problem(quadratic, jnp.zeros(2), a, b)


def test_table_has_one_row_per_run_and_fixed_columns(bowl):
    starts = np.array([[3.0, 1.0], [-2.0, 0.5], [0.0, 3.0]])  # all away from x0 = 1
    runs = descend(bowl, starts, learning_rate=[0.01, 0.1, 0.25], steps=300)
    table = runs.table
    assert isinstance(table, pd.DataFrame)
    assert len(table) == 9
    for col in (
        "run",
        "start",
        "learning_rate",
        "status",
        "oscillating",
        "steps",
        "steps_to_tol",
        "final_loss",
        "a_end",
        "b_end",
        "off_plane_end",
    ):
        assert col in table.columns
    # start-major within each setting, settings in the order given
    assert table.start.tolist() == [0, 1, 2] * 3
    assert table.learning_rate.round(6).tolist() == [0.01] * 3 + [0.1] * 3 + [0.25] * 3
    # 2/L = 0.2 for L = 10: 0.25 diverges, 0.1 converges, 0.01 crawls
    assert set(table[table.learning_rate == 0.1].status) == {"converged"}
    assert set(table[table.learning_rate == 0.25].status) == {"diverged"}
    assert set(table[np.isclose(table.learning_rate, 0.01)].status) == {"max_steps"}
    conv = table[table.status == "converged"]
    assert (conv.steps_to_tol == conv.steps).all()
    assert table[table.status != "converged"].steps_to_tol.isna().all()


def test_runs_freeze_where_they_stop(bowl):
    runs = descend(bowl, np.array([[1.0, 1.0]]), learning_rate=[0.1, 0.25], steps=400)
    for r in range(2):
        stop = runs.stop_step[r]
        assert np.isfinite(runs.losses[r, : stop + 1]).all() or runs.status[r] == "diverged"
        assert np.isnan(runs.losses[r, stop + 1 :]).all()
        assert np.isnan(runs.path[r, stop + 1 :]).all()
        assert len(runs.trajectory(r)) == stop + 1
    assert runs.stop_step[1] < 400  # diverged early, frozen there


def test_diverging_runs_never_change_other_runs(bowl):
    good = np.array([[1.0, 1.0], [-1.0, 2.0]])
    alone = descend(bowl, good, learning_rate=0.15, steps=200)
    # Same good starts inside a batch with a run that blows up to inf/NaN.
    blow = Problem(
        lambda p, s: jnp.where(p[0] > 50, jnp.nan, quadratic(p, *s)),
        jnp.zeros(2),
        (bowl.data[0], bowl.data[1]),
    )
    mixed = descend(
        blow, np.array([[1.0, 1.0], [60.0, 1.0], [-1.0, 2.0]]), learning_rate=0.15, steps=200
    )
    assert mixed.status[1] == "diverged"
    assert mixed.stop_step[1] == 0
    np.testing.assert_array_equal(mixed.losses[[0, 2]], alone.losses)
    np.testing.assert_array_equal(mixed.final[[0, 2]], alone.final)
    # And across many settings at once: the diverging learning rate does not leak.
    both = descend(bowl, good, learning_rate=[0.15, 5.0], steps=200)
    np.testing.assert_array_equal(both.losses[:2], alone.losses)


def test_already_at_a_minimum_converges_at_step_zero(bowl):
    runs = descend(bowl, np.array([1.0, 0.2]), learning_rate=0.1, steps=50)  # a^-1 b = (1, 0.2)
    assert runs.status[0] == "converged"
    assert runs.stop_step[0] == 0


def test_non_finite_start_is_diverged_at_step_zero():
    prob = Problem(lambda p: jnp.log(p[0]) ** 2 + p[1] ** 2, jnp.ones(2))
    runs = descend(prob, np.array([[-1.0, 0.0], [2.0, 0.0]]), learning_rate=0.1, steps=500)
    assert runs.status.tolist() == ["diverged", "converged"]


def test_paths_project_on_the_plane_and_report_off_plane_distance():
    prob = Problem(lambda p: jnp.sum((p - jnp.array([1.0, 2.0, 3.0])) ** 2), jnp.zeros(3))
    plane = axes_plane(prob, "theta[0]", "theta[1]")
    runs = descend(prob, np.zeros(3), learning_rate=0.1, steps=300, plane=plane)
    path = runs.trajectory(0)
    np.testing.assert_allclose(path[-1], [1.0, 2.0], atol=1e-3)
    # theta[2] moves from 0 towards 3 off the plane: the recorded distance follows it.
    assert runs.off_plane[0, 0] == 0.0
    assert runs.off_plane[0, runs.stop_step[0]] == pytest.approx(3.0, abs=1e-3)


def test_default_plane_and_one_parameter_problems():
    runs = descend(Problem(lambda p: (p - 2.0) ** 2, 0.0), 0.0, learning_rate=0.1, steps=200)
    assert runs.plane is None
    assert runs.trajectory(0)[-1, 0] == pytest.approx(2.0, abs=1e-3)
    prob = Problem(lambda p: jnp.sum(p**2), jnp.ones(4))
    assert descend(prob, np.ones(4), steps=3).plane is not None


def test_oscillation_flag_from_the_series(bowl):
    # 2/L = 0.2: at 0.19 the stiff coordinate flips sign every step (zig-zag), at 0.05 not.
    runs = descend(
        bowl,
        np.array([[1.0, 1.0]]),
        learning_rate=[0.05, 0.19],
        steps=60,
        grad_tol=0.0,
        loss_tol=0.0,
    )
    table = runs.table
    assert table.oscillating.tolist() == [False, True]


def test_minibatch_gradients_are_seeded_and_reach_the_fit(rng):
    x = rng.standard_normal((2000, 2)).astype(np.float32)
    w_true = np.array([2.0, -1.0], np.float32)
    y = x @ w_true + 0.01 * rng.standard_normal(2000).astype(np.float32)
    prob = Problem(lambda w, x, y: jnp.mean((x @ w - y) ** 2), jnp.zeros(2), x, y)
    kw = dict(learning_rate=0.05, steps=400, batch_size=32, grad_tol=0.0, loss_tol=0.0)
    r1 = descend(prob, np.zeros(2), seed=1, **kw)
    r2 = descend(prob, np.zeros(2), seed=1, **kw)
    r3 = descend(prob, np.zeros(2), seed=2, **kw)
    np.testing.assert_array_equal(r1.losses, r2.losses)
    assert not np.array_equal(r1.losses, r3.losses)
    # Reference: numpy lstsq on the full data (SGD ends within its noise of it).
    w_ls = np.linalg.lstsq(x, y, rcond=None)[0]
    np.testing.assert_allclose(r1.final[0], w_ls, atol=0.02)
    with pytest.raises(ParameterError, match="batch_size"):
        descend(prob, np.zeros(2), batch_size=5000)


def test_start_constructors(bowl):
    plane = axes_plane(bowl, "theta[0]", "theta[1]")
    grid = grid_starts(plane, span=2.0, resolution=(3, 2))
    assert grid.points.shape == (6, 2)
    np.testing.assert_allclose(grid.points[0], [-2.0, -2.0])
    rs = random_starts(bowl, 5, scale=0.5, seed=3)
    np.testing.assert_array_equal(rs.points, random_starts(bowl, 5, scale=0.5, seed=3).points)
    assert abs(rs.points.std() - 0.5) < 0.4
    with pytest.raises(ParameterError, match="count"):
        random_starts(bowl, 0)
    with pytest.raises(ParameterError, match="scale"):
        random_starts(bowl, 3, scale=-1.0)


def test_initializer_schemes_side_by_side():
    params = {"w": jnp.zeros((3, 4)), "b": jnp.zeros(4)}
    prob = Problem(lambda p: jnp.sum(p["w"] ** 2) + jnp.sum(p["b"] ** 2), params)

    def small(key):
        return {"w": 0.01 * jax.random.normal(key, (3, 4)), "b": jnp.zeros(4)}

    def glorot(key):
        return {"w": jax.nn.initializers.glorot_normal()(key, (3, 4)), "b": jnp.zeros(4)}

    s1, s2 = initializer_starts(prob, small, 6, seed=0), initializer_starts(prob, glorot, 6, seed=0)
    assert s1.points.shape == s2.points.shape == (6, 16)
    assert s1.points.std() < 0.05 < s2.points.std()
    np.testing.assert_array_equal(s1.points, initializer_starts(prob, small, 6, seed=0).points)
    assert s1.spec["name"].endswith("small")

    def wrong(key):
        return {"w": jnp.zeros((4, 3)), "b": jnp.zeros(4)}

    with pytest.raises(ParameterError, match="shape"):
        initializer_starts(prob, wrong, 2)


def test_optax_factory_and_transformation(bowl):
    starts = np.array([[1.0, 1.0]])
    plain = descend(bowl, starts, learning_rate=[0.05, 0.1], steps=50, grad_tol=0.0, loss_tol=0.0)
    # A built transformation with learning rate 1: the run's learning rate scales it.
    sgd = descend(
        bowl,
        starts,
        optimizer=optax.sgd(1.0),
        learning_rate=[0.05, 0.1],
        steps=50,
        grad_tol=0.0,
        loss_tol=0.0,
    )
    np.testing.assert_allclose(sgd.losses, plain.losses, rtol=1e-6)
    # A factory: learning rate and float hyper-parameters become sweepable.
    rule = optax_rule(optax.adamw)
    assert "weight_decay" in rule.hyper
    runs = descend(
        bowl,
        starts,
        optimizer=rule,
        learning_rate=0.05,
        hyper={"weight_decay": [0.0, 0.5]},
        steps=300,
    )
    assert len(runs) == 2
    assert runs.final[0] != pytest.approx(runs.final[1])
    ours = descend(bowl, starts, optimizer="adam", learning_rate=0.05, steps=300)
    np.testing.assert_allclose(runs.final[0], ours.final[0], rtol=1e-5)


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"learning_rate": 0.0}, "learning_rate = 0.0 is out of range.*positive"),
        ({"learning_rate": -0.1}, "positive"),
        ({"learning_rate": [0.1, float("nan")]}, "out of range"),
        ({"steps": 0}, "between 1 and"),
        ({"steps": -5}, "between 1 and"),
        ({"steps": 2.5}, "positive integer"),
        ({"optimizer": "adamax"}, "unknown optimizer 'adamax'"),
        (
            {"optimizer": "momentum", "hyper": {"momentum": 1.0}},
            r"momentum = 1.0 is out of range.*\[0.0, 1.0\)",
        ),
        ({"hyper": {"momentum": 0.5}}, "no hyper-parameter"),
        ({"hyper": {"learning_rate": 0.5}}, "learning_rate=..."),
        ({"grad_tol": -1.0}, "grad_tol"),
        ({"seed": -3}, "seed"),
        ({"min_runs": 0}, "min_runs must be an integer from 1"),
        ({"min_runs": 1.5}, "min_runs must be an integer from 1"),
    ],
)
def test_bad_run_arguments_are_explained(bowl, kwargs, message):
    with pytest.raises(ParameterError, match=message):
        descend(bowl, np.zeros(2), **kwargs)


def test_bad_starts_are_explained(bowl):
    with pytest.raises(ParameterError, match="NaN or inf"):
        descend(bowl, np.array([[np.nan, 0.0]]))
    with pytest.raises(ParameterError, match=r"shape \(S, 2\)"):
        descend(bowl, np.zeros((3, 5)))


def test_padding_runs_changes_nothing_but_the_compiled_shape(bowl):
    starts = np.array([[3.0, -2.0], [0.5, 0.5], [-4.0, 1.0]], np.float32)
    plain = descend(bowl, starts, learning_rate=[0.05, 0.19], steps=60)
    with count_compilations() as padded_compile:
        padded = descend(bowl, starts, learning_rate=[0.05, 0.19], steps=60, min_runs=16)
    assert padded_compile.count == 1  # 6 runs padded to 16: another shape, compiled once
    for name in ("final", "losses", "path", "stop_step", "status"):
        np.testing.assert_array_equal(getattr(padded, name), getattr(plain, name))
    with count_compilations() as reuse:  # 1..16 runs share that program
        for n in (1, 2, 3):
            runs = descend(bowl, starts[:n], learning_rate=0.1, steps=60, min_runs=16)
            assert len(runs) == n
    assert reuse.count == 0


def test_padding_floor_follows_the_cost_of_a_run(bowl):
    assert run_padding_floor(bowl) == 16  # a 2-parameter quadratic: padding is free
    rows = np.random.default_rng(0).standard_normal((200_000, 8)).astype(np.float32)

    def mse(w, x):
        return jnp.mean((x @ w - 1.0) ** 2)

    big = Problem(mse, jnp.zeros(8), rows)
    # Each run writes megabytes per step (200k rows): no padding.
    assert run_padding_floor(big) == 1
    assert run_padding_floor(big, budget_bytes=2**40) == 16


def test_changing_values_never_recompiles():
    prob = Problem(himmelblau, {"x": 0.0, "y": 0.0})
    plane = axes_plane(prob, "x", "y")
    starts = random_starts(prob, 10, scale=3.0, seed=0)
    kw = dict(optimizer="momentum", plane=plane, steps=120)
    descend(prob, starts, learning_rate=[0.001, 0.002], hyper={"momentum": 0.5}, **kw)  # warm-up
    with count_compilations() as counter:
        descend(prob, starts, learning_rate=[0.003, 0.004], hyper={"momentum": 0.9}, **kw)
        descend(
            prob,
            random_starts(prob, 9, scale=2.0, seed=5),
            learning_rate=[0.003, 0.001],
            hyper={"momentum": 0.2},
            **kw,
        )
        descend(
            prob,
            starts,
            learning_rate=[0.003, 0.004],
            hyper={"momentum": 0.9},
            optimizer="momentum",
            plane=plane.with_origin(np.array([1.0, 1.0])),
            steps=100,
        )
        descend(
            prob, starts, learning_rate=[0.003, 0.004], hyper={"momentum": 0.9}, grad_tol=1e-2, **kw
        )
    assert counter.count == 0
    # A new shape (many more runs) does compile: the counter really counts.
    with count_compilations() as counter:
        descend(
            prob,
            random_starts(prob, 100, seed=1),
            learning_rate=[0.001, 0.002],
            hyper={"momentum": 0.5},
            **kw,
        )
    assert counter.count >= 1


def test_surface_values_never_recompile():
    from basinview.core import evaluate_surface

    prob = Problem(himmelblau, {"x": 0.0, "y": 0.0})
    plane = axes_plane(prob, "x", "y")
    evaluate_surface(prob, plane, span=5.0, resolution=60)
    with count_compilations() as counter:
        evaluate_surface(prob, plane, span=2.0, resolution=60)
        evaluate_surface(
            prob,
            plane.with_origin(np.array([1.0, 2.0])),
            span=((0, 1), (2, 3)),
            resolution=(59, 61),
        )
        evaluate_surface(
            prob, random_plane(prob, seed=4, normalise="none"), span=1.0, resolution=60
        )
    assert counter.count == 0

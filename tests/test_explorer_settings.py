"""Explorer.from_settings: a recorded view is rebuilt in full, or the gap is named."""

from __future__ import annotations

import itertools

import numpy as np
import pytest

from basinview import Explorer
from basinview.core import (
    ParameterError,
    Problem,
    Settings,
    axes_plane,
    combine_starts,
    compute_view,
    descend,
    explicit_starts,
    hessian_plane,
    initializer_starts,
    random_starts,
    record_settings,
    starts_from_spec,
)
from basinview.explorer.state import state_from_settings

from .conftest import himmelblau

# Source: Himmelblau, D. M. (1972), Applied Nonlinear Programming (from memory for the
# book); the four minima as in tests/test_reference_minima.py (REFERENCES.md A).
HIMMELBLAU_MINIMA = np.array(
    [
        (3.0, 2.0),
        (-2.8051180870, 3.1313125183),
        (-3.7793102534, -3.2831859913),
        (3.5844283403, -1.8481265270),
    ]
)

RATES = (0.002, 0.005, 0.01)
MOMENTA = (0.5, 0.8)


@pytest.fixture(scope="module")
def problem():
    return Problem(himmelblau, {"x": 0.0, "y": 0.0})


def _record(problem, starts, **kw):
    plane = axes_plane(problem, "x", "y")
    runs = descend(problem, starts, plane=plane, **kw)
    return record_settings(
        problem,
        plane=plane,
        span=((-5.0, 5.0), (-5.0, 5.0)),
        resolution=21,
        starts=starts,
        runs=runs,
    )


@pytest.fixture(scope="module")
def grid_settings(problem):
    starts = combine_starts(
        random_starts(problem, 3, scale=2.5, seed=4),
        explicit_starts(problem, np.array([[2.5, 2.5], [-3.0, -3.0]], np.float32)),
    )
    settings = _record(
        problem,
        starts,
        optimizer="momentum",
        learning_rate=list(RATES),
        hyper={"momentum": list(MOMENTA)},
        steps=600,
        grad_tol=1e-3,
    )
    return Settings.from_json(settings.to_json())


def _by_setting(runs):
    """Final points keyed by (start, learning rate, momentum)."""
    rates, momenta = runs.hyper["learning_rate"], runs.hyper["momentum"]
    return {
        (int(s), float(r), float(m)): runs.final[i]
        for i, (s, r, m) in enumerate(zip(runs.start_index, rates, momenta))
    }


def test_a_recorded_grid_of_rates_and_momenta_is_run_in_full(problem, grid_settings):
    explorer = Explorer.from_settings(problem, grid_settings)
    runs = explorer.results.runs
    assert explorer.state.grid_size == len(RATES) * len(MOMENTA)
    # every setting of the grid, from every start: nothing dropped
    pairs = set(zip(runs.hyper["learning_rate"].tolist(), runs.hyper["momentum"].tolist()))
    expected = {
        (float(np.float32(r)), float(np.float32(m))) for r, m in itertools.product(RATES, MOMENTA)
    }
    assert {(float(np.float32(r)), float(np.float32(m))) for r, m in pairs} == expected
    assert len(runs) == 5 * len(expected)
    # the same runs as the record rebuilt by compute_view (the Explorer pads its batch, so
    # the values may round differently in the last bits)
    rebuilt = compute_view(problem, grid_settings).runs
    mine, theirs = _by_setting(runs), _by_setting(rebuilt)
    assert mine.keys() == theirs.keys()
    for key in mine:
        np.testing.assert_allclose(mine[key], theirs[key], rtol=1e-5, atol=1e-5)
    # converged runs end at one of Himmelblau's published minima
    done = runs.final[runs.status == "converged"]
    assert len(done) >= len(runs) // 2
    dist = np.linalg.norm(done[:, None, :] - HIMMELBLAU_MINIMA[None], axis=-1).min(axis=1)
    assert dist.max() < 2e-3
    # recording the Explorer's view gives the recorded grid back
    again = explorer.record()
    assert again.learning_rate == pytest.approx(grid_settings.learning_rate)
    assert again.hyper["momentum"] == pytest.approx(grid_settings.hyper["momentum"])
    assert (again.grad_tol, again.steps, again.starts) == (1e-3, 600, grid_settings.starts)


def test_moving_a_rate_returns_to_one_setting_other_controls_keep_the_grid(problem, grid_settings):
    explorer = Explorer.from_settings(problem, grid_settings)
    explorer.controls.n_starts.value = 2
    assert explorer.state.grid_size == 6 and len(explorer.results.runs) == 6 * 4
    explorer.controls.learning_rate.value = 0.004
    assert explorer.state.grid == () and explorer.last_error is None
    runs = explorer.results.runs
    np.testing.assert_allclose(runs.hyper["learning_rate"], 0.004, rtol=1e-6)
    assert len(runs) == 4
    assert explorer.record().learning_rate == (pytest.approx(0.004),)
    # a rate given to from_settings replaces the recorded grid as well
    chosen = Explorer.from_settings(problem, grid_settings, learning_rate=0.003)
    assert chosen.state.grid == () and len(chosen.results.runs) == 5


def test_starts_the_controls_cannot_describe_become_clicked_starts(problem):
    # random starts around (1, 1) while the plane passes through the problem's (0, 0)
    starts = combine_starts(
        explicit_starts(problem, np.array([[2.5, 2.5]], np.float32)),
        random_starts(problem, 4, scale=1.0, seed=9, center={"x": 1.0, "y": 1.0}),
    )
    settings = _record(problem, starts, learning_rate=0.01, steps=50)
    with pytest.raises(ParameterError, match="pass problem="):
        state_from_settings(settings)
    explorer = Explorer.from_settings(problem, settings)
    assert explorer.state.n_starts == 0
    np.testing.assert_array_equal(
        explorer.results.starts.points, starts_from_spec(problem, settings.starts).points
    )


def test_what_the_explorer_cannot_show_is_named(problem):
    plane = axes_plane(problem, "x", "y")
    runs = descend(problem, np.array([[1.0, 1.0]], np.float32), plane=plane, steps=20)
    wide = record_settings(
        problem,
        plane=plane,
        span=((-5.0, 5.0), (-4.0, 4.0)),
        resolution=(31, 21),
        starts=explicit_starts(problem, np.array([[1.0, 1.0]], np.float32)),
        runs=runs,
    )
    with pytest.warns(UserWarning, match=r"31 x 21 surface grid.*shows 31 x 31"):
        assert Explorer.from_settings(problem, wide).state.resolution == 31
    exact = hessian_plane(problem, origin={"x": 3.0, "y": 2.0}, method="exact")
    runs = descend(problem, np.array([[1.0, 1.0]], np.float32), plane=exact, steps=20)
    solver = record_settings(
        problem,
        plane=exact,
        span=1.0,
        resolution=11,
        starts=explicit_starts(problem, np.array([[1.0, 1.0]], np.float32)),
        runs=runs,
    )
    with pytest.raises(ParameterError, match="method='exact'.*compute_view"):
        Explorer.from_settings(problem, solver)
    drawn = initializer_starts(problem, lambda key: {"x": 1.0, "y": 1.0}, 2, seed=0, name="ones")
    init = _record(problem, drawn, steps=20)
    with pytest.raises(ParameterError, match="initialiser.*initializers="):
        Explorer.from_settings(problem, init)

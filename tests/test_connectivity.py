"""Connectivity groups: end points joined by low straight segments (core/connectivity.py)."""

from __future__ import annotations

import json
import warnings

import jax.numpy as jnp
import numpy as np
import plotly.graph_objects as go
import pytest
from statsmodels.stats.proportion import proportion_confint

from basinview import core
from basinview.core.connectivity import connect_runs
from basinview.core.errors import MinimaWarning, ParameterError
from basinview.core.segments import segment_barriers
from basinview.figures.groups import solutions_figure


def ring(p):
    return (p[0] ** 2 + p[1] ** 2 - 1.0) ** 2


def wells(p):
    return (p[0] ** 2 - 1.0) ** 2 + p[1] ** 2


def on_ring(angles, radius=1.0):
    return radius * np.stack([np.cos(angles), np.sin(angles)], axis=1)


@pytest.fixture(scope="module")
def ring_problem():
    return core.Problem(ring, jnp.zeros(2))


def test_chord_barrier_matches_formula(ring_problem):
    # Source: the formula. On the chord between ring points at angles 0 and d the
    # radius is smallest at the midpoint, cos(d / 2), so the largest loss there is
    # (cos(d/2)^2 - 1)^2 = sin(d/2)^4 above end losses of 0.
    d = np.array([0.2, 0.8, 1.6, np.pi])
    starts, ends = on_ring(np.zeros_like(d)), on_ring(d)
    barrier, l0, l1 = segment_barriers(ring_problem, starts, ends, samples=17)
    np.testing.assert_allclose(barrier, np.sin(d / 2) ** 4, rtol=1e-4, atol=1e-6)
    np.testing.assert_allclose(l0, 0.0, atol=1e-6)
    np.testing.assert_allclose(l1, 0.0, atol=1e-6)


def test_ring_is_one_group_chained(ring_problem):
    # Source: the formula. Every point of the circle x^2 + y^2 = 1 is a minimum
    # (loss 0) and the circle is connected, but a chord between far points rises to
    # sin(d/2)^4 (1 across a diameter): only chains of short chords stay low.
    angles = np.random.default_rng(0).uniform(0.0, 2 * np.pi, 120)
    tol = np.sin(0.6 / 2) ** 4  # chords up to 0.6 rad count as connected
    sol = connect_runs(ring_problem, on_ring(angles), tolerance=tol, block=16)
    assert len(sol) == 1 and sol.count.tolist() == [120]
    assert sol.representatives[0] > 1  # joined by a chain, not one star around one point
    assert sol.barrier_inside[0] <= tol
    assert sol.table.loc[0, "copies"] == 1


def test_two_wells_are_two_groups_with_the_formula_barrier():
    # Source: the formula. f = (x^2 - 1)^2 + y^2 has minima (+-1, 0) with f = 0;
    # on the segment between them f peaks at (0, 0) with f = 1.
    prob = core.Problem(wells, jnp.zeros(2))
    rng = np.random.default_rng(1)
    left = np.array([-1.0, 0.0]) + 0.01 * rng.normal(size=(10, 2))
    right = np.array([1.0, 0.0]) + 0.01 * rng.normal(size=(14, 2))
    sol = connect_runs(prob, np.vstack([left, right]), tolerance=0.05)
    assert len(sol) == 2
    assert sorted(sol.count.tolist()) == [10, 14]
    assert len(set(sol.label[:10].tolist())) == 1 and len(set(sol.label[10:].tolist())) == 1
    assert sol.label[0] != sol.label[10]
    assert sol.barrier[0, 1] == sol.barrier[1, 0]
    assert 0.9 < sol.barrier[0, 1] <= 1.0 + 1e-3
    table = sol.table
    assert table["nearest_group"].tolist() == [sol.names[1], sol.names[0]]
    assert sol.barrier_table.shape == (2, 2)
    # Source: statsmodels proportion_confint(method="wilson") for the shares' intervals
    for j in range(2):
        lo, hi = proportion_confint(int(sol.count[j]), 24, method="wilson")
        assert sol.share_low[j] == pytest.approx(lo, abs=1e-12)
        assert sol.share_high[j] == pytest.approx(hi, abs=1e-12)
    fig = solutions_figure(sol)
    go.Figure(fig.to_dict())  # full plotly validation of the unvalidated build
    heat = fig.data[0]
    assert heat.type == "heatmap" and heat.text[0][1] == f"{sol.barrier[0, 1]:.3g}"
    assert [t.name.split(":")[0] for t in fig.data[1:]] == list(sol.names)


def test_names_stay_and_programs_are_reused(ring_problem):
    # common practice: values that vary between calls are traced data, so a second
    # grouping of other end points (same counts) compiles nothing new.
    prob = core.Problem(wells, jnp.zeros(2))
    rng = np.random.default_rng(2)
    pts = np.vstack([[1.0, 0.0] + 0.01 * rng.normal(size=(26, 2)), [[-1.0, 0.0]] * 15])
    first = connect_runs(prob, pts, tolerance=0.05)
    # a later call compares with the registered representatives first: other pair
    # counts, so warm those call sizes once, then change only values
    connect_runs(prob, pts[::-1][:33] + 0.001 * rng.normal(size=(33, 2)), tolerance=0.05)
    shuffled = pts[::-1][:33] + 0.001 * rng.normal(size=(33, 2))
    with core.count_compilations() as c:
        second = connect_runs(prob, shuffled, tolerance=0.05)
    assert c.count == 0
    # the group of (1, 0) keeps its name although it now comes second in the input
    assert second.names[second.label[-1]] == first.names[first.label[0]]
    assert set(second.names) == set(first.names)
    assert sorted(second.colour_index.tolist()) == [0, 1]


def test_a_fixed_call_size_compiles_one_program_for_any_count():
    # common practice: padding requests to one shape reuses one compiled program
    prob = core.Problem(wells, jnp.zeros(2))
    rng = np.random.default_rng(5)
    pts = np.vstack([[1.0, 0.0] + 0.01 * rng.normal(size=(20, 2)), [[-1.0, 0.0]] * 10])
    default = connect_runs(prob, pts, tolerance=0.05)
    fixed = connect_runs(prob, pts, tolerance=0.05, call_size=16)
    np.testing.assert_array_equal(fixed.label, default.label)
    np.testing.assert_allclose(fixed.barrier, default.barrier, rtol=1e-6)
    counts = []
    for k in (3, 11, 30):  # other end point counts: other pair counts
        with core.count_compilations() as c:
            connect_runs(prob, pts[:k] + 1e-4, tolerance=0.05, call_size=16)
        counts.append(c.count)
    assert counts == [0, 0, 0]
    with pytest.raises(ParameterError, match="call_size"):
        segment_barriers(prob, [[0.0, 0.0]], [[1.0, 0.0]], call_size=0)


def test_the_registry_stays_bounded_and_says_when_it_is_full(monkeypatch):
    # common practice: a cache that lives as long as the session must be bounded
    from basinview.core import solutions

    monkeypatch.setattr(solutions, "MAX_REPRESENTATIVES", 3)
    # four wells at (+-1, +-1), a barrier of 1 between neighbours (from the formula)
    prob = core.Problem(lambda p: (p[0] ** 2 - 1) ** 2 + (p[1] ** 2 - 1) ** 2, jnp.zeros(2))
    reg = solutions.solution_groups(prob)
    with pytest.warns(MinimaWarning, match="connected"):
        connect_runs(prob, np.array([[1.0, 1.0], [-1.0, 1.0]]), tolerance=0.05)
    assert len(reg.points) == 2
    with pytest.warns(MinimaWarning) as caught:
        connect_runs(prob, np.array([[1.0, -1.0], [-1.0, -1.0]]), tolerance=0.05)
    assert any("full" in str(w.message) and "1 new solution is" in str(w.message) for w in caught)
    assert len(reg.points) == 3 and reg.full


def test_runs_from_descent_and_outcome_labels():
    prob = core.Problem(wells, jnp.zeros(2))
    starts = np.array([[-2.0, 0.5], [-0.5, -0.3], [0.4, 0.2], [1.8, -0.4], [1e3, 0.0]])
    runs = core.descend(prob, starts, learning_rate=0.05, steps=200)
    assert runs.status[-1] == "diverged"
    sol = connect_runs(prob, runs)
    assert sol.label[-1] == core.DIVERGED_LABEL
    assert len(set(sol.label[:2].tolist())) == 1 and sol.label[0] != sol.label[3]
    assert sol.run_table["group"].iloc[-1] == "diverged"
    assert np.isnan(sol.run_barrier[-1])


def test_warns_when_nothing_connects():
    prob = core.Problem(wells, jnp.zeros(2))
    with pytest.warns(MinimaWarning, match="curved_path"):
        sol = connect_runs(prob, np.array([[-1.0, 0.0], [1.0, 0.0]]), tolerance=1e-3)
    assert len(sol) == 2


@pytest.mark.parametrize(
    "kwargs, match",
    [
        ({"tolerance": -1.0}, "tolerance must be"),
        ({"samples": 2}, "samples"),
        ({"block": 0}, "block"),
    ],
)
def test_bad_arguments(ring_problem, kwargs, match):
    with pytest.raises(ParameterError, match=match):
        connect_runs(ring_problem, on_ring(np.zeros(2)), **kwargs)


def test_bad_points(ring_problem):
    with pytest.raises(ParameterError, match="shape"):
        connect_runs(ring_problem, np.zeros((3, 5)), tolerance=0.1)
    with pytest.raises(ParameterError, match="all zero"):
        connect_runs(ring_problem, on_ring(np.zeros(2)))


def test_grouping_benchmark_runs_at_smoke_size(tmp_path):
    from benchmarks.grouping import main

    out = tmp_path / "grouping.json"
    with warnings.catch_warnings():  # a few barely trained runs may all stand apart
        warnings.simplefilter("ignore", MinimaWarning)
        assert main(["--runs", "6", "--steps", "5", "--hidden", "3", "--out", str(out)]) == 0
    info = json.loads(out.read_text())
    assert info["parameters"] == 8 * 3 + 3 + 3 + 1 and info["runs"] == 6
    assert info["ratio"] > 0 and info["groups"] >= 1

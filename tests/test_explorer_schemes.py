"""The Explorer's scheme selector and its solutions by connectivity (Python side, no browser).

The model is a double well, ``(x^2 - 1)^2 + y^2 / 2``: minima at ``(-1, 0)`` and
``(1, 0)`` (closed form: the gradient ``(4x(x^2 - 1), y)`` vanishes there and the
Hessian ``diag(8, 1)`` is positive definite), a saddle at the origin, and a loss of
1 halfway between the minima, so a straight segment between the wells rises by 1.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from statsmodels.stats.proportion import proportion_confint

from basinview import Explorer
from basinview.core import (
    ParameterError,
    Problem,
    Settings,
    compare_schemes,
    count_compilations,
    random_starts,
    run_padding_floor,
)
from basinview.explorer.schemes import ALL_SCHEMES, CLICKED, same_level_note, uses_connectivity
from basinview.explorer.views import comparison_table


def double_well(p):
    return (p[0] ** 2 - 1.0) ** 2 + 0.5 * p[1] ** 2


def _schemes(problem):
    return {
        "left": random_starts(problem, 6, scale=0.3, center=np.array([-1.2, 0.5])),
        "right": random_starts(problem, 6, scale=0.3, center=np.array([1.2, 0.5]), seed=1),
        "wide": np.array([[0.4, 1.0], [-0.4, -1.0], [1.6, 0.2], [-1.6, -0.2]]),
    }


# Few steps: the runs end near, not at, the minima (so "auto" groups by connectivity).
SHORT = {"learning_rate": 0.02, "steps": 30}
# Enough steps to converge (the curvature is at most 8 at the minima: 0.1 is stable).
LONG = {"learning_rate": 0.1, "steps": 150}


def _explorer(problem, **kw):
    return Explorer(
        problem,
        schemes=_schemes(problem),
        background=False,
        span=((-2.0, 2.0), (-1.5, 1.5)),
        resolution=9,
        **{**SHORT, **kw},
    )


@pytest.fixture(scope="module")
def problem():
    return Problem(double_well, np.zeros(2, np.float32))


@pytest.fixture(scope="module")
def explorer(problem):
    return _explorer(problem)


def _click(explorer, a, b):
    explorer.main.receive(explorer.main, {"kind": "click", "x": a, "y": b, "uid": "slice-surface"})


def _ok(explorer):
    assert "⚠" not in explorer.status.value, explorer.status.value


def test_the_selector_changes_the_starts_and_the_runs_carry_their_scheme(explorer, problem):
    schemes = explorer.computer.schemes
    assert list(schemes) == ["left", "right", "wide"]
    assert explorer.controls.scheme.options == ("left", "right", "wide", ALL_SCHEMES)
    assert explorer.controls.scheme.layout.display is None  # shown with schemes
    assert explorer.controls.n_starts.layout.display == "none"  # the random draw is not used
    for name in ("right", "wide", "left"):
        explorer.controls.scheme.value = name
        _ok(explorer)
        runs = explorer.results.runs
        np.testing.assert_array_equal(explorer.results.starts.points, schemes[name].points)
        assert runs.scheme.tolist() == [name] * len(schemes[name])
        assert f"scheme {name}" in explorer.status.value
    # A click joins as a scheme of its own.
    _click(explorer, 0.5, 0.5)
    _ok(explorer)
    assert explorer.results.runs.scheme.tolist() == ["left"] * 6 + [CLICKED]
    explorer.controls.clear_clicks.click()
    assert explorer.results.runs.scheme.tolist() == ["left"] * 6


def test_all_schemes_shows_every_scheme_with_paths_told_apart_by_scheme(explorer):
    explorer.controls.scheme.value = ALL_SCHEMES
    _ok(explorer)
    runs = explorer.results.runs
    assert runs.scheme.tolist() == ["left"] * 6 + ["right"] * 6 + ["wide"] * 4
    assert "(left 6, right 6, wide 4)" in explorer.status.value
    # one path trace per scheme, named after it, in the scheme figures' colours
    traces = {t["uid"]: t for t in explorer.main.figure_data()}
    names = [traces[f"slice-path-sc{i}"]["name"] for i in range(3)]
    assert names == ["left (6 runs)", "right (6 runs)", "wide (4 runs)"]
    cmp = explorer.scheme_comparison()
    from basinview.figures import scheme_colours

    colours = scheme_colours(cmp)
    assert [traces[f"slice-path-sc{i}"]["line"]["color"] for i in range(3)] == [
        colours[n] for n in ("left", "right", "wide")
    ]


def test_connectivity_groups_name_the_wells_and_keep_their_names(explorer):
    explorer.set(scheme="wide", grouping="auto", **SHORT)
    _ok(explorer)
    runs, sol = explorer.results.runs, explorer.results.solutions
    assert not (runs.status == "converged").any()  # near, not at, the minima
    assert uses_connectivity("auto", runs) and sol is not None
    # Starts on either side of the saddle end in the two wells: two groups.
    side = np.sign(runs.final[:, 0])
    names = np.asarray(sol.names)[sol.label]
    assert len(sol) == 2 and len(set(names[side < 0])) == 1 and len(set(names[side > 0])) == 1
    left, right = names[side < 0][0], names[side > 0][0]
    assert {left, right} == set(sol.names) and all(n[0] == "S" for n in sol.names)
    # the straight segment between the wells rises by about 1 (the loss at the saddle)
    assert sol.barrier[0, 1] == pytest.approx(1.0, abs=0.1)
    assert "solutions by connectivity" in explorer.status.value
    legend = [t["name"] for t in explorer.main.figure_data() if t.get("showlegend", True)]
    assert any(n.startswith(f"{left}: 2 runs") for n in legend), legend
    assert any(n.startswith(f"{right}: 2 runs") for n in legend), legend
    # Another learning rate: the same wells keep their names.
    explorer.controls.learning_rate.value = 0.03
    _ok(explorer)
    sol2, runs2 = explorer.results.solutions, explorer.results.runs
    names2 = np.asarray(sol2.names)[sol2.label]
    side2 = np.sign(runs2.final[:, 0])
    assert set(names2[side2 < 0]) == {left} and set(names2[side2 > 0]) == {right}


def test_groups_at_one_loss_suggest_declaring_the_symmetry():
    from basinview.core import connect_runs
    from basinview.core.symmetries import sign_flip

    # a problem of its own: grouping registers names on the problem it is given
    problem = Problem(double_well, np.zeros(2, np.float32))

    # (x^2 - 1)^2 + y^2 / 2 is even in x: its wells at x = -1 and x = +1 are copies
    # (computed from the formula), joined by no low straight segment.
    ends = np.array([[-1.0, 0.0], [-0.999, 0.001], [1.0, 0.0], [1.001, -0.001]])
    plain = connect_runs(problem, ends, tolerance=0.05)
    assert len(plain) == 2
    note = same_level_note(plain)
    assert "same lowest loss" in note and "symmetries" in note
    merged = connect_runs(problem, ends, tolerance=0.05, symmetries=[sign_flip([[0]])])
    assert len(merged) == 1 and same_level_note(merged) == ""


def test_the_comparison_is_compare_schemes_on_the_same_starts(explorer, problem):
    explorer.set(scheme=ALL_SCHEMES, grouping="critical points", **LONG)
    _ok(explorer)
    # Critical points: no groups by connectivity; the runs converged, so letters.
    assert explorer.results.solutions is None and explorer.results.minima is not None
    assert "critical points" in explorer.status.value
    assert "solutions by connectivity" not in explorer.status.value
    ours = explorer.scheme_comparison()
    theirs = compare_schemes(
        problem,
        _schemes(problem),
        **LONG,
        plane=explorer.results.plane,
        sharpness=False,
        min_runs=run_padding_floor(problem),
    )
    assert ours.schemes == theirs.schemes == ("left", "right", "wide")
    pd.testing.assert_frame_equal(ours.summary, theirs.summary)
    pd.testing.assert_frame_equal(ours.shares, theirs.shares)
    # each scheme's well: left ends at (-1, 0), right at (1, 0) (closed form)
    minima = explorer.results.minima
    at = {lab: p for lab, p in zip(minima.labels, np.asarray(minima.points))}
    top = ours.summary.set_index("scheme")["top_solution"]
    np.testing.assert_allclose(at[top["left"]], [-1.0, 0.0], atol=1e-3)
    np.testing.assert_allclose(at[top["right"]], [1.0, 0.0], atol=1e-3)
    # The side view's table reads those tables: 6 of 6 runs and its Wilson interval.
    # Source: statsmodels.stats.proportion.proportion_confint(method="wilson"); the
    # interval itself is checked against it in tests/test_intervals.py.
    low, high = proportion_confint(6, 6, alpha=0.05, method="wilson")
    assert high == pytest.approx(1.0)
    table = comparison_table(ours).set_index("scheme")
    assert table.at["left", f"share {top['left']}"] == f"100% ({low * 100:.0f}%–100%)"
    explorer.view.value = "schemes"
    assert "share" in explorer.table.value and "<NA>" not in explorer.table.value
    assert [t["uid"] for t in explorer.side.figure_data()][:3] == [
        "schemes-shares-0",
        "schemes-shares-1",
        "schemes-shares-2",
    ]
    explorer.view.value = "relief"


def test_the_chosen_scheme_is_recorded_and_read_back(explorer, problem):
    explorer.set(scheme="right", grouping="auto", **SHORT)
    _click(explorer, 0.5, -0.5)
    settings = Settings.from_json(explorer.record("right well").to_json(), problem=problem)
    assert [s["name"] for s in settings.schemes] == ["right", CLICKED]
    again = Explorer.from_settings(problem, settings, background=False)
    assert again.state.scheme == "right" and list(again.computer.schemes) == ["right"]
    np.testing.assert_array_equal(again.results.starts.points, explorer.results.starts.points)
    np.testing.assert_array_equal(again.results.runs.final, explorer.results.runs.final)
    assert again.results.runs.scheme.tolist() == ["right"] * 6 + [CLICKED]
    # with the caller's schemes: every scheme offered, the recorded one shown
    offered = Explorer.from_settings(problem, settings, schemes=_schemes(problem), background=False)
    assert offered.state.scheme == "right"
    assert offered.controls.scheme.options == ("left", "right", "wide", ALL_SCHEMES)
    other = {**_schemes(problem), "right": random_starts(problem, 6, scale=0.3, seed=7)}
    with pytest.raises(ParameterError, match="not the one recorded"):
        Explorer.from_settings(problem, settings, schemes=other, background=False)
    # all schemes side by side
    explorer.controls.clear_clicks.click()
    explorer.controls.scheme.value = ALL_SCHEMES
    recorded = Explorer.from_settings(problem, explorer.record(), background=False)
    assert recorded.state.scheme == ALL_SCHEMES
    assert recorded.results.runs.scheme.tolist() == explorer.results.runs.scheme.tolist()


def test_no_compilation_on_a_learning_rate_change_with_schemes_and_connectivity(explorer):
    explorer.set(scheme=ALL_SCHEMES, grouping="connectivity", **SHORT)
    c = explorer.controls
    c.learning_rate.value = 0.03  # warm-up: the segment calls' sizes after the first view
    c.learning_rate.value = 0.015
    with count_compilations() as counter:
        for rate in (0.025, 0.018, 0.022):
            before = explorer.results.solutions
            c.learning_rate.value = rate
            _ok(explorer)
            assert explorer.results.solutions is not before  # grouped again
            assert explorer.results.runs.hyper["learning_rate"][0] == pytest.approx(rate)
    assert counter.count == 0
    assert len(explorer.results.solutions) == 2
    assert "solutions by connectivity" in explorer.status.value

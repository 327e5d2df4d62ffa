"""Stable letters and colours of critical points, and honest minima tables."""

from __future__ import annotations

import jax.numpy as jnp
import numpy as np
import pytest
import scipy.optimize

from basinview import core
from basinview import figures as F
from basinview.core import (
    MAX_STEPS_LABEL,
    NOT_STATIONARY_LABEL,
    MinimaWarning,
    NoCriticalPointError,
    Problem,
    axes_plane,
    basin_map,
    critical_points,
    descend,
    find_minima,
)
from basinview.core.identities import CriticalPointRegistry, letter
from basinview.figures.style import category_colour

from .conftest import himmelblau


def tilted_wells(p):
    # two wells at about x = +1 and x = -1; the one at -1 is lower (tilt 0.1 x)
    return (p[0] ** 2 - 1) ** 2 + 0.1 * p[0] + p[1] ** 2


# ------------------------------------------------------------------ the registry


def test_letters_run_a_to_z_then_aa():
    assert [letter(i) for i in range(3)] == ["A", "B", "C"]
    assert letter(25) == "Z" and letter(26) == "AA" and letter(27) == "AB"
    assert letter(26 + 26 * 26 - 1) == "ZZ" and letter(26 + 26 * 26) == "AAA"
    # one name per index: no two indices share a letter
    names = [letter(i) for i in range(800)]
    assert len(set(names)) == 800


@pytest.mark.parametrize("unit", [1e-3, 1.0, 1e3])
def test_matching_follows_the_parameter_scale(unit):
    reg = CriticalPointRegistry(2, np.float64)
    first = reg.identify(np.array([[1.0, 0.0], [0.0, 1.0]]) * unit)
    assert first.tolist() == [0, 1]
    # the same points, moved by a millionth of their size, keep their letters ...
    again = reg.identify(np.array([[0.0, 1.0], [1.0, 0.0]]) * unit * (1 + 1e-6))
    assert again.tolist() == [1, 0]
    # ... and a point a tenth of the unit away is a new one, at every scale
    new = reg.identify(np.array([[1.1, 0.0]]) * unit)
    assert new.tolist() == [2] and reg.letters == ["A", "B", "C"]


def test_one_result_never_shows_a_letter_twice():
    reg = CriticalPointRegistry(1, np.float32)
    reg.identify(np.array([[1.0]]))
    both = reg.identify(np.array([[1.0], [1.0 + 1e-5]]))
    assert sorted(both.tolist()) == [0, 1]


def test_the_registry_is_kept_with_the_problem():
    a = Problem(tilted_wells, jnp.zeros(2))
    b = Problem(tilted_wells, jnp.zeros(2))
    assert critical_points(a) is critical_points(a)
    assert critical_points(a) is not critical_points(b)


# ------------------------------------------------------------------ stable across calls


def test_a_new_start_that_finds_another_minimum_does_not_rename_a(x64):
    prob = Problem(tilted_wells, jnp.zeros(2))
    near_right = np.array([[0.8, 0.3], [1.3, -0.2], [1.1, 0.5]])
    runs = descend(prob, near_right, learning_rate=0.05, steps=3000)
    first = find_minima(prob, runs)
    assert first.labels == ["A"]
    # the wells are the real roots of d/dx = 4x^3 - 4x + 0.1 (derived from the definition)
    wells = np.sort(np.roots([4.0, 0.0, -4.0, 0.1]).real)[[0, 2]]
    np.testing.assert_allclose(first.points[0], [wells[1], 0.0], atol=1e-6)
    # a clicked start finds the lower mirror well: it becomes B, A stays A
    more = descend(prob, np.vstack([near_right, [[-1.2, 0.4]]]), learning_rate=0.05, steps=3000)
    second = find_minima(prob, more)
    assert sorted(second.labels) == ["A", "B"]
    rows = dict(zip(second.labels, second.points))
    np.testing.assert_allclose(rows["A"], first.points[0], atol=1e-8)
    np.testing.assert_allclose(rows["B"], [wells[0], 0.0], atol=1e-6)
    # rows stay ordered by loss (the lower well first), letters by when they were found
    assert second.labels == ["B", "A"] and second.loss[0] < second.loss[1]
    assert second.colour_index.tolist() == [1, 0]
    # the first result again, after the second: still A
    assert find_minima(prob, runs).labels == ["A"]


def test_same_letter_in_basin_map_find_minima_and_figures(x64):
    prob = Problem(himmelblau, {"x": 0.0, "y": 0.0})
    plane = axes_plane(prob, "x", "y")
    starts = np.array([[3.5, -1.0], [-3.0, -3.0]])
    runs = descend(prob, starts, learning_rate=0.01, steps=2000, plane=plane)
    minima = find_minima(prob, runs)
    bm = basin_map(prob, plane, span=5.0, resolution=9, learning_rate=0.01, steps=2000)
    assert len(bm.minima) == 4
    # the two points found first keep their letters in the basin map
    for name, point in zip(minima.labels, minima.points):
        k = bm.minima.labels.index(name)
        np.testing.assert_allclose(bm.minima.points[k], point, atol=1e-6)
    # a letter means one location in both results
    for k, name in enumerate(bm.minima.labels):
        if name in minima.labels:
            j = minima.labels.index(name)
            assert bm.minima.colour_index[k] == minima.colour_index[j]
    # the figures read letters and colours from the results
    slice_fig = F.slice_figure(
        core.evaluate_surface(prob, plane, span=5.0, resolution=11), runs, minima=minima
    )
    basin_fig = F.basin_figure(bm)
    slice_colours = {
        t.name.split(":")[0]: t.line.color
        for t in slice_fig.data
        if t.uid.startswith("slice-path-m")
    }
    basin_colours = {
        t.name.split(":")[0]: t.marker.color
        for t in basin_fig.data
        if t.uid.startswith("basins-key-m")
    }
    assert set(slice_colours) == set(minima.labels)
    for name, colour in slice_colours.items():
        assert basin_colours[name] == colour
        k = minima.labels.index(name)
        assert colour == category_colour(int(minima.colour_index[k]))
    marks = next(t for t in basin_fig.data if t.uid == "basins-critical-points")
    assert list(marks.text) == bm.minima.labels
    # basin shares name the same letters
    assert set(bm.shares.point) >= set(bm.minima.labels)


def test_explorer_click_on_the_mirror_minimum_keeps_a(x64):
    from basinview.explorer import Explorer

    prob = Problem(tilted_wells, jnp.array([1.0, 0.0]))
    ex = Explorer(
        prob,
        span=2.0,
        resolution=21,
        n_starts=4,
        start_scale=0.2,
        learning_rate=0.05,
        steps=1500,
        origin=[1.0, 0.0],
    )
    before = ex.results.minima
    assert before.labels == ["A"] and before.points[0][0] > 0
    ex.add_start(-1.0, 0.2)
    after = ex.results.minima
    assert ex.last_error is None
    rows = dict(zip(after.labels, after.points))
    assert sorted(rows) == ["A", "B"]
    np.testing.assert_allclose(rows["A"], before.points[0], atol=1e-6)
    assert rows["B"][0] < 0
    names = [t.get("name") or "" for t in ex.main.figure_data()]
    legend = [n for n in names if n.startswith(("A:", "B:"))]
    assert any(n.startswith("A:") for n in legend) and any(n.startswith("B:") for n in legend)


# ------------------------------------------------------------------ honest tables


def goldstein_price(p):
    x, y = p[0], p[1]
    a = 1 + (x + y + 1) ** 2 * (19 - 14 * x + 3 * x**2 - 14 * y + 6 * x * y + 3 * y**2)
    b = 30 + (2 * x - 3 * y) ** 2 * (18 - 32 * x + 12 * x**2 + 48 * y - 36 * x * y + 27 * y**2)
    return a * b


def six_hump_camel(p):
    x, y = p[0], p[1]
    return (4 - 2.1 * x**2 + x**4 / 3) * x**2 + x * y + (-4 + 4 * y**2) * y**2


# Source: Surjanovic & Bingham, Virtual Library of Simulation Experiments (SFU),
# goldpr.html: the definition on [-2, 2]^2 and the global minimum f(0, -1) = 3.
# The local minima f(-0.6, -0.4) = 30, f(1.8, 0.2) = 84, f(1.2, 0.8) = 840: from memory;
# each is checked below with scipy.optimize (reference minimiser) and by its value.
GOLDSTEIN_PRICE_MINIMA = [
    ((0.0, -1.0), 3.0),
    ((-0.6, -0.4), 30.0),
    ((1.8, 0.2), 84.0),
    ((1.2, 0.8), 840.0),
]
# Source: Surjanovic & Bingham, Virtual Library of Simulation Experiments (SFU),
# camel6.html: the definition and the global minima f(0.0898, -0.7126) =
# f(-0.0898, 0.7126) = -1.0316 (four digits). The four local minima (two mirror pairs,
# f = -0.2155 and 2.1043): from memory, checked below with scipy.optimize.
CAMEL_MINIMA = [
    ((0.0898, -0.7126), -1.0316),
    ((-0.0898, 0.7126), -1.0316),
    ((1.7036, -0.7961), -0.2155),
    ((-1.7036, 0.7961), -0.2155),
    ((1.6071, 0.5687), 2.1043),
    ((-1.6071, -0.5687), 2.1043),
]


@pytest.mark.parametrize(
    ("loss", "published", "box", "rtol"),
    [
        (goldstein_price, GOLDSTEIN_PRICE_MINIMA, ((-2, 2), (-2, 2)), 1e-12),
        (six_hump_camel, CAMEL_MINIMA, ((-3, 3), (-2, 2)), 1e-4),
    ],
)
def test_every_minimum_row_from_an_adam_grid_is_a_published_minimum(
    x64, loss, published, box, rtol
):
    # the published values first, against scipy's minimiser from each published point
    for where, value in published:
        ref = scipy.optimize.minimize(lambda v: float(loss(v)), where, method="BFGS", tol=1e-12)
        np.testing.assert_allclose(ref.x, where, atol=1e-3)
        assert ref.fun == pytest.approx(value, rel=rtol, abs=1e-4)
    prob = Problem(loss, jnp.zeros(2))
    (a0, a1), (b0, b1) = box
    grid = np.array([[a, b] for a in np.linspace(a0, a1, 9) for b in np.linspace(b0, b1, 9)])
    runs = descend(prob, grid, optimizer="adam", learning_rate=0.01, steps=300)
    assert np.sum(runs.status == "max_steps") > len(runs) // 2  # mostly unconverged
    minima = find_minima(prob, runs, include_unconverged=True)
    table = minima.table
    assert "grad_norm" in table.columns
    # every row is a stationary point: gradient norm below the tolerance it was held to
    assert np.all(table.grad_norm.to_numpy() <= minima.grad_tol)
    for p in minima.points:
        assert np.linalg.norm(np.asarray(prob.grad(p))) <= 1e-6
    rows = table[table.kind == "minimum"]
    assert len(rows) >= 2
    for i in rows.index:
        point = minima.points[i].astype(float)
        match = [v for w, v in published if np.linalg.norm(point - np.asarray(w)) < 2e-3]
        assert match, (minima.labels[i], point)
        assert minima.loss[i] == pytest.approx(match[0], rel=1e-3, abs=1e-3)
        # scipy started at the row's point stays there (a local minimum)
        ref = scipy.optimize.minimize(lambda v: float(loss(v)), point, method="BFGS", tol=1e-12)
        np.testing.assert_allclose(ref.x, point, atol=1e-5)
    # the global minimum is among them
    best = min(v for _, v in published)
    assert minima.loss[rows.index].min() == pytest.approx(best, abs=1e-4)
    # every run has one outcome: a row, or a named outcome label
    ok = (minima.assignment >= 0) | np.isin(minima.assignment, list(core.OUTCOMES))
    assert ok.all()
    assert minima.outcomes.runs.sum() == len(runs)


def test_end_points_that_are_not_stationary_get_no_row(x64):
    prob = Problem(himmelblau, {"x": 0.0, "y": 0.0})
    runs = descend(prob, np.array([[0.5, 0.5], [-1.0, 1.0]]), learning_rate=0.001, steps=5)
    assert (runs.status == "max_steps").all()
    with pytest.warns(MinimaWarning, match="stationary"):
        raw = find_minima(prob, runs, include_unconverged=True, refine_steps=0)
    assert len(raw) == 0
    assert (raw.assignment == NOT_STATIONARY_LABEL).all()
    assert raw.outcomes.set_index("point").loc["not stationary", "runs"] == 2
    refined = find_minima(prob, runs, include_unconverged=True)
    assert len(refined) >= 1
    assert np.all(refined.grad_norm <= refined.grad_tol)


def test_an_empty_result_warns_names_the_fixes_and_everything_survives():
    prob = Problem(himmelblau, {"x": 0.0, "y": 0.0})
    plane = axes_plane(prob, "x", "y")
    runs = descend(
        prob, np.array([[0.5, 0.5], [-1.0, 1.0]]), learning_rate=0.001, steps=3, plane=plane
    )
    with pytest.warns(MinimaWarning) as record:
        minima = find_minima(prob, runs)
    text = str(record[0].message)
    for fix in ("more steps", "include_unconverged=True", "tolerance"):
        assert fix in text
    assert len(minima) == 0 and minima.points.shape == (0, 2)
    assert (minima.assignment == MAX_STEPS_LABEL).all()
    table = minima.table
    assert len(table) == 0
    assert {"point", "kind", "loss", "grad_norm", "runs", "x", "y"} <= set(table.columns)
    assert minima.outcomes.set_index("point").loc["max_steps", "runs"] == 2
    with pytest.raises(NoCriticalPointError, match="more steps"):
        minima.lowest()
    with pytest.raises(IndexError):  # code written for minima.points[0] keeps working
        minima.lowest()
    surface = core.evaluate_surface(prob, plane, span=3.0, resolution=9)
    for fig in (
        F.slice_figure(surface, runs, minima=minima),
        F.relief_figure(surface, runs, minima=minima),
        F.loss_curves_figure(runs, minima=minima),
    ):
        assert len(fig.data) >= 1
    with pytest.warns(MinimaWarning):
        bm = basin_map(prob, plane, span=3.0, resolution=5, learning_rate=0.001, steps=3)
    assert (bm.label == MAX_STEPS_LABEL).all()
    fig = F.basin_figure(bm)
    assert any("max_steps" in (t.name or "") for t in fig.data)
    assert bm.shares.set_index("point").loc["max_steps", "share"] == 1.0


def test_all_diverged_names_the_learning_rate():
    prob = Problem(himmelblau, {"x": 0.0, "y": 0.0})
    runs = descend(prob, np.array([[4.0, 4.0]]), learning_rate=1.0, steps=50)
    assert (runs.status == "diverged").all()
    with pytest.warns(MinimaWarning, match="learning rate"):
        minima = find_minima(prob, runs)
    assert len(minima) == 0


def test_explorer_shows_an_empty_result_in_its_status_line():
    from basinview.explorer import Explorer

    prob = Problem(tilted_wells, jnp.array([1.0, 0.0]))
    ex = Explorer(prob, span=2.0, resolution=11, n_starts=3, learning_rate=0.001, steps=2)
    assert ex.results.minima is None or len(ex.results.minima) == 0
    assert "no run converged" in ex.status.value and "more steps" in ex.status.value
    assert "max_steps" in ex.status.value and "⚠" not in ex.status.value


def test_hessian_free_refinement_finds_a_saddle_of_a_large_quadratic(x64):
    # More parameters than the dense-Hessian limit: Newton-Krylov steps on Hessian-vector
    # products. Reference: the stationary point A^-1 b of 0.5 x'Ax - b'x, by numpy.linalg.
    from basinview.core.curvature import EXACT_LIMIT
    from basinview.core.stationary import refine_point

    n = EXACT_LIMIT + 50
    rng = np.random.default_rng(3)
    eig = np.concatenate([-rng.uniform(0.5, 1.0, 10), rng.uniform(0.5, 2.0, n - 10)])
    q, _ = np.linalg.qr(rng.standard_normal((n, n)))
    a = (q * eig) @ q.T
    b = rng.standard_normal(n)
    prob = Problem(lambda x, a, b: 0.5 * x @ a @ x - b @ x, jnp.zeros(n), a, b)
    target = np.linalg.solve(a, b)
    out = refine_point(prob, target + 0.3 * rng.standard_normal(n))
    assert out.stationary and out.grad_norm <= 1e-6
    np.testing.assert_allclose(out.point, target, atol=1e-5)
    assert core.classify(prob, out.point).kind == "saddle"


def test_grouping_follows_the_parameter_scale(x64):
    # Two wells at x = +-s with s = 1e-5 (derived from the definition): a tolerance
    # relative to max(1, |p|) would merge them; one relative to the parameters' own size
    # keeps them apart.
    s = 1e-5

    def wells(p):
        return ((p[0] / s) ** 2 - 1) ** 2 + (p[1] / s) ** 2

    prob = Problem(wells, jnp.array([0.5 * s, 0.0]))
    starts = np.array([[0.5, 0.3], [1.5, -0.2], [-0.6, 0.1], [-1.4, 0.4]]) * s
    runs = descend(prob, starts, learning_rate=1e-11, steps=2000)
    assert (runs.status == "converged").all()
    minima = find_minima(prob, runs)
    assert len(minima) == 2
    np.testing.assert_allclose(np.sort(minima.points[:, 0]), [-s, s], rtol=1e-6)
    assert minima.count.tolist() == [2, 2]

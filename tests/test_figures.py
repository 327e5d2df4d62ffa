"""Figures: pure functions from core results to plotly figures.

The figures are checked for what a reader relies on: the traces drawn and
their types, fixed trace ids, the styles of diverged runs, hover data that
match the recorded runs, NaN gaps kept as gaps, and logarithmic levels or
axes where the values span orders of magnitude.
"""

from __future__ import annotations

import re
import subprocess
import sys

import jax.numpy as jnp
import numpy as np
import plotly.graph_objects as go
import pytest

from basinview import core
from basinview import figures as F
from basinview.figures.levels import choose_levels
from basinview.figures.paths import draw_indices
from basinview.figures.style import DIVERGED, MAX_STEPS, NOT_STATIONARY, OKABE_ITO, uid


def bowl(p):
    """Isotropic quadratic: gradient descent is stable for lr < 1 (curvature 2)."""
    return p["x"] ** 2 + p["y"] ** 2


def steep(p):
    """exp(x^2 + y^2): from 1 at the origin to e^8 ~ 2981 at (2, 2)."""
    return jnp.exp(p["x"] ** 2 + p["y"] ** 2)


def log_well(p):
    """Not finite for x <= 0: the surface has a NaN half-plane."""
    return (jnp.log(p["x"]) - 0.5) ** 2 + p["y"] ** 2


@pytest.fixture(scope="module")
def bowl_view():
    prob = core.Problem(bowl, {"x": 0.5, "y": 0.5})
    plane = core.axes_plane(prob, "x", "y", origin={"x": 0.0, "y": 0.0})
    surface = core.evaluate_surface(prob, plane, span=2.0, resolution=21)
    starts = core.explicit_starts(
        prob, np.array([[1.5, 1.0], [-1.0, 1.2], [0.3, -1.4], [-1.2, -0.8]], dtype=np.float32)
    )
    # 0.1 and 0.4 converge; 1.2 diverges (|1 - 2 lr| = 1.4 > 1).
    # Source: stability of gradient descent on a quadratic, lr < 2 / L with L = 2
    # (Nocedal & Wright, Numerical Optimization, 2nd ed., sec. 3.3; common practice).
    runs = core.descend(prob, starts, learning_rate=[0.1, 0.4, 1.2], steps=60, plane=plane)
    return prob, plane, surface, runs


def uids(fig: go.Figure) -> list[str]:
    return [t.uid for t in fig.data]


def segments(trace) -> int:
    """Number of NaN-separated polylines in a trace."""
    x = np.asarray(trace.x, dtype=float)
    ok = np.isfinite(x)
    return int(np.sum(ok[1:] & ~ok[:-1]) + ok[0])


# ------------------------------------------------------------------ style


def test_okabe_ito_palette_values():
    # Source: Okabe, M. & Ito, K. (2008), Color Universal Design, the palette's
    # published RGB values (from memory): orange (230,159,0), sky blue (86,180,233),
    # bluish green (0,158,115), yellow (240,228,66), blue (0,114,178),
    # vermillion (213,94,0), reddish purple (204,121,167).
    rgb = {k: tuple(int(v[i : i + 2], 16) for i in (1, 3, 5)) for k, v in OKABE_ITO.items()}
    assert rgb["orange"] == (230, 159, 0)
    assert rgb["sky blue"] == (86, 180, 233)
    assert rgb["bluish green"] == (0, 158, 115)
    assert rgb["yellow"] == (240, 228, 66)
    assert rgb["blue"] == (0, 114, 178)
    assert rgb["vermillion"] == (213, 94, 0)
    assert rgb["reddish purple"] == (204, 121, 167)
    assert len(set(F.CATEGORY_COLOURS)) == len(F.CATEGORY_COLOURS)


def test_uid_is_safe_for_css_selectors():
    # plotly.js builds element ids from uids; a dot made colour bars pile up.
    assert uid("slice", "path", "lr0.5") == "slice-path-lr0-5"
    assert re.fullmatch(r"[A-Za-z0-9-]+", uid("a b", "c.d", 3))


# ------------------------------------------------------------------ levels


def test_log_levels_for_wide_positive_range():
    lv = choose_levels(np.array([[1e-4, 1.0], [np.nan, 1e4]]))
    assert lv.mode == "log"
    z = lv.apply(np.array([1e-4, 1.0, np.nan, np.inf, 1e4]))
    np.testing.assert_allclose(z[[0, 1, 4]], [-4.0, 0.0, 4.0])
    assert np.isnan(z[2]) and np.isnan(z[3])
    vals, text = lv.ticks(z)
    assert vals[0] == -4.0 and vals[-1] == 4.0 and "1e-4" in text[0]


def test_linear_levels_for_narrow_range_and_forced_modes():
    assert choose_levels(np.array([1.0, 5.0, 900.0])).mode == "linear"  # ratio 900 < 1e3
    assert choose_levels(np.array([1.0, 5.0, 1000.0])).mode == "log"
    assert choose_levels(np.array([1.0, 5.0, 1000.0]), "linear").mode == "linear"
    assert choose_levels(np.array([1.0, 2.0]), "log").mode == "log"
    with pytest.raises(core.BasinviewError, match="levels must be one of"):
        choose_levels(np.array([1.0, 2.0]), "logarithmic")


def test_levels_with_non_positive_values_use_excess_only_when_crowded():
    crowded = np.concatenate([np.zeros(90), np.linspace(-1e-3, 1e-3, 9), [1e4]])
    lv = choose_levels(crowded)
    assert lv.mode == "log-excess" and "min" in lv.title
    z = lv.apply(crowded)
    assert np.all(np.isfinite(z))  # the minimum maps to a finite value, not -inf
    assert choose_levels(np.linspace(-1.0, 1.0, 50)).mode == "linear"


# ------------------------------------------------------------------ slice


def test_slice_figure_traces_and_axes(bowl_view):
    _, _, surface, runs = bowl_view
    fig = F.slice_figure(surface, runs)
    types = [t.type for t in fig.data]
    assert types[0] == "contour"
    assert set(types[1:]) == {"scatter"}
    paths = [t for t in fig.data if t.uid.startswith("slice-path-")]
    # colour by learning rate (no minima): 0.1 and 0.4, plus the diverged group
    assert sorted(t.name for t in paths) == ["diverged", "learning rate 0.1", "learning rate 0.4"]
    assert sum(segments(t) for t in paths) == len(runs)
    assert fig.layout.xaxis.title.text == "x" and fig.layout.yaxis.title.text == "y"
    # isotropic plane (unit axes) over a square span: equal aspect
    assert fig.layout.yaxis.scaleanchor == "x"
    assert fig.data[0].connectgaps is False


def test_slice_figure_uids_are_fixed_and_unique(bowl_view):
    _, _, surface, runs = bowl_view
    first = uids(F.slice_figure(surface, runs))
    second = uids(F.slice_figure(surface, runs))
    assert first == second
    assert all(u and re.fullmatch(r"[A-Za-z0-9-]+", u) for u in first)
    assert len(set(first)) == len(first)


def test_diverged_paths_are_grey_dashed_and_end_in_a_cross(bowl_view):
    _, _, surface, runs = bowl_view
    fig = F.slice_figure(surface, runs)
    by_uid = {t.uid: t for t in fig.data}
    line = by_uid["slice-path-diverged"]
    assert line.line.color == DIVERGED["colour"] and line.line.dash == "dash"
    assert segments(line) == int(np.sum(runs.status == "diverged")) == 4
    end = by_uid["slice-end-diverged"]
    assert end.marker.symbol == DIVERGED["end_symbol"]
    assert "x" in end.marker.symbol
    others = [t for t in fig.data if t.uid.startswith("slice-path-lr")]
    assert all(t.line.color != DIVERGED["colour"] and t.line.dash == "solid" for t in others)


def test_hover_data_match_the_recorded_runs(bowl_view):
    _, _, surface, runs = bowl_view
    fig = F.slice_figure(surface, runs)
    for trace in fig.data:
        if not trace.uid.startswith("slice-path-"):
            continue
        assert "step" in trace.hovertemplate and "off-plane" in trace.hovertemplate
        custom = np.asarray(trace.customdata, dtype=float)
        assert custom.shape == (len(trace.x), 4)
        rows = custom[np.isfinite(custom[:, 0])]
        run, step = rows[:, 0].astype(int), rows[:, 1].astype(int)
        np.testing.assert_array_equal(rows[:, 2], runs.losses[run, step].astype(float))
        np.testing.assert_array_equal(rows[:, 3], runs.off_plane[run, step].astype(float))
        xs = np.asarray(trace.x, dtype=float)[np.isfinite(custom[:, 0])]
        finite = np.isfinite(xs)
        np.testing.assert_allclose(xs[finite], runs.path[run, step, 0][finite], rtol=1e-6)


def test_nan_gaps_stay_gaps():
    prob = core.Problem(log_well, {"x": 1.0, "y": 0.0})
    plane = core.axes_plane(prob, "x", "y", origin={"x": 0.0, "y": 0.0})
    surface = core.evaluate_surface(prob, plane, span=((-1.0, 3.0), (-1.0, 1.0)), resolution=17)
    assert np.isnan(surface.loss).any() and np.isfinite(surface.loss).any()
    fig = F.slice_figure(surface)
    z = np.asarray(fig.data[0].z, dtype=float)
    np.testing.assert_array_equal(np.isnan(z), np.isnan(surface.loss))
    assert fig.data[0].connectgaps is False
    assert "not finite" in fig.layout.title.text
    relief = F.relief_figure(surface)
    np.testing.assert_array_equal(
        np.isnan(np.asarray(relief.data[0].z, dtype=float)), np.isnan(surface.loss)
    )


def test_wide_range_surface_gets_log_levels():
    prob = core.Problem(steep, {"x": 0.0, "y": 0.0})
    plane = core.axes_plane(prob, "x", "y")
    surface = core.evaluate_surface(prob, plane, span=2.0, resolution=15)
    fig = F.slice_figure(surface)
    np.testing.assert_allclose(
        np.asarray(fig.data[0].z, dtype=float), np.log10(surface.loss), rtol=1e-6
    )
    bar = fig.data[0].colorbar
    assert "log" in bar.title.text
    assert list(bar.ticktext) == ["1", "10", "100", "1000"]
    assert F.slice_figure(surface, levels="linear").data[0].colorbar.ticktext is None
    relief = F.relief_figure(surface)
    assert relief.layout.scene.zaxis.type == "log"


def test_max_paths_caps_and_says_so(bowl_view):
    _, _, surface, runs = bowl_view
    fig = F.slice_figure(surface, runs, max_paths=5)
    drawn = sum(segments(t) for t in fig.data if t.uid.startswith("slice-path-"))
    assert drawn == 5
    notes = " ".join(a.text for a in fig.layout.annotations)
    assert f"Showing 5 of {len(runs)} runs" in notes
    full = F.slice_figure(surface, runs)
    assert "Showing" not in " ".join(a.text for a in full.layout.annotations)


def test_which_selects_runs_and_rejects_bad_indices(bowl_view):
    _, _, surface, runs = bowl_view
    fig = F.slice_figure(surface, runs, which=[0, 1])
    paths = [t for t in fig.data if t.uid.startswith("slice-path-")]
    assert sum(segments(t) for t in paths) == 2
    with pytest.raises(core.BasinviewError, match="run indices"):
        F.slice_figure(surface, runs, which=[0, 99])
    with pytest.raises(core.BasinviewError, match="color_by"):
        F.slice_figure(surface, runs, color_by="colour")
    with pytest.raises(core.BasinviewError, match="needs minima"):
        F.slice_figure(surface, runs, color_by="minimum")


def test_long_paths_are_thinned_but_keep_true_steps():
    idx = draw_indices(5001, 300)
    assert idx.size <= 300 and idx[0] == 0 and idx[-1] == 5000
    assert np.all(np.diff(idx) > 0)
    np.testing.assert_array_equal(idx[:75], np.arange(75))
    prob = core.Problem(bowl, {"x": 0.5, "y": 0.5})
    plane = core.axes_plane(prob, "x", "y", origin={"x": 0.0, "y": 0.0})
    surface = core.evaluate_surface(prob, plane, span=1.0, resolution=5)
    runs = core.descend(
        prob,
        np.array([[0.9, 0.9]], np.float32),
        learning_rate=1e-4,
        steps=3000,
        plane=plane,
        grad_tol=0.0,
        loss_tol=0.0,
    )
    assert runs.stop_step[0] == 3000
    fig = F.slice_figure(surface, runs, max_points=100)
    path = next(t for t in fig.data if t.uid.startswith("slice-path-"))
    steps = np.asarray(path.customdata, dtype=float)[:, 1]
    steps = steps[np.isfinite(steps)]
    assert steps.size <= 100 and steps[-1] == 3000


def test_runs_from_another_plane_are_refused(bowl_view):
    prob, _, _, runs = bowl_view
    other = core.random_plane(prob, seed=2, normalise="none")
    other_surface = core.evaluate_surface(prob, other, span=1.0, resolution=5)
    with pytest.raises(core.BasinviewError, match="another plane"):
        F.slice_figure(other_surface, runs)
    with pytest.raises(core.BasinviewError, match="another plane"):
        F.relief_figure(other_surface, runs)
    # An axes plane of the same two parameters around another centre is the same
    # plane in the same coordinates (parameter values): its runs are drawn.
    moved = core.axes_plane(prob, "x", "y", origin={"x": 1.0, "y": 0.0})
    moved_surface = core.evaluate_surface(prob, moved, span=1.0, resolution=5)
    assert moved_surface.a[0] == 0.0 and moved_surface.a[-1] == 2.0
    F.slice_figure(moved_surface, runs)


def test_axes_read_in_parameter_values_on_an_axes_plane():
    prob = core.Problem(bowl, {"x": 0.5, "y": 0.5})
    plane = core.axes_plane(prob, "x", "y", origin={"x": 5.0, "y": -1.0})
    surface = core.evaluate_surface(prob, plane, span=1.0, resolution=5)
    # the surface itself holds parameter values (centre +- span), and the figure
    # shows the same numbers, with no shift
    np.testing.assert_allclose(surface.a, [4.0, 4.5, 5.0, 5.5, 6.0])
    np.testing.assert_allclose(surface.b, [-2.0, -1.5, -1.0, -0.5, 0.0])
    fig = F.slice_figure(surface)
    np.testing.assert_allclose(np.asarray(fig.data[0].x, dtype=float), surface.a)
    np.testing.assert_allclose(np.asarray(fig.data[0].y, dtype=float), surface.b)
    assert list(fig.layout.xaxis.range) == [4.0, 6.0]


def test_slice_caution_when_the_plane_is_a_slice():
    w = jnp.arange(1.0, 6.0)

    def five(p):
        return jnp.sum(w * p**2)

    prob = core.Problem(five, jnp.ones(5))
    plane = core.random_plane(prob, seed=1, normalise="none")
    surface = core.evaluate_surface(prob, plane, span=1.0, resolution=7)
    runs = core.descend(prob, prob.theta0[None, :], learning_rate=0.05, steps=20, plane=plane)
    fig = F.slice_figure(surface, runs)
    notes = " ".join(a.text for a in fig.layout.annotations)
    assert "2-D slice of a 5-parameter loss" in notes and "off-plane distance" in notes
    # random directions are neither orthogonal nor of equal length: no equal aspect
    assert fig.layout.yaxis.scaleanchor is None
    two = core.Problem(bowl, {"x": 0.5, "y": 0.5})
    small = core.evaluate_surface(two, core.axes_plane(two, "x", "y"), span=1.0, resolution=5)
    assert "slice" not in " ".join(a.text for a in F.slice_figure(small).layout.annotations)


# ------------------------------------------------------------------ relief


def test_relief_drapes_paths_at_their_recorded_loss(bowl_view):
    _, _, surface, runs = bowl_view
    fig = F.relief_figure(surface, runs)
    assert fig.data[0].type == "surface"
    paths = [t for t in fig.data if t.type == "scatter3d"]
    assert paths and all(t.uid.startswith("relief-path-") for t in paths)
    for t in paths:
        custom = np.asarray(t.customdata, dtype=float)
        z = np.asarray(t.z, dtype=float)
        ok = np.isfinite(z)
        np.testing.assert_allclose(z[ok], custom[ok, 2])
    assert uids(fig) == uids(F.relief_figure(surface, runs))
    # diverged paths are cut where they leave the drawn box
    div = next(t for t in paths if t.uid == "relief-path-diverged")
    z = np.asarray(div.z, dtype=float)
    assert np.nanmax(z) <= np.nanmax(surface.loss) * 1.05


# ------------------------------------------------------------------ curves


def test_loss_curves_log_axis_for_positive_losses(bowl_view):
    _, _, _, runs = bowl_view
    fig = F.loss_curves_figure(runs, which=np.flatnonzero(runs.status != "diverged"))
    assert fig.layout.yaxis.type == "log"
    assert all(t.type == "scatter" for t in fig.data)
    assert len(fig.data) == 2  # two learning rates
    assert uids(fig) == ["curves-runs-lr0", "curves-runs-lr1"]


def test_loss_curves_handle_non_positive_losses_honestly():
    def shifted(p):
        return p["x"] ** 2 + p["y"] ** 2 - 1.0  # minimum -1

    prob = core.Problem(shifted, {"x": 0.5, "y": 0.5})
    runs = core.descend(
        prob, np.array([[1.0, 1.0], [0.5, -0.5]], np.float32), learning_rate=0.2, steps=50
    )
    fig = F.loss_curves_figure(runs)
    assert fig.layout.yaxis.type == "linear"
    assert "≤ 0" in fig.layout.yaxis.title.text
    excess = F.loss_curves_figure(runs, yscale="excess")
    assert excess.layout.yaxis.type == "log" and "lowest loss" in excess.layout.yaxis.title.text
    y = np.asarray(excess.data[0].y, dtype=float)
    assert np.nanmin(y) > 0
    with pytest.raises(core.BasinviewError, match="positive losses"):
        F.loss_curves_figure(runs, yscale="log")


def test_loss_curves_linear_axis_is_fitted_to_tame_runs(bowl_view):
    _, _, _, runs = bowl_view
    fig = F.loss_curves_figure(runs, yscale="linear")
    tame = runs.losses[runs.status != "diverged"]
    assert fig.layout.yaxis.range[1] < 1.2 * np.nanmax(tame)
    div = next(t for t in fig.data if t.uid == "curves-runs-diverged")
    assert div.line.dash == DIVERGED["dash"]


# ------------------------------------------------------------------ profile


def test_profile_figure_marks_the_barrier():
    def double_well(p):
        return (p["x"] ** 2 - 1.0) ** 2 + p["y"] ** 2

    prob = core.Problem(double_well, {"x": 1.0, "y": 0.0})
    prof = core.segment_profile(prob, {"x": -1.0, "y": 0.0}, {"x": 1.0, "y": 0.0}, resolution=101)
    # Source: analytic, (x^2 - 1)^2 is 0 at x = +-1 and 1 at x = 0 (common practice).
    assert prof.barrier == pytest.approx(1.0, abs=1e-6)
    fig = F.profile_figure(prof, labels=("A", "B"))
    texts = [a.text for a in fig.layout.annotations]
    assert "barrier 1" in texts
    assert any("upper bound" in t for t in texts)
    ends = next(t for t in fig.data if t.uid == "profile-ends")
    assert list(ends.text) == ["A", "B"]
    np.testing.assert_allclose(np.asarray(ends.x, dtype=float), [0.0, 1.0])


# ------------------------------------------------------------------ layering


def test_figures_do_not_import_widgets():
    code = (
        "import sys, basinview.figures;"
        "print(','.join(m for m in ('ipywidgets', 'anywidget') if m in sys.modules))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == ""


def test_outcome_styles_are_distinct():
    styles = [MAX_STEPS, NOT_STATIONARY, DIVERGED]
    for key in ("colour", "dash", "end_symbol", "name"):
        assert len({s[key] for s in styles}) == 3, key
    # one vocabulary: the figures' names are the core's outcome names and the run status
    assert {s["name"] for s in styles} == set(core.OUTCOMES.values())
    assert MAX_STEPS["name"] == "max_steps" and MAX_STEPS["name"] in core.STATUSES
    assert all(s["legend"].startswith(s["name"]) for s in styles)


# ------------------------------------------------------------------ basins


def himmelblau(p):
    return (p["x"] ** 2 + p["y"] - 11) ** 2 + (p["x"] + p["y"] ** 2 - 7) ** 2


@pytest.fixture(scope="module")
def himmelblau_basins():
    prob = core.Problem(himmelblau, {"x": 0.0, "y": 0.0})
    plane = core.axes_plane(prob, "x", "y")
    bm = core.basin_map(prob, plane, span=5.0, resolution=9, learning_rate=0.01, steps=600)
    surface = core.evaluate_surface(prob, plane, span=5.0, resolution=21)
    return prob, plane, bm, surface


def test_basin_figure_finds_the_four_published_minima(himmelblau_basins):
    _, _, bm, surface = himmelblau_basins
    # Source: Himmelblau, D. M. (1972), Applied Nonlinear Programming, McGraw-Hill:
    # four minima with f = 0 at (3, 2), (-2.805118, 3.131312), (-3.779310, -3.283186),
    # (3.584428, -1.848126) (coordinates from memory).
    published = np.array(
        [[3.0, 2.0], [-2.805118, 3.131312], [-3.779310, -3.283186], [3.584428, -1.848126]]
    )
    found = bm.minima.points[np.asarray(bm.minima.kind) == "minimum"].astype(float)
    assert len(found) == 4
    for p in published:
        assert np.min(np.linalg.norm(found - p, axis=1)) < 1e-2
    fig = F.basin_figure(bm, surface=surface)
    heat = fig.data[0]
    assert heat.type == "heatmap" and heat.showscale is False
    keys = [t for t in fig.data if t.uid.startswith("basins-key-")]
    present = sorted(set(np.unique(bm.label).tolist()))
    assert len(keys) == len(present)
    shares = [float(re.search(r"\((\d+)% of starts\)", t.name).group(1)) for t in keys]
    assert sum(shares) == pytest.approx(100, abs=len(keys))  # rounded percentages
    # each cell's colour index points at the legend entry of its label
    z = np.asarray(heat.z, dtype=float).astype(int)
    for code_index, key in enumerate(keys):
        letter = key.name.split(":")[0].split(" (")[0]
        cells = bm.label[z == code_index]
        if letter in bm.minima.labels:
            assert np.all(cells == bm.minima.labels.index(letter))
    assert any(t.uid == "basins-contours" for t in fig.data)
    assert uids(fig) == uids(F.basin_figure(bm, surface=surface))


def test_basin_figure_outcome_cells_are_distinct(himmelblau_basins):
    _, _, bm, _ = himmelblau_basins
    label = bm.label.copy()
    label[0, :3] = core.DIVERGED_LABEL
    label[1, :2] = core.MAX_STEPS_LABEL
    label[2, :1] = core.NOT_STATIONARY_LABEL
    fake = core.BasinMap(bm.plane, bm.a, bm.b, label, bm.minima, bm.runs)
    fig = F.basin_figure(fake)
    keys = {
        t.name.split(" (")[0]: t.marker.color for t in fig.data if t.uid.startswith("basins-key")
    }
    assert keys["diverged"] == DIVERGED["colour"]
    assert keys["max_steps"] == MAX_STEPS["colour"]
    assert keys["not stationary"] == NOT_STATIONARY["colour"]
    minimum_colours = [c for name, c in keys.items() if ":" in name]
    for style in (DIVERGED, MAX_STEPS, NOT_STATIONARY):
        assert style["colour"] not in minimum_colours
    shares = fake.shares.set_index("point")
    assert shares.loc["max_steps", "starts"] == 2 and shares.loc["not stationary", "starts"] == 1
    bad = label.copy()
    bad[2, 2] = 17
    with pytest.raises(core.BasinviewError, match="match no point"):
        F.basin_figure(core.BasinMap(bm.plane, bm.a, bm.b, bad, bm.minima, bm.runs))


def test_slice_colours_paths_by_minimum(himmelblau_basins):
    prob, plane, _, surface = himmelblau_basins
    starts = core.explicit_starts(
        prob, np.array([[1.0, 1.0], [-1.0, 1.0], [-1, -1], [1, -1]], np.float32)
    )
    runs = core.descend(prob, starts, learning_rate=[0.01, 0.05], steps=600, plane=plane)
    minima = core.find_minima(prob, runs)
    fig = F.slice_figure(surface, runs, minima=minima)
    paths = {t.uid: t for t in fig.data if t.uid.startswith("slice-path-")}
    assignment = np.asarray(minima.assignment)
    for k in np.unique(assignment[assignment >= 0]):
        trace = paths[f"slice-path-m{minima.colour_index[k]}"]
        assert trace.name.startswith(minima.labels[k] + ":")
        assert segments(trace) == int(np.sum(assignment == k))
    marks = next(t for t in fig.data if t.uid == "slice-critical-points")
    assert list(marks.text) == list(minima.labels)


# ------------------------------------------------------------------ step size


@pytest.fixture(scope="module")
def bowl_sweep():
    prob = core.Problem(bowl, {"x": 0.5, "y": 0.5})
    starts = core.explicit_starts(
        prob, np.array([[1.5, 1.0], [-1.0, 1.2], [0.3, -1.4]], np.float32)
    )
    rates = [0.01, 0.1, 0.5, 0.9, 0.99, 1.1, 2.0]
    return core.step_size_sweep(prob, starts, learning_rates=rates, steps=100)


def test_step_size_figure_marks_the_predicted_bound(bowl_sweep):
    # Source: gradient descent on a quadratic is stable iff lr < 2 / lambda_max;
    # here the Hessian is 2 I, so the bound is 1 (Nocedal & Wright, Numerical
    # Optimization, 2nd ed., sec. 3.3; common practice).
    assert bowl_sweep.predicted_bound == pytest.approx(1.0, rel=1e-5)
    fig = F.step_size_figure(bowl_sweep, y="steps")
    assert fig.layout.xaxis.type == "log" and fig.layout.xaxis2.type == "log"
    dashed = [s for s in fig.layout.shapes if s.type == "line" and s.line.dash == "dash"]
    assert dashed and all(s.x0 == pytest.approx(1.0, rel=1e-5) for s in dashed)
    texts = {a.text: a for a in fig.layout.annotations}
    label = next(t for t in texts if t.startswith("predicted bound"))
    # annotations on a log axis are placed at log10 of the value
    assert texts[label].x == pytest.approx(0.0, abs=1e-6)
    observed = next(t for t in texts if t.startswith("observed bound"))
    assert texts[observed].x == pytest.approx(np.log10(bowl_sweep.observed_bound))
    bands = [s for s in fig.layout.shapes if s.type == "rect"]
    assert len(bands) == len(bowl_sweep.table)
    regimes = {t.name for t in fig.data if t.uid.startswith("sweep-regime-")}
    assert regimes == set(bowl_sweep.table.regime)
    diverge = next(t for t in fig.data if t.uid == "sweep-regime-diverge")
    assert all("x" in s for s in diverge.marker.symbol)  # no finite value: cross at the top
    shares = [t for t in fig.data if t.uid.startswith("sweep-share-")]
    total = np.sum([np.asarray(t.y, dtype=float) for t in shares], axis=0)
    np.testing.assert_allclose(total, 1.0)
    assert uids(fig) == uids(F.step_size_figure(bowl_sweep, y="steps"))
    with pytest.raises(core.BasinviewError, match="final_loss"):
        F.step_size_figure(bowl_sweep, y="loss")
    # Hover: each rate's stability ratio = rate / (2 / lambda_max) = rate / 1 here.
    shown = {}
    for t in fig.data:
        if t.uid.startswith("sweep-regime-"):
            shown.update(zip(np.asarray(t.x, dtype=float), np.asarray(t.customdata)[:, 1]))
            assert "stability ratio %{customdata[1]}" in t.hovertemplate
    for rate, text in shown.items():
        assert float(text) == pytest.approx(rate, rel=1e-3)


def test_auto_colours_fall_back_when_no_run_reached_a_point(bowl_view):
    prob, plane, surface, _ = bowl_view
    starts = np.array([[1.5, 1.0], [-1.0, 1.2]], np.float32)
    runs = core.descend(prob, starts, learning_rate=[0.01, 0.02], steps=3, plane=plane)
    with pytest.warns(core.MinimaWarning, match="include_unconverged=True"):
        minima = core.find_minima(prob, runs)
    assert len(minima) == 0 and np.all(minima.assignment == core.MAX_STEPS_LABEL)
    fig = F.slice_figure(surface, runs, minima=minima)
    names = sorted(t.name for t in fig.data if t.uid.startswith("slice-path-"))
    assert names == ["learning rate 0.01", "learning rate 0.02"]
    forced = F.slice_figure(surface, runs, minima=minima, color_by="minimum")
    only = [t for t in forced.data if t.uid.startswith("slice-path-")]
    assert [t.name for t in only] == [MAX_STEPS["legend"]]
    assert only[0].line.dash == MAX_STEPS["dash"]


def test_more_groups_than_colours_change_the_end_marker_shape(bowl_view):
    prob, plane, surface, _ = bowl_view
    starts = np.stack([np.linspace(-1.5, 1.5, 23), np.full(23, 1.0)], axis=1).astype(np.float32)
    runs = core.descend(prob, starts, learning_rate=0.1, steps=5, plane=plane)
    fig = F.slice_figure(surface, runs, color_by="start")
    ends = {t.uid: t for t in fig.data if t.uid.startswith("slice-end-s")}
    assert len(ends) == 23
    assert ends["slice-end-s0"].marker.symbol == "circle"
    # the first 21 groups have colours of their own; the 22nd repeats the first, as a square
    assert ends["slice-end-s7"].marker.color != ends["slice-end-s0"].marker.color
    assert ends["slice-end-s21"].marker.symbol == "square"
    assert ends["slice-end-s21"].marker.color == ends["slice-end-s0"].marker.color
    notes = " ".join(a.text for a in fig.layout.annotations)
    assert "23 groups share 21 colours" in notes

"""One coordinate system: what the user types, what results hold and what figures show.

On an axes plane every plane coordinate is a parameter value (spans, grid
starts, clicks, Settings, Surface.a/b, recorded paths, basin maps, figure
axes); on random, Hessian and three-point planes coordinates are offsets and
the axis titles say so.
"""

from __future__ import annotations

import ast
import json
from pathlib import Path

import jax.numpy as jnp
import numpy as np
import pytest

from basinview import core
from basinview import figures as F
from basinview.explorer import Explorer, state_from_settings

from .conftest import himmelblau

# Source: Himmelblau, D. M. (1972), Applied Nonlinear Programming, McGraw-Hill (from memory
# for the book); the four minima (f = 0) as tabulated by secondary references, e.g. Jamil &
# Yang (2013), Int. J. Math. Modelling & Num. Optimisation 4(2):150-194; (3, 2) is exact.
HIMMELBLAU_MINIMA = np.array(
    [
        (3.0, 2.0),
        (-2.8051180870, 3.1313125183),
        (-3.7793102534, -3.2831859913),
        (3.5844283403, -1.8481265270),
    ]
)


def himmelblau_and_z(p):
    """Himmelblau in (x, y) plus (z - 1)^2: a third parameter off the plane."""
    return himmelblau(p) + (p["z"] - 1.0) ** 2


def branin(p):
    # Source: Surjanovic & Bingham, Virtual Library of Simulation Experiments, SFU,
    # branin.html: a = 1, b = 5.1/(4 pi^2), c = 5/pi, r = 6, s = 10, t = 1/(8 pi).
    b, c = 5.1 / (4 * np.pi**2), 5 / np.pi
    x1, x2 = p["x1"], p["x2"]
    return (x2 - b * x1**2 + c * x1 - 6) ** 2 + 10 * (1 - 1 / (8 * np.pi)) * jnp.cos(x1) + 10


def himmelblau_grad(x, y):
    # common practice: the partial derivatives of (x^2 + y - 11)^2 + (x + y^2 - 7)^2
    return (
        4 * x * (x**2 + y - 11) + 2 * (x + y**2 - 7),
        2 * (x**2 + y - 11) + 4 * y * (x + y**2 - 7),
    )


# ------------------------------------------------------------------ span and surface


def test_span_around_a_published_minimum_finds_it_at_its_coordinates(x64):
    # Source: Himmelblau (1972) via Jamil & Yang (2013): minimum f(3, 2) = 0.
    prob = core.Problem(himmelblau_and_z, {"x": 3.0, "y": 2.0, "z": 1.0})
    plane = core.axes_plane(prob, "x", "y")
    assert plane.coordinates == "values" and plane.centre == (3.0, 2.0)
    surface = core.evaluate_surface(prob, plane, span=0.5, resolution=(41, 21))
    assert (surface.a[0], surface.a[-1]) == pytest.approx((2.5, 3.5))
    assert (surface.b[0], surface.b[-1]) == pytest.approx((1.5, 2.5))
    a, b, low = surface.grid_minimum()
    assert (a, b) == pytest.approx((3.0, 2.0), abs=1e-12)
    assert low == pytest.approx(0.0, abs=1e-20)


def test_explicit_ranges_are_parameter_values_wherever_the_origin_is(x64):
    # Source: Himmelblau (1972) via Jamil & Yang (2013); fourth minimum
    # (3.5844283403, -1.8481265270), f = 0. The plane's origin is elsewhere, (3, 2).
    prob = core.Problem(himmelblau_and_z, {"x": 0.0, "y": 0.0, "z": 1.0})
    plane = core.axes_plane(prob, "x", "y", origin={"x": 3.0, "y": 2.0, "z": 1.0})
    surface = core.evaluate_surface(prob, plane, span=((3.3, 3.9), (-2.1, -1.6)), resolution=301)
    a, b, _ = surface.grid_minimum()
    step_a, step_b = 0.6 / 300, 0.5 / 300
    assert abs(a - 3.5844283403) <= step_a / 2 + 1e-12
    assert abs(b - -1.8481265270) <= step_b / 2 + 1e-12


def test_branin_minimum_at_its_published_coordinates(x64):
    # Source: Surjanovic & Bingham, SFU branin.html, three global minima f* = 0.397887 at
    # (-pi, 12.275), (pi, 2.275), (9.42478, 2.475); exact f* = 5/(4 pi) (REFERENCES.md A,
    # verified).
    prob = core.Problem(branin, {"x1": np.pi, "x2": 2.275})
    plane = core.axes_plane(prob, "x1", "x2")
    surface = core.evaluate_surface(prob, plane, span=(0.2, 0.1), resolution=41)
    a, b, low = surface.grid_minimum()
    assert (a, b) == pytest.approx((np.pi, 2.275), abs=1e-12)
    assert low == pytest.approx(5 / (4 * np.pi), rel=1e-12)


def test_span_ranges_reads_half_widths_around_the_centre():
    assert core.span_ranges(0.5, (3.0, 2.0)) == ((2.5, 3.5), (1.5, 2.5))
    assert core.span_ranges((1.0, 2.0), (3.0, 2.0)) == ((2.0, 4.0), (0.0, 4.0))
    assert core.span_ranges(((0.0, 1.0), (5.0, 6.0)), (3.0, 2.0)) == ((0.0, 1.0), (5.0, 6.0))
    with pytest.raises(core.ParameterError, match="centre"):
        core.span_ranges(1.0, (np.nan, 0.0))


# ------------------------------------------------------------------ starts and basins


def test_grid_starts_on_an_axes_plane_are_parameter_values():
    prob = core.Problem(himmelblau_and_z, {"x": 3.0, "y": 2.0, "z": 0.25})
    plane = core.axes_plane(prob, "x", "y")
    starts = core.grid_starts(plane, span=1.0, resolution=3)
    x = np.unique(starts.points[:, prob.index("x")])
    y = np.unique(starts.points[:, prob.index("y")])
    np.testing.assert_allclose(x, [2.0, 3.0, 4.0])
    np.testing.assert_allclose(y, [1.0, 2.0, 3.0])
    np.testing.assert_allclose(starts.points[:, prob.index("z")], 0.25)  # held
    assert starts.spec["span"] == [[2.0, 4.0], [1.0, 3.0]]
    rebuilt = core.starts_from_spec(prob, starts.spec, plane=plane)
    np.testing.assert_array_equal(rebuilt.points, starts.points)


def test_basin_map_with_a_non_zero_origin_is_in_parameter_values(x64):
    # Source: Himmelblau (1972) via Jamil & Yang (2013): the four minima above. Grid nodes
    # (3, 2), (-3, 3), (-4, -3) and (4, -2) lie within 0.4 of one minimum each.
    prob = core.Problem(himmelblau, {"x": 3.0, "y": 2.0})
    plane = core.axes_plane(prob, "x", "y")
    bm = core.basin_map(
        prob,
        plane,
        span=((-5.0, 5.0), (-5.0, 5.0)),
        resolution=11,
        learning_rate=0.005,
        steps=4000,
        grad_tol=1e-8,
    )
    np.testing.assert_allclose(bm.a, np.linspace(-5, 5, 11))
    np.testing.assert_allclose(bm.b, np.linspace(-5, 5, 11))
    # each run starts where its cell says: path[:, 0] are the cells' parameter values
    aa, bb = np.meshgrid(bm.a, bm.b)
    np.testing.assert_allclose(bm.runs.path[:, 0], np.stack([aa.ravel(), bb.ravel()], 1))
    points = np.asarray(bm.minima.points)
    for node, published in zip([(3, 2), (-3, 3), (-4, -3), (4, -2)], HIMMELBLAU_MINIMA):
        j, i = node[1] + 5, node[0] + 5
        label = bm.label[j, i]
        assert label >= 0
        np.testing.assert_allclose(points[label], published, atol=1e-5)


# ------------------------------------------------------------------ recorded paths


def test_paths_on_an_axes_plane_are_the_iterates_parameter_values(x64):
    lr, steps = 0.01, 30
    prob = core.Problem(himmelblau_and_z, {"x": 0.0, "y": 0.0, "z": 0.0})
    plane = core.axes_plane(prob, "x", "y", origin={"x": 5.0, "y": -1.0, "z": 0.5})
    start = prob.flatten({"x": 2.5, "y": 2.5, "z": 1.5})
    runs = core.descend(
        prob, start[None], learning_rate=lr, steps=steps, plane=plane, grad_tol=0.0, loss_tol=0.0
    )
    # Plain gradient descent written out in NumPy (common practice: x <- x - lr * grad).
    x, y, z = 2.5, 2.5, 1.5
    expected, off = [(x, y)], [abs(z - 0.5)]
    for _ in range(steps):
        gx, gy = himmelblau_grad(x, y)
        x, y, z = x - lr * gx, y - lr * gy, z - lr * 2 * (z - 1.0)
        expected.append((x, y))
        off.append(abs(z - 0.5))
    np.testing.assert_allclose(runs.path[0, : steps + 1], expected, rtol=1e-10)
    np.testing.assert_allclose(runs.off_plane[0, : steps + 1], off, rtol=1e-10)
    np.testing.assert_allclose(runs.final[0, :2], expected[-1], rtol=1e-10)


# ------------------------------------------------------------------ titles and figures


def test_offset_planes_say_so_in_their_titles():
    w = jnp.arange(1.0, 5.0)
    prob = core.Problem(lambda t: jnp.sum(w * t**2), jnp.ones(4))
    offsets = [
        core.random_plane(prob, seed=0, normalise="none"),
        core.hessian_plane(prob),
        core.through_plane(prob, jnp.zeros(4), jnp.ones(4), jnp.arange(4.0)),
    ]
    for plane in offsets:
        assert plane.coordinates == "offsets" and plane.centre == (0.0, 0.0)
        assert all(t.startswith("offset ") for t in plane.axis_titles), plane.axis_titles
        np.testing.assert_array_equal(plane.centre_point, plane.origin)
        surface = core.evaluate_surface(prob, plane, span=1.0, resolution=5)
        assert (surface.a[0], surface.a[-1]) == (-1.0, 1.0)
        fig = F.slice_figure(surface)
        assert fig.layout.xaxis.title.text == plane.axis_titles[0]
        assert fig.layout.yaxis.title.text == plane.axis_titles[1]
    axes = core.axes_plane(prob, "theta[1]", "theta[3]")
    assert axes.axis_titles == ("theta[1]", "theta[3]") and axes.coordinates == "values"


def test_figure_axes_show_the_numbers_the_results_hold(x64):
    prob = core.Problem(himmelblau_and_z, {"x": 0.0, "y": 0.0, "z": 1.0})
    plane = core.axes_plane(prob, "x", "y", origin={"x": 3.0, "y": 2.0, "z": 1.0})
    surface = core.evaluate_surface(prob, plane, span=1.0, resolution=21)
    starts = core.explicit_starts(prob, np.array([[2.2, 1.3, 1.0], [3.8, 2.9, 1.0]]))
    runs = core.descend(prob, starts, learning_rate=0.01, steps=300, plane=plane)
    minima = core.find_minima(prob, runs)
    fig = F.slice_figure(surface, runs, minima=minima)
    contour = fig.data[0]
    np.testing.assert_array_equal(np.asarray(contour.x, float), surface.a)
    np.testing.assert_array_equal(np.asarray(contour.y, float), surface.b)
    assert list(fig.layout.xaxis.range) == [2.0, 4.0]
    assert list(fig.layout.yaxis.range) == [1.0, 3.0]
    start = next(t for t in fig.data if t.uid == "slice-start")
    np.testing.assert_allclose(np.asarray(start.x, float), [2.2, 3.8])
    np.testing.assert_allclose(np.asarray(start.y, float), [1.3, 2.9])
    marks = next(t for t in fig.data if t.uid == "slice-critical-points")
    # Source: Himmelblau (1972) via Jamil & Yang (2013): the minimum (3, 2).
    np.testing.assert_allclose(np.asarray(marks.x, float), [3.0], atol=1e-4)
    np.testing.assert_allclose(np.asarray(marks.y, float), [2.0], atol=1e-4)
    paths = [t for t in fig.data if t.uid.startswith("slice-path-")]
    drawn = np.concatenate([np.asarray(t.x, float) for t in paths])
    assert np.nanmin(drawn) >= 2.2 - 1e-9 and np.nanmax(drawn) <= 3.8 + 1e-9
    relief = F.relief_figure(surface, runs)
    np.testing.assert_array_equal(np.asarray(relief.data[0].x, float), surface.a)
    bm = core.basin_map(prob, plane, span=1.0, resolution=5, learning_rate=0.01, steps=300)
    heat = F.basin_figure(bm).data[0]
    np.testing.assert_array_equal(np.asarray(heat.x, float), bm.a)
    np.testing.assert_allclose(bm.a, [2.0, 2.5, 3.0, 3.5, 4.0])


# ------------------------------------------------------------------ settings


def test_settings_record_spans_as_parameter_values_and_old_records_still_load(x64):
    prob = core.Problem(himmelblau_and_z, {"x": 3.0, "y": 2.0, "z": 1.0})
    plane = core.axes_plane(prob, "x", "y", origin={"x": 3.0, "y": 2.0, "z": 0.5})
    starts = core.grid_starts(plane, span=0.5, resolution=3)
    runs = core.descend(prob, starts, learning_rate=0.01, steps=50, plane=plane)
    settings = core.record_settings(
        prob, plane=plane, span=0.5, resolution=11, starts=starts, runs=runs
    )
    assert settings.span == ((2.5, 3.5), (1.5, 2.5))
    assert settings.plane["coordinates"] == "values"
    view = core.compute_view(prob, core.Settings.from_json(settings.to_json()))
    np.testing.assert_allclose(view.surface.a, np.linspace(2.5, 3.5, 11))
    np.testing.assert_array_equal(view.starts.points, starts.points)

    # A record written when axes-plane spans were offsets from the origin's values
    # (no "coordinates" field): the same points, in the old numbers.
    old = json.loads(settings.to_json())
    del old["plane"]["coordinates"]
    old["span"] = [[-0.5, 0.5], [-0.5, 0.5]]
    old["starts"]["span"] = [[-0.5, 0.5], [-0.5, 0.5]]
    legacy = core.Settings.from_json(json.dumps(old))
    again = core.compute_view(prob, legacy)
    np.testing.assert_allclose(again.surface.a, view.surface.a)
    np.testing.assert_allclose(again.surface.loss, view.surface.loss)
    np.testing.assert_array_equal(again.starts.points, starts.points)
    assert again.settings.span == settings.span
    # Rebuilding only the plane of such a record would mislead: it is refused, clearly.
    with pytest.raises(core.ParameterError, match="upgrade_record"):
        core.plane_from_spec(prob, legacy.plane)
    # ... unless the origin's two values are zero, where both systems agree.
    zero = dict(legacy.plane, origin=[0.0, 0.0, 0.5])
    assert core.plane_from_spec(prob, zero).centre == (0.0, 0.0)
    # Today's records come back unchanged.
    assert core.upgrade_record(prob, settings.plane, settings.span, settings.starts) == (
        settings.plane,
        settings.span,
        settings.starts,
    )


def test_plane_specs_round_trip_with_their_coordinates():
    prob = core.Problem(lambda t: jnp.sum(t**2), jnp.array([1.0, 2.0, 3.0]))
    axes = core.axes_plane(prob, "theta[2]", "theta[0]")
    rebuilt = core.plane_from_spec(prob, axes.spec)
    assert rebuilt.centre == axes.centre == (3.0, 1.0)
    np.testing.assert_array_equal(rebuilt.origin, axes.origin)
    moved = axes.with_origin(np.array([7.0, 8.0, 9.0]))
    assert moved.centre == (9.0, 7.0) and moved.coordinates == "values"
    np.testing.assert_array_equal(moved.lift(9.0, 7.0), [7.0, 8.0, 9.0])
    with pytest.raises(core.ParameterError, match="'values'"):
        core.plane_from_spec(prob, dict(axes.spec, coordinates="offsets"))
    with pytest.raises(core.ParameterError, match="values"):
        core.Plane(np.ones(3), np.array([1.0, 1, 0]), np.array([0.0, 0, 1]), coordinates="values")


# ------------------------------------------------------------------ Explorer


def test_explorer_span_and_clicks_are_parameter_values():
    prob = core.Problem(himmelblau_and_z, {"x": 3.0, "y": 2.0, "z": 1.0})
    ex = Explorer(prob, x="x", y="y", span=0.5, resolution=11, steps=20, n_starts=1)
    assert ex.state.span == ((2.5, 3.5), (1.5, 2.5))
    surface = ex.results.surface
    np.testing.assert_allclose(surface.a, np.linspace(2.5, 3.5, 11))
    np.testing.assert_allclose(np.asarray(ex.main.figure_data()[0]["x"], float), surface.a)
    assert ex.controls.span.value == pytest.approx(0.5)
    ex.add_start(2.75, 1.75)
    np.testing.assert_allclose(ex.results.starts.points[-1], [2.75, 1.75, 1.0])
    np.testing.assert_allclose(ex.results.runs.path[-1, 0], [2.75, 1.75])
    # another axis: the span follows the centre (z = 1 at the origin)
    ex.controls.y_label.value = "z"
    assert ex.state.span == ((2.5, 3.5), (0.5, 1.5))
    ex.set(span=0.25)
    assert ex.state.span == ((2.75, 3.25), (0.75, 1.25))
    assert "⚠" not in ex.status.value


# ------------------------------------------------------------------ structure


def test_core_modules_import_each_other_without_a_cycle():
    core_dir = Path(core.__file__).parent
    graph = {}
    for path in core_dir.glob("*.py"):
        if path.stem == "__init__":
            continue
        deps = set()
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.ImportFrom) and node.level == 1:
                names = [node.module] if node.module else [a.name for a in node.names]
                deps.update(n.split(".")[0] for n in names)
        graph[path.stem] = deps
    assert "curvature" not in graph["planes"]
    assert "planes" in graph["curvature"]

    state: dict[str, int] = {}

    def visit(mod, trail):
        if state.get(mod) == 1:
            raise AssertionError(f"import cycle: {' -> '.join([*trail, mod])}")
        if state.get(mod) == 2 or mod not in graph:
            return
        state[mod] = 1
        for dep in sorted(graph[mod]):
            visit(dep, [*trail, mod])
        state[mod] = 2

    for mod in sorted(graph):
        visit(mod, [])


def test_explorer_opens_old_and_new_records_at_the_recorded_points():
    prob = core.Problem(himmelblau_and_z, {"x": 3.0, "y": 2.0, "z": 1.0})
    ex = Explorer(prob, x="x", y="y", span=0.5, resolution=7, steps=10, n_starts=2)
    settings = ex.record()
    assert settings.span == ((2.5, 3.5), (1.5, 2.5))
    again = Explorer.from_settings(prob, settings)
    assert again.state.span == settings.span
    old = json.loads(settings.to_json())
    del old["plane"]["coordinates"]
    old["span"] = [[-0.5, 0.5], [-0.5, 0.5]]  # offsets from the origin's x = 3, y = 2
    legacy = core.Settings.from_json(json.dumps(old))
    with pytest.raises(core.ParameterError, match="upgrade_record"):
        state_from_settings(legacy)
    opened = Explorer.from_settings(prob, legacy)
    assert opened.state.span == settings.span
    np.testing.assert_allclose(opened.results.surface.a, ex.results.surface.a)

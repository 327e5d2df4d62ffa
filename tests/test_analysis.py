"""The one analysis pipeline: analyse, its stages, compute_view and the Analysis it returns."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from basinview import core
from basinview.core import Analysis, ParameterError, Settings, ViewSpec, analyse


def two_wells(p):
    """(x^2 - 1)^2 + y^2: minima at (+-1, 0), a saddle at the origin."""
    return (p["x"] ** 2 - 1.0) ** 2 + p["y"] ** 2


@pytest.fixture(scope="module")
def problem():
    return core.Problem(two_wells, {"x": 0.2, "y": 0.3})


@pytest.fixture(scope="module")
def view(problem):
    plane = core.axes_plane(problem, "x", "y", origin={"x": 0.0, "y": 0.0})
    starts = core.explicit_starts(
        problem, np.array([[0.5, 1.0], [-0.4, -1.0], [1.5, 0.5], [-1.5, 0.2]], np.float32)
    )
    return ViewSpec(
        plane=plane, starts=starts, span=2.0, resolution=25, learning_rate=[0.05, 0.1], steps=300
    )


@pytest.fixture(scope="module")
def analysis(problem, view):
    return analyse(problem, view, basin_resolution=7, basin_rate=0.1, sweep_rates=5)


def test_each_result_is_what_the_core_function_gives(problem, view, analysis):
    surface = core.evaluate_surface(problem, view.plane, span=2.0, resolution=25)
    np.testing.assert_array_equal(analysis.surface.loss, surface.loss)
    runs = core.descend(
        problem, view.starts, learning_rate=[0.05, 0.1], steps=300, plane=view.plane
    )
    np.testing.assert_array_equal(analysis.runs.final, runs.final)
    np.testing.assert_array_equal(analysis.runs.losses, runs.losses)
    minima = core.find_minima(problem, runs)
    assert list(analysis.minima.labels) == list(minima.labels)
    basins = core.basin_map(
        problem, view.plane, span=2.0, resolution=7, learning_rate=0.1, steps=300
    )
    np.testing.assert_array_equal(analysis.basin_map.label, basins.label)
    assert analysis.plane is view.plane and analysis.starts is view.starts
    record = core.record_settings(
        problem,
        plane=view.plane,
        span=2.0,
        resolution=25,
        starts=view.starts,
        runs=runs,
        surface=surface,
    )
    assert dataclasses.replace(analysis.settings, created="") == dataclasses.replace(
        record, created=""
    )


def test_minima_profile_and_sweep_against_closed_forms(analysis):
    # common practice (algebra): the minima of (x^2 - 1)^2 + y^2 are (+-1, 0) with loss 0,
    # the origin is a saddle with loss 1, so the straight segment's barrier is 1.
    lows = analysis.minima.points[np.asarray(analysis.minima.kind) == "minimum"]
    np.testing.assert_allclose(np.sort(lows[:, 0]), [-1.0, 1.0], atol=1e-3)
    np.testing.assert_allclose(lows[:, 1], 0.0, atol=1e-3)
    assert analysis.profile_labels is not None and len(set(analysis.profile_labels)) == 2
    assert analysis.profile.barrier == pytest.approx(1.0, abs=2e-3)
    # Source: Nocedal, J. & Wright, S. J. (2006), Numerical Optimization, 2nd ed., Springer,
    # section 3.3 (from memory): gradient descent on a quadratic is stable for
    # lr < 2 / lambda_max; here the Hessian at (+-1, 0) is diag(8, 2), so 2 / 8 = 0.25.
    assert analysis.sweep.predicted_bound == pytest.approx(0.25, rel=1e-3)
    rates = analysis.sweep.table.learning_rate.to_numpy()
    np.testing.assert_allclose(rates, np.geomspace(0.25 / 30, 0.75, 5), rtol=1e-6)


def test_settings_rebuild_the_same_analysis(problem, analysis):
    record = Settings.from_json(analysis.settings.to_json())
    again = analyse(problem, record)
    assert again.settings is record
    np.testing.assert_array_equal(again.runs.final, analysis.runs.final)
    np.testing.assert_array_equal(again.surface.loss, analysis.surface.loss)
    assert again.basin_map is None and again.sweep is None
    view = core.compute_view(problem, record)
    # compute_view is the same pipeline without minima, basins, sweep or profile
    assert isinstance(view, Analysis) and core.View is Analysis
    assert view.minima is None and view.profile is None
    np.testing.assert_array_equal(view.runs.losses, analysis.runs.losses)


def test_one_value_is_asked_for_where_a_grid_cannot_be_used(problem, view):
    grid = view.replace(optimizer="momentum", hyper={"momentum": [0.5, 0.9]})
    with pytest.raises(ParameterError, match=r"2 values of momentum .* hyper=\{'momentum': 0.5\}"):
        core.compute_basins(problem, grid, resolution=5, learning_rate=0.1)
    with pytest.raises(ParameterError, match="2 learning rates; a basin map uses one"):
        core.compute_basins(problem, view, resolution=5)
    bm = core.compute_basins(
        problem, grid, resolution=5, learning_rate=0.1, hyper={"momentum": 0.5}
    )
    assert bm.runs.config["hyper"] == {"momentum": [0.5]}
    with pytest.raises(ParameterError, match="a step-size sweep uses one"):
        core.compute_sweep(problem, grid, [0.1, 0.2])


def test_an_analysis_from_parts_takes_its_plane_from_them(analysis):
    part = Analysis(surface=analysis.surface)
    assert part.plane is analysis.surface.plane and part.runs is None
    later = part.replace(runs=analysis.runs)
    assert later.runs is analysis.runs and part.runs is None

"""Explorer: Python-side logic, driven by setting widget values and calling handlers."""

from __future__ import annotations

import json

import numpy as np
import pytest

from basinview import Explorer
from basinview.core import Settings
from basinview.explorer import ViewState, stages_to_update
from basinview.explorer.records import snapshot_markdown
from basinview.scenarios import beacon


@pytest.fixture(scope="module")
def scenario():
    return beacon()


@pytest.fixture
def explorer(scenario):
    return Explorer(
        scenario.problem,
        x="x",
        y="y",
        origin=np.array([5.0, 0.0]),
        span=scenario.span,
        resolution=41,
        learning_rate=0.2,
        steps=300,
        n_starts=6,
        start_scale=4.0,
    )


def _paths(view):
    return {
        t["uid"]: (tuple(np.asarray(t["x"], float)), tuple(np.asarray(t["y"], float)))
        for t in view.figure_data()
        if "path" in t["uid"]
    }


def _z(view):
    (surface,) = [t for t in view.figure_data() if t["uid"] == "slice-surface"]
    return np.asarray(surface["z"])


def _click(explorer, x, y, uid="slice-surface"):
    """What the front end sends when the map is clicked (the widget's message handler)."""
    explorer.main.receive(explorer.main, {"kind": "click", "x": x, "y": y, "uid": uid}, [])


def test_stage_planning_is_minimal():
    s = ViewState(x_label="x", y_label="y")
    assert stages_to_update(None, s) == ("plane", "surface", "starts", "runs", "minima")
    assert stages_to_update(s, s) == ()
    assert stages_to_update(s, s.replace(learning_rate=0.5)) == ("runs", "minima")
    assert stages_to_update(s, s.replace(hyper={"momentum": 0.5})) == ("runs", "minima")
    assert stages_to_update(s, s.replace(resolution=31)) == ("surface",)
    assert stages_to_update(s, s.replace(n_starts=3)) == ("starts", "runs", "minima")
    assert stages_to_update(s, s.replace(x_label="y", y_label="x")) == (
        "plane",
        "surface",
        "starts",
        "runs",
        "minima",
    )


def test_axis_labels_do_not_dirty_a_random_plane():
    s = ViewState(plane_kind="random")
    # the controls fill in the first two labels; a random plane does not read them
    assert stages_to_update(s, s.replace(x_label="a", y_label="b")) == ()
    axes = ViewState(plane_kind="axes", x_label="a", y_label="b")
    assert stages_to_update(axes, axes.replace(x_label="c"))[0] == "plane"
    assert stages_to_update(s, s.replace(plane_kind="axes", x_label="a"))[0] == "plane"


def test_learning_rate_change_reruns_descent_not_the_surface(explorer):
    counts = dict(explorer.computer.counts)
    before = _paths(explorer.main)
    surface_z = _z(explorer.main).copy()
    explorer.controls.learning_rate.value = 1.5
    after = dict(explorer.computer.counts)
    assert after["surface"] == counts["surface"]
    assert after["runs"] == counts["runs"] + 1
    assert _paths(explorer.main) != before
    np.testing.assert_array_equal(_z(explorer.main), surface_z)
    assert "updated runs, minima" in explorer.status.value
    assert explorer.state.learning_rate == pytest.approx(1.5)


def test_status_names_the_start_draw_so_each_start_change_reads_differently(explorer):
    # A new seed or spread gives new runs; the status line must say which draw it shows
    # (two draws whose summaries matched once left the status unchanged: a user could
    # not tell the change had been applied).
    explorer.controls.start_seed.value = 3
    seeded = explorer.status.value
    assert "seed 3" in seeded
    explorer.controls.start_scale.value = 2.0
    assert "spread 2" in explorer.status.value and explorer.status.value != seeded
    explorer.add_start(0.1, 0.2)
    assert "+ 1 clicked" in explorer.status.value


def test_resolution_change_recomputes_only_the_surface(explorer):
    counts = dict(explorer.computer.counts)
    explorer.controls.resolution.value = 25
    assert explorer.computer.counts["surface"] == counts["surface"] + 1
    assert explorer.computer.counts["runs"] == counts["runs"]
    assert _z(explorer.main).shape == (25, 25)


def test_optimizer_change_rebuilds_hyper_controls(explorer):
    explorer.controls.optimizer.value = "momentum"
    names = [c.description for c in explorer.controls.hyper_box.children]
    assert names == ["momentum"]
    assert explorer.state.optimizer == "momentum"
    assert explorer.state.hyper_dict == {"momentum": 0.9}
    counts = dict(explorer.computer.counts)
    explorer.controls.hyper_box.children[0].value = 0.5
    assert explorer.state.hyper_dict == {"momentum": 0.5}
    assert explorer.computer.counts["runs"] == counts["runs"] + 1
    assert explorer.computer.counts["surface"] == counts["surface"]


def test_bad_value_shows_in_status_and_keeps_the_last_good_view(explorer):
    good_state = explorer.state
    good_fig = (explorer.main.traces, explorer.main.grids, explorer.main.plot_layout)
    explorer.controls.x_label.value = "y"  # same as the y axis
    assert "must differ" in explorer.status.value
    assert explorer.state == good_state
    assert (explorer.main.traces, explorer.main.grids, explorer.main.plot_layout) == good_fig
    assert explorer.controls.x_label.value == "x"  # the control shows the last good value again
    # still usable
    explorer.controls.learning_rate.value = 0.3
    assert explorer.state.learning_rate == pytest.approx(0.3)
    assert "⚠" not in explorer.status.value


def test_exception_in_a_callback_leaves_the_widget_usable(explorer, monkeypatch):
    good = explorer.state
    original = explorer.computer.update

    def broken(state):
        raise RuntimeError("simulated failure")

    monkeypatch.setattr(explorer.computer, "update", broken)
    explorer.controls.steps.value = 123
    assert "unexpected RuntimeError: simulated failure" in explorer.status.value
    assert explorer.last_error and "simulated failure" in explorer.last_error
    assert explorer.state == good
    monkeypatch.setattr(explorer.computer, "update", original)
    explorer.controls.steps.value = 150
    assert explorer.state.steps == 150


def test_clicking_the_map_adds_a_start(explorer):
    n_runs = len(explorer.results.runs)
    assert explorer.main.uids[0] == "slice-surface"
    # a click on a path (not on the map itself) adds nothing; nor does a malformed message
    _click(explorer, 8.0, 4.0, uid="slice-path-m0")
    explorer.main.receive(explorer.main, {"kind": "click", "x": None, "y": 1.0}, [])
    assert len(explorer.results.runs) == n_runs
    _click(explorer, 8.0, 4.0)
    assert len(explorer.results.runs) == n_runs + 1
    # the axes read parameter values: the new start is at x = 8, y = 4
    np.testing.assert_allclose(explorer.results.starts.points[-1], [8.0, 4.0], atol=1e-6)
    # ... and its recorded path starts at the same numbers (plane coordinates are values)
    np.testing.assert_allclose(explorer.results.runs.path[-1, 0], [8.0, 4.0], atol=1e-5)
    explorer.controls.clear_clicks.click()
    assert len(explorer.results.runs) == n_runs


def test_record_round_trip_and_save(explorer, scenario, tmp_path):
    explorer.controls.learning_rate.value = 0.7
    settings = explorer.record("checked step size")
    assert isinstance(settings, Settings)
    assert settings.learning_rate == (pytest.approx(0.7),)
    table = explorer.snapshots
    assert len(table) == 1 and table.note[0] == "checked step size"
    again = Explorer.from_settings(scenario.problem, Settings.from_json(settings.to_json()))
    assert again.state == explorer.state
    np.testing.assert_array_equal(again.results.runs.losses, explorer.results.runs.losses)
    path = explorer.save_snapshot(tmp_path / "view.json")
    assert Settings.load(path) == settings
    assert Explorer.from_settings(scenario.problem, path).state == explorer.state
    md = snapshot_markdown([settings])
    assert "checked step size" in md and '"optimizer": "gradient_descent"' in md


def test_save_without_snapshot_is_explained(explorer, tmp_path):
    explorer.save_button.click()
    assert "no snapshot to save" in explorer.status.value
    assert not (tmp_path / "basinview-settings.json").exists()


def test_basins_and_step_sizes_views(explorer):
    explorer.basins_resolution.value = 9
    explorer.basins_button.click()  # runs in the worker thread
    explorer.wait()
    assert explorer.view.value == "basins"
    assert any(t["type"] == "heatmap" for t in explorer.side.figure_data())
    assert "basin map" in explorer.status.value
    explorer.sweep_button.click()
    explorer.wait()
    assert explorer.view.value == "step sizes"
    assert "predicted bound" in explorer.status.value
    assert len(explorer.side.traces) > 0
    explorer.view.value = "runs"
    assert "<table" in explorer.table.value
    assert explorer.table.layout.display is None


def test_programmatic_set_updates_controls(explorer):
    explorer.set(learning_rate=0.05, steps=77)
    assert explorer.controls.learning_rate.value == pytest.approx(0.05)
    assert explorer.controls.steps.value == 77
    assert explorer.state.steps == 77


def test_snapshot_markdown_is_plain_json_data(explorer):
    settings = explorer.record()
    md = snapshot_markdown([settings])
    block = md.split("```json", 1)[1].split("```", 1)[0]
    assert json.loads(block)["schema"] == 1


def test_origin_may_be_a_pytree(scenario):
    ex = Explorer(
        scenario.problem, origin={"x": 5.0, "y": 0.0}, span=3.0, resolution=11, steps=20, n_starts=2
    )
    assert ex.state.origin == (5.0, 0.0)
    assert "⚠" not in ex.status.value

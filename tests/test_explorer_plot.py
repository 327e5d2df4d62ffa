"""PlotView: a figure held in the widget model as data, without a browser.

The tests set figures, send the messages the front end sends (clicks,
relayout, the request for plotly.js) through the widget's public message
handler, and check the widget's synced state: what every view draws.
"""

from __future__ import annotations

from importlib import resources

import numpy as np
import plotly
import pytest
from plotly.offline import get_plotlyjs

from basinview.explorer.plot import PLOT_CONFIG, PlotView, decode, encode
from basinview.figures.build import FigureSpec


def figure(y, title="a", z=None, notes=()):
    spec = FigureSpec({"title": {"text": title}, "width": 900, "height": 300})
    grid = np.arange(12.0).reshape(3, 4) if z is None else z
    spec.add_trace({"type": "contour", "z": grid, "uid": "map"})
    spec.add_trace({"type": "scatter", "x": np.arange(3.0), "y": np.asarray(y, float), "uid": "l"})
    for note in notes:
        spec.add_annotation(text=note, x=0, y=0, showarrow=False)
    return spec.figure()


@pytest.fixture
def view():
    v = PlotView(height=300)
    v.sent_traits = []
    v.observe(lambda c: v.sent_traits.append(c["name"]), names=["grids", "traces", "plot_layout"])
    return v


def test_figure_is_held_as_data_with_binary_arrays(view):
    view.show(figure([1, 2, 3]))
    assert view.uids == ["map", "l"]
    # the contour sits apart; a placeholder keeps the drawing order
    assert view.traces[0] == {"bv_grid": 0}
    z = view.grids[0]["z"]
    assert z["bv_array"] == "float64" and z["shape"] == [3, 4]
    assert isinstance(z["buffer"], bytes) and len(z["buffer"]) == 12 * 8  # binary, not JSON
    np.testing.assert_array_equal(view.figure_data()[0]["z"], np.arange(12.0).reshape(3, 4))
    # the figure fits its container: no fixed width, autosize, the widget's height
    layout = view.plot_layout
    assert "width" not in layout and layout["autosize"] is True and layout["height"] == 300
    assert layout["uirevision"] == "view"


def test_update_resends_the_grid_only_when_it_changes(view):
    view.show(figure([1, 2, 3]))
    view.sent_traits.clear()
    sent = view.bytes_sent
    view.show(figure([1, 5, 3], title="b"))  # paths moved, same grid
    assert "grids" not in view.sent_traits
    assert {"traces", "plot_layout"} <= set(view.sent_traits)
    small = view.bytes_sent - sent
    np.testing.assert_array_equal(view.figure_data()[1]["y"], [1, 5, 3])
    view.sent_traits.clear()
    view.show(figure([1, 5, 3], z=np.ones((3, 4))))
    assert "grids" in view.sent_traits  # the grid changed: sent once more
    assert view.bytes_sent - sent > small


def test_nan_stays_a_number_in_buffers_and_none_in_lists():
    # JSON has no NaN: lists carry None; binary buffers carry NaN, which plotly.js
    # draws as a gap (2-D grids are turned into rows with null by the front end).
    out = encode({"y": np.array([1.0, np.nan]), "text": [0.5, float("inf")], "n": np.int64(3)})
    assert out["text"] == [0.5, None] and out["n"] == 3
    np.testing.assert_array_equal(decode(out)["y"], [1.0, np.nan])
    ints = encode(np.array([1, 2], dtype=np.int64))
    assert ints["bv_array"] == "int32"  # JavaScript has no plain int64 typed array
    assert encode(np.array(["a", "b"])) == ["a", "b"]


def test_a_view_opened_later_gets_the_current_figure(view):
    # A reloaded page or a second display asks for the widget's state: it must hold
    # the current traces and layout (what Plotly.react draws), not the first ones.
    view.show(figure([1, 2, 3], notes=["a note"]))
    view.show(figure([1, np.nan, 8], title="b"))
    state = view.get_state()
    traces = [decode(t) for t in state["traces"]]
    np.testing.assert_array_equal(traces[1]["y"], [1.0, np.nan, 8.0])
    assert state["plot_layout"]["title"] == {"text": "b"}
    assert "annotations" not in state["plot_layout"]
    assert state["revision"] == 2


def test_the_toolbar_offers_no_online_service(view):
    config = view.get_state()["config"]
    assert config == PLOT_CONFIG
    assert config["displaylogo"] is False and config["showLink"] is False
    assert "sendDataToCloud" in config["modeBarButtonsToRemove"]
    assert config.get("showSendToCloud") is False


def test_zoom_is_kept_for_the_same_view_and_reset_for_another(view):
    # plotly.js keeps the user's zoom and camera while layout.uirevision stays the
    # same (plotly.js reference, layout.uirevision); the kernel tracks them too.
    view.show(figure([1, 2, 3]), uirevision="slice-1")
    message = {"kind": "relayout", "data": {"xaxis.range[0]": 0.5, "xaxis.range[1]": 2.0}}
    view.receive(view, message, [])
    view.receive(view, {"kind": "relayout", "data": {"autosize": True}}, [])  # not a zoom
    assert view.view_ranges == {"xaxis.range[0]": 0.5, "xaxis.range[1]": 2.0}
    view.show(figure([3, 2, 1]), uirevision="slice-1")
    assert view.plot_layout["uirevision"] == "slice-1"
    # not written into the layout: a double click must reset to the whole figure
    assert "xaxis" not in view.plot_layout
    view.receive(view, {"kind": "relayout", "data": {"scene.camera": {"eye": {"x": 1}}}}, [])
    assert view.view_ranges["scene.camera"] == {"eye": {"x": 1}}
    view.receive(view, {"kind": "relayout", "data": {"xaxis.autorange": True}}, [])
    assert "xaxis.range[0]" not in view.view_ranges
    view.receive(view, message, [])
    view.show(figure([3, 2, 1]), uirevision="slice-2")  # another slice: a fresh view
    assert view.plot_layout["uirevision"] == "slice-2" and view.view_ranges == {}


def test_clicks_reach_the_handler_and_errors_go_to_the_error_handler(view):
    view.show(figure([1, 2, 3]))
    got, errors = [], []
    view.on_click(lambda x, y, uid: got.append((x, y, uid)))
    view.receive(view, {"kind": "click", "x": 1.5, "y": -2, "uid": "map"}, [])
    view.receive(view, {"kind": "click", "x": "oops", "y": 1}, [])  # ignored
    assert got == [(1.5, -2.0, "map")]

    def broken(x, y, uid):
        raise RuntimeError("handler failed")

    view.on_click(broken)
    view.on_error(errors.append)
    view.receive(view, {"kind": "click", "x": 0, "y": 0, "uid": "map"}, [])
    assert [str(e) for e in errors] == ["handler failed"]


def test_plotly_js_comes_from_the_installed_package_by_message_not_state(view):
    sent = []
    view.send = lambda content, buffers=None: sent.append((content, buffers))
    view.receive(view, {"kind": "plotly.js?"}, [])
    ((content, buffers),) = sent
    assert content == {"kind": "plotly.js", "version": plotly.__version__}
    assert buffers[0] == get_plotlyjs().encode("utf-8")
    # never part of the widget state (so never in a saved notebook)
    view.show(figure([1, 2, 3]))
    state = view.get_state()
    assert len(str(state)) < 100_000
    assert not any(isinstance(v, (bytes, str)) and len(v) > 1_000_000 for v in state.values())


def test_the_front_end_module_ships_as_package_data():
    static = resources.files("basinview.explorer") / "static"
    js = (static / "plot.js").read_text(encoding="utf-8")
    assert "Plotly.react" in js and "export default" in js
    assert (
        "purge" not in js.split("const draw")[1].split("const schedule")[0]
    )  # no purge per update
    assert (static / "plot.css").is_file()
    assert PlotView._esm == js

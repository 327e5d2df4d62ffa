"""Copying a built figure into a live FigureWidget: only what changed is sent.

The messages checked here are the ones plotly's FigureWidget sends to the
browser (its ``_py2js_*`` traits), so the tests see what plotly.js receives.
"""

from __future__ import annotations

import numpy as np
import plotly.graph_objects as go
import pytest

from basinview.explorer.sync import FigureView, source_uids, sync_figure
from basinview.figures.build import FigureSpec


def figure(y, title="a", notes=(), extra=None) -> go.Figure:
    spec = FigureSpec({"title": {"text": title}, "template": {"layout": {"font": {"size": 11}}}})
    spec.add_trace({"type": "heatmap", "z": np.arange(12.0).reshape(3, 4), "uid": "map"})
    spec.add_trace({"type": "scatter", "x": np.arange(3.0), "y": np.asarray(y, float), "uid": "l"})
    for note in notes:
        spec.add_annotation(text=note, x=0, y=0, showarrow=False)
    if extra:
        spec.update_layout(extra)
    return spec.figure()


@pytest.fixture
def widget():
    target = FigureView(layout={"height": 300, "width": 400})
    target._sent = []
    for name in ("_py2js_update", "_py2js_relayout", "_py2js_restyle", "_py2js_addTraces"):
        target.observe(
            lambda c, n=name: c["new"] is not None and target._sent.append((n, c["new"])),
            names=[name],
        )
    return target


def layout_without_size(fig) -> dict:
    layout = fig.layout.to_plotly_json()
    return {k: v for k, v in layout.items() if k not in ("height", "width")}


def test_first_copy_replaces_traces_and_keeps_the_widget_size(widget):
    source = figure([1, 2, 3], notes=["a note"])
    assert sync_figure(widget, source) is True
    assert source_uids(widget) == ["map", "l"]
    assert layout_without_size(widget) == source.layout.to_plotly_json()
    assert (widget.layout.height, widget.layout.width) == (300, 400)
    np.testing.assert_array_equal(np.asarray(widget.data[0].z), np.arange(12.0).reshape(3, 4))


def test_update_sends_only_changed_properties(widget):
    sync_figure(widget, figure([1, 2, 3], notes=["a note"]))
    widget._sent.clear()
    source = figure([1, 5, 3], title="b")
    assert sync_figure(widget, source) is False
    assert [kind for kind, _ in widget._sent] == ["_py2js_update", "_py2js_relayout"]
    update, removal = (msg for _, msg in widget._sent)
    # the heatmap did not change: nothing of it is sent; the line sends only y
    assert update["style_traces"] == [1] and list(update["style_data"]) == ["y"]
    # the template did not change: not sent
    assert list(update["layout_data"]) == ["title"]
    # the note is gone: removed in the browser too (relayout with null)
    assert removal["relayout_data"] == {"annotations": None}
    assert layout_without_size(widget) == source.layout.to_plotly_json()
    assert (widget.layout.height, widget.layout.width) == (300, 400)
    widget._sent.clear()
    assert sync_figure(widget, source) is False
    assert widget._sent == []  # nothing changed: nothing sent


def test_layout_keys_the_new_figure_lacks_are_removed(widget):
    sync_figure(widget, figure([1, 2, 3], extra={"xaxis2": {"domain": [0, 0.5]}}))
    assert widget.layout.xaxis2.domain == (0, 0.5)
    sync_figure(widget, figure([1, 2, 3]))
    assert "xaxis2" not in widget.layout.to_plotly_json()


def test_nan_goes_as_a_typed_array_or_as_none(widget):
    # Widget messages are JSON, where NaN is invalid. plotly sends 1-D float
    # arrays as binary typed arrays (NaN is a number there, and a gap to
    # plotly.js); anything else becomes JSON lists, so NaN must become None.
    from plotly.serializers import _py_to_js

    sync_figure(widget, figure([1, 2, 3]))
    sync_figure(widget, figure([1, np.nan, 3]))
    y = _py_to_js(widget.data[1].y, None)
    assert set(y) == {"buffer", "dtype", "shape"}  # binary, not JSON
    np.testing.assert_array_equal(np.frombuffer(y["buffer"], y["dtype"]), [1.0, np.nan, 3.0])
    holes = np.arange(12.0).reshape(3, 4)
    holes[1, 2] = np.nan
    spec = FigureSpec()
    spec.add_trace({"type": "heatmap", "z": holes, "uid": "map"})
    spec.add_trace({"type": "scatter", "x": np.arange(3.0), "y": [1.0, 2.0, 3.0], "uid": "l"})
    sync_figure(widget, spec.figure())
    z = _py_to_js(widget.data[0].z, None)
    assert z[1][2] is None and z[1][1] == 5.0  # a JSON list with null for the hole
    # unchanged NaN data compare equal to what is stored: nothing re-sent
    widget._sent.clear()
    sync_figure(widget, spec.figure())
    assert widget._sent == []


def test_new_trace_set_replaces_all_traces(widget):
    sync_figure(widget, figure([1, 2, 3]))
    spec = FigureSpec()
    spec.add_trace({"type": "scatter", "x": [0, 1], "y": [1, 0], "uid": "other"})
    assert sync_figure(widget, spec.figure()) is True
    assert source_uids(widget) == ["other"] and len(widget.data) == 1


def test_a_new_view_starts_from_what_the_widget_shows(widget):
    # A front end that opens a view later (notebook reopened, page reloaded,
    # widget shown again) asks the kernel for the widget's state: it must hold
    # the current traces and layout, not the empty figure the widget was made with.
    sync_figure(widget, figure([1, 2, 3], notes=["a note"]))
    sync_figure(widget, figure([1, np.nan, 7], title="b"))
    widget._sent.clear()
    sent_state = []
    widget.observe(lambda c: sent_state.append(c["name"]), names=["_widget_data"])
    sync_figure(widget, figure([1, np.nan, 8], title="b"))
    assert sent_state == []  # updates do not re-send the whole figure
    state = widget.get_state()
    data = state["_widget_data"]
    assert [t["uid"] for t in data] == [t.uid for t in widget.data]
    y = data[1]["y"]  # a typed array (NaN travels as a number: a gap for plotly.js)
    y = np.frombuffer(y["buffer"], dtype=y["dtype"]) if isinstance(y, dict) else np.asarray(y)
    np.testing.assert_array_equal(y, [1.0, np.nan, 8.0])
    np.testing.assert_array_equal(np.asarray(data[0]["z"]), np.arange(12.0).reshape(3, 4))
    assert state["_widget_layout"]["title"] == {"text": "b"}
    assert "annotations" not in state["_widget_layout"]
    assert state["_widget_layout"]["height"] == 300

"""Copying a built figure into a live FigureWidget: only what changed is sent.

The messages checked here are the ones plotly's FigureWidget sends to the
browser (its ``_py2js_*`` traits), so the tests see what plotly.js receives.
"""

from __future__ import annotations

import numpy as np
import plotly.graph_objects as go
import pytest

from basinview.explorer.sync import source_uids, sync_figure
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
    target = go.FigureWidget(layout={"height": 300, "width": 400})
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


def test_nan_is_sent_as_none(widget):
    sync_figure(widget, figure([1, 2, 3]))
    sync_figure(widget, figure([1, np.nan, 3]))
    assert list(widget.data[1].y) == [1.0, None, 3.0]
    # unchanged NaN data compare equal to the None already there: nothing re-sent
    widget._sent.clear()
    sync_figure(widget, figure([1, np.nan, 3]))
    assert widget._sent == []


def test_new_trace_set_replaces_all_traces(widget):
    sync_figure(widget, figure([1, 2, 3]))
    spec = FigureSpec()
    spec.add_trace({"type": "scatter", "x": [0, 1], "y": [1, 0], "uid": "other"})
    assert sync_figure(widget, spec.figure()) is True
    assert source_uids(widget) == ["other"] and len(widget.data) == 1

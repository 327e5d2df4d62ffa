"""Copy a freshly built figure into a live FigureWidget, sending only what changed.

Figures are built by the pure functions of :mod:`basinview.figures`; every
trace there has a fixed ``uid``. When the new figure has the same traces
(same uids, same order) as the widget, only changed properties are sent
(the contour grid is not re-sent when only paths moved). Otherwise the
traces are replaced in one batch. A FigureWidget gives every trace a fresh
random uid of its own, so the source uids are kept in :func:`source_uids`.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import plotly.graph_objects as go

__all__ = ["FigureView", "json_safe", "source_uids", "sync_figure"]

_UIDS = "_basinview_source_uids"

#: Layout properties that belong to the widget rather than to the figure shown in it.
_WIDGET_SIZE = ("height", "width")


def _same(a: Any, b: Any) -> bool:
    if isinstance(a, np.ndarray) or isinstance(b, np.ndarray):
        try:
            return np.array_equal(np.asarray(a), np.asarray(b), equal_nan=True)
        except TypeError:
            return np.array_equal(np.asarray(a, dtype=object), np.asarray(b, dtype=object))
    if isinstance(a, dict) and isinstance(b, dict):
        return a.keys() == b.keys() and all(_same(a[k], b[k]) for k in a)
    if isinstance(a, (list, tuple)) and isinstance(b, (list, tuple)):
        return len(a) == len(b) and all(_same(x, y) for x, y in zip(a, b))
    return bool(a == b)


def json_safe(value: Any) -> Any:
    """``value`` with NaN and inf replaced by None where they would go into JSON.

    Widget messages are JSON: a NaN there breaks the message, while plotly.js
    treats ``null`` in data arrays as a gap, which is what NaN means here.
    One-dimensional float arrays are left as they are: plotly sends them as
    binary typed arrays, where NaN is a number (and a gap to plotly.js), and
    a list of Python objects would cost milliseconds to walk and encode.
    """
    if isinstance(value, np.ndarray):
        if value.ndim == 1 and value.dtype.kind == "f":
            return value
        if value.dtype.kind == "f" and not np.all(np.isfinite(value)):
            out = value.astype(object)
            out[~np.isfinite(value)] = None
            return out
        if value.dtype == object:
            return np.array([json_safe(v) for v in value.ravel()], dtype=object).reshape(
                value.shape
            )
        return value
    if isinstance(value, float) and not np.isfinite(value):
        return None
    if isinstance(value, dict):
        return {k: json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return type(value)(json_safe(v) for v in value)
    return value


def sync_figure(target: go.FigureWidget, source: go.Figure) -> bool:
    """Make ``target`` show ``source``. Returns True if the traces were replaced.

    Callbacks registered on replaced traces are lost; the caller re-registers
    them when this returns True.
    """
    old_uids = source_uids(target)
    new_uids = [t.uid for t in source.data]
    replaced = old_uids != new_uids or len(target.data) != len(new_uids)
    with target.batch_update():
        if replaced:
            target.data = []
            target.add_traces([json_safe(t.to_plotly_json()) for t in source.data])
        else:
            for old, new in zip(target.data, source.data):
                old_json = _stored(old)
                new_json = _stored(new)
                safe = {k: json_safe(v) for k, v in new_json.items() if k != "uid"}
                changed = {
                    k: v for k, v in safe.items() if k not in old_json or not _same(old_json[k], v)
                }
                removed = [k for k in old_json if k not in new_json and k not in ("type", "uid")]
                for key in removed:
                    old[key] = None
                if changed:
                    old.update(changed, overwrite=True)
        removed_layout = _sync_layout(target, source)
    if removed_layout:
        # None through relayout removes a property on both sides (assigning None to a
        # nested property would leave an empty one behind, e.g. an empty axis)
        target.plotly_relayout(dict.fromkeys(removed_layout))
    setattr(target, _UIDS, new_uids)
    return replaced


class FigureView(go.FigureWidget):
    """A FigureWidget that a view opened later draws as it is now.

    plotly's FigureWidget sends changes as one-off messages and keeps in its
    synced state only the traces it was created with (it sets that state
    again only when first displayed). A view opened later (the notebook
    reopened or the page reloaded while the kernel runs, the widget shown a
    second time) asks the kernel for the full state and would draw an empty
    plot. Here the full state is brought up to date when it is asked for,
    so updates cost nothing extra; views already open keep their own copy
    current from the messages.
    """

    def get_state(self, key: Any = None, drop_defaults: bool = False) -> dict[str, Any]:
        if key is None and hasattr(self, "_layout_obj"):  # (not while plotly builds it)
            # Written without notification: the views that are open have it already.
            self._trait_values["_widget_data"] = _structure(self._data)
            self._trait_values["_widget_layout"] = _structure(self._layout_obj._props)
        return super().get_state(key=key, drop_defaults=drop_defaults)


def _structure(value: Any) -> Any:
    """A copy of the dicts and lists in ``value`` that shares its arrays and scalars.

    plotly replaces a property's value when it changes and never writes into
    a stored array, so sharing the arrays is safe and saves copying them.
    """
    if isinstance(value, dict):
        return {k: _structure(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_structure(v) for v in value]
    return value


def _sync_layout(target: go.FigureWidget, source: go.Figure) -> list[str]:
    """Set the top-level layout properties that changed; return those ``source`` lacks.

    Assigning the whole layout would validate and send all of it (the
    template alone is kilobytes) on every update. The widget's size
    (``height``, ``width``) stays as the widget has it unless ``source``
    sets it.
    """
    old = _stored(target.layout)
    new = _stored(source.layout)
    changed = {k: v for k, v in new.items() if k not in old or not _same(old[k], v)}
    removed = [k for k in old if k not in new and k not in _WIDGET_SIZE]
    for key, value in changed.items():
        target.layout[key] = json_safe(value)
    return removed


def _stored(obj: Any) -> dict[str, Any]:
    """The properties of a plotly object as stored, for reading only.

    ``to_plotly_json()`` returns a deep copy (the template alone is thousands
    of objects); comparisons only read, so they use plotly's stored dict.
    """
    props = getattr(obj, "_props", None)
    return props if isinstance(props, dict) else obj.to_plotly_json()


def source_uids(target: go.FigureWidget) -> list[str]:
    """The uids the traces of ``target`` had in the figure they were copied from."""
    return list(getattr(target, _UIDS, []))

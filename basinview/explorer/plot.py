"""PlotView: one figure as widget data, drawn in the browser by plotly.js.

The figure lives in the widget model as plain data (declared traitlets), so
every view of the widget, a view opened later and a reloaded page included,
draws the current state with ``Plotly.react``:

- ``grids``: the large 2-D traces (contour, heatmap, surface), re-sent only
  when their data change;
- ``traces``: the other traces, with ``{"bv_grid": i}`` where ``grids[i]``
  goes, so the drawing order is kept;
- ``plot_layout`` (the figure's layout) and ``config``.

Numeric arrays travel as binary buffers (``{"bv_array": dtype, "shape": ...,
"buffer": bytes}``), never as JSON lists. Clicks and zoom or camera changes
come back as messages, handled by :meth:`PlotView.receive`.

plotly.js itself is sent once per page: the first view on a page asks the
kernel for it (a message, so it is never part of the saved widget state);
the kernel answers with the file the installed plotly package ships
(:func:`plotly.offline.get_plotlyjs`), and the page keeps it on ``window``
for every later view. Nothing is fetched from the network.
"""

from __future__ import annotations

import base64
import functools
import hashlib
import json
from collections.abc import Callable, Mapping
from importlib import resources
from typing import Any

import anywidget
import numpy as np
import plotly
import traitlets

__all__ = ["GRID_TYPES", "PLOT_CONFIG", "PlotView", "decode", "encode", "plotly_js"]

#: Trace types whose data are sent apart from the others (re-sent only when they change).
GRID_TYPES = frozenset({"contour", "heatmap", "surface", "histogram2dcontour"})

#: plotly.js options: no logo, no link or upload to any online service, sized by the page.
PLOT_CONFIG: dict[str, Any] = {
    "displaylogo": False,
    "showLink": False,
    "showSendToCloud": False,
    "showEditInChartStudio": False,
    "responsive": True,
    "modeBarButtonsToRemove": ["sendDataToCloud", "editInChartStudio", "lasso2d", "select2d"],
    "toImageButtonOptions": {"format": "png", "scale": 2},
}

_STATIC = resources.files("basinview.explorer") / "static"


@functools.lru_cache(maxsize=1)
def plotly_js() -> bytes:
    """The installed plotly package's own plotly.js bundle, as UTF-8 bytes."""
    from plotly.offline import get_plotlyjs

    return get_plotlyjs().encode("utf-8")


def _json_value(value: Any) -> Any:
    """A scalar as JSON has it (NaN and inf become None)."""
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not np.isfinite(value):
        return None
    return value


def encode(value: Any) -> Any:
    """``value`` (a plotly figure's JSON: dicts, lists, numpy arrays) as widget data.

    Numeric arrays become ``{"bv_array": dtype, "shape": [...], "buffer": bytes}``
    (sent as binary buffers; NaN stays NaN, which plotly.js draws as a gap);
    other arrays and lists become lists with NaN as None.

    Examples:
        >>> out = encode({"x": np.arange(3.0), "name": "a", "y": [1.0, float("nan")]})
        >>> out["x"]["bv_array"], out["x"]["shape"], out["y"]
        ('float64', [3], [1.0, None])
    """
    if isinstance(value, np.ndarray):
        if value.dtype.kind == "f":
            dtype = np.float32 if value.dtype == np.float32 else np.float64
            arr = np.ascontiguousarray(value, dtype=dtype)
            return {"bv_array": arr.dtype.name, "shape": list(arr.shape), "buffer": arr.tobytes()}
        if value.dtype.kind in "iu":
            small = value.size == 0 or (value.min() >= -(2**31) and value.max() < 2**31)
            arr = np.ascontiguousarray(value, dtype=np.int32 if small else np.float64)
            return {"bv_array": arr.dtype.name, "shape": list(arr.shape), "buffer": arr.tobytes()}
        return [encode(v) for v in value.tolist()]
    if isinstance(value, Mapping):
        if "bdata" in value and "dtype" in value:
            return encode(_typed_array(value))
        return {str(k): encode(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [encode(v) for v in value]
    return _json_value(value)


def _typed_array(spec: Mapping[str, Any]) -> np.ndarray:
    """plotly's typed-array JSON (``{"dtype", "bdata": base64, "shape"}``) as a numpy array.

    plotly's figures write numeric arrays this way in ``to_plotly_json()``
    (the plotly.js typed-array format); here they become binary buffers.
    """
    flat = np.frombuffer(base64.b64decode(spec["bdata"]), dtype=np.dtype(spec["dtype"]))
    shape = spec.get("shape")
    if isinstance(shape, str):
        shape = [int(n) for n in shape.split(",")]
    return flat.reshape(shape) if shape else flat


def decode(value: Any) -> Any:
    """Widget data back to Python: encoded arrays become numpy arrays (for tests and tools)."""
    if isinstance(value, Mapping):
        if "bv_array" in value:
            flat = np.frombuffer(bytes(value["buffer"]), dtype=value["bv_array"])
            return flat.reshape(value["shape"])
        return {k: decode(v) for k, v in value.items()}
    if isinstance(value, list):
        return [decode(v) for v in value]
    return value


def _digest(value: Any) -> str:
    """A hash of encoded data (buffers included), to tell whether a grid changed."""
    h = hashlib.blake2b(digest_size=16)

    def walk(v: Any) -> None:
        if isinstance(v, (bytes, bytearray, memoryview)):
            h.update(b"B")
            h.update(bytes(v))
        elif isinstance(v, Mapping):
            h.update(b"{")
            for k in sorted(v):
                h.update(str(k).encode())
                walk(v[k])
            h.update(b"}")
        elif isinstance(v, list):
            h.update(b"[")
            for x in v:
                walk(x)
            h.update(b"]")
        else:
            h.update(json.dumps(v).encode())

    walk(value)
    return h.hexdigest()


def _figure_json(figure: Any) -> tuple[list[dict[str, Any]], dict[str, Any]]:
    """``(traces, layout)`` of a ``go.Figure`` or of a ``{"data", "layout"}`` dict."""
    spec = figure if isinstance(figure, Mapping) else figure.to_plotly_json()
    return [dict(t) for t in spec.get("data", [])], dict(spec.get("layout", {}))


# Relayout keys the kernel keeps (what the user zoomed or turned), by prefix.
_KEPT = ("xaxis", "yaxis", "scene.camera", "scene")


class PlotView(anywidget.AnyWidget):
    """One plotly figure shown through our own widget (see the module docstring).

    Attributes:
        view_ranges: the axis ranges and 3-D camera the user set by zooming or
            turning (relayout keys such as ``"xaxis.range[0]"``), while the
            ``uirevision`` stays. plotly.js keeps them across updates itself
            (``uirevision``); they are not written into the layout, where they
            would become the ranges a double click "resets" to. They are part
            of the widget model, so a view drawn later (a reloaded page, a
            second display) applies them after its first drawing, as a zoom.
        clicks: how many click messages arrived (for tests and diagnostics).
        bytes_sent: bytes of figure data set on the widget so far (buffers and
            JSON), to measure what each update costs.
    """

    _esm = (_STATIC / "plot.js").read_text(encoding="utf-8")
    _css = (_STATIC / "plot.css").read_text(encoding="utf-8")

    traces = traitlets.List().tag(sync=True)
    grids = traitlets.List().tag(sync=True)
    #: The figure's plotly layout (``layout`` is the widget's own ipywidgets Layout).
    plot_layout = traitlets.Dict().tag(sync=True)
    config = traitlets.Dict().tag(sync=True)
    height = traitlets.Int(460).tag(sync=True)
    #: How many figures were shown (the front end marks the drawn revision on the page).
    revision = traitlets.Int(0).tag(sync=True)
    #: The user's zoom and camera for the current ``uirevision`` (see the class docstring).
    view_ranges = traitlets.Dict().tag(sync=True)

    def __init__(self, height: int = 460, **kwargs: Any) -> None:
        super().__init__(height=height, config=dict(PLOT_CONFIG), **kwargs)
        self.clicks = 0
        self.bytes_sent = 0
        self._uirevision: str | None = None
        self._grid_digests: list[str] = []
        self._click_handlers: list[Callable[[float, float, str], Any]] = []
        self._error_handlers: list[Callable[[BaseException], Any]] = []
        self.on_msg(self.receive)

    # ------------------------------------------------------------ showing
    def show(self, figure: Any, *, uirevision: str = "view") -> None:
        """Show ``figure`` (a ``go.Figure`` or ``{"data", "layout"}``).

        Only what changed is set: the grids only when their data differ.
        ``uirevision`` names the view: while it stays the same, the user's zoom
        and camera are kept (plotly.js ``uirevision``); a new name resets them.
        """
        data, layout = _figure_json(figure)
        layout.pop("width", None)
        layout["autosize"] = True
        if "height" in layout:
            self.height = int(layout["height"])
        layout["height"] = self.height
        reset = uirevision != self._uirevision
        self._uirevision = uirevision
        layout["uirevision"] = uirevision
        grids, traces, digests = [], [], []
        for trace in data:
            if trace.get("type") in GRID_TYPES:
                traces.append({"bv_grid": len(grids)})
                grid = encode(trace)
                grids.append(grid)
                digests.append(_digest(grid))
            else:
                traces.append(encode(trace))
        layout_data = encode(layout)
        with self.hold_sync():
            if reset:
                self.view_ranges = {}  # another slice or span: its own zoom
            if digests != self._grid_digests:
                self.grids = grids
                self._grid_digests = digests
                self.bytes_sent += _size(grids)
            self.traces = traces
            self.plot_layout = layout_data
            self.revision += 1
        self.bytes_sent += _size(traces) + _size(layout_data)

    def figure_data(self) -> list[dict[str, Any]]:
        """The traces shown now, in drawing order, with arrays decoded (numpy)."""
        out = []
        for trace in self.traces:
            if "bv_grid" in trace:
                out.append(decode(self.grids[trace["bv_grid"]]))
            else:
                out.append(decode(trace))
        return out

    @property
    def uids(self) -> list[str]:
        """The ``uid`` of every trace shown, in drawing order."""
        return [str(t.get("uid", "")) for t in self.figure_data()]

    # ------------------------------------------------------------ messages
    def on_click(self, handler: Callable[[float, float, str], Any]) -> None:
        """Call ``handler(x, y, uid)`` when a point of the figure is clicked."""
        self._click_handlers.append(handler)

    def on_error(self, handler: Callable[[BaseException], Any]) -> None:
        """Call ``handler(exc)`` when a message handler raised (the exception goes no further)."""
        self._error_handlers.append(handler)

    def receive(self, widget: Any, content: Any, buffers: Any = None) -> None:
        """Handle a message from the front end (the widget's public message callback).

        ``{"kind": "click", "x": .., "y": .., "uid": ..}``: a click on a point;
        ``{"kind": "relayout", "data": {...}}``: the user zoomed, panned or turned
        the camera (plotly.js relayout keys); ``{"kind": "plotly.js?"}``: a page
        needs plotly.js (answered with the installed package's file as a buffer).
        """
        try:
            self._receive(content if isinstance(content, Mapping) else {})
        except Exception as exc:  # a message handler must never raise into the kernel log
            if not self._error_handlers:
                raise
            for handler in self._error_handlers:
                handler(exc)

    def _receive(self, content: Mapping[str, Any]) -> None:
        kind = content.get("kind")
        if kind == "plotly.js?":
            self.send({"kind": "plotly.js", "version": plotly.__version__}, [plotly_js()])
        elif kind == "click":
            self.clicks += 1
            x, y = content.get("x"), content.get("y")
            if not isinstance(x, (int, float)) or not isinstance(y, (int, float)):
                return
            for handler in self._click_handlers:
                handler(float(x), float(y), str(content.get("uid", "")))
        elif kind == "relayout":
            kept = dict(self.view_ranges)  # a new dict, so the model (and later views) see it
            _keep_ranges(kept, content.get("data") or {})
            self.view_ranges = kept


def _keep_ranges(kept: dict[str, Any], data: Mapping[str, Any]) -> None:
    """Fold one relayout event into ``kept`` (axis ranges and camera only)."""
    for key, value in data.items():
        if not key.startswith(_KEPT):
            continue
        if key.endswith(".autorange"):
            axis = key[: -len(".autorange")]
            for k in [k for k in kept if k.startswith(axis + ".range")]:
                del kept[k]
        elif ".range" in key or key.endswith("camera"):
            kept[key] = value


def _size(value: Any) -> int:
    """Bytes ``value`` takes as a widget message (JSON text plus binary buffers)."""
    buffers = 0

    def strip(v: Any) -> Any:
        nonlocal buffers
        if isinstance(v, (bytes, bytearray, memoryview)):
            buffers += len(v)
            return 0
        if isinstance(v, Mapping):
            return {k: strip(x) for k, x in v.items()}
        if isinstance(v, list):
            return [strip(x) for x in v]
        return v

    return len(json.dumps(strip(value))) + buffers

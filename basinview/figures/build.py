"""Assemble a figure as plain dicts and create the plotly object once.

Building a figure through plotly's object API (``add_trace``,
``update_layout``, ``add_annotation`` ...) validates every property on
every call, and layout changes after traces exist go through plotly's
relayout checks: tens of milliseconds per figure, which the Explorer pays
on every slider move. The figure functions therefore write traces and
layout as dicts into a :class:`FigureSpec` and call :meth:`FigureSpec.figure`
once at the end, which creates the ``go.Figure`` (validated once, by
plotly's public constructor). :meth:`FigureSpec.to_dict` gives the same
figure as plain data.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import plotly.graph_objects as go

__all__ = ["NOTE_WIDTH", "FigureSpec", "deep_merge", "wrap_lines"]

#: Characters per line of a note under a figure. At the notes' 11 px font a
#: character is at most about 6.6 px wide on average (0.6 em, common practice for
#: sans-serif text), so a line stays within about 600 px: inside a figure 700 px
#: wide or more, the narrowest the Explorer's side figure gets at 1000 px (stacked)
#: or 1400 px with a side panel open.
NOTE_WIDTH = 90


def deep_merge(target: dict[str, Any], update: Mapping[str, Any]) -> dict[str, Any]:
    """Merge ``update`` into ``target`` in place: dicts recursively, anything else replaced.

    This is what plotly's ``update_layout`` does with nested properties.

    Examples:
        >>> deep_merge({"a": {"b": 1, "c": 2}}, {"a": {"c": 3}, "d": 4})
        {'a': {'b': 1, 'c': 3}, 'd': 4}
    """
    for key, value in update.items():
        old = target.get(key)
        if isinstance(value, Mapping) and isinstance(old, dict):
            deep_merge(old, value)
        elif isinstance(value, Mapping):
            target[key] = deep_merge({}, value)
        else:
            target[key] = value
    return target


def _template(ours: Any) -> Any:
    """Our template alone, copied (not merged into plotly's bundled default).

    plotly's bundled templates carry defaults for every trace type (about
    7 KB per figure); ours sets what our figures rely on and nothing else,
    so figures look the same whatever ``plotly.io.templates.default`` is.
    """
    if not isinstance(ours, Mapping):
        return ours
    return deep_merge({}, ours)


def wrap_lines(text: str, width: int = NOTE_WIDTH) -> list[str]:
    """``text`` broken into lines of at most ``width`` characters, at spaces.

    A word longer than ``width`` gets a line of its own (never cut).

    Examples:
        >>> wrap_lines("the predicted bound comes from one point", 20)
        ['the predicted bound', 'comes from one point']
    """
    if isinstance(width, bool) or not isinstance(width, int) or width < 1:
        raise ValueError(f"width must be a whole number of at least 1; got {width!r}.")
    lines: list[str] = []
    line = ""
    for word in text.split():
        if line and len(line) + 1 + len(word) > width:
            lines.append(line)
            line = word
        else:
            line = f"{line} {word}" if line else word
    if line:
        lines.append(line)
    return lines


class FigureSpec:
    """A figure under construction: a list of trace dicts and one layout dict.

    Traces are dicts with a ``"type"`` key (``"scatter"``, ``"contour"``...)
    and plotly's property names; the layout is one nested dict (axes,
    annotations, shapes included).

    Examples:
        >>> spec = FigureSpec()
        >>> _ = spec.add_trace({"type": "scatter", "x": [0, 1], "y": [1, 0]})
        >>> spec.update_layout({"xaxis": {"title": {"text": "t"}}})
        >>> spec.add_annotation(text="note", x=0, y=0, showarrow=False)
        >>> fig = spec.figure()
        >>> fig.data[0].type, fig.layout.xaxis.title.text, fig.layout.annotations[0].text
        ('scatter', 't', 'note')
    """

    def __init__(self, layout: Mapping[str, Any] | None = None) -> None:
        self.data: list[dict[str, Any]] = []
        self.layout: dict[str, Any] = {}
        if layout:
            self.update_layout(layout)

    def add_trace(self, trace: dict[str, Any]) -> dict[str, Any]:
        """Append a trace dict (must name its ``"type"``); returns it for later edits."""
        if "type" not in trace:
            raise KeyError("a trace dict needs a 'type' (e.g. 'scatter')")
        self.data.append(trace)
        return trace

    def update_layout(self, update: Mapping[str, Any]) -> None:
        """Deep-merge ``update`` into the layout (nested dicts merge, values replace)."""
        deep_merge(self.layout, update)

    def add_annotation(self, **props: Any) -> None:
        """Append one annotation (plotly's annotation properties)."""
        self.layout.setdefault("annotations", []).append(props)

    def add_shape(self, **props: Any) -> None:
        """Append one shape (plotly's shape properties)."""
        self.layout.setdefault("shapes", []).append(props)

    def to_dict(self) -> dict[str, Any]:
        """The figure as plain data: ``{"data": [...], "layout": {...}}`` (what plotly.js draws)."""
        layout = dict(self.layout)
        if "template" in layout:
            layout["template"] = _template(layout["template"])
        return {"data": list(self.data), "layout": layout}

    def figure(self, validate: bool | None = None) -> go.Figure:
        """Create the plotly figure once, through plotly's public constructor.

        Args:
            validate: kept for callers of earlier versions; plotly's public
                constructor always validates, so every figure is checked.

        Returns:
            A ``go.Figure``.
        """
        return go.Figure(self.to_dict())

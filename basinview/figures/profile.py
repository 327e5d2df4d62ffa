"""The loss along the straight segment between two points, with the barrier marked."""

from __future__ import annotations

from typing import Any

import numpy as np
import plotly.graph_objects as go

from ..core.surface import Profile
from .build import FigureSpec
from .style import add_note, base_layout, category_colour, uid
from .text import significant

__all__ = ["profile_figure"]


def _end_colour(label: str, minima: Any) -> str:
    names = list(minima.labels) if minima is not None else []
    if label in names:
        return category_colour(int(minima.colour_index[names.index(label)]))
    return "white"


def profile_figure(
    profile: Profile,
    *,
    labels: tuple[str, str] = ("start", "end"),
    minima: Any = None,
    title: str | None = None,
) -> go.Figure:
    """The loss along the straight segment between two points, with the barrier marked.

    With ``minima`` (whose letters the ``labels`` are), each end is drawn in
    its point's colour; otherwise the ends are white stars, as critical points
    are on the slice.

    ``t = 0`` is the first point and ``t = 1`` the second; the segment is
    extended a little beyond both ends (lighter line). The barrier is the
    highest loss between the points above the higher of the two.

    Caution: this is one straight path. A curved path between the same
    points may rise less, so the barrier shown is an upper bound on the
    lowest barrier between them.
    """
    t = np.asarray(profile.t, dtype=np.float64)
    loss = np.asarray(profile.loss, dtype=np.float64)
    loss = np.where(np.isfinite(loss), loss, np.nan)
    inside = (t >= -1e-12) & (t <= 1 + 1e-12)
    fig = FigureSpec()
    for part, mask, style in (
        ("outside", ~inside, {"color": "#9A9A9A", "width": 1.5}),
        ("segment", inside, {"color": "#2B2B2B", "width": 2.5}),
    ):
        y = np.where(mask, loss, np.nan)
        if part == "outside":
            # keep the extension joined to the segment ends
            edge = np.flatnonzero(inside)
            if edge.size:
                y[edge[[0, -1]]] = loss[edge[[0, -1]]]
        fig.add_trace(
            {
                "type": "scatter",
                "x": t,
                "y": y,
                "mode": "lines",
                "name": "beyond the points" if part == "outside" else "between the points",
                "line": style,
                "hovertemplate": "t %{x:.3f}<br>loss %{y:.4~g}<extra></extra>",
                "uid": uid("profile", part),
            }
        )
    ends = np.array([np.argmin(np.abs(t - 0.0)), np.argmin(np.abs(t - 1.0))])
    fig.add_trace(
        {
            "type": "scatter",
            "x": t[ends],
            "y": loss[ends],
            "mode": "markers+text",
            "text": list(labels),
            "textposition": "bottom center",
            "textfont": {"size": 14},
            "marker": {
                "symbol": "star",
                "size": 15,
                "color": [_end_colour(lab, minima) for lab in labels],
                "line": {"color": "#111111", "width": 1},
            },
            "name": "the two points",
            "hovertemplate": "%{text}<br>loss %{y:.4~g}<extra></extra>",
            "uid": uid("profile", "ends"),
        }
    )
    seg = np.where(inside, loss, np.nan)
    if np.isfinite(seg).any() and np.isfinite(loss[ends]).all():
        k = int(np.nanargmax(seg))
        top, base = float(seg[k]), float(np.max(loss[ends]))
        fig.add_shape(
            line={"color": "#6A6A6A", "dash": "dot", "width": 1},
            type="line",
            x0=0,
            x1=1,
            xref="x domain",
            y0=base,
            y1=base,
            yref="y",
        )
        if profile.barrier > 0:
            fig.add_annotation(
                x=t[k],
                y=top,
                ax=t[k],
                ay=base,
                xref="x",
                yref="y",
                axref="x",
                ayref="y",
                showarrow=True,
                arrowhead=2,
                arrowside="end+start",
                arrowcolor="#111111",
                text="",
            )
            fig.add_annotation(
                x=t[k],
                y=(top + base) / 2,
                text=f"barrier {significant(profile.barrier, 3)}",
                showarrow=False,
                xanchor="left",
                xshift=8,
                font={"size": 13},
                bgcolor="rgba(255,255,255,0.8)",
            )
    dist = float(
        np.linalg.norm(np.asarray(profile.end, np.float64) - np.asarray(profile.start, np.float64))
    )
    sub = f"distance between the points {significant(dist)}; barrier {significant(profile.barrier)}"
    layout = base_layout(title or f"Profile from {labels[0]} to {labels[1]}", sub)
    layout["margin"]["b"] = 100
    layout["showlegend"] = False
    layout["xaxis"] = {"title": {"text": f"t (0 = {labels[0]}, 1 = {labels[1]})"}}
    layout["yaxis"] = {"title": {"text": "loss"}}
    fig.update_layout(layout)
    add_note(
        fig,
        "One straight path: a curved path between the points may rise less, so this barrier "
        "is an upper bound on the lowest barrier between them.",
    )
    return fig.figure()

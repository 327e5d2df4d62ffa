"""Figure of solutions grouped by connectivity: barriers between groups and their losses."""

from __future__ import annotations

from typing import Any

import numpy as np
import plotly.graph_objects as go

from ..core.errors import ParameterError
from .build import FigureSpec
from .style import add_note, base_layout, category_colour, colour_scale, uid

__all__ = ["solutions_figure"]


def _fmt(v: float) -> str:
    return "inf" if not np.isfinite(v) else f"{v:.3g}"


def solutions_figure(solutions: Any, *, title: str | None = None) -> go.Figure:
    """Barrier matrix between the groups (left) and each group's end losses (right).

    Left: the lowest barrier measured between two groups (the diagonal: the
    largest barrier of a member to its representative), as a heatmap with
    the values written in. Right: per group, the range of its members' end
    losses (line) and their median (marker), in the group's colour, with its
    share of the runs and 95% interval in the hover.

    Args:
        solutions: a :class:`~basinview.core.Solutions` (from ``connect_runs``).
        title: figure title.
    """
    names = list(solutions.labels)
    g = len(names)
    barrier = np.asarray(solutions.barrier, dtype=np.float64)
    if barrier.shape != (g, g):
        raise ParameterError(
            f"the barrier matrix has shape {barrier.shape}; expected ({g}, {g}) for {g} groups."
        )
    shown = np.where(np.isfinite(barrier), barrier, np.nan)
    text = [[_fmt(v) for v in row] for row in barrier]
    fig = FigureSpec(
        base_layout(
            title or "Solutions grouped by connectivity",
            subtitle=f"connected: barrier at most {solutions.tolerance:.3g} on straight segments",
        )
    )
    fig.add_trace(
        {
            "type": "heatmap",
            "x": names,
            "y": names,
            "z": shown,
            "text": text,
            "texttemplate": "%{text}",
            "colorscale": colour_scale("cividis"),
            "colorbar": {"title": {"text": "barrier"}, "x": 0.5, "len": 0.8},
            "hovertemplate": "from %{y} to %{x}: barrier %{text}<extra></extra>",
            "xaxis": "x",
            "yaxis": "y",
            "name": "barriers",
            "uid": uid("groups", "barriers"),
        }
    )
    for j, name in enumerate(names):
        lo, mid, hi = (
            float(solutions.loss_min[j]),
            float(solutions.loss_median[j]),
            float(solutions.loss_max[j]),
        )
        colour = category_colour(int(solutions.colour_index[j]))
        share = (
            f"{100 * float(solutions.share[j]):.0f}% of runs "
            f"({100 * float(solutions.share_low[j]):.0f}-"
            f"{100 * float(solutions.share_high[j]):.0f}%)"
        )
        fig.add_trace(
            {
                "type": "scatter",
                "x": [name, name, name],
                "y": [lo, mid, hi],
                "mode": "lines+markers",
                "marker": {"size": [6, 12, 6], "color": colour, "symbol": "line-ew-open"},
                "line": {"color": colour, "width": 4},
                "name": f"{name}: {int(solutions.count[j])} runs",
                "customdata": [share] * 3,
                "hovertemplate": (
                    f"{name}<br>end loss %{{y:.4g}}<br>%{{customdata}}<extra></extra>"
                ),
                "xaxis": "x2",
                "yaxis": "y2",
                "uid": uid("groups", "losses", int(solutions.colour_index[j])),
            }
        )
    copies = np.asarray(solutions.copies)
    fig.update_layout(
        {
            "xaxis": {"domain": [0.0, 0.45], "title": {"text": "to group"}, "type": "category"},
            "yaxis": {
                "title": {"text": "from group"},
                "type": "category",
                "autorange": "reversed",
            },
            "xaxis2": {
                "domain": [0.6, 1.0],
                "anchor": "y2",
                "title": {"text": "group"},
                "type": "category",
            },
            "yaxis2": {"anchor": "x2", "title": {"text": "end loss (min, median, max)"}},
            "showlegend": g > 0,
            "legend": {"x": 1.02, "y": 1.0},
        }
    )
    notes = ["A high straight segment does not prove two groups are separate (try curved_path)."]
    if solutions.symmetries:
        notes.append(
            f"Modulo {', '.join(solutions.symmetries)}; symmetric copies merged: "
            f"{int(np.sum(copies - 1))}."
        )
    for row, note in enumerate(notes):
        add_note(fig, note, row=row)
    return fig.figure()

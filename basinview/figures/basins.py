"""Figures of where runs end: the basin map of a slice and the profile between two points."""

from __future__ import annotations

from typing import Any

import numpy as np
import plotly.graph_objects as go

from ..core.errors import ParameterError
from ..core.minima import OUTCOMES
from ..core.surface import Profile, Surface
from .build import FigureSpec
from .levels import choose_levels
from .overlays import add_critical_points
from .slices import slice_caution
from .style import OUTCOME_STYLES, add_note, base_layout, category_colour, uid

__all__ = ["basin_figure", "profile_figure"]


def _categories(label: np.ndarray, minima: Any) -> list[tuple[int, str, str]]:
    """``(code, legend name, colour)`` for every code present in ``label``.

    Points are named by their letters and coloured by their colour index in
    the problem's registry, so a basin has the letter and colour its point has
    in every other figure; outcome labels use the names of
    :data:`basinview.core.OUTCOMES`.
    """
    total = label.size
    cats = []
    names = list(minima.labels)
    colours = np.asarray(minima.colour_index)
    for k in range(len(names)):
        count = int(np.sum(label == k))
        if count:
            name = (
                f"{names[k]}: {minima.kind[k]}, loss {float(minima.loss[k]):.3g} "
                f"({100 * count / total:.0f}% of starts)"
            )
            cats.append((k, name, category_colour(int(colours[k]))))
    for code, style in OUTCOME_STYLES.items():
        count = int(np.sum(label == code))
        if count:
            cats.append(
                (code, f"{style['legend']} ({100 * count / total:.0f}% of starts)", style["colour"])
            )
    unknown = sorted(set(np.unique(label).tolist()) - {c for c, _, _ in cats})
    if unknown:
        known = ", ".join(f"{c} ({OUTCOMES[c]})" for c in sorted(OUTCOMES, reverse=True))
        raise ParameterError(
            f"the basin map holds labels {unknown} that match no point of its minima "
            f"({len(names)} points) and are not one of the outcome labels {known}."
        )
    return cats


def basin_figure(
    basin_map: Any,
    *,
    surface: Surface | None = None,
    title: str | None = None,
) -> go.Figure:
    """Which minimum each start on the slice leads to.

    Every cell is a start on the plane, coloured by the point its run
    reached (its letter and colour are the point's in every figure on the
    problem); runs that diverged are grey, runs that spent their step budget
    (max_steps) dark grey and runs whose end point is not stationary slate.
    The legend gives each basin's share of the starts.
    Critical points found are marked with their letters (projected onto
    the plane; hover shows how far off it they lie). With ``surface``,
    contour lines of the loss are drawn on top.

    Args:
        basin_map: a :class:`~basinview.core.basins.BasinMap`.
        surface: optional surface on the same plane, drawn as contour lines.
        title: figure title.
    """
    label = np.asarray(basin_map.label)
    a = np.asarray(basin_map.a, dtype=np.float64)
    b = np.asarray(basin_map.b, dtype=np.float64)
    if label.shape != (b.size, a.size):
        raise ParameterError(
            f"basin map labels have shape {label.shape}; expected (len(b), len(a)) = "
            f"({b.size}, {a.size})."
        )
    plane = basin_map.plane
    minima = basin_map.minima
    cats = _categories(label, minima)
    index = {code: i for i, (code, _, _) in enumerate(cats)}
    z = np.vectorize(index.get)(label).astype(np.float64)
    n = len(cats)
    scale = []
    for i, (_, _, colour) in enumerate(cats):
        scale += [[i / n, colour], [(i + 1) / n, colour]]
    names = [name.split(" (")[0] for _, name, _ in cats]
    hover = np.array(names, dtype=object)[z.astype(int)]
    fig = FigureSpec()
    fig.add_trace(
        {
            "type": "heatmap",
            "x": a,
            "y": b,
            "z": z,
            "zmin": -0.5,
            "zmax": n - 0.5,
            "colorscale": scale,
            "showscale": False,
            "opacity": 0.85,
            "customdata": hover,
            "hovertemplate": (
                f"start {plane.axis_titles[0]} %{{x:.4g}}, {plane.axis_titles[1]} %{{y:.4g}}"
                "<br>ends: %{customdata}<extra></extra>"
            ),
            "name": "basins",
            "uid": uid("basins", "map"),
        }
    )
    for i, (code, name, colour) in enumerate(cats):
        fig.add_trace(
            {
                "type": "scatter",
                "x": [None],
                "y": [None],
                "mode": "markers",
                "name": name,
                "marker": {"symbol": "square", "size": 14, "color": colour},
                "legendrank": 10 + i,
                "uid": uid(
                    "basins",
                    "key",
                    f"m{int(minima.colour_index[code])}" if code >= 0 else f"n{-code}",
                ),
            }
        )
    if surface is not None:
        lv = choose_levels(surface.loss)
        fig.add_trace(
            {
                "type": "contour",
                "x": surface.a,
                "y": surface.b,
                "z": lv.apply(surface.loss),
                "connectgaps": False,
                "ncontours": 18,
                "contours": {"coloring": "none"},
                "line": {"color": "rgba(255,255,255,0.7)", "width": 1},
                "showscale": False,
                "showlegend": False,
                "hoverinfo": "skip",
                "name": "loss contours",
                "uid": uid("basins", "contours"),
            }
        )
    add_critical_points(fig, minima, plane, "basins")
    notes = []
    caution = slice_caution(plane)
    if caution:
        notes.append(caution)
    notes.append(
        "Each cell is one start, coloured by where its run ended"
        + ("; the runs themselves move in all parameters." if plane.size > 2 else ".")
    )
    runs = basin_map.runs
    cfg = getattr(runs, "config", {}) or {}
    lr = cfg.get("learning_rate")
    sub = f"{label.shape[1]} × {label.shape[0]} starts, {cfg.get('optimizer', runs.rule)}"
    if lr:
        sub += f", learning rate {', '.join(f'{x:.3g}' for x in lr)}"
    if cfg.get("steps"):
        sub += f", at most {cfg['steps']} steps"
    layout = base_layout(title or "Basins: where each start ends", sub)
    layout["legend"].update({"x": 1.02, "y": 1, "xanchor": "left"})
    layout["margin"].update({"r": 290, "b": 80 + 17 * len(notes)})
    layout["showlegend"] = True
    fig.update_layout(layout)
    half = [(a[1] - a[0]) / 2 if a.size > 1 else 0.5, (b[1] - b[0]) / 2 if b.size > 1 else 0.5]
    xrange = [float(a[0] - half[0]), float(a[-1] + half[0])]
    yrange = [float(b[0] - half[1]), float(b[-1] + half[1])]
    xaxis = {"title": {"text": plane.axis_titles[0]}, "range": xrange}
    yaxis = {"title": {"text": plane.axis_titles[1]}, "range": yrange}
    g = plane.gram
    if abs(g[0, 0] - g[1, 1]) <= 1e-6 * g[0, 0] and abs(g[0, 1]) <= 1e-6 * g[0, 0]:
        ratio = (a[-1] - a[0]) / max(b[-1] - b[0], 1e-300)
        if 0.25 <= ratio <= 4:
            yaxis.update(scaleanchor="x", scaleratio=1, constrain="domain")
            xaxis.update(constrain="domain")
    fig.update_layout({"xaxis": xaxis, "yaxis": yaxis})
    for i, text in enumerate(notes):
        add_note(fig, text, row=i)
    return fig.figure()


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
                "hovertemplate": "t %{x:.3f}<br>loss %{y:.6g}<extra></extra>",
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
            "hovertemplate": "%{text}<br>loss %{y:.6g}<extra></extra>",
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
                text=f"barrier {profile.barrier:.3g}",
                showarrow=False,
                xanchor="left",
                xshift=8,
                font={"size": 13},
                bgcolor="rgba(255,255,255,0.8)",
            )
    dist = float(
        np.linalg.norm(np.asarray(profile.end, np.float64) - np.asarray(profile.start, np.float64))
    )
    sub = f"distance between the points {dist:.4g}; barrier {profile.barrier:.4g}"
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

"""The basin map of a slice: where the run from each start ends (the profile is in .profile)."""

from __future__ import annotations

from typing import Any

import numpy as np
import plotly.graph_objects as go
from scipy import ndimage

from ..core.errors import ParameterError
from ..core.minima import OUTCOMES
from ..core.surface import Surface
from .build import FigureSpec, wrap_lines
from .levels import choose_levels
from .overlays import add_critical_points
from .paths import legend_summary, percent
from .profile import profile_figure
from .slices import slice_caution
from .style import LEGEND_LIMIT, OUTCOME_STYLES, add_note, base_layout, category_colour, uid
from .text import significant

__all__ = ["basin_centres", "basin_figure", "profile_figure"]


def _categories(label: np.ndarray, minima: Any) -> list[tuple[int, str, str, int]]:
    """``(code, legend name, colour, count)`` for every code present in ``label``.

    Points come in letter order (the registry's order, whatever order the
    result lists them in), named by their letters and coloured by their
    colour index in the problem's registry, so a basin has the letter and
    colour its point has in every other figure; outcome labels follow, with
    the names of :data:`basinview.core.OUTCOMES`.
    """
    total = label.size
    cats = []
    names = list(minima.labels)
    colours = np.asarray(minima.colour_index)
    for k in np.argsort(colours, kind="stable"):
        k = int(k)
        count = int(np.sum(label == k))
        if count:
            name = (
                f"{names[k]}: {minima.kind[k]}, loss {significant(float(minima.loss[k]), 3)} "
                f"({percent(count / total)} of starts)"
            )
            cats.append((k, name, category_colour(int(colours[k])), count))
    for code, style in OUTCOME_STYLES.items():
        count = int(np.sum(label == code))
        if count:
            cats.append(
                (
                    code,
                    f"{style['legend']} ({percent(count / total)} of starts)",
                    style["colour"],
                    count,
                )
            )
    unknown = sorted(set(np.unique(label).tolist()) - {c[0] for c in cats})
    if unknown:
        known = ", ".join(f"{c} ({OUTCOMES[c]})" for c in sorted(OUTCOMES, reverse=True))
        raise ParameterError(
            f"the basin map holds labels {unknown} that match no point of its minima "
            f"({len(names)} points) and are not one of the outcome labels {known}."
        )
    return cats


def basin_centres(label: np.ndarray, codes: list[int]) -> dict[int, tuple[int, int]]:
    """For each code, the ``(row, column)`` of its cell farthest inside its basin.

    The cell with the largest distance to the nearest cell of another label
    (or the map's edge) lies inside the basin even when the basin is curved
    or in pieces (where its centroid may not), so a letter written there
    sits on its own colour.

    Examples:
        >>> lab = np.array([[0, 0, 0, 1], [0, 0, 0, 1], [0, 0, 0, 1]])
        >>> basin_centres(lab, [0, 1])
        {0: (1, 1), 1: (1, 3)}
    """
    out = {}
    rows, cols = np.indices(label.shape)
    for code in codes:
        inside = label == code
        if not inside.any():
            continue
        depth = ndimage.distance_transform_edt(np.pad(inside, 1))[1:-1, 1:-1]
        # among the deepest cells, the one nearest the basin's centroid
        near = np.hypot(rows - rows[inside].mean(), cols - cols[inside].mean())
        score = np.where(inside, depth - 1e-3 * near / max(label.shape), -np.inf)
        out[code] = tuple(int(i) for i in np.unravel_index(np.argmax(score), score.shape))
    return out


def basin_figure(
    basin_map: Any,
    *,
    surface: Surface | None = None,
    legend_limit: int = LEGEND_LIMIT,
    title: str | None = None,
) -> go.Figure:
    """Which minimum each start on the slice leads to.

    Every cell is a start on the plane, coloured by the point its run
    reached (its letter and colour are the point's in every figure on the
    problem); runs that diverged are grey, runs that spent their step budget
    (max_steps) dark grey and runs whose end point is not stationary slate.
    Each basin's letter is written on the map at the cell farthest inside
    it; the legend, in letter order, gives the shares of the starts for the
    ``legend_limit`` largest basins and sums up the rest in one line.
    Critical points found are marked (projected onto the plane; hover shows
    how far off it they lie), with their letters when they have no basin on
    the map. With ``surface``, contour lines of the loss are drawn on top.

    Args:
        basin_map: a :class:`~basinview.core.basins.BasinMap`.
        surface: optional surface on the same plane, drawn as contour lines.
        legend_limit: the legend names at most this many basins (the largest).
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
    index = {c[0]: i for i, c in enumerate(cats)}
    z = np.vectorize(index.get)(label).astype(np.float64)
    n = len(cats)
    scale = []
    for i, c in enumerate(cats):
        scale += [[i / n, c[2]], [(i + 1) / n, c[2]]]
    names = [c[1].split(" (")[0] for c in cats]
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
                f"start {plane.axis_titles[0]} %{{x:.4~g}}, {plane.axis_titles[1]} %{{y:.4~g}}"
                "<br>ends: %{customdata}<extra></extra>"
            ),
            "name": "basins",
            "uid": uid("basins", "map"),
        }
    )
    points = [c for c in cats if c[0] >= 0]
    # one line summing up a single basin saves nothing: name it instead
    cap = legend_limit + 1 if len(points) == legend_limit + 1 else legend_limit
    named = {c[0] for c in sorted(points, key=lambda c: -c[3])[:cap]}
    for i, (code, name, colour, _count) in enumerate(cats):
        fig.add_trace(
            {
                "type": "scatter",
                "x": [None],
                "y": [None],
                "mode": "markers",
                "name": name,
                "marker": {"symbol": "square", "size": 14, "color": colour},
                "legendrank": 10 + i,
                "showlegend": code < 0 or code in named,
                "uid": uid(
                    "basins",
                    "key",
                    f"m{int(minima.colour_index[code])}" if code >= 0 else f"n{-code}",
                ),
            }
        )
    rest = [c for c in points if c[0] not in named]
    if rest:
        fig.add_trace(
            {
                "type": "scatter",
                "x": [None],
                "y": [None],
                "mode": "markers",
                "name": legend_summary(
                    len(rest), sum(c[3] for c in rest) / label.size, noun="basins", of="starts"
                ),
                "marker": {"symbol": "square", "size": 14, "color": "rgba(0,0,0,0)"},
                "legendrank": 10 + len(points) - 0.5,
                "hoverinfo": "skip",
                "uid": uid("basins", "legend-rest"),
            }
        )
    # a point lying in its own basin keeps its letter beside its marker; the others'
    # letters are written inside their basins
    own = _points_in_own_basin(label, a, b, minima, plane, [c[0] for c in points])
    _basin_letters(fig, label, a, b, minima, [c[0] for c in points if c[0] not in own])
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
    # letters of points with a basin on the map are written inside it instead
    in_map = [minima.labels[c[0]] for c in points if c[0] not in own]
    add_critical_points(fig, minima, plane, "basins", unlabelled=in_map)
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
        sub += f", learning rate {', '.join(significant(x, 3) for x in lr)}"
    if cfg.get("steps"):
        sub += f", at most {cfg['steps']} steps"
    layout = base_layout(title or "Basins: where each start ends", sub)
    layout["legend"].update({"x": 1.02, "y": 1, "xanchor": "left", "yanchor": "top"})
    notes = [line for note in notes for line in wrap_lines(note)]  # none runs off the figure
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


def _points_in_own_basin(
    label: np.ndarray, a: np.ndarray, b: np.ndarray, minima: Any, plane: Any, codes: list[int]
) -> set[int]:
    """Codes of the points whose projection falls on a cell of their own basin."""
    if not codes:
        return set()
    pa, pb, _ = plane.project(np.asarray(minima.points, dtype=np.float64))
    da = (a[1] - a[0]) / 2 if a.size > 1 else np.inf
    db = (b[1] - b[0]) / 2 if b.size > 1 else np.inf
    own = set()
    for code in codes:
        x, y = float(pa[code]), float(pb[code])
        if not (a[0] - da <= x <= a[-1] + da and b[0] - db <= y <= b[-1] + db):
            continue
        j, i = int(np.argmin(np.abs(a - x))), int(np.argmin(np.abs(b - y)))
        if label[i, j] == code:
            own.add(code)
    return own


def _basin_letters(
    fig: FigureSpec, label: np.ndarray, a: np.ndarray, b: np.ndarray, minima: Any, codes: list[int]
) -> None:
    """Each basin's letter on a small white disc at the cell farthest inside the basin."""
    centres = basin_centres(label, codes)
    if not centres:
        return
    rows = [centres[c] for c in codes if c in centres]
    fig.add_trace(
        {
            "type": "scatter",
            "x": [float(a[j]) for _, j in rows],
            "y": [float(b[i]) for i, _ in rows],
            "text": [minima.labels[c] for c in codes if c in centres],
            "mode": "markers+text",
            "textposition": "middle center",
            "textfont": {"size": 11, "color": "#111111"},
            "marker": {
                "size": 19,
                "color": "rgba(255,255,255,0.82)",
                "line": {"color": "#111111", "width": 0.6},
            },
            "hoverinfo": "skip",
            "showlegend": False,
            "name": "basin letters",
            "uid": uid("basins", "letters"),
        }
    )

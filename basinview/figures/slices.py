"""Figures of a 2-D slice: contour map with descent paths, and a 3-D relief.

Caution, repeated on the figures themselves: a slice is a 2-D cut through
an n-dimensional loss. A low point of the slice need not be a minimum of
the model, and descent paths leave the plane; what is drawn is their
projection, and the hover label gives each point's distance off the plane.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import plotly.graph_objects as go

from ..core.descent import Runs
from ..core.planes import Plane
from ..core.surface import Surface
from .build import FigureSpec, wrap_lines
from .levels import Levels, choose_levels
from .overlays import (
    PATH_HOVER,
    add_critical_points,
    add_paths,
    check_runs_plane,
)
from .paths import (
    colour_note,
    group_runs,
    legend_groups,
    legend_summary,
    select_runs,
    settled,
    stack_paths,
)
from .style import (
    LEGEND_LIMIT,
    SURFACE_SCALE,
    UNCONVERGED,
    add_note,
    base_layout,
    colour_scale,
    uid,
)
from .text import significant

__all__ = ["relief_figure", "slice_caution", "slice_figure"]


def slice_caution(plane: Plane, runs: Runs | None = None, drawn: np.ndarray | None = None) -> str:
    """One-line caution for a figure of ``plane`` (empty for a 2-parameter problem)."""
    n = plane.size
    if n <= 2:
        return ""
    text = (
        f"2-D slice of a {n}-parameter loss: a low point here need not be a minimum of the model."
    )
    if runs is not None:
        members = np.arange(len(runs)) if drawn is None else np.asarray(drawn)
        tame = members[np.asarray(runs.status)[members] != "diverged"] if members.size else members
        off = np.asarray(runs.off_plane)[tame]
        if np.isfinite(off).any():
            text += (
                " Paths leave the plane (largest off-plane distance "
                f"{significant(float(np.nanmax(off)), 3)}"
                + (" among runs that did not diverge" if tame.size < members.size else "")
                + "; see hover)."
            )
        else:
            text += " Paths leave the plane (see the off-plane distance on hover)."
    return text


def _isotropic(plane: Plane, surface: Surface) -> bool:
    g = plane.gram
    scale = np.sqrt(g[0, 0] * g[1, 1])
    iso = abs(g[0, 0] - g[1, 1]) <= 1e-6 * scale and abs(g[0, 1]) <= 1e-6 * scale
    wa = float(surface.a[-1] - surface.a[0])
    wb = float(surface.b[-1] - surface.b[0])
    return bool(iso and 0.25 <= wa / wb <= 4)


def _colourbar(levels: Levels, z: np.ndarray) -> dict[str, Any]:
    bar: dict[str, Any] = {"title": {"text": levels.title, "side": "right"}, "thickness": 14}
    ticks = levels.ticks(z)
    if ticks is not None:
        bar["tickvals"], bar["ticktext"] = ticks
    return bar


def contour_trace(
    surface: Surface, levels: Levels, *, titles: tuple[str, str], name: str, uid_: str
) -> dict[str, Any]:
    """The loss on a surface's grid as a contour trace (NaN losses stay gaps).

    ``titles`` name the two axes in the hover; ``levels`` maps losses to the
    colour scale (see :func:`~basinview.figures.levels.choose_levels`).
    """
    z = levels.apply(surface.loss)
    return {
        "type": "contour",
        "x": surface.a,
        "y": surface.b,
        "z": z,
        "customdata": np.where(np.isfinite(surface.loss), surface.loss, np.nan),
        "colorscale": colour_scale(SURFACE_SCALE),
        "connectgaps": False,
        "ncontours": 24,
        "contours": {"coloring": "heatmap", "showlines": True},
        "line": {"width": 0.6, "color": "rgba(255,255,255,0.45)"},
        "colorbar": _colourbar(levels, z),
        "hovertemplate": (
            f"{titles[0]} %{{x:.4~g}}<br>{titles[1]} %{{y:.4~g}}"
            "<br>loss %{customdata:.4~g}<extra></extra>"
        ),
        "name": name,
        "uid": uid_,
    }


def slice_figure(
    surface: Surface,
    runs: Runs | None = None,
    *,
    minima: Any = None,
    solutions: Any = None,
    which: Any = None,
    color_by: str = "auto",
    levels: str = "auto",
    max_paths: int = 60,
    max_points: int = 300,
    legend_limit: int = LEGEND_LIMIT,
    title: str | None = None,
) -> go.Figure:
    """Contour map of a surface with descent paths drawn on it.

    Each path starts at a white circle and ends at a filled marker in its
    colour. Paths are coloured by the minimum they reached (when ``minima``
    is given), else by learning rate or start; runs that diverged are grey
    and dashed and end in a cross at their last point inside the view.
    Hover on any point of a path for its run, step, loss and distance off
    the plane.

    Args:
        surface: the loss on the plane (:func:`~basinview.core.evaluate_surface`).
        runs: descent runs recorded on ``surface.plane``.
        minima: critical points found from ``runs`` (marked, and used for colours).
        solutions: groups by connectivity of ``runs``
            (:func:`~basinview.core.connect_runs`): paths coloured and named by
            group (``S1``, ``S2``, ...), for runs that end near, not at,
            critical points.
        which: run indices or a boolean mask of runs to draw (default all).
        color_by: ``"auto"``, ``"minimum"``, ``"solution"``, ``"scheme"``,
            ``"learning_rate"``, ``"start"``, ``"status"`` (see
            :func:`~basinview.figures.paths.group_runs`).
        levels: ``"auto"`` (log levels when the finite losses span three
            decades or more), ``"linear"`` or ``"log"``.
        max_paths: at most this many paths are drawn; the figure says how many
            were left out.
        max_points: longer paths are thinned to about this many points for drawing
            (runs that did not converge to a quarter of that, drawn fainter).
        legend_limit: the legend names at most this many groups (the largest)
            and sums up the rest in one entry.
        title: figure title.

    Returns:
        A plotly ``Figure``. NaN losses stay gaps in the contour map.
    """
    plane = surface.plane
    lv = choose_levels(surface.loss, levels)
    fig = FigureSpec()
    fig.add_trace(
        contour_trace(
            surface, lv, titles=plane.axis_titles, name="loss", uid_=uid("slice", "surface")
        )
    )
    bounds = (float(surface.a[0]), float(surface.a[-1]), float(surface.b[0]), float(surface.b[-1]))
    notes = []
    drawn = None
    if runs is not None:
        check_runs_plane(runs, plane)
        groups, left_out = select_runs(
            group_runs(runs, minima=minima, color_by=color_by, which=which, solutions=solutions),
            max_paths,
        )
        add_paths(fig, runs, groups, bounds, max_points, legend_limit=legend_limit)
        drawn = np.concatenate([g.runs for g in groups]) if groups else np.zeros(0, int)
        if left_out:
            notes.append(
                f"Showing {drawn.size} of {drawn.size + left_out} runs (max_paths={max_paths}); "
                "every group keeps at least one run."
            )
        if colour_note(groups):
            notes.append(colour_note(groups))
    if minima is not None:
        add_critical_points(fig, minima, plane, "slice")
    caution = slice_caution(plane, runs, drawn)
    if caution:
        notes.insert(0, caution)
    layout = base_layout(title or "Loss on the slice", _subtitle(surface, runs))
    layout["legend"].update({"orientation": "v", "x": 1.16, "y": 1, "xanchor": "left"})
    notes = [line for note in notes for line in wrap_lines(note)]  # none runs off the figure
    layout["margin"]["b"] = 80 + 17 * len(notes)
    layout["margin"]["r"] = 250 if runs is not None or minima is not None else 40
    fig.update_layout(layout)
    axes = {"showgrid": False, "zeroline": False}
    xaxis = {"title": {"text": plane.axis_titles[0]}, "range": list(bounds[:2]), **axes}
    yaxis = {"title": {"text": plane.axis_titles[1]}, "range": list(bounds[2:]), **axes}
    if _isotropic(plane, surface):
        yaxis.update(scaleanchor="x", scaleratio=1, constrain="domain")
        xaxis.update(constrain="domain")
    fig.update_layout({"xaxis": xaxis, "yaxis": yaxis})
    for i, text in enumerate(notes):
        add_note(fig, text, row=i)
    return fig.figure()


def _subtitle(surface: Surface, runs: Runs | None) -> str:
    ra, rb = surface.loss.shape[1], surface.loss.shape[0]
    parts = [f"{ra} × {rb} grid"]
    if surface.finite_fraction < 1:
        parts.append(f"{100 * (1 - surface.finite_fraction):.1f}% of points not finite (gaps)")
    if runs is not None:
        parts.append(f"{len(runs)} runs of {runs.rule}")
    return ", ".join(parts)


def relief_figure(
    surface: Surface,
    runs: Runs | None = None,
    *,
    minima: Any = None,
    solutions: Any = None,
    which: Any = None,
    color_by: str = "auto",
    levels: str = "auto",
    max_paths: int = 30,
    max_points: int = 200,
    legend_limit: int = LEGEND_LIMIT,
    title: str | None = None,
) -> go.Figure:
    """3-D surface of the loss over the slice, with descent paths draped on it.

    A path point's height is the loss the run recorded there, not the
    surface height below its projection: where a path floats above or sinks
    below the surface, the run has left the plane. The height axis is
    logarithmic when the levels are (see :func:`slice_figure`).
    """
    plane = surface.plane
    lv = choose_levels(surface.loss, levels)
    colour = lv.apply(surface.loss)
    log_z = lv.mode == "log"
    height = np.where(np.isfinite(surface.loss), surface.loss, np.nan).astype(np.float64)
    fig = FigureSpec()
    fig.add_trace(
        {
            "type": "surface",
            "x": surface.a,
            "y": surface.b,
            "z": height,
            "surfacecolor": colour,
            "colorscale": colour_scale(SURFACE_SCALE),
            "colorbar": _colourbar(lv, colour),
            "opacity": 0.92,
            "contours": {
                "z": {"show": True, "usecolormap": True, "project": {"z": False}, "width": 1}
            },
            "hovertemplate": (
                f"{plane.axis_titles[0]} %{{x:.4~g}}<br>{plane.axis_titles[1]} %{{y:.4~g}}"
                "<br>loss %{z:.4~g}<extra></extra>"
            ),
            "name": "loss",
            "uid": uid("relief", "surface"),
        }
    )
    finite = height[np.isfinite(height)]
    zlo, zhi = (float(finite.min()), float(finite.max())) if finite.size else (0.0, 1.0)
    notes = []
    if runs is not None:
        check_runs_plane(runs, plane)
        groups, left_out = select_runs(
            group_runs(runs, minima=minima, color_by=color_by, which=which, solutions=solutions),
            max_paths,
        )
        box = (surface.a[0], surface.a[-1], surface.b[0], surface.b[-1], zlo, zhi * 1.05)
        shown = legend_groups(groups, legend_limit)
        for g in groups:
            s = stack_paths(runs, g.runs, max_points=max_points, with_z=True)
            x, y, zz = _clip_box(s["x"], s["y"], s["z"], box, log_z)
            # a group none of whose runs settled is drawn faint and thin, as on the slice
            faint = not np.any(settled(runs, g.runs))
            fig.add_trace(
                {
                    "type": "scatter3d",
                    "x": x,
                    "y": y,
                    "z": zz,
                    "customdata": s["custom"],
                    "mode": "lines",
                    "name": g.name,
                    "showlegend": g.key in shown,
                    "opacity": UNCONVERGED["opacity"] if faint else 1.0,
                    "line": {"color": g.colour, "width": 2 if faint else 5, "dash": g.dash},
                    "hovertemplate": PATH_HOVER,
                    "uid": uid("relief", "path", g.key),
                }
            )
        hidden = [g for g in groups if g.key not in shown]
        if hidden:
            share = sum(g.total for g in hidden) / max(sum(g.total for g in groups), 1)
            fig.add_trace(
                {
                    "type": "scatter3d",
                    "x": [None],
                    "y": [None],
                    "z": [None],
                    "mode": "lines",
                    "name": legend_summary(len(hidden), share),
                    "line": {"color": "rgba(0,0,0,0)"},
                    "hoverinfo": "skip",
                    "uid": uid("relief", "legend-rest"),
                }
            )
        if left_out:
            n = sum(g.runs.size for g in groups)
            notes.append(f"Showing {n} of {n + left_out} runs (max_paths={max_paths}).")
    caution = slice_caution(plane)
    notes.insert(
        0,
        (caution + " " if caution else "")
        + "Path height is the loss each run recorded; a path off the surface has left the plane.",
    )
    layout = base_layout(title or "Loss relief over the slice")
    notes = [line for note in notes for line in wrap_lines(note)]  # none runs off the figure
    layout["margin"].update({"l": 10, "r": 10, "b": 70 + 17 * len(notes)})
    layout["legend"].update({"x": 0.01, "y": 0.98, "xanchor": "left", "yanchor": "top"})
    layout["showlegend"] = runs is not None
    fig.update_layout(layout)
    zaxis = {"title": {"text": "loss"}, "type": "log" if log_z else "linear"}
    if log_z:
        zaxis["dtick"] = 1
    scene = {
        "xaxis": {"title": {"text": plane.axis_titles[0]}},
        "yaxis": {"title": {"text": plane.axis_titles[1]}},
        "zaxis": zaxis,
        "aspectmode": "manual",
        "aspectratio": {"x": 1, "y": 1, "z": 0.6},
        "camera": {"eye": {"x": 1.5, "y": -1.5, "z": 1.0}},
    }
    fig.update_layout({"scene": scene})
    for i, text in enumerate(notes):
        add_note(fig, text, row=i)
    return fig.figure()


def _clip_box(x, y, z, box, log_z: bool):
    """NaN out path points outside the drawn box (diverging runs shoot off)."""
    a0, a1, b0, b1, _z0, z1 = box
    out = ~((x >= a0) & (x <= a1) & (y >= b0) & (y <= b1) & (z <= z1))
    if log_z:
        out |= ~(z > 0)
    x, y, z = x.copy(), y.copy(), z.copy()
    x[out] = np.nan
    y[out] = np.nan
    z[out] = np.nan
    return x, y, z

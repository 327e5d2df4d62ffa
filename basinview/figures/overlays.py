"""Drawing on a plane: descent paths, their ends and starts, critical points.

Shared by the slice and basin figures. Everything is drawn at its plane
coordinates ``(a, b)`` as the results hold them, with no shift: on an axes
plane these are the two parameters' own values, on other planes offsets
along the plane's directions (whose axis titles say so).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from ..core.descent import Runs
from ..core.errors import ParameterError
from ..core.planes import Plane
from .build import FigureSpec
from .paths import OUTCOME_KEYS, PathGroup, legend_groups, legend_summary, settled, stack_paths
from .style import LEGEND_LIMIT, UNCONVERGED, uid

__all__ = [
    "PATH_HOVER",
    "add_critical_points",
    "add_legend_summary",
    "add_paths",
    "check_runs_plane",
]

PATH_HOVER = (
    "run %{customdata[0]}<br>step %{customdata[1]}<br>loss %{customdata[2]:.4~g}"
    "<br>off-plane distance %{customdata[3]:.3~g}<extra>%{fullData.name}</extra>"
)


def _same_plane(p: Plane | None, q: Plane) -> bool:
    if p is None:
        return False
    if p is q:
        return True
    return all(
        np.allclose(np.asarray(x, np.float64), np.asarray(y, np.float64), rtol=1e-6, atol=1e-12)
        for x, y in ((p.origin, q.origin), (p.d1, q.d1), (p.d2, q.d2))
    )


def check_runs_plane(runs: Runs, plane: Plane) -> None:
    """Raise unless ``runs`` were recorded on ``plane`` (paths are projections on it)."""
    if not _same_plane(runs.plane, plane):
        raise ParameterError(
            "the runs were recorded on another plane than the surface's, so their paths "
            "cannot be drawn on it. Run descend(..., plane=surface.plane)."
        )


def _end_points(runs: Runs, group: PathGroup, bounds: tuple[float, float, float, float]):
    """Last drawn point of each run that lies inside ``bounds`` (for end markers)."""
    a0, a1, b0, b1 = bounds
    xs, ys, custom = [], [], []
    for r in group.runs:
        path = np.asarray(runs.trajectory(r), dtype=np.float64)
        inside = np.isfinite(path).all(axis=1)
        inside &= (path[:, 0] >= a0) & (path[:, 0] <= a1) & (path[:, 1] >= b0) & (path[:, 1] <= b1)
        last = np.flatnonzero(inside)
        if last.size == 0:
            continue
        k = int(last[-1])
        xs.append(path[k, 0])
        ys.append(path[k, 1])
        custom.append([r, k, float(runs.losses[r, k]), float(runs.off_plane[r, k])])
    return np.array(xs), np.array(ys), np.array(custom).reshape(-1, 4)


def _split_unconverged(runs: Runs, group: PathGroup) -> tuple[np.ndarray, np.ndarray]:
    """The group's drawn runs that settled, and those that did not (drawn fainter).

    Settled: converged without oscillating (:func:`~basinview.figures.paths.settled`).
    """
    if group.key in OUTCOME_KEYS:
        return group.runs[:0], group.runs
    calm = settled(runs, group.runs)
    return group.runs[calm], group.runs[~calm]


def add_legend_summary(
    fig: FigureSpec, groups: list[PathGroup], shown: set[str], figure: str, **extra: Any
) -> str | None:
    """One legend entry for the groups the legend leaves out; returns its text (or None)."""
    hidden = [g for g in groups if g.key not in shown]
    if not hidden:
        return None
    total = sum(g.total for g in groups)
    share = sum(g.total for g in hidden) / total if total else None
    text = legend_summary(len(hidden), share, noun="groups", of="runs")
    fig.add_trace(
        {
            "type": "scatter",
            "x": [None],
            "y": [None],
            "mode": "lines",
            "name": text,
            "line": {"color": "rgba(0,0,0,0)", "width": 1},
            "legendrank": 900,
            "hoverinfo": "skip",
            "uid": uid(figure, "legend-rest"),
            **extra,
        }
    )
    return text


def add_paths(
    fig: FigureSpec,
    runs: Runs,
    groups: list[PathGroup],
    bounds: tuple[float, float, float, float],
    max_points: int,
    *,
    legend_limit: int = LEGEND_LIMIT,
) -> None:
    """Draw the groups' paths, end markers and starts (see :func:`slice_figure`).

    Runs that converged without oscillating are drawn bold on a white
    casing; the others (oscillating, spent the budget, not stationary,
    diverged) fainter,
    thinner, with fewer points and no casing, so that a run zig-zagging
    across the view does not hide the contours. The legend names the
    ``legend_limit`` largest groups and every outcome; one entry sums up
    the rest.
    """
    shown = legend_groups(groups, legend_limit)
    # Runs that did not converge first (underneath): they zig-zag across the view.
    order = sorted(range(len(groups)), key=lambda i: groups[i].key not in OUTCOME_KEYS)
    rank = {groups[i].key: 10 + i for i in range(len(groups))}
    groups = [groups[i] for i in order]
    faint_points = max(4, int(max_points * UNCONVERGED["point_share"]))
    parts = [_split_unconverged(runs, g) for g in groups]
    bold = [stack_paths(runs, done, max_points=max_points) for done, _ in parts]
    faint = [stack_paths(runs, rest, max_points=faint_points) for _, rest in parts]
    # A white casing under converged paths keeps them readable on dark and light colours.
    cased = [s for s in bold if s["x"].size]
    if cased:
        fig.add_trace(
            {
                "type": "scatter",
                "x": np.concatenate([s["x"] for s in cased]),
                "y": np.concatenate([s["y"] for s in cased]),
                "mode": "lines",
                "line": {"color": "rgba(255,255,255,0.85)", "width": 4.5},
                "hoverinfo": "skip",
                "showlegend": False,
                "uid": uid("slice", "casing"),
            }
        )
    for g, (done, rest), b, f in zip(groups, parts, bold, faint):
        common = {
            "type": "scatter",
            "mode": "lines",
            "name": g.name,
            "legendgroup": g.key,
            "legendrank": rank[g.key],
            "hovertemplate": PATH_HOVER,
        }
        if rest.size:
            fig.add_trace(
                {
                    **common,
                    "x": f["x"],
                    "y": f["y"],
                    "customdata": f["custom"],
                    "showlegend": g.key in shown and not done.size,
                    "opacity": UNCONVERGED["opacity"],
                    "line": {"color": g.colour, "width": UNCONVERGED["width"], "dash": g.dash},
                    "uid": uid("slice", "path", g.key if not done.size else f"{g.key}-unconverged"),
                }
            )
        if done.size:
            fig.add_trace(
                {
                    **common,
                    "x": b["x"],
                    "y": b["y"],
                    "customdata": b["custom"],
                    "showlegend": g.key in shown,
                    "opacity": 1.0,
                    "line": {"color": g.colour, "width": 2, "dash": g.dash},
                    "uid": uid("slice", "path", g.key),
                }
            )
    for g, (done, _rest) in zip(groups, parts):
        ex, ey, ec = _end_points(runs, g, bounds)
        faint_end = not done.size
        fig.add_trace(
            {
                "type": "scatter",
                "x": ex,
                "y": ey,
                "customdata": ec,
                "mode": "markers",
                "name": f"{g.name} (end)",
                "legendgroup": g.key,
                "showlegend": False,
                "opacity": 0.7 if faint_end else 1.0,
                "marker": {
                    "symbol": g.end_symbol,
                    "size": 11 if g.key == "diverged" else 9,
                    "color": g.colour,
                    "line": {"color": g.colour if g.key == "diverged" else "white", "width": 1.5},
                },
                "hovertemplate": "end of run: " + PATH_HOVER,
                "uid": uid("slice", "end", g.key),
            }
        )
    add_legend_summary(fig, groups, shown, "slice")
    drawn = np.concatenate([g.runs for g in groups]) if groups else np.zeros(0, int)
    fig.add_trace(
        {
            "type": "scatter",
            "x": runs.path[drawn, 0, 0],
            "y": runs.path[drawn, 0, 1],
            "customdata": np.stack(
                [drawn, np.zeros_like(drawn), runs.losses[drawn, 0], runs.off_plane[drawn, 0]],
                axis=1,
            ),
            "mode": "markers",
            "name": "start",
            "legendrank": 1000,
            "marker": {
                "symbol": "circle",
                "size": 8,
                "color": "white",
                "line": {"color": "#2B2B2B", "width": 1.5},
            },
            "hovertemplate": "start: " + PATH_HOVER,
            "uid": uid("slice", "start"),
        }
    )


def add_critical_points(
    fig: FigureSpec, minima: Any, plane: Plane, figure: str, *, unlabelled: Any = ()
) -> None:
    """Mark the critical points at their projections, each with its letter.

    Points whose letters are in ``unlabelled`` get a marker without text (the
    basin map writes those letters inside their basins).
    """
    a, b, off = plane.project(np.asarray(minima.points, dtype=np.float64))
    labels = list(minima.labels)
    skip = set(unlabelled)
    custom = np.stack([np.asarray(minima.loss, np.float64), off], axis=1)
    kinds = [str(k) for k in minima.kind]
    fig.add_trace(
        {
            "type": "scatter",
            "x": a,
            "y": b,
            "text": ["" if lab in skip else lab for lab in labels],
            "customdata": custom,
            "hovertext": [f"{lab}: {kind}" for lab, kind in zip(labels, kinds)],
            "mode": "markers+text",
            "textposition": "top right",
            "textfont": {"size": 14, "color": "#111111"},
            "name": "critical points found",
            "marker": {
                "symbol": ["star" if k == "minimum" else "diamond-tall" for k in kinds],
                "size": 15,
                "color": "white",
                "line": {"color": "#111111", "width": 1.5},
            },
            "hovertemplate": (
                "%{hovertext}<br>loss %{customdata[0]:.4~g}<br>off-plane distance "
                "%{customdata[1]:.3~g}<extra></extra>"
            ),
            "uid": uid(figure, "critical-points"),
        }
    )

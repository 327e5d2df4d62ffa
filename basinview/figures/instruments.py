"""Figures of the instruments: the user's run on its own plane, curved paths, the spectrum.

* :func:`trajectory_figure`: contours of the loss on the plane of the run's
  top two principal directions, the run projected on it (hover: step, loss,
  off-plane distance), the explained variance in the axis titles.
* :func:`curved_path_figure`: the loss along the straight segment and along
  the fitted curve between two points, both barriers marked.
* :func:`density_figure`: the Hessian eigenvalue density on a log-count
  axis, outliers marked, the mass below zero stated.
"""

from __future__ import annotations

import numpy as np
import plotly.graph_objects as go

from ..core.bends import CurvedPath
from ..core.density import SpectralDensity
from ..core.descent import Runs
from ..core.errors import ParameterError
from ..core.surface import Surface
from ..core.trajectory import TrajectoryPlane
from .build import FigureSpec
from .levels import choose_levels
from .slices import contour_trace
from .style import (
    OKABE_ITO,
    add_note,
    base_layout,
    category_colour,
    uid,
)
from .text import significant

__all__ = ["curved_path_figure", "density_figure", "trajectory_figure"]


MAX_COMPARED = 8
"""At most this many of basinview's own runs are drawn beside the user's run."""


def trajectory_figure(
    surface: Surface,
    track: TrajectoryPlane,
    runs: Runs | None = None,
    *,
    levels: str = "auto",
    title: str | None = None,
) -> go.Figure:
    """The loss around the user's run, on the plane of its principal directions.

    Args:
        surface: :func:`~basinview.core.evaluate_surface` on ``track.plane``.
        track: the run, from :func:`~basinview.core.trajectory_plane`.
        runs: optional runs of :func:`~basinview.core.descend` recorded on
            ``track.plane`` (e.g. from the run's first checkpoint), drawn
            dashed for comparison (at most :data:`MAX_COMPARED`).
        levels: ``"auto"``, ``"linear"`` or ``"log"`` (see :func:`choose_levels`).
        title: figure title.
    """
    if surface.plane is not track.plane:
        raise ParameterError(
            "the surface was not evaluated on this run's plane; use "
            "evaluate_surface(problem, track.plane, ...)."
        )
    plane = track.plane
    lv = choose_levels(surface.loss, levels)
    fig = FigureSpec()
    fig.add_trace(
        contour_trace(
            surface,
            lv,
            titles=("PC1", "PC2"),
            name="loss on the plane",
            uid_=uid("trajectory", "surface"),
        )
    )
    custom = np.stack([track.steps, track.loss, track.off_plane], axis=1)
    hover = (
        "step %{customdata[0]:d}<br>loss %{customdata[1]:.4~g}<br>"
        "off the plane %{customdata[2]:.3~g}<extra></extra>"
    )
    line = {"type": "scatter", "x": track.a, "y": track.b, "name": "your run (projected)"}
    fig.add_trace(
        dict(
            line,
            mode="lines",
            line={"color": "white", "width": 5},
            hoverinfo="skip",
            showlegend=False,
            uid=uid("trajectory", "casing"),
        )
    )
    fig.add_trace(
        dict(
            line,
            mode="lines+markers",
            line={"color": category_colour(0), "width": 2.5},
            marker={"size": 5, "color": category_colour(0)},
            customdata=custom,
            hovertemplate=hover,
            uid=uid("trajectory", "run"),
        )
    )
    if runs is not None:
        _add_compared_runs(fig, runs, track)
    fig.add_trace(
        {
            "type": "scatter",
            "x": [track.a[0], 0.0],
            "y": [track.b[0], 0.0],
            "mode": "markers+text",
            "text": ["first checkpoint", "final"],
            "textposition": "top center",
            "marker": {
                "size": [11, 14],
                "symbol": ["circle", "star"],
                "color": ["white", OKABE_ITO["black"]],
                "line": {"color": OKABE_ITO["black"], "width": 1.5},
            },
            "customdata": custom[[0, -1]],
            "hovertemplate": hover,
            "name": "first and final checkpoints",
            "uid": uid("trajectory", "ends"),
        }
    )
    off = float(np.max(track.off_plane))
    notes = [
        f"The two directions explain {100 * track.explained_total:.1f}% of the run's variance; "
        f"largest off-plane distance of a checkpoint {significant(off, 3)} (see hover).",
        f"2-D slice of a {plane.size}-parameter loss: contours are the loss on the plane, "
        "not along the run.",
    ]
    if track.caution:
        notes.append(track.caution)
    sub = f"{track.steps.size} checkpoints, steps {int(track.steps[0])} to {int(track.steps[-1])}"
    layout = base_layout(title or "Your run on the plane of its principal directions", sub)
    layout["margin"]["b"] = 80 + 17 * len(notes)
    layout["legend"].update({"x": 1.16, "y": 1, "xanchor": "left"})
    layout["margin"]["r"] = 220
    fig.update_layout(layout)
    bounds = (
        [float(surface.a[0]), float(surface.a[-1])],
        [float(surface.b[0]), float(surface.b[-1])],
    )
    fig.update_layout(
        {
            "xaxis": {
                "title": {"text": plane.axis_titles[0]},
                "range": bounds[0],
                "showgrid": False,
            },
            "yaxis": {
                "title": {"text": plane.axis_titles[1]},
                "range": bounds[1],
                "showgrid": False,
            },
        }
    )
    for i, text in enumerate(notes):
        add_note(fig, text, row=i)
    return fig.figure()


def _add_compared_runs(fig: FigureSpec, runs: Runs, track: TrajectoryPlane) -> None:
    plane = track.plane
    same = runs.plane is not None and all(
        np.array_equal(getattr(runs.plane, k), getattr(plane, k)) for k in ("origin", "d1", "d2")
    )
    if not same:
        raise ParameterError(
            "the runs were recorded on another plane than the run's; use "
            "descend(problem, ..., plane=track.plane)."
        )
    hover = (
        "%{meta}<br>step %{customdata[0]:d}<br>loss %{customdata[1]:.4~g}<br>"
        "off the plane %{customdata[2]:.3~g}<extra></extra>"
    )
    for r in range(min(len(runs), MAX_COMPARED)):
        last = int(runs.stop_step[r])
        path = runs.path[r, : last + 1]
        steps = np.arange(last + 1)
        custom = np.stack([steps, runs.losses[r, : last + 1], runs.off_plane[r, : last + 1]], 1)
        lr = float(runs.hyper["learning_rate"][r]) if "learning_rate" in runs.hyper else None
        name = f"basinview {runs.rule}" + (f", lr {significant(lr, 3)}" if lr is not None else "")
        fig.add_trace(
            {
                "type": "scatter",
                "x": path[:, 0],
                "y": path[:, 1],
                "mode": "lines",
                "line": {"color": category_colour(r + 1), "width": 2, "dash": "dash"},
                "customdata": custom,
                "meta": name,
                "hovertemplate": hover,
                "name": f"{name} ({runs.status[r]})",
                "uid": uid("trajectory", "compared", r),
            }
        )


def curved_path_figure(path: CurvedPath, *, title: str | None = None) -> go.Figure:
    """Loss along the straight segment and along the fitted curve, barriers marked.

    Caution on the figure: a low curve shows the two points are connected at
    that loss; a curve that stays high does not show they are separate.
    """
    seg = path.segment
    inside = (seg.t >= -1e-12) & (seg.t <= 1 + 1e-12)
    fig = FigureSpec()
    ends = max(float(path.loss[0]), float(path.loss[-1]))
    for key, t, loss, barrier, colour, dash in (
        ("segment", seg.t[inside], seg.loss[inside], path.segment_barrier, "#2B2B2B", "dash"),
        ("curve", path.t, path.loss, path.barrier, category_colour(1), "solid"),
    ):
        loss = np.where(np.isfinite(loss), loss, np.nan)
        name = "straight segment" if key == "segment" else "fitted curve"
        fig.add_trace(
            {
                "type": "scatter",
                "x": t,
                "y": loss,
                "mode": "lines",
                "line": {"color": colour, "width": 2.5, "dash": dash},
                "name": f"{name} (barrier {significant(barrier, 3)})",
                "hovertemplate": f"{name}<br>t %{{x:.3f}}<br>loss %{{y:.4~g}}<extra></extra>",
                "uid": uid("bend", key),
            }
        )
        if np.isfinite(loss).any():
            k = int(np.nanargmax(loss))
            fig.add_trace(
                {
                    "type": "scatter",
                    "x": [float(t[k])],
                    "y": [float(loss[k])],
                    "mode": "markers+text",
                    "marker": {"size": 10, "color": colour, "symbol": "triangle-up"},
                    "text": [f"{key} barrier {significant(barrier, 3)}"],
                    "textposition": "top center",
                    "showlegend": False,
                    "name": f"{key} top",
                    "hovertemplate": f"highest point of the {key}<br>loss %{{y:.4~g}}<extra></extra>",
                    "uid": uid("bend", "top", key),
                }
            )
    fig.add_shape(
        type="line",
        xref="x domain",
        x0=0,
        x1=1,
        yref="y",
        y0=ends,
        y1=ends,
        line={"color": "#6A6A6A", "dash": "dot", "width": 1},
    )
    s = path.summary()
    sub = (
        f"segment barrier {significant(path.segment_barrier, 4)}, curve barrier {significant(path.barrier, 4)}; "
        f"lengths {significant(s['length'][0], 4)} and {significant(s['length'][1], 4)}"
    )
    layout = base_layout(title or "Straight and curved paths between two points", sub)
    layout["xaxis"] = {"title": {"text": "t (0 = start, 1 = end)"}}
    layout["yaxis"] = {"title": {"text": "loss"}}
    layout["legend"].update({"x": 0.01, "y": 0.99, "xanchor": "left", "yanchor": "top"})
    fig.update_layout(layout)
    add_note(
        fig,
        "A low curve shows the points are connected at that loss; a high curve does not show "
        "they are separate (another curve may do better).",
    )
    add_note(
        fig,
        "Barrier: highest loss on the path above the higher endpoint (dotted line).",
        row=1,
    )
    return fig.figure()


def density_figure(
    density: SpectralDensity, *, floor: float | None = None, title: str | None = None
) -> go.Figure:
    """The Hessian eigenvalue density on a log-count axis, with the mass below zero stated.

    Args:
        density: from :func:`~basinview.core.hessian_density`.
        floor: smallest density drawn (default ``1e-6`` times the peak);
            the log axis cannot show zero.
        title: figure title.
    """
    dens = np.asarray(density.density, dtype=np.float64)
    peak = float(np.max(dens)) if dens.size else 1.0
    lowest = floor if floor is not None else 1e-6 * peak
    if not (np.isfinite(lowest) and lowest > 0):
        raise ParameterError(f"floor must be a positive number; got {floor!r}.")
    shown = np.maximum(dens, lowest)
    fig = FigureSpec()
    neg = density.grid < 0
    if neg.any():
        fig.add_trace(
            {
                "type": "scatter",
                "x": density.grid[neg],
                "y": shown[neg],
                "mode": "lines",
                "fill": "tozeroy",
                "fillcolor": "rgba(213,94,0,0.25)",
                "line": {"color": OKABE_ITO["vermillion"], "width": 0},
                "name": "below zero",
                "hoverinfo": "skip",
                "uid": uid("density", "negative"),
            }
        )
    fig.add_trace(
        {
            "type": "scatter",
            "x": density.grid,
            "y": shown,
            "mode": "lines",
            "line": {"color": OKABE_ITO["blue"], "width": 2},
            "name": "eigenvalue density",
            "hovertemplate": "eigenvalue %{x:.4~g}<br>density %{y:.3~g} per unit<extra></extra>",
            "uid": uid("density", "curve"),
        }
    )
    out = density.outliers
    if len(out):
        fig.add_trace(
            {
                "type": "scatter",
                "x": out["value"].to_numpy(),
                "y": np.interp(out["value"].to_numpy(), density.grid, shown),
                "mode": "markers",
                "marker": {"size": 10, "color": OKABE_ITO["vermillion"], "symbol": "diamond"},
                "customdata": out[["count", "probes"]].to_numpy(),
                "name": "outliers",
                "hovertemplate": (
                    "outlier %{x:.4~g}<br>stands for %{customdata[0]:.2~g} eigenvalues<br>"
                    "found by %{customdata[1]:d} probes<extra></extra>"
                ),
                "uid": uid("density", "outliers"),
            }
        )
    fig.add_shape(
        type="line",
        x0=0,
        x1=0,
        xref="x",
        y0=0,
        y1=1,
        yref="y domain",
        line={"color": "#6A6A6A", "dash": "dot", "width": 1},
    )
    mass = density.negative_mass
    se = density.negative_mass_standard_error
    se_text = f" ± {significant(100 * se, 2)}%" if np.isfinite(se) else ""
    neg_text = (
        f"mass below zero {significant(100 * mass, 3)}%{se_text} (about {significant(density.negative_count, 3)} of "
        f"{density.size} eigenvalues)"
    )
    tse = density.trace_standard_error
    sub = f"{neg_text}; trace ≈ {significant(density.trace, 4)}" + (
        f" ± {significant(tse, 2)}" if np.isfinite(tse) else ""
    )
    layout = base_layout(title or "Hessian eigenvalue density", sub)
    layout["xaxis"] = {"title": {"text": "eigenvalue"}}
    layout["yaxis"] = {
        "title": {"text": "eigenvalues per unit (log scale)"},
        "type": "log",
        "exponentformat": "power",
    }
    layout["legend"].update(
        {"orientation": "h", "x": 0, "y": 1.0, "xanchor": "left", "yanchor": "bottom"}
    )
    fig.update_layout(layout)
    s = density.settings
    add_note(
        fig,
        f"Stochastic Lanczos quadrature: {s['probes']} probes × {s['steps']} steps, Gaussian "
        f"smoothing of width {significant(density.width, 3)}; features narrower than that are merged.",
    )
    if mass > 0:
        add_note(
            fig,
            "Negative mass: this point is not a minimum of the model, whatever a slice shows.",
            row=1,
        )
    return fig.figure()

"""Loss against step for each run (the step-size sweep figure lives in :mod:`.sweep`)."""

from __future__ import annotations

from typing import Any

import numpy as np
import plotly.graph_objects as go

from ..core.descent import Runs
from ..core.errors import ParameterError
from .build import FigureSpec, wrap_lines
from .overlays import add_legend_summary
from .paths import (
    OUTCOME_KEYS,
    colour_note,
    draw_indices,
    group_runs,
    legend_groups,
    select_runs,
    settled,
)
from .style import (
    DIVERGED,
    LEGEND_LIMIT,
    UNCONVERGED,
    add_note,
    base_layout,
    uid,
)
from .sweep import REGIME_COLOURS, step_size_figure
from .text import significant

__all__ = ["REGIME_COLOURS", "loss_curves_figure", "step_size_figure"]

_YSCALES = ("auto", "log", "linear", "excess")


def loss_curves_figure(
    runs: Runs,
    *,
    minima: Any = None,
    solutions: Any = None,
    which: Any = None,
    color_by: str = "auto",
    yscale: str = "auto",
    max_paths: int = 60,
    max_points: int = 400,
    legend_limit: int = LEGEND_LIMIT,
    title: str | None = None,
) -> go.Figure:
    """Loss against step for each run, coloured like the paths on the slice.

    The loss axis is fitted to the runs that did not diverge, so one run
    that blows up does not flatten every other curve; a diverged run's
    curve leaves the axis at the top, where a grey triangle marks the step
    it left (hover gives its last finite loss). Runs that did not converge
    are drawn fainter and thinner than those that did.

    Args:
        runs: descent runs.
        minima, solutions, which, color_by, max_paths, max_points, legend_limit: as for
            :func:`~basinview.figures.slice_figure`.
        yscale: ``"auto"`` (logarithmic when every drawn loss is positive,
            else linear, which the axis title says), ``"log"`` (needs
            positive losses), ``"linear"``, or ``"excess"`` (loss minus the
            lowest loss any drawn run reached, on a log axis; points equal
            to that lowest loss cannot be shown on it and are left out).
        title: figure title.
    """
    if yscale not in _YSCALES:
        raise ParameterError(f"yscale must be one of {_YSCALES}; got {yscale!r}.")
    groups, left_out = select_runs(
        group_runs(runs, minima=minima, color_by=color_by, which=which, solutions=solutions),
        max_paths,
    )
    shown = legend_groups(groups, legend_limit)
    drawn = np.concatenate([g.runs for g in groups]) if groups else np.zeros(0, int)
    status = np.asarray(runs.status)
    losses = np.asarray(runs.losses, dtype=np.float64)
    values = np.concatenate([runs.loss_curve(r) for r in drawn]) if drawn.size else np.zeros(0)
    values = values[np.isfinite(values)]
    low = float(values.min()) if values.size else 0.0
    if yscale == "log" and values.size and low <= 0:
        raise ParameterError(
            f"yscale='log' needs positive losses; the lowest drawn loss is {significant(low)}. "
            "Use yscale='excess' (loss minus the lowest loss) or 'linear'."
        )
    if yscale == "auto":
        yscale = "log" if low > 0 else "linear"
    shift = low if yscale == "excess" else 0.0
    log_axis = yscale in ("log", "excess")
    axis_title = {
        "log": "loss (log scale)",
        "linear": "loss" if low > 0 or not values.size else "loss (linear: some losses ≤ 0)",
        "excess": f"loss − lowest loss reached ({significant(low, 5)}), log scale",
    }[yscale]
    fig = FigureSpec()
    for rank, g in enumerate(groups):
        xs, ys, cs = [], [], []
        for r in g.runs:
            keep = draw_indices(int(runs.stop_step[r]) + 1, max_points)
            y = losses[r, keep] - shift
            y[~np.isfinite(y)] = np.nan
            if log_axis:
                y[y <= 0] = np.nan
            xs.append(np.append(keep, np.nan))
            ys.append(np.append(y, np.nan))
            cs.append(np.append(np.full(keep.size, r, dtype=np.float64), np.nan))
        faint = g.key in OUTCOME_KEYS or not np.any(settled(runs, g.runs))
        fig.add_trace(
            {
                "type": "scatter",
                "x": np.concatenate(xs),
                "y": np.concatenate(ys),
                "customdata": np.stack([np.concatenate(cs), np.concatenate(ys) + shift], axis=1),
                "mode": "lines",
                "name": g.name,
                "legendgroup": g.key,
                "legendrank": 10 + rank,
                "showlegend": g.key in shown,
                "line": {
                    "color": g.colour,
                    "width": UNCONVERGED["width"] if faint else 1.8,
                    "dash": g.dash,
                },
                "opacity": UNCONVERGED["opacity"] + 0.2 if faint else 0.9,
                "hovertemplate": (
                    "run %{customdata[0]}<br>step %{x}<br>loss %{customdata[1]:.4~g}"
                    "<extra>%{fullData.name}</extra>"
                ),
                "uid": uid("curves", "runs", g.key),
            }
        )
    add_legend_summary(fig, groups, shown, "curves")
    notes = []
    if left_out:
        notes.append(
            f"Showing {drawn.size} of {drawn.size + left_out} runs (max_paths={max_paths})."
        )
    if colour_note(groups):
        notes.append(colour_note(groups).split(":")[0] + "; hover or the legend tells them apart.")
    diverged = drawn[status[drawn] == "diverged"]
    yrange = _tame_range(runs, drawn[status[drawn] != "diverged"], shift, log_axis)
    if diverged.size:
        notes.append(
            f"{diverged.size} drawn run(s) diverged (grey, dashed): each curve ends where the "
            "loss became non-finite or rose past the divergence threshold."
        )
        if yrange is not None:
            _mark_diverged(fig, runs, diverged, yrange, shift, log_axis)
            notes.append(
                "The loss axis is fitted to the runs that did not diverge; ▲ at the top marks "
                "where a diverged run leaves it."
            )
    layout = base_layout(title or "Loss against step", f"{len(runs)} runs of {runs.rule}")
    notes = [line for note in notes for line in wrap_lines(note)]  # none runs off the figure
    layout["margin"]["b"] = 80 + 17 * len(notes)
    layout["showlegend"] = True
    fig.update_layout(layout)
    yaxis: dict[str, Any] = {
        "title": {"text": axis_title},
        "type": "log" if log_axis else "linear",
    }
    if log_axis:
        yaxis.update(exponentformat="power")
        decades = _tame_range(runs, drawn, shift, log_axis) if yrange is None else yrange
        if decades is not None and decades[1] - decades[0] >= 2.5:
            yaxis["dtick"] = 1  # a label per decade; no crowded minor labels
        elif decades is not None and decades[1] - decades[0] >= 1:
            yaxis["dtick"] = "D2"  # 1, 2 and 5 of each decade
    if yrange is not None and diverged.size:
        yaxis["range"] = list(yrange)
    fig.update_layout({"xaxis": {"title": {"text": "step"}, "rangemode": "tozero"}, "yaxis": yaxis})
    for i, text in enumerate(notes):
        add_note(fig, text, row=i)
    return fig.figure()


def _tame_range(
    runs: Runs, tame: np.ndarray, shift: float, log_axis: bool
) -> tuple[float, float] | None:
    """Axis range (log10 units on a log axis) covering the drawn curves of ``tame`` runs."""
    if not tame.size:
        return None
    vals = np.concatenate([runs.loss_curve(r) for r in tame]).astype(np.float64) - shift
    vals = vals[np.isfinite(vals)]
    if log_axis:
        vals = vals[vals > 0]
    if not vals.size:
        return None
    lo, hi = float(vals.min()), float(vals.max())
    if log_axis:
        lo, hi = np.log10(lo), np.log10(hi)
        pad = min(0.05 * (hi - lo or 1.0), 0.1)  # at most a quarter of a decade
    else:
        pad = 0.05 * (hi - lo or abs(hi) or 1.0)
    return float(lo - pad), float(hi + pad)


def _mark_diverged(
    fig: FigureSpec,
    runs: Runs,
    diverged: np.ndarray,
    yrange: tuple[float, float],
    shift: float,
    log_axis: bool,
) -> None:
    """A marker at the top edge where each diverged run's curve leaves the axis."""
    top = 10 ** yrange[1] if log_axis else yrange[1]
    xs, rows = [], []
    for r in diverged:
        curve = np.asarray(runs.loss_curve(r), dtype=np.float64) - shift
        out = ~np.isfinite(curve) | (curve > top)
        k = int(np.argmax(out)) if out.any() else curve.size - 1
        finite = np.flatnonzero(np.isfinite(curve[: k + 1]))
        last = float(curve[finite[-1]] + shift) if finite.size else np.nan
        xs.append(k)
        rows.append([float(r), last])
    fig.add_trace(
        {
            "type": "scatter",
            "x": np.asarray(xs, dtype=np.float64),
            "y": np.full(len(xs), top),
            "customdata": np.asarray(rows, dtype=np.float64),
            "mode": "markers",
            "name": "diverged: leaves the axis",
            "legendgroup": "diverged",
            "showlegend": False,
            "cliponaxis": False,
            "marker": {
                "symbol": "triangle-up",
                "size": 10,
                "color": DIVERGED["colour"],
                "line": {"color": "white", "width": 1},
            },
            "hovertemplate": (
                "run %{customdata[0]} diverged<br>leaves the axis at step %{x}"
                "<br>loss there %{customdata[1]:.4~g}<extra></extra>"
            ),
            "uid": uid("curves", "diverged-edge"),
        }
    )

"""Figures over steps and learning rates: loss curves and the step-size sweep."""

from __future__ import annotations

from typing import Any

import numpy as np
import plotly.graph_objects as go
from plotly._subplots import SubplotRef

from ..core.descent import Runs
from ..core.errors import ParameterError
from .build import FigureSpec
from .levels import choose_levels
from .paths import colour_note, draw_indices, group_runs, select_runs
from .style import DIVERGED, NOT_CONVERGED, OKABE_ITO, add_note, base_layout, uid

__all__ = ["REGIME_COLOURS", "loss_curves_figure", "step_size_figure"]

#: One colour per step-size regime (Okabe & Ito 2008 palette).
REGIME_COLOURS = {
    "crawl": OKABE_ITO["sky blue"],
    "converge": OKABE_ITO["bluish green"],
    "oscillate": OKABE_ITO["orange"],
    "diverge": OKABE_ITO["vermillion"],
}

_YSCALES = ("auto", "log", "linear", "excess")


def loss_curves_figure(
    runs: Runs,
    *,
    minima: Any = None,
    which: Any = None,
    color_by: str = "auto",
    yscale: str = "auto",
    max_paths: int = 60,
    max_points: int = 400,
    title: str | None = None,
) -> go.Figure:
    """Loss against step for each run, coloured like the paths on the slice.

    Args:
        runs: descent runs.
        minima, which, color_by, max_paths, max_points: as for
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
        group_runs(runs, minima=minima, color_by=color_by, which=which), max_paths
    )
    drawn = np.concatenate([g.runs for g in groups]) if groups else np.zeros(0, int)
    losses = np.asarray(runs.losses, dtype=np.float64)
    values = np.concatenate([runs.loss_curve(r) for r in drawn]) if drawn.size else np.zeros(0)
    values = values[np.isfinite(values)]
    low = float(values.min()) if values.size else 0.0
    if yscale == "log" and values.size and low <= 0:
        raise ParameterError(
            f"yscale='log' needs positive losses; the lowest drawn loss is {low:.4g}. "
            "Use yscale='excess' (loss minus the lowest loss) or 'linear'."
        )
    if yscale == "auto":
        yscale = "log" if low > 0 else "linear"
    shift = low if yscale == "excess" else 0.0
    axis_title = {
        "log": "loss (log scale)",
        "linear": "loss" if low > 0 or not values.size else "loss (linear: some losses ≤ 0)",
        "excess": f"loss − lowest loss reached ({low:.5g}), log scale",
    }[yscale]
    fig = FigureSpec()
    for rank, g in enumerate(groups):
        xs, ys, cs = [], [], []
        for r in g.runs:
            keep = draw_indices(int(runs.stop_step[r]) + 1, max_points)
            y = losses[r, keep] - shift
            y[~np.isfinite(y)] = np.nan
            if yscale in ("log", "excess"):
                y[y <= 0] = np.nan
            xs.append(np.append(keep, np.nan))
            ys.append(np.append(y, np.nan))
            cs.append(np.append(np.full(keep.size, r, dtype=np.float64), np.nan))
        thin = g.key == "diverged"
        fig.add_trace(
            {
                "type": "scatter",
                "x": np.concatenate(xs),
                "y": np.concatenate(ys),
                "customdata": np.stack([np.concatenate(cs), np.concatenate(ys) + shift], axis=1),
                "mode": "lines",
                "name": g.name,
                "legendrank": 10 + rank,
                "line": {"color": g.colour, "width": 1.2 if thin else 1.8, "dash": g.dash},
                "opacity": 0.8 if thin else 0.9,
                "hovertemplate": (
                    "run %{customdata[0]}<br>step %{x}<br>loss %{customdata[1]:.6g}"
                    "<extra>%{fullData.name}</extra>"
                ),
                "uid": uid("curves", "runs", g.key),
            }
        )
    notes = []
    if left_out:
        notes.append(
            f"Showing {drawn.size} of {drawn.size + left_out} runs (max_paths={max_paths})."
        )
    if colour_note(groups):
        notes.append(colour_note(groups).split(":")[0] + "; hover or the legend tells them apart.")
    n_div = int(np.sum(np.asarray(runs.status)[drawn] == "diverged"))
    if n_div:
        notes.append(
            f"{n_div} drawn run(s) diverged (grey, dashed): each curve ends where the loss became "
            "non-finite or rose past the divergence threshold."
        )
    layout = base_layout(title or "Loss against step", f"{len(runs)} runs of {runs.rule}")
    layout["margin"]["b"] = 80 + 17 * len(notes)
    layout["showlegend"] = True
    fig.update_layout(layout)
    yaxis: dict[str, Any] = {
        "title": {"text": axis_title},
        "type": "log" if yscale in ("log", "excess") else "linear",
    }
    if yscale in ("log", "excess"):
        yaxis.update(dtick=1, exponentformat="power")
    fig.update_layout({"xaxis": {"title": {"text": "step"}, "rangemode": "tozero"}, "yaxis": yaxis})
    if yscale == "linear":
        tame = np.concatenate(
            [runs.loss_curve(r) for r in drawn if runs.status[r] != "diverged"] or [np.zeros(0)]
        )
        tame = tame[np.isfinite(tame)]
        if n_div and tame.size:
            pad = 0.05 * (tame.max() - tame.min() or 1.0)
            fig.layout["yaxis"]["range"] = [float(tame.min() - pad), float(tame.max() + pad)]
            notes.append("The axis is fitted to the runs that did not diverge.")
    for i, text in enumerate(notes):
        add_note(fig, text, row=i)
    return fig.figure()


def _edges(rates: np.ndarray) -> np.ndarray:
    """Band edges halfway (geometrically) between sorted positive rates."""
    lr = np.log10(rates)
    mid = (lr[1:] + lr[:-1]) / 2
    step = np.diff(lr).mean() if lr.size > 1 else 0.5
    return 10 ** np.concatenate([[lr[0] - step / 2], mid, [lr[-1] + step / 2]])


def step_size_figure(sweep: Any, *, y: str = "final_loss", title: str | None = None) -> go.Figure:
    """What each learning rate did: median outcome, run statuses, and the stability bound.

    Top panel: the median final loss (``y="final_loss"``) or the median steps
    to tolerance (``y="steps"``) against the learning rate on a log axis,
    with each rate's regime as a coloured band. Bottom panel: the share of
    runs that converged, spent the budget, or diverged. The predicted
    stability bound is a dashed vertical line; the observed one (largest
    rate at which every run converged) is a dotted line. Hovering a rate
    shows its stability ratio: the rate over the predicted bound, or for
    Adam and RMSProp ``lr * lambda_max(P^-1 H)`` over their threshold.

    Args:
        sweep: a :class:`~basinview.core.stepsize.StepSizeSweep`.
        y: ``"final_loss"`` or ``"steps"``.
        title: figure title.

    Caution: the predicted bound uses the curvature at one point; far from
    that point the loss can be steeper or flatter.
    """
    if y not in ("final_loss", "steps"):
        raise ParameterError(f"y must be 'final_loss' or 'steps'; got {y!r}.")
    table = sweep.table.sort_values("learning_rate").reset_index(drop=True)
    rates = table["learning_rate"].to_numpy(dtype=np.float64)
    if rates.size == 0 or np.any(rates <= 0):
        raise ParameterError("the sweep needs positive learning rates to draw on a log axis.")
    column = "median_final_loss" if y == "final_loss" else "median_steps_to_tol"
    values = table[column].to_numpy(dtype=np.float64, na_value=np.nan)
    regimes = table["regime"].astype(str).to_list()
    ratio = (
        table["stability_ratio"].to_numpy(dtype=np.float64, na_value=np.nan)
        if "stability_ratio" in table
        else np.full(len(table), np.nan)
    )
    ratio_text = np.array(
        [f"{r:.3g}" if np.isfinite(r) else "n/a" for r in ratio], dtype=object
    )
    fig = _two_rows()
    edges = _edges(rates)
    finite = values[np.isfinite(values)]
    log_y = y == "final_loss" and finite.size > 1 and choose_levels(finite).mode == "log"
    if finite.size:
        top = (
            finite.max() * 3
            if log_y
            else finite.max() + 0.12 * (np.ptp(finite) or abs(finite.max()) or 1.0)
        )
    else:
        top = 1.0
    for regime, colour in REGIME_COLOURS.items():
        mask = np.array([r == regime for r in regimes])
        if not mask.any():
            continue
        shown = mask & np.isfinite(values)
        lost = mask & ~np.isfinite(values)
        fig.add_trace(
            {
                "type": "scatter",
                "x": np.concatenate([rates[shown], rates[lost]]),
                "y": np.concatenate([values[shown], np.full(lost.sum(), top)]),
                "customdata": np.column_stack(
                    [
                        np.concatenate(
                            [
                                values[shown].astype(object),
                                np.full(lost.sum(), "none (not finite)", dtype=object),
                            ]
                        ),
                        np.concatenate([ratio_text[shown], ratio_text[lost]]),
                    ]
                ),
                "mode": "markers",
                "name": regime,
                "legendgroup": "regime",
                "legendgrouptitle": {"text": "regime"},
                "legendrank": 10 + list(REGIME_COLOURS).index(regime),
                "marker": {
                    "size": 11,
                    "color": colour,
                    "symbol": ["circle"] * int(shown.sum()) + ["x-thin-open"] * int(lost.sum()),
                    "line": {"color": colour if lost.any() else "white", "width": 1.5},
                },
                "hovertemplate": (
                    "learning rate %{x:.4g}<br>" + column.replace("_", " ") + " %{customdata[0]}"
                    "<br>stability ratio %{customdata[1]}"
                    f"<extra>{regime}</extra>"
                ),
                "uid": uid("sweep", "regime", regime),
                **_ROW[1],
            }
        )
    fig.add_trace(
        {
            "type": "scatter",
            "x": rates,
            "y": values,
            "mode": "lines",
            "line": {"color": "#9A9A9A", "width": 1},
            "connectgaps": False,
            "hoverinfo": "skip",
            "showlegend": False,
            "uid": uid("sweep", "trend"),
            **_ROW[1],
        }
    )
    runs_col = table["runs"].to_numpy(dtype=np.float64)
    shares = [
        ("converged", table["converged"], OKABE_ITO["bluish green"]),
        (NOT_CONVERGED["name"], table["max_steps"], NOT_CONVERGED["colour"]),
        (DIVERGED["name"], table["diverged"], DIVERGED["colour"]),
    ]
    for rank, (name, counts, colour) in enumerate(shares):
        share = counts.to_numpy(dtype=np.float64) / np.maximum(runs_col, 1)
        fig.add_trace(
            {
                "type": "scatter",
                "x": rates,
                "y": share,
                "mode": "lines+markers",
                "stackgroup": "status",
                "name": name,
                "legendgroup": "status",
                "legendgrouptitle": {"text": "share of runs"},
                "legendrank": 20 + rank,
                "line": {"color": colour, "width": 1},
                "fillcolor": _tint(colour, 0.45),
                "marker": {"size": 5},
                "hovertemplate": "learning rate %{x:.4g}<br>%{y:.0%} " + name + "<extra></extra>",
                "uid": uid("sweep", "share", name.replace(" ", "-")),
                **_ROW[2],
            }
        )
    # Regime bands span the top panel's height ("y domain") at data values of x.
    for i, regime in enumerate(regimes):
        fig.add_shape(
            fillcolor=REGIME_COLOURS.get(regime, "#DDDDDD"),
            layer="below",
            line={"width": 0},
            opacity=0.16,
            type="rect",
            x0=edges[i],
            x1=edges[i + 1],
            xref="x",
            y0=0,
            y1=1,
            yref="y domain",
        )
    _bounds(fig, sweep)
    subtitle = (
        f"{sweep.optimizer}, λmax = {sweep.lambda_max:.4g}" if _has(sweep, "lambda_max") else ""
    )
    layout = base_layout(title or "Step size: what each learning rate did", subtitle)
    layout["margin"]["b"] = 100
    layout["showlegend"] = True
    fig.update_layout(layout)
    log_x = {
        "type": "log",
        "exponentformat": "power",
        "dtick": 1,
        "range": [float(np.log10(edges[0])), float(np.log10(edges[-1]))],
    }
    ylabel = "median final loss" if y == "final_loss" else "median steps to tolerance"
    top_y: dict[str, Any] = {"title": {"text": ylabel + (" (log scale)" if log_y else "")}}
    if log_y:
        top_y.update(type="log", exponentformat="power")
    fig.update_layout(
        {
            "xaxis": log_x,
            "xaxis2": {**log_x, "title": {"text": "learning rate (log scale)"}},
            "yaxis": top_y,
            "yaxis2": {"title": {"text": "share"}, "range": [0, 1], "tickformat": ".0%"},
        }
    )
    missing = int(np.sum(~np.isfinite(values)))
    note = (
        "The predicted bound comes from the curvature at one point; elsewhere the loss may be "
        "steeper or flatter."
    )
    if missing:
        note += f" × at the top: no finite {ylabel} at that rate."
    add_note(fig, note)
    return fig.figure()


#: Axes of the two panels of the step-size figure (top: x, y; bottom: x2, y2).
_ROW = {1: {"xaxis": "x", "yaxis": "y"}, 2: {"xaxis": "x2", "yaxis": "y2"}}


def _two_rows() -> FigureSpec:
    """Two panels sharing the x axis, heights 0.68 : 0.32 with a 0.06 gap.

    The same layout (and subplot grid, so ``fig.add_trace(..., row=2, col=1)``
    works on the result) as ``plotly.subplots.make_subplots(rows=2, cols=1,
    shared_xaxes=True, row_heights=[0.68, 0.32], vertical_spacing=0.06)``.
    """
    fig = FigureSpec(
        {
            "xaxis": {
                "anchor": "y",
                "domain": [0.0, 1.0],
                "matches": "x2",
                "showticklabels": False,
            },
            "yaxis": {"anchor": "x", "domain": [0.3608, 1.0]},
            "xaxis2": {"anchor": "y2", "domain": [0.0, 1.0]},
            "yaxis2": {"anchor": "x2", "domain": [0.0, 0.3008]},
        }
    )
    grid = [
        [(SubplotRef("xy", ("xaxis", "yaxis"), {"xaxis": "x", "yaxis": "y"}),)],
        [(SubplotRef("xy", ("xaxis2", "yaxis2"), {"xaxis": "x2", "yaxis": "y2"}),)],
    ]
    text = "This is the format of your plot grid:\n[ (1,1) x,y   ]\n[ (2,1) x2,y2 ]\n"
    fig.grid = (text, grid)
    return fig


def _tint(colour: str, alpha: float) -> str:
    r, g, b = (int(colour[i : i + 2], 16) for i in (1, 3, 5))
    return f"rgba({r},{g},{b},{alpha})"


def _has(obj: Any, name: str) -> bool:
    value = getattr(obj, name, None)
    return value is not None and np.isfinite(value)


def _bounds(fig: FigureSpec, sweep: Any) -> None:
    for name, dash, label, anchor in (
        ("predicted_bound", "dash", "predicted bound", "left"),
        ("observed_bound", "dot", "observed bound", "right"),
    ):
        if not _has(sweep, name):
            continue
        x = float(getattr(sweep, name))
        for xref, yref in (("x", "y domain"), ("x2", "y2 domain")):
            fig.add_shape(
                line={"color": "#111111", "dash": dash, "width": 1.6},
                type="line",
                x0=x,
                x1=x,
                xref=xref,
                y0=0,
                y1=1,
                yref=yref,
            )
        # Annotations on a log axis take log10 positions (shapes take data values).
        fig.add_annotation(
            x=np.log10(x),
            xref="x",
            y=1,
            yref="y domain",
            yanchor="top",
            xanchor=anchor,
            xshift=4 if anchor == "left" else -4,
            text=f"{label} {x:.3g}",
            showarrow=False,
            font={"size": 12},
            bgcolor="rgba(255,255,255,0.85)",
        )

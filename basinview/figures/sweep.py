"""The step-size sweep figure: what each learning rate did, with the stability bounds.

Two panels on one log learning-rate axis, built as plain layout dicts (each
axis names its domain and anchor; each trace its axes): the median outcome
per rate over regime bands, and the share of runs by status. The predicted
and observed bounds are vertical lines whose labels never overlap
(:func:`bound_labels`).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import plotly.graph_objects as go

from ..core.errors import ParameterError
from .build import FigureSpec, wrap_lines
from .levels import choose_levels
from .style import DIVERGED, MAX_STEPS, OKABE_ITO, add_note, base_layout, uid
from .text import readable_header, significant

__all__ = ["REGIME_COLOURS", "bound_labels", "step_size_figure"]

#: One colour per step-size regime (Okabe & Ito 2008 palette).
REGIME_COLOURS = {
    "crawl": OKABE_ITO["sky blue"],
    "converge": OKABE_ITO["bluish green"],
    "oscillate": OKABE_ITO["orange"],
    "diverge": OKABE_ITO["vermillion"],
}


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
        [significant(r, 3) if np.isfinite(r) else "n/a" for r in ratio], dtype=object
    )
    value_text = np.array([significant(v) for v in values], dtype=object)
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
                                value_text[shown],
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
                    "learning rate %{x:.4~g}<br>" + readable_header(column) + " %{customdata[0]}"
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
        (MAX_STEPS["name"], table["max_steps"], MAX_STEPS["colour"]),
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
                "legendrank": 22 - rank,  # top to bottom as stacked: diverged first
                "line": {"color": colour, "width": 1},
                "fillcolor": _tint(colour, 0.45),
                "marker": {"size": 5},
                "hovertemplate": "learning rate %{x:.4~g}<br>%{y:.0%} " + name + "<extra></extra>",
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
    subtitle = (
        f"{sweep.optimizer}, λmax = {significant(sweep.lambda_max)}"
        if _has(sweep, "lambda_max")
        else ""
    )
    layout = base_layout(title or "Step size: what each learning rate did", subtitle)
    layout["showlegend"] = True
    layout["legend"]["traceorder"] = "grouped"
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
    _bounds(fig, sweep)
    missing = int(np.sum(~np.isfinite(values)))
    lines = wrap_lines(
        "The predicted bound comes from the curvature at one point; elsewhere the loss may be "
        "steeper or flatter."
    )
    if missing:
        lines += wrap_lines(f"× at the top: no finite {ylabel} at that rate.")
    # Notes are wrapped (build.NOTE_WIDTH characters a line), so none runs off the figure.
    fig.update_layout({"margin": {"b": 64 + 17 * len(lines)}})
    for row, line in enumerate(lines):
        add_note(fig, line, row=row)
    return fig.figure()


#: Axes of the two panels of the step-size figure (top: x, y; bottom: x2, y2).
_ROW = {1: {"xaxis": "x", "yaxis": "y"}, 2: {"xaxis": "x2", "yaxis": "y2"}}


def _two_rows() -> FigureSpec:
    """Two panels sharing the x axis, heights 0.68 : 0.32 with a 0.06 gap.

    Plain layout dicts: each panel's axes name their domain and anchor, and
    traces say which axes they use (``_ROW``), so only plotly's public
    figure schema is involved.
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
    return fig


def _tint(colour: str, alpha: float) -> str:
    r, g, b = (int(colour[i : i + 2], 16) for i in (1, 3, 5))
    return f"rgba({r},{g},{b},{alpha})"


def _has(obj: Any, name: str) -> bool:
    value = getattr(obj, name, None)
    return value is not None and np.isfinite(value)


def bound_labels(bounds: list[tuple[str, float]], span: tuple[float, float]) -> list[dict]:
    """Where to write the bound labels so that no two overlap.

    ``bounds`` are ``(label, rate)`` pairs, ``span`` the axis range in log10
    units. Equal rates share one label ("predicted and observed bounds 1");
    a label runs to the right of its line, or to the left in the right part
    of the axis (so it stays inside the plot, clear of the legend); each
    further label goes one row lower, so two never overlap whatever the
    plot's width.

    Returns:
        One dict per label, in order of rate: ``text``, ``x`` (log10
        position), ``xanchor`` and ``row`` (0 = top).

    Examples:
        >>> labels = bound_labels([("predicted", 0.3138), ("observed", 1.5)], (-2.0, 0.3))
        >>> [(d["text"], d["xanchor"], d["row"]) for d in labels]
        [('predicted bound 0.314', 'right', 0), ('observed bound 1.5', 'right', 1)]
        >>> [d["text"] for d in bound_labels([("predicted", 1.0), ("observed", 1.0)], (-1, 1))]
        ['predicted and observed bounds 1']
    """
    items = sorted(
        ((float(x), label) for label, x in bounds if np.isfinite(x) and x > 0), key=lambda i: i[0]
    )
    merged: list[tuple[float, list[str]]] = []
    for x, label in items:
        if merged and abs(np.log10(x) - np.log10(merged[-1][0])) <= 1e-9:
            merged[-1][1].append(label)
        else:
            merged.append((x, [label]))
    width = max(span[1] - span[0], 1e-12)
    out: list[dict] = []
    for row, (x, labels) in enumerate(merged):
        pos = float(np.log10(x))
        names = " and ".join(labels)
        text = f"{names} bound{'s' if len(labels) > 1 else ''} {significant(x, 3)}"
        anchor = "right" if (pos - span[0]) / width > 0.6 else "left"
        out.append({"text": text, "x": pos, "xanchor": anchor, "row": row})
    return out


def _bounds(fig: FigureSpec, sweep: Any) -> None:
    found = []
    for name, dash in (("predicted_bound", "dash"), ("observed_bound", "dot")):
        if not _has(sweep, name):
            continue
        x = float(getattr(sweep, name))
        found.append((name.split("_")[0], x))
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
    span = fig.layout.get("xaxis", {}).get("range") or [-1.0, 1.0]
    for item in bound_labels(found, (float(span[0]), float(span[1]))):
        # Annotations on a log axis take log10 positions (shapes take data values).
        fig.add_annotation(
            x=item["x"],
            xref="x",
            y=1,
            yref="y domain",
            yanchor="top",
            yshift=-20 * item["row"],
            xanchor=item["xanchor"],
            xshift=4 if item["xanchor"] == "left" else -4,
            text=item["text"],
            showarrow=False,
            font={"size": 12},
            bgcolor="rgba(255,255,255,0.85)",
        )

"""Figure of sharpness along runs: the top Hessian eigenvalue against the step.

:func:`sharpness_figure` draws each run's recorded sharpness (from
``descend(..., sharpness_every=k)``) against the step, and each run's
stability threshold as a dashed line of the same colour: ``2 / lr`` for
gradient descent, ``(2 + 2 beta) / lr`` for heavy-ball momentum,
``(2 + 2 beta) / ((1 + 2 beta) lr)`` for Nesterov momentum, and, for Adam and
RMSProp, the adaptive threshold on the preconditioned sharpness
(``38 / lr`` for Adam with ``b1 = 0.9``). A run whose curve climbs to its
line and stays there is at the edge of stability.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import plotly.graph_objects as go

from ..core.errors import ParameterError
from ..core.runs import Runs
from ..core.sharpness import sharpness_threshold
from .build import FigureSpec, wrap_lines
from .style import add_note, base_layout, category_colour, uid

__all__ = ["MAX_DRAWN", "sharpness_figure"]

MAX_DRAWN = 12
"""At most this many runs are drawn (the first ones; the table has them all)."""

FAR_ABOVE = 5.0
"""Thresholds more than this many times the highest estimate are left off a linear axis."""

_FORMULA = {
    "gradient_descent": "2/lr",
    "momentum": "(2+2β)/lr",
    "nesterov": "(2+2β)/((1+2β)lr)",
    "adam": "(2+2β₁)/((1−β₁)lr)",
    "rmsprop": "2/lr",
}


def _number(x: float) -> str:
    return f"{x:,.0f}" if abs(x) >= 1000 else f"{x:.4g}"


def _label(runs: Runs, r: int, *, start: bool = True) -> str:
    """Run ``r``'s hyper-parameters that vary, and its start (a threshold's label omits it)."""
    parts = [f"lr {float(runs.hyper['learning_rate'][r]):.3g}"]
    for name, values in runs.hyper.items():
        if name != "learning_rate" and len(np.unique(values)) > 1:
            parts.append(f"{name} {float(values[r]):.3g}")
    if start and len(np.unique(runs.start_index)) > 1:
        parts.append(f"start {int(runs.start_index[r])}")
    return ", ".join(parts)


def sharpness_figure(
    runs: Runs,
    *,
    quantity: str = "auto",
    runs_shown: Any = None,
    log_y: bool = False,
    title: str | None = None,
) -> go.Figure:
    """Sharpness against step for each run, with each run's stability threshold dashed.

    Args:
        runs: from ``descend(..., sharpness_every=k)``.
        quantity: ``"sharpness"`` (``lambda_max(H)``), ``"preconditioned"``
            (``lambda_max(P^-1 H)``, Adam and RMSProp only) or ``"auto"``
            (the preconditioned one where the rule has a preconditioner:
            that is the quantity its threshold speaks of).
        runs_shown: indices of the runs to draw (default: the first
            :data:`MAX_DRAWN`).
        log_y: logarithmic sharpness axis (thresholds of very different
            learning rates on one figure).
        title: figure title.

    References:
        Cohen, J. M., Kaur, S., Li, Y., Kolter, J. Z. & Talwalkar, A. (2021).
        Gradient descent on neural networks typically occurs at the edge of
        stability. ICLR. arXiv:2103.00065.
        Cohen, J. M. et al. (2022). Adaptive gradient methods at the edge of
        stability. arXiv:2207.14484.
    """
    if not isinstance(runs, Runs):
        raise ParameterError(f"sharpness_figure needs Runs; got {type(runs).__name__}.")
    if runs.sharpness is None or runs.sharpness_steps is None:
        raise ParameterError(
            "these runs did not track sharpness; run descend(..., sharpness_every=k) "
            "(e.g. k=10) to record it."
        )
    if quantity not in ("auto", "sharpness", "preconditioned"):
        raise ParameterError(
            f"quantity must be 'auto', 'sharpness' or 'preconditioned'; got {quantity!r}."
        )
    pre = runs.preconditioned_sharpness
    if quantity == "preconditioned" and pre is None:
        raise ParameterError(
            f"{runs.rule} has no preconditioner, so there is no preconditioned sharpness; "
            "use quantity='sharpness'."
        )
    use_pre = pre is not None and quantity in ("auto", "preconditioned")
    values = pre if use_pre else runs.sharpness
    assert values is not None
    shown = list(range(min(len(runs), MAX_DRAWN))) if runs_shown is None else list(runs_shown)
    if not shown or any(not 0 <= int(r) < len(runs) for r in shown):
        raise ParameterError(
            f"runs_shown must list run numbers from 0 to {len(runs) - 1}; got {runs_shown!r}."
        )
    steps = runs.sharpness_steps
    formula = _FORMULA.get(runs.rule, "threshold")
    fig = FigureSpec()
    drawn_lines: dict[float, int] = {}
    top = 0.0  # the highest estimate drawn
    line_top = 0.0  # the highest threshold drawn
    for i, r in enumerate(int(r) for r in shown):
        colour = category_colour(i)
        live = steps <= runs.stop_step[r]
        y = np.where(live, values[r], np.nan)
        name = _label(runs, r)
        hyper = {k: float(v[r]) for k, v in runs.hyper.items()}
        threshold, kind = sharpness_threshold(runs.rule, hyper)
        compared = kind == "preconditioned_sharpness"
        if compared != use_pre:
            threshold = None  # the threshold speaks of the other quantity
        custom = np.stack([y / threshold if threshold else np.full(y.shape, np.nan)], axis=1)
        fig.add_trace(
            {
                "type": "scatter",
                "x": steps,
                "y": y,
                # markers too where a run has few records (a run that diverged
                # before its second record would be an invisible one-point line)
                "mode": "lines+markers" if np.isfinite(y).sum() <= 40 else "lines",
                "line": {"color": colour, "width": 2},
                "marker": {"size": 5, "color": colour},
                "name": f"{name} ({runs.status[r]})",
                "customdata": custom,
                "hovertemplate": (
                    f"{name}<br>step %{{x:d}}<br>estimate %{{y:.5g}}"
                    + ("<br>%{customdata[0]:.3f} of the threshold" if threshold else "")
                    + "<extra></extra>"
                ),
                "uid": uid("sharpness", "run", r),
            }
        )
        finite = y[np.isfinite(y)]
        if finite.size:
            top = max(top, float(finite.max()))
        if runs.status[r] == "diverged" and finite.size:
            last = int(np.flatnonzero(np.isfinite(y))[-1])
            fig.add_trace(
                {
                    "type": "scatter",
                    "x": [float(steps[last])],
                    "y": [float(y[last])],
                    "mode": "markers",
                    "marker": {"symbol": "x", "size": 11, "color": colour},
                    "showlegend": False,
                    "hovertemplate": (
                        f"{name}: last record before it diverged (step "
                        f"{int(runs.stop_step[r])})<extra></extra>"
                    ),
                    "uid": uid("sharpness", "diverged", r),
                }
            )
        if threshold is not None and np.isfinite(threshold):
            key = round(float(threshold), 12)
            if key in drawn_lines:
                continue
            drawn_lines[key] = i
            line_top = max(line_top, threshold)
            fig.add_trace(
                {
                    "type": "scatter",
                    "x": [float(steps[0]), float(steps[-1])],
                    "y": [threshold, threshold],
                    "mode": "lines",
                    "line": {"color": colour, "width": 1.5, "dash": "dash"},
                    "name": f"threshold {_number(threshold)} ({_label(runs, r, start=False)})",
                    "hovertemplate": f"stability threshold {formula} = {threshold:.5g}<extra></extra>",
                    "uid": uid("sharpness", "threshold", r),
                }
            )
    # The axis fits the estimates; thresholds far above them (slow rates: 2/lr is
    # large) would squash every curve onto the floor, so they stay off the range
    # and the note says how far up they are.
    above = not log_y and line_top > FAR_ABOVE * top > 0
    top = top if above else max(top, line_top)
    y_title = "sharpness λmax(P⁻¹H)" if use_pre else "sharpness λmax(H)"
    track = runs.config.sharpness if runs.config is not None else None
    every = track.every if track is not None else int(steps[1] - steps[0]) if steps.size > 1 else 1
    sub = f"{runs.rule}; estimated every {every} steps inside the runs; dashed: threshold {formula}"
    if not drawn_lines:
        sub = f"{runs.rule}; estimated every {every} steps inside the runs"
    layout = base_layout(title or "Sharpness along the runs", sub)
    layout["xaxis"] = {"title": {"text": "step"}}
    layout["yaxis"] = {"title": {"text": y_title}, "rangemode": "tozero"}
    if log_y:
        layout["yaxis"] = {"title": {"text": y_title}, "type": "log"}
    elif top > 0:
        layout["yaxis"]["range"] = [0, 1.12 * top]
    # the legend keeps its own part of the figure at any width (a notebook output
    # 580 px wide put it over the curves when it sat in the right margin)
    layout["xaxis"]["domain"] = [0.0, 0.6]
    layout["legend"].update({"x": 0.63, "y": 1, "xanchor": "left"})
    notes = [
        "A curve that climbs to its dashed line and stays there is at the edge of stability: "
        "the step cannot settle where the loss is sharper.",
        "Warm-started Lanczos estimates (lower bounds; they can lag when eigenvalues cross). "
        "The threshold is local: a run above it need not diverge.",
    ]
    if len(shown) < len(runs):
        notes.append(
            f"{len(shown)} of {len(runs)} runs drawn; runs_shown=[...] picks others "
            "(runs.sharpness_table has them all)."
        )
    if above:
        lowest = min(drawn_lines)
        notes.append(
            f"Thresholds above the range: the lowest is {_number(lowest)}, "
            f"{lowest / top:.3g}x the highest estimate (log_y=True shows them)."
        )
    if (runs.status[shown] == "diverged").any():
        notes.append("×: a diverged run's last record.")
    if runs.config is not None and runs.config.batch_size is not None:
        notes.append("Minibatch steps; sharpness is of the full-data loss.")
    lines = [line for note in notes for line in wrap_lines(note)]  # none runs off the figure
    layout["margin"]["b"] = 80 + 17 * len(lines)
    layout["height"] = 400 + 17 * len(lines)
    fig.update_layout(layout)
    for row, line in enumerate(lines):
        add_note(fig, line, row=row)
    return fig.figure()

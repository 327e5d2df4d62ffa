"""Figures of initialisation schemes side by side (a :class:`~basinview.core.SchemeComparison`).

* :func:`scheme_shares_figure`: for every solution, the share of each
  scheme's runs that reached it, with its confidence interval;
* :func:`scheme_steps_figure`: every run's final loss against the steps it
  took to reach the comparison's target loss, coloured by scheme.

Each scheme keeps its colour (in the order the schemes were given) in both.
"""

from __future__ import annotations

import re
from typing import Any

import numpy as np
import pandas as pd
import plotly.graph_objects as go

from ..core.errors import ParameterError
from ..core.minima import OUTCOMES
from ..core.schemes import SchemeComparison
from .build import FigureSpec, wrap_lines
from .style import add_note, base_layout, category_colour, uid

__all__ = ["scheme_colours", "scheme_shares_figure", "scheme_steps_figure", "solution_order"]


def scheme_colours(comparison: SchemeComparison) -> dict[str, str]:
    """Each scheme's colour in the scheme figures (Okabe & Ito palette, in the order given)."""
    return {name: category_colour(i) for i, name in enumerate(comparison.schemes)}


def _check(comparison: Any) -> SchemeComparison:
    if not isinstance(comparison, SchemeComparison):
        raise ParameterError(
            f"expected a SchemeComparison (from compare_schemes); got {type(comparison).__name__}."
        )
    return comparison


def _runs(n: int) -> str:
    return "1 run" if n == 1 else f"{n} runs"


def _solution_titles(comparison: SchemeComparison) -> dict[str, str]:
    """Axis labels of the solutions: a critical point's letter with its kind and loss."""
    titles = {s: s for s in comparison.solutions}
    m = comparison.minima
    if m is not None:
        for name, kind, loss in zip(m.labels, m.kind, m.loss):
            if name in titles:
                titles[name] = f"{name}: {kind}<br>loss {float(loss):.4g}"
    return titles


def solution_order(comparison: SchemeComparison) -> list[str]:
    """The comparison's solutions in the order the scheme figures and tables show them.

    Critical points keep the comparison's order (by loss, then outcomes);
    groups by connectivity (``S1``, ``S2``, ...) come in number order, then
    the other labels as given.

    Examples:
        >>> from types import SimpleNamespace
        >>> solution_order(SimpleNamespace(minima=None, solutions=("S2", "max_steps", "S1")))
        ['S1', 'S2', 'max_steps']
    """
    names = list(comparison.solutions)
    if comparison.minima is not None:
        return names
    return sorted(names, key=lambda s: (0, int(s[1:])) if re.fullmatch(r"S\d+", s) else (1, 0))


def _groups_by_connectivity(names: list[str]) -> bool:
    return any(re.fullmatch(r"S\d+", s) for s in names) and all(
        re.fullmatch(r"S\d+", s) or s in OUTCOMES.values() for s in names
    )


def _notes(fig: FigureSpec, notes: list[str]) -> None:
    """Notes under the plot, wrapped so none runs off the figure, with room below for them."""
    lines = [line for note in notes for line in wrap_lines(note)]
    fig.update_layout({"margin": {"b": max(100, 64 + 17 * len(lines))}})
    for row, line in enumerate(lines):
        add_note(fig, line, row=row)


def scheme_shares_figure(comparison: SchemeComparison, *, title: str | None = None) -> go.Figure:
    """Share of each scheme's runs per solution, with interval whiskers, bars coloured by scheme.

    A solution is a critical point (its letter, kind and loss under the bar
    group) or an outcome (diverged, max_steps, not stationary), or the label
    the comparison was given. Whiskers show the Wilson interval at the
    comparison's confidence: with few runs per scheme they are wide, and two
    schemes whose whiskers overlap may not differ at all.

    Args:
        comparison: the result of :func:`~basinview.core.compare_schemes`.
        title: figure title.
    """
    cmp = _check(comparison)
    order = {name: i for i, name in enumerate(solution_order(cmp))}
    shares = cmp.shares
    shares = shares.iloc[np.argsort(shares["solution"].map(order).to_numpy(), kind="stable")]
    titles = _solution_titles(cmp)
    colours = scheme_colours(cmp)
    fig = FigureSpec()
    for i, name in enumerate(cmp.schemes):
        rows = shares[shares["scheme"] == name]
        share = rows["share"].to_numpy(dtype=np.float64)
        low = rows["share_low"].to_numpy(dtype=np.float64)
        high = rows["share_high"].to_numpy(dtype=np.float64)
        fig.add_trace(
            {
                "type": "bar",
                "x": [titles[s] for s in rows["solution"]],
                "y": share,
                "name": f"{name} ({_runs(int(rows['of'].iloc[0]))})",
                "marker": {"color": colours[name]},
                "error_y": {
                    "type": "data",
                    "symmetric": False,
                    "array": high - share,
                    "arrayminus": share - low,
                    "color": "#3B3B3B",
                    "thickness": 1.2,
                    "width": 4,
                },
                "customdata": np.stack(
                    [rows["runs"].to_numpy(), rows["of"].to_numpy(), low, high], axis=1
                ),
                "hovertemplate": (
                    f"{name}<br>%{{customdata[0]}} of %{{customdata[1]}} runs (%{{y:.0%}})"
                    f"<br>{100 * cmp.confidence:.0f}% interval "
                    "%{customdata[2]:.0%} to %{customdata[3]:.0%}<extra></extra>"
                ),
                "legendrank": 10 + i,
                "uid": uid("schemes", "shares", i),
            }
        )
    fig.update_layout(
        base_layout(
            title or "Where each scheme's runs end",
            subtitle=f"share of each scheme's runs per solution; whiskers: "
            f"{100 * cmp.confidence:.0f}% Wilson interval",
            barmode="group",
            xaxis={"title": {"text": "solution"}, "type": "category"},
            yaxis={
                "title": {"text": "share of the scheme's runs"},
                "range": [0, 1.05],
                "tickformat": ".0%",
            },
            legend={"title": {"text": "scheme"}},
        )
    )
    if cmp.minima is None and _groups_by_connectivity(list(cmp.solutions)):
        note = (
            "Solutions are groups by connectivity (S1, S2, ...: end points joined by low straight "
            "segments, names as in every view of this problem) or the runs' outcomes."
        )
    elif cmp.minima is None:
        note = "Solutions are the labels the comparison was given."
    else:
        note = (
            "Solutions are the critical points the runs reached (letters as in every view of "
            "this problem) or the runs' outcomes."
        )
    _notes(fig, [note])
    return fig.figure()


def scheme_steps_figure(
    comparison: SchemeComparison, *, logy: bool | None = None, title: str | None = None
) -> go.Figure:
    """Final loss against steps to the target loss, one marker per run, coloured by scheme.

    Runs that never reached :attr:`~basinview.core.SchemeComparison.loss_below`
    are drawn as open markers at the steps they took (where they stopped or
    ran out of budget); diverged runs are left out and counted in a note.

    Args:
        comparison: the result of :func:`~basinview.core.compare_schemes`.
        logy: logarithmic loss axis (default: when every drawn loss is positive).
        title: figure title.
    """
    cmp = _check(comparison)
    runs = cmp.runs
    final = np.asarray(runs.final_loss, dtype=np.float64)
    steps = cmp.steps_to_loss
    reached = ~np.asarray(pd.isna(steps))
    x_hit = np.where(reached, np.asarray(steps.fillna(0), dtype=np.float64), np.nan)
    taken = np.asarray(runs.stop_step, dtype=np.float64)
    shown = (np.asarray(runs.status) != "diverged") & np.isfinite(final)
    if logy is None:
        logy = bool(shown.any()) and bool(np.all(final[shown] > 0))
    colours = scheme_colours(cmp)
    fig = FigureSpec()
    for i, name in enumerate(cmp.schemes):
        mine = (cmp.scheme == name) & shown
        for role, pick, xs, symbol, label in (
            ("hit", mine & reached, x_hit, "circle", name),
            ("missed", mine & ~reached, taken, "circle-open", f"{name}: never reached"),
        ):
            idx = np.flatnonzero(pick)
            if not idx.size:
                continue
            fig.add_trace(
                {
                    "type": "scatter",
                    "mode": "markers",
                    "x": xs[idx],
                    "y": final[idx],
                    "name": label,
                    "legendgroup": name,
                    "marker": {
                        "color": colours[name],
                        "symbol": symbol,
                        "size": 8,
                        "line": {"width": 1.2, "color": colours[name]},
                    },
                    "customdata": np.stack(
                        [idx, np.asarray(cmp.solution, dtype=object)[idx]], axis=1
                    ),
                    "hovertemplate": (
                        f"{name}, run %{{customdata[0]}}<br>"
                        + ("steps to target %{x}" if role == "hit" else "stopped at step %{x}")
                        + "<br>final loss %{y:.5g}<br>solution %{customdata[1]}<extra></extra>"
                    ),
                    "legendrank": 10 + 2 * i + (role == "missed"),
                    "uid": uid("schemes", role, i),
                }
            )
    fig.update_layout(
        base_layout(
            title or "How fast and how low each scheme's runs get",
            subtitle=f"steps to reach loss {cmp.loss_below:.4g} against final loss, one marker "
            "per run",
            xaxis={"title": {"text": f"steps to reach loss {cmp.loss_below:.4g}"}},
            yaxis={
                "title": {"text": "final loss (log scale)" if logy else "final loss"},
                "type": "log" if logy else "linear",
                **({"dtick": "D2"} if logy else {}),
            },
            legend={"title": {"text": "scheme"}},
        )
    )
    notes = ["Open markers: runs that never reached the target loss, at the step they stopped."]
    n_div = int(np.sum(np.asarray(runs.status) == "diverged"))
    if n_div:
        notes.append(f"{n_div} diverged run(s) not shown (see the summary's divergence_rate).")
    _notes(fig, notes)
    return fig.figure()

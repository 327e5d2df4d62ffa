"""What the Explorer shows: the main map, the side view, tables and the status line.

A mixin of :class:`~basinview.explorer.Explorer`. Figures come from the pure
builders of :mod:`basinview.figures`; numbers in the status line go through
:func:`~basinview.figures.text.significant` and every table through
:func:`~basinview.figures.text.readable_table` (readable headers, no
``<NA>``, a few significant digits).
"""

from __future__ import annotations

import html
from typing import Any

import pandas as pd

from .. import figures
from ..core import SchemeComparison
from ..figures.paths import percent
from ..figures.schemes import solution_order
from ..figures.text import readable_table, significant
from .compute import ViewResults
from .long_work import letters, view_key
from .schemes import ALL_SCHEMES, same_level_note, scheme_comparison, solution_names
from .state import ViewState

__all__ = ["SCHEMES_VIEW", "SIDE_VIEWS", "Views", "comparison_table", "html_table"]

SIDE_VIEWS = ("relief", "loss curves", "basins", "step sizes", "runs", "minima")
#: The side view added when the Explorer has initialisation schemes.
SCHEMES_VIEW = "schemes"


def html_table(frame: pd.DataFrame, *, caption: str = "", rows: int = 500) -> str:
    """``frame`` as the HTML the Explorer's table shows (readable headers and numbers)."""
    shown = readable_table(frame.head(rows))
    head = f"<p class='bv-caption'>{html.escape(caption)}</p>" if caption else ""
    more = (
        f"<p class='bv-caption'>first {rows} of {len(frame)} rows</p>" if len(frame) > rows else ""
    )
    return head + shown.to_html(index=False, border=0, escape=True) + more


def _share(share: float, low: float, high: float) -> str:
    return f"{percent(share)} ({percent(low)}–{percent(high)})"


def comparison_table(cmp: SchemeComparison) -> pd.DataFrame:
    """One row per scheme, as the "schemes" view shows it.

    Read off :attr:`SchemeComparison.shares` and :attr:`SchemeComparison.summary`
    (nothing recomputed): runs, the share of each solution with its Wilson
    interval ("83% (44%–97%)"), median final loss, median steps to the target
    loss, and the divergence rate with its interval.
    """
    shares, summary = cmp.shares, cmp.summary.set_index("scheme")
    rows = []
    for name in cmp.schemes:
        mine = shares[shares["scheme"] == name].set_index("solution")
        row: dict[str, object] = {"scheme": name, "runs": int(summary.at[name, "runs"])}
        for sol in solution_order(cmp):
            row[f"share {sol}"] = _share(*mine.loc[sol, ["share", "share_low", "share_high"]])
        row["median final loss"] = significant(summary.at[name, "median_final_loss"])
        row["median steps to loss"] = significant(summary.at[name, "median_steps_to_loss"])
        row["divergence rate"] = _share(
            *summary.loc[name, ["divergence_rate", "divergence_low", "divergence_high"]]
        )
        rows.append(row)
    return pd.DataFrame(rows)


class Views:
    """Mixin of :class:`~basinview.explorer.Explorer`: drawing and describing the view."""

    # ------------------------------------------------------------ describing
    def describe(self, state: ViewState | None = None) -> str:
        """The settings a status line names: rule, learning rate, steps, starts, slice."""
        s = state or self.state
        hyper = "".join(f", {k} {significant(v, 3)}" for k, v in s.hyper)
        if s.plane_kind == "axes":
            plane = f"{s.x_label} × {s.y_label}"
        else:
            plane = f"{s.plane_kind} plane (seed {s.plane_seed})"
        return (
            f"{s.optimizer}, learning rate {significant(s.learning_rate, 3)}{hyper}, "
            f"{s.steps} steps, {plane}"
        )

    @staticmethod
    def describe_starts(state: ViewState) -> str:
        """Where the runs start: the scheme, or the random draw (count, spread, seed), and clicks."""
        parts = []
        if state.scheme:
            parts.append(
                "every scheme side by side"
                if state.scheme == ALL_SCHEMES
                else f"scheme {state.scheme}"
            )
        elif state.n_starts:
            parts.append(
                f"{state.n_starts} random (spread {significant(state.start_scale, 3)}, "
                f"seed {state.start_seed})"
            )
        if state.start_points:
            parts.append(f"{len(state.start_points)} clicked")
        return " + ".join(parts) or "none"

    def _summary(
        self, results: ViewResults, stages: tuple[str, ...], elapsed: float, notes: list[str]
    ) -> str:
        runs = results.runs
        counts = pd.Series(runs.status).value_counts().to_dict()
        summary = ", ".join(f"{v} {k}" for k, v in counts.items())
        if runs.scheme is not None and results.state.scheme == ALL_SCHEMES:
            per = pd.Series(runs.scheme).value_counts(sort=False).to_dict()
            summary += " (" + ", ".join(f"{k} {v}" for k, v in per.items()) + ")"
        found = letters(results.minima)
        if results.solutions is not None:
            found = solution_names(results.solutions) + found
        if results.minima is None and not notes and not (runs.status == "converged").any():
            # Groups by connectivity may still name where the runs stopped; they are
            # not critical points, and the user should know none was reached.
            grouped = " (the groups are of where the runs stopped)" if results.solutions else ""
            notes = [
                *notes,
                "no run converged, so no critical point is marked: run more steps or "
                f"loosen the tolerance{grouped}",
            ]
        level = same_level_note(results.solutions)
        if level:
            notes = [*notes, level]
        coarse = " · coarse preview, computing full resolution…" if results.preview else ""
        return (
            f"{self.describe(results.state)} · {len(runs)} runs: {summary}{found}"
            f" · starts: {self.describe_starts(results.state)} · updated "
            f"{', '.join(stages) or 'nothing'} in {significant(elapsed, 2)} s{coarse}"
            + "".join(f" · {n}" for n in notes)
        )

    # ------------------------------------------------------------ comparing
    def scheme_comparison(self) -> SchemeComparison | None:
        """The initialisation schemes of the runs shown, compared (None without schemes).

        :func:`~basinview.core.compare_schemes` on the current runs: shares per
        solution with Wilson intervals, median final loss, divergence rate.
        A solution is a connectivity group when the view groups by
        connectivity, else a critical point's letter, else the run's outcome.
        Needs one learning rate and one value per hyper-parameter.
        """
        results = self.results
        if results is None or results.runs.scheme is None or results.state.grid_size > 1:
            return None
        return scheme_comparison(self.problem, results.runs, results.minima, results.solutions)

    # ------------------------------------------------------------ drawing
    def _colour_mode(self, results: ViewResults) -> str:
        runs = results.runs
        if runs.scheme is not None and len(set(runs.scheme.tolist())) > 1:
            return "scheme"  # paths told apart by scheme, in the scheme figures' colours
        return "solution" if results.solutions is not None else "auto"

    def _draw_main(self, results: ViewResults) -> None:
        title = "coarse preview" if results.preview else None
        fig = figures.slice_figure(
            results.surface,
            results.runs,
            minima=results.minima,
            solutions=results.solutions,
            color_by=self._colour_mode(results),
            title=title,
        )
        self.main.show(fig, uirevision=view_key("map", results.state))

    def _show_table(self, markup: str, *, with_figure: bool = False) -> None:
        self.table.value = markup
        self.table.layout.display = None
        self.side.layout.display = None if with_figure else "none"

    def _draw_side(self) -> None:
        results = self.results
        if results is None:
            return
        view = self.view.value
        if view == "runs":
            self._show_table(html_table(results.runs.table))
            return
        if view == "minima":
            parts = []
            if results.solutions is not None:
                parts.append(
                    html_table(
                        results.solutions.table,
                        caption="solutions by connectivity (end points joined by straight "
                        f"segments with barrier at most {significant(results.solutions.tolerance)})",
                    )
                )
            if results.minima is not None:
                parts.append(html_table(results.minima.table, caption="critical points"))
            self._show_table("".join(parts) or "<p>no critical point and no solution group</p>")
            return
        self.table.layout.display = "none"
        self.side.layout.display = None
        if view == SCHEMES_VIEW:
            fig = self._scheme_view()
        elif view == "relief":
            fig = figures.relief_figure(
                results.surface,
                results.runs,
                minima=results.minima,
                solutions=results.solutions,
                color_by=self._colour_mode(results),
            )
        elif view == "loss curves":
            fig = figures.loss_curves_figure(
                results.runs,
                minima=results.minima,
                solutions=results.solutions,
                color_by=self._colour_mode(results),
            )
        elif view == "basins":
            fig = self._cached_figure(
                self._basins,
                figures.basin_figure,
                "press “map basins” to run descent from a grid of starts",
            )
        else:
            fig = self._cached_figure(
                self._sweep,
                figures.step_size_figure,
                "press “sweep step sizes” to rerun the starts over a range of learning rates",
            )
        self.side.show(fig, uirevision=view_key(view, results.state))

    def _scheme_view(self) -> Any:
        """Shares per solution and scheme (figure) over the per-scheme summary (table)."""
        cmp = self.scheme_comparison()
        if cmp is None:
            hint = (
                "the schemes are compared at one learning rate and one value per "
                "hyper-parameter; move a control to leave the recorded grid"
                if self.results is not None and self.results.state.grid_size > 1
                else "no schemes: pass schemes={...} to the Explorer"
            )
            return {"data": [], "layout": {"title": {"text": hint}, "height": 200}}
        one = len(cmp.schemes) == 1 and self.state.scheme != ALL_SCHEMES
        caption = (
            f"per scheme: {int(100 * cmp.confidence)}% Wilson intervals; steps to reach loss "
            f"{significant(cmp.loss_below)}"
            + (f" · choose “{ALL_SCHEMES}” to compare the schemes side by side" if one else "")
        )
        self._show_table(html_table(comparison_table(cmp), caption=caption), with_figure=True)
        return figures.scheme_shares_figure(cmp)

    def _cached_figure(self, cached: Any, build: Any, hint: str) -> Any:
        if cached is None:
            return {"data": [], "layout": {"title": {"text": hint}, "height": 200}}
        state, value = cached
        fig = build(value)
        if state != self.state:
            fig.update_layout(
                title_text=f"{fig.layout.title.text or ''} (computed for earlier settings; "
                "press again to update)"
            )
        return fig

"""A standalone, offline HTML report of an analysis.

:func:`write_report` turns one :class:`~basinview.core.Analysis` (surface,
runs, minima, basin map, step-size sweep, profile, settings; built by
:func:`~basinview.core.analyse`) into one HTML file: a short summary
with the slice caution at the top, every figure, the tables, and the
recorded settings as JSON. plotly.js is embedded once, inline, so the file
opens without a network connection; nothing else is loaded.

The report is a pure function of the results (:func:`report_html` returns
the text); :func:`write_report` writes that text to the one path it is
given and nowhere else.
"""

from __future__ import annotations

import html
import json
import os
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import plotly.graph_objects as go
import plotly.io as pio
from plotly.offline import get_plotlyjs

from . import figures as F
from ._version import __version__
from .core.analysis import Analysis
from .core.errors import BasinviewError

__all__ = [
    "MARKER",
    "ReportError",
    "check_report_path",
    "report_html",
    "summary_lines",
    "write_report",
]

#: First line of every report; a file that starts otherwise is not overwritten by default.
MARKER = "<!-- basinview report -->"

MAX_TABLE_ROWS = 500

_CSS = """
body { font-family: "Source Sans Pro", "Segoe UI", Helvetica, Arial, sans-serif;
       color: #2B2B2B; margin: 0 auto; max-width: 1120px; padding: 24px 28px 60px; }
h1 { font-weight: 600; margin-bottom: 4px; }
h2 { font-weight: 600; margin-top: 42px; border-bottom: 1px solid #DDD; padding-bottom: 4px; }
p.lead { color: #5A5A5A; margin-top: 0; }
.caution { border-left: 4px solid #E69F00; background: #FFF8E8; padding: 10px 14px; }
.summary li { margin: 3px 0; }
.figure { margin: 10px 0 6px; }
.caption { color: #5A5A5A; font-size: 14px; margin: 0 0 18px; }
table.bv { border-collapse: collapse; font-size: 13px; margin: 8px 0 4px; }
table.bv th, table.bv td { border-bottom: 1px solid #E4E4E4; padding: 3px 9px; text-align: right; }
table.bv th { background: #F4F4F4; }
.scroll { max-height: 420px; overflow: auto; border: 1px solid #E4E4E4; }
pre.settings { background: #F7F7F7; border: 1px solid #E4E4E4; padding: 12px; font-size: 12px;
               overflow: auto; max-height: 520px; }
footer { margin-top: 48px; color: #8A8A8A; font-size: 12px; }
"""


class ReportError(BasinviewError):
    """The report cannot be written where asked."""


def _fmt(x: Any, digits: int = 4) -> str:
    try:
        v = float(x)
    except (TypeError, ValueError):
        return str(x)
    return f"{v:.{digits}g}" if np.isfinite(v) else str(v)


def summary_lines(analysis: Analysis) -> tuple[list[str], str]:
    """Plain-text summary of an analysis and the slice caution.

    Returns:
        ``(lines, caution)``: one sentence per result, and the caution text.
    """
    _check_analysis(analysis)
    surface, runs, minima = analysis.surface, analysis.runs, analysis.minima
    basin_map, sweep, profile = analysis.basin_map, analysis.sweep, analysis.profile
    settings = analysis.settings
    lines: list[str] = []
    plane = analysis.plane
    if settings is not None:
        lines.append(
            f"Loss {settings.loss_name} with {settings.n_params} parameters ({settings.dtype}); "
            f"data fingerprint {settings.fingerprint}."
        )
    if surface is not None:
        a, b, low = surface.grid_minimum()
        t1, t2 = surface.plane.axis_titles
        lines.append(
            f"Slice: {surface.loss.shape[1]} × {surface.loss.shape[0]} grid; lowest grid point "
            f"{t1} = {_fmt(a)}, {t2} = {_fmt(b)} with loss {_fmt(low)}."
        )
    if runs is not None:
        status = np.asarray(runs.status)
        lines.append(
            f"Descent: {len(runs)} runs of {runs.rule}: {int(np.sum(status == 'converged'))} "
            f"converged, {int(np.sum(status == 'max_steps'))} max_steps (step budget spent), "
            f"{int(np.sum(status == 'diverged'))} diverged."
        )
    if minima is not None and len(minima):
        parts = [
            f"{lab} ({kind}, loss {_fmt(loss)}, {100 * share:.0f}% of runs)"
            for lab, kind, loss, share in zip(minima.labels, minima.kind, minima.loss, minima.share)
        ]
        lines.append(f"Critical points reached: {'; '.join(parts)}.")
    elif runs is not None and not np.any(np.asarray(runs.status) == "converged"):
        lines.append("No run converged, so no critical point was found.")
    if basin_map is not None:
        shares = basin_map.shares
        parts = [f"{r.point} {100 * r.share:.0f}%" for r in shares.itertuples() if r.share > 0]
        lines.append(f"Basins of the starts on the plane: {', '.join(parts)}.")
    if sweep is not None:
        text = f"Step size ({sweep.optimizer}): top Hessian eigenvalue {_fmt(sweep.lambda_max)}"
        if sweep.predicted_bound is not None:
            text += f", predicted largest stable learning rate {_fmt(sweep.predicted_bound)}"
        if sweep.observed_bound is not None:
            text += f", largest swept rate with no diverged run {_fmt(sweep.observed_bound)}"
        lines.append(text + ".")
    if profile is not None:
        lines.append(
            f"Straight segment between the two lowest points: barrier {_fmt(profile.barrier)} "
            "above the higher end (an upper bound on the lowest barrier between them)."
        )
    lines.extend(_instrument_lines(analysis))
    n = plane.size if plane is not None else None
    if n is not None and n > 2:
        caution = (
            f"These views are 2-D slices of a {n}-parameter loss. The loss on a slice is not "
            "the whole loss: a low point of a slice need not be a minimum of the model, and "
            "descent paths leave the plane; figures show their projections, and the runs table "
            "gives each run's distance off the plane (off_plane_end)."
        )
    else:
        caution = (
            "This loss has two parameters, so the plane is the whole parameter space; the views "
            "still cover only the span shown, and minima outside it are not seen."
        )
    return lines, caution


def _instrument_lines(analysis: Analysis) -> list[str]:
    """Summary sentences of the optional instruments: sharpness along runs, Hessian density."""
    lines = []
    runs, density = analysis.runs, analysis.density
    if runs is not None and runs.sharpness is not None:
        table = runs.sharpness_table
        last = table.groupby("run").tail(1)
        ratio = last["ratio"].to_numpy(dtype=float)
        steps = runs.sharpness_steps
        every = int(steps[1] - steps[0]) if len(steps) > 1 else 0
        text = (
            f"Sharpness along the runs (every {every} steps): last recorded "
            f"{_fmt(np.nanmin(last['sharpness']))} to "
            f"{_fmt(np.nanmax(last['sharpness']))}"
        )
        if np.isfinite(ratio).any():
            text += (
                f"; {int(np.sum(ratio >= 0.9))} of {len(ratio)} runs end within 10% of or above "
                "their stability threshold (the edge of stability)"
            )
        lines.append(text + ".")
    if density is not None:
        lines.append(
            f"Hessian eigenvalue density at {analysis.density_at}: {100 * density.negative_mass:.3g}% "
            f"of the mass below zero, trace about {_fmt(density.trace)}, "
            f"{len(density.outliers)} outlier(s)"
            + (
                "; negative mass: this point is not a minimum of the model."
                if density.negative_mass > 0
                else "."
            )
        )
    return lines


def _check_analysis(analysis: Any) -> None:
    if not isinstance(analysis, Analysis):
        raise ReportError(
            f"a report is made from one Analysis; got {type(analysis).__name__}. Build it with "
            "basinview.core.analyse(problem, view), or Analysis(surface=..., runs=..., ...)."
        )


def _table(frame: pd.DataFrame, caption: str) -> str:
    note = ""
    if len(frame) > MAX_TABLE_ROWS:
        note = (
            f"<p class='caption'>First {MAX_TABLE_ROWS} of {len(frame)} rows; the full table is "
            "in the results object (<code>.table</code>).</p>"
        )
        frame = frame.head(MAX_TABLE_ROWS)
    body = frame.to_html(
        index=False,
        border=0,
        classes="bv",
        na_rep="—",
        float_format=lambda v: f"{v:.6g}",
        escape=True,
    )
    return f"<div class='scroll'>{body}</div><p class='caption'>{html.escape(caption)}</p>{note}"


def _figure_div(fig: go.Figure, key: str, height: int) -> str:
    fig = go.Figure(fig)
    if fig.layout.height is None:
        fig.update_layout(height=height)
    return pio.to_html(
        fig,
        full_html=False,
        include_plotlyjs=False,
        include_mathjax=False,
        div_id=f"bv-{key}",
        default_width="100%",
        default_height=f"{fig.layout.height}px",
        config={"displaylogo": False, "responsive": True},
    )


def _settings_text(settings: Any) -> str:
    if settings is None:
        return ""
    if hasattr(settings, "to_json"):
        return settings.to_json()
    if isinstance(settings, str):
        return settings
    return json.dumps(settings, indent=2, sort_keys=True, default=str)


def report_html(
    analysis: Analysis,
    *,
    figures: Mapping[str, go.Figure] | None = None,
    title: str = "basinview report",
    description: str = "",
    sweep_y: str = "steps",
) -> str:
    """The report of ``analysis`` as HTML text (see :func:`write_report`)."""
    lines, caution = summary_lines(analysis)
    surface, runs, minima = analysis.surface, analysis.runs, analysis.minima
    basin_map, sweep, profile = analysis.basin_map, analysis.sweep, analysis.profile
    settings, profile_labels = analysis.settings, analysis.profile_labels
    sections: list[str] = []

    def figure(key: str, heading: str, fig: go.Figure, caption: str, height: int = 620) -> None:
        sections.append(
            f"<h2>{html.escape(heading)}</h2><div class='figure'>{_figure_div(fig, key, height)}"
            f"</div><p class='caption'>{html.escape(caption)}</p>"
        )

    if surface is not None:
        figure(
            "slice",
            "Slice",
            F.slice_figure(surface, runs, minima=minima),
            "Contours of the loss on the plane (log levels when it spans orders of magnitude). "
            "Paths start at white circles; hover for step, loss and off-plane distance.",
        )
        figure(
            "relief",
            "Relief",
            F.relief_figure(surface, runs, minima=minima),
            "The same slice in 3-D; drag to turn it. Path heights are the recorded losses.",
            height=680,
        )
    if basin_map is not None:
        figure(
            "basins",
            "Basins",
            F.basin_figure(basin_map, surface=surface),
            "Each start on a grid of the plane, coloured by the point its run reached.",
        )
    if sweep is not None:
        figure(
            "sweep",
            "Step size",
            F.step_size_figure(sweep, y=sweep_y),
            "Each learning rate run from the same starts; bands show the regime.",
            height=640,
        )
    if runs is not None:
        figure(
            "curves",
            "Loss curves",
            F.loss_curves_figure(runs, minima=minima),
            "One curve per run, coloured as on the slice.",
            height=520,
        )
    if profile is not None:
        labels = profile_labels or ("start", "end")
        figure(
            "profile",
            "Profile",
            F.profile_figure(profile, labels=labels, minima=minima),
            "The loss along the straight line between the two points, extended a little "
            "beyond each.",
            height=480,
        )
    if runs is not None and runs.sharpness is not None:
        figure(
            "sharpness",
            "Sharpness along the runs",
            F.sharpness_figure(runs),
            "Top Hessian eigenvalue of each run, estimated inside the runs; dashed: each "
            "learning rate's stability threshold. The threshold is local: crossing it need not "
            "mean divergence.",
            height=540,
        )
    if analysis.density is not None:
        figure(
            "density",
            f"Hessian spectrum at {analysis.density_at}",
            F.density_figure(analysis.density),
            "Estimated density of all Hessian eigenvalues (stochastic Lanczos quadrature), "
            "smoothed: features narrower than the kernel merge.",
            height=500,
        )
    for i, (name, fig) in enumerate((figures or {}).items()):
        figure(f"extra-{i}", str(name), fig, "")
    tables = []
    if minima is not None and len(minima):
        tables.append(("Critical points", minima.table, "One row per critical point found."))
    if basin_map is not None:
        tables.append(("Basin shares", basin_map.shares, "Share of the grid starts per basin."))
    if sweep is not None:
        tables.append(("Step-size sweep", sweep.table, "One row per learning rate."))
    if runs is not None:
        tables.append(
            (
                "Runs",
                runs.table,
                "One row per run; off_plane_end is the distance "
                "of the run's end point from the plane.",
            )
        )
    for heading, frame, caption in tables:
        sections.append(f"<h2>{html.escape(heading)}</h2>{_table(frame, caption)}")
    settings_text = _settings_text(settings)
    if settings_text:
        sections.append(
            "<h2>Settings</h2><p class='caption'>Everything needed to recompute these views "
            "(basinview.Settings.from_json).</p>"
            f"<pre class='settings' id='bv-settings'>{html.escape(settings_text)}</pre>"
        )
    summary = "".join(f"<li>{html.escape(line)}</li>" for line in lines)
    lead = f"<p class='lead'>{html.escape(description)}</p>" if description else ""
    return (
        f"{MARKER}\n<!DOCTYPE html>\n<html lang='en'><head><meta charset='utf-8'>"
        f"<meta name='viewport' content='width=device-width, initial-scale=1'>"
        f"<title>{html.escape(title)}</title><style>{_CSS}</style>"
        f"<script type='text/javascript'>{get_plotlyjs()}</script></head><body>"
        f"<h1>{html.escape(title)}</h1>{lead}"
        f"<h2>Summary</h2><ul class='summary'>{summary}</ul>"
        f"<p class='caution'><strong>Caution.</strong> {html.escape(caution)}</p>"
        + "".join(sections)
        + f"<footer>Made with basinview {html.escape(__version__)}; plotly.js is embedded, "
        "so this file needs no network.</footer></body></html>\n"
    )


def check_report_path(path: str | os.PathLike[str], overwrite: bool = False) -> Path:
    """Check that a report can be written to ``path``; returns it as a ``Path``.

    Raises :class:`ReportError` when the name does not end in ``.html``, the
    folder does not exist, the path is a folder, or an existing file there is
    not a basinview report (unless ``overwrite``).
    """
    try:
        target = Path(path)
    except TypeError:
        raise ReportError(f"the report path must be a file path; got {path!r}.") from None
    if target.suffix.lower() not in (".html", ".htm"):
        raise ReportError(
            f"report files end in .html; got {str(target)!r}. Choose a name like report.html."
        )
    if target.is_dir():
        raise ReportError(f"{str(target)!r} is a directory; give a file name ending in .html.")
    parent = target.parent
    if not parent.is_dir():
        raise ReportError(
            f"the folder {str(parent)!r} does not exist; create it first or choose another path."
        )
    if target.exists() and not overwrite:
        try:
            with target.open("r", encoding="utf-8", errors="replace") as fh:
                head = fh.read(len(MARKER))
        except OSError as exc:
            raise ReportError(f"cannot read {str(target)!r} to check it: {exc}") from None
        if head != MARKER:
            raise ReportError(
                f"{str(target)!r} exists and is not a basinview report; it was left untouched. "
                "Choose another path, or pass overwrite=True (--force) to replace it."
            )
    return target


def write_report(
    path: str | os.PathLike[str],
    analysis: Analysis,
    *,
    figures: Mapping[str, go.Figure] | None = None,
    title: str = "basinview report",
    description: str = "",
    sweep_y: str = "steps",
    overwrite: bool = False,
) -> Path:
    """Write a standalone HTML report of ``analysis`` to ``path`` (and nowhere else).

    Args:
        path: the file to write; must end in ``.html`` (or ``.htm``) and its
            folder must exist. An existing basinview report there is replaced;
            any other existing file is refused unless ``overwrite=True``.
        analysis: the :class:`~basinview.core.Analysis` of one view (from
            :func:`~basinview.core.analyse`, or built from parts: each of its
            surface, runs, minima, basin map, sweep, profile and settings that
            is present gets its figure, table or section).
        figures: extra plotly figures, by heading.
        title, description: heading and a sentence under it.
        sweep_y: ``"steps"`` or ``"final_loss"`` for the step-size figure.
        overwrite: replace an existing file that is not a basinview report.

    Returns:
        The path written.

    Caution: the figures of a 2-D slice show a cut through the loss, not the
    whole loss; the report says so at the top.
    """
    target = check_report_path(path, overwrite)
    text = report_html(
        analysis, figures=figures, title=title, description=description, sweep_y=sweep_y
    )
    try:
        target.write_text(text, encoding="utf-8")
    except OSError as exc:
        raise ReportError(f"cannot write the report to {str(target)!r}: {exc}") from None
    return target

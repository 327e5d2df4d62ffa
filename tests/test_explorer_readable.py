"""What the Explorer shows reads well: captions fit, numbers are short, tables have words.

Python side only (no browser): the figure's layout and the widget model are read
as the front end would receive them.
"""

from __future__ import annotations

import re

import numpy as np
import pytest

from basinview import Explorer
from basinview.core import Problem
from basinview.explorer import PlotView
from basinview.explorer.plot import decode
from basinview.figures.build import NOTE_WIDTH, wrap_lines

# 0.6 em per character on average for sans-serif text (common practice), at the
# notes' 11 px font; the narrowest side figure the Explorer lays out is taken as
# 700 px wide (at 1000 px the figures stack below the controls; at 1400 px with a
# side panel of about 300 px open they sit right of the 340 px controls).
CHAR_PX = 0.6 * 11
NARROWEST_FIGURE_PX = 700


def double_well(p):
    return (p[0] ** 2 - 1.0) ** 2 + 0.5 * p[1] ** 2


@pytest.fixture(scope="module")
def explorer():
    problem = Problem(double_well, np.zeros(2, np.float32))
    return Explorer(
        problem,
        background=False,
        span=2.0,
        resolution=9,
        learning_rate=0.0123456,
        steps=200,
        n_starts=5,
        start_scale=1.23456,
    )


def _too_long(text: str, digits: int = 4) -> list[str]:
    """Decimal numbers in ``text`` with more than ``digits`` significant digits.

    Integer digits never count against the limit (``123457`` is fine, as
    ``significant`` prints it).
    """
    out = []
    for number in re.findall(r"\d+\.\d+", text):
        whole, frac = number.split(".")
        sig = (whole + frac).lstrip("0")
        if len(sig) > max(digits, len(whole.lstrip("0"))):
            out.append(number)
    return out


def test_the_digit_check_can_fail():
    assert _too_long("loss 0.13213097769650292, rate 0.0123") == ["0.13213097769650292"]
    assert _too_long("0.004751 and 123457 and 2.5e-07") == []


def test_wrap_lines_breaks_at_spaces_within_the_width():
    text = "× at the top: no finite median final loss at that rate, " * 4
    lines = wrap_lines(text, 40)
    assert all(len(line) <= 40 for line in lines) and len(lines) > 1
    assert " ".join(lines) == " ".join(text.split())  # nothing lost, nothing cut
    assert wrap_lines("a " + "x" * 50, 40) == ["a", "x" * 50]  # a long word keeps its line


def test_the_step_size_caption_is_wrapped_inside_the_figure(explorer):
    explorer.sweep_step_sizes(np.geomspace(0.01, 1.0, 6))
    assert explorer.view.value == "step sizes"
    layout = decode(explorer.side.plot_layout)
    notes = [
        a
        for a in layout["annotations"]
        if a.get("yref") == "paper" and a.get("y") == 0 and a.get("yanchor") == "top"
    ]
    text = " ".join(a["text"] for a in notes)
    assert "× at the top: no finite median final loss at that rate." in text  # rates diverged
    assert len(text) > NOTE_WIDTH  # one line would not fit: it has to be wrapped
    left = layout["margin"]["l"]
    for a in notes:
        assert "<br>" not in a["text"]  # one line per note row
        assert left + len(a["text"]) * CHAR_PX <= NARROWEST_FIGURE_PX, a["text"]
    # every row lies above the figure's bottom edge (rows 17 px apart, 14 px high)
    lowest = max(-a["yshift"] for a in notes)
    assert lowest + 14 <= layout["margin"]["b"]
    assert sorted(-a["yshift"] for a in notes) == [56 + 17 * r for r in range(len(notes))]


def test_status_numbers_are_short(explorer):
    explorer.set(learning_rate=0.0234567, start_scale=1.23456)
    status = explorer.status.value
    assert "learning rate 0.0235," in status and "spread 1.23," in status, status
    assert not _too_long(status), status
    explorer.sweep_step_sizes(np.geomspace(0.01, 1.0, 6))
    assert not _too_long(explorer.status.value), explorer.status.value


@pytest.mark.parametrize("view", ["runs", "minima"])
def test_tables_have_readable_headers_and_no_missing_markers(explorer, view):
    explorer.view.value = view
    markup = explorer.table.value
    headers = re.findall(r"<th>(.*?)</th>", markup)
    assert headers, markup[:200]
    assert not [h for h in headers if "_" in h], headers
    assert "<NA>" not in markup and "&lt;NA&gt;" not in markup and "NaN" not in markup
    cells = re.findall(r"<td>(.*?)</td>", markup)
    assert cells and not _too_long(" ".join(cells)), cells[:20]
    explorer.view.value = "relief"


def test_the_zoom_lives_in_the_widget_model_for_a_reloaded_page():
    view = PlotView()
    view.show({"data": [], "layout": {}}, uirevision="slice-1")
    assert "view_ranges" in view.keys  # synced: a view drawn later reads it
    view.receive(view, {"kind": "relayout", "data": {"xaxis.range[0]": 0.5, "xaxis.range[1]": 2}})
    assert view.get_state()["view_ranges"] == {"xaxis.range[0]": 0.5, "xaxis.range[1]": 2}
    view.show({"data": [], "layout": {}}, uirevision="slice-1")  # a learning-rate change
    assert view.get_state()["view_ranges"] == {"xaxis.range[0]": 0.5, "xaxis.range[1]": 2}
    assert "range" not in view.plot_layout.get("xaxis", {})  # not the double-click target
    view.show({"data": [], "layout": {}}, uirevision="slice-2")  # another slice
    assert view.get_state()["view_ranges"] == {}
    # the front end applies the model's zoom after its first drawing
    assert 'model.get("view_ranges")' in PlotView._esm

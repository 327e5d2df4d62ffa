"""The HTML report: one standalone offline file with figures, tables and settings."""

from __future__ import annotations

import html
import re

import numpy as np
import pytest
from plotly.offline import get_plotlyjs

from basinview import core
from basinview.report import MARKER, ReportError, report_html, write_report


def two_wells(p):
    """(x^2 - 1)^2 + y^2: minima at (+-1, 0), a saddle at the origin."""
    return (p["x"] ** 2 - 1.0) ** 2 + p["y"] ** 2


@pytest.fixture(scope="module")
def results():
    prob = core.Problem(two_wells, {"x": 0.2, "y": 0.3})
    plane = core.axes_plane(prob, "x", "y", origin={"x": 0.0, "y": 0.0})
    starts = core.explicit_starts(
        prob, np.array([[0.5, 1.0], [-0.4, -1.0], [1.5, 0.5], [-1.5, 0.2]], np.float32)
    )
    view = core.ViewSpec(
        plane=plane, starts=starts, span=2.0, resolution=31, learning_rate=[0.05, 0.1], steps=300
    )
    return core.analyse(
        prob, view, basin_resolution=9, basin_rate=0.1, sweep_rates=[0.01, 0.1, 0.3, 1.0]
    )


@pytest.fixture(scope="module")
def page(results, tmp_path_factory):
    path = tmp_path_factory.mktemp("report") / "two-wells.html"
    written = write_report(path, results, title="Two <wells>", description="a & b")
    assert written == path
    return path.read_text(encoding="utf-8")


def test_report_is_standalone(page):
    js = get_plotlyjs()
    assert page.startswith(MARKER)
    # plotly.js is inline, exactly once
    assert page.count(js[:400]) == 1
    assert js[-200:] in page
    # nothing is fetched: no external script, stylesheet, image or font outside
    # plotly.js itself (whose own strings, e.g. its logo link, are never loaded)
    ours = page.replace(js, "")
    assert not re.search(r"<script[^>]*\bsrc\s*=", ours, re.I)
    assert not re.search(r"<link[^>]*\bhref\s*=", ours, re.I)
    assert not re.search(r"\b(src|href)\s*=\s*[\"']?(https?:)?//", ours, re.I)
    assert "mathjax" not in ours.lower()
    assert '"displaylogo": false' in ours


def test_report_holds_every_figure_with_fixed_ids(page, results):
    for key in ("slice", "relief", "basins", "sweep", "curves", "profile"):
        assert f'id="bv-{key}"' in page
    for uid in ("slice-surface", "slice-path-m0", "relief-surface", "basins-map", "profile-ends"):
        assert f'"uid":"{uid}"' in page
    # the same results give the same file (fixed div ids and trace uids)
    assert report_html(results) == report_html(results)


def test_report_holds_tables_summary_caution_and_settings(page, results):
    minima = results.minima
    assert "<h2>Critical points</h2>" in page and "<h2>Runs</h2>" in page
    assert "<h2>Step-size sweep</h2>" in page and "<h2>Basin shares</h2>" in page
    assert page.count("<table") == 4
    runs_table = page.split("<h2>Runs</h2>")[1].split("</table>")[0]
    assert runs_table.count("<tr") == len(results.runs) + 1  # header + one per run
    for label, loss in zip(minima.labels, minima.loss):
        assert f"{label} ({minima.kind[0]}, loss {float(loss):.4g}" in page
    summary = page.split("<h2>Summary</h2>")[1].split('id="bv-slice"')[0]
    assert "Caution." in summary and "two parameters" in summary
    pre = re.search(r"<pre class='settings' id='bv-settings'>(.*?)</pre>", page, re.S)
    settings = core.Settings.from_json(html.unescape(pre.group(1)))
    assert settings == results.settings
    # user text is escaped, never interpreted
    assert "<h1>Two &lt;wells&gt;</h1>" in page and "a &amp; b" in page


def test_caution_names_the_slice_for_many_parameters(tmp_path):
    w = np.arange(1.0, 5.0, dtype=np.float32)

    def four(p):
        return (p * w * p).sum()

    prob = core.Problem(four, np.ones(4, np.float32))
    plane = core.random_plane(prob, seed=0)
    surface = core.evaluate_surface(prob, plane, span=1.0, resolution=9)
    runs = core.descend(prob, prob.theta0[None, :], learning_rate=0.05, steps=30, plane=plane)
    text = report_html(core.Analysis(surface=surface, runs=runs))
    assert "2-D slices of a 4-parameter loss" in text
    assert "need not be a minimum of the model" in text


def test_report_path_errors_lose_nothing(results, tmp_path):
    small = core.Analysis(surface=results.surface)
    with pytest.raises(ReportError, match=r"end in \.html"):
        write_report(tmp_path / "report.txt", small)
    with pytest.raises(ReportError, match="does not exist"):
        write_report(tmp_path / "missing" / "report.html", small)
    (tmp_path / "folder.html").mkdir()
    with pytest.raises(ReportError, match="is a directory"):
        write_report(tmp_path / "folder.html", small)
    mine = tmp_path / "notes.html"
    mine.write_text("<p>my notes</p>")
    with pytest.raises(ReportError, match="not a basinview report"):
        write_report(mine, small)
    assert mine.read_text() == "<p>my notes</p>"
    write_report(mine, small, overwrite=True)
    assert mine.read_text(encoding="utf-8").startswith(MARKER)
    # an earlier report is replaced without asking
    write_report(mine, small, title="second")
    assert "<title>second</title>" in mine.read_text(encoding="utf-8")
    assert not (tmp_path / "missing").exists()


def test_report_writes_only_its_own_file(results, tmp_path):
    before = set(tmp_path.iterdir())
    write_report(tmp_path / "only.html", core.Analysis(surface=results.surface))
    assert set(tmp_path.iterdir()) - before == {tmp_path / "only.html"}


def test_a_report_is_made_from_one_analysis(results, tmp_path):
    # the old form (a dozen keyword arguments) is gone; a plain dict is refused by name
    with pytest.raises(ReportError, match="made from one Analysis; got dict"):
        write_report(tmp_path / "r.html", {"surface": results.surface})
    with pytest.raises(TypeError):
        write_report(tmp_path / "r.html", surface=results.surface)
    assert not (tmp_path / "r.html").exists()

"""Readable defaults of the figure builders with many groups, many basins and unruly runs.

Checks on the figure dicts: legends name the largest groups and sum up the
rest with the right share, letters and colours follow the problem's
registry, runs that did not settle are drawn faint, loss axes fit the runs
that did not diverge, bound labels never overlap, numbers are short, and
every figure passes plotly's schema validation.
"""

from __future__ import annotations

import json
import re

import jax.numpy as jnp
import numpy as np
import plotly.graph_objects as go
import plotly.io as pio
import pytest

from basinview import core
from basinview import figures as F
from basinview.core.identities import letter
from basinview.figures.paths import legend_summary, percent
from basinview.figures.style import (
    DISTINCT_COLOURS,
    DIVERGED,
    LEGEND_LIMIT,
    UNCONVERGED,
    category_colour,
)
from basinview.figures.sweep import bound_labels


def egg_crate(p):
    # minima near (k pi, m pi): 5 x 5 of them on [-7.9, 7.9]^2 (sin^2 vanishes at k pi;
    # the small bowl only shifts them slightly; common practice)
    return jnp.sin(p["x"]) ** 2 + jnp.sin(p["y"]) ** 2 + 1e-3 * (p["x"] ** 2 + p["y"] ** 2)


def bowl(p):
    return p["x"] ** 2 + p["y"] ** 2


@pytest.fixture(scope="module")
def crate():
    prob = core.Problem(egg_crate, {"x": 0.3, "y": 0.3})
    plane = core.axes_plane(prob, "x", "y", origin={"x": 0.0, "y": 0.0})
    bm = core.basin_map(prob, plane, span=7.9, resolution=15, learning_rate=0.2, steps=300)
    surface = core.evaluate_surface(prob, plane, span=7.9, resolution=21)
    return prob, plane, bm, surface


@pytest.fixture(scope="module")
def bowl_runs():
    prob = core.Problem(bowl, {"x": 0.5, "y": 0.5})
    plane = core.axes_plane(prob, "x", "y")
    surface = core.evaluate_surface(prob, plane, span=2.0, resolution=11)
    starts = np.array([[1.5, 1.0], [-1.0, 1.2], [0.3, -1.4]], np.float32)
    # lr < 2 / L = 1 converges, 0.97 zig-zags (factor 1 - 2 lr = -0.94 per step), 0.002
    # crawls, 1.2 diverges (Nocedal & Wright, Numerical Optimization, 2nd ed., sec. 3.3;
    # common practice)
    runs = core.descend(prob, starts, learning_rate=[0.002, 0.2, 0.97, 1.2], steps=60, plane=plane)
    return prob, plane, surface, runs


def shown(fig, prefix):
    return [t for t in fig.data if t.uid.startswith(prefix) and t.showlegend is not False]


# ------------------------------------------------------------------ basins


def test_basin_legend_names_the_largest_and_sums_up_the_rest(crate):
    _, _, bm, surface = crate
    letters = set(np.unique(bm.label[bm.label >= 0]).tolist())
    assert len(letters) > LEGEND_LIMIT + 1  # the scenario has many basins
    fig = F.basin_figure(bm, surface=surface)
    named = [t for t in shown(fig, "basins-key-m")]
    assert len(named) == LEGEND_LIMIT
    summary = next(t for t in fig.data if t.uid == "basins-legend-rest")
    # the share of the starts in the basins not named, from the basin map's own table
    shares = bm.shares
    named_letters = {t.name.split(":")[0] for t in named}
    rest = shares[shares.point.isin(bm.minima.labels) & ~shares.point.isin(named_letters)]
    rest = rest[rest.starts > 0]
    assert summary.name == legend_summary(
        len(rest), rest.starts.sum() / bm.label.size, noun="basins", of="starts"
    )
    assert summary.name.startswith(f"+ {len(rest)} more basins (")
    # the named ones are the largest
    smallest_named = shares.set_index("point").loc[sorted(named_letters), "starts"].min()
    assert smallest_named >= rest.starts.max()


def test_basin_legend_is_in_letter_order(crate):
    _, _, bm, _ = crate
    fig = F.basin_figure(bm, legend_limit=40)
    keys = [t for t in fig.data if t.uid.startswith("basins-key-m")]
    order = [int(t.uid.rsplit("m", 1)[1]) for t in sorted(keys, key=lambda t: t.legendrank)]
    assert order == sorted(order) and len(order) == len(keys)
    for t in keys:
        k = int(t.uid.rsplit("m", 1)[1])
        assert t.name.startswith(letter(k) + ":")
        assert t.marker.color == category_colour(k)


def test_basin_colours_are_distinct_for_the_first_21_letters(crate):
    _, _, bm, _ = crate
    fig = F.basin_figure(bm)
    keys = {
        int(t.uid.rsplit("m", 1)[1]): t.marker.color
        for t in fig.data
        if t.uid.startswith("basins-key-m")
    }
    first = [c for k, c in keys.items() if k < DISTINCT_COLOURS]
    assert len(first) == len(set(first)) >= 2 * 7  # more than one round of the palette
    # the map's colourscale carries the same colours, one band per category
    scale = fig.data[0].colorscale
    assert {c for _, c in scale} >= set(keys.values())


def _srgb_to_lab(hexes):
    # Source: IEC 61966-2-1 (sRGB transfer curve and primaries, D65) and CIE 15:2004
    # (CIE 1976 L*a*b*): the published formulas.
    rgb = np.array([[int(h[i : i + 2], 16) / 255 for i in (1, 3, 5)] for h in hexes])
    lin = np.where(rgb <= 0.04045, rgb / 12.92, ((rgb + 0.055) / 1.055) ** 2.4)
    m = np.array([[0.4124, 0.3576, 0.1805], [0.2126, 0.7152, 0.0722], [0.0193, 0.1192, 0.9505]])
    xyz = lin @ m.T / np.array([0.95047, 1.0, 1.08883])
    d = 6 / 29
    f = np.where(xyz > d**3, np.cbrt(xyz), xyz / (3 * d**2) + 4 / 29)
    return np.stack([116 * f[:, 1] - 16, 500 * (f[:, 0] - f[:, 1]), 200 * (f[:, 1] - f[:, 2])], 1)


def test_category_colours_are_far_apart_in_cielab():
    # the conversion itself: white is L* = 100, a* = b* = 0 by definition (CIE 15:2004);
    # sRGB red is about (53.24, 80.09, 67.20) (from memory)
    np.testing.assert_allclose(_srgb_to_lab(["#FFFFFF"])[0], [100, 0, 0], atol=0.05)
    np.testing.assert_allclose(_srgb_to_lab(["#FF0000"])[0], [53.24, 80.09, 67.20], atol=0.1)
    colours = [category_colour(i) for i in range(DISTINCT_COLOURS)]
    colours += ["#8C8C8C", "#3B3B3B", "#4A4A78"]  # outcome greys
    lab = _srgb_to_lab(colours)
    dist = np.linalg.norm(lab[:, None] - lab[None], axis=2)
    np.fill_diagonal(dist, np.inf)
    # a CIE76 difference of about 2.3 is just noticeable (Sharma, Digital Color Imaging
    # Handbook, 2003; from memory); ours stay far above it
    assert dist.min() > 10
    assert category_colour(DISTINCT_COLOURS) == category_colour(0)  # then they cycle


def test_basin_letters_sit_inside_their_basins(crate):
    _, _, bm, _ = crate
    fig = F.basin_figure(bm)
    letters = next(t for t in fig.data if t.uid == "basins-letters")
    points = next(t for t in fig.data if t.uid == "basins-critical-points")
    a, b = np.asarray(bm.a), np.asarray(bm.b)
    code = {lab: i for i, lab in enumerate(bm.minima.labels)}
    for x, y, text in zip(letters.x, letters.y, letters.text):
        j, i = int(np.argmin(np.abs(a - x))), int(np.argmin(np.abs(b - y)))
        assert bm.label[i, j] == code[text], text
    # every basin on the map has its letter written once: inside it, or by its point
    on_map = {bm.minima.labels[k] for k in np.unique(bm.label[bm.label >= 0])}
    written = list(letters.text) + [t for t in points.text if t]
    assert on_map <= set(written)
    assert len(set(letters.text)) == len(letters.text)


# ------------------------------------------------------------------ faint runs


def test_runs_that_did_not_settle_are_faint_and_thin(bowl_runs):
    _, _, surface, runs = bowl_runs
    fig = F.slice_figure(surface, runs)
    paths = {t.uid: t for t in fig.data if t.uid.startswith("slice-path-")}
    lrs = np.unique(runs.hyper["learning_rate"])
    assert lrs.tolist() == pytest.approx([0.002, 0.2, 0.97, 1.2])
    settled_lr = paths["slice-path-lr1"]  # 0.2 converges without zig-zag
    for key in ("slice-path-lr0", "slice-path-lr2", "slice-path-diverged"):
        faint = paths[key]
        assert faint.opacity < settled_lr.opacity, key
        assert faint.line.width < settled_lr.line.width, key
    assert paths["slice-path-lr2"].opacity == UNCONVERGED["opacity"]
    # the white casing runs under the settled paths only
    casing = next(t for t in fig.data if t.uid == "slice-casing")
    assert len(casing.x) == len(settled_lr.x)
    # faint runs are drawn with fewer points
    table = runs.table
    zigzag = table[(table.learning_rate > 0.9) & (table.learning_rate < 1.0)]
    assert zigzag.oscillating.all()
    drawn = np.isfinite(np.asarray(paths["slice-path-lr2"].x, dtype=float)).sum()
    assert drawn <= len(zigzag) * max(4, int(300 * UNCONVERGED["point_share"]))


def test_legend_of_paths_sums_up_small_groups(bowl_runs):
    prob, plane, surface, _ = bowl_runs
    starts = np.stack([np.linspace(-1.5, 1.5, 12), np.full(12, 1.0)], axis=1).astype(np.float32)
    runs = core.descend(prob, starts, learning_rate=0.2, steps=60, plane=plane)
    fig = F.slice_figure(surface, runs, color_by="start", legend_limit=5)
    named = shown(fig, "slice-path-s")
    assert len(named) == 5
    summary = next(t for t in fig.data if t.uid == "slice-legend-rest")
    assert summary.name == f"+ 7 more groups ({percent(7 / 12)} of runs)"
    curves = F.loss_curves_figure(runs, color_by="start", legend_limit=5)
    assert len(shown(curves, "curves-runs-")) == 5
    assert next(t for t in curves.data if t.uid == "curves-legend-rest").name == summary.name


# ------------------------------------------------------------------ loss curves


def test_loss_axis_fits_the_runs_that_did_not_diverge(bowl_runs):
    _, _, _, runs = bowl_runs
    fig = F.loss_curves_figure(runs)
    assert fig.layout.yaxis.type == "log"
    status = np.asarray(runs.status)
    tame = np.concatenate([runs.loss_curve(r) for r in np.flatnonzero(status != "diverged")])
    wild = np.concatenate([runs.loss_curve(r) for r in np.flatnonzero(status == "diverged")])
    lo, hi = fig.layout.yaxis.range
    assert 10**hi >= np.nanmax(tame) and 10**lo <= np.nanmin(tame)
    assert 10**hi <= 10**0.1 * np.nanmax(tame) * 1.001  # the spike does not set the scale
    assert np.nanmax(wild[np.isfinite(wild)]) > 10**hi
    edge = next(t for t in fig.data if t.uid == "curves-diverged-edge")
    n_div = int(np.sum(status == "diverged"))
    assert len(edge.x) == n_div
    np.testing.assert_allclose(np.asarray(edge.y, dtype=float), 10**hi)
    for r, step in zip(np.asarray(edge.customdata)[:, 0].astype(int), edge.x):
        curve = runs.loss_curve(r)
        first_out = int(np.argmax(~np.isfinite(curve) | (curve > 10**hi)))
        assert int(step) == first_out
    # linear axes too
    lin = F.loss_curves_figure(runs, yscale="linear")
    lo, hi = lin.layout.yaxis.range
    assert hi < 1.2 * np.nanmax(tame) and lo <= np.nanmin(tame)


# ------------------------------------------------------------------ bound labels


def _extent(item, span, width_px=500, char_px=7.0):
    """Horizontal extent of a label in axis fractions (a narrow plot, generous glyphs)."""
    x = (item["x"] - span[0]) / (span[1] - span[0])
    w = (len(item["text"]) * char_px + 4) / width_px
    return (x, x + w) if item["xanchor"] == "left" else (x - w, x)


def test_bound_labels_never_overlap():
    rng = np.random.default_rng(3)
    span = (-3.0, 1.0)
    for _ in range(400):
        a, b = 10 ** rng.uniform(*span, 2)
        if rng.random() < 0.1:
            b = a
        items = bound_labels([("predicted", a), ("observed", b)], span)
        assert 1 <= len(items) <= 2
        if len(items) == 1:
            assert "predicted and observed bounds" in items[0]["text"]
            continue
        p, q = items
        (p0, p1), (q0, q1) = _extent(p, span), _extent(q, span)
        overlap = p1 > q0 and q1 > p0
        assert p["row"] != q["row"] or not overlap, (a, b, items)
        for it in items:  # labels stay inside the plot
            lo, hi = _extent(it, span)
            assert lo >= -0.05 and hi <= 1.05, it


@pytest.fixture(scope="module")
def sweep(bowl_runs):
    prob = bowl_runs[0]
    starts = core.explicit_starts(prob, np.array([[1.5, 1.0], [-1.0, 1.2]], np.float32))
    return core.step_size_sweep(prob, starts, learning_rates=[0.01, 0.1, 0.5, 0.9, 1.1], steps=60)


def test_step_size_figure_staggers_close_bound_labels(sweep):
    fig = F.step_size_figure(sweep)
    labels = [a for a in fig.layout.annotations if a.text.startswith(("observed", "predicted"))]
    # Source: the bound for gradient descent on a quadratic with Hessian 2 I is 2 / 2 = 1
    # (Nocedal & Wright, sec. 3.3); the observed one is the largest converging rate, 0.9
    assert [a.text for a in labels] == ["observed bound 0.9", "predicted bound 1"]
    assert labels[0].yshift != labels[1].yshift
    assert {a.xanchor for a in labels} == {"right"}  # both near the right end


# ------------------------------------------------------------------ numbers, schema


def _figures(crate, bowl_runs, sweep):
    _, _, bm, csurf = crate
    _, _, surface, runs = bowl_runs
    minima = None
    profile = core.segment_profile(
        bowl_runs[0], {"x": -1.0, "y": 0.0}, {"x": 1.3, "y": 0.0}, resolution=21
    )
    return {
        "basins": F.basin_figure(bm, surface=csurf),
        "basins, long legend": F.basin_figure(bm, legend_limit=40),
        "slice": F.slice_figure(surface, runs, minima=minima),
        "slice, legend cut": F.slice_figure(surface, runs, legend_limit=2),
        "relief": F.relief_figure(surface, runs),
        "relief, legend cut": F.relief_figure(surface, runs, legend_limit=2),
        "curves": F.loss_curves_figure(runs),
        "curves, linear": F.loss_curves_figure(runs, yscale="linear", legend_limit=2),
        "sweep": F.step_size_figure(sweep),
        "profile": F.profile_figure(profile),
    }


@pytest.fixture(scope="module")
def figures(crate, bowl_runs, sweep):
    return _figures(crate, bowl_runs, sweep)


def _texts(fig):
    lay = fig.layout
    out = [lay.title.text or ""]
    out += [a.text or "" for a in lay.annotations]
    for axis in ("xaxis", "yaxis", "xaxis2", "yaxis2"):
        ax = getattr(lay, axis, None)
        if ax is not None and ax.title is not None:
            out.append(ax.title.text or "")
    for t in fig.data:
        out.append(t.name or "")
        out.append(getattr(t, "hovertemplate", None) or "")
        text = getattr(t, "text", None)
        if isinstance(text, str):
            out.append(text)
        elif text is not None:
            out += [str(v) for v in text]
        custom = getattr(t, "customdata", None)
        if custom is not None and np.asarray(custom).dtype == object:
            out += [str(v) for v in np.asarray(custom).ravel()]
    return out


#: A decimal number with more than 5 significant digits (after leading zeros).
_LONG = re.compile(r"(?<![\w.])-?(?:0\.0*[1-9]\d{5,}|[1-9]\d*\.\d*)")
#: A d3 number format with more than 4 significant digits.
_WIDE_FORMAT = re.compile(r":\.([5-9]|\d\d)~?[gefr]")


def test_numbers_in_text_are_short(figures):
    for name, fig in figures.items():
        for text in _texts(fig):
            for match in _LONG.findall(text):
                digits = match.lstrip("-").replace(".", "").lstrip("0")
                assert len(digits) <= 5, (name, text)
            assert not _WIDE_FORMAT.search(text), (name, text)


def test_readable_figures_pass_strict_validation(figures):
    # Source: plotly's own schema validation (plotly.graph_objects) is the reference.
    for name, fig in figures.items():
        try:
            checked = go.Figure(fig.to_dict())
        except ValueError as exc:  # pragma: no cover - the message names the property
            pytest.fail(f"{name}: {exc}")
        plain = json.loads(pio.to_json(fig, validate=False))
        assert json.loads(pio.to_json(checked, validate=False)) == plain, name


def test_regime_colours_are_our_palette():
    # plain, distinct, colour-blind safe: four of the Okabe & Ito (2008) colours
    assert set(F.REGIME_COLOURS.values()) <= set(F.OKABE_ITO.values())
    assert len(set(F.REGIME_COLOURS.values())) == 4
    assert DIVERGED["colour"] not in F.REGIME_COLOURS.values()

"""Figures are built without plotly's validation; here every one is validated strictly.

The figure functions assemble plain dicts and create the plotly figure once,
unvalidated (``basinview/figures/build.py``): validating on every Explorer
update costs tens of milliseconds. These tests rebuild every figure, on
small inputs covering each branch of the builders, through plotly's full
validation, so skipping it at run time hides no invalid property and no
value that validation would have changed.
"""

from __future__ import annotations

import json

import jax.numpy as jnp
import numpy as np
import plotly.graph_objects as go
import plotly.io as pio
import pytest

from basinview import core
from basinview import figures as F
from basinview.figures.build import FigureSpec


def bowl(p):
    return p["x"] ** 2 + p["y"] ** 2


def steep(p):
    return jnp.exp(p["x"] ** 2 + p["y"] ** 2)


def log_well(p):
    return (jnp.log(p["x"]) - 0.5) ** 2 + p["y"] ** 2


def shifted(p):
    return p["x"] ** 2 + p["y"] ** 2 - 1.0


def double_well(p):
    return (p["x"] ** 2 - 1.0) ** 2 + p["y"] ** 2


def himmelblau(p):
    return (p["x"] ** 2 + p["y"] - 11) ** 2 + (p["x"] + p["y"] ** 2 - 7) ** 2


W5 = jnp.arange(1.0, 6.0)


def five(p):
    return jnp.sum(W5 * p**2)


@pytest.fixture(scope="module")
def results():
    """Small results of every kind the figure functions draw."""
    r = {}
    bp = core.Problem(bowl, {"x": 0.5, "y": 0.5})
    plane = core.axes_plane(bp, "x", "y", origin={"x": 1.0, "y": -0.5})
    r["surface"] = core.evaluate_surface(bp, plane, span=2.0, resolution=11)
    starts = np.array([[1.5, 1.0], [-1.0, 1.2], [0.3, -1.4]], np.float32)
    # 0.1 and 0.4 converge, 1.2 diverges (stable for lr < 2 / L with L = 2; common practice)
    r["runs"] = core.descend(bp, starts, learning_rate=[0.1, 0.4, 1.2], steps=40, plane=plane)
    r["minima"] = core.find_minima(bp, r["runs"])
    nine = np.stack([np.linspace(-1.5, 1.5, 9), np.full(9, 1.0)], axis=1).astype(np.float32)
    r["runs9"] = core.descend(bp, nine, learning_rate=0.1, steps=5, plane=plane)

    sp = core.Problem(steep, {"x": 0.0, "y": 0.0})
    r["steep"] = core.evaluate_surface(sp, core.axes_plane(sp, "x", "y"), span=2.0, resolution=9)

    lp = core.Problem(log_well, {"x": 1.0, "y": 0.0})
    lplane = core.axes_plane(lp, "x", "y", origin={"x": 0.0, "y": 0.0})
    r["gaps"] = core.evaluate_surface(lp, lplane, span=((-1.0, 3.0), (-1.0, 1.0)), resolution=9)

    fp = core.Problem(five, jnp.ones(5))
    rplane = core.random_plane(fp, seed=1, normalise="none")
    r["random surface"] = core.evaluate_surface(fp, rplane, span=1.0, resolution=7)
    r["random runs"] = core.descend(
        fp, fp.theta0[None, :], learning_rate=0.05, steps=20, plane=rplane
    )

    neg = core.Problem(shifted, {"x": 0.5, "y": 0.5})
    r["negative runs"] = core.descend(neg, starts[:2], learning_rate=0.2, steps=30)

    r["sweep"] = core.step_size_sweep(
        bp, starts, learning_rates=[0.01, 0.1, 0.5, 0.9, 0.99, 1.1, 2.0], steps=60
    )

    hp = core.Problem(himmelblau, {"x": 0.0, "y": 0.0})
    hplane = core.axes_plane(hp, "x", "y")
    bm = core.basin_map(hp, hplane, span=5.0, resolution=5, learning_rate=0.01, steps=300)
    label = bm.label.copy()
    label[0, :2] = -1
    label[1, :1] = -2
    r["basins"] = bm
    r["odd basins"] = core.BasinMap(bm.plane, bm.a, bm.b, label, bm.minima, bm.runs)
    r["basin surface"] = core.evaluate_surface(hp, hplane, span=5.0, resolution=9)

    dp = core.Problem(double_well, {"x": 1.0, "y": 0.0})
    r["profile"] = core.segment_profile(
        dp, {"x": -1.0, "y": 0.0}, {"x": 1.0, "y": 0.0}, resolution=21
    )
    return r


def build_all(r) -> dict[str, go.Figure]:
    """Every figure function, with the options that change what it draws."""
    surface, runs, minima = r["surface"], r["runs"], r["minima"]
    return {
        "slice": F.slice_figure(surface, runs, minima=minima),
        "slice, by learning rate, capped": F.slice_figure(surface, runs, max_paths=4),
        "slice, by status, log levels": F.slice_figure(
            surface, runs, color_by="status", levels="log"
        ),
        "slice, more groups than colours": F.slice_figure(surface, r["runs9"], color_by="start"),
        "slice, surface only": F.slice_figure(surface, title="only the surface"),
        "slice, log levels": F.slice_figure(r["steep"]),
        "slice, NaN gaps": F.slice_figure(r["gaps"]),
        "slice, random plane": F.slice_figure(r["random surface"], r["random runs"]),
        "relief": F.relief_figure(surface, runs, minima=minima),
        "relief, capped": F.relief_figure(surface, runs, max_paths=3),
        "relief, log height": F.relief_figure(r["steep"]),
        "relief, NaN gaps": F.relief_figure(r["gaps"]),
        "relief, random plane": F.relief_figure(r["random surface"], r["random runs"]),
        "loss curves": F.loss_curves_figure(runs, minima=minima),
        "loss curves, linear, fitted to tame runs": F.loss_curves_figure(runs, yscale="linear"),
        "loss curves, more groups than colours": F.loss_curves_figure(
            r["runs9"], color_by="start", max_paths=8
        ),
        "loss curves, non-positive losses": F.loss_curves_figure(r["negative runs"]),
        "loss curves, excess": F.loss_curves_figure(r["negative runs"], yscale="excess"),
        "step sizes": F.step_size_figure(r["sweep"]),
        "step sizes, steps": F.step_size_figure(r["sweep"], y="steps"),
        "basins": F.basin_figure(r["basins"], surface=r["basin surface"]),
        "basins, diverged and not converged": F.basin_figure(r["odd basins"]),
        "profile": F.profile_figure(r["profile"], labels=("A", "B")),
    }


def _plain(fig: go.Figure) -> dict:
    """The figure as JSON data (arrays as plotly's typed-array specs)."""
    return json.loads(pio.to_json(fig, validate=False))


def test_every_figure_passes_strict_validation(results):
    # Source: plotly's own schema validation (plotly.graph_objects) is the reference:
    # go.Figure(dict) raises ValueError for any unknown property or invalid value.
    figures = build_all(results)
    kinds = {name.split(",")[0] for name in figures}
    assert kinds == {"slice", "relief", "loss curves", "step sizes", "basins", "profile"}
    for name, fig in figures.items():
        try:
            checked = go.Figure(fig.to_dict())
        except ValueError as exc:  # pragma: no cover - the message names the property
            pytest.fail(f"{name}: {exc}")
        # validation changes nothing: the unvalidated figure already holds canonical values
        assert _plain(checked) == _plain(fig), name


def test_building_validates_every_property():
    # FigureSpec.figure goes through plotly's public constructor: a misspelt
    # property is an error at build time (no private switch turns it off).
    spec = FigureSpec({"title": {"text": "t"}})
    spec.add_trace({"type": "scatter", "x": [0, 1], "y": [0, 1], "colour": "red"})
    with pytest.raises(ValueError, match="colour"):
        spec.figure()
    assert spec.to_dict()["data"][0]["colour"] == "red"  # the plain data is as written


def test_returned_figures_validate_later_edits(results):
    fig = F.slice_figure(results["surface"], results["runs"])
    with pytest.raises(ValueError, match="not_a_property"):
        fig.update_layout(not_a_property=1)
    with pytest.raises(ValueError):
        fig.data[0].update(ncontours="many")
    fig.update_layout(height=500)
    assert fig.layout.height == 500


def test_step_size_panels_are_plain_layout_domains(results):
    # Two panels on public layout properties only (no subplot grid object): each
    # trace names its axes, each axis its domain and anchor, and the panels do not overlap.
    fig = F.step_size_figure(results["sweep"])
    lay = fig.layout
    assert lay.yaxis.domain == (0.3608, 1.0) and lay.yaxis2.domain == (0.0, 0.3008)
    assert lay.yaxis2.domain[1] < lay.yaxis.domain[0]
    assert (lay.xaxis.anchor, lay.yaxis.anchor) == ("y", "x")
    assert (lay.xaxis2.anchor, lay.yaxis2.anchor) == ("y2", "x2")
    assert lay.xaxis.matches == "x2"
    for t in fig.data:
        panel = "top" if t.uid.startswith(("sweep-regime", "sweep-trend")) else "bottom"
        want = ("x", "y") if panel == "top" else ("x2", "y2")
        assert (t.xaxis, t.yaxis) == want, t.uid
    # a trace added later through plotly's public API lands on the bottom panel
    fig.add_trace(go.Scatter(x=[0.1], y=[0.5], xaxis="x2", yaxis="y2", uid="extra"))
    assert (fig.data[-1].xaxis, fig.data[-1].yaxis) == ("x2", "y2")


def test_figure_modules_use_only_public_plotly():
    # Only plotly's public API: no private modules (plotly._subplots, _plotly_utils)
    # in the figure builders.
    import inspect

    from basinview.figures import (
        basins,
        curves,
        instruments,
        levels,
        overlays,
        paths,
        profile,
        slices,
        style,
        sweep,
        text,
    )

    modules = (basins, curves, instruments, levels, overlays, paths, profile, slices, style)
    for module in (*modules, sweep, text):
        source = inspect.getsource(module)
        assert "plotly._" not in source and "_plotly_utils" not in source, module.__name__


def test_layout_merge_is_deep():
    spec = FigureSpec({"legend": {"x": 1, "font": {"size": 12}}})
    spec.update_layout({"legend": {"font": {"color": "red"}}, "xaxis": {"range": [0, 1]}})
    spec.update_layout({"xaxis": {"range": [2, 3]}})
    assert spec.layout == {
        "legend": {"x": 1, "font": {"size": 12, "color": "red"}},
        "xaxis": {"range": [2, 3]},
    }
    with pytest.raises(KeyError, match="type"):
        spec.add_trace({"x": [1]})


def test_named_colour_scales_match_plotly_validation():
    # Source: plotly's own validation, which turns a scale name into
    # [[position, colour], ...] when a trace is created (public go.Contour).
    from basinview.figures.style import SURFACE_SCALE, colour_scale

    for name in (SURFACE_SCALE, "Viridis", "RdBu", "twilight", "cividis_r"):
        coerced = [list(stop) for stop in go.Contour(colorscale=name).colorscale]
        assert colour_scale(name) == coerced, name
    with pytest.raises(ValueError, match="named colourscales"):
        colour_scale("no-such-scale")

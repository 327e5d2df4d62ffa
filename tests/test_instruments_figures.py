"""Figures of the instruments (figures/instruments.py): they build, validate, show the numbers."""

from __future__ import annotations

import json

import jax
import jax.numpy as jnp
import numpy as np
import plotly.graph_objects as go
import plotly.io as pio
import pytest

from basinview import core
from basinview import figures as F


def ring(p):
    return (p[0] ** 2 + p[1] ** 2 - 1.0) ** 2 + 0.5 * p[2] ** 2


@pytest.fixture(scope="module")
def results():
    problem = core.Problem(ring, jnp.array([0.3, 1.4, 0.8]))
    grad = jax.jit(jax.grad(ring))
    rec = core.RunRecorder(problem, every=2, keep=16)
    theta = jnp.array([0.3, 1.4, 0.8])
    for _ in range(60):  # the user's own loop: plain gradient descent
        rec.record(theta)
        theta = theta - 0.05 * grad(theta)
    track = core.trajectory_plane(problem, rec)
    surface = core.evaluate_surface(problem, track.plane, span=1.5, resolution=9)
    path = core.curved_path(
        problem,
        np.array([-1.0, 0.0, 0.0]),
        np.array([1.0, 0.0, 0.0]),
        steps=200,
        learning_rate=0.05,
    )
    density = core.hessian_density(problem, np.array([0.0, 0.2, 0.0]), probes=4, steps=3)
    return problem, track, surface, path, density


def _plain(fig: go.Figure) -> dict:
    return json.loads(pio.to_json(fig, validate=False))


def _figures(results):
    _, track, surface, path, density = results
    return {
        "trajectory": F.trajectory_figure(surface, track),
        "trajectory, log": F.trajectory_figure(surface, track, levels="log", title="run"),
        "curved path": F.curved_path_figure(path),
        "density": F.density_figure(density),
        "density, floor": F.density_figure(density, floor=1e-3),
    }


def test_figures_pass_strict_validation_and_are_stable(results):
    first, second = _figures(results), _figures(results)
    for name, fig in first.items():
        # Source: plotly's own schema validation (plotly.graph_objects) as the reference.
        checked = go.Figure(fig.to_dict())
        assert _plain(checked) == _plain(fig), name
        # fixed uids: the same results give the same figure
        assert _plain(fig) == _plain(second[name]), name
        uids = [t.uid for t in fig.data]
        assert all(u and set(u) <= set("abcdefghijklmnopqrstuvwxyz0123456789-") for u in uids)
        assert len(set(uids)) == len(uids)


def test_trajectory_figure_shows_the_run_and_the_variance(results):
    _, track, surface, _, _ = results
    fig = F.trajectory_figure(surface, track)
    assert fig.layout.xaxis.title.text == track.plane.axis_titles[0]
    assert f"({100 * track.explained[1]:.1f}% of variance)" in fig.layout.yaxis.title.text
    run = next(t for t in fig.data if t.uid == "trajectory-run")
    np.testing.assert_allclose(run.x, track.a)
    np.testing.assert_allclose(run.y, track.b)
    np.testing.assert_allclose(np.asarray(run.customdata)[:, 2], track.off_plane)
    np.testing.assert_allclose(np.asarray(run.customdata)[:, 0], track.steps)
    notes = " ".join(a.text for a in fig.layout.annotations)
    assert f"{100 * track.explained_total:.1f}% of the run's variance" in notes
    assert f"{float(np.max(track.off_plane)):.3g}" in notes
    contour = fig.data[0]
    np.testing.assert_allclose(np.asarray(contour.customdata), surface.loss)
    other = core.evaluate_surface(results[0], core.random_plane(results[0], normalise="none"))
    with pytest.raises(core.ParameterError, match="this run's plane"):
        F.trajectory_figure(other, track)


def test_basinview_runs_from_the_same_start_retrace_a_plain_gradient_descent_loop(results):
    problem, track, surface, _, _ = results
    # the user's loop above is plain gradient descent at 0.05 from the first checkpoint;
    # descend with the same rule and rate from there must retrace it (two implementations)
    start = problem.flatten(jnp.array([0.3, 1.4, 0.8]))
    runs = core.descend(
        problem, start[None], learning_rate=0.05, steps=59, plane=track.plane, grad_tol=0.0
    )
    fig = F.trajectory_figure(surface, track, runs)
    drawn = next(t for t in fig.data if t.uid == "trajectory-compared-0")
    path = np.stack([np.asarray(drawn.x), np.asarray(drawn.y)], axis=1)
    np.testing.assert_allclose(path[track.steps, 0], track.a, atol=1e-4)
    np.testing.assert_allclose(path[track.steps, 1], track.b, atol=1e-4)
    assert "lr 0.05" in drawn.name
    go.Figure(fig.to_dict())  # validates
    other = core.descend(problem, start[None], learning_rate=0.05, steps=5)
    with pytest.raises(core.ParameterError, match="another plane"):
        F.trajectory_figure(surface, track, other)


def test_curved_path_figure_marks_both_barriers(results):
    path = results[3]
    fig = F.curved_path_figure(path)
    by_uid = {t.uid: t for t in fig.data}
    np.testing.assert_allclose(by_uid["bend-curve"].y, path.loss)
    inside = (path.segment.t >= 0) & (path.segment.t <= 1)
    np.testing.assert_allclose(by_uid["bend-segment"].y, path.segment.loss[inside])
    assert by_uid["bend-top-curve"].y[0] == pytest.approx(np.max(path.loss))
    assert by_uid["bend-top-segment"].y[0] == pytest.approx(np.max(path.segment.loss))
    assert f"barrier {path.barrier:.3g}" in by_uid["bend-curve"].name
    assert f"barrier {path.segment_barrier:.3g}" in by_uid["bend-segment"].name
    assert f"curve barrier {path.barrier:.4g}" in fig.layout.title.text
    assert path.barrier < path.segment_barrier


def test_density_figure_is_on_a_log_axis_with_the_negative_mass(results):
    density = results[4]
    assert density.negative_mass > 0  # the ring's centre region: a saddle-like point
    fig = F.density_figure(density)
    assert fig.layout.yaxis.type == "log"
    assert f"mass below zero {100 * density.negative_mass:.3g}%" in fig.layout.title.text
    assert f"trace ≈ {density.trace:.4g}" in fig.layout.title.text
    curve = next(t for t in fig.data if t.uid == "density-curve")
    np.testing.assert_allclose(curve.y, np.maximum(density.density, 1e-6 * density.density.max()))
    if len(density.outliers):
        marks = next(t for t in fig.data if t.uid == "density-outliers")
        np.testing.assert_allclose(marks.x, density.outliers["value"])
    notes = " ".join(a.text for a in fig.layout.annotations)
    assert "not a minimum" in notes
    with pytest.raises(core.ParameterError, match="floor"):
        F.density_figure(density, floor=0.0)


def test_sharpness_axis_fits_the_estimates_when_thresholds_are_far_above():
    # A slow rate's threshold (2/lr) can be hundreds of times the sharpness: drawn on one
    # linear axis, every curve would sit on the floor. The axis then fits the estimates
    # and the note says where the thresholds are; log_y keeps them all.
    # Source: the threshold 2/lr of gradient descent (common practice)
    from basinview.core import Problem, descend
    from basinview.figures import sharpness_figure

    prob = Problem(lambda t: 0.5 * (3.0 * t[0] ** 2 + t[1] ** 2), np.array([1.0, 1.0]))
    runs = descend(prob, prob.theta0, learning_rate=[0.001, 0.01], steps=50, sharpness_every=10)
    fig = sharpness_figure(runs)
    top = np.nanmax(runs.sharpness)
    assert fig.layout.yaxis.range[1] == pytest.approx(1.12 * top, rel=1e-6)
    notes = " ".join(a.text for a in fig.layout.annotations)
    assert "Thresholds above the range: the lowest is 200" in notes
    logged = sharpness_figure(runs, log_y=True)
    assert logged.layout.yaxis.type == "log"
    assert "above the range" not in " ".join(a.text for a in logged.layout.annotations)
    assert "runs drawn" not in notes  # both runs are drawn
    many = descend(prob, prob.theta0, learning_rate=list(np.linspace(0.01, 0.5, 14)), steps=20,
                   sharpness_every=10)  # fmt: skip
    capped = " ".join(a.text for a in sharpness_figure(many).layout.annotations)
    assert "12 of 14 runs drawn" in capped
    # a threshold near the estimates stays on the axis
    near = sharpness_figure(descend(prob, prob.theta0, learning_rate=0.5, steps=20,
                                    sharpness_every=10))  # fmt: skip
    assert near.layout.yaxis.range[1] == pytest.approx(1.12 * 2 / 0.5, rel=1e-6)

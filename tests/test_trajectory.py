"""The user's own run on the plane of its principal directions (core/trajectory.py)."""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import optax
import pytest
from sklearn.decomposition import PCA

from basinview.core import (
    ParameterError,
    Problem,
    RunRecorder,
    count_compilations,
    evaluate_surface,
    plane_from_spec,
    trajectory_plane,
)


def mlp_loss(p, x, y):
    h = jnp.tanh(x @ p["w1"] + p["b1"])
    return jnp.mean((h @ p["w2"] + p["b2"] - y) ** 2)


@pytest.fixture(scope="module")
def trained():
    """A small network trained by a loop of the user's own (optax Adam), recorded."""
    rng = np.random.default_rng(7)
    x = rng.standard_normal((64, 2)).astype(np.float32)
    y = np.sin(2 * x[:, :1]) + 0.3 * x[:, 1:]
    params = {
        "w1": jnp.asarray(0.5 * rng.standard_normal((2, 5)), jnp.float32),
        "b1": jnp.zeros(5, jnp.float32),
        "w2": jnp.asarray(0.5 * rng.standard_normal((5, 1)), jnp.float32),
        "b2": jnp.zeros(1, jnp.float32),
    }
    problem = Problem(mlp_loss, params, x, y)
    opt = optax.adam(0.05)
    state = opt.init(params)

    @jax.jit
    def step(p, s):
        g = jax.grad(mlp_loss)(p, x, y)
        u, s = opt.update(g, s, p)
        return optax.apply_updates(p, u), s

    recorder = RunRecorder(problem, every=1, keep=32)
    everything = []
    for _ in range(301):
        recorder.record(params)
        everything.append(params)
        params, state = step(params, state)
    return problem, recorder, everything


def test_directions_and_variance_equal_sklearn_pca(trained):
    problem, recorder, _ = trained
    track = trajectory_plane(problem, recorder)
    flats = recorder.checkpoints().astype(np.float64)
    # Source: scikit-learn PCA as reference library, on the offsets from the final
    # checkpoint (the matrix M of Li et al. 2018, section 7).
    pca = PCA(n_components=2).fit(flats[:-1] - flats[-1])
    cos = np.abs(pca.components_ @ track.plane.directions.astype(np.float64).T)
    np.testing.assert_allclose(np.diag(cos), 1.0, atol=1e-5)
    np.testing.assert_allclose(track.explained, pca.explained_variance_ratio_, rtol=1e-6)
    assert track.plane.axis_titles[0].endswith(f"({100 * track.explained[0]:.1f}% of variance)")
    assert "offset from the final checkpoint" in track.plane.axis_titles[1]
    # the final checkpoint is the origin; coordinates are offsets from it
    assert (track.a[-1], track.b[-1], track.off_plane[-1]) == (0.0, 0.0, 0.0)
    np.testing.assert_allclose(track.plane.origin, flats[-1], rtol=1e-6)


def test_projection_is_pythagorean_and_loss_is_the_problems(trained):
    problem, recorder, _ = trained
    track = trajectory_plane(problem, recorder)
    flats = recorder.checkpoints().astype(np.float64)
    dist = np.linalg.norm(flats - flats[-1], axis=1)
    # common practice: with orthonormal directions, on-plane^2 + off-plane^2 = distance^2
    np.testing.assert_allclose(track.a**2 + track.b**2 + track.off_plane**2, dist**2, rtol=1e-4)
    a, b, off = track.plane.project(flats)
    np.testing.assert_allclose(a, track.a, atol=1e-5)
    np.testing.assert_allclose(b, track.b, atol=1e-5)
    np.testing.assert_allclose(off, track.off_plane, atol=1e-4)
    np.testing.assert_allclose(track.loss[[0, -1]], [problem.value(f) for f in flats[[0, -1]]])
    assert track.loss[-1] < track.loss[0]
    assert list(track.to_frame().columns) == ["step", "a", "b", "off_plane", "loss"]


def test_a_run_in_a_plane_has_no_off_plane_distance_and_all_the_variance():
    rng = np.random.default_rng(3)
    n = 30
    with jax.enable_x64(True):
        problem = Problem(lambda t: jnp.sum(t**2), jnp.zeros(n, jnp.float64))
        final = rng.standard_normal(n)
        u, v = rng.standard_normal((2, n))
        s = np.linspace(0, 3, 25)
        coords = np.stack([np.cos(s) * (3 - s), 0.4 * np.sin(2 * s)], axis=1)
        coords -= coords[-1]
        checkpoints = [final + c[0] * u + c[1] * v for c in coords]
        track = trajectory_plane(problem, checkpoints)
    # common practice: points of an affine plane through the final checkpoint have no
    # residual against it, and two directions then carry all the variance
    np.testing.assert_allclose(track.off_plane, 0.0, atol=1e-10)
    assert track.explained_total == pytest.approx(1.0, abs=1e-12)
    assert track.caution == ""
    # distances between checkpoints survive the projection (an isometry of the plane)
    pts = np.stack([track.a, track.b], axis=1)
    true = np.stack(checkpoints)
    np.testing.assert_allclose(
        np.linalg.norm(pts[:, None] - pts[None], axis=-1),
        np.linalg.norm(true[:, None] - true[None], axis=-1),
        atol=1e-9,
    )
    # a run off any plane: the caution speaks up
    with jax.enable_x64(True):
        wild = [final + rng.standard_normal(n) for _ in range(8)] + [final]
        assert "Caution" in trajectory_plane(problem, wild).caution


def test_the_plane_can_be_rebuilt_from_its_spec(trained):
    problem, recorder, _ = trained
    plane = trajectory_plane(problem, recorder).plane
    again = plane_from_spec(problem, plane.spec)
    np.testing.assert_allclose(again.origin, plane.origin, atol=1e-6)
    np.testing.assert_allclose(again.directions, plane.directions, atol=1e-5)


def test_recorder_keeps_evenly_spaced_checkpoints_in_bounded_memory(trained):
    problem, recorder, everything = trained
    steps = recorder.steps
    assert len(steps) <= 32 + 1
    assert steps[0] == 0 and steps[-1] == 300
    gaps = np.diff(steps[:-1])
    assert np.all(gaps == recorder.stride) and recorder.stride > 1
    stored = recorder.checkpoints()
    for k, s in enumerate(steps):
        np.testing.assert_array_equal(stored[k], problem.flatten(everything[s]))
    assert len(recorder) < 32  # stored checkpoints, without the latest parameters


def test_recorder_stride_and_call():
    problem = Problem(lambda t: jnp.sum(t**2), jnp.zeros(2))
    rec = RunRecorder(problem, every=3, keep=100)
    for i in range(10):
        rec(jnp.full(2, float(i)))
    assert rec.steps.tolist() == [0, 3, 6, 9]
    np.testing.assert_array_equal(rec.checkpoints()[:, 0], [0, 3, 6, 9])
    rec(jnp.full(2, 10.0))  # the latest parameters always close the record
    assert rec.steps.tolist() == [0, 3, 6, 9, 10]


def test_second_call_does_not_compile(trained):
    problem, recorder, everything = trained
    trajectory_plane(problem, recorder)
    with count_compilations() as counter:
        track = trajectory_plane(problem, everything[::10])
        evaluate_surface(problem, track.plane, span=1.0, resolution=5)
        evaluate_surface(
            problem, track.plane.with_origin(track.plane.origin), span=2.0, resolution=5
        )
    assert counter.count <= 1  # the surface block compiles once; the plane itself never does
    with count_compilations() as counter:
        trajectory_plane(problem, everything[5::7])
    assert counter.count == 0


def test_bad_inputs_are_named():
    problem = Problem(lambda t: jnp.sum(t**2), jnp.zeros(3))
    other = Problem(lambda t: jnp.sum(t**4), jnp.zeros(3))
    with pytest.raises(ParameterError, match="at least 4 checkpoints"):
        trajectory_plane(problem, [np.zeros(3), np.ones(3)])
    with pytest.raises(ParameterError, match="do not move"):
        trajectory_plane(problem, [np.ones(3)] * 5)
    with pytest.raises(ParameterError, match="another Problem"):
        trajectory_plane(other, RunRecorder(problem))
    with pytest.raises(ParameterError, match="list of parameter pytrees"):
        trajectory_plane(problem, "checkpoints")
    with pytest.raises(ParameterError, match="NaN or inf"):
        RunRecorder(problem).record(jnp.array([1.0, jnp.nan, 0.0]))
    with pytest.raises(ParameterError, match="keep"):
        RunRecorder(problem, keep=2)
    with pytest.raises(ParameterError, match="Problem"):
        RunRecorder(mlp_loss)
    with pytest.raises(ParameterError, match="steps must be"):
        trajectory_plane(problem, [np.eye(3)[i % 3] * i for i in range(5)], steps=[1, 2])
    with pytest.warns(UserWarning, match="single line"):
        trajectory_plane(problem, [np.array([1.0, 2.0, 0.0]) * s for s in range(6)])

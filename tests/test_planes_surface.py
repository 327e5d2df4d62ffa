"""Planes, grid surfaces and segment profiles."""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import pytest

from basinview.core import (
    ParameterError,
    Problem,
    axes_plane,
    evaluate_surface,
    random_plane,
    segment_profile,
    through_plane,
)

from .conftest import quadratic


def test_axes_plane_lifts_and_projects():
    prob = Problem(lambda p: jnp.sum(p["w"] ** 2) + p["b"] ** 2, {"w": jnp.arange(3.0), "b": 1.0})
    plane = axes_plane(prob, "w[2]", "b")
    # plane coordinates are the two parameters' values; the others are held
    assert plane.coordinates == "values" and plane.centre == (2.0, 1.0)
    np.testing.assert_allclose(plane.centre_point, prob.theta0)
    theta = plane.lift(0.5, -2.0)
    expected = prob.flatten({"w": jnp.array([0.0, 1.0, 0.5]), "b": -2.0})
    np.testing.assert_allclose(theta, expected)
    a, b, resid = plane.project(theta)
    assert (float(a), float(b), float(resid)) == pytest.approx((0.5, -2.0, 0.0))
    # Moving a coordinate that is not on the plane shows up as off-plane distance.
    off = theta.copy()
    off[prob.index("w[0]")] += 3.0
    assert float(plane.project(off)[2]) == pytest.approx(3.0)


def test_axes_plane_rejects_same_or_unknown_coordinate():
    prob = Problem(lambda p: jnp.sum(p**2), jnp.ones(3))
    with pytest.raises(ParameterError, match="must differ"):
        axes_plane(prob, "theta[0]", "theta[0]")
    with pytest.raises(ParameterError, match="unknown coordinate label 'w'"):
        axes_plane(prob, "w", "theta[0]")


def test_slice_of_quadratic_equals_closed_form(rng, x64):
    # Source: for f = 1/2 (t - t*)' A (t - t*), the slice through t* along d1, d2 is
    # exactly 1/2 (a^2 d1'Ad1 + 2ab d1'Ad2 + b^2 d2'Ad2) (common practice; stated in
    # Li et al. 2018, arXiv:1712.09913, for the quadratic case).
    n = 7
    m = rng.standard_normal((n, n))
    a_mat = m @ m.T + n * np.eye(n)
    t_star = rng.standard_normal(n)
    prob = Problem(
        lambda t, a, ts: 0.5 * (t - ts) @ (a @ (t - ts)), jnp.asarray(t_star), a_mat, t_star
    )
    plane = random_plane(prob, seed=3, normalise="none")
    s = evaluate_surface(prob, plane, span=((-2, 1), (-0.5, 1.5)), resolution=(17, 13))
    d1, d2 = plane.d1, plane.d2
    aa, bb = np.meshgrid(s.a, s.b)
    q11, q12, q22 = d1 @ a_mat @ d1, d1 @ a_mat @ d2, d2 @ a_mat @ d2
    closed = 0.5 * (aa**2 * q11 + 2 * aa * bb * q12 + bb**2 * q22)
    np.testing.assert_allclose(s.loss, closed, rtol=1e-12, atol=1e-12)
    frame = s.to_frame()
    assert list(frame.columns) == ["a", "b", "loss"]
    assert len(frame) == 17 * 13


def test_surface_is_independent_of_chunk_size(rng):
    x = rng.standard_normal((300, 2)).astype(np.float32)
    y = (x @ np.array([1.5, -0.5]) + 0.1).astype(np.float32)
    prob = Problem(
        lambda p, x, y: jnp.mean((x @ p["w"] + p["b"] - y) ** 2),
        {"w": jnp.zeros(2), "b": 0.0},
        x,
        y,
    )
    plane = axes_plane(prob, "w[0]", "w[1]")
    surfaces = [
        evaluate_surface(prob, plane, span=2.0, resolution=23, chunk_size=c)
        for c in (1, 7, 64, 2048)
    ]
    for s in surfaces[1:]:
        np.testing.assert_allclose(s.loss, surfaces[0].loss, rtol=2e-6)
    # The grid agrees with a plain loop over grid points.
    j, i = 5, 17
    theta = plane.lift(surfaces[0].a[i], surfaces[0].b[j])
    assert surfaces[0].loss[j, i] == pytest.approx(float(prob.value(theta)), rel=1e-6)


def test_nan_region_gives_gaps_not_a_crash():
    prob = Problem(lambda p: jnp.log(p["x"]) ** 2 + p["y"] ** 2, {"x": 1.0, "y": 0.0})
    s = evaluate_surface(prob, axes_plane(prob, "x", "y"), span=2.0, resolution=21)
    assert s.a[0] == pytest.approx(-1.0) and s.a[-1] == pytest.approx(3.0)  # x = 1 +- 2
    assert np.isnan(s.loss[:, s.a < 0.0]).all()  # x = a < 0: log undefined
    assert np.isfinite(s.loss[:, s.a > 0.0]).all()
    assert s.finite_fraction == pytest.approx(15 / 21)  # x <= 0: 6 of 21 columns


@pytest.mark.parametrize(
    ("span", "resolution", "message"),
    [
        (0.0, 11, "positive"),
        (-1.0, 11, "min < max"),
        (float("nan"), 11, "finite"),
        (1e20, 11, "absurdly large"),
        (1.0, 1, "between 2 and"),
        (1.0, 100_000, "too much memory"),
        (1.0, 2.5, "integer"),
        ((1.0, 2.0, 3.0), 11, "span must be"),
    ],
)
def test_bad_span_and_resolution(span, resolution, message):
    prob = Problem(lambda p: jnp.sum(p**2), jnp.ones(2))
    with pytest.raises(ParameterError, match=message):
        evaluate_surface(
            prob, axes_plane(prob, "theta[0]", "theta[1]"), span=span, resolution=resolution
        )


def _relu_net(params, x):
    h = jax.nn.relu(x @ params["w1"])
    return h @ params["w2"]


def test_filter_normalised_plane_is_invariant_to_layer_rescaling(rng):
    # Source: Li et al. (2018), arXiv:1712.09913, sec. 4 — filter normalisation removes
    # the scale invariance of ReLU nets: scaling layer i by c and layer i+1 by 1/c leaves
    # the function and the filter-normalised slice (same random draw) unchanged.
    x = rng.standard_normal((40, 3)).astype(np.float32)
    y = rng.standard_normal((40, 1)).astype(np.float32)
    w1 = rng.standard_normal((3, 5)).astype(np.float32)
    w2 = rng.standard_normal((5, 1)).astype(np.float32)

    def loss(p, x, y):
        return jnp.mean((_relu_net(p, x) - y) ** 2)

    c = 7.0
    prob_a = Problem(loss, {"w1": w1, "w2": w2}, x, y)
    prob_b = Problem(loss, {"w1": w1 * c, "w2": w2 / c}, x, y)
    sa = evaluate_surface(prob_a, random_plane(prob_a, seed=11), span=1.0, resolution=9)
    sb = evaluate_surface(prob_b, random_plane(prob_b, seed=11), span=1.0, resolution=9)
    np.testing.assert_allclose(sa.loss, sb.loss, rtol=2e-4)
    # Without normalisation the slices differ.
    ua = evaluate_surface(
        prob_a, random_plane(prob_a, seed=11, normalise="none"), span=1.0, resolution=9
    )
    ub = evaluate_surface(
        prob_b, random_plane(prob_b, seed=11, normalise="none"), span=1.0, resolution=9
    )
    assert not np.allclose(ua.loss, ub.loss, rtol=1e-2)


def test_filter_norms_match_the_parameters(rng):
    params = {"k": rng.standard_normal((4, 6)).astype(np.float32), "bias": np.ones(6, np.float32)}
    prob = Problem(lambda p: jnp.sum(p["k"] ** 2) + jnp.sum(p["bias"]), params)
    plane = random_plane(prob, seed=0)  # filters along the last axis (outputs)
    d = prob.unflatten(plane.d1)
    np.testing.assert_allclose(
        np.linalg.norm(d["k"], axis=0), np.linalg.norm(params["k"], axis=0), rtol=1e-5
    )
    assert not np.any(d["bias"])  # bias-like leaves are zeroed by default
    kept = prob.unflatten(random_plane(prob, seed=0, zero_bias=False).d1)
    assert np.linalg.norm(kept["bias"]) == pytest.approx(np.linalg.norm(params["bias"]), rel=1e-5)
    rows = prob.unflatten(random_plane(prob, seed=0, filter_axis=0).d1)
    np.testing.assert_allclose(
        np.linalg.norm(rows["k"], axis=1), np.linalg.norm(params["k"], axis=1), rtol=1e-5
    )
    layer = prob.unflatten(random_plane(prob, seed=0, normalise="layer").d1)
    assert np.linalg.norm(layer["k"]) == pytest.approx(np.linalg.norm(params["k"]), rel=1e-5)


def test_random_plane_is_seeded():
    prob = Problem(lambda p: jnp.sum(p**2), jnp.ones(10))
    p1, p2, p3 = (random_plane(prob, seed=s, normalise="none") for s in (4, 4, 5))
    np.testing.assert_array_equal(p1.d1, p2.d1)
    assert not np.allclose(p1.d1, p3.d1)
    with pytest.raises(ParameterError, match="normalise"):
        random_plane(prob, normalise="unit")
    with pytest.raises(ParameterError, match="seed"):
        random_plane(prob, seed=-1)


def test_all_bias_model_with_zero_directions_is_explained():
    prob = Problem(lambda p: jnp.sum(p["w"] ** 2), {"w": jnp.zeros(3)})
    with pytest.raises(ParameterError, match="zero"):
        random_plane(prob, normalise="layer")  # the origin is zero, so is its scale


def test_plane_through_three_points(rng):
    prob = Problem(lambda p: jnp.sum(p**2), jnp.zeros(5, jnp.float32))
    pts = [rng.standard_normal(5).astype(np.float32) for _ in range(3)]
    plane = through_plane(prob, *pts)
    for k, p in enumerate(pts):
        a, b, resid = plane.project(p)
        assert float(resid) == pytest.approx(0.0, abs=1e-5)
        if k == 1:
            assert (float(a), float(b)) == pytest.approx((1.0, 0.0), abs=1e-5)
    assert plane.d1 @ plane.d2 == pytest.approx(0.0, abs=1e-4)
    with pytest.raises(ParameterError, match="one line"):
        through_plane(prob, pts[0], pts[1], 2 * pts[1] - pts[0])
    with pytest.raises(ParameterError, match="same point"):
        through_plane(prob, pts[0], pts[0], pts[1])


def test_segment_profile_barrier_of_a_double_well(x64):
    # f(x) = (x^2 - 1)^2: minima at -1 and 1, barrier height f(0) - f(1) = 1 (closed form).
    prob = Problem(lambda p: (p[0] ** 2 - 1) ** 2 + p[1] ** 2, jnp.zeros(2))
    prof = segment_profile(
        prob, jnp.array([-1.0, 0.0]), jnp.array([1.0, 0.0]), resolution=101, extend=0.2
    )
    assert prof.barrier == pytest.approx(1.0)
    assert prof.t[0] == pytest.approx(-0.2)
    assert prof.t[-1] == pytest.approx(1.2)
    assert prof.loss[np.argmin(np.abs(prof.t))] == pytest.approx(0.0)
    # A convex profile has no barrier.
    flat = segment_profile(prob, jnp.array([1.0, -1.0]), jnp.array([1.0, 1.0]))
    assert flat.barrier == pytest.approx(0.0)


def test_quadratic_helper_matches_numpy(rng):
    a = np.diag([1.0, 4.0]).astype(np.float32)
    b = np.array([1.0, 2.0], np.float32)
    prob = Problem(quadratic, jnp.zeros(2), a, b)
    theta = np.array([0.3, -0.2], np.float32)
    assert float(prob.value(theta)) == pytest.approx(0.5 * theta @ a @ theta - b @ theta, rel=1e-6)

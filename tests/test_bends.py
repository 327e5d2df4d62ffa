"""Curved low-loss paths between two points (core/bends.py)."""

from __future__ import annotations

import jax.numpy as jnp
import numpy as np
import pytest

from basinview.core import (
    ParameterError,
    Problem,
    bezier_points,
    count_compilations,
    curved_path,
    segment_profile,
)


def ring(p):
    # minima on the unit circle of the first two coordinates; a bowl in the third
    return (p[0] ** 2 + p[1] ** 2 - 1.0) ** 2 + p[2] ** 2


def double_well(p):
    return (p[0] ** 2 - 1.0) ** 2 + p[1] ** 2


WEST, EAST = np.array([-1.0, 0.0, 0.0]), np.array([1.0, 0.0, 0.0])


@pytest.fixture(scope="module")
def ring_path():
    problem = Problem(ring, jnp.array([1.0, 0.0, 0.0]))
    return problem, curved_path(problem, WEST, EAST, learning_rate=0.05, steps=400, seed=0)


@pytest.fixture(scope="module")
def wells():
    return Problem(double_well, jnp.array([1.0, 0.0]))


def test_across_the_ring_the_segment_is_high_and_the_curve_is_low(ring_path):
    _, path = ring_path
    # Source: the loss's own formula. (x^2 + y^2 - 1)^2 + z^2 is 0 on the unit circle
    # of z = 0, so (-1, 0, 0) and (1, 0, 0) are minima; the segment between them passes
    # the centre, where the loss is (0 - 1)^2 = 1, its highest point on the segment.
    assert float(ring(np.zeros(3))) == 1.0
    assert path.segment_barrier == pytest.approx(1.0, abs=1e-6)
    # A quadratic curve cannot follow the circle exactly: the symmetric curve
    # y = (h / 2)(1 - x^2) at best keeps |x^2 + y^2 - 1| <= (sqrt(2) - 1) / 2, a loss of
    # 0.0429 (computed from the formula); the expected-loss fit lands close to that.
    assert path.barrier < 0.1
    assert path.barrier < path.segment_barrier / 10
    pts = bezier_points(path.start, path.control, path.end, path.t)
    np.testing.assert_allclose(ring(pts.T), path.loss, rtol=1e-4, atol=1e-6)
    assert np.max(np.abs(np.hypot(pts[:, 0], pts[:, 1]) - 1)) < 0.2
    # the curve went round one side of the centre: its middle is far from it
    assert np.hypot(*pts[len(pts) // 2, :2]) > 0.8
    s = path.summary()
    assert s["barrier"].tolist() == [path.segment_barrier, path.barrier]
    assert s["mean_loss"][1] < s["mean_loss"][0]
    assert s["length"][0] == pytest.approx(2.0)


def test_the_segment_is_segment_profile(ring_path):
    problem, path = ring_path
    ref = segment_profile(problem, WEST, EAST, resolution=path.t.size, extend=0.0)
    np.testing.assert_array_equal(path.segment.loss, ref.loss)
    assert path.segment.barrier == ref.barrier
    frame = path.to_frame()
    assert list(frame.columns) == ["t", "curve_loss", "segment_loss"]
    np.testing.assert_allclose(frame["segment_loss"], ref.loss)


def test_the_curve_lies_in_the_three_point_plane(ring_path):
    problem, _ = ring_path
    start, end = np.array([-1.0, 0.0, 0.3]), np.array([1.0, 0.0, -0.2])
    path = curved_path(problem, start, end, learning_rate=0.05, steps=300, seed=1)
    plane = path.plane
    assert plane is not None
    # common practice: a quadratic Bezier curve is a combination of p0, c and p1 with
    # weights summing to one, so it lies in the plane through them
    pts = bezier_points(path.start, path.control, path.end, path.t)
    a, b, off = plane.project(pts)
    np.testing.assert_allclose(off, 0.0, atol=1e-5)
    np.testing.assert_allclose(np.stack([a, b]), np.stack([path.a, path.b]), atol=1e-6)
    np.testing.assert_allclose(plane.lift(path.a, path.b), pts, atol=1e-5)
    np.testing.assert_allclose(plane.origin, start, atol=1e-6)
    np.testing.assert_allclose(plane.lift(1.0, 0.0), end, atol=1e-6)
    assert path.barrier < 0.1 < path.segment_barrier


@pytest.mark.parametrize("seed, jitter", [(0, 0.1), (1, 1.0), (2, 2.0)])
def test_no_curve_gets_below_the_saddle_between_separate_wells(wells, seed, jitter):
    problem = wells
    # Source: the loss's own formula. (x^2 - 1)^2 + y^2 has minima (+-1, 0) at 0 and its
    # saddle at (0, 0) with value 1; any path from x = -1 to x = 1 crosses x = 0, where
    # the loss is 1 + y^2 >= 1, so no path has a barrier below 1.
    path = curved_path(
        problem, WEST[:2], EAST[:2], learning_rate=0.05, steps=300, seed=seed, jitter=jitter
    )
    # the grid of 101 positions may miss the crossing by half a step: near x = 0 the
    # loss falls like 1 - 2 x^2, a few 1e-4 at the speeds of these curves
    assert path.barrier >= 1.0 - 5e-3
    assert path.segment_barrier == pytest.approx(1.0, abs=1e-6)
    # the fit pulls the control point back to the straight line, the lowest way over
    assert abs(path.control[1]) < 0.05


def test_traced_values_never_recompile(ring_path):
    problem, _ = ring_path
    curved_path(problem, WEST, EAST, learning_rate=0.05, steps=50, seed=0)
    with count_compilations() as counter:
        other = curved_path(
            problem, WEST + 0.01, EAST, learning_rate=0.02, steps=77, seed=5, jitter=0.3
        )
    assert counter.count == 0
    assert np.all(np.isfinite(other.control))
    again = curved_path(
        problem, WEST + 0.01, EAST, learning_rate=0.02, steps=77, seed=5, jitter=0.3
    )
    np.testing.assert_array_equal(again.control, other.control)  # seeded: reproducible
    still = curved_path(problem, WEST, EAST, learning_rate=0.05, steps=0, seed=0, jitter=0.0)
    np.testing.assert_allclose(still.control, 0.0, atol=1e-7)  # no steps: the midpoint
    assert still.plane is None and still.a.size == 0  # a straight "curve" has no plane


def test_bad_inputs_are_named(ring_path):
    problem, _ = ring_path
    with pytest.raises(ParameterError, match="same point"):
        curved_path(problem, EAST, EAST)
    with pytest.raises(ParameterError, match="learning_rate"):
        curved_path(problem, WEST, EAST, learning_rate=-1.0)
    with pytest.raises(ParameterError, match="samples"):
        curved_path(problem, WEST, EAST, samples=0)
    with pytest.raises(ParameterError, match="finite"):
        curved_path(problem, WEST, np.array([np.nan, 0.0, 0.0]))
    with pytest.raises(ParameterError, match="jitter"):
        curved_path(problem, WEST, EAST, jitter=-0.5)
    with pytest.raises(ParameterError, match="seed"):
        curved_path(problem, WEST, EAST, seed=-1)
    with pytest.raises(ParameterError, match="diverged"):
        curved_path(problem, WEST, EAST, steps=1, init=np.array([0.0, 1e12, 0.0]))

"""Wilson score intervals for basin and scheme shares."""

import numpy as np
import pytest
from statsmodels.stats.proportion import proportion_confint, samplesize_confint_proportion

from basinview.core import BasinviewError, starts_for_precision, wilson_interval


@pytest.mark.parametrize("confidence", [0.9, 0.95, 0.99])
def test_wilson_matches_statsmodels(confidence):
    # Source: statsmodels.stats.proportion.proportion_confint(method="wilson"), the
    # reference implementation of Wilson (1927) / Brown, Cai & DasGupta (2001) eq. (4).
    k = np.array([0, 1, 7, 50, 99, 100, 3, 441])
    n = np.array([100, 100, 20, 100, 100, 100, 3, 1681])
    low, high = wilson_interval(k, n, confidence=confidence)
    ref_low, ref_high = proportion_confint(k, n, alpha=1 - confidence, method="wilson")
    np.testing.assert_allclose(low, ref_low, rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(high, ref_high, rtol=1e-12, atol=1e-15)


def test_worked_example():
    # Source: Brown, Cai & DasGupta (2001), Statistical Science 16(2) -- the Wilson interval
    # for 0 successes in n trials has lower end 0 and upper end z²/(n + z²).
    low, high = wilson_interval(0, 20)
    z = 1.959963984540054  # standard normal 97.5% quantile (handbook tables: 1.96)
    assert float(low) == 0.0
    assert float(high) == pytest.approx(z * z / (20 + z * z), rel=1e-12)


def test_no_trials_is_the_whole_interval_and_bad_counts_refused():
    low, high = wilson_interval(0, 0)
    assert (float(low), float(high)) == (0.0, 1.0)
    with pytest.raises(BasinviewError, match="successes <= trials"):
        wilson_interval(5, 4)
    with pytest.raises(BasinviewError, match="confidence"):
        wilson_interval(1, 4, confidence=95)


def test_starts_for_precision_matches_statsmodels():
    # Source: statsmodels.stats.proportion.samplesize_confint_proportion (normal approximation,
    # n = z² p (1-p) / h²), rounded up to whole starts.
    for h, p in [(0.05, 0.5), (0.1, 0.5), (0.02, 0.2)]:
        ref = samplesize_confint_proportion(p, h, alpha=0.05)
        assert starts_for_precision(h, share=p) == int(np.ceil(ref))
    with pytest.raises(BasinviewError, match="half_width"):
        starts_for_precision(5)


def test_basin_shares_carry_intervals():
    import jax.numpy as jnp

    from basinview.core import Problem, axes_plane, basin_map

    def loss(theta):  # common practice: a double well with minima at x = ±1
        x, y = theta[0], theta[1]
        return (x**2 - 1.0) ** 2 + y**2

    problem = Problem(loss, jnp.array([0.3, 0.0]))
    bmap = basin_map(problem, axes_plane(problem, "theta[0]", "theta[1]"), span=1.6, resolution=9,
                     learning_rate=0.05, steps=400)
    shares = bmap.shares
    lo, hi = wilson_interval(shares["starts"].to_numpy(), shares["starts"].sum())
    np.testing.assert_allclose(shares["share_low"], lo)
    np.testing.assert_allclose(shares["share_high"], hi)
    assert (shares["share_low"] <= shares["share"]).all() and (shares["share"] <= shares["share_high"]).all()

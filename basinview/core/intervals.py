"""Confidence intervals for shares estimated from a finite number of starts.

A basin share or a scheme's share of runs per solution is a binomial
proportion: ``k`` of ``n`` starts ended in one place. The Wilson score
interval keeps its stated coverage far better than the plain normal
("Wald") interval at small ``n`` and at shares near 0 or 1, and it never
leaves [0, 1].

References:
    Wilson, E. B. (1927). Probable inference, the law of succession, and
    statistical inference. Journal of the American Statistical
    Association 22(158), 209-212.

    Brown, L. D., Cai, T. T. & DasGupta, A. (2001). Interval estimation for
    a binomial proportion. Statistical Science 16(2), 101-133.
"""

from __future__ import annotations

import math
from statistics import NormalDist
from typing import Any

import numpy as np

from .errors import BasinviewError

__all__ = ["starts_for_precision", "wilson_interval"]


def _z(confidence: float) -> float:
    if not (isinstance(confidence, (int, float)) and 0.0 < float(confidence) < 1.0):
        raise BasinviewError(
            f"confidence must be a number strictly between 0 and 1, got {confidence!r}. "
            "Pass e.g. confidence=0.95 for a 95% interval."
        )
    return NormalDist().inv_cdf(0.5 + float(confidence) / 2.0)


def wilson_interval(
    successes: Any, trials: Any, *, confidence: float = 0.95
) -> tuple[np.ndarray, np.ndarray]:
    """Wilson score interval for ``successes`` out of ``trials`` (element-wise).

    Args:
        successes: count(s) ``k``, integers with ``0 <= k <= trials``.
        trials: count(s) ``n``; where ``n == 0`` the interval is ``(0, 1)``
            (nothing is known).
        confidence: two-sided coverage, e.g. ``0.95``.

    Returns:
        ``(low, high)`` arrays broadcast from the inputs.

    References:
        Wilson (1927); Brown, Cai & DasGupta (2001), eq. (4).
    """
    k = np.asarray(successes, dtype=float)
    n = np.asarray(trials, dtype=float)
    if np.any(k < 0) or np.any(n < 0) or np.any(k > n):
        raise BasinviewError(
            "wilson_interval needs 0 <= successes <= trials; got "
            f"successes={successes!r}, trials={trials!r}. Pass counts, not shares."
        )
    z = _z(confidence)
    safe_n = np.where(n > 0, n, 1.0)
    p = k / safe_n
    denom = 1.0 + z * z / safe_n
    centre = (p + z * z / (2.0 * safe_n)) / denom
    half = z * np.sqrt(p * (1.0 - p) / safe_n + z * z / (4.0 * safe_n * safe_n)) / denom
    # k = 0 and k = n have exact ends 0 and 1; rounding would leave 1e-17 there.
    low = np.where((n > 0) & (k > 0), np.clip(centre - half, 0.0, 1.0), 0.0)
    high = np.where((n > 0) & (k < n), np.clip(centre + half, 0.0, 1.0), 1.0)
    return low, high


def starts_for_precision(half_width: float, *, share: float = 0.5, confidence: float = 0.95) -> int:
    """Starts needed so a share's interval is at most ``± half_width`` wide.

    Uses the normal approximation ``n = z² p (1 - p) / h²`` (largest at
    ``share = 0.5``, the safe choice when nothing is known), rounded up.
    For example ``half_width=0.05`` at 95% needs 385 starts; ``0.1`` needs 97.

    References:
        Brown, Cai & DasGupta (2001), section 1.
    """
    if not (isinstance(half_width, (int, float)) and 0.0 < float(half_width) < 1.0):
        raise BasinviewError(
            f"half_width must be a number strictly between 0 and 1, got {half_width!r}; "
            "e.g. 0.05 for shares known to within ±5 points."
        )
    if not (isinstance(share, (int, float)) and 0.0 <= float(share) <= 1.0):
        raise BasinviewError(f"share must be between 0 and 1, got {share!r}.")
    z = _z(confidence)
    return max(1, math.ceil(z * z * float(share) * (1.0 - float(share)) / float(half_width) ** 2))

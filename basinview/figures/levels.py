"""How loss values are mapped to colour: linear or logarithmic levels.

Losses often span several orders of magnitude over a slice (a narrow
valley far below steep walls). Linear contour levels then spend almost all
of the colour range on the walls and show the valley floor as one flat
colour. :func:`choose_levels` looks at the finite values only (NaN and inf
are gaps and stay gaps) and picks:

* ``"log"``: ``log10(loss)`` when every finite value is positive and the
  largest is at least ``ratio`` times the smallest;
* ``"log-excess"``: ``log10(loss - min + eps)`` when some values are zero or
  negative but most of the grid sits close to the minimum (heavy upper
  tail); the colour bar then says so;
* ``"linear"`` otherwise.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..core.errors import ParameterError
from .text import significant

__all__ = ["LEVEL_MODES", "Levels", "choose_levels"]

LEVEL_MODES = ("auto", "linear", "log")

#: A finite range wider than this many times is drawn with log levels.
WIDE_RATIO = 1e3  # common practice: three decades or more read badly on a linear scale


@dataclass(frozen=True)
class Levels:
    """A colour mapping of loss values.

    Attributes:
        mode: ``"linear"``, ``"log"`` or ``"log-excess"``.
        shift: value subtracted before the log (``"log-excess"`` only).
        floor: added after the shift so the minimum maps to a finite value.
        title: colour-bar title saying what the colours show.
    """

    mode: str
    shift: float = 0.0
    floor: float = 0.0
    title: str = "loss"

    @property
    def is_log(self) -> bool:
        return self.mode != "linear"

    def apply(self, loss: np.ndarray) -> np.ndarray:
        """The values to colour: loss, ``log10(loss)`` or ``log10(loss - shift + floor)``.

        NaN and inf become NaN (gaps).
        """
        z = np.array(loss, dtype=np.float64)
        z[~np.isfinite(z)] = np.nan
        if self.mode == "linear":
            return z
        with np.errstate(divide="ignore", invalid="ignore"):
            out = np.log10(z - self.shift + self.floor)
        out[~np.isfinite(out)] = np.nan
        return out

    def ticks(self, z: np.ndarray) -> tuple[list[float], list[str]] | None:
        """Colour-bar ticks at whole decades, labelled with loss values (log modes)."""
        if not self.is_log or not np.isfinite(z).any():
            return None
        lo, hi = float(np.nanmin(z)), float(np.nanmax(z))
        first, last = int(np.floor(lo)), int(np.ceil(hi))
        step = max(1, (last - first) // 8 + 1)
        vals = [float(k) for k in range(first, last + 1, step) if lo - 1e-9 <= k <= hi + 1e-9]
        if len(vals) < 2:
            vals = [lo, hi]
        return vals, [_decade_label(v) for v in vals]


def _decade_label(v: float) -> str:
    if float(v).is_integer():
        k = int(v)
        return f"{10.0**k:g}" if -3 <= k <= 3 else f"1e{k}"
    return significant(10.0**v, 3)


def choose_levels(loss: np.ndarray, mode: str = "auto", *, ratio: float = WIDE_RATIO) -> Levels:
    """Pick linear or logarithmic levels for ``loss`` from its finite values.

    Args:
        loss: loss values (any shape; NaN/inf ignored).
        mode: ``"auto"`` (decide from the data), ``"linear"`` or ``"log"``.
        ratio: in ``"auto"``, use log levels when ``max / min >= ratio``.

    Examples:
        >>> choose_levels(np.array([0.01, 1.0, 100.0])).mode
        'log'
        >>> choose_levels(np.array([1.0, 2.0, 3.0])).mode
        'linear'
    """
    if mode not in LEVEL_MODES:
        raise ParameterError(f"levels must be one of {LEVEL_MODES}; got {mode!r}.")
    z = np.asarray(loss, dtype=np.float64)
    finite = z[np.isfinite(z)]
    if mode == "linear" or finite.size < 2:
        return Levels("linear")
    lo, hi = float(finite.min()), float(finite.max())
    if hi <= lo:
        return Levels("linear")
    if lo > 0:
        if mode == "log" or hi / lo >= ratio:
            return Levels("log", title="loss (log scale)")
        return Levels("linear")
    # Some values are zero or negative: a log of the excess over the minimum,
    # only when the values crowd near the minimum (heavy upper tail).
    excess = finite - lo
    span = hi - lo
    floor = span / ratio**2
    crowded = float(np.median(excess)) <= span / ratio**0.5
    if mode == "log" or crowded:
        return Levels(
            "log-excess",
            shift=lo,
            floor=floor,
            title=f"loss − min (log scale; min = {significant(lo)})",
        )
    return Levels("linear")

"""Basin maps: which critical point each start on a grid of a plane reaches.

A basin map runs descent from every node of a grid on a plane, at one learning
rate and one hyper-parameter setting, and labels each start by the critical
point its run reaches (letters from the problem's registry, see
:mod:`basinview.core.identities`) or by its outcome (diverged, max_steps, not
stationary). Shares are counts over the grid's starts, not probabilities of
the whole parameter space: the grid lies on one plane.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from .checks import check_resolution
from .descent import Runs, descend
from .errors import ParameterError
from .minima import Minima, find_minima, outcome_rows
from .planes import Plane
from .problem import Problem
from .starts import grid_starts
from .surface import span_ranges

__all__ = ["BasinMap", "basin_map"]


@dataclass(frozen=True, eq=False)
class BasinMap:
    """Which critical point each start on a grid of a plane reaches.

    Attributes:
        plane: the plane of the starts.
        a, b: grid coordinates.
        label: ``(len(b), len(a))``; index into ``minima.points``, or an
            outcome label (:data:`OUTCOMES`: ``-1`` diverged, ``-2`` max_steps,
            ``-3`` not stationary).
        minima: the critical points found.
        runs: the runs, one per grid node (row-major in b, then a).
    """

    plane: Plane
    a: np.ndarray
    b: np.ndarray
    label: np.ndarray
    minima: Minima
    runs: Runs

    @property
    def shares(self) -> pd.DataFrame:
        """Starts and share per basin (by letter), then per outcome: max_steps, not stationary, diverged."""
        return outcome_rows(self.minima, self.label).rename(columns={"runs": "starts"})


def basin_map(
    problem: Problem,
    plane: Plane,
    *,
    span: Any = 1.0,
    resolution: Any = 41,
    optimizer: Any = "gradient_descent",
    learning_rate: float = 0.01,
    hyper: dict[str, Any] | None = None,
    steps: int = 1000,
    grad_tol: float | None = None,
    loss_tol: float | None = None,
    xtol: float | None = None,
    ftol: float | None = None,
    progress: bool | None = None,
) -> BasinMap:
    """Run descent from every node of a grid on ``plane`` and label each by where it ends.

    One learning rate and one hyper-parameter setting (a basin map for a
    sweep would mix basins of different dynamics). Runs are batched and
    split into bounded calls; ``progress`` shows a bar for long maps.
    """
    lr = np.asarray(learning_rate, dtype=float)
    if lr.ndim != 0:
        raise ParameterError("a basin map uses one learning rate; call basin_map once per rate.")
    if any(np.ndim(v) != 0 for v in (hyper or {}).values()):
        raise ParameterError("a basin map uses one value per hyper-parameter.")
    (a0, a1), (b0, b1) = span_ranges(span, plane.centre)
    ra, rb = check_resolution(resolution)
    starts = grid_starts(plane, span=((a0, a1), (b0, b1)), resolution=(ra, rb))
    show = progress if progress is not None else ra * rb > 4096
    runs = descend(
        problem,
        starts,
        optimizer=optimizer,
        learning_rate=float(lr),
        hyper=hyper,
        steps=steps,
        plane=plane,
        grad_tol=grad_tol,
        loss_tol=loss_tol,
        progress=show,
    )
    minima = find_minima(problem, runs, xtol=xtol, ftol=ftol)
    return BasinMap(
        plane=plane,
        a=np.linspace(a0, a1, ra),
        b=np.linspace(b0, b1, rb),
        label=minima.assignment.reshape(rb, ra),
        minima=minima,
        runs=runs,
    )

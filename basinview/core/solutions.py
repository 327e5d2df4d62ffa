"""Results of connectivity grouping, and the names groups keep on a problem.

:class:`Solutions` is what :func:`~basinview.core.connect_runs` returns: per
run its group, per group its members, losses, barriers and symmetric copies,
with pandas tables. :class:`SolutionRegistry` keeps the representatives of
the groups found on one problem (``problem.cached``; no global state), so a
group keeps its name (``S1``, ``S2``, ...) and colour index in every later
call on the same problem, as critical points keep their letters
(:mod:`basinview.core.identities`). Names start with ``S`` so they never read
as a critical point's letter.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from .minima import DIVERGED_LABEL, MAX_STEPS_LABEL

__all__ = ["SolutionRegistry", "Solutions", "group_name", "solution_groups"]


def group_name(index: int) -> str:
    """The name of the group registered ``index``-th: ``S1``, ``S2``, ..."""
    return f"S{int(index) + 1}"


#: Most representatives a registry keeps (memory and the cost of comparing new end
#: points with them stay bounded over a long interactive session).
MAX_REPRESENTATIVES = 64


class SolutionRegistry:
    """Representatives of the solution groups found so far on one problem.

    Each representative belongs to a group id; ids follow registration order
    and give the name (:func:`group_name`) and colour index. When a later
    call finds that two groups are connected, the later id becomes an alias
    of the earlier one. The registry grows only and lives with the problem,
    up to :data:`MAX_REPRESENTATIVES` representatives: past that, a solution
    found for the first time still gets a new name in its call, but no
    representative is kept, so a later call names it afresh (:attr:`full`).
    """

    def __init__(self, size: int) -> None:
        self.size = int(size)
        self._points = np.zeros((0, self.size))
        self._loss: list[float] = []
        self._owner: list[int] = []
        self._parent: list[int] = []

    def __len__(self) -> int:
        return len(self._parent)

    def __repr__(self) -> str:
        live = sorted({self.find(i) for i in range(len(self))})
        return f"SolutionRegistry({len(live)} groups, {len(self._owner)} representatives)"

    @property
    def points(self) -> np.ndarray:
        return self._points.copy()

    @property
    def losses(self) -> np.ndarray:
        """End loss of each representative."""
        return np.asarray(self._loss, dtype=np.float64)

    @property
    def owners(self) -> list[int]:
        """Group id of each representative (aliases resolved)."""
        return [self.find(i) for i in self._owner]

    def find(self, gid: int) -> int:
        while self._parent[gid] != gid:
            gid = self._parent[gid]
        return gid

    def new_group(self) -> int:
        self._parent.append(len(self._parent))
        return len(self._parent) - 1

    @property
    def full(self) -> bool:
        """Whether no more representatives are kept (see :data:`MAX_REPRESENTATIVES`)."""
        return len(self._owner) >= MAX_REPRESENTATIVES

    def add(self, gid: int, point: np.ndarray, loss: float) -> bool:
        """Keep ``point`` as a representative of group ``gid``; False when the registry is full."""
        if self.full:
            return False
        self._points = np.vstack([self._points, np.asarray(point, np.float64)[None]])
        self._loss.append(float(loss))
        self._owner.append(int(gid))
        return True

    def merge(self, ids: list[int]) -> int:
        roots = sorted({self.find(i) for i in ids})
        for r in roots[1:]:
            self._parent[r] = roots[0]
        return roots[0]


def solution_groups(problem: Any) -> SolutionRegistry:
    """The registry of solution groups of ``problem`` (created on first use, kept with it)."""
    return problem.cached(("solution_groups",), lambda: SolutionRegistry(problem.size))


@dataclass(frozen=True, eq=False)
class Solutions:
    """End points grouped by connectivity (see :func:`connect_runs`).

    Attributes:
        label: ``(R,)`` per run, its group's row, or ``-1`` (diverged or not
            finite) or ``-2`` (max_steps, when unconverged runs were left out).
        names: ``(G,)`` group names (``S1``, ...), stable on the problem.
        colour_index: ``(G,)`` colour index of each group.
        count, share, share_low, share_high: ``(G,)`` runs per group, their
            share of all runs and its 95% Wilson interval.
        loss_min, loss_median, loss_max: ``(G,)`` end losses of the members.
        barrier_inside: ``(G,)`` largest barrier of a member to the
            representative it joined (at most ``tolerance``).
        barrier: ``(G, G)`` lowest barrier measured between two groups (a
            member of one and a representative of the other); the diagonal
            holds ``barrier_inside``.
        copies: ``(G,)`` distinct symmetric copies among the members (1
            without symmetries, or when all members are the same copy).
        representatives: ``(G,)`` representatives per group (several when
            chains joined groups).
        best: ``(G, n)`` lowest member of each group.
        run_barrier: ``(R,)`` each run's barrier to its representative (NaN
            for runs left out).
        end_loss: ``(R,)`` each run's end loss.
        tolerance: the barrier height that counts as connected.
        samples: points along each segment.
        symmetries: names of the declared symmetries.
    """

    label: np.ndarray
    names: tuple[str, ...]
    colour_index: np.ndarray
    count: np.ndarray
    share: np.ndarray
    share_low: np.ndarray
    share_high: np.ndarray
    loss_min: np.ndarray
    loss_median: np.ndarray
    loss_max: np.ndarray
    barrier_inside: np.ndarray
    barrier: np.ndarray
    copies: np.ndarray
    representatives: np.ndarray
    best: np.ndarray
    run_barrier: np.ndarray
    end_loss: np.ndarray
    tolerance: float
    samples: int
    symmetries: tuple[str, ...]

    def __len__(self) -> int:
        return len(self.names)

    @property
    def labels(self) -> list[str]:
        return list(self.names)

    @property
    def table(self) -> pd.DataFrame:
        """One row per group: runs, share with its interval, losses, barriers, copies."""
        g = len(self)
        off = np.where(np.eye(g, dtype=bool), np.inf, self.barrier) if g else self.barrier
        nearest = np.argmin(off, axis=1) if g > 1 else np.zeros(g, dtype=int)
        return pd.DataFrame(
            {
                "group": pd.Series(self.labels, dtype=object),
                "runs": np.asarray(self.count, dtype=np.int64),
                "share": self.share,
                "share_low": self.share_low,
                "share_high": self.share_high,
                "loss_min": self.loss_min,
                "loss_median": self.loss_median,
                "loss_max": self.loss_max,
                "barrier_inside": self.barrier_inside,
                "nearest_group": pd.Series(
                    [self.names[j] if g > 1 else "" for j in nearest], dtype=object
                ),
                "barrier_to_nearest": (off[np.arange(g), nearest] if g > 1 else np.full(g, np.nan)),
                "copies": np.asarray(self.copies, dtype=np.int64),
                "representatives": np.asarray(self.representatives, dtype=np.int64),
            }
        )

    @property
    def barrier_table(self) -> pd.DataFrame:
        """The ``G x G`` barrier matrix with group names as index and columns."""
        return pd.DataFrame(self.barrier, index=self.labels, columns=self.labels)

    @property
    def run_table(self) -> pd.DataFrame:
        """One row per run: its group (or outcome), end loss and barrier to its representative."""
        names = {DIVERGED_LABEL: "diverged", MAX_STEPS_LABEL: "max_steps"}
        group = [self.names[k] if k >= 0 else names[int(k)] for k in self.label]
        return pd.DataFrame(
            {
                "run": np.arange(self.label.size),
                "group": pd.Series(group, dtype=object),
                "end_loss": self.end_loss,
                "barrier": self.run_barrier,
            }
        )

    def to_frame(self) -> pd.DataFrame:
        return self.table

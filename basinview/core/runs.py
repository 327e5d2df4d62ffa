"""The result of a batch of descent runs and its per-run table.

:class:`Runs` holds one row per run (a start crossed with one setting of
the hyper-parameters): the loss, gradient norm and plane coordinates at
every iterate, the end point, the status and the step where the run
stopped. :attr:`Runs.table` summarises each run in a pandas frame;
:meth:`Runs.steps_to_loss` counts the steps each run needed to reach a loss.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from .errors import ParameterError

if TYPE_CHECKING:  # pragma: no cover
    from .descent_config import DescentConfig
    from .planes import Plane

__all__ = ["STATUSES", "Runs", "oscillation_measures", "runs_table"]

STATUSES = ("max_steps", "converged", "diverged")
"""Run outcomes, indexed by the status code the compiled loop writes."""


@dataclass(frozen=True, eq=False)
class Runs:
    """Results of a batch of descent runs (one row per run).

    Attributes:
        rule: name of the update rule.
        hyper: per-run hyper-parameter values, ``{name: (R,) array}``.
        start_index: index of each run's start in ``starts``.
        starts: the distinct starting points, ``(S, n)``.
        losses: ``(R, T + 1)`` loss at iterates 0..T; NaN after the run stopped.
        grad_norms: ``(R, T + 1)`` gradient norm at each iterate; NaN after stop.
        path: ``(R, T + 1, 2)`` plane coordinates of each iterate; NaN after stop.
        off_plane: ``(R, T + 1)`` distance of each iterate from the plane.
        cosines: ``(R, T)`` cosine between successive gradients; NaN after stop.
        final: ``(R, n)`` the iterate where each run stopped.
        status: ``(R,)`` ``"converged"``, ``"diverged"`` or ``"max_steps"``.
        stop_step: ``(R,)`` number of steps taken.
        plane: plane of the recorded projections (None for one-parameter problems).
        config: the validated :class:`~basinview.core.DescentConfig` of the call,
            with the program sizes it ran with (``config.record()`` is the
            JSON-ready dict that Settings store).
        preconditioner: ``(R, n)`` for adaptive rules (Adam, RMSProp), the
            diagonal ``P`` each run's final state divides its step by (see
            :func:`basinview.core.curvature.preconditioned_sharpness`); None
            for other rules.
        scheme: ``(R,)`` the name of each run's initialisation scheme when
            the starts were named sets (:func:`~basinview.core.scheme_starts`),
            else None.
        sharpness: ``(R, J)`` the top Hessian eigenvalue at the iterates
            ``sharpness_steps`` (``descend(..., sharpness_every=k)``); NaN
            after a run stopped; None when not tracked.
        preconditioned_sharpness: ``(R, J)`` ``lambda_max(P^-1 H)`` at the
            same iterates for adaptive rules (NaN at iterate 0); else None.
        sharpness_steps: ``(J,)`` the recorded iterates ``0, k, 2k, ...``.
    """

    rule: str
    hyper: dict[str, np.ndarray]
    start_index: np.ndarray
    starts: np.ndarray
    losses: np.ndarray
    grad_norms: np.ndarray
    path: np.ndarray
    off_plane: np.ndarray
    cosines: np.ndarray
    final: np.ndarray
    status: np.ndarray
    stop_step: np.ndarray
    plane: Plane | None
    config: DescentConfig | None = None
    preconditioner: np.ndarray | None = None
    scheme: np.ndarray | None = None
    sharpness: np.ndarray | None = None
    preconditioned_sharpness: np.ndarray | None = None
    sharpness_steps: np.ndarray | None = None

    @property
    def sharpness_table(self) -> pd.DataFrame:
        """One row per run and recorded iterate: sharpness, threshold, ratio (see
        :func:`basinview.core.sharpness.sharpness_frame`)."""
        from .sharpness import sharpness_frame

        return sharpness_frame(self)

    def __len__(self) -> int:
        return int(self.status.shape[0])

    @property
    def final_loss(self) -> np.ndarray:
        """Loss at the iterate where each run stopped."""
        return self.losses[np.arange(len(self)), self.stop_step]

    def trajectory(self, run: int) -> np.ndarray:
        """``(steps + 1, 2)`` plane coordinates of run ``run`` up to where it stopped."""
        return self.path[run, : self.stop_step[run] + 1]

    def loss_curve(self, run: int) -> np.ndarray:
        """Loss of run ``run`` at every iterate up to where it stopped."""
        return self.losses[run, : self.stop_step[run] + 1]

    def steps_to_loss(self, target: float) -> pd.array:
        """Steps each run took until its loss was at most ``target`` for the first time.

        Counted over the recorded iterates (iterate 0 is the start, so a run
        that starts at or below ``target`` gives 0). Runs that never reached
        it give ``<NA>``: they stopped (converged elsewhere, diverged, or ran
        out of steps) above ``target``.

        Examples:
            >>> import jax.numpy as jnp
            >>> from basinview.core import Problem, descend
            >>> prob = Problem(lambda p: p[0] ** 2 + p[1] ** 2, jnp.zeros(2))
            >>> runs = descend(prob, jnp.array([1.0, 0.0]), learning_rate=0.25, steps=20)
            >>> runs.steps_to_loss(0.01).tolist()  # the loss quarters each step
            [4]
        """
        try:
            level = float(target)
        except (TypeError, ValueError):
            raise ParameterError(
                f"target must be a number (a loss value); got {target!r}."
            ) from None
        if np.isnan(level):
            raise ParameterError("target must be a number, not NaN.")
        with np.errstate(invalid="ignore"):
            below = self.losses <= level  # NaN (after a run stopped) compares False
        reached = below.any(axis=1)
        first = np.argmax(below, axis=1)
        out = pd.array(np.where(reached, first, 0), dtype="Int64")
        out[~reached] = pd.NA
        return out

    def table_with(self, *, loss_below: float | None = None) -> pd.DataFrame:
        """:attr:`table`, with a column ``steps_to_loss`` when ``loss_below`` is given
        (see :meth:`steps_to_loss`)."""
        return runs_table(self, loss_below=loss_below)

    @property
    def table(self) -> pd.DataFrame:
        """One row per run: start (and scheme), hyper-parameters, status, steps, losses, end point."""
        return runs_table(self)

    def to_frame(self) -> pd.DataFrame:
        return self.table


def oscillation_measures(losses: np.ndarray, cosines: np.ndarray, stop: int) -> tuple[float, float]:
    """Fractions of loss alternations and gradient reversals in the second half of a run.

    A loss alternation is a change of sign between successive loss
    differences (up, down, up, ...); a gradient reversal is a step after which
    the gradient points against the previous one (negative cosine). Both are
    measured over the later half of the run so that a transient zig-zag that
    dies out does not count. Differences at rounding level are ignored.
    """
    if stop < 4:
        return 0.0, 0.0
    half = stop // 2
    f = losses[half : stop + 1].astype(np.float64)
    d = np.diff(f)
    scale = np.nanmax(np.abs(f)) if np.isfinite(f).any() else 1.0
    d = d[np.abs(d) > 64 * np.finfo(losses.dtype).eps * max(scale, 1e-300)]
    alternation = float(np.mean(np.sign(d[1:]) != np.sign(d[:-1]))) if d.size >= 3 else 0.0
    c = cosines[half:stop]
    c = c[np.isfinite(c)]
    reversal = float(np.mean(c < 0)) if c.size >= 2 else 0.0
    return alternation, reversal


def runs_table(runs: Runs, *, loss_below: float | None = None) -> pd.DataFrame:
    """The per-run table of :class:`Runs` (see :attr:`Runs.table`).

    With ``loss_below``, a column ``steps_to_loss`` gives the steps each run
    took to reach that loss (``<NA>`` when it never did).
    """
    r = len(runs)
    rows: dict[str, Any] = {"run": np.arange(r), "start": runs.start_index}
    if runs.scheme is not None:
        rows["scheme"] = pd.Series(runs.scheme, dtype=object)
    for name, values in runs.hyper.items():
        rows[name] = values
    rows["status"] = runs.status
    alt = np.zeros(r)
    rev = np.zeros(r)
    for i in range(r):
        alt[i], rev[i] = oscillation_measures(
            runs.losses[i], runs.cosines[i], int(runs.stop_step[i])
        )
    rows["oscillating"] = np.maximum(alt, rev) >= 0.5
    rows["steps"] = runs.stop_step
    conv = runs.status == "converged"
    rows["steps_to_tol"] = pd.array(np.where(conv, runs.stop_step, 0), dtype="Int64")
    rows["steps_to_tol"][~conv] = pd.NA
    if loss_below is not None:
        rows["steps_to_loss"] = runs.steps_to_loss(loss_below)
    rows["start_loss"] = runs.losses[:, 0]
    rows["final_loss"] = runs.final_loss
    rows["final_grad_norm"] = runs.grad_norms[np.arange(r), runs.stop_step]
    rows["loss_alternation"] = alt
    rows["gradient_reversal"] = rev
    rows["a_start"] = runs.path[:, 0, 0]
    rows["b_start"] = runs.path[:, 0, 1]
    ends = runs.path[np.arange(r), runs.stop_step]
    rows["a_end"] = ends[:, 0]
    rows["b_end"] = ends[:, 1]
    rows["off_plane_end"] = runs.off_plane[np.arange(r), runs.stop_step]
    return pd.DataFrame(rows)

"""The user's own training run on the plane that shows it best.

Most users train with a loop of their own (optax or hand-written). This
module takes the parameters that loop went through, either as a list of
checkpoints or through a :class:`RunRecorder` called inside the loop, and
builds the plane of the top two principal directions of the checkpoints
relative to the final one. The run is then drawn on that plane with its
distance off the plane, and the surface can be evaluated around it with
:func:`~basinview.core.evaluate_surface`.

Caution: principal directions describe where the run went, not the shape of
the loss. The loss on this plane is still a slice; the run's projection can
look like it crosses contours it never met, wherever its off-plane distance
is not small.
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from .errors import ParameterError
from .planes import Plane
from .problem import Problem

__all__ = ["RunRecorder", "TrajectoryPlane", "trajectory_plane"]

MIN_CHECKPOINTS = 4
"""At least four checkpoints: three offsets from the final one, centred, span a plane."""


def _positive_int(value: Any, name: str, least: int) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < least:
        raise ParameterError(f"{name} must be an integer of at least {least}; got {value!r}.")
    return int(value)


class RunRecorder:
    """Keeps every ``every``-th parameter vector of a training loop, in bounded memory.

    Call :meth:`record` once per step of your own loop. The recorder keeps
    the parameters of steps ``0, every, 2 * every, ...``; when ``keep``
    checkpoints are stored it drops every other one and doubles its stride,
    so the stored checkpoints stay evenly spaced over the whole run and
    memory never exceeds ``keep + 1`` flat vectors (the ``+ 1`` is the most
    recent parameters, which always close the record).

    Args:
        problem: the problem whose parameter structure the checkpoints have.
        every: initial stride in steps (1 = every step).
        keep: most checkpoints stored (at least 4).

    Examples:
        >>> import jax.numpy as jnp
        >>> from basinview.core import Problem
        >>> prob = Problem(lambda p: jnp.sum(p ** 2), jnp.ones(3))
        >>> rec = RunRecorder(prob, every=1, keep=4)
        >>> for step in range(10):
        ...     rec.record(jnp.full(3, float(step)))
        >>> rec.steps.tolist()
        [0, 4, 8, 9]
    """

    def __init__(self, problem: Problem, *, every: int = 1, keep: int = 200) -> None:
        if not isinstance(problem, Problem):
            raise ParameterError(
                f"RunRecorder needs the Problem whose parameters it records; got "
                f"{type(problem).__name__}. Build Problem(loss, params, *data) first."
            )
        self._problem = problem
        self._every = _positive_int(every, "every", 1)
        self._keep = _positive_int(keep, "keep", MIN_CHECKPOINTS)
        self._steps: list[int] = []
        self._stored: list[np.ndarray] = []
        self._last: tuple[int, Any] | None = None
        self._count = 0

    @property
    def problem(self) -> Problem:
        return self._problem

    def __len__(self) -> int:
        """Checkpoints stored so far (the most recent parameters not counted)."""
        return len(self._stored)

    @property
    def stride(self) -> int:
        """Current distance in steps between stored checkpoints."""
        return self._every

    def record(self, params: Any) -> None:
        """Note the parameters of the current step (a pytree like ``problem.params``).

        Steps that are not stored cost no copy: the recorder only keeps a
        reference to the most recent parameters (JAX arrays are immutable;
        do not modify NumPy parameters in place after recording them).
        """
        step = self._count
        self._count += 1
        self._last = (step, params)
        if step % self._every:
            return
        self._steps.append(step)
        self._stored.append(self._flat(params, step))
        if len(self._stored) >= self._keep:
            self._steps = self._steps[::2]
            self._stored = self._stored[::2]
            self._every *= 2

    __call__ = record

    def _flat(self, params: Any, step: int) -> np.ndarray:
        flat = np.array(self._problem.flatten(params, what="recorded parameters"), copy=True)
        if not np.all(np.isfinite(flat)):
            raise ParameterError(
                f"the parameters recorded at step {step} contain NaN or inf; the run has "
                "diverged. Record only finite parameters (stop the loop, or lower the "
                "learning rate)."
            )
        return flat

    def _tail(self) -> tuple[int, Any] | None:
        if self._last is None or (self._steps and self._steps[-1] == self._last[0]):
            return None
        return self._last

    @property
    def steps(self) -> np.ndarray:
        """Steps of the checkpoints :meth:`checkpoints` returns (the last step included)."""
        tail = self._tail()
        steps = self._steps + ([tail[0]] if tail else [])
        return np.asarray(steps, dtype=np.int64)

    def checkpoints(self) -> np.ndarray:
        """``(k, n)`` stored flat parameters, ending with the most recent ones."""
        tail = self._tail()
        stored = self._stored + ([self._flat(tail[1], tail[0])] if tail else [])
        if not stored:
            return np.zeros((0, self._problem.size), self._problem.dtype)
        return np.stack(stored)


@dataclass(frozen=True, eq=False)
class TrajectoryPlane:
    """A run on the plane of its top two principal directions.

    Attributes:
        plane: origin at the final checkpoint; ``d1``, ``d2`` are the unit
            principal directions, so plane coordinates are offsets (in
            parameter distance) from the final checkpoint.
        explained: share of the checkpoints' variance along ``d1`` and ``d2``.
        singular_values: all singular values of the centred offsets, descending.
        steps: step of each checkpoint.
        a, b: the checkpoints' plane coordinates (the final one at ``(0, 0)``).
        off_plane: each checkpoint's distance from the plane.
        loss: the loss at each checkpoint.
    """

    plane: Plane
    explained: np.ndarray
    singular_values: np.ndarray
    steps: np.ndarray
    a: np.ndarray
    b: np.ndarray
    off_plane: np.ndarray
    loss: np.ndarray

    @property
    def explained_total(self) -> float:
        return float(np.sum(self.explained))

    @property
    def caution(self) -> str:
        """A sentence on how far the drawing can be trusted (empty when it can)."""
        reach = float(np.max(np.hypot(self.a, self.b))) if self.a.size else 0.0
        off = float(np.max(self.off_plane)) if self.off_plane.size else 0.0
        parts = []
        if self.explained_total < 0.9:
            parts.append(
                f"the plane holds only {100 * self.explained_total:.1f}% of the run's variance"
            )
        if reach > 0 and off > 0.1 * reach:
            parts.append(
                f"the run strays up to {off:.3g} off the plane ({100 * off / reach:.0f}% of "
                "its extent on it), so its projection can cross contours it never met"
            )
        return ("Caution: " + "; ".join(parts) + ".") if parts else ""

    def to_frame(self) -> pd.DataFrame:
        """One row per checkpoint: ``step``, ``a``, ``b``, ``off_plane``, ``loss``."""
        return pd.DataFrame(
            {
                "step": self.steps,
                "a": self.a,
                "b": self.b,
                "off_plane": self.off_plane,
                "loss": self.loss,
            }
        )


def _as_checkpoints(problem: Problem, checkpoints: Any) -> tuple[np.ndarray, np.ndarray | None]:
    if isinstance(checkpoints, RunRecorder):
        if checkpoints.problem is not problem:
            raise ParameterError(
                "the recorder was made for another Problem; pass the problem it records "
                "(recorder.problem)."
            )
        return checkpoints.checkpoints().astype(np.float64), checkpoints.steps
    if isinstance(checkpoints, np.ndarray) and checkpoints.ndim == 2:
        flats = [problem.flatten(c, what=f"checkpoint {i}") for i, c in enumerate(checkpoints)]
    elif isinstance(checkpoints, Sequence) and not isinstance(checkpoints, (str, bytes)):
        flats = [problem.flatten(c, what=f"checkpoint {i}") for i, c in enumerate(checkpoints)]
    else:
        raise ParameterError(
            f"checkpoints must be a list of parameter pytrees (or flat vectors), a (k, n) "
            f"array, or a RunRecorder; got {type(checkpoints).__name__}."
        )
    if not flats:
        return np.zeros((0, problem.size)), None
    return np.stack(flats).astype(np.float64), None


def trajectory_plane(
    problem: Problem, checkpoints: Any, *, steps: Sequence[int] | None = None
) -> TrajectoryPlane:
    """The plane of the run's top two principal directions, with the run projected on it.

    With checkpoints ``theta_0, ..., theta_k`` (``theta_k`` the final one),
    the offsets ``theta_i - theta_k`` (``i < k``) are centred on their mean
    and decomposed by SVD, as a principal component analysis does; the two
    leading right singular vectors are the plane's directions, and the
    share of the squared singular values is the variance each explains.
    The plane passes through the final checkpoint, so its coordinates are
    offsets from it, and each checkpoint is reported with its distance off
    the plane.

    Args:
        problem: the problem the checkpoints belong to.
        checkpoints: a list of parameter pytrees or flat vectors in order
            (the last is the final parameters), a ``(k, n)`` array, or a
            :class:`RunRecorder`.
        steps: step of each checkpoint (default ``0, 1, ...``; a recorder
            gives its own).

    Returns:
        A :class:`TrajectoryPlane`.

    References:
        Li, H., Xu, Z., Taylor, G., Studer, C. & Goldstein, T. (2018).
        Visualizing the loss landscape of neural nets. NeurIPS, section 7.
        arXiv:1712.09913.
    """
    flats, rec_steps = _as_checkpoints(problem, checkpoints)
    k = flats.shape[0]
    if k < MIN_CHECKPOINTS:
        raise ParameterError(
            f"a trajectory plane needs at least {MIN_CHECKPOINTS} checkpoints (three offsets "
            f"from the final one span a plane once centred); got {k}. Record more steps, "
            "e.g. RunRecorder(problem, every=1)."
        )
    if not np.all(np.isfinite(flats)):
        raise ParameterError(
            "a checkpoint contains NaN or inf; pass the checkpoints of a finite run."
        )
    if steps is not None:
        if rec_steps is not None:
            raise ParameterError("a RunRecorder knows its steps; do not pass steps with it.")
        rec_steps = np.asarray(steps)
        if rec_steps.shape != (k,) or not np.issubdtype(rec_steps.dtype, np.integer):
            raise ParameterError(f"steps must be {k} integers, one per checkpoint; got {steps!r}.")
    step_arr = np.arange(k) if rec_steps is None else np.asarray(rec_steps, dtype=np.int64)
    final = flats[-1]
    offsets = flats[:-1] - final
    centred = offsets - offsets.mean(axis=0)
    _, sing, vt = np.linalg.svd(centred, full_matrices=False)
    total = float(np.sum(sing**2))
    if total <= 0 or sing.size < 2 or sing[0] <= 0:
        raise ParameterError(
            "the checkpoints do not move (all offsets from the final one are equal); there "
            "is no direction to show. Record the parameters while they change."
        )
    explained = sing[:2] ** 2 / total
    if sing[1] <= 1e-12 * sing[0]:
        warnings.warn(
            "the run moves along a single line: the second principal direction explains no "
            "variance and is arbitrary. The figure is a line drawn on an arbitrary plane.",
            UserWarning,
            stacklevel=2,
        )
    d1, d2 = vt[0], vt[1]
    # Sign convention: the run starts at positive coordinates (its first offset).
    for i, d in enumerate((d1, d2)):
        if offsets[0] @ d < 0:
            vt[i] = -d
    d1, d2 = vt[0], vt[1]
    titles = (
        f"PC1: offset from the final checkpoint ({100 * explained[0]:.1f}% of variance)",
        f"PC2: offset from the final checkpoint ({100 * explained[1]:.1f}% of variance)",
    )
    # Recorded as the plane through the final checkpoint and one step along each
    # direction: plane_from_spec (and so Settings) rebuilds the same origin and
    # directions, since those directions are orthonormal.
    points = [final, final + d1, final + d2]
    spec = {"kind": "through", "points": [[float(x) for x in p] for p in points]}
    dtype = problem.dtype
    plane = Plane(final.astype(dtype), d1.astype(dtype), d2.astype(dtype), titles, spec)
    diff = flats - final
    a, b = diff @ d1, diff @ d2
    off = np.linalg.norm(diff - np.outer(a, d1) - np.outer(b, d2), axis=1)
    loss = np.array([float(problem.value(f.astype(dtype))) for f in flats])
    return TrajectoryPlane(
        plane=plane,
        explained=explained,
        singular_values=sing,
        steps=step_arr,
        a=a,
        b=b,
        off_plane=off,
        loss=loss,
    )

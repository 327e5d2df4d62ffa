"""Curved low-loss paths between two solutions.

A straight segment between two minima often rises high in between; that
alone does not mean the minima are separate, since a curved path may join
them at low loss. :func:`curved_path` fits the control point ``c`` of the
quadratic Bezier curve

``phi(t) = (1 - t)^2 p0 + 2 t (1 - t) c + t^2 p1``,  ``0 <= t <= 1``,

by minimising the expected loss ``E_t[J(phi(t))]`` over ``t ~ U(0, 1)``
with stochastic samples of ``t`` and an optax optimiser (Adam), in one
compiled loop whose learning rate, step count and seed are traced. The
result reports the barrier along the curve next to the straight segment's,
the loss along both, and the plane through ``p0``, ``p1`` and ``c`` (the
quadratic curve lies in it exactly), so the curve can be drawn on a slice.

Caution: a low curve proves a connection (up to the resolution of the
check); a high curve proves nothing, since a better curve (another start,
more bends) may exist. The fit is local: it finds a good control point
near its start, not the best one.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
import optax
import pandas as pd

from .checks import check_int, check_resolution, check_seed
from .errors import ParameterError
from .planes import Plane, through_plane
from .problem import Problem, loss_runtime_errors
from .surface import Profile, evaluate_points, segment_profile

__all__ = ["CurvedPath", "bezier_points", "curved_path"]


def bezier_points(p0: np.ndarray, control: np.ndarray, p1: np.ndarray, t: Any) -> np.ndarray:
    """Points ``phi(t)`` of the quadratic Bezier curve (``t`` any shape; adds a last axis).

    >>> bezier_points(np.zeros(2), np.array([0.0, 2.0]), np.array([2.0, 0.0]), 0.5).tolist()
    [0.5, 1.0]
    """
    t = np.asarray(t, dtype=np.float64)[..., None]
    return (1 - t) ** 2 * p0 + 2 * t * (1 - t) * control + t**2 * p1


@dataclass(frozen=True, eq=False)
class CurvedPath:
    """A fitted quadratic Bezier curve between two points, and the straight segment.

    Attributes:
        start, end, control: flat vectors ``p0``, ``p1`` and the fitted ``c``.
        t: positions along both paths (``0 <= t <= 1``).
        loss: loss along the curve at ``t``.
        barrier: highest loss along the curve above the higher endpoint (>= 0).
        segment: the straight segment's :class:`~basinview.core.Profile`
            (same ``t`` grid).
        plane: the plane through ``start``, ``end`` and ``control``
            (:func:`~basinview.core.through_plane`), or None when the
            control point lies on the segment (the curve is straight).
        a, b: the curve's coordinates on ``plane`` (empty without a plane).
        expected_loss: mean loss along the curve (trapezoid rule on ``t``).
        settings: learning rate, steps, samples and seed of the fit.
    """

    start: np.ndarray
    end: np.ndarray
    control: np.ndarray
    t: np.ndarray
    loss: np.ndarray
    barrier: float
    segment: Profile
    plane: Plane | None
    a: np.ndarray
    b: np.ndarray
    expected_loss: float
    settings: dict[str, Any]

    @property
    def segment_barrier(self) -> float:
        return float(self.segment.barrier)

    def to_frame(self) -> pd.DataFrame:
        """One row per ``t``: loss along the curve and along the segment."""
        seg = np.interp(self.t, self.segment.t, self.segment.loss)
        return pd.DataFrame({"t": self.t, "curve_loss": self.loss, "segment_loss": seg})

    def summary(self) -> pd.DataFrame:
        """Barriers and mean losses of the two paths, one row each."""
        inside = (self.segment.t >= -1e-12) & (self.segment.t <= 1 + 1e-12)
        seg_mean = _trapezoid(self.segment.loss[inside], self.segment.t[inside])
        return pd.DataFrame(
            {
                "path": ["segment", "curve"],
                "barrier": [self.segment_barrier, self.barrier],
                "mean_loss": [seg_mean, self.expected_loss],
                "length": [
                    float(np.linalg.norm(self.end - self.start)),
                    _curve_length(self.start, self.control, self.end),
                ],
            }
        )


def _trapezoid(y: np.ndarray, x: np.ndarray) -> float:
    """Trapezoid rule (numpy's own changed name across the versions we support)."""
    return float(np.sum(0.5 * (y[1:] + y[:-1]) * np.diff(x)))


def _curve_length(p0: np.ndarray, c: np.ndarray, p1: np.ndarray) -> float:
    pts = bezier_points(p0, c, p1, np.linspace(0, 1, 401))
    return float(np.sum(np.linalg.norm(np.diff(pts, axis=0), axis=1)))


def _fit_fn(problem: Problem, samples: int) -> Any:
    """Compiled fit: Adam on the control point, ``samples`` draws of ``t`` per step."""

    def build() -> Any:
        grad_loss = jax.grad(problem.flat_loss)

        def expected_grad(c, p0, p1, t, data):
            # d/dc J(phi(t)) = 2 t (1 - t) grad J(phi(t)), averaged over the samples
            def one(ti):
                pt = (1 - ti) ** 2 * p0 + 2 * ti * (1 - ti) * c + ti**2 * p1
                return 2 * ti * (1 - ti) * grad_loss(pt, data)

            return jnp.mean(jax.vmap(one)(t), axis=0)

        def fit(c0, p0, p1, lr, steps, seed, data):
            # the learning rate enters as traced data, so changing it does not recompile
            opt = optax.inject_hyperparams(optax.adam)(learning_rate=lr)
            state = opt.init(c0)
            key = jax.random.PRNGKey(seed)

            def body(i, carry):
                c, st = carry
                t = jax.random.uniform(jax.random.fold_in(key, i), (samples,), dtype=c.dtype)
                g = expected_grad(c, p0, p1, t, data)
                g = jnp.where(jnp.isfinite(g), g, 0)
                upd, st = opt.update(g, st, c)
                return optax.apply_updates(c, upd), st

            c, _ = jax.lax.fori_loop(0, steps, body, (c0, state))
            return c

        problem.check_differentiable()
        return jax.jit(fit)

    return problem.compiled(("bezier-fit", samples), build)


def _check_number(value: Any, name: str, low: float, high: float) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float, np.number)):
        raise ParameterError(f"{name} must be a number; got {value!r}.")
    value = float(value)
    if not (np.isfinite(value) and low < value <= high):
        raise ParameterError(f"{name} must be in ({low}, {high}]; got {value!r}.")
    return value


def _check_jitter(value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float, np.number)):
        raise ParameterError(f"jitter must be a number; got {value!r}.")
    if not (np.isfinite(value) and 0 <= value <= 10):
        raise ParameterError(f"jitter must be between 0 and 10; got {value!r}.")
    return float(value)




def curved_path(
    problem: Problem,
    start: Any,
    end: Any,
    *,
    learning_rate: float = 0.01,
    steps: int = 500,
    samples: int = 8,
    seed: int = 0,
    init: Any = None,
    jitter: float = 0.1,
    resolution: int = 101,
) -> CurvedPath:
    """Fit a low-loss quadratic Bezier curve between ``start`` and ``end``.

    The control point starts at the midpoint of the segment, moved by a
    seeded random offset of length ``jitter * |end - start|`` (at the exact
    midpoint a symmetric loss gives no gradient towards either side), or at
    ``init``. Each of ``steps`` Adam steps averages the gradient with
    respect to the control point over ``samples`` positions ``t ~ U(0, 1)``.

    Args:
        problem: the problem.
        start, end: the two solutions (pytrees or flat vectors).
        learning_rate: Adam's learning rate (traced: changing it does not recompile).
        steps: Adam steps (traced).
        samples: draws of ``t`` per step (static: changes the compiled shape).
        seed: seed of the draws of ``t`` and of the initial offset (traced).
        init: initial control point (pytree or flat); overrides ``jitter``.
        jitter: relative size of the random initial offset (0 = exact midpoint).
        resolution: points of the ``t`` grid on which both paths are evaluated.

    Returns:
        A :class:`CurvedPath`; compare ``barrier`` with ``segment_barrier``.

    References:
        Garipov, T., Izmailov, P., Podoprikhin, D., Vetrov, D. & Wilson, A. G.
        (2018). Loss surfaces, mode connectivity, and fast ensembling of DNNs.
        NeurIPS. arXiv:1802.10026. Kingma, D. P. & Ba, J. (2015). Adam: a
        method for stochastic optimization. ICLR.
    """
    dtype = problem.dtype
    p0 = problem.flatten(start, what="path start").astype(np.float64)
    p1 = problem.flatten(end, what="path end").astype(np.float64)
    if not (np.all(np.isfinite(p0)) and np.all(np.isfinite(p1))):
        raise ParameterError("the path endpoints must be finite.")
    dist = float(np.linalg.norm(p1 - p0))
    if dist == 0:
        raise ParameterError("start and end are the same point; a path needs two distinct points.")
    lr = _check_number(learning_rate, "learning_rate", 0.0, 1e6)
    n_steps = check_int(steps, "steps", 0, 10**7)
    n_samples = check_int(samples, "samples", 1, 4096)
    check_seed(seed, below=2**31)
    res = check_resolution(resolution)[0]
    if init is not None:
        c0 = problem.flatten(init, what="initial control point").astype(np.float64)
        if not np.all(np.isfinite(c0)):
            raise ParameterError("the initial control point must be finite.")
    else:
        jit = _check_jitter(jitter)
        z = np.random.default_rng(int(seed)).standard_normal(p0.size)
        c0 = 0.5 * (p0 + p1) + jit * dist * z / np.linalg.norm(z)
    fit = _fit_fn(problem, n_samples)
    with loss_runtime_errors(problem, "the curved path"):
        c = fit(
            jnp.asarray(c0, dtype),
            jnp.asarray(p0, dtype),
            jnp.asarray(p1, dtype),
            jnp.asarray(lr, dtype),
            jnp.asarray(n_steps, jnp.int32),
            jnp.asarray(int(seed), jnp.int32),
            problem.data,
        )
    control = np.asarray(c, dtype=np.float64)
    if not np.all(np.isfinite(control)):
        raise ParameterError(
            f"the fit of the control point diverged (learning_rate={lr}); lower the "
            "learning rate, e.g. to a tenth."
        )
    t = np.linspace(0.0, 1.0, res)
    # The curve lies in the plane p0 + u (p1 - p0) + v (c - p0) with u = t^2, v = 2t(1 - t).
    ab = np.stack([t**2, 2 * t * (1 - t)], axis=1)
    loss = evaluate_points(
        problem, p0.astype(dtype), (p1 - p0).astype(dtype), (control - p0).astype(dtype), ab
    ).astype(np.float64)
    if not np.all(np.isfinite(loss)):
        raise ParameterError(
            f"the fitted curve passes through points where the loss is not finite: the fit "
            f"diverged or left the region where the loss is defined (learning_rate={lr}). "
            "Lower the learning rate (e.g. to a tenth) or start from another control point "
            "(init=...)."
        )
    ends = max(loss[0], loss[-1])
    barrier = float(max(np.nanmax(loss) - ends, 0.0)) if np.isfinite(ends) else float("nan")
    segment = segment_profile(problem, p0, p1, resolution=res, extend=0.0)
    try:
        plane: Plane | None = through_plane(problem, p0, p1, control)
    except ParameterError:
        plane = None
    if plane is not None:
        a, b, _ = plane.project(bezier_points(p0, control, p1, t))
    else:
        a = b = np.zeros(0)
    return CurvedPath(
        start=p0,
        end=p1,
        control=control,
        t=t,
        loss=loss,
        barrier=barrier,
        segment=segment,
        plane=plane,
        a=a,
        b=b,
        expected_loss=_trapezoid(loss, t),
        settings={
            "learning_rate": lr,
            "steps": n_steps,
            "samples": n_samples,
            "seed": int(seed),
            "jitter": None if init is not None else float(jitter),
        },
    )

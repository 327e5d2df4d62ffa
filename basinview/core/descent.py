"""Batched descent runs: starts x hyper-parameters x steps in one compiled call.

One run is written for one start and one hyper-parameter setting; ``vmap``
batches it over runs and a ``while_loop`` steps all runs together until the
step budget is spent or every run has stopped. Runs that converge or
diverge are frozen (masked) at the step where it happened, so they never
influence other runs. Per step the engine records the loss, the gradient
norm, the 2-D projection of the iterate on a plane and its distance off
the plane: O(runs x steps) memory, never O(runs x steps x n).

Everything that varies between calls (starts, learning rates and other
hyper-parameters, tolerances, the plane, the step budget) is a traced array;
run counts and step budgets are padded to a few bucket sizes. Changing these
values therefore reuses the compiled program.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
import pandas as pd

from ._tuning import (
    TUNE_WORK_BYTES,
    bucket,
    data_bytes,
    evaluation_bytes,
    fastest,
    progress_bar,
    runs_per_call_for,
)
from .errors import ParameterError
from .optimizers import Oracle, UpdateRule, check_hyper, get_rule
from .planes import Plane, axes_plane, random_plane
from .problem import Problem, loss_runtime_errors
from .sharding import batch_devices, replicated, shard_batch, split
from .starts import Starts, as_starts

__all__ = [
    "MAX_STEPS",
    "STATUSES",
    "Runs",
    "default_plane",
    "default_tolerances",
    "descend",
    "run_padding_floor",
]

MAX_STEPS = 1_000_000
STATUSES = ("max_steps", "converged", "diverged")
_RUN_BUDGET_BYTES = 64 * 2**20


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
        config: JSON-ready record of the call (for Settings).
        preconditioner: ``(R, n)`` for adaptive rules (Adam, RMSProp), the
            diagonal ``P`` each run's final state divides its step by (see
            :func:`basinview.core.curvature.preconditioned_sharpness`); None
            for other rules.
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
    config: dict[str, Any] = field(default_factory=dict)
    preconditioner: np.ndarray | None = None

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

    @property
    def table(self) -> pd.DataFrame:
        """One row per run: start, hyper-parameters, status, steps, losses, end point."""
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


def runs_table(runs: Runs) -> pd.DataFrame:
    """The per-run table of :class:`Runs` (see :attr:`Runs.table`)."""
    r = len(runs)
    rows: dict[str, Any] = {"run": np.arange(r), "start": runs.start_index}
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


def default_tolerances(dtype: Any) -> dict[str, float]:
    """Default ``grad_tol`` and ``loss_tol`` for a float dtype.

    A run converges when the gradient norm is at most ``grad_tol`` and the
    last loss change is at most ``loss_tol * max(1, |loss|)``.
    """
    if np.dtype(dtype) == np.float64:
        return {"grad_tol": 1e-6, "loss_tol": 1e-12}
    return {"grad_tol": 1e-4, "loss_tol": 1e-6}  # common practice: ~ sqrt of float32 eps


def default_plane(problem: Problem) -> Plane | None:
    """The plane used when none is given: the two axes for n = 2, else a random plane."""
    if problem.size == 1:
        return None
    if problem.size == 2:
        return axes_plane(problem, *problem.labels)
    return random_plane(problem, seed=0, normalise="none")


def _projection(problem: Problem, plane: Plane | None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    n, dtype = problem.size, problem.dtype
    if plane is None:
        origin = np.zeros(n, dtype)
        dirs = np.zeros((2, n), dtype)
        dirs[0, 0] = 1
        return origin, dirs.copy(), dirs
    if plane.size != n:
        raise ParameterError(
            f"the plane has {plane.size} coordinates; the problem has {n}. A plane belongs "
            "to the problem it was made for: build the plane from this problem (e.g. "
            "random_plane(problem) or axes_plane(problem, label_a, label_b))."
        )
    return plane.origin.astype(dtype), plane.projector.astype(dtype), plane.directions.astype(dtype)


def _hyper_grid(
    rule: UpdateRule, learning_rate: Any, hyper: Mapping[str, Any] | None
) -> list[dict[str, float]]:
    given = dict(hyper or {})
    if "learning_rate" in given:
        raise ParameterError("give the learning rate as learning_rate=..., not inside hyper.")
    given["learning_rate"] = learning_rate
    values = check_hyper(rule, given)
    names = list(rule.hyper)
    return [dict(zip(names, combo)) for combo in itertools.product(*(values[k] for k in names))]


def _check_steps(steps: Any) -> int:
    if isinstance(steps, bool) or not isinstance(steps, (int, np.integer)):
        raise ParameterError(f"steps must be a positive integer; got {steps!r}.")
    if not 1 <= steps <= MAX_STEPS:
        raise ParameterError(f"steps must be between 1 and {MAX_STEPS}; got {steps}.")
    return int(steps)


def _batch_rows(problem: Problem, batch_size: int | None) -> int | None:
    if batch_size is None:
        return None
    leaves = jax.tree_util.tree_leaves(problem.data)
    if not leaves:
        raise ParameterError(
            "minibatches need data: this problem has none. Pass the data to "
            "Problem(loss, params, *data), or leave batch_size=None for full gradients."
        )
    rows = {int(leaf.shape[0]) if leaf.ndim else -1 for leaf in leaves}
    if len(rows) != 1 or -1 in rows:
        raise ParameterError(
            "minibatches need every data array to have the same number of rows (first "
            f"axis); got leading sizes {sorted(rows)}."
        )
    n_rows = rows.pop()
    if (
        isinstance(batch_size, bool)
        or not isinstance(batch_size, (int, np.integer))
        or not 1 <= batch_size <= n_rows
    ):
        raise ParameterError(
            f"batch_size must be an integer from 1 to {n_rows} (the rows of data); got {batch_size!r}."
        )
    return int(batch_size)


def _build_run(
    problem: Problem,
    rule: UpdateRule,
    n_runs: int,
    n_steps: int,
    batch: int | None,
    devices: tuple[Any, ...],
    group: int | None = None,
) -> Any:
    """Compile-once function running ``n_runs`` runs per device for up to ``n_steps`` steps.

    Each step evaluates the runs ``group`` at a time (vectorised within a
    group, one group after the other; all at once when ``group`` is None).
    With several devices each one runs its own share of the runs in its own
    loop (no communication; a device stops when its runs have stopped).
    """

    def by_group(fn: Any, args: tuple[Any, ...]) -> Any:
        if group is None or group >= n_runs:
            return jax.vmap(fn)(*args)
        return jax.lax.map(lambda a: fn(*a), args, batch_size=group)

    def data_for(key: jax.Array, k: jax.Array, data: Any) -> Any:
        if batch is None:
            return data
        n_rows = jax.tree_util.tree_leaves(data)[0].shape[0]
        idx = jax.random.randint(jax.random.fold_in(key, k), (batch,), 0, n_rows)
        return jax.tree_util.tree_map(lambda d: d[idx], data)

    vg = jax.value_and_grad(problem.flat_loss)

    def evaluate(theta, key, k, data):
        return vg(theta, data_for(key, k, data))

    def advance(theta, grad, state, hyper, key, k, data):
        batch_data = data_for(key, k, data)

        def partial(th, i):
            e = jnp.zeros_like(th).at[i].set(1)
            return jax.jvp(lambda t: problem.flat_loss(t, batch_data), (th,), (e,))[1]

        theta, state = rule.step(theta, grad, state, hyper, Oracle(partial))
        f, g = evaluate(theta, key, k + 1, data)
        return theta, state, f, g

    def project(theta, origin, proj, dirs):
        diff = theta - origin
        ab = proj @ diff
        return ab, jnp.linalg.norm(diff - ab @ dirs)

    def run(theta0, hyper, active, max_steps, tols, origin, proj, dirs, seed, start_index, data):
        grad_tol, loss_tol, div_factor = tols
        base = jax.random.key(seed)
        keys = jax.vmap(lambda i: jax.random.fold_in(base, i))(start_index)
        dtype = theta0.dtype
        nan = jnp.array(jnp.nan, dtype)
        state0 = jax.vmap(rule.init)(theta0, hyper)
        f0, g0 = by_group(lambda t, key: evaluate(t, key, 0, data), (theta0, keys))
        gn0 = jnp.linalg.norm(g0, axis=1)
        ab0, res0 = jax.vmap(project, in_axes=(0, None, None, None))(theta0, origin, proj, dirs)
        bad0 = ~jnp.isfinite(f0) | ~jnp.isfinite(gn0)
        conv0 = ~bad0 & (gn0 <= grad_tol)
        status = jnp.where(bad0, 2, jnp.where(conv0, 1, 0)).astype(jnp.int32)
        running = active & (status == 0)
        threshold = div_factor * jnp.maximum(jnp.abs(f0), 1.0)

        def buf(first):
            b = jnp.full((n_steps + 1, n_runs), nan, dtype)
            return b.at[0].set(first)

        records = {
            "loss": buf(f0),
            "grad_norm": buf(gn0),
            "a": buf(ab0[:, 0]),
            "b": buf(ab0[:, 1]),
            "off_plane": buf(res0),
            "cosine": jnp.full((n_steps, n_runs), nan, dtype),
        }
        carry0 = (
            jnp.int32(0),
            theta0,
            state0,
            f0,
            g0,
            status,
            running,
            jnp.zeros(n_runs, jnp.int32),
            records,
        )

        def cond(carry):
            k, *_, running, _stop, _rec = carry
            return (k < max_steps) & jnp.any(running)

        def body(carry):
            k, theta, state, f, g, status, running, stop, rec = carry
            theta1, state1, f1, g1 = by_group(
                lambda t, gr, st, hy, key: advance(t, gr, st, hy, key, k, data),
                (theta, g, state, hyper, keys),
            )
            gn1 = jnp.linalg.norm(g1, axis=1)
            gn = jnp.linalg.norm(g, axis=1)
            cos = jnp.sum(g * g1, axis=1) / (gn * gn1)
            diverged = ~jnp.isfinite(f1) | ~jnp.isfinite(gn1) | (f1 - f0 > threshold)
            converged = (gn1 <= grad_tol) & (
                jnp.abs(f1 - f) <= loss_tol * jnp.maximum(1.0, jnp.abs(f1))
            )
            new_status = jnp.where(diverged, 2, jnp.where(converged, 1, 0))
            status = jnp.where(running, new_status, status)
            stop = jnp.where(running, k + 1, stop)

            def keep(new, old):
                mask = running.reshape(running.shape + (1,) * (new.ndim - 1))
                return jnp.where(mask, new, old)

            theta = keep(theta1, theta)
            state = jax.tree_util.tree_map(keep, state1, state)
            f = keep(f1, f)
            g = keep(g1, g)
            ab1, res1 = jax.vmap(project, in_axes=(0, None, None, None))(theta1, origin, proj, dirs)
            row = {
                "loss": f1,
                "grad_norm": gn1,
                "a": ab1[:, 0],
                "b": ab1[:, 1],
                "off_plane": res1,
            }
            rec = {
                name: (
                    rec[name].at[k + 1].set(jnp.where(running, row[name], nan))
                    if name in row
                    else rec[name]
                )
                for name in rec
            }
            rec["cosine"] = rec["cosine"].at[k].set(jnp.where(running, cos, nan))
            running = running & (new_status == 0)
            return (k + 1, theta, state, f, g, status, running, stop, rec)

        k, theta, state, _f, _g, status, running, stop, rec = jax.lax.while_loop(cond, body, carry0)
        stop = jnp.where(running, k, stop)
        if rule.preconditioner is None:
            return theta, status, stop, rec
        return theta, status, stop, rec, jax.vmap(rule.preconditioner)(state, hyper)

    # Batch axis of each argument / output: runs are split, the rest is whole.
    in_batch = (0, 0, 0, None, None, None, None, None, None, 0, None)
    out_batch = (0, 0, 0, 1) if rule.preconditioner is None else (0, 0, 0, 1, 0)
    return shard_batch(run, devices, in_batch, out_batch)


def run_padding_floor(problem: Problem, *, budget_bytes: int = 4 * 2**20, most: int = 16) -> int:
    """A ``min_runs`` for interactive use: pad to ``most`` runs when that is cheap.

    The largest power of two up to ``most`` such that that many runs write at
    most ``budget_bytes`` of value-and-gradient intermediates per step (read
    off the traced loss, no compilation). Small models get ``most``; large
    ones 1 (no padding), so padding never multiplies real work by much.
    """
    per_run = evaluation_bytes(problem, gradient=True)
    floor = 1
    while floor * 2 <= most and floor * 2 * per_run <= budget_bytes:
        floor *= 2
    return floor


def _runs_per_call(problem: Problem, n_runs: int) -> int:
    """Runs per device and call: bucketed, capped by memory and by cache-sized steps.

    The count does not depend on the number of devices: every device runs
    exactly the program one device would run, so results are the same
    whatever the device count. Sweeps of more runs than one call holds are
    spread over the devices; smaller sweeps run on one device.
    """
    per_run = 6 * max(data_bytes(problem), 8 * problem.size, 1)
    cap = max(8, min(4096, _RUN_BUDGET_BYTES // per_run))
    cap = 2 ** math.floor(math.log2(cap))
    cap = min(cap, runs_per_call_for(problem))
    return min(bucket(n_runs), cap)


_GROUP_CANDIDATES = (1, 2, 8)


def _tuned_group(problem: Problem, batch: int | None, theta: np.ndarray, device: Any) -> int:
    """How many runs to vectorise together in a step, timed once per problem.

    Vectorising many runs at once is not always fastest on a CPU: batched
    intermediates can fall out of the caches or need transposes that one run
    alone avoids. Each candidate group size is timed on a few steps' worth
    of gradient evaluations of these runs; the fastest is kept.
    """

    def tune() -> int:
        data = problem.cached(("data-on", (device,)), lambda: jax.device_put(problem.data, device))
        if batch is not None:
            data = jax.tree_util.tree_map(lambda d: d[:batch], data)
        vg = jax.value_and_grad(problem.flat_loss)
        runs = theta.shape[0]
        candidates = [g for g in _GROUP_CANDIDATES if g < runs and runs % g == 0] + [runs]

        def make(group: int) -> Any:
            def steps(th: jax.Array, data: Any) -> jax.Array:
                def one(t: jax.Array) -> tuple[jax.Array, jax.Array]:
                    return vg(t, data)

                def body(_: Any, th: jax.Array) -> jax.Array:
                    if group >= runs:
                        _f, g = jax.vmap(one)(th)
                    else:
                        _f, g = jax.lax.map(one, th, batch_size=group)
                    return th - jnp.asarray(1e-30, th.dtype) * g

                return jax.lax.fori_loop(0, 3, body, th)

            fn = jax.jit(steps)
            th = jax.device_put(theta, device)
            return lambda: fn(th, data).block_until_ready()

        return int(fastest(candidates, make))

    return int(problem.cached(("descent-group", batch), tune))


def _group_for(tuned: int | None, per_device: int) -> int | None:
    """The tuned group size adapted to ``per_device`` runs (a divisor), None for all."""
    if tuned is None or tuned >= per_device:
        return None
    group = tuned
    while per_device % group:
        group //= 2
    return max(group, 1)


def descend(
    problem: Problem,
    starts: Any,
    *,
    optimizer: Any = "gradient_descent",
    learning_rate: float | Any = 0.01,
    hyper: Mapping[str, Any] | None = None,
    steps: int = 200,
    plane: Plane | None = None,
    grad_tol: float | None = None,
    loss_tol: float | None = None,
    divergence_factor: float = 1e6,
    batch_size: int | None = None,
    seed: int = 0,
    progress: bool | None = None,
    devices: Any = None,
    min_runs: int = 1,
) -> Runs:
    """Run an update rule from many starts and hyper-parameter settings at once.

    Every combination of a start and a hyper-parameter setting is one run.
    Settings are the Cartesian product of ``learning_rate`` (a number or a
    list) and each entry of ``hyper`` (numbers or lists), e.g.
    ``learning_rate=[0.01, 0.1], hyper={"momentum": [0.5, 0.9]}`` gives four
    settings.

    Args:
        problem: the problem to minimise.
        starts: :class:`Starts`, one parameter pytree, a list of them, or an
            ``(S, n)`` array of flat vectors.
        optimizer: a rule name (``"gradient_descent"``/``"gd"``,
            ``"sequential"``, ``"momentum"``, ``"nesterov"``, ``"adam"``,
            ``"rmsprop"``), an :class:`UpdateRule`, or an optax factory or
            transformation (see :func:`optax_rule`).
        learning_rate: step size(s), positive.
        hyper: other hyper-parameters of the rule; defaults fill the rest.
        steps: step budget per run.
        plane: plane on which paths are recorded (default: :func:`default_plane`).
        grad_tol, loss_tol: convergence tolerances (default: by dtype, see
            :func:`default_tolerances`).
        divergence_factor: a run diverges when its loss becomes non-finite or
            rises more than ``divergence_factor * max(1, |loss at start|)``
            above its start.
        batch_size: if given, each step uses the gradient of a minibatch of
            that many rows, drawn uniformly with replacement (seeded per start
            and step: runs from the same start see the same minibatches).
        seed: seed of the minibatch sampler.
        progress: show a progress bar over batches of runs.
        devices: devices that share the runs: ``None`` (all that JAX shows,
            see :func:`~basinview.core.use_all_cores`), a count, or a list of
            devices. Results do not depend on the number of devices.
        min_runs: pad every compiled call to at least this many runs. Run
            counts are padded to a few sizes anyway (1, 2, 3, 4, 6, 8, 12,
            16, ...), each compiled once; a floor merges the small ones, so
            an interactive view whose run count changes compiles less often,
            at the cost of computing the padding (see
            :func:`run_padding_floor`). Results do not depend on it.

    Returns:
        :class:`Runs`, with ``.table`` as a pandas DataFrame.

    Examples:
        >>> import jax.numpy as jnp
        >>> prob = Problem(lambda p: (p[0] - 1.0) ** 2 + 10 * p[1] ** 2, jnp.zeros(2))
        >>> runs = descend(prob, jnp.array([0.0, 1.0]), learning_rate=[0.05, 0.11], steps=500)
        >>> runs.table[["learning_rate", "status"]].values.tolist()
        [[0.05, 'converged'], [0.11, 'diverged']]
    """
    rule = get_rule(optimizer)
    problem.check_differentiable()
    start_set: Starts = as_starts(problem, starts)
    settings = _hyper_grid(rule, learning_rate, hyper)
    steps = _check_steps(steps)
    batch = _batch_rows(problem, batch_size)
    tol_defaults = default_tolerances(problem.dtype)
    grad_tol = tol_defaults["grad_tol"] if grad_tol is None else grad_tol
    loss_tol = tol_defaults["loss_tol"] if loss_tol is None else loss_tol
    for tname, tval in (("grad_tol", grad_tol), ("loss_tol", loss_tol)):
        if not (np.isfinite(tval) and tval >= 0):
            raise ParameterError(f"{tname} must be a non-negative number; got {tval!r}.")
    if not (np.isfinite(divergence_factor) and divergence_factor > 0):
        raise ParameterError(f"divergence_factor must be positive; got {divergence_factor!r}.")
    if (
        isinstance(min_runs, bool)
        or not isinstance(min_runs, (int, np.integer))
        or not 1 <= min_runs <= 4096
    ):
        raise ParameterError(
            f"min_runs must be an integer from 1 to 4096; got {min_runs!r}. Leave it at 1 "
            "unless you want fewer compiled shapes as the number of runs changes."
        )
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or not (0 <= seed < 2**32):
        raise ParameterError(
            f"seed must be an integer from 0 to 2**32 - 1; got {seed!r}. Take it modulo "
            "2**32 if it comes from elsewhere."
        )
    if plane is None:
        plane = default_plane(problem)
    origin, proj, dirs = _projection(problem, plane)

    n_starts = len(start_set)
    n_runs = n_starts * len(settings)
    dtype = problem.dtype
    start_index = np.tile(np.arange(n_starts), len(settings))
    hyper_rows = {
        name: np.repeat([s[name] for s in settings], n_starts).astype(np.float64)
        for name in rule.hyper
    }
    theta_all = start_set.points[start_index].astype(dtype)

    devs = batch_devices(devices)
    per_device = _runs_per_call(problem, max(n_runs, int(min_runs)))
    if n_runs <= per_device:
        devs = devs[:1]  # one call's worth of runs: splitting it would change its shapes
    n_dev = len(devs)
    per_call = per_device * n_dev
    steps_b = bucket(steps, minimum=8)
    share = 1.0
    if batch is not None:
        share = batch / jax.tree_util.tree_leaves(problem.data)[0].shape[0]
    work = n_runs * steps * evaluation_bytes(problem, gradient=True) * share
    tuned = None
    if work >= TUNE_WORK_BYTES and per_device > 1:
        first = theta_all[np.arange(per_device) % n_runs]
        tuned = _tuned_group(problem, batch, first, devs[0])
    group = _group_for(tuned, per_device)
    fn = problem.compiled(
        ("descent", rule.init, rule.step, per_device, steps_b, batch, devs, group),
        lambda: _build_run(problem, rule, per_device, steps_b, batch, devs, group),
    )
    if n_dev == 1:
        whole: Any = devs[0]
        shared: Any = devs[0]
    else:
        whole, shared = replicated(devs), split(devs)
    data = problem.cached(("data-on", devs), lambda: jax.device_put(problem.data, whole))
    tols = jax.device_put(
        tuple(np.asarray(x, dtype) for x in (grad_tol, loss_tol, divergence_factor)), whole
    )
    consts = jax.device_put([np.asarray(x) for x in (origin, proj, dirs)], whole)
    max_steps = jax.device_put(np.asarray(steps, np.int32), whole)
    seed_arr = jax.device_put(np.uint32(seed), whole)

    # Launch every call first (JAX dispatches asynchronously), then collect.
    with loss_runtime_errors(problem, "descent runs"):
        outs = _launch_and_collect(
            fn,
            n_runs,
            per_call,
            theta_all,
            hyper_rows,
            start_index,
            dtype,
            shared,
            (max_steps, tols, *consts, seed_arr),
            data,
            progress,
        )
    final = np.concatenate([o[0] for o in outs])
    status_code = np.concatenate([o[1] for o in outs])
    stop = np.concatenate([o[2] for o in outs]).astype(np.int64)
    rec = {k: np.concatenate([o[3][k] for o in outs], axis=1).T for k in outs[0][3]}
    precond = np.concatenate([o[4] for o in outs]) if len(outs[0]) > 4 else None
    t1 = steps + 1
    config = {
        "optimizer": rule.name,
        "learning_rate": sorted({s["learning_rate"] for s in settings}),
        "hyper": {k: sorted({s[k] for s in settings}) for k in rule.hyper if k != "learning_rate"},
        "steps": steps,
        "grad_tol": float(grad_tol),
        "loss_tol": float(loss_tol),
        "divergence_factor": float(divergence_factor),
        "batch_size": batch,
        "seed": int(seed),
    }
    return Runs(
        rule=rule.name,
        hyper=hyper_rows,
        start_index=start_index,
        starts=np.asarray(start_set.points),
        losses=rec["loss"][:, :t1],
        grad_norms=rec["grad_norm"][:, :t1],
        path=np.stack([rec["a"][:, :t1], rec["b"][:, :t1]], axis=-1),
        off_plane=rec["off_plane"][:, :t1],
        cosines=rec["cosine"][:, :steps],
        final=final,
        status=np.asarray(STATUSES, dtype=object)[status_code],
        stop_step=stop,
        plane=plane,
        config=config,
        preconditioner=precond,
    )


def _launch_and_collect(
    fn: Any,
    n_runs: int,
    per_call: int,
    theta_all: np.ndarray,
    hyper_rows: dict[str, np.ndarray],
    start_index: np.ndarray,
    dtype: Any,
    shared: Any,
    fixed: tuple[Any, ...],
    data: Any,
    progress: bool | None,
) -> list[tuple[Any, ...]]:
    """Dispatch every call of a sweep, then read the results back (per call, trimmed).

    ``fixed`` holds the arguments every call shares, in the compiled function's
    order: step budget, tolerances, plane origin, projector, directions, seed.
    """
    pending = []
    for lo in range(0, n_runs, per_call):
        hi = min(lo + per_call, n_runs)
        pad = per_call - (hi - lo)
        idx = np.concatenate([np.arange(lo, hi), np.full(pad, lo)])
        active = np.arange(per_call) < (hi - lo)
        hyper_c = {k: v[idx].astype(dtype) for k, v in hyper_rows.items()}
        theta, hyper, active, starts = jax.device_put(
            (theta_all[idx], hyper_c, active, start_index[idx].astype(np.int32)), shared
        )
        pending.append((hi - lo, fn(theta, hyper, active, *fixed, starts, data)))
    outs: list[tuple[Any, ...]] = []
    show = progress if progress is not None else len(pending) > 4
    for m, result in progress_bar(pending, total=len(pending), show=show, desc="descent"):
        theta, status, stop, rec, *extra = jax.tree_util.tree_map(np.asarray, result)
        outs.append(
            (
                theta[:m],
                status[:m],
                stop[:m],
                {k: v[:, :m] for k, v in rec.items()},
                *(x[:m] for x in extra),
            )
        )
    return outs

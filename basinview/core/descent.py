"""Batched descent runs: starts x hyper-parameters x steps in few compiled calls.

:func:`descend` validates its arguments once into a
:class:`~basinview.core.DescentConfig`, sizes the program with the cost
model (:mod:`basinview.core.cost_model`), runs the compiled program of
:mod:`basinview.core.descent_program` call by call, and assembles the
:class:`~basinview.core.Runs` in one place (:func:`_assemble`).

Everything that varies between calls (starts, learning rates and other
hyper-parameters, tolerances, the plane, the step budget) is a traced array;
run counts and step budgets are padded to a few bucket sizes. Changing these
values therefore reuses the compiled program.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from ._tuning import fastest, pipelined, progress_counter
from .compaction import (
    compaction_group,
    compaction_pays,
    descend_in_segments,
    segment_length,
    size_ladder,
)
from .cost_model import DescentSizes, bucket, descent_sizes, evaluation_bytes
from .descent_config import MAX_STEPS, DescentConfig, default_tolerances, descent_config
from .descent_program import Shared, build_program
from .errors import ParameterError
from .optimizers import UpdateRule, get_rule
from .planes import Plane, axes_plane, random_plane
from .problem import Problem, loss_runtime_errors
from .runs import STATUSES, Runs, oscillation_measures, runs_table
from .sharding import batch_devices, replicated, split
from .starts import Starts, as_starts, scheme_of

__all__ = [
    "MAX_STEPS",
    "STATUSES",
    "DescentConfig",
    "Runs",
    "default_plane",
    "default_tolerances",
    "descend",
    "oscillation_measures",
    "run_padding_floor",
    "runs_table",
]


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


_GROUP_CANDIDATES = (1, 2, 8)


def _tuned_group(problem: Problem, batch: int | None, theta: np.ndarray, device: Any) -> int:
    """With ``tune=True``: how many runs to vectorise together, timed once per problem.

    Each candidate group size is timed on a few steps' worth of gradient
    evaluations of these runs; the fastest is kept (0: all runs at once).
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
                def body(_: Any, th: jax.Array) -> jax.Array:
                    if group >= runs:
                        _f, g = jax.vmap(lambda t: vg(t, data))(th)
                    else:
                        _f, g = jax.lax.map(lambda t: vg(t, data), th, batch_size=group)
                    return th - jnp.asarray(1e-30, th.dtype) * g

                return jax.lax.fori_loop(0, 3, body, th)

            fn = jax.jit(steps)
            th = jax.device_put(theta, device)
            return lambda: fn(th, data).block_until_ready()

        best = int(fastest(candidates, make))
        return 0 if best >= runs else best

    return int(problem.cached(("descent-group", batch, theta.shape[0]), tune))


def _rule_key(rule: UpdateRule) -> Any:
    """What identifies a rule's program: its stable key, else its functions."""
    if rule.key is not None:
        return (rule.key, rule.preconditioner)
    return (rule.init, rule.step, rule.preconditioner)


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
    tune: bool = False,
    sizes: Mapping[str, int] | None = None,
    sharpness_every: int = 0,
    sharpness_iterations: int = 2,
    compact: bool | None = None,
) -> Runs:
    """Run an update rule from many starts and hyper-parameter settings at once.

    Every combination of a start and a hyper-parameter setting is one run.
    Settings are the Cartesian product of ``learning_rate`` (a number or a
    list) and each entry of ``hyper`` (numbers or lists), e.g.
    ``learning_rate=[0.01, 0.1], hyper={"momentum": [0.5, 0.9]}`` gives four
    settings. A value given twice is kept (run numbers follow the values as
    given) with a warning that it repeats work.

    Args:
        problem: the problem to minimise.
        starts: :class:`Starts`, one parameter pytree, a list of them, an
            ``(S, n)`` array of flat vectors, or named start sets
            (``{"scheme name": starts, ...}``, see :func:`scheme_starts`): then
            every run carries its scheme's name (``runs.scheme``, a column of
            ``runs.table``).
        optimizer: a rule name (``"gradient_descent"``/``"gd"``,
            ``"sequential"``, ``"momentum"``, ``"nesterov"``, ``"adam"``,
            ``"rmsprop"``), an :class:`UpdateRule`, or an optax factory or
            transformation (see :func:`optax_rule`).
        learning_rate: step size(s), positive: a number or a 1-D list.
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
        progress: show a progress bar that advances as each compiled call
            finishes (default: when there are more than 4 calls).
        devices: devices that share the runs: ``None`` (all that JAX shows,
            see :func:`~basinview.core.use_all_cores`), a count, or a list of
            devices. Results do not depend on the number of devices.
        min_runs: pad every compiled call to at least this many runs. Run
            counts are padded to a few sizes anyway (1, 2, 3, 4, 6, 8, 12,
            16, ...), each compiled once; a floor merges the small ones, so
            an interactive view whose run count changes compiles less often,
            at the cost of computing the padding (see
            :func:`run_padding_floor`). Results do not depend on it.
        tune: time a few vectorisation sizes once per problem instead of
            taking them from the cost model (:mod:`basinview.core.cost_model`).
        sizes: program sizes to use, as recorded in ``runs.config.sizes`` /
            ``Settings.sizes`` (``descent_runs_per_call``, ``descent_group``):
            recomputes a recorded view with the very same program.
        sharpness_every: every this many steps (and at the start) estimate
            each run's sharpness, the top Hessian eigenvalue, inside the loop
            (for Adam and RMSProp also ``lambda_max(P^-1 H)``); 0: not
            tracked. Static: another value compiles another program.
            See :mod:`basinview.core.sharpness`; results in
            ``Runs.sharpness`` and ``Runs.sharpness_table``.
        sharpness_iterations: warm-started Lanczos steps (Hessian-vector
            products) per record (static).
        compact: run the step budget in segments and, between them, gather
            the runs still running into smaller calls, so that runs that
            stopped cost nothing more (see :mod:`basinview.core.compaction`).
            ``None``: where the cost model says it pays (long, large
            sweeps); ``True``/``False``: always / never. Results are the
            same either way; each smaller call size compiles once.

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
    config = descent_config(
        rule,
        problem.data,
        problem.dtype,
        learning_rate=learning_rate,
        hyper=hyper,
        steps=steps,
        grad_tol=grad_tol,
        loss_tol=loss_tol,
        divergence_factor=divergence_factor,
        batch_size=batch_size,
        seed=seed,
        min_runs=min_runs,
        tune=tune,
        sizes=sizes,
        sharpness_every=sharpness_every,
        sharpness_iterations=sharpness_iterations,
        compact=compact,
    )
    if plane is None:
        plane = default_plane(problem)
    projection = _projection(problem, plane)
    devs = batch_devices(devices)

    settings = config.settings()
    n_starts = len(start_set)
    n_runs = n_starts * len(settings)
    start_index = np.tile(np.arange(n_starts), len(settings))
    hyper_rows = {
        name: np.repeat([s[name] for s in settings], n_starts).astype(np.float64)
        for name in rule.hyper
    }
    theta_all = start_set.points[start_index].astype(problem.dtype)

    chosen = _sizes(problem, config, n_runs, theta_all, devs)
    per_device = chosen.runs_per_call
    if config.compact and config.sizes is None and not config.tune and not chosen.group:
        chosen = chosen._replace(group=compaction_group(per_device))  # calls may shrink
    config = config.with_sizes(chosen)
    if n_runs <= per_device:
        devs = devs[:1]  # one call's worth of runs: splitting it would change its shapes
    steps_b = bucket(config.steps, minimum=8)
    length = segment_length(steps_b, config.sharpness)
    floor = min(per_device, max(bucket(config.min_runs), 2 * chosen.group))
    ladder = size_ladder(per_device, chosen.group or per_device, floor)
    capacity = -(-n_runs // (per_device * len(devs))) * per_device * len(devs)
    segmented = config.compact
    if segmented is None:
        segmented = compaction_pays(
            problem, capacity, config.steps, length, ladder, _data_share(problem, config)
        )
    with loss_runtime_errors(problem, "descent runs"):
        if segmented:
            placed = _placement(problem, devs, config, projection)
            outs = [
                descend_in_segments(
                    problem, rule, _rule_key(rule), devs, placed, per_device, length, ladder,
                    config, theta_all, hyper_rows, start_index, progress,
                )
            ]  # fmt: skip
        else:
            fn = problem.compiled(
                (
                    "descent",
                    _rule_key(rule),
                    per_device,
                    steps_b,
                    config.batch_size,
                    config.sharpness,
                    devs,
                    chosen.group,
                ),
                lambda: build_program(
                    problem.flat_loss,
                    rule,
                    per_device,
                    steps_b,
                    config.batch_size,
                    devs,
                    chosen.group,
                    config.sharpness,
                ),
            )
            outs = _run_calls(
                problem, fn, devs, per_device, config, projection, theta_all, hyper_rows,
                start_index, progress,
            )  # fmt: skip
    return _assemble(
        rule, config, start_set, plane, hyper_rows, start_index, outs, run_major=segmented
    )


def _data_share(problem: Problem, config: DescentConfig) -> float:
    """The fraction of the data rows one step reads (minibatches)."""
    if config.batch_size is None:
        return 1.0
    return config.batch_size / jax.tree_util.tree_leaves(problem.data)[0].shape[0]


def _sizes(
    problem: Problem,
    config: DescentConfig,
    n_runs: int,
    theta_all: np.ndarray,
    devs: tuple[Any, ...],
) -> DescentSizes:
    """The program sizes: recorded ones, else the cost model's (tuned group with ``tune``)."""
    if config.sizes is not None:
        return config.sizes
    steps_b = bucket(config.steps, minimum=8)
    sizes = descent_sizes(
        problem, max(n_runs, config.min_runs), steps_b, _data_share(problem, config)
    )
    if config.tune and sizes.runs_per_call > 1:
        first = theta_all[np.arange(sizes.runs_per_call) % n_runs]
        group = _tuned_group(problem, config.batch_size, first, devs[0])
        sizes = sizes._replace(group=group)
    return sizes


def _placement(
    problem: Problem,
    devs: tuple[Any, ...],
    config: DescentConfig,
    projection: tuple[np.ndarray, np.ndarray, np.ndarray],
) -> tuple[Any, Any, Any]:
    """Where a call's runs go, and the shared arguments and data put on the devices."""
    if len(devs) == 1:
        whole: Any = devs[0]
        shared_on: Any = devs[0]
    else:
        whole, shared_on = replicated(devs), split(devs)
    data = problem.cached(("data-on", devs), lambda: jax.device_put(problem.data, whole))
    tols = tuple(
        np.asarray(x, problem.dtype)
        for x in (config.grad_tol, config.loss_tol, config.divergence_factor)
    )
    shared = jax.device_put(
        Shared(
            max_steps=np.asarray(config.steps, np.int32),
            tols=tols,
            origin=projection[0],
            proj=projection[1],
            dirs=projection[2],
            seed=np.uint32(config.seed),
        ),
        whole,
    )
    return shared_on, shared, data


def _run_calls(
    problem: Problem,
    fn: Any,
    devs: tuple[Any, ...],
    per_device: int,
    config: DescentConfig,
    projection: tuple[np.ndarray, np.ndarray, np.ndarray],
    theta_all: np.ndarray,
    hyper_rows: dict[str, np.ndarray],
    start_index: np.ndarray,
    progress: bool | None,
) -> list[tuple[Any, ...]]:
    """Run the sweep call by call (one call queued ahead), each trimmed to its real runs."""
    dtype = problem.dtype
    shared_on, shared, data = _placement(problem, devs, config, projection)
    n_runs = theta_all.shape[0]
    per_call = per_device * len(devs)
    n_calls = -(-n_runs // per_call)
    outs: list[tuple[Any, ...]] = [()] * n_calls

    def launch(i: int) -> Any:
        lo, hi = i * per_call, min((i + 1) * per_call, n_runs)
        idx = np.concatenate([np.arange(lo, hi), np.full(per_call - (hi - lo), lo)])
        active = np.arange(per_call) < (hi - lo)
        hyper_c = {k: v[idx].astype(dtype) for k, v in hyper_rows.items()}
        theta, hyper, act, starts = jax.device_put(
            (theta_all[idx], hyper_c, active, start_index[idx].astype(np.int32)), shared_on
        )
        return fn(theta, hyper, act, shared, starts, data)

    def collect(i: int, result: Any) -> None:
        m = min(per_call, n_runs - i * per_call)
        theta, status, stop, rec, *extra = jax.tree_util.tree_map(np.asarray, result)
        rec = {k: v[:, :m] for k, v in rec._asdict().items()}
        outs[i] = (theta[:m], status[:m], stop[:m], rec, *(x[:m] for x in extra))

    show = progress if progress is not None else n_calls > 4
    with progress_counter(total=n_calls, show=show, desc="descent") as bar:
        pipelined(n_calls, launch, collect, bar)
    return outs


def _assemble(
    rule: UpdateRule,
    config: DescentConfig,
    start_set: Starts,
    plane: Plane | None,
    hyper_rows: dict[str, np.ndarray],
    start_index: np.ndarray,
    outs: list[tuple[Any, ...]],
    run_major: bool = False,
) -> Runs:
    """The :class:`Runs` of a finished sweep: every call's rows joined, trimmed to the budget.

    ``outs`` holds each call's ``(final, status, stop, records[, preconditioner])``
    with time-major records, or (``run_major``) one block for all runs.
    """
    final = np.concatenate([o[0] for o in outs])
    status_code = np.concatenate([o[1] for o in outs])
    stop = np.concatenate([o[2] for o in outs]).astype(np.int64)
    if run_major:  # one block of records, (runs, T + 1) already
        rec = dict(outs[0][3])
    else:
        rec = {k: np.concatenate([o[3][k] for o in outs], axis=1).T for k in outs[0][3]}
    precond = np.concatenate([o[4] for o in outs]) if len(outs[0]) > 4 else None
    steps = config.steps
    t1 = steps + 1
    names = scheme_of(start_set)
    track = config.sharpness
    sharp: dict[str, Any] = {}
    if track is not None:
        j = steps // track.every + 1
        sharp = {
            "sharpness": rec["sharpness"][:, :j],
            "preconditioned_sharpness": rec["pre_sharpness"][:, :j]
            if precond is not None
            else None,
            "sharpness_steps": track.steps(steps),
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
        scheme=None if names is None else names[start_index],
        **sharp,
    )

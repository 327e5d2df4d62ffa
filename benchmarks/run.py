"""basinview against the code a data scientist would otherwise write, side by side.

Usage (from the repository root)::

    python -m benchmarks.run             # full run, writes benchmarks/results.json
    python -m benchmarks.run --quick     # tiny sizes: checks it runs and agrees
    python -m benchmarks.run --only W1,W3 --repeats 3
    python -m benchmarks.run --only W5 --merge   # rerun W5 into results.json

W1-W4 are timed in this one process for basinview (on all CPU
devices, and on one), for baseline (a), a Python loop calling a jitted JAX
function per grid point or step, and for baseline (b), the same loop in
NumPy with hand-derived gradients (see ``benchmarks/baselines.py``). Each
contender's first call (compilation, tuning) is reported apart; then the
contenders run in interleaved rounds and the median of the rounds is kept.
Results of all contenders are compared numerically. W6 measures peak memory
in fresh processes (``benchmarks/memory.py``).

W5 drives the quickstart Explorer from Python: the latency of a
learning-rate change and the compilations caused by 20 changes of rate,
starts and momentum (``benchmarks/interaction.py``); it has no baseline.

Workloads are registered in ``WORKLOADS`` (functions ``ctx -> dict``).
``--merge`` runs the workloads named by ``--only`` and writes them into the
existing results file, keeping the other workloads' numbers and recording
the machine and date of the merged run beside them.
"""

from __future__ import annotations

import argparse
import json
import math
import subprocess
import sys
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from .workloads import FULL, QUICK, Sizes

__all__ = ["WORKLOADS", "Context", "main"]

ROOT = Path(__file__).resolve().parent.parent
DEFAULT_OUT = Path(__file__).resolve().parent / "results.json"


@dataclass
class Context:
    """What every workload needs: sizes, repeat counts, the devices."""

    sizes: Sizes
    repeats: int
    baseline_repeats: int
    quick: bool
    n_devices: int


# ------------------------------------------------------------------ helpers


def _rel_diff(x: np.ndarray, ref: np.ndarray) -> float:
    x = np.asarray(x, dtype=np.float64)
    ref = np.asarray(ref, dtype=np.float64)
    both = np.isfinite(x) & np.isfinite(ref)
    if not np.array_equal(np.isfinite(x), np.isfinite(ref)):
        return float("inf")
    if not both.any():
        return 0.0
    return float(np.max(np.abs(x[both] - ref[both]) / np.maximum(np.abs(ref[both]), 1.0)))


def _contenders(
    ctx: Context, bv: Callable[[Any], Any], a: Callable[[], Any], b: Callable[[], Any]
) -> list[Any]:
    from .timing import Contender

    out = [Contender("basinview", lambda: bv(None), ctx.repeats)]
    if ctx.n_devices > 1:
        out.append(Contender("basinview_1_device", lambda: bv(1), ctx.repeats))
    out.append(Contender("a_jax_loop", a, ctx.baseline_repeats))
    out.append(Contender("b_numpy_loop", b, ctx.baseline_repeats))
    return out


def _record(contenders: list[Any], compare: Callable[[Any, Any], float]) -> dict[str, Any]:
    by = {c.name: c for c in contenders}
    bv = by["basinview"]
    rec: dict[str, Any] = {name: c.summary() for name, c in by.items()}
    rec["speedup_vs_a"] = by["a_jax_loop"].median / bv.median
    rec["speedup_vs_b"] = by["b_numpy_loop"].median / bv.median
    if "basinview_1_device" in by:
        one = by["basinview_1_device"]
        rec["sharding_speedup"] = one.median / bv.median
        rec["speedup_vs_a_1_device"] = by["a_jax_loop"].median / one.median
        rec["max_rel_diff_1_device"] = compare(one.result, bv.result)
    rec["max_rel_diff_a"] = compare(by["a_jax_loop"].result, bv.result)
    rec["max_rel_diff_b"] = compare(by["b_numpy_loop"].result, bv.result)
    return rec


# ---------------------------------------------------------------- workloads


def matmul(ctx: Context) -> dict[str, Any]:
    """Matrix-multiply FLOP/s in this run: the yardstick for W1's FLOP/s."""
    import jax
    import jax.numpy as jnp

    from basinview.core.sharding import batch_devices, shard_batch, split

    from .timing import Contender, race

    n = ctx.sizes.matmul_size
    rng = np.random.default_rng(5)
    a = rng.standard_normal((n, n)).astype(np.float32)
    b = rng.standard_normal((n, n)).astype(np.float32)
    one = jax.jit(jnp.matmul)
    aj, bj = jnp.asarray(a), jnp.asarray(b)
    contenders = [Contender("1 device", lambda: one(aj, bj).block_until_ready(), ctx.repeats)]
    devs = batch_devices(None)
    if len(devs) > 1:
        many = shard_batch(jnp.matmul, devs, (0, 0), 0)
        stack_a = jax.device_put(np.stack([a] * len(devs)), split(devs))
        stack_b = jax.device_put(np.stack([b] * len(devs)), split(devs))
        contenders.append(
            Contender(
                f"{len(devs)} devices",
                lambda: many(stack_a, stack_b).block_until_ready(),
                ctx.repeats,
            )
        )
    race(contenders)
    flops = {c.name: 2 * n**3 * (1 if c.name == "1 device" else len(devs)) for c in contenders}
    rates = {c.name: flops[c.name] / c.median / 1e9 for c in contenders}
    return {
        "what": f"float32 {n} x {n} matrix product (2 n^3 flops), jnp.matmul under jit; with "
        "several devices each device multiplies its own pair at the same time",
        "gflops": rates,
        "peak_gflops": max(rates.values()),
        "seconds": {c.name: c.summary() for c in contenders},
    }


def _surface_case(
    ctx: Context,
    problem: Any,
    plane: Any,
    span: float,
    resolution: int,
    loss_a: Callable[[Any], float],
    params_a: Callable[[float, float], Any],
    loss_b: Callable[[Any], float],
    params_b: Callable[[float, float], Any],
) -> dict[str, Any]:
    from basinview.core import evaluate_surface

    from .baselines import surface_loop
    from .timing import race

    a = np.linspace(-span, span, resolution)
    b = np.linspace(-span, span, resolution)

    def bv(devices: Any) -> np.ndarray:
        return evaluate_surface(
            problem, plane, span=span, resolution=resolution, progress=False, devices=devices
        ).loss

    contenders = _contenders(
        ctx,
        bv,
        lambda: surface_loop(loss_a, params_a, a, b),
        lambda: surface_loop(loss_b, params_b, a, b),
    )
    race(contenders)
    return _record(contenders, _rel_diff)


def w1(ctx: Context) -> dict[str, Any]:
    """W1: linear-regression MSE surface, both ways of writing the loss."""
    import jax
    import jax.numpy as jnp

    from basinview.core import Problem, axes_plane

    from .workloads import line_data, mse_line, mse_line_np, mse_matrix

    s = ctx.sizes
    data = line_data(s.w1_rows)
    design, y, x = jnp.asarray(data.design), jnp.asarray(data.y), jnp.asarray(data.x)
    origin = data.solution.astype(np.float32)
    out: dict[str, Any] = {
        "what": f"MSE of a straight-line fit on {s.w1_rows} rows over a "
        f"{s.w1_resolution} x {s.w1_resolution} grid of its two parameters"
    }

    prob = Problem(mse_matrix, jnp.zeros(2), data.design, data.y)
    plane = axes_plane(prob, "theta[0]", "theta[1]", origin=origin)
    loss_j = jax.jit(mse_matrix)
    d1, d2 = plane.d1, plane.d2
    mat = _surface_case(
        ctx,
        prob,
        plane,
        2.0,
        s.w1_resolution,
        lambda th: float(loss_j(th, design, y)),
        lambda a, b: origin + a * d1 + b * d2,
        lambda th: float(np.mean((data.design @ th - data.y) ** 2)),
        lambda a, b: origin + a * d1 + b * d2,
    )
    mat["flops_per_row_and_point"] = 6
    out["X @ theta"] = mat

    prob_l = Problem(mse_line, {"intercept": 0.0, "slope": 0.0}, data.x, data.y)
    plane_l = axes_plane(prob_l, "intercept", "slope", origin=origin)
    loss_l = jax.jit(mse_line)
    o0, o1 = np.float32(origin[0]), np.float32(origin[1])

    def params_l(a: float, b: float) -> dict[str, np.float32]:
        return {"intercept": np.float32(o0 + a), "slope": np.float32(o1 + b)}

    line = _surface_case(
        ctx,
        prob_l,
        plane_l,
        2.0,
        s.w1_resolution,
        lambda p: float(loss_l(p, x, y)),
        params_l,
        lambda p: mse_line_np(p["intercept"], p["slope"], data.x, data.y)[0],
        params_l,
    )
    line["flops_per_row_and_point"] = 5
    out["theta0 + theta1 * x"] = line

    for form in ("X @ theta", "theta0 + theta1 * x"):
        rec = out[form]
        flops = rec["flops_per_row_and_point"] * s.w1_rows * s.w1_resolution**2
        rec["gflops"] = flops / rec["basinview"]["median_seconds"] / 1e9
        if "basinview_1_device" in rec:
            rec["gflops_1_device"] = flops / rec["basinview_1_device"]["median_seconds"] / 1e9
    return out


def _mlp_view(rows: int) -> tuple[Any, Any, Any]:
    """The W2/W4 network on ``rows`` rows: its data, Problem and filter-normalised plane."""
    import jax
    import jax.numpy as jnp

    from basinview.core import Problem, random_plane

    from .workloads import mlp_data, mlp_init, mlp_loss

    data = mlp_data(rows)
    prob = Problem(mlp_loss, jax.tree.map(jnp.asarray, mlp_init(0)), data.x, data.y)
    return data, prob, random_plane(prob, seed=1, normalise="filter")


def w2(ctx: Context) -> dict[str, Any]:
    """W2: small MLP surface on a filter-normalised random plane."""
    import jax
    import jax.numpy as jnp

    from .workloads import mlp_loss, mlp_loss_np

    s = ctx.sizes
    data, prob, plane = _mlp_view(s.w2_rows)
    tree = lambda v: jax.tree.map(np.asarray, prob.unflatten(v))
    o, u, v = tree(plane.origin), tree(plane.d1), tree(plane.d2)

    def params_at(a: float, b: float) -> Any:
        return jax.tree.map(lambda oo, uu, vv: oo + a * uu + b * vv, o, u, v)

    loss_j = jax.jit(mlp_loss)
    x, y = jnp.asarray(data.x), jnp.asarray(data.y)
    rec = _surface_case(
        ctx,
        prob,
        plane,
        1.0,
        s.w2_resolution,
        lambda p: float(loss_j(p, x, y)),
        params_at,
        lambda p: mlp_loss_np(p, data.x, data.y),
        params_at,
    )
    rec["what"] = (
        f"2-16-1 tanh network ({prob.size} parameters) on {s.w2_rows} rows over a "
        f"{s.w2_resolution} x {s.w2_resolution} grid of a filter-normalised random plane"
    )
    return rec


def _sweep_compare(x: Any, ref: Any) -> float:
    """Largest relative difference of the loss curves and final parameters."""
    return max(_rel_diff(x[0], ref[0]), _rel_diff(x[1], ref[1]))


def _sweep_case(
    ctx: Context,
    problem: Any,
    plane: Any,
    starts: np.ndarray,
    rates: list[float],
    steps: int,
    loop_a: Callable[[], Any],
    loop_b: Callable[[], Any],
) -> dict[str, Any]:
    from basinview.core import descend

    from .timing import race

    def bv(devices: Any) -> tuple[np.ndarray, np.ndarray]:
        runs = descend(
            problem,
            starts,
            learning_rate=rates,
            steps=steps,
            plane=plane,
            grad_tol=0.0,
            loss_tol=0.0,
            progress=False,
            devices=devices,
        )
        return runs.losses, runs.final

    def wrap(loop: Callable[[], Any]) -> Callable[[], tuple[np.ndarray, np.ndarray]]:
        def go() -> tuple[np.ndarray, np.ndarray]:
            sweep = loop()
            return sweep.losses, np.stack(sweep.final)

        return go

    contenders = _contenders(ctx, bv, wrap(loop_a), wrap(loop_b))
    race(contenders)
    return _record(contenders, _sweep_compare)


def w3(ctx: Context) -> dict[str, Any]:
    """W3: gradient-descent sweep on the W1 loss, both ways of writing the loss."""
    import jax
    import jax.numpy as jnp

    from basinview.core import Problem, axes_plane, random_starts

    from .baselines import descent_loop
    from .workloads import line_data, mse_line, mse_line_np, mse_matrix, mse_matrix_np

    s = ctx.sizes
    data = line_data(s.w3_rows)
    rates = [float(r) for r in np.geomspace(0.02, 0.9, s.w3_rates)]
    origin = data.solution.astype(np.float32)
    out: dict[str, Any] = {
        "what": f"gradient descent on the straight-line MSE with {s.w3_rows} rows from "
        f"{s.w3_starts} starts x {s.w3_rates} learning rates x {s.w3_steps} steps, "
        "recording the loss and the 2-D path at every iterate"
    }
    design, y, x = jnp.asarray(data.design), jnp.asarray(data.y), jnp.asarray(data.x)

    # X @ theta
    prob = Problem(mse_matrix, jnp.zeros(2), data.design, data.y)
    plane = axes_plane(prob, "theta[0]", "theta[1]", origin=origin)
    starts = random_starts(prob, s.w3_starts, scale=3.0, seed=0).points
    proj = plane.projector.astype(np.float64)
    vg = jax.jit(jax.value_and_grad(mse_matrix))

    def vg_a(th: np.ndarray) -> tuple[float, np.ndarray]:
        f, g = vg(th, design, y)
        return float(f), np.asarray(g)

    def vg_b(th: np.ndarray) -> tuple[float, np.ndarray]:
        return mse_matrix_np(th, data.design, data.y)

    step = lambda th, g, lr: th - np.float32(lr) * g
    ident = lambda th: th
    out["X @ theta"] = _sweep_case(
        ctx,
        prob,
        plane,
        starts,
        rates,
        s.w3_steps,
        lambda: descent_loop(vg_a, step, ident, list(starts), rates, s.w3_steps, origin, proj),
        lambda: descent_loop(vg_b, step, ident, list(starts), rates, s.w3_steps, origin, proj),
    )

    # theta0 + theta1 * x
    prob_l = Problem(mse_line, {"intercept": 0.0, "slope": 0.0}, data.x, data.y)
    plane_l = axes_plane(prob_l, "intercept", "slope", origin=origin)
    vg_l = jax.jit(jax.value_and_grad(mse_line))
    tree_starts = [{"intercept": np.float32(p[0]), "slope": np.float32(p[1])} for p in starts]

    def vg_la(p: dict[str, np.float32]) -> tuple[float, dict[str, np.ndarray]]:
        f, g = vg_l(p, x, y)
        return float(f), {k: np.asarray(v) for k, v in g.items()}

    def step_l(p: dict[str, Any], g: dict[str, Any], lr: float) -> dict[str, Any]:
        return {k: p[k] - np.float32(lr) * g[k] for k in p}

    def flat_l(p: dict[str, Any]) -> np.ndarray:
        return np.array([p["intercept"], p["slope"]], dtype=np.float32)

    def vg_lb(p: np.ndarray) -> tuple[float, np.ndarray]:
        f, g0, g1 = mse_line_np(p[0], p[1], data.x, data.y)
        return f, np.array([g0, g1], dtype=np.float32)

    out["theta0 + theta1 * x"] = _sweep_case(
        ctx,
        prob_l,
        plane_l,
        starts,
        rates,
        s.w3_steps,
        lambda: descent_loop(vg_la, step_l, flat_l, tree_starts, rates, s.w3_steps, origin, proj),
        lambda: descent_loop(vg_lb, step, ident, list(starts), rates, s.w3_steps, origin, proj),
    )
    return out


def w4(ctx: Context) -> dict[str, Any]:
    """W4: the W2 network from several starts and learning rates, paths on a plane."""
    import jax
    import jax.numpy as jnp

    from .baselines import descent_loop
    from .workloads import mlp_flatten_np, mlp_init, mlp_loss, mlp_value_and_grad_np

    s = ctx.sizes
    data, prob, plane = _mlp_view(s.w2_rows)
    inits = [mlp_init(seed) for seed in range(1, s.w4_starts + 1)]
    starts = np.stack([prob.flatten(p) for p in inits])
    if not np.array_equal(starts, np.stack([mlp_flatten_np(p) for p in inits])):
        raise RuntimeError("mlp_flatten_np does not follow JAX's leaf order")
    rates = [0.01, 0.02, 0.05, 0.1][: s.w4_rates]
    origin = plane.origin
    proj = plane.projector.astype(np.float64)
    vg = jax.jit(jax.value_and_grad(mlp_loss))
    x, y = jnp.asarray(data.x), jnp.asarray(data.y)

    def vg_a(p: Any) -> tuple[float, Any]:
        f, g = vg(p, x, y)
        return float(f), jax.tree.map(np.asarray, g)

    def vg_b(p: Any) -> tuple[float, Any]:
        return mlp_value_and_grad_np(p, data.x, data.y)

    def step(p: Any, g: Any, lr: float) -> Any:
        return jax.tree.map(lambda pp, gg: pp - np.float32(lr) * gg, p, g)

    rec = _sweep_case(
        ctx,
        prob,
        plane,
        starts,
        rates,
        s.w4_steps,
        lambda: descent_loop(vg_a, step, mlp_flatten_np, inits, rates, s.w4_steps, origin, proj),
        lambda: descent_loop(vg_b, step, mlp_flatten_np, inits, rates, s.w4_steps, origin, proj),
    )
    rec["what"] = (
        f"gradient descent on the W2 network from {s.w4_starts} starts x {len(rates)} learning "
        f"rates x {s.w4_steps} steps, paths projected on the W2 plane"
    )
    return rec


def w5(ctx: Context) -> dict[str, Any]:
    """W5: the quickstart Explorer, driven from Python: latency and compilations."""
    from .interaction import interaction_record

    s = ctx.sizes
    return interaction_record(s.w5_resolution, s.w5_steps, s.w5_rounds)


def _memory_case(args: list[str]) -> dict[str, Any]:
    cmd = [sys.executable, "-m", "benchmarks.memory", *args]
    done = subprocess.run(cmd, cwd=ROOT, capture_output=True, text=True, check=False)
    if done.returncode != 0:
        raise RuntimeError(f"{' '.join(cmd)} failed:\n{done.stderr[-3000:]}")
    return json.loads(done.stdout.strip().splitlines()[-1])


def w6(ctx: Context) -> dict[str, Any]:
    """W6: peak memory in fresh processes, for growing grids and run counts."""
    s = ctx.sizes
    if ctx.quick:
        grids = [s.w6_resolution]
        basins = [s.w6_basin_resolution]
    else:
        grids = [100, 200, s.w6_resolution]
        basins = [(25, 20), (40, 25), s.w6_basin_resolution]
    surfaces = [
        _memory_case(["surface", "--rows", str(s.w6_rows), "--resolution", str(r)]) for r in grids
    ]
    maps = [
        _memory_case(
            [
                "basin",
                "--rows",
                str(s.w2_rows),
                "--resolution",
                str(ra),
                str(rb),
                "--steps",
                str(s.w6_basin_steps),
            ]
        )
        for ra, rb in basins
    ]
    return {
        "method": "process RSS in a fresh process: VmHWM (peak) after a reset via "
        "/proc/self/clear_refs minus VmRSS before the workload; first run includes "
        "compilation, second run is the steady state (see benchmarks/memory.py)",
        "surfaces": surfaces,
        "basin_maps": maps,
    }


WORKLOADS: dict[str, Callable[[Context], dict[str, Any]]] = {
    "matmul": matmul,
    "W1": w1,
    "W2": w2,
    "W3": w3,
    "W4": w4,
    "W5": w5,
    "W6": w6,
}


# -------------------------------------------------------------------- report


def _fmt(x: Any, unit: str = "") -> str:
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "-"
    if isinstance(x, float):
        return f"{x:.3g}{unit}"
    return f"{x}{unit}"


def _rows(results: dict[str, Any]) -> list[list[str]]:
    rows = []
    work = results["workloads"]
    cases: list[tuple[str, dict[str, Any]]] = []
    for key in ("W1", "W3"):
        if key in work:
            for form in ("X @ theta", "theta0 + theta1 * x"):
                cases.append((f"{key} {form}", work[key][form]))
    for key in ("W2", "W4"):
        if key in work:
            cases.append((key, work[key]))
    order = {"W1": 0, "W2": 1, "W3": 2, "W4": 3}
    cases.sort(key=lambda c: order[c[0][:2]])
    for name, rec in cases:
        one = rec.get("basinview_1_device", {})
        rows.append(
            [
                name,
                _fmt(rec["basinview"]["median_seconds"], " s"),
                _fmt(one.get("median_seconds"), " s"),
                _fmt(rec["a_jax_loop"]["median_seconds"], " s"),
                _fmt(rec["b_numpy_loop"]["median_seconds"], " s"),
                _fmt(rec["speedup_vs_a"], "x"),
                _fmt(rec["speedup_vs_b"], "x"),
                _fmt(rec.get("sharding_speedup"), "x"),
                _fmt(rec["basinview"]["compile_seconds"], " s"),
                _fmt(max(rec["max_rel_diff_a"], rec["max_rel_diff_b"])),
            ]
        )
    return rows


def report(results: dict[str, Any]) -> str:
    """The results as a plain-text table."""
    head = [
        "workload",
        "basinview",
        "1 device",
        "(a) jax loop",
        "(b) numpy",
        "vs (a)",
        "vs (b)",
        "sharding",
        "compile",
        "max rel diff",
    ]
    rows = [head, *_rows(results)]
    widths = [max(len(r[i]) for r in rows) for i in range(len(head))]
    lines = ["  ".join(cell.ljust(w) for cell, w in zip(r, widths)) for r in rows]
    lines.insert(1, "  ".join("-" * w for w in widths))
    if len(rows) == 1:  # no timed-against-baseline workload in this run
        lines = []
    work = results["workloads"]
    if "matmul" in work:
        lines.append(f"matmul peak in this run: {work['matmul']['peak_gflops']:.1f} GFLOP/s")
    if "W1" in work:
        for form in ("X @ theta", "theta0 + theta1 * x"):
            rec = work["W1"][form]
            pct = rec.get("percent_of_matmul")
            lines.append(
                f"W1 {form}: {rec['gflops']:.1f} GFLOP/s"
                + (f" = {pct:.0f}% of the matmul peak" if pct is not None else "")
            )
    if "W5" in work:
        rec = work["W5"]
        lr, mixed = rec["learning_rate_change"], rec["mixed_changes"]
        lines.append(
            f"W5 learning-rate change: median {lr['full']['median_ms']:.1f} ms "
            f"(min {lr['full']['min_ms']:.1f}, max {lr['full']['max_ms']:.1f}) over "
            f"{lr['full']['changes']} changes, {lr['previews_drawn']} previews; "
            f"{mixed['compilations']} compilations in {len(mixed['changes'])} mixed changes "
            f"after a warm-up that compiled {mixed['warm_up_compilations']} "
            f"({mixed['warm_up_compile_seconds']:.2f} s)"
        )
    if "W6" in work:
        for case in work["W6"]["surfaces"] + work["W6"]["basin_maps"]:
            lines.append(
                f"W6 {case['workload']}: added peak {case['second_run']['added_peak_mib']:.0f} MiB "
                f"(first run incl. compile {case['first_run']['added_peak_mib']:.0f} MiB), "
                f"process peak {max(case['first_run']['peak_rss_mib'], case['second_run']['peak_rss_mib']):.0f} MiB"
            )
    return "\n".join(lines)


def _previous_results(
    parser: argparse.ArgumentParser, args: argparse.Namespace, out: Path | None
) -> dict[str, Any]:
    """The results file ``--merge`` writes into, checked before anything runs."""
    if args.only is None:
        parser.error("--merge needs --only: name the workloads to rerun")
    if out is None or not out.exists():
        parser.error(f"--merge needs an existing results file; {out} does not exist (use --out)")
    previous = json.loads(out.read_text())
    if previous.get("settings", {}).get("quick") != args.quick:
        kind = "quick" if previous.get("settings", {}).get("quick") else "full"
        parser.error(f"{out} holds a {kind} run; merge only runs of the same kind")
    return previous


def _merged(previous: dict[str, Any], new: dict[str, Any]) -> dict[str, Any]:
    """``previous`` with the workloads of ``new`` replaced; ``merged`` says when and where."""
    names = list(new["workloads"])
    previous["workloads"].update(new["workloads"])
    merged = []
    for m in previous.get("merged", []):  # earlier merges keep the workloads not rerun now
        kept = [w for w in m["workloads"] if w not in names]
        if kept:
            merged.append({**m, "workloads": kept})
    merged.append({"workloads": names, "machine": new["machine"], "settings": new["settings"]})
    previous["merged"] = merged
    return previous


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="basinview benchmarks (issue 5)")
    parser.add_argument("--quick", action="store_true", help="tiny sizes, one repeat (smoke test)")
    parser.add_argument("--out", type=Path, default=None, help="JSON file to write")
    parser.add_argument("--repeats", type=int, default=None, help="warm repeats of basinview")
    parser.add_argument("--baseline-repeats", type=int, default=None)
    parser.add_argument("--only", default=None, help="comma-separated workloads, e.g. W1,W3")
    parser.add_argument("--devices", type=int, default=0, help="CPU devices (0: all cores)")
    parser.add_argument(
        "--merge",
        action="store_true",
        help="write the workloads of --only into the existing results file, keeping the others",
    )
    args = parser.parse_args(argv)
    out = args.out if args.out is not None else (None if args.quick else DEFAULT_OUT)
    previous = _previous_results(parser, args, out) if args.merge else None

    from basinview.core import use_all_cores

    n_devices = use_all_cores(args.devices or None)

    from .timing import load_average, machine

    sizes = QUICK if args.quick else FULL
    ctx = Context(
        sizes=sizes,
        repeats=args.repeats or (1 if args.quick else 5),
        baseline_repeats=args.baseline_repeats or (1 if args.quick else 3),
        quick=args.quick,
        n_devices=n_devices,
    )
    names = list(WORKLOADS) if args.only is None else args.only.split(",")
    unknown = [n for n in names if n not in WORKLOADS]
    if unknown:
        parser.error(f"unknown workloads {unknown}; choose from {list(WORKLOADS)}")
    if "W1" in names and "matmul" not in names:
        names.insert(0, "matmul")
    results: dict[str, Any] = {
        "machine": machine(),
        "settings": {
            "quick": args.quick,
            "repeats": ctx.repeats,
            "baseline_repeats": ctx.baseline_repeats,
            "devices": n_devices,
            "sizes": sizes.__dict__,
        },
        "workloads": {},
    }
    for name in names:
        print(f"running {name} ...", file=sys.stderr, flush=True)
        results["workloads"][name] = WORKLOADS[name](ctx)
    if "W1" in results["workloads"] and "matmul" in results["workloads"]:
        peak = results["workloads"]["matmul"]["peak_gflops"]
        for form in ("X @ theta", "theta0 + theta1 * x"):
            rec = results["workloads"]["W1"][form]
            rec["percent_of_matmul"] = 100 * rec["gflops"] / peak
    results["machine"]["load_average_at_end"] = load_average()
    print(report(results))
    if previous is not None:
        results = _merged(previous, results)
    if out is not None:
        out.write_text(json.dumps(results, indent=1, default=float) + "\n")
        print(f"wrote {out}", file=sys.stderr)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

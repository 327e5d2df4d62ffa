"""W7: a 64-128-128-10 tanh network on the digits data, against hand-vectorised JAX.

Usage (from the repository root)::

    python -m benchmarks.digits_mlp            # full sizes, writes benchmarks/results_w7.json
    python -m benchmarks.digits_mlp --quick    # small sizes: checks it runs and agrees

The model has 26,122 parameters (64*128 + 128 + 128*128 + 128 + 128*10 + 10)
and a softmax cross-entropy loss over sklearn's 1,797 digit images (pixels
scaled to [0, 1]). Four parts, each against the code a careful JAX user
would write by hand (``jax.vmap`` over grid points in chunks, ``lax.scan``
over steps, ``scipy.sparse.linalg.eigsh`` on ``jax.jvp(jax.grad)``):

* a surface on a filter-normalised random plane (51 x 51),
* a sweep of 16 starts x 4 learning rates x 300 steps of gradient descent
  with paths recorded,
* the top 5 Hessian eigenvalues at the trained point,
* a basin map of 21 x 21 starts (``--basin-steps`` steps; the full 1,000
  steps take many minutes on two cores, which is where users outgrow one
  machine: see docs/distributed.md).

The machine's limit is measured in the same run: float32 matrix-multiply
FLOP/s and the tanh element rate. A forward pass costs
``2 * rows * (64*128 + 128*128 + 128*10)`` FLOPs and ``rows * 256`` tanh;
a gradient step about three forward passes (common practice).
"""

from __future__ import annotations

import argparse
import itertools
import json
import time
from pathlib import Path
from typing import Any

import numpy as np

__all__ = ["main"]

OUT = Path(__file__).resolve().parent / "results_w7.json"
LAYERS = (64, 128, 128, 10)


def _data() -> tuple[np.ndarray, np.ndarray]:
    from sklearn.datasets import load_digits

    digits = load_digits()
    x = (digits.data / 16.0).astype(np.float32)
    y = np.eye(10, dtype=np.float32)[digits.target]
    return x, y


def _params(seed: int = 0) -> dict[str, Any]:
    rng = np.random.default_rng(seed)
    out = {}
    for i, (m, n) in enumerate(itertools.pairwise(LAYERS)):
        out[f"w{i}"] = (rng.standard_normal((m, n)) / np.sqrt(m)).astype(np.float32)
        out[f"b{i}"] = np.zeros(n, np.float32)
    return out


def loss(params: Any, x: Any, y: Any) -> Any:
    import jax
    import jax.numpy as jnp

    h = x
    for i in range(len(LAYERS) - 1):
        h = h @ params[f"w{i}"] + params[f"b{i}"]
        if i < len(LAYERS) - 2:
            h = jnp.tanh(h)
    return -jnp.mean(jnp.sum(y * jax.nn.log_softmax(h), axis=-1))


def _forward_flops(rows: int) -> float:
    return 2.0 * rows * sum(m * n for m, n in itertools.pairwise(LAYERS))


def _median(fn: Any, repeats: int) -> tuple[float, float, Any]:
    start = time.perf_counter()
    result = fn()
    first = time.perf_counter() - start
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        result = fn()
        times.append(time.perf_counter() - start)
    return first, float(np.median(times)), result


def _ceilings(repeats: int) -> dict[str, float]:
    import jax
    import jax.numpy as jnp

    n = 1024
    a = jnp.asarray(np.random.default_rng(1).standard_normal((n, n)), jnp.float32)
    mm = jax.jit(jnp.matmul)
    _, t_mm, _ = _median(lambda: mm(a, a).block_until_ready(), repeats)
    v = jnp.asarray(np.random.default_rng(2).standard_normal(1 << 22), jnp.float32)
    th = jax.jit(jnp.tanh)
    _, t_th, _ = _median(lambda: th(v).block_until_ready(), repeats)
    return {"matmul_gflops": 2 * n**3 / t_mm / 1e9, "tanh_gelems": v.size / t_th / 1e9}


def run(quick: bool, repeats: int, basin_steps: int) -> dict[str, Any]:
    import jax
    import jax.numpy as jnp
    from jax.flatten_util import ravel_pytree
    from scipy.sparse.linalg import LinearOperator, eigsh

    from basinview.core import (
        Problem,
        basin_map,
        descend,
        evaluate_surface,
        hessian_spectrum,
        random_plane,
        random_starts,
    )

    x, y = _data()
    if quick:
        x, y = x[:128], y[:128]
    res, starts_n, steps, lrs = (11, 4, 20, [0.05, 0.2]) if quick else (51, 16, 300, [0.01, 0.05, 0.2, 1.0])
    basin_res = 5 if quick else 21
    rows = x.shape[0]
    params = _params()
    problem = Problem(loss, params, x, y)
    _flat0, unravel = ravel_pytree(jax.tree_util.tree_map(jnp.asarray, params))
    xj, yj = jnp.asarray(x), jnp.asarray(y)

    def flat_loss(theta: Any) -> Any:
        return loss(unravel(theta), xj, yj)

    # A trained point to look around: plain gradient descent from the start.
    trained = descend(problem, [params], learning_rate=0.5, steps=200 if not quick else 20,
                      grad_tol=0.0, loss_tol=0.0, progress=False).final[0]
    plane = random_plane(problem, seed=3, origin=trained)
    ceil = _ceilings(repeats)
    out: dict[str, Any] = {"rows": rows, "parameters": int(problem.size), "ceilings": ceil}

    # --- surface
    span = 1.0
    a = np.linspace(-span, span, res)
    grid = np.stack(np.meshgrid(a, a), -1).reshape(-1, 2).astype(np.float32)
    o, d1, d2 = (jnp.asarray(v, jnp.float32) for v in (plane.origin, plane.d1, plane.d2))

    @jax.jit
    def hand_surface(points: Any) -> Any:
        return jax.lax.map(lambda p: flat_loss(o + p[0] * d1 + p[1] * d2), points, batch_size=16)

    f_bv, t_bv, s_bv = _median(
        lambda: evaluate_surface(problem, plane, span=span, resolution=res, progress=False).loss,
        repeats,
    )
    f_h, t_h, s_h = _median(lambda: np.asarray(hand_surface(jnp.asarray(grid))), repeats)
    flops = _forward_flops(rows) * res * res
    out["surface"] = {
        "what": f"{res} x {res} surface on a filter-normalised random plane",
        "basinview_seconds": t_bv, "basinview_first_call_seconds": f_bv,
        "hand_vectorised_seconds": t_h, "hand_first_call_seconds": f_h,
        "ratio_hand_over_basinview": t_h / t_bv,
        "percent_of_matmul": 100 * flops / t_bv / 1e9 / ceil["matmul_gflops"],
        "percent_of_tanh": 100 * rows * 256 * res * res / t_bv / 1e9 / ceil["tanh_gelems"],
        "max_rel_diff": float(np.max(np.abs(s_bv - s_h.reshape(res, res)) / np.abs(s_h).max())),
        "surface_chunk": (lambda s: s.sizes)(evaluate_surface(problem, plane, span=span,
                                                             resolution=res, progress=False)),
    }

    # --- sweep
    starts = random_starts(problem, starts_n, scale=0.05, seed=1, center=trained)
    start_arr = np.asarray(starts.points, np.float32)

    @jax.jit
    def hand_sweep(s0: Any, lr: Any) -> Any:
        def one(theta: Any, rate: Any) -> Any:
            def step(t: Any, _: Any) -> Any:
                value, g = jax.value_and_grad(flat_loss)(t)
                return t - rate * g, (value, jnp.dot(t - o, d1), jnp.dot(t - o, d2))

            return jax.lax.scan(step, theta, None, length=steps)

        runs = jax.vmap(lambda r: jax.vmap(lambda t: one(t, r))(s0))(lr)
        return runs

    f_bv, t_bv, r_bv = _median(
        lambda: descend(problem, starts, learning_rate=lrs, steps=steps, plane=plane,
                        grad_tol=0.0, loss_tol=0.0, divergence_factor=1e30, progress=False),
        max(1, repeats // 2),
    )
    f_h, t_h, r_h = _median(
        lambda: jax.block_until_ready(hand_sweep(jnp.asarray(start_arr), jnp.asarray(lrs, jnp.float32))),
        max(1, repeats // 2),
    )
    runs_n = starts_n * len(lrs)
    out["sweep"] = {
        "what": f"{starts_n} starts x {len(lrs)} learning rates x {steps} steps, paths recorded",
        "basinview_seconds": t_bv, "basinview_first_call_seconds": f_bv,
        "hand_vectorised_seconds": t_h, "hand_first_call_seconds": f_h,
        "ratio_hand_over_basinview": t_h / t_bv,
        "percent_of_matmul": 100 * 3 * _forward_flops(rows) * runs_n * steps / t_bv / 1e9
        / ceil["matmul_gflops"],
        # Runs are ordered learning rate first, then start, as the hand version's vmaps;
        # basinview's losses[:, k] is the loss before step k (plus the final one).
        "loss_curve_max_rel_diff": float(np.nanmax(
            np.abs(np.asarray(r_bv.losses)[:, :-1] - np.asarray(r_h[1][0]).reshape(runs_n, steps))
            / np.abs(np.asarray(r_h[1][0])).max())),
    }

    # --- top-5 Hessian eigenvalues
    counter = {"n": 0}
    hvp = jax.jit(lambda v: jax.jvp(jax.grad(flat_loss), (jnp.asarray(trained),), (v,))[1])

    def matvec(v: np.ndarray) -> np.ndarray:
        counter["n"] += 1
        return np.asarray(hvp(jnp.asarray(v, jnp.float32)), np.float64)

    op = LinearOperator((problem.size, problem.size), matvec=matvec, dtype=np.float64)
    _f_e, t_e, ref = _median(lambda: eigsh(op, k=5, which="LA", tol=1e-4)[0], 1)
    eigsh_matvecs = counter["n"] // 2
    counter["n"] = 0
    t_s, _t, ref_min = _median(lambda: eigsh(op, k=1, which="SA", tol=1e-4)[0], 0)  # once
    eigsh_min_matvecs = counter["n"]
    f_bv, t_bv, spec = _median(lambda: hessian_spectrum(problem, trained, k=5), 1)
    _f_t, t_top, top = _median(
        lambda: hessian_spectrum(problem, trained, k=5, smallest=False), 1
    )
    out["hessian_top5"] = {
        "what": "top 5 Hessian eigenvalues at a trained point; basinview's default also "
        "converges the smallest, eigsh needs a second call for it (which='SA')",
        "basinview_seconds": t_bv, "eigsh_seconds": t_e,
        "basinview_top_only_seconds": t_top, "eigsh_smallest_seconds": t_s,
        "basinview_values": [float(v) for v in spec.values],
        "basinview_top_only_values": [float(v) for v in top.values],
        "eigsh_values": sorted((float(v) for v in ref), reverse=True),
        "basinview_lambda_min": spec.lambda_min,
        "eigsh_lambda_min": float(np.min(ref_min)),
        "basinview_matvecs": spec.matvecs,
        "basinview_top_only_matvecs": top.matvecs,
        "eigsh_matvecs": eigsh_matvecs,
        "eigsh_smallest_matvecs": eigsh_min_matvecs,
    }

    # --- basin map
    f_bm, _t_bm, bmap = _median(
        lambda: basin_map(problem, plane, span=span, resolution=basin_res, learning_rate=0.5,
                          steps=basin_steps, progress=False),
        0,
    )
    out["basin_map"] = {
        "what": f"{basin_res} x {basin_res} basin map, {basin_steps} steps of gradient descent",
        "first_call_seconds": f_bm,
        "seconds_per_start_step": f_bm / (basin_res**2 * basin_steps),
        "estimated_seconds_at_1000_steps": f_bm * 1000 / basin_steps,
        "outcomes": {str(k): int(v) for k, v in bmap.runs.table["status"].value_counts().items()},
    }
    return out


def main(argv: list[str] | None = None) -> int:
    """Run W7 and write its JSON (machine facts beside the numbers)."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true")
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--basin-steps", type=int, default=100)
    parser.add_argument("--out", type=Path, default=OUT)
    args = parser.parse_args(argv)
    from .timing import machine

    result = {"machine": machine(), "W7": run(args.quick, args.repeats, args.basin_steps)}
    args.out.write_text(json.dumps(result, indent=2, default=str) + "\n")
    print(json.dumps(result["W7"], indent=2, default=str))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

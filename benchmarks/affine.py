"""Plane-affine surfaces against the plain path, and the machine's ceilings, in one run.

Usage (from the repository root)::

    python -m benchmarks.affine            # writes benchmarks/results_affine.json
    python -m benchmarks.affine --quick    # tiny sizes (agreement only)

Contenders per workload (interleaved rounds, medians; see ``timing.race``):
``affine`` is ``evaluate_surface(..., affine=True)``, ``plain`` is
``affine=False``; ``default`` says which of the two the cost model picks
(``uses_affine``). Workloads:

* W1, both forms of the straight-line MSE of ``benchmarks/workloads.py``
  (``X @ theta`` and ``theta0 + theta1 * x``), 100,000 rows, 200 x 200;
* W9, logistic regression on sklearn's breast-cancer data (569 rows, 30
  standardised features and an intercept), 201 x 201 on a random plane;
* W2, the 2-16-1 tanh network of W2 (2,000 rows), 150 x 150 on a
  filter-normalised random plane; and the same network on 200 rows.

Ceilings, measured in the same run on all devices at once (each device its
own copy, like ``run.matmul``): ``fma``, a chain of 16 dependent
multiply-adds per element over 16,384 float32 values (in L1/L2 cache)
repeated in a loop; and one element-wise function per transcendental the
workloads use (``exp``, ``log``, ``tanh``, ``logaddexp(0, x)``) over the
same in-cache array, in G elements per second. Each workload's rate is
expressed in its dominant operation's unit and as a fraction of its
ceiling: W1 does three multiply-adds per row and grid point on the affine
path (``c0 + a c1``, ``+ b c2``, the square accumulated), W9 one
``logaddexp`` per row and point, W2 sixteen ``tanh`` per row and point.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np

__all__ = ["ceilings", "main"]

DEFAULT_OUT = Path(__file__).resolve().parent / "results_affine.json"
_CACHE_ROWS = 4096
_POINTS = 64
_FMA_CHAIN = 16


def _rates(fn: Any, x: Any, count: float, repeats: int) -> dict[str, float]:
    """Best wall-clock and best CPU-time rate (G per second) of ``count`` operations."""
    from .timing import cpu_seconds

    fn(x).block_until_ready()
    wall = cpu = float("inf")
    for _ in range(repeats):
        c0, start = cpu_seconds(), time.perf_counter()
        fn(x).block_until_ready()
        wall = min(wall, time.perf_counter() - start)
        cpu = min(cpu, cpu_seconds() - c0)
    return {"wall": count / wall / 1e9, "cpu": count / max(cpu, 1e-9) / 1e9}


def ceilings(loops: int, repeats: int) -> dict[str, Any]:
    """G operations per second of the multiply-add stream and each transcendental.

    Every kernel runs on all devices at once (each its own copy) over
    ``_CACHE_ROWS`` float32 rows per array (in cache) and ``_POINTS``
    points per pass, ``loops`` passes in a ``fori_loop``:

    * ``fma``: ``sum_r (c0 + a c1 + b c2)^2``, three multiply-adds per row
      and point, the affine path's per-point work on in-cache rows;
    * ``fma_registers``: a chain of 16 dependent multiply-adds per element
      held in registers (the arithmetic limit, for reference);
    * ``exp``, ``log``, ``tanh``, ``logaddexp``: ``sum_r f(c0 + a c1)``, one
      function value (and one multiply-add) per row and point.

    Rates are given per wall-clock second and per CPU second of this
    process (the latter is what the workloads' fractions use on a shared,
    loaded machine: both count only the work this process got to do).
    """
    import jax
    import jax.numpy as jnp

    from basinview.core.sharding import batch_devices, shard_batch, split

    devs = batch_devices(None)
    n, p = _CACHE_ROWS, _POINTS
    rng = np.random.default_rng(0)
    c = rng.standard_normal((3, n)).astype(np.float32)
    xs = jax.device_put(np.stack([c] * len(devs)), split(devs))
    a = jnp.linspace(-1.0, 1.0, p, dtype=jnp.float32)

    def points(f: Any) -> Any:
        def run(cs: Any) -> Any:
            c0, c1, c2 = cs[0]

            def body(i: Any, acc: Any) -> Any:
                s = a + i.astype(jnp.float32) * 1e-6
                vals = jax.vmap(lambda u: jnp.sum(f(c0, c1, c2, u)))(s)
                return acc + vals

            return jnp.sum(jax.lax.fori_loop(0, loops, body, jnp.zeros(p, jnp.float32)))[None]

        return run

    def registers(cs: Any) -> Any:
        def body(i: Any, v: Any) -> Any:
            for _ in range(_FMA_CHAIN):
                v = v * 0.999 + 0.001
            return v

        return jnp.sum(jax.lax.fori_loop(0, loops, body, cs[0, 0]))[None]

    kernels = {
        "fma": lambda c0, c1, c2, u: (c0 + u * c1 + (0.5 * u) * c2) ** 2,
        "exp": lambda c0, c1, c2, u: jnp.exp(c0 + u * c1),
        "log": lambda c0, c1, c2, u: jnp.log(jnp.abs(c0 + u * c1) + 1.0),
        "tanh": lambda c0, c1, c2, u: jnp.tanh(c0 + u * c1),
        "logaddexp": lambda c0, c1, c2, u: jnp.logaddexp(0.0, c0 + u * c1),
    }
    count = n * p * loops * len(devs)
    out: dict[str, Any] = {
        "what": f"{n} float32 rows per array and device (in cache), {p} points per pass, "
        f"{loops} passes, {len(devs)} devices; fma: sum (c0 + a c1 + b c2)^2 (3 multiply-adds "
        f"per row and point); fma_registers: {_FMA_CHAIN} dependent multiply-adds per element "
        "in registers; exp/log/tanh/logaddexp: sum f(c0 + a c1), one value per row and point",
        "unit": "G multiply-adds or function values per second (wall / CPU), all devices",
    }
    out["fma"] = {
        k: 3 * v for k, v in _rates(shard_batch(points(kernels["fma"]), devs, (0,), 0), xs,
                                    count, repeats).items()
    }  # fmt: skip
    out["fma_registers"] = _rates(
        shard_batch(registers, devs, (0,), 0), xs, 3 * n * loops * len(devs) * _FMA_CHAIN / 3,
        repeats,
    )  # fmt: skip
    for name in ("exp", "log", "tanh", "logaddexp"):
        fn = shard_batch(points(kernels[name]), devs, (0,), 0)
        out[name] = _rates(fn, xs, count, repeats)
    return out


def _case(problem: Any, plane: Any, span: float, res: int, repeats: int) -> dict[str, Any]:
    from basinview.core import evaluate_surface
    from basinview.core.affine import plane_plan
    from basinview.core.points import points_sizes, uses_affine

    from .timing import Contender, race

    def run(affine: bool) -> Any:
        return lambda: (
            evaluate_surface(
                problem, plane, span=span, resolution=res, progress=False, affine=affine
            ).loss
        )

    contenders = [Contender("affine", run(True), repeats), Contender("plain", run(False), repeats)]
    race(contenders)
    fast, plain = contenders[0], contenders[1]
    ref = np.asarray(plain.result, np.float64)
    diff = np.nanmax(np.abs(np.asarray(fast.result, np.float64) - ref) / np.maximum(np.abs(ref), 1))
    block = points_sizes(problem, res * res).block
    plan = plane_plan(problem)
    return {
        "affine": fast.summary(),
        "plain": plain.summary(),
        "speedup": plain.median / fast.median,
        "default": "affine" if uses_affine(problem, block) else "plain",
        "max_rel_diff": float(diff),
        "plan": None if plan is None else plan.describe(),
        "grid_points": res * res,
    }


def _w1(rows: int, res: int, repeats: int) -> dict[str, Any]:
    import jax.numpy as jnp

    from basinview.core import Problem, axes_plane

    from .workloads import line_data, mse_line, mse_matrix

    data = line_data(rows)
    origin = data.solution.astype(np.float32)
    mat = Problem(mse_matrix, jnp.zeros(2), data.design, data.y)
    line = Problem(mse_line, {"intercept": 0.0, "slope": 0.0}, data.x, data.y)
    out = {
        "X @ theta": _case(mat, axes_plane(mat, "theta[0]", "theta[1]", origin=origin), 2.0,
                           res, repeats),
        "theta0 + theta1 * x": _case(line, axes_plane(line, "intercept", "slope", origin=origin),
                                     2.0, res, repeats),
    }  # fmt: skip
    for rec in out.values():
        rec["rows"] = rows
        rec["dominant"] = "fma"
        rec["ops_per_row_and_point"] = 3
    return out


def logistic(p: Any, x: Any, y: Any) -> Any:
    """Mean Bernoulli negative log-likelihood of a logistic regression."""
    import jax.numpy as jnp

    z = x @ p["w"] + p["b"]
    return jnp.mean(jnp.logaddexp(0.0, z) - y * z)


def _w9(res: int, repeats: int) -> dict[str, Any]:
    import jax.numpy as jnp
    from sklearn.datasets import load_breast_cancer

    from basinview.core import Problem, random_plane

    x, y = load_breast_cancer(return_X_y=True)
    x = ((x - x.mean(0)) / x.std(0)).astype(np.float32)
    prob = Problem(logistic, {"w": jnp.zeros(30), "b": jnp.zeros(())}, x, y.astype(np.float32))
    rec = _case(prob, random_plane(prob, seed=0, normalise="none"), 1.0, res, repeats)
    rec.update(rows=int(x.shape[0]), dominant="logaddexp", ops_per_row_and_point=1)
    rec["what"] = (
        f"logistic regression on sklearn's breast-cancer data ({x.shape[0]} rows, 30 "
        f"standardised features + intercept), {res} x {res} on a random plane"
    )
    return rec


def _w2(rows: int, res: int, repeats: int) -> dict[str, Any]:
    import jax
    import jax.numpy as jnp

    from basinview.core import Problem, random_plane

    from .workloads import HIDDEN, mlp_data, mlp_init, mlp_loss

    data = mlp_data(rows)
    prob = Problem(mlp_loss, jax.tree.map(jnp.asarray, mlp_init(0)), data.x, data.y)
    rec = _case(prob, random_plane(prob, seed=1, normalise="filter"), 1.0, res, repeats)
    rec.update(rows=rows, dominant="tanh", ops_per_row_and_point=HIDDEN)
    return rec


def _fractions(work: dict[str, Any], ceil: dict[str, Any]) -> None:
    for rec in work.values():
        ops = rec["ops_per_row_and_point"] * rec["rows"] * rec["grid_points"]
        top = ceil[rec["dominant"]]
        for path in ("affine", "plain"):
            r = rec[path]
            wall = ops / r["median_seconds"] / 1e9
            cpu = ops / r["median_cpu_seconds"] / 1e9
            r["g_dominant_ops_per_s"] = {"wall": wall, "cpu": cpu}
            r["fraction_of_ceiling"] = {"wall": wall / top["wall"], "cpu": cpu / top["cpu"]}
        best = rec[rec["default"]]["fraction_of_ceiling"]
        rec["fraction_of_ceiling_default"] = best
        rec["speedup_cpu"] = (
            rec["plain"]["median_cpu_seconds"] / rec["affine"]["median_cpu_seconds"]
        )


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="plane-affine surfaces and ceilings")
    parser.add_argument("--quick", action="store_true", help="tiny sizes (agreement only)")
    parser.add_argument("--out", type=Path, default=None)
    parser.add_argument("--repeats", type=int, default=None)
    parser.add_argument("--devices", type=int, default=0, help="CPU devices (0: all cores)")
    args = parser.parse_args(argv)
    out = args.out if args.out is not None else (None if args.quick else DEFAULT_OUT)

    from basinview.core import use_all_cores

    n_devices = use_all_cores(args.devices or None)

    from .timing import load_average, machine

    q = args.quick
    repeats = args.repeats or (1 if q else 5)
    results: dict[str, Any] = {"machine": machine(), "settings": {"quick": q, "repeats": repeats,
                                                                   "devices": n_devices}}  # fmt: skip
    print("ceilings ...", file=sys.stderr, flush=True)
    ceil = ceilings(loops=5 if q else 200, repeats=1 if q else 5)
    work: dict[str, Any] = {}
    print("W1 ...", file=sys.stderr, flush=True)
    for form, rec in _w1(2_000 if q else 100_000, 12 if q else 200, repeats).items():
        work[f"W1 {form}"] = rec
    print("W9 ...", file=sys.stderr, flush=True)
    work["W9"] = _w9(11 if q else 201, repeats)
    print("W2 ...", file=sys.stderr, flush=True)
    work["W2"] = _w2(200 if q else 2_000, 10 if q else 150, repeats)
    work["W2 200 rows"] = _w2(200, 10 if q else 150, repeats)
    ceil_after = ceilings(loops=5 if q else 200, repeats=1 if q else 5)
    ceil_best = {
        k: {b: max(v[b], ceil_after[k][b]) for b in v} if isinstance(v, dict) else v
        for k, v in ceil.items()
    }
    _fractions(work, ceil_best)
    mat, line = work["W1 X @ theta"], work["W1 theta0 + theta1 * x"]
    results["form_ratio_W1_surface"] = {
        "affine_path": mat["affine"]["median_seconds"] / line["affine"]["median_seconds"],
        "default_paths": _default_time(mat) / _default_time(line),
        "default_paths_cpu": _default_time(mat, "median_cpu_seconds")
        / _default_time(line, "median_cpu_seconds"),
        "what": "X @ theta time / theta0 + theta1 * x time (goal <= 1.2)",
    }
    results["ceilings"] = {"before": ceil, "after": ceil_after, "used": ceil_best}
    results["workloads"] = work
    results["machine"]["load_average_at_end"] = load_average()
    for name, rec in work.items():
        print(
            f"{name:22s} plain {rec['plain']['median_seconds']:.4f} s  affine "
            f"{rec['affine']['median_seconds']:.4f} s  speedup {rec['speedup']:.2f}x (CPU "
            f"{rec['speedup_cpu']:.2f}x)  default {rec['default']}  "
            f"{rec['fraction_of_ceiling_default']['cpu']:.0%} (CPU) / "
            f"{rec['fraction_of_ceiling_default']['wall']:.0%} (wall) of the {rec['dominant']} "
            f"ceiling  diff {rec['max_rel_diff']:.1e}"
        )
    print("ceilings:", {k: v for k, v in ceil_best.items() if isinstance(v, dict)})
    print("W1 form ratio:", results["form_ratio_W1_surface"])
    if out is not None:
        out.write_text(json.dumps(results, indent=1, default=float) + "\n")
        print(f"wrote {out}", file=sys.stderr)
    return 0


def _default_time(rec: dict[str, Any], key: str = "median_seconds") -> float:
    return float(rec[rec["default"]][key])


if __name__ == "__main__":
    raise SystemExit(main())

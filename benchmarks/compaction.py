"""Compaction of live runs against the whole-budget engine, as ratios in one run.

``python -m benchmarks.compaction`` (``--quick`` for tiny sizes, ``--repeats``)
writes ``benchmarks/results_compaction.json``. Contenders are timed with
:func:`benchmarks.timing.race` (first call apart, then interleaved warm
repeats, medians):

* ``stragglers``: gradient descent on a least-squares fit (``rows x features``
  data) from starts of which 90% converge within 100 steps and every tenth
  (interleaved, so every call holds some) has a component along a direction
  of curvature 1e-4 and runs the whole budget of 1,000 steps. ``compact=False``
  against ``compact=None`` (the default: segments, live runs packed into fewer
  full calls) and ``compact=True`` (calls may also shrink). Goal: at most
  0.35x of ``compact=False``.
* ``demo_basin_map``: the runs of the demo's basin map (the beacon scenario,
  41 x 41 starts on its plane, learning rate 0.2, 400 steps), which
  ``basin_map`` passes to ``descend``: ``compact=False`` against ``True``.

Every compacted result is checked equal (bit for bit) to ``compact=False`` at
the same sizes before it is timed.
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path
from typing import Any

import jax.numpy as jnp
import numpy as np

from basinview.core import Problem, axes_plane, count_compilations, descend, grid_starts
from basinview.scenarios import beacon

from .timing import Contender, load_average, machine, race

__all__ = ["main", "run_all"]

OUT = Path(__file__).with_name("results_compaction.json")


def _least_squares(theta: Any, x: Any, y: Any) -> Any:
    return jnp.mean((x @ theta - y) ** 2)


def straggler_problem(rows: int, features: int, seed: int = 0) -> tuple[Problem, np.ndarray]:
    """A fit whose Hessian has eigenvalues in [0.5, 1] and one of 1e-4, and its minimum."""
    rng = np.random.default_rng(seed)
    q, _ = np.linalg.qr(rng.standard_normal((features, features)))
    eig = np.concatenate([[1e-4], np.linspace(0.5, 1.0, features - 1)])
    u, _ = np.linalg.qr(rng.standard_normal((rows, features)))
    # H = 2 X'X / rows = q diag(eig) q'
    x = np.sqrt(rows / 2) * u @ np.diag(np.sqrt(eig)) @ q.T
    truth = rng.standard_normal(features)
    y = x @ truth
    prob = Problem(_least_squares, jnp.zeros(features), x.astype(np.float32), y.astype(np.float32))
    return prob, np.stack([truth, q[:, 0]])


def straggler_starts(truth_and_slow: np.ndarray, n: int, seed: int = 1) -> np.ndarray:
    truth, slow = truth_and_slow
    rng = np.random.default_rng(seed)
    features = truth.shape[0]
    offsets = rng.standard_normal((n, features))
    offsets -= np.outer(offsets @ slow, slow)  # fast directions only
    offsets[::10] += 3.0 * slow  # every tenth run: along the slow direction too
    return (truth + offsets).astype(np.float32)


def _equal(a: Any, b: Any) -> bool:
    names = ("final", "losses", "path", "stop_step", "status", "grad_norms", "cosines")
    return all(
        np.array_equal(getattr(a, k), getattr(b, k), equal_nan=getattr(a, k).dtype != object)
        for k in names
    )


def _contenders(problem: Problem, starts: np.ndarray, kw: dict[str, Any], modes: dict[str, Any],
                repeats: int) -> dict[str, Any]:  # fmt: skip
    out: dict[str, Any] = {}
    contenders = []
    for name, compact in modes.items():
        contenders.append(
            Contender(name, lambda c=compact: descend(problem, starts, compact=c, **kw), repeats)
        )
    race(contenders)
    base = contenders[0]
    for c in contenders:
        runs = c.result
        same_sizes = descend(problem, starts, compact=False, sizes=runs.config.sizes.record(), **kw)
        out[c.name] = {
            **c.summary(),
            "sizes": runs.config.sizes.record(),
            "ratio_to_uncompacted": round(c.median / base.median, 3),
            "cpu_ratio_to_uncompacted": round(
                float(np.median(c.cpu_times)) / float(np.median(base.cpu_times)), 3
            ),
            "equal_to_compact_false_at_same_sizes": _equal(runs, same_sizes),
        }
    runs = base.result
    out["runs"] = len(runs)
    out["steps"] = kw["steps"]
    out["stop_step_quantiles"] = {
        q: int(np.quantile(runs.stop_step, q / 100)) for q in (10, 50, 90, 100)
    }
    out["run_steps_live_share"] = round(
        float(runs.stop_step.sum() / (len(runs) * max(runs.stop_step.max(), 1))), 3
    )
    return out


def _warm_compiles(problem: Problem, starts: np.ndarray, kw: dict[str, Any]) -> int:
    with count_compilations() as c:
        descend(problem, starts, compact=True, **kw)
        descend(problem, starts, compact=None, **kw)
    return c.count


def run_all(quick: bool = False, repeats: int = 3) -> dict[str, Any]:
    results: dict[str, Any] = {"machine": machine()}
    rows, features, n_runs, steps = (64, 8, 64, 200) if quick else (512, 16, 1024, 1000)
    prob, ts = straggler_problem(rows, features)
    starts = straggler_starts(ts, n_runs)
    kw = dict(learning_rate=1.0, steps=steps)
    modes = {"compact=False": False, "compact=None (default)": None, "compact=True": True}
    results["stragglers"] = {
        "rows": rows,
        "features": features,
        **_contenders(prob, starts, kw, modes, repeats),
        "compilations_after_warm_up": _warm_compiles(prob, starts, kw),
        "goal": "compacted <= 0.35x of compact=False",
    }
    sc = beacon()
    plane = axes_plane(sc.problem, *sc.plane_axes, origin=sc.plane_origin)
    res = 9 if quick else 41
    grid = grid_starts(plane, span=sc.span, resolution=res)
    kw = dict(learning_rate=0.2, steps=400, plane=plane)
    results["demo_basin_map"] = {
        "resolution": res,
        **_contenders(
            sc.problem, grid.points, kw, {"compact=False": False, "compact=True": True}, repeats
        ),
    }
    results["load_average_at_end"] = load_average()
    return results


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true")
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--out", type=Path, default=OUT)
    args = parser.parse_args(argv)
    results = run_all(args.quick, args.repeats)
    args.out.write_text(json.dumps(results, indent=2) + "\n")
    print(json.dumps({k: v for k, v in results.items() if k != "machine"}, indent=2))


if __name__ == "__main__":
    main()

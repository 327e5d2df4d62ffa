"""Cost of grouping end points by connectivity, as a share of the runs' cost.

The goal: grouping the end points of 1,000 runs of a 1,000-parameter model
(:func:`basinview.core.connect_runs`) takes under 10% of the time the runs
took. Both are timed in the same process, on the same machine, one after the
other, so the ratio does not depend on how fast the machine is.

Scenario of our own (seeded): a tanh network with 8 inputs and 100 hidden
units (1,001 parameters) fitted by Adam to 256 rows of a smooth target,
from starts scattered around one initialisation (a sweep of starts as a
basin map makes it). Run as ``python -m benchmarks.grouping`` (options:
``--runs``, ``--steps``, ``--hidden``, ``--spread``, ``--odd-units``); it
writes ``benchmarks/results_grouping.json`` and prints it.
"""

from __future__ import annotations

import argparse
import json
import time
from pathlib import Path
from typing import Any

__all__ = ["main", "measure"]

OUT = Path(__file__).with_name("results_grouping.json")


def _problem(hidden: int, rows: int = 256, inputs: int = 8) -> Any:
    import jax.numpy as jnp
    import numpy as np

    from basinview import core

    rng = np.random.default_rng(0)
    x = rng.normal(size=(rows, inputs)).astype(np.float32)
    y = np.sin(x @ rng.normal(size=inputs) / np.sqrt(inputs)).astype(np.float32)

    def mse(p: Any, x: Any, y: Any) -> Any:
        out = jnp.tanh(x @ p["w1"] + p["b1"]) @ p["w2"] + p["b2"]
        return jnp.mean((out - y) ** 2)

    init = {
        "w1": jnp.asarray(rng.normal(size=(inputs, hidden)) / np.sqrt(inputs), jnp.float32),
        "b1": jnp.zeros(hidden, jnp.float32),
        "w2": jnp.asarray(rng.normal(size=hidden) / np.sqrt(hidden), jnp.float32),
        "b2": jnp.zeros((), jnp.float32),
    }
    return core.Problem(mse, init, jnp.asarray(x), jnp.asarray(y))


def measure(
    runs: int = 1000,
    steps: int = 400,
    hidden: int = 100,
    spread: float = 0.05,
    odd: bool = False,
    tolerance: float | None = None,
) -> dict[str, Any]:
    """Time the runs and the grouping of their end points; return the figures."""
    from basinview import core

    prob = _problem(hidden)
    starts = core.random_starts(prob, runs, scale=spread, seed=1)
    t0 = time.perf_counter()
    result = core.descend(prob, starts, optimizer="adam", learning_rate=0.01, steps=steps)
    runs_s = time.perf_counter() - t0
    syms = core.hidden_units({"w1": 1, "b1": 0, "w2": 0}, odd=True) if odd else None
    t0 = time.perf_counter()
    groups = core.connect_runs(prob, result, symmetries=syms, tolerance=tolerance)
    group_s = time.perf_counter() - t0
    return {
        "workload": (
            f"connect_runs on {runs} Adam end points of a {prob.size}-parameter tanh network "
            f"({steps} steps, starts spread {spread} around one initialisation)"
        ),
        "parameters": prob.size,
        "runs": runs,
        "steps": steps,
        "symmetries": list(groups.symmetries),
        "runs_seconds": round(runs_s, 3),
        "grouping_seconds": round(group_s, 3),
        "ratio": round(group_s / runs_s, 4),
        "goal_ratio": 0.10,
        "groups": len(groups),
        "representatives": int(groups.representatives.sum()),
        "largest_group_share": float(groups.share.max()) if len(groups) else 0.0,
        "tolerance": groups.tolerance,
        "note": "both timings include compilation; same process, one after the other",
    }


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--runs", type=int, default=1000)
    parser.add_argument("--steps", type=int, default=400)
    parser.add_argument("--hidden", type=int, default=100)
    parser.add_argument("--spread", type=float, default=0.05)
    parser.add_argument("--odd-units", action="store_true", help="group modulo signed unit order")
    parser.add_argument("--tolerance", type=float, default=None, help="barrier (loss units)")
    parser.add_argument("--out", type=Path, default=OUT)
    args = parser.parse_args(argv)
    info = measure(args.runs, args.steps, args.hidden, args.spread, args.odd_units, args.tolerance)
    text = json.dumps(info, indent=2)
    args.out.write_text(text + "\n")
    print(text)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

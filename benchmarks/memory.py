"""Peak memory of one workload, measured in a fresh process (W6).

Run as ``python -m benchmarks.memory surface --rows 1000000 --resolution 300``
or ``python -m benchmarks.memory basin --resolution 50 40 --steps 300``; it
prints one JSON object.

Method: the process resident set size (RSS) from ``/proc/self/status``.
After the data and the problem are built, the kernel's high-water mark
(``VmHWM``) is reset by writing ``5`` to ``/proc/self/clear_refs`` and the
current RSS is noted; the workload runs; the new high-water mark minus the
noted RSS is the memory the workload added at its peak. The workload
runs twice: the first run includes compilation (XLA's compiler uses memory
too), the second shows the steady state. XLA's CPU buffers live in the
process heap, so RSS sees them; ``tracemalloc`` would not.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from collections.abc import Callable
from typing import Any

__all__ = ["main", "measure_peak"]


def _status_kib(field: str) -> int:
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith(field + ":"):
                return int(line.split()[1])
    raise RuntimeError(f"{field} not in /proc/self/status")


def _reset_peak() -> bool:
    try:
        with open("/proc/self/clear_refs", "w") as fh:
            fh.write("5")
        return True
    except OSError:
        return False


def measure_peak(work: Callable[[], Any]) -> dict[str, float]:
    """Run ``work()`` and report the RSS it added at its peak (MiB) and its time."""
    reset = _reset_peak()  # the high-water mark restarts from the current RSS
    before = _status_kib("VmRSS")
    start = time.perf_counter()
    work()
    seconds = time.perf_counter() - start
    peak = _status_kib("VmHWM")
    return {
        "rss_before_mib": before / 1024,
        "peak_rss_mib": peak / 1024,
        "added_peak_mib": (peak - before) / 1024 if reset else float("nan"),
        "seconds": seconds,
        "peak_reset": reset,
    }


def _surface(args: argparse.Namespace) -> tuple[Callable[[], Any], dict[str, Any]]:
    import jax.numpy as jnp
    import numpy as np

    from basinview.core import Problem, axes_plane, evaluate_surface

    from .workloads import line_data, mse_matrix

    data = line_data(args.rows, seed=21)
    problem = Problem(mse_matrix, jnp.zeros(2), data.design, data.y)
    plane = axes_plane(problem, "theta[0]", "theta[1]", origin=data.solution.astype(np.float32))
    info = {
        "workload": f"W1 loss (X @ theta) on {args.rows} rows, {args.resolution}^2 grid",
        "data_mib": (data.design.nbytes + data.y.nbytes) / 2**20,
        "result_mib": args.resolution**2 * 4 / 2**20,
    }

    def work() -> Any:
        return evaluate_surface(
            problem, plane, span=2.0, resolution=args.resolution, progress=False
        )

    return work, info


def _basin(args: argparse.Namespace) -> tuple[Callable[[], Any], dict[str, Any]]:
    import jax
    import jax.numpy as jnp
    import numpy as np

    from basinview.core import Problem, random_plane

    from .workloads import mlp_data, mlp_init, mlp_loss

    data = mlp_data(args.rows, seed=22)
    problem = Problem(mlp_loss, jax.tree.map(jnp.asarray, mlp_init(0)), data.x, data.y)
    plane = random_plane(problem, seed=1, normalise="filter")
    ra, rb = args.resolution
    try:
        from basinview.core.basins import basin_map
    except ImportError:
        basin_map = None
    steps = args.steps
    runs_mib = ra * rb * (steps + 1) * 4 * 6 / 2**20
    info = {
        "workload": f"basin map of the MLP from a {ra} x {rb} grid of starts ({ra * rb} runs), "
        f"{steps} steps",
        "data_mib": (data.x.nbytes + data.y.nbytes) / 2**20,
        "result_mib": runs_mib,
        "via": "basinview.core.minima.basin_map" if basin_map else "grid_starts + descend",
    }

    def work() -> Any:
        if basin_map is not None:
            return basin_map(
                problem,
                plane,
                span=1.0,
                resolution=(ra, rb),
                learning_rate=0.1,
                steps=steps,
                progress=False,
            )
        from basinview.core import descend, grid_starts

        starts = grid_starts(plane, span=1.0, resolution=(ra, rb))
        return descend(problem, starts, learning_rate=0.1, steps=steps, plane=plane)

    _ = np
    return work, info


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("case", choices=("surface", "basin"))
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--resolution", type=int, nargs="+", default=[300])
    parser.add_argument("--steps", type=int, default=300)
    parser.add_argument("--devices", type=int, default=0, help="CPU devices (0: all cores)")
    args = parser.parse_args(argv)

    from basinview.core import use_all_cores

    use_all_cores(args.devices or None)
    if args.case == "surface":
        args.resolution = args.resolution[0]
        work, info = _surface(args)
    else:
        res = args.resolution
        args.resolution = (res[0], res[-1])
        work, info = _basin(args)
    info["first_run"] = measure_peak(work)
    info["second_run"] = measure_peak(work)
    json.dump(info, sys.stdout)
    sys.stdout.write("\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

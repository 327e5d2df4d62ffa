"""Command line: ``python -m basinview demo``.

``demo`` runs the embedded beacon scenario (see :mod:`basinview.scenarios`)
and prints the analysis as text tables.
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence

__all__ = ["main"]


def _demo(args: argparse.Namespace) -> int:
    import numpy as np
    import pandas as pd

    from . import core
    from .scenarios import beacon

    sc = beacon()
    problem = sc.problem
    plane = core.axes_plane(problem, *sc.plane_axes, origin=sc.plane_origin)
    surface = core.evaluate_surface(problem, plane, span=sc.span, resolution=sc.resolution)
    starts = core.random_starts(
        problem, args.starts, scale=4.0, seed=args.seed, center=sc.plane_origin
    )
    runs = core.descend(
        problem, starts, learning_rate=list(sc.learning_rates), steps=sc.steps, plane=plane
    )
    table = runs.table
    print(f"basinview demo: {sc.name}\n{sc.description}\n")
    a, b, low = surface.grid_minimum()
    x0 = plane.lift(a, b)
    print(
        f"Surface: {surface.loss.shape[1]} x {surface.loss.shape[0]} grid, lowest grid point "
        f"x={x0[0]:.3f}, y={x0[1]:.3f} (loss {low:.4g})."
    )
    with pd.option_context("display.width", 120, "display.max_columns", 20):
        summary = (
            table.groupby("learning_rate")
            .agg(
                runs=("run", "size"),
                converged=("status", lambda s: int((s == "converged").sum())),
                diverged=("status", lambda s: int((s == "diverged").sum())),
                oscillating=("oscillating", "sum"),
                median_steps=("steps", "median"),
            )
            .reset_index()
        )
        print("\nRuns by learning rate:")
        print(summary.to_string(index=False))
        conv = table[table.status == "converged"]
        ends = pd.DataFrame(runs.final[conv.index], columns=problem.labels).round(2)
        ends["final_loss"] = conv["final_loss"].to_numpy()
        found = ends.groupby(list(problem.labels)).agg(
            runs=("final_loss", "size"), loss=("final_loss", "min")
        )
        print("\nWhere converged runs ended (rounded):")
        print(found.reset_index().to_string(index=False))
    print(f"\n{int(np.sum(runs.status == 'diverged'))} of {len(runs)} runs diverged.")
    return 0


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="basinview", description=__doc__.splitlines()[0])
    sub = parser.add_subparsers(dest="command", required=True)
    demo = sub.add_parser("demo", help="run the embedded demo scenario")
    demo.add_argument("--starts", type=int, default=12, help="number of random starts (default 12)")
    demo.add_argument("--seed", type=int, default=0, help="seed of the random starts (default 0)")
    demo.set_defaults(func=_demo)
    args = parser.parse_args(argv)
    return int(args.func(args))


if __name__ == "__main__":
    sys.exit(main())

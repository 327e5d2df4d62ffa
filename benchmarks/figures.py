"""Figure building and Explorer updates, against plotly's validated construction.

Usage (from the repository root)::

    python -m benchmarks.figures               # beacon scenario, 31 rounds
    python -m benchmarks.figures --repeats 9   # fewer rounds
    python -m benchmarks.figures --quick       # small sizes: checks it runs

The figure functions assemble plain dicts and create each figure once
without validation (``basinview/figures/build.py``). The naive baseline,
timed in the same run on the same figure, is plotly's validated
construction ``go.Figure(fig.to_dict())``: what a figure costs when every
property is checked (the dict is made outside the timer). Contenders run in
interleaved rounds; the table gives the median of the rounds and the ratio.

Two Explorer rows follow: copying a new slice figure into a live
PlotView (``explorer.plot.PlotView.show``, which re-sends the grid only when it changed)
against assigning the traces and layout wholesale, and a learning-rate
change end to end (``ex.controls.learning_rate.value = v``: descent,
minima, both figures, both copies), which has no baseline here. The load
average is printed with the numbers: on a shared machine it moves them.
"""

from __future__ import annotations

import argparse
import gc
import os
import platform
import statistics
import time
from collections.abc import Callable
from typing import Any

import numpy as np
import plotly
import plotly.graph_objects as go

__all__ = ["main", "race"]


def race(contenders: dict[str, Callable[[], Any]], repeats: int) -> dict[str, list[float]]:
    """Seconds per call of each contender, over ``repeats`` interleaved rounds (after one warm-up)."""
    for call in contenders.values():
        call()
    times: dict[str, list[float]] = {name: [] for name in contenders}
    for _ in range(repeats):
        gc.collect()
        for name, call in contenders.items():
            start = time.perf_counter()
            call()
            times[name].append(time.perf_counter() - start)
    return times


def _ms(seconds: list[float]) -> float:
    return 1e3 * statistics.median(seconds)


def _inputs(quick: bool) -> dict[str, Any]:
    from basinview import core, scenarios

    sc = scenarios.beacon()
    prob = sc.problem
    plane = core.axes_plane(prob, "x", "y", origin={"x": 5.0, "y": 0.0})
    resolution, n_runs, steps = (21, 4, 60) if quick else (81, 10, 300)
    rng = np.random.default_rng(0)
    starts = (np.array([5.0, 0.0]) + 4.0 * rng.uniform(-1, 1, (n_runs, 2))).astype(np.float32)
    surface = core.evaluate_surface(prob, plane, span=sc.span, resolution=resolution)
    runs = core.descend(prob, starts, learning_rate=0.2, steps=steps, plane=plane)
    minima = core.find_minima(prob, runs)
    basins = core.basin_map(
        prob,
        plane,
        span=sc.span,
        resolution=9 if quick else 21,
        learning_rate=0.2,
        steps=steps,
        progress=False,
    )
    sweep = core.step_size_sweep(
        prob, starts, learning_rates=np.geomspace(0.01, 3.0, 5 if quick else 15), steps=steps
    )
    points = minima.points
    profile = core.segment_profile(prob, points[0], points[-1], resolution=101)
    return {
        "scenario": sc,
        "starts": starts,
        "surface": surface,
        "runs": runs,
        "minima": minima,
        "basins": basins,
        "sweep": sweep,
        "profile": profile,
        "sizes": (resolution, n_runs, steps),
    }


def _builders(d: dict[str, Any]) -> dict[str, Callable[[], go.Figure]]:
    from basinview import figures as F

    return {
        "slice": lambda: F.slice_figure(d["surface"], d["runs"], minima=d["minima"]),
        "relief": lambda: F.relief_figure(d["surface"], d["runs"], minima=d["minima"]),
        "loss curves": lambda: F.loss_curves_figure(d["runs"], minima=d["minima"]),
        "step sizes": lambda: F.step_size_figure(d["sweep"]),
        "basins": lambda: F.basin_figure(d["basins"], surface=d["surface"]),
        "profile": lambda: F.profile_figure(d["profile"]),
    }


def _sync_rows(d: dict[str, Any], repeats: int) -> dict[str, list[float]]:
    """Showing alternating slice figures (paths changed) in the Explorer's PlotView.

    ``PlotView.show`` sends the traces and layout and re-sends the contour grid
    only when it changed; ``wholesale`` makes a fresh PlotView each time (every
    array sent again, as a newly displayed figure would).
    """
    from basinview import core
    from basinview import figures as F
    from basinview.explorer.plot import PlotView

    prob = d["scenario"].problem
    other = core.descend(
        prob, d["starts"], learning_rate=0.3, steps=d["sizes"][2], plane=d["surface"].plane
    )
    figs = [
        F.slice_figure(d["surface"], d["runs"], minima=d["minima"]),
        F.slice_figure(d["surface"], other, minima=core.find_minima(prob, other)),
    ]
    fast = PlotView(height=560)
    turn = {"fast": 0, "naive": 0}

    def by_changes() -> None:
        turn["fast"] ^= 1
        fast.show(figs[turn["fast"]])

    def wholesale() -> None:
        turn["naive"] ^= 1
        PlotView(height=560).show(figs[turn["naive"]])

    return race({"sync_figure": by_changes, "wholesale": wholesale}, repeats)


def _explorer_row(d: dict[str, Any], repeats: int) -> list[float]:
    from .interaction import Change, quickstart_explorer, time_changes

    resolution, n_runs, steps = d["sizes"]
    ex = quickstart_explorer(resolution=resolution, steps=steps, n_starts=n_runs)
    changes = [Change("learning rate", v) for v in (0.15, 0.25, 0.3, 0.12, 0.2, 0.35)]
    time_changes(ex, changes)  # warm-up: every value once (compiles, caches)
    return time_changes(ex, changes * max(1, repeats // len(changes)))


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=31, help="interleaved rounds")
    parser.add_argument("--quick", action="store_true", help="small sizes (checks it runs)")
    args = parser.parse_args(argv)
    repeats = max(3, args.repeats)
    d = _inputs(args.quick)
    resolution, n_runs, steps = d["sizes"]
    print(
        f"beacon scenario: {resolution} x {resolution} surface, {n_runs} runs x {steps} steps; "
        f"plotly {plotly.__version__}, Python {platform.python_version()}, "
        f"{os.cpu_count()} CPUs"
    )
    print(f"load average before: {' '.join(f'{x:.2f}' for x in os.getloadavg())}")
    print(f"medians of {repeats} interleaved rounds, milliseconds\n")
    header = f"{'figure':<14}{'built':>10}{'validated':>12}{'ratio':>9}"
    print(header)
    print("-" * len(header))
    for name, build in _builders(d).items():
        spec = build().to_dict()
        times = race({"built": build, "validated": lambda s=spec: go.Figure(s)}, repeats)
        new, old = _ms(times["built"]), _ms(times["validated"])
        print(f"{name:<14}{new:>10.2f}{old:>12.2f}{old / new:>8.1f}x")
    times = _sync_rows(d, repeats)
    new, old = _ms(times["sync_figure"]), _ms(times["wholesale"])
    print(f"\n{'copy slice':<14}{new:>10.2f}{old:>12.2f}{old / new:>8.1f}x")
    print("  (sync_figure: changed properties only, vs data and layout assigned wholesale)")
    lr = _explorer_row(d, repeats)
    print(
        f"\nExplorer learning-rate change: median {_ms(lr):.1f} ms over {len(lr)} changes "
        f"(quartiles {1e3 * np.percentile(lr, 25):.1f} - {1e3 * np.percentile(lr, 75):.1f} ms)"
    )
    print(f"load average after: {' '.join(f'{x:.2f}' for x in os.getloadavg())}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

"""Probes of the W8 benchmark: timing one Explorer change stage by stage, and references.

:class:`StageClock` splits a change into the Explorer's own compute stages
(``ViewComputer.seconds``), the figure build and the serialisation to the
PlotView model; :func:`timed_change` times one change with its compilations
and CPU time; :func:`bare_descent_ms` is the descent's arithmetic alone (a
bare jitted loop); :func:`figure_costs` splits a figure's cost into plotly's
validation, its JSON and the PlotView; :func:`profile_change` summarises
cProfile. Used by :mod:`benchmarks.explorer_latency`.
"""

from __future__ import annotations

import cProfile
import gc
import pstats
import statistics
import time
import warnings
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from basinview.core import MinimaWarning, count_compilations
from basinview.core.cost_model import loss_cost

from .interaction import path_data
from .timing import cpu_seconds

__all__ = [
    "PARTS",
    "StageClock",
    "bare_descent_ms",
    "computed_change",
    "figure_costs",
    "profile_change",
    "setter_for",
    "summary",
    "timed_change",
]

#: Stages in the order a breakdown lists them.
PARTS = (
    "plane",
    "surface",
    "starts",
    "descent",
    "minima",
    "figure_build",
    "to_plot_model",
    "other",
)


class StageClock:
    """Times the figure build and the PlotView serialisation of one Explorer's changes.

    Wraps, on the instance only, the Explorer's two drawing methods and its two
    views' ``show``; the compute stages come from ``ex.computer.seconds``.
    """

    def __init__(self, ex: Any) -> None:
        self.ex = ex
        self.spent: dict[str, float] = {}
        for name in ("_draw_main", "_draw_side"):
            setattr(ex, name, self._wrap(name, getattr(ex, name)))
        for plot in (ex.main, ex.side):
            plot.show = self._wrap("show", plot.show)

    def _wrap(self, key: str, fn: Callable[..., Any]) -> Callable[..., Any]:
        def timed(*args: Any, **kwargs: Any) -> Any:
            t0 = time.perf_counter()
            try:
                return fn(*args, **kwargs)
            finally:
                self.spent[key] = self.spent.get(key, 0.0) + time.perf_counter() - t0

        return timed

    def reset(self) -> None:
        self.spent.clear()
        self.ex.computer.seconds.clear()

    def breakdown(self, total: float) -> dict[str, float]:
        """Milliseconds per part of the last change (``total``: its seconds)."""
        stages = dict(self.ex.computer.seconds)
        show = self.spent.get("show", 0.0)
        draw = self.spent.get("_draw_main", 0.0) + self.spent.get("_draw_side", 0.0)
        parts = {
            "plane": stages.get("plane", 0.0),
            "surface": stages.get("surface", 0.0),
            "starts": stages.get("starts", 0.0),
            "descent": stages.get("runs", 0.0),
            "minima": stages.get("minima", 0.0),
            "figure_build": draw - show,
            "to_plot_model": show,
        }
        parts["other"] = total - sum(parts.values())
        return {k: 1e3 * v for k, v in parts.items()}


def setter_for(ex: Any, name: str, value: Any) -> Callable[[], None]:
    """What setting the Explorer's control ``name`` to ``value`` does, as a call."""
    widget = getattr(ex.controls, name)
    return lambda: setattr(widget, "value", value)


def timed_change(
    ex: Any, clock: StageClock, control: str, value: Any, apply: Callable[[], None] | None = None
) -> dict[str, Any]:
    """Set control ``control`` to ``value``; its milliseconds, compilations and breakdown.

    ``apply`` replaces the control assignment (e.g. ``ex.set`` for a change
    of two controls at once).

    Raises:
        RuntimeError: the Explorer showed an error, or the descent paths of the
            map did not change (the change did not take effect).
    """
    apply = apply or setter_for(ex, control, value)
    before = path_data(ex.main)
    gc.collect()
    clock.reset()
    with count_compilations() as compiled:
        cpu0, t0 = cpu_seconds(), time.perf_counter()
        apply()
        seconds, cpu = time.perf_counter() - t0, cpu_seconds() - cpu0
    if "⚠" in ex.status.value or ex.last_error:
        raise RuntimeError(f"{control} -> {value!r}: the Explorer reported {ex.status.value!r}")
    if path_data(ex.main) == before:
        raise RuntimeError(f"{control} -> {value!r}: the map's descent paths did not change")
    return _row(f"{control} -> {value}", ex, clock, compiled, seconds, cpu, len(ex.results.runs))


def _row(
    change: str, ex: Any, clock: StageClock, compiled: Any, seconds: float, cpu: float, runs: int
) -> dict[str, Any]:
    """One measured change: wall and CPU milliseconds, compilations, stages, breakdown."""
    return {
        "change": change,
        "ms": 1e3 * seconds,
        "cpu_ms": 1e3 * cpu,
        "compilations": compiled.count,
        "compile_seconds": compiled.seconds,
        "runs": runs,
        "stages": sorted(ex.computer.seconds),
        "breakdown_ms": clock.breakdown(seconds),
    }


def summary(rows: Sequence[dict[str, Any]]) -> dict[str, Any]:
    """Median and spread over ``rows`` (from :func:`timed_change`)."""
    ms = [r["ms"] for r in rows]
    q1, _, q3 = np.percentile(ms, [25, 50, 75]) if len(ms) > 1 else (ms[0], ms[0], ms[0])
    return {
        "changes": len(rows),
        "median_ms": statistics.median(ms),
        "min_ms": min(ms),
        "max_ms": max(ms),
        "iqr_ms": [float(q1), float(q3)],
        "median_cpu_ms": statistics.median(r["cpu_ms"] for r in rows),
        "compilations": sum(r["compilations"] for r in rows),
        "changes_that_compiled": sum(1 for r in rows if r["compilations"]),
        "stages_run": sorted({s for r in rows for s in r["stages"]}),
        "other_min_ms": min(r["breakdown_ms"]["other"] for r in rows),
        "breakdown_median_ms": {
            p: statistics.median(r["breakdown_ms"][p] for r in rows) for p in PARTS
        },
    }


def computed_change(ex: Any, clock: StageClock, n: int) -> dict[str, Any]:
    """The stages of a start-count change, without the figures (see start_count_changes)."""
    clock.reset()
    state = ex.computer.state.replace(n_starts=n)
    # As in the Explorer, MinimaWarnings are for the status line, not errors here.
    with count_compilations() as compiled, warnings.catch_warnings():
        warnings.simplefilter("ignore", MinimaWarning)
        cpu0, t0 = cpu_seconds(), time.perf_counter()
        results, stages = ex.computer.update(state)
        seconds, cpu = time.perf_counter() - t0, cpu_seconds() - cpu0
    if len(results.runs) != n + len(state.start_points) or "runs" not in stages:
        raise RuntimeError(f"n_starts -> {n}: {len(results.runs)} runs after the update")
    return _row(f"n_starts -> {n}", ex, clock, compiled, seconds, cpu, len(results.runs))


def figure_costs(ex: Any, repeats: int = 5) -> dict[str, Any]:
    """Where the figure time goes, on the current view's map (``figures.slice_figure``).

    ``build``: the figure function (plain dicts, then one validated
    ``go.Figure``); ``validate``: ``go.Figure`` rebuilt from the same figure's
    JSON (plotly's validation alone); ``to_json``: ``to_plotly_json()``;
    ``show_figure`` / ``show_dict``: ``PlotView.show`` given the figure or the
    same figure as plain data (what skipping plotly's objects would cost).
    """
    import plotly.graph_objects as go

    from basinview import figures
    from basinview.explorer.plot import PlotView

    r = ex.results
    view = PlotView()
    fig = figures.slice_figure(r.surface, r.runs, minima=r.minima)
    plain = fig.to_plotly_json()

    def timed(fn: Callable[[], Any]) -> float:
        times = []
        for _ in range(repeats):
            t0 = time.perf_counter()
            fn()
            times.append(time.perf_counter() - t0)
        return 1e3 * statistics.median(times)

    return {
        "runs": len(r.runs),
        "traces": len(fig.data),
        "build_ms": timed(lambda: figures.slice_figure(r.surface, r.runs, minima=r.minima)),
        "validate_ms": timed(lambda: go.Figure(plain)),
        "to_json_ms": timed(fig.to_plotly_json),
        "show_figure_ms": timed(lambda: view.show(fig)),
        "show_dict_ms": timed(lambda: view.show(plain)),
    }


def bare_descent_ms(ex: Any, repeats: int = 5) -> dict[str, Any]:
    """A bare jitted loop doing the Explorer's descent (same starts, rate and steps).

    Gradient descent, ``vmap`` over the runs of a ``lax.scan`` over the steps that
    keeps only each step's loss: the arithmetic a descent cannot avoid. Its
    FLOP rate uses the cost model's count for one value and gradient
    (:func:`basinview.core.cost_model.loss_cost`, read off the jaxpr).
    """
    import jax
    import jax.numpy as jnp

    problem, state = ex.problem, ex.state
    starts = jnp.asarray(ex.results.starts.points, dtype=problem.dtype)
    data = problem.data
    lr = jnp.asarray(state.learning_rate, dtype=problem.dtype)
    value_and_grad = jax.value_and_grad(problem.flat_loss)

    @jax.jit
    def run(starts: Any, lr: Any, data: Any) -> Any:
        def one(theta: Any) -> Any:
            def step(th: Any, _: Any) -> Any:
                value, grad = value_and_grad(th, data)
                return th - lr * grad, value

            return jax.lax.scan(step, theta, None, length=state.steps)

        return jax.vmap(one)(starts)

    jax.block_until_ready(run(starts, lr, data))
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        jax.block_until_ready(run(starts, lr, data))
        times.append(time.perf_counter() - t0)
    flops = loss_cost(problem, gradient=True).flops  # one value and gradient (cost model)
    total = flops * int(starts.shape[0]) * state.steps
    return {
        "runs": int(starts.shape[0]),
        "steps": state.steps,
        "median_ms": 1e3 * statistics.median(times),
        "min_ms": 1e3 * min(times),
        "flops_per_value_and_grad": flops,
        "gflops_at_median": total / statistics.median(times) / 1e9,
    }


def profile_change(ex: Any, control: str, values: Sequence[Any], top: int = 12) -> list[str]:
    """cProfile of ``len(values)`` changes: the heaviest entries by own time, as text."""
    profiler = cProfile.Profile()
    setters = [setter_for(ex, control, v) for v in values]
    profiler.enable()
    for apply in setters:
        apply()
    profiler.disable()
    stats = pstats.Stats(profiler)
    rows = []
    total = stats.total_tt  # type: ignore[attr-defined]
    entries = stats.stats  # type: ignore[attr-defined]
    for (path, line, name), (_, calls, own, cum, _) in sorted(
        entries.items(), key=lambda kv: -kv[1][2]
    )[:top]:
        short = "/".join(Path(path).parts[-2:]) if path != "~" else "builtin"
        rows.append(
            f"{1e3 * own / len(values):.1f} ms own, {1e3 * cum / len(values):.1f} ms cumulative "
            f"per change ({calls // len(values)} calls): {short}:{line} {name}"
        )
    rows.append(f"total {1e3 * total / len(values):.1f} ms per change under the profiler")
    return rows

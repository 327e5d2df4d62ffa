"""W5: how fast the Explorer answers a change, and whether changes compile.

The Explorer is built as the quickstart notebook builds it (beacon problem,
axes plane through ``(5, 0)``, gradient descent from 12 random starts) and
driven from Python the way the tests drive it: a control's ``value`` is set,
which runs the Explorer's handler, or the contour map's click handler is
called with a point. The handler is synchronous: when the assignment
returns, descent has rerun and both FigureWidgets hold the new data, so the
time of the assignment is the time from the change to updated figure data
(Python side; drawing in the browser is not included).

Two measurements:

* **latency**: learning-rate changes under gradient descent, each timed
  from the assignment to its return, after one warm change;
* **compilations**: 20 changes mixing the learning rate, the momentum, the
  number and positions of starts (random count, seed and spread, two
  clicks on the map, forgetting the clicks), counted with
  :func:`basinview.core.count_compilations` after a warm-up that chooses the
  momentum optimiser and visits the run counts the changes use. Run counts
  are padded to buckets (``bucket()``), so a count in a bucket not seen
  before compiles once; the warm-up reports what that costs.

Every change is checked: the view state holds the new value, no error was
shown and the slice figure's paths changed.
"""

from __future__ import annotations

import datetime as _dt
import gc
import statistics
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

__all__ = [
    "QUICKSTART",
    "Change",
    "apply_change",
    "interaction_record",
    "mixed_changes",
    "path_data",
    "quickstart_explorer",
    "time_changes",
]

#: The Explorer of notebooks/quickstart.ipynb (beacon data, plane through (5, 0)).
QUICKSTART: dict[str, Any] = {
    "plane": "axes",
    "x": "x",
    "y": "y",
    "span": ((-7.0, 7.0), (-6.0, 6.0)),
    "resolution": 61,
    "optimizer": "gradient_descent",
    "learning_rate": 0.2,
    "steps": 400,
    "n_starts": 12,
    "start_scale": 4.0,
}
QUICKSTART_CENTER = {"x": 5.0, "y": 0.0}


@dataclass(frozen=True)
class Change:
    """One user action: ``kind`` names the control, ``value`` what it is set to."""

    kind: str
    value: Any = None


def quickstart_explorer(**overrides: Any) -> Any:
    """The quickstart notebook's Explorer (``overrides`` replace its options)."""
    import basinview
    from basinview.scenarios import beacon

    problem = beacon().problem
    options = {**QUICKSTART, "origin": problem.flatten(QUICKSTART_CENTER), **overrides}
    return basinview.Explorer(problem, **options)


def _click(ex: Any, a: float, b: float) -> None:
    """What plotly does on a click at ``(a, b)`` of the map: call the trace's handler."""
    ex.main.receive(ex.main, {"kind": "click", "x": a, "y": b, "uid": "slice-surface"}, [])


def _hyper(ex: Any, name: str) -> Any:
    for control in ex.controls.hyper_box.children:
        if control.description == name:
            return control
    raise RuntimeError(f"the Explorer shows no {name!r} control for {ex.state.optimizer!r}")


_SETTERS: dict[str, Callable[[Any, Any], None]] = {
    "learning rate": lambda ex, v: setattr(ex.controls.learning_rate, "value", v),
    "momentum": lambda ex, v: setattr(_hyper(ex, "momentum"), "value", v),
    "optimizer": lambda ex, v: setattr(ex.controls.optimizer, "value", v),
    "random starts": lambda ex, v: setattr(ex.controls.n_starts, "value", v),
    "start seed": lambda ex, v: setattr(ex.controls.start_seed, "value", v),
    "start spread": lambda ex, v: setattr(ex.controls.start_scale, "value", v),
    "click": lambda ex, v: _click(ex, *v),
    "forget clicks": lambda ex, v: ex.controls.clear_clicks.click(),
}


def _expected(ex: Any, change: Change) -> tuple[str, Any, Any]:
    """(what, expected, actual) after ``change``, read from the Explorer's state."""
    s = ex.state
    if change.kind == "learning rate":
        return "learning_rate", change.value, s.learning_rate
    if change.kind == "momentum":
        return "momentum", change.value, s.hyper_dict.get("momentum")
    if change.kind == "optimizer":
        return "optimizer", change.value, s.optimizer
    if change.kind == "random starts":
        return "n_starts", change.value, s.n_starts
    if change.kind == "start seed":
        return "start_seed", change.value, s.start_seed
    if change.kind == "start spread":
        return "start_scale", change.value, s.start_scale
    if change.kind == "click":
        last = s.start_points[-1] if s.start_points else None
        return "last clicked start", tuple(change.value), last
    return "clicked starts", (), s.start_points


def path_data(fig: Any) -> tuple[tuple[float, ...], ...]:
    """The coordinates of every descent path drawn in ``fig`` (to see that it changed)."""
    out = []
    for trace in fig.figure_data():
        if "path" in str(trace.get("uid", "")):
            out.append(tuple(np.asarray(trace["x"], float)) + tuple(np.asarray(trace["y"], float)))
    return tuple(out)


def apply_change(ex: Any, change: Change) -> float:
    """Apply ``change`` the way a user would; return its seconds; check it took effect.

    Raises:
        RuntimeError: the Explorer showed an error, its state does not hold
            the new value, or the slice figure's paths did not change.
    """
    before = path_data(ex.main)
    gc.collect()
    start = time.perf_counter()
    _SETTERS[change.kind](ex, change.value)
    seconds = time.perf_counter() - start
    what, want, got = _expected(ex, change)
    if "⚠" in ex.status.value or ex.last_error:
        raise RuntimeError(f"{change}: the Explorer reported {ex.status.value!r}")
    if isinstance(want, tuple):
        same = got is not None and len(got) == len(want) and np.allclose(got, want, atol=1e-6)
    else:
        same = got == want if isinstance(want, (str, int)) else np.isclose(got, want, rtol=1e-12)
    if not same:
        raise RuntimeError(f"{change}: {what} is {got!r} after the change, not {want!r}")
    if path_data(ex.main) == before:
        raise RuntimeError(f"{change}: the slice figure's descent paths did not change")
    return seconds


def time_changes(ex: Any, changes: Sequence[Change]) -> list[float]:
    """Seconds of each change in turn (each checked by :func:`apply_change`)."""
    return [apply_change(ex, c) for c in changes]


def _ms(seconds: Sequence[float]) -> dict[str, float]:
    ms = [1e3 * s for s in seconds]
    return {
        "median_ms": statistics.median(ms),
        "min_ms": min(ms),
        "max_ms": max(ms),
        "changes": len(ms),
    }


def mixed_changes() -> tuple[list[Change], list[Change]]:
    """The warm-up and the 20 changes of the compilation count.

    The view starts from the quickstart's 12 random starts. The changes keep
    between 10 and 16 runs (run-count buckets 12 and 16); the warm-up chooses
    the momentum optimiser and visits both buckets with it.
    """
    warm_up = [
        Change("optimizer", "momentum"),
        Change("random starts", 16),
        Change("random starts", 12),
        Change("learning rate", 0.3),
    ]
    changes = [
        Change("learning rate", 0.2),
        Change("momentum", 0.5),
        Change("click", (8.0, 4.0)),
        Change("learning rate", 0.1),
        Change("random starts", 10),
        Change("momentum", 0.8),
        Change("click", (2.0, -4.0)),
        Change("learning rate", 0.05),
        Change("start seed", 1),
        Change("random starts", 14),
        Change("momentum", 0.6),
        Change("learning rate", 0.4),
        Change("start spread", 3.0),
        Change("forget clicks"),
        Change("learning rate", 0.15),
        Change("momentum", 0.95),
        Change("random starts", 9),
        Change("click", (5.0, -2.0)),
        Change("learning rate", 0.25),
        Change("momentum", 0.7),
    ]
    return warm_up, changes


#: Learning rates of the latency measurement, cycled (converging, zig-zagging, diverging).
LATENCY_RATES = (0.1, 0.3, 0.05, 0.6, 0.2, 1.2, 0.15, 2.5)


def interaction_record(resolution: int, steps: int, rounds: int) -> dict[str, Any]:
    """Build the quickstart Explorer and measure W5 (see the module docstring)."""
    from basinview.core import count_compilations

    record: dict[str, Any] = {
        "date": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "what": f"quickstart Explorer (beacon, {resolution} x {resolution} surface, "
        f"{QUICKSTART['n_starts']} random starts x {steps} steps), driven from Python by "
        "setting control values; a change is timed from the assignment until the handler "
        "returned with both FigureWidgets updated",
    }
    with count_compilations() as counter:
        start = time.perf_counter()
        ex = quickstart_explorer(resolution=resolution, steps=steps)
        record["build"] = {
            "seconds": time.perf_counter() - start,
            "compilations": counter.count,
            "compile_seconds": counter.seconds,
        }
    previews = []
    preview = ex.computer.preview
    ex.computer.preview = lambda state: previews.append(state) or preview(state)

    # Latency of learning-rate changes under gradient descent.
    lr = [Change("learning rate", v) for v in LATENCY_RATES]
    with count_compilations() as counter:
        first = apply_change(ex, lr[0])
    times, runs_s, minima_s = [], [], []
    with count_compilations() as warm:
        for _ in range(rounds):
            for change in lr[1:] + lr[:1]:
                times.append(apply_change(ex, change))
                runs_s.append(ex.computer.seconds["runs"])
                minima_s.append(ex.computer.seconds["minima"])
    rest = [t - r - m for t, r, m in zip(times, runs_s, minima_s)]
    record["learning_rate_change"] = {
        "first_change_ms": 1e3 * first,
        "first_change_compilations": counter.count,
        "full": _ms(times),
        "descent_median_ms": 1e3 * statistics.median(runs_s),
        "minima_median_ms": 1e3 * statistics.median(minima_s),
        "figures_and_sync_median_ms": 1e3 * statistics.median(rest),
        "compilations": warm.count,
        "previews_drawn": len(previews),
        "preview": None,
        "preview_note": "a learning-rate change reruns descent and minima only; the "
        "coarse preview is drawn only when the surface must be recomputed and took "
        "longer than 0.3 s, so the first figure update is the full-resolution one",
        "rates": list(LATENCY_RATES),
    }

    # Compilations over 20 mixed changes after a warm-up.
    warm_up, changes = mixed_changes()
    steps_warm = []
    for change in warm_up:
        with count_compilations() as counter:
            seconds = apply_change(ex, change)
        steps_warm.append(
            {
                "change": f"{change.kind} -> {change.value}",
                "runs": len(ex.results.runs),
                "ms": 1e3 * seconds,
                "compilations": counter.count,
                "compile_seconds": counter.seconds,
            }
        )
    by_kind: dict[str, list[float]] = {}
    runs = []
    with count_compilations() as counter:
        for change in changes:
            by_kind.setdefault(change.kind, []).append(apply_change(ex, change))
            runs.append(len(ex.results.runs))
    record["mixed_changes"] = {
        "warm_up": steps_warm,
        "warm_up_compilations": sum(s["compilations"] for s in steps_warm),
        "warm_up_compile_seconds": sum(s["compile_seconds"] for s in steps_warm),
        "changes": [f"{c.kind} -> {c.value}" for c in changes],
        "runs_after_each": runs,
        "compilations": counter.count,
        "latency": {kind: _ms(t) for kind, t in by_kind.items()},
        "previews_drawn": len(previews),
    }
    record["goal"] = "learning-rate change < 100 ms warm; 0 compilations after warm-up"
    return record

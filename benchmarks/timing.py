"""Timing helpers: compile time apart from run time, interleaved repeats, machine facts."""

from __future__ import annotations

import datetime as _dt
import os
import platform
import resource
import statistics
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import jax
import numpy as np

from basinview.core import count_compilations

__all__ = [
    "Contender",
    "cpu_seconds",
    "machine",
    "race",
]


def cpu_seconds() -> float:
    """CPU time (user + system) of this process so far, all threads."""
    usage = resource.getrusage(resource.RUSAGE_SELF)
    return usage.ru_utime + usage.ru_stime


@dataclass
class Contender:
    """One way of doing a workload, timed: a first call, then warm repeats."""

    name: str
    run: Callable[[], Any]
    repeats: int
    first_seconds: float = float("nan")
    compile_seconds: float = float("nan")
    compilations: int = 0
    times: list[float] = field(default_factory=list)
    cpu_times: list[float] = field(default_factory=list)
    result: Any = None

    @property
    def median(self) -> float:
        return statistics.median(self.times) if self.times else float("nan")

    def summary(self) -> dict[str, Any]:
        return {
            "median_seconds": self.median,
            "min_seconds": min(self.times) if self.times else float("nan"),
            "runs_seconds": [round(t, 6) for t in self.times],
            "median_cpu_seconds": statistics.median(self.cpu_times)
            if self.cpu_times
            else float("nan"),
            "first_call_seconds": self.first_seconds,
            "compile_seconds": self.compile_seconds,
            "compilations_first_call": self.compilations,
        }


def _once(contender: Contender) -> float:
    cpu0 = cpu_seconds()
    start = time.perf_counter()
    contender.result = contender.run()
    elapsed = time.perf_counter() - start
    contender.cpu_times.append(cpu_seconds() - cpu0)
    return elapsed


def race(contenders: list[Contender]) -> list[Contender]:
    """Time every contender: one first call each, then warm repeats in rounds.

    Rounds interleave the contenders (a, b, c, a, b, c, ...) so that a
    change in the machine's load during the benchmark affects all of them
    alike. The first call (compilation, tuning, caches) is reported apart.
    """
    for c in contenders:
        with count_compilations() as compiles:
            c.first_seconds = _once(c)
        c.cpu_times.clear()
        c.compile_seconds = compiles.seconds
        c.compilations = compiles.count
    for r in range(max(c.repeats for c in contenders)):
        for c in contenders:
            if r < c.repeats:
                c.times.append(_once(c))
    return contenders


def _cpu_model() -> str:
    try:
        with open("/proc/cpuinfo") as fh:
            for line in fh:
                if line.startswith("model name"):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or platform.machine()


def _memory_gib() -> float:
    try:
        with open("/proc/meminfo") as fh:
            for line in fh:
                if line.startswith("MemTotal:"):
                    return round(int(line.split()[1]) / 2**20, 1)
    except OSError:
        pass
    return float("nan")


def load_average() -> list[float]:
    try:
        return [round(x, 2) for x in os.getloadavg()]
    except OSError:
        return []


def machine() -> dict[str, Any]:
    """Date and description of the machine and software the numbers come from."""
    import jaxlib

    try:
        affinity = len(os.sched_getaffinity(0))
    except AttributeError:
        affinity = os.cpu_count()
    return {
        "date": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "cpu_model": _cpu_model(),
        "logical_cores": os.cpu_count(),
        "cores_available": affinity,
        "memory_gib": _memory_gib(),
        "platform": platform.platform(),
        "python": platform.python_version(),
        "jax": jax.__version__,
        "jaxlib": jaxlib.__version__,
        "numpy": np.__version__,
        "jax_devices": [str(d) for d in jax.devices()],
        "load_average_at_start": load_average(),
    }

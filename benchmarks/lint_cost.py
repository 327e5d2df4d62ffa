"""What the loss lint adds to building a Problem: medians and their ratio.

Usage (from the repository root)::

    python -m benchmarks.lint_cost

Two problems: the quickstart's range misfit (2 parameters, the beacon
scenario's receivers) and a 2-160-160-1 tanh MLP on the wavy-band scenario
(26,401 parameters). For each: the median time of ``Problem(...)`` with and
without the lint, the median time of the lint alone (``lint_loss``: one
``jax.make_jaxpr`` trace on abstract inputs, no compilation), and the ratio
lint / build. The goal is a ratio well below 0.1: building a problem stays
dominated by its one compiled evaluation of the loss.
"""

from __future__ import annotations

import statistics
import time
from collections.abc import Callable
from typing import Any

import jax
import jax.numpy as jnp

from basinview.core import Problem, lint_loss
from basinview.scenarios import beacon, mlp_init, mlp_loss, wavy_band_data


def _median(fn: Callable[[], Any], repeats: int = 7) -> float:
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def range_misfit(params: Any, receivers: Any, ranges: Any) -> jax.Array:
    dx = params["x"] - receivers[:, 0]
    dy = params["y"] - receivers[:, 1]
    return jnp.mean((jnp.sqrt(dx**2 + dy**2 + 1e-12) - ranges) ** 2)


def main() -> None:
    scenario = beacon(seed=2026)
    x, y = wavy_band_data()
    cases = {
        "quickstart": (
            range_misfit,
            {"x": 1.0, "y": 1.0},
            (scenario.extras["receivers"], scenario.extras["ranges"]),
        ),
        "mlp-26k": (mlp_loss, mlp_init(jax.random.PRNGKey(0), (2, 160, 160, 1)), (x, y)),
    }
    for name, case in cases.items():
        print(_measure(name, *case))


def _measure(name: str, loss: Any, params: Any, data: tuple[Any, ...]) -> str:
    prob = Problem(loss, params, *data)
    built = _median(lambda: Problem(loss, params, *data))
    plain = _median(lambda: Problem(loss, params, *data, lint=False))
    alone = _median(lambda: lint_loss(prob.loss, prob.flattener, prob.data))
    return (
        f"{name}: n={prob.size}  build {built * 1e3:.1f} ms (lint=False {plain * 1e3:.1f} ms)"
        f"  lint alone {alone * 1e3:.1f} ms  ratio lint/build {alone / plain:.3f}"
    )


if __name__ == "__main__":
    main()

"""Cost of the four instruments, as ratios against a plain call in the same run.

``python -m benchmarks.instruments`` (``--quick`` for tiny sizes) writes
``benchmarks/results_instruments.json``. Every workload runs on the
wavy-band network of :mod:`basinview.scenarios` (1185 parameters, 256 rows)
and is timed with :func:`benchmarks.timing.race` (first call apart, then
interleaved warm repeats, medians) next to a plain contender:

* ``sharpness``: ``descend`` with ``sharpness_every=10`` against the same
  ``descend`` without tracking, for gradient descent and Adam (goal: < 2x).
* ``recorder``: a hand-written optax training loop calling
  ``RunRecorder.record`` every step against the same loop without it.
* ``trajectory_plane``: the plane of 200 checkpoints against one jitted
  value-and-gradient call (reported in gradient calls).
* ``curved_path``: fitting a curve (``steps x samples`` loss gradients)
  against ``descend`` of one run for the same number of gradient steps.
* ``hessian_density``: stochastic Lanczos quadrature (``probes x steps``
  Hessian-vector products) against ``descend`` of one run for the same
  number of gradient steps.
"""

from __future__ import annotations

import argparse
import json
import time
from pathlib import Path
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
import optax

from basinview.core import (
    RunRecorder,
    curved_path,
    descend,
    hessian_density,
    trajectory_plane,
)
from basinview.scenarios import wavy_band

from .timing import Contender, load_average, machine, race

__all__ = ["main", "run_all"]

OUT = Path(__file__).with_name("results_instruments.json")


def _ratio(slow: Contender, fast: Contender) -> float:
    return round(slow.median / fast.median, 3)


def _sharpness(problem: Any, starts: np.ndarray, steps: int, repeats: int) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for rule, lr in (("gradient_descent", 0.3), ("adam", 0.003)):
        kw = dict(optimizer=rule, learning_rate=lr, steps=steps, grad_tol=0.0)
        plain = Contender("plain", lambda kw=kw: descend(problem, starts, **kw), repeats)
        tracked = Contender(
            "tracked",
            lambda kw=kw: descend(problem, starts, sharpness_every=10, **kw),
            repeats,
        )
        race([plain, tracked])
        out[rule] = {
            "runs": int(starts.shape[0]),
            "steps": steps,
            "sharpness_every": 10,
            "sharpness_iterations": 2,
            "plain": plain.summary(),
            "tracked": tracked.summary(),
            "ratio": _ratio(tracked, plain),
            "goal": "< 2x",
        }
    return out


def _user_loop(problem: Any, steps: int, recorder: bool) -> Any:
    params = problem.unflatten(problem.theta0)
    opt = optax.adam(0.01)
    state = opt.init(params)
    loss = problem.loss

    @jax.jit
    def step(params: Any, state: Any) -> tuple[Any, Any]:
        grads = jax.grad(loss)(params, *problem.data)
        updates, state = opt.update(grads, state, params)
        return optax.apply_updates(params, updates), state

    def run() -> Any:
        p, s = params, state
        rec = RunRecorder(problem, every=1, keep=200) if recorder else None
        for _ in range(steps):
            if rec is not None:
                rec.record(p)
            p, s = step(p, s)
        if rec is not None:
            rec.record(p)
        jax.block_until_ready(p)
        return rec if rec is not None else p

    return run


def run_all(quick: bool = False) -> dict[str, Any]:
    scenario = wavy_band()
    problem = scenario.problem
    init = scenario.extras["init"]
    n_starts, steps, repeats = (4, 60, 1) if quick else (16, 500, 3)
    starts = np.stack(
        [problem.flatten(init(jax.random.key(100 + i))) for i in range(n_starts)]
    ).astype(problem.dtype)
    results: dict[str, Any] = {"machine": machine(), "load_average_start": load_average()}
    results["problem"] = {"name": "wavy_band", "parameters": problem.size, "rows": 256}
    results["sharpness"] = _sharpness(problem, starts, steps, repeats)

    loop_steps = 60 if quick else 1000
    plain_loop = Contender("loop", _user_loop(problem, loop_steps, False), repeats)
    rec_loop = Contender("loop+recorder", _user_loop(problem, loop_steps, True), repeats)
    race([plain_loop, rec_loop])
    results["recorder"] = {
        "steps": loop_steps,
        "plain": plain_loop.summary(),
        "recorded": rec_loop.summary(),
        "ratio": _ratio(rec_loop, plain_loop),
    }
    recorder = rec_loop.result
    vg = jax.jit(jax.value_and_grad(problem.flat_loss))
    theta = jnp.asarray(problem.theta0)

    def grad_calls() -> Any:
        for _ in range(100):
            out = vg(theta, problem.data)
        return jax.block_until_ready(out)

    grad = Contender("100 value_and_grad calls", grad_calls, repeats)
    plane = Contender("trajectory_plane", lambda: trajectory_plane(problem, recorder), repeats)
    race([grad, plane])
    results["trajectory_plane"] = {
        "checkpoints": len(recorder),
        "plane": plane.summary(),
        "value_and_grad_100": grad.summary(),
        "gradient_calls": round(100 * plane.median / grad.median, 1),
    }

    # two trained end points for the curve and the density
    ends = descend(problem, starts[:2], optimizer="adam", learning_rate=0.01, steps=steps * 2)
    a, b = ends.final[0], ends.final[1]
    c_steps, samples = (20, 4) if quick else (300, 8)
    curve = Contender(
        "curved_path",
        lambda: curved_path(problem, a, b, steps=c_steps, samples=samples, resolution=101),
        repeats,
    )
    same_work = Contender(
        "descend, same gradient count",
        lambda: descend(problem, a, learning_rate=1e-9, steps=c_steps * samples, grad_tol=0.0),
        repeats,
    )
    race([curve, same_work])
    results["curved_path"] = {
        "steps": c_steps,
        "samples": samples,
        "curve": curve.summary(),
        "descend_same_gradients": same_work.summary(),
        "ratio": _ratio(curve, same_work),
    }
    probes, d_steps = (2, 10) if quick else (4, 60)
    dens = Contender(
        "hessian_density",
        lambda: hessian_density(problem, a, probes=probes, steps=d_steps),
        repeats,
    )
    same_hvps = Contender(
        "descend, one gradient per HVP",
        lambda: descend(problem, a, learning_rate=1e-9, steps=probes * d_steps, grad_tol=0.0),
        repeats,
    )
    race([dens, same_hvps])
    results["hessian_density"] = {
        "probes": probes,
        "steps": d_steps,
        "density": dens.summary(),
        "descend_same_count": same_hvps.summary(),
        "ratio": _ratio(dens, same_hvps),
    }
    results["load_average_end"] = load_average()
    return results


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="cost of the instruments (issue 14)")
    parser.add_argument("--quick", action="store_true", help="tiny sizes, one repeat")
    parser.add_argument("--out", type=Path, default=None, help="JSON file to write")
    args = parser.parse_args(argv)
    start = time.perf_counter()
    results = run_all(quick=args.quick)
    results["wall_seconds"] = round(time.perf_counter() - start, 1)
    out = args.out or OUT
    out.write_text(json.dumps(results, indent=2, sort_keys=True, default=float) + "\n")
    summary = {
        "sharpness (GD)": results["sharpness"]["gradient_descent"]["ratio"],
        "sharpness (Adam)": results["sharpness"]["adam"]["ratio"],
        "recorder": results["recorder"]["ratio"],
        "trajectory_plane (gradient calls)": results["trajectory_plane"]["gradient_calls"],
        "curved_path": results["curved_path"]["ratio"],
        "hessian_density": results["hessian_density"]["ratio"],
    }
    print(json.dumps(summary, indent=2))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

"""Benchmark: a basin map by ``python -m basinview run`` on 2 processes against 1.

``python -m benchmarks.distributed [--quick] [--resolution R] [--steps S]``
writes ``benchmarks/results_distributed.json``. The workload is the 2-16-1
tanh network of :mod:`benchmarks.workloads` (65 parameters, seeded synthetic
data) and a basin map of R x R grid starts on a random plane, S steps of
gradient descent each. Three runs of the same command, interleaved
``--repeats`` times (median kept):

* ``one``: one process with one CPU device (``JAX_NUM_CPU_DEVICES=1``);
* ``two``: two processes of one device each on 127.0.0.1 (jax.distributed, gloo);
* ``one_two_devices``: one process with two devices (for comparison);
* ``one_core`` and ``two_cores``: ``one`` and ``two`` with each process pinned
  to its own core (``os.sched_setaffinity``), as processes on separate
  machines would be: an unpinned process already spreads its work over both
  cores, so two unpinned processes on one 2-core machine compete for them.

Each run's time is the ``seconds`` its results file records (reading the
inputs, computing, gathering, writing; the JAX start-up and the joining of
the processes are reported apart as ``wall``). The results of all runs must
be identical. The JSON also holds the load average at start and end, the
per-start CPU cost and the bytes each start's runs add to the gather, which
``docs/distributed.md`` uses for its estimate at 1M starts on 16 machines.
"""

from __future__ import annotations

import argparse
import datetime as _dt
import json
import os
import platform
import socket
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
OUT = ROOT / "benchmarks" / "results_distributed.json"
MODULE = "from benchmarks.workloads import mlp_loss as loss  # noqa: F401\n"


def _port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _setup(folder: Path, rows: int) -> None:
    import basinview.core as bv
    from benchmarks.workloads import mlp_data, mlp_init, mlp_loss

    (folder / "bench_mlp.py").write_text(MODULE)
    data = mlp_data(rows)
    np.savez(folder / "data.npz", x=data.x, y=data.y)
    params = mlp_init(0)
    as_lists = {k: {n: v.tolist() for n, v in part.items()} for k, part in params.items()}
    (folder / "params.json").write_text(json.dumps(as_lists))
    problem = bv.Problem(mlp_loss, params, data.x, data.y, name="bench_mlp:loss")
    plane = bv.random_plane(problem, seed=0, normalise="filter")
    view = bv.ViewSpec(
        plane=plane, starts=bv.random_starts(problem, 2, scale=0.5, seed=0), span=1.0,
        resolution=5, learning_rate=0.05, steps=10,
    )  # fmt: skip
    bv.analyse(problem, view, minima=False, profile=False).settings.save(folder / "view.json")


def _command(out: str, resolution: int, steps: int) -> list[str]:
    return [
        sys.executable, "-m", "basinview", "run", "view.json", "--module", "bench_mlp:loss",
        "--params", "params.json", "--data", "data.npz", "--out", out, "--force",
        "--resolution", "5", "--steps", str(steps), "--basin-resolution", str(resolution),
    ]  # fmt: skip


def _pinned(command: list[str], core: int | None) -> list[str]:
    """``command`` (``python -m basinview ...``) started on one core when ``core`` is given.

    The child sets its own affinity before JAX starts (its threads inherit it); a
    ``preexec_fn`` would fork this process instead.
    """
    if core is None:
        return command
    start = (
        f"import os, runpy, sys; os.sched_setaffinity(0, {{{core}}}); "
        "sys.argv[0] = 'basinview'; runpy.run_module('basinview', run_name='__main__')"
    )
    return [command[0], "-c", start, *command[3:]]


def _run(folder: Path, kind: str, resolution: int, steps: int, tag: str) -> dict[str, Any]:
    out = f"{kind}-{tag}.npz"
    base = {**os.environ, "PYTHONPATH": str(ROOT)}
    base.pop("XLA_FLAGS", None)
    cores: list[int | None] = [None, None]
    if kind == "one_core":
        cores = [0]
    if kind == "two_cores":
        cores = [0, 1]
    if kind in ("two", "two_cores"):
        port = _port()
        envs = [
            {**base, "JAX_NUM_CPU_DEVICES": "1", "BASINVIEW_COORDINATOR": f"127.0.0.1:{port}",
             "BASINVIEW_PROCESS_COUNT": "2", "BASINVIEW_PROCESS_ID": str(p)}
            for p in (0, 1)
        ]  # fmt: skip
    else:
        envs = [{**base, "JAX_NUM_CPU_DEVICES": "2" if kind == "one_two_devices" else "1"}]
    cpu0 = os.times()
    t0 = time.perf_counter()
    command = _command(out, resolution, steps)
    pipes = {"stdout": subprocess.PIPE, "stderr": subprocess.PIPE, "text": True}
    procs = [
        subprocess.Popen(_pinned(command, core), cwd=folder, env=env, **pipes)
        for env, core in zip(envs, cores)
    ]
    for p in procs:
        _stdout, stderr = p.communicate(timeout=1800)
        if p.returncode:
            raise RuntimeError(f"{kind} failed ({p.returncode}): {stderr[-2000:]}")
    wall = time.perf_counter() - t0
    cpu1 = os.times()
    from basinview.core.results import results_header

    header = results_header(folder / out)
    return {
        "seconds": header["run"]["seconds"],
        "basin_map": header["run"]["stages"]["basin_map"],
        "stages": header["run"]["stages"],
        "wall": wall,
        "cpu": (cpu1.children_user - cpu0.children_user)
        + (cpu1.children_system - cpu0.children_system),
        "file": out,
    }


def _machine() -> dict[str, Any]:
    model = ""
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                model = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    return {"cpu": model, "cores": os.cpu_count(), "python": platform.python_version()}


def _same(folder: Path, files: list[str]) -> bool:
    with np.load(folder / files[0]) as first:
        ref = {k: first[k] for k in first.files if k != "header"}
    for name in files[1:]:
        with np.load(folder / name) as other:
            if sorted(other.files) != sorted([*ref, "header"]):
                return False
            for k, v in ref.items():
                if not np.array_equal(v, other[k], equal_nan=v.dtype.kind == "f"):
                    return False
    return True


def _gathered_bytes(folder: Path, name: str, starts: int) -> float:
    with np.load(folder / name) as npz:
        total = sum(npz[k].nbytes for k in npz.files if k.startswith("basin_map/runs/"))
    return total / starts


def estimate(
    measured: dict[str, Any],
    *,
    starts: int = 1_000_000,
    machines: int = 16,
    cores: int = 2,
    bandwidth: float = 1.25e9,
    efficiency: float | None = None,
) -> dict[str, Any]:
    """Seconds and bytes of a basin map of ``starts`` starts on ``machines`` machines.

    A simulation from this benchmark's measurements, not a run. Compute: the
    CPU seconds per start of the one-process run pinned to one core (its CPU
    time times the basin map's share of its wall time, over its starts: a
    core's worth of work, since an unpinned process spreads over both cores
    at less than twice the speed), spread over ``machines x cores`` devices at
    ``efficiency`` (default: the measured basin-map speed-up of two pinned
    processes over one, halved). Gather: the measured bytes per start, of
    which every process receives the others' share (``process_allgather``)
    over links of ``bandwidth`` bytes/s (10 Gbit/s Ethernet by default).
    Process 0 then finds the critical points at the measured seconds per run.
    Fixed: the CPU seconds a second process added to the run (start-up,
    compilation, collectives), paid once per process in parallel. Results
    written before the pinned runs existed use the unpinned runs and 0.95.
    """
    pinned = "one_core" in measured["seconds"]
    one, two = ("one_core", "two_cores") if pinned else ("one", "two")
    if efficiency is None:
        efficiency = measured["speedup_two_pinned_processes_basin_map"] / 2 if pinned else 0.95
    share = measured["basin_map_seconds"][one] / measured["seconds"][one]
    per_start = measured["cpu"][one] * share / measured["workload"]["starts"]
    devices = machines * cores
    compute = starts * per_start / (devices * efficiency)
    volume = starts * measured["gathered_bytes_per_start"]
    gather = volume * (machines - 1) / machines / bandwidth
    minima = starts * measured.get("minima_seconds_per_run", 0.0)
    fixed = max(measured["cpu"][two] - measured["cpu"][one], 0.0)
    return {
        "starts": starts,
        "machines": machines,
        "cores_per_machine": cores,
        "bandwidth_bytes_per_s": bandwidth,
        "efficiency": efficiency,
        "cpu_seconds_per_start": per_start,
        "compute_seconds": compute,
        "gathered_bytes": volume,
        "gather_seconds": gather,
        "minima_seconds_on_process_0": minima,
        "fixed_seconds": fixed,
        "total_seconds": fixed + compute + gather + minima,
        "one_machine_seconds": fixed + starts * per_start / (cores * efficiency) + minima,
        "memory_per_process_bytes": volume,
    }


def _minima_seconds_per_run(folder: Path, name: str, rows: int) -> float:
    """Seconds per run of finding the critical points of a results file's basin map."""
    import basinview.core as bv
    from benchmarks.workloads import mlp_data, mlp_init, mlp_loss

    data = mlp_data(rows)
    problem = bv.Problem(mlp_loss, mlp_init(0), data.x, data.y, name="bench_mlp:loss")
    runs = bv.load_results(folder / name).basin_map.runs
    bv.find_minima(problem, runs)  # compiles
    t0 = time.perf_counter()
    bv.find_minima(problem, runs)
    return (time.perf_counter() - t0) / len(runs)


def _estimates(result: dict[str, Any]) -> None:
    result["estimate_1m_starts_16_machines"] = estimate(result)
    result["estimate_1m_starts_16_machines_32_cores"] = estimate(result, cores=32)


def main(argv: list[str] | None = None) -> dict[str, Any]:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="tiny sizes (smoke run)")
    parser.add_argument("--resolution", type=int, default=40)
    parser.add_argument("--steps", type=int, default=300)
    parser.add_argument("--rows", type=int, default=500)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--out", default=str(OUT))
    parser.add_argument(
        "--estimate-only", action="store_true", help="recompute the estimates of --out"
    )
    args = parser.parse_args(argv)
    if args.estimate_only:
        result = json.loads(Path(args.out).read_text())
        _estimates(result)
        Path(args.out).write_text(json.dumps(result, indent=2) + "\n")
        return result
    if args.quick:
        args.resolution, args.steps, args.rows, args.repeats = 6, 20, 100, 1
    load_start = os.getloadavg()
    kinds = ("one", "two", "one_two_devices", "one_core", "two_cores")
    times: dict[str, list[dict[str, Any]]] = {k: [] for k in kinds}
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        _setup(folder, args.rows)
        for r in range(args.repeats):
            for kind in kinds:
                times[kind].append(_run(folder, kind, args.resolution, args.steps, str(r)))
        files = [t["file"] for k in kinds for t in times[k]]
        identical = _same(folder, files)
        starts = args.resolution**2
        per_start_bytes = _gathered_bytes(folder, files[0], starts)
        minima_per_run = _minima_seconds_per_run(folder, files[0], args.rows)
    load_end = os.getloadavg()

    def median(kind: str, key: str) -> float:
        return float(np.median([t[key] for t in times[kind]]))

    one, two = median("one", "seconds"), median("two", "seconds")
    result = {
        "date": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "machine": _machine(),
        "load_average_start": list(load_start),
        "load_average_end": list(load_end),
        "workload": {
            "loss": "2-16-1 tanh network, mean squared error (benchmarks.workloads.mlp_loss)",
            "rows": args.rows,
            "basin_resolution": args.resolution,
            "starts": starts,
            "steps": args.steps,
            "repeats": args.repeats,
        },
        "seconds": {k: median(k, "seconds") for k in kinds},
        "wall": {k: median(k, "wall") for k in kinds},
        "cpu": {k: median(k, "cpu") for k in kinds},
        "every_run": times,
        "basin_map_seconds": {k: median(k, "basin_map") for k in kinds},
        "speedup_two_processes": one / two,
        "speedup_two_processes_basin_map": median("one", "basin_map") / median("two", "basin_map"),
        "speedup_two_devices": one / median("one_two_devices", "seconds"),
        "speedup_two_pinned_processes": median("one_core", "seconds")
        / median("two_cores", "seconds"),
        "speedup_two_pinned_processes_basin_map": median("one_core", "basin_map")
        / median("two_cores", "basin_map"),
        "identical_results": identical,
        "per_start_cpu_seconds": median("one", "cpu") / starts,
        "per_start_seconds_one_device": one / starts,
        "gathered_bytes_per_start": per_start_bytes,
        "minima_seconds_per_run": minima_per_run,
        "goal": "two processes of one device >= 1.7x one process of one device",
    }
    _estimates(result)
    Path(args.out).write_text(json.dumps(result, indent=2) + "\n")
    print(json.dumps({k: result[k] for k in ("seconds", "basin_map_seconds",
                                             "speedup_two_processes_basin_map",
                                             "speedup_two_processes",
                                             "speedup_two_devices",
                                             "speedup_two_pinned_processes",
                                             "speedup_two_pinned_processes_basin_map",
                                             "identical_results",
                                             "load_average_start", "load_average_end")}, indent=2))  # fmt: skip
    return result


if __name__ == "__main__":
    main()

"""``python -m basinview run``: a recorded view at a larger size, on one or many processes.

``run SETTINGS.json --module MODULE:FUNCTION --params FILE [--data FILE.npz] --out RESULTS.npz``
rebuilds the view a :class:`~basinview.core.Settings` file records (saved from
the notebook), optionally larger (``--resolution``, ``--starts``, ``--steps``,
``--basin-resolution``), computes its surface, runs and basin map with the
batch axis split over every process of the run, and writes the results on
process 0 (:func:`~basinview.core.save_results`; read them back with
:func:`~basinview.core.load_results`).

Start it once per process with any launcher; each process reads its place
from ``BASINVIEW_COORDINATOR``, ``BASINVIEW_PROCESS_COUNT`` and
``BASINVIEW_PROCESS_ID`` or from SLURM (see :mod:`basinview.core.cluster`
and ``docs/distributed.md``). Every process must read the same files: the
settings (with the overrides) and the parameters and data are compared by
fingerprint before anything is computed.
"""

from __future__ import annotations

import argparse
import dataclasses
import os
import sys
import time
from pathlib import Path
from typing import Any

from ..core.errors import BasinviewError, ClusterError
from .inputs import CommandError, load_data, load_function, load_params

__all__ = ["EXIT_CLUSTER", "RUN_OPTIONS", "run_command"]

#: Exit code of a process that stops because another process failed or was lost.
EXIT_CLUSTER = 3

RUN_OPTIONS: tuple[tuple[str, dict[str, Any]], ...] = (
    ("settings", {"metavar": "SETTINGS.json", "help": "settings recorded in the notebook"}),
    (
        "--module",
        {"required": True, "metavar": "MODULE:FUNCTION", "help": "loss(params, *data)"},
    ),
    ("--params", {"required": True, "metavar": "FILE", "help": "parameters (.npz or .json)"}),
    ("--data", {"metavar": "FILE.npz", "help": "arrays passed to the loss after the params"}),
    ("--data-keys", {"metavar": "K1,K2", "help": "order of the data arrays (default: sorted)"}),
    ("--out", {"required": True, "metavar": "RESULTS.npz", "help": "results file (process 0)"}),
    ("--force", {"action": "store_true", "help": "replace an existing results file"}),
    ("--resolution", {"type": int, "help": "surface grid points per axis (default: recorded)"}),
    (
        "--starts",
        {"type": int, "help": "number of random or initialiser starts (default: recorded)"},
    ),
    ("--steps", {"type": int, "help": "step budget per run (default: recorded)"}),
    ("--basin-resolution", {"type": int, "default": 0, "help": "basin map grid; 0 skips (0)"}),
    ("--basin-rate", {"type": float, "help": "basin map learning rate (default: the lowest)"}),
    ("--devices", {"type": int, "help": "CPU devices per process (default: JAX's)"}),
)


def _view(problem: Any, settings: Any, args: argparse.Namespace) -> Any:
    """The recorded view with the command line's overrides (program sizes recomputed)."""
    from ..core import ViewSpec

    changes: dict[str, Any] = {}
    sizes = dict(settings.sizes)
    if args.resolution is not None:
        if args.resolution < 2:
            raise CommandError(f"--resolution must be at least 2; got {args.resolution}.")
        changes["resolution"] = (args.resolution, args.resolution)
        sizes = {k: v for k, v in sizes.items() if not k.startswith("surface_")}
    if args.steps is not None:
        if args.steps < 1:
            raise CommandError(f"--steps must be at least 1; got {args.steps}.")
        changes["steps"] = args.steps
    if args.starts is not None:
        kind = settings.starts.get("kind")
        if kind not in ("random", "initializer"):
            raise CommandError(
                f"--starts resizes random or initialiser starts; these settings hold {kind!r} "
                "starts. Record the view with random starts, or use --basin-resolution for a "
                "grid of starts."
            )
        if args.starts < 1:
            raise CommandError(f"--starts must be at least 1; got {args.starts}.")
        changes["starts"] = {**settings.starts, "count": args.starts}
    if "steps" in changes or "starts" in changes:
        sizes = {k: v for k, v in sizes.items() if not k.startswith("descent_")}
    settings = dataclasses.replace(settings, sizes=sizes, **changes)
    return settings, ViewSpec.from_settings(problem, settings)


def _prepare(args: argparse.Namespace, cluster: Any) -> tuple[Any, Any, str, str]:
    """Problem, view and the two fingerprints the processes compare."""
    from ..core import Problem, Settings
    from ..core.cluster import digest_of

    out = Path(args.out)
    if out.suffix.lower() != ".npz":
        raise CommandError(f"--out must end in .npz; got {args.out!r}.")
    if cluster.is_writer:
        if not out.parent.is_dir():
            raise CommandError(f"the folder of --out {args.out!r} does not exist; create it first.")
        if out.exists() and not args.force:
            raise CommandError(f"{args.out!r} exists; pass --force to replace it.")
    settings = Settings.load(args.settings)
    loss = load_function(args.module)
    params = load_params(args.params)
    if args.data_keys and not args.data:
        raise CommandError("--data-keys needs --data FILE.npz.")
    data = load_data(args.data, args.data_keys) if args.data else ()
    problem = Problem(loss, params, *data, name=settings.loss_name)
    settings, view = _view(problem, settings, args)
    overrides = (args.resolution, args.starts, args.steps, args.basin_resolution, args.basin_rate)
    return problem, view, digest_of(settings.to_json(), overrides), problem.fingerprint


def _compute(args: argparse.Namespace, cluster: Any) -> int:
    import jax

    from ..core import analyse_shared, save_results
    from ..core.cluster import agree, shared_cores_note

    started = time.perf_counter()
    error, prepared = "", None
    try:
        prepared = _prepare(args, cluster)
    except BasinviewError as exc:
        if cluster.process_count == 1:
            raise
        error = " ".join(str(exc).split())
    digest_settings = prepared[2] if prepared else ""
    agree(cluster, "reading the inputs", digest_settings, error, held="settings and overrides")
    assert prepared is not None
    problem, view, _, fingerprint = prepared
    agree(cluster, "comparing the inputs", fingerprint, held="parameters and data")
    note = shared_cores_note(cluster)
    if note and cluster.is_writer:
        print(f"basinview run: warning: {note}", file=sys.stderr, flush=True)
    tag = f"process {cluster.process_id} of {cluster.process_count}"
    print(f"basinview run: {tag}, {len(jax.local_devices())} device(s) here, "
          f"{len(jax.devices())} in all", flush=True)  # fmt: skip
    stages: dict[str, float] = {"prepare": round(time.perf_counter() - started, 4)}
    analysis = analyse_shared(
        problem, view, cluster, basin_resolution=args.basin_resolution,
        basin_rate=args.basin_rate, timings=stages,
    )  # fmt: skip
    error = ""
    if analysis is not None:  # process 0
        facts = {
            "processes": cluster.process_count,
            "devices": len(jax.devices()),
            "seconds": round(time.perf_counter() - started, 3),
            "stages": stages,
        }
        try:
            path = save_results(args.out, analysis, problem, run=facts)
            print(f"Results written to {path.resolve()}", flush=True)
        except BasinviewError as exc:
            if cluster.process_count == 1:
                raise
            error = " ".join(str(exc).split())
    agree(cluster, "writing the results", "", error)
    return 0


def run_command(args: argparse.Namespace) -> int:
    """The ``run`` subcommand (see the module docstring)."""
    from ..core import cluster_from_env, start_cluster, use_all_cores
    from ..core.cluster import barrier

    cluster = cluster_from_env()
    if args.devices is not None:
        if args.devices < 1:
            raise CommandError(f"--devices must be at least 1; got {args.devices}.")
        use_all_cores(args.devices)
    cluster = start_cluster(cluster)
    if cluster.process_count == 1:
        return _compute(args, cluster)
    try:
        # A first collective connects every pair of processes: from here on, a process
        # that exits is noticed by the others as soon as they wait for it.
        barrier(cluster, "joining the run")
        return _compute(args, cluster)
    except (BasinviewError, Exception) as exc:
        # Skip JAX's exit handlers: with a peer gone, its shutdown barrier aborts the
        # process after a long wait. The message is the whole story.
        kind = "error" if isinstance(exc, BasinviewError) else "internal error"
        text = " ".join(str(exc).split()) or type(exc).__name__
        print(f"basinview: {kind} (process {cluster.process_id}): {text}", file=sys.stderr)
        sys.stdout.flush()
        sys.stderr.flush()
        os._exit(EXIT_CLUSTER if isinstance(exc, ClusterError) else 2)

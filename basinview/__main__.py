"""Command line: ``python -m basinview demo``, ``report`` and ``run``.

``demo`` runs the embedded beacon scenario (see :mod:`basinview.scenarios`),
prints the analysis as text tables and writes a standalone HTML report.

``report MODULE:FUNCTION --params FILE`` does the same for your own loss
``FUNCTION(params, *data)`` defined in ``MODULE`` (imported from the current
folder or the Python path):

* ``--params`` a ``.npz`` file (each array becomes an entry of a dict of
  parameters) or a ``.json`` file (nested objects and lists of numbers;
  rectangular lists of numbers become arrays);
* ``--data`` a ``.npz`` file whose arrays are passed to the loss after the
  parameters, in the order of ``--data-keys`` or else in sorted key order
  (numbers inside keys compare as numbers: ``arr_2`` before ``arr_10``,
  which is the order ``numpy.savez(file, x, y)`` stores them in).

The slice is drawn on an axes plane (``--plane X,Y``, or the two
coordinates of a two-parameter model) or a random plane (``--normalise``
``filter``, ``layer`` or ``none``; ``--origin FILE`` centres it). Both
commands compute one :class:`~basinview.core.Analysis` with
:func:`~basinview.core.analyse`, print it and write it as a report.

``run SETTINGS.json --module MODULE:FUNCTION --params FILE --out RESULTS.npz``
computes a recorded view, optionally larger, on one or several processes
(see :mod:`basinview.cli.run` and ``docs/distributed.md``).

Bad input stops with a one-line message on stderr and exit code 2; the
report is written only to the ``--out`` path.
"""

from __future__ import annotations

import argparse
import sys
import traceback
from collections.abc import Sequence
from typing import Any

from .cli import (
    DEMO_OPTIONS,
    REPORT_OPTIONS,
    CommandError,
    build_parser,
    floats,
    load_data,
    load_function,
    load_params,
    plane_from_options,
    span_option,
)
from .cli.run import RUN_OPTIONS, run_command
from .core.errors import BasinviewError

__all__ = ["CommandError", "load_data", "load_params", "main"]

EXIT_BAD_INPUT = 2


def _print_tables(problem: Any, runs: Any, minima: Any, basin_map: Any = None) -> None:
    import numpy as np
    import pandas as pd

    table = runs.table
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
        if len(conv) and problem.size <= 12:
            ends = pd.DataFrame(runs.final[conv.index], columns=problem.labels).round(2)
            ends["final_loss"] = conv["final_loss"].to_numpy()
            found = ends.groupby(list(problem.labels)).agg(
                runs=("final_loss", "size"), loss=("final_loss", "min")
            )
            print("\nWhere converged runs ended (rounded):")
            print(found.reset_index().to_string(index=False))
        cols = ["point", "kind", "loss", "grad_norm", "runs", "share", "lambda_min", "lambda_max"]
        if problem.size <= 6:
            cols += list(problem.labels)
        if minima is not None and len(minima):
            print("\nCritical points found (stationary: grad_norm below tolerance):")
            print(minima.table[cols].to_string(index=False))
        # every letter the summary names is in a table: the basin map's points too
        if basin_map is not None and len(basin_map.minima):
            bm = basin_map.minima
            known = set(minima.labels) if minima is not None else set()
            extra = [i for i, lab in enumerate(bm.labels) if lab not in known]
            if extra:
                print("\nFurther critical points reached from the basin map's starts:")
                frame = bm.table.iloc[extra][cols].rename(columns={"runs": "starts"})
                print(frame.to_string(index=False))
    print(f"\n{int(np.sum(runs.status == 'diverged'))} of {len(runs)} runs diverged.")


def _finish(out: str, force: bool, analysis: Any, title: str, description: str) -> None:
    from .report import summary_lines, write_report

    path = write_report(out, analysis, overwrite=force, title=title, description=description)
    lines, caution = summary_lines(analysis)
    print("\nSummary:")
    for line in lines:
        print(f"  - {line}")
    print(f"  Caution: {caution}")
    print(f"\nReport written to {path.resolve()}")


def _demo(args: argparse.Namespace) -> int:
    from . import core
    from .report import check_report_path
    from .scenarios import beacon

    check_report_path(args.out, args.force)  # fail before computing anything
    sc = beacon()
    problem = sc.problem
    plane = core.axes_plane(problem, *sc.plane_axes, origin=sc.plane_origin)
    starts = core.random_starts(
        problem, args.starts, scale=4.0, seed=args.seed, center=sc.plane_origin
    )
    print(f"basinview demo: {sc.name}\n{sc.description}\n")
    view = core.ViewSpec(
        plane=plane,
        starts=starts,
        span=sc.span,
        resolution=sc.resolution,
        learning_rate=sc.learning_rates,
        steps=sc.steps,
    )
    analysis = core.analyse(problem, view, basin_resolution=41, basin_rate=0.2, sweep_rates=15)
    surface = analysis.surface
    a, b, low = surface.grid_minimum()
    x0 = plane.lift(a, b)
    print(
        f"Surface: {surface.loss.shape[1]} x {surface.loss.shape[0]} grid, lowest grid point "
        f"x={x0[0]:.3f}, y={x0[1]:.3f} (loss {low:.4g})."
    )
    _print_tables(problem, analysis.runs, analysis.minima, analysis.basin_map)
    _finish(args.out, args.force, analysis, f"basinview demo: {sc.name}", sc.description)
    return 0


def _report(args: argparse.Namespace) -> int:
    import numpy as np

    from . import core
    from .report import check_report_path

    check_report_path(args.out, args.force)
    loss = load_function(args.function)
    params = load_params(args.params)
    data = load_data(args.data, args.data_keys) if args.data else ()
    if args.data_keys and not args.data:
        raise CommandError("--data-keys needs --data FILE.npz.")
    problem = core.Problem(loss, params, *data, name=args.function)
    if problem.size < 2:
        raise CommandError("the report needs at least two parameters to draw a plane.")
    plane, note = plane_from_options(problem, args)
    span = span_option(args.span)
    rates = floats(args.learning_rate, "--learning-rate")
    for name, value, low in (
        ("--steps", args.steps, 1),
        ("--starts", args.starts, 1),
        ("--resolution", args.resolution, 2),
    ):
        if value < low:
            raise CommandError(f"{name} must be at least {low}; got {value}.")
    (a0, a1), (b0, b1) = core.span_ranges(span, plane.centre)
    draws = np.random.default_rng(args.seed).uniform(0.1, 0.9, size=(args.starts, 2))
    starts = core.explicit_starts(
        problem, plane.lift(a0 + draws[:, 0] * (a1 - a0), b0 + draws[:, 1] * (b1 - b0))
    )
    print(
        f"basinview report: {problem!r}, labels {list(problem.labels)[:8]}"
        f"{' ...' if problem.size > 8 else ''}"
    )
    if note:
        print(f"Note: {note}")
    view = core.ViewSpec(
        plane=plane,
        starts=starts,
        span=span,
        resolution=args.resolution,
        optimizer=args.optimizer,
        learning_rate=rates,
        steps=args.steps,
    )
    analysis = core.analyse(
        problem,
        view,
        basin_resolution=args.basin_resolution,
        basin_rate=min(rates),
        sweep_rates=args.sweep_rates,
    )
    _print_tables(problem, analysis.runs, analysis.minima, analysis.basin_map)
    title = args.title or f"basinview report: {args.function}"
    _finish(args.out, args.force, analysis, title, note and f"Plane: {note}")
    return 0


def _parser() -> argparse.ArgumentParser:
    return build_parser(
        __doc__.splitlines()[0],
        (
            ("demo", DEMO_OPTIONS, _demo, "run the embedded demo scenario and write a report"),
            ("report", REPORT_OPTIONS, _report, "analyse your own loss and write a report"),
            ("run", RUN_OPTIONS, run_command, "compute a recorded view at scale; write results"),
        ),
    )


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit code (2 for bad input)."""
    args = _parser().parse_args(argv)
    try:
        return int(args.func(args))
    except BasinviewError as exc:
        print(f"basinview: error: {' '.join(str(exc).split())}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        print("basinview: interrupted", file=sys.stderr)
        return 130
    except Exception as exc:
        if args.traceback:
            traceback.print_exc()
        else:
            print(
                f"basinview: internal error: {type(exc).__name__}: {' '.join(str(exc).split())} "
                "(rerun with --traceback for details)",
                file=sys.stderr,
            )
        return 1


if __name__ == "__main__":
    sys.exit(main())

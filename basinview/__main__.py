"""Command line: ``python -m basinview demo`` and ``python -m basinview report``.

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

Bad input stops with a one-line message on stderr and exit code 2; the
report is written only to the ``--out`` path.
"""

from __future__ import annotations

import argparse
import importlib
import json
import os
import re
import sys
import traceback
import zipfile
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from .core.errors import BasinviewError

__all__ = ["CommandError", "load_data", "load_params", "main"]

EXIT_BAD_INPUT = 2


class CommandError(BasinviewError):
    """Bad command-line input (file, module, option)."""


# ----------------------------------------------------------------- inputs


def _existing(path: str, what: str, suffixes: tuple[str, ...]) -> Path:
    p = Path(path)
    if p.suffix.lower() not in suffixes:
        raise CommandError(
            f"{what} {path!r} must be a {' or '.join(suffixes)} file; got suffix {p.suffix!r}."
        )
    if not p.exists():
        raise CommandError(
            f"{what} file {path!r} does not exist; check the path (relative to the current "
            f"folder {os.getcwd()})."
        )
    if not p.is_file():
        raise CommandError(f"{what} {path!r} is not a file; give the path of a {suffixes[0]} file.")
    return p


def _read_npz(p: Path, what: str) -> dict[str, Any]:
    import numpy as np

    if not zipfile.is_zipfile(p):
        raise CommandError(
            f"{what} {str(p)!r} is not a .npz archive; write it with numpy.savez(path, name=array)."
        )
    try:
        with np.load(p, allow_pickle=False) as npz:
            return {key: np.asarray(npz[key]) for key in npz.files}
    except ValueError as exc:
        if "pickle" in str(exc):
            raise CommandError(
                f"{what} {str(p)!r} holds object (pickled) arrays, which basinview does not load; "
                "save plain numeric arrays with numpy.savez."
            ) from None
        raise CommandError(f"cannot read {what} {str(p)!r} as .npz: {exc}") from None
    except (OSError, EOFError, zipfile.BadZipFile) as exc:
        raise CommandError(
            f"cannot read {what} {str(p)!r} as .npz ({exc}); write it with numpy.savez."
        ) from None


def _from_json(value: Any, where: str) -> Any:
    import numpy as np

    if isinstance(value, bool) or value is None or isinstance(value, str):
        raise CommandError(
            f"parameter {where} is {json.dumps(value)}; parameters must be numbers, lists of "
            "numbers or objects of them."
        )
    if isinstance(value, (int, float)):
        return float(value)
    if isinstance(value, dict):
        if not value:
            raise CommandError(f"parameter {where} is an empty object.")
        return {k: _from_json(v, f"{where}.{k}" if where else k) for k, v in value.items()}
    if isinstance(value, list):
        if not value:
            raise CommandError(f"parameter {where or 'list'} is an empty list.")
        if all(isinstance(v, (int, float, list)) and not isinstance(v, bool) for v in value):
            try:
                arr = np.asarray(value, dtype=np.float64)
            except ValueError:
                arr = None  # ragged: a list of separate leaves
            if arr is not None:
                return arr
        return [_from_json(v, f"{where}[{i}]") for i, v in enumerate(value)]
    raise CommandError(f"parameter {where} has an unsupported type {type(value).__name__}.")


def load_params(path: str) -> Any:
    """Parameters from a ``.npz`` (dict of arrays) or ``.json`` (nested numbers) file."""
    p = _existing(path, "params", (".npz", ".json"))
    if p.suffix.lower() == ".npz":
        params = _read_npz(p, "params file")
        if not params:
            raise CommandError(
                f"params file {path!r} holds no arrays; save them with numpy.savez(file, w=..., b=...)."
            )
        return params
    try:
        raw = json.loads(p.read_text(encoding="utf-8"))
    except UnicodeDecodeError:
        raise CommandError(f"params file {path!r} is not UTF-8 text.") from None
    except json.JSONDecodeError as exc:
        raise CommandError(
            f"params file {path!r} is not valid JSON (line {exc.lineno}, column {exc.colno}: "
            f"{exc.msg}); fix the file or write it with json.dump(params, file)."
        ) from None
    return _from_json(raw, "")


def _natural(key: str) -> list[Any]:
    return [int(t) if t.isdigit() else t for t in re.split(r"(\d+)", key)]


def load_data(path: str, keys: str | None = None) -> tuple[Any, ...]:
    """Data arrays from a ``.npz`` file, in the order of ``keys`` (comma-separated) or sorted."""
    p = _existing(path, "data", (".npz",))
    arrays = _read_npz(p, "data file")
    if not arrays:
        raise CommandError(
            f"data file {path!r} holds no arrays; save them with numpy.savez(file, x=..., y=...)."
        )
    if keys is None:
        order = sorted(arrays, key=_natural)
    else:
        order = [k.strip() for k in keys.split(",") if k.strip()]
        missing = [k for k in order if k not in arrays]
        if missing or not order:
            raise CommandError(
                f"--data-keys names {missing or 'nothing'}, not in {path!r}; its arrays are "
                f"{sorted(arrays, key=_natural)}."
            )
    return tuple(arrays[k] for k in order)


def load_function(spec: str) -> Any:
    """The callable ``FUNCTION`` of ``MODULE:FUNCTION``, importing MODULE from the current folder."""
    match = re.fullmatch(r"([A-Za-z_][\w.]*):([A-Za-z_][\w.]*)", spec)
    if not match:
        raise CommandError(f"expected MODULE:FUNCTION (e.g. mymodel:loss); got {spec!r}.")
    module_name, attr = match.groups()
    cwd = os.getcwd()
    added = cwd not in sys.path and "" not in sys.path
    if added:
        sys.path.insert(0, cwd)
    # The report writes only --out: importing the user's module must not leave
    # __pycache__ behind in their folder.
    bytecode, sys.dont_write_bytecode = sys.dont_write_bytecode, True
    try:
        module = importlib.import_module(module_name)
    except ModuleNotFoundError as exc:
        if exc.name and module_name.startswith(exc.name):
            raise CommandError(
                f"cannot find module {module_name!r} in the current folder ({cwd}) or on the "
                "Python path; run from the folder that holds it."
            ) from None
        raise CommandError(
            f"importing {module_name!r} failed: it needs the module {exc.name!r}, which is not "
            "installed."
        ) from None
    except Exception as exc:  # the user's module raised while importing
        raise CommandError(
            f"importing {module_name!r} raised {type(exc).__name__}: {exc}"
        ) from None
    finally:
        sys.dont_write_bytecode = bytecode
        if added:
            sys.path.remove(cwd)
    target: Any = module
    for part in attr.split("."):
        if not hasattr(target, part):
            names = sorted(
                n
                for n in dir(module)
                if callable(getattr(module, n, None)) and not n.startswith("_")
            )
            raise CommandError(
                f"module {module_name!r} has no {attr!r}; callables it defines: {names[:12]}."
            )
        target = getattr(target, part)
    if not callable(target):
        raise CommandError(
            f"{spec!r} is a {type(target).__name__}, not a function; name a function "
            "loss(params, *data) as MODULE:FUNCTION."
        )
    return target


def _floats(text: str, what: str) -> list[float]:
    try:
        values = [float(t) for t in text.split(",") if t.strip()]
    except ValueError:
        raise CommandError(f"{what} must be numbers separated by commas; got {text!r}.") from None
    if not values:
        raise CommandError(f"{what} is empty.")
    return values


def _span(text: str) -> Any:
    v = _floats(text, "--span")
    if len(v) == 1:
        return v[0]
    if len(v) == 2:
        return (v[0], v[1])
    if len(v) == 4:
        return ((v[0], v[1]), (v[2], v[3]))
    raise CommandError(f"--span takes 1 (s), 2 (sa,sb) or 4 (a0,a1,b0,b1) numbers; got {text!r}.")


# --------------------------------------------------------------- analysis


def _analyse(
    problem: Any,
    plane: Any,
    *,
    span: Any,
    resolution: int,
    starts: Any,
    learning_rates: list[float],
    optimizer: str,
    steps: int,
    basin_resolution: int,
    basin_rate: float,
    sweep_count: int,
) -> dict[str, Any]:
    """Everything the report shows, computed with the core engine."""
    import numpy as np

    from . import core

    surface = core.evaluate_surface(problem, plane, span=span, resolution=resolution)
    runs = core.descend(
        problem, starts, optimizer=optimizer, learning_rate=learning_rates, steps=steps, plane=plane
    )
    minima = core.find_minima(problem, runs)
    results: dict[str, Any] = {"surface": surface, "runs": runs, "minima": minima}
    if basin_resolution:
        results["basin_map"] = core.basin_map(
            problem,
            plane,
            span=span,
            resolution=basin_resolution,
            optimizer=optimizer,
            learning_rate=basin_rate,
            steps=steps,
        )
    if sweep_count:
        at = minima.points[0] if len(minima) else problem.theta0
        lam = core.hessian_spectrum(problem, at, k=1).lambda_max
        bound = core.stability_bound(core.get_rule(optimizer).name, lam, {})
        centre = bound if bound else float(np.median(learning_rates))
        rates = np.geomspace(centre / 30, centre * 3, sweep_count)
        results["sweep"] = core.step_size_sweep(
            problem, starts, learning_rates=rates, optimizer=optimizer, steps=steps
        )
    lows = [i for i in range(len(minima)) if minima.kind[i] == "minimum"]
    if len(lows) >= 2:
        i, j = lows[0], lows[1]
        results["profile"] = core.segment_profile(problem, minima.points[i], minima.points[j])
        results["profile_labels"] = (minima.labels[i], minima.labels[j])
    results["settings"] = core.record_settings(
        problem, plane=plane, span=span, resolution=resolution, starts=starts, runs=runs
    )
    return results


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
        if len(minima):
            print("\nCritical points found (stationary: grad_norm below tolerance):")
            print(minima.table[cols].to_string(index=False))
        # every letter the summary names is in a table: the basin map's points too
        if basin_map is not None and len(basin_map.minima):
            bm = basin_map.minima
            extra = [i for i, lab in enumerate(bm.labels) if lab not in set(minima.labels)]
            if extra:
                print("\nFurther critical points reached from the basin map's starts:")
                frame = bm.table.iloc[extra][cols].rename(columns={"runs": "starts"})
                print(frame.to_string(index=False))
    print(f"\n{int(np.sum(runs.status == 'diverged'))} of {len(runs)} runs diverged.")


def _finish(out: str, force: bool, results: dict[str, Any], title: str, description: str) -> None:
    from .report import summary_lines, write_report

    path = write_report(out, overwrite=force, title=title, description=description, **results)
    lines, caution = summary_lines(
        **{
            k: results.get(k)
            for k in ("surface", "runs", "minima", "basin_map", "sweep", "profile")
        }
    )
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
    results = _analyse(
        problem,
        plane,
        span=sc.span,
        resolution=sc.resolution,
        starts=starts,
        learning_rates=list(sc.learning_rates),
        optimizer="gradient_descent",
        steps=sc.steps,
        basin_resolution=41,
        basin_rate=0.2,
        sweep_count=15,
    )
    surface = results["surface"]
    a, b, low = surface.grid_minimum()
    x0 = plane.lift(a, b)
    print(
        f"Surface: {surface.loss.shape[1]} x {surface.loss.shape[0]} grid, lowest grid point "
        f"x={x0[0]:.3f}, y={x0[1]:.3f} (loss {low:.4g})."
    )
    _print_tables(problem, results["runs"], results["minima"], results.get("basin_map"))
    _finish(args.out, args.force, results, f"basinview demo: {sc.name}", sc.description)
    return 0


def _report(args: argparse.Namespace) -> int:
    import numpy as np

    from . import core
    from .core.surface import span_ranges
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
    if args.plane:
        names = [s.strip() for s in args.plane.split(",")]
        if len(names) != 2:
            raise CommandError(
                f"--plane takes two parameter labels, e.g. --plane w[0],b; got {args.plane!r}."
            )
        plane = core.axes_plane(problem, *names)
    elif problem.size == 2:
        plane = core.axes_plane(problem, *problem.labels)
    else:
        plane = core.random_plane(problem, seed=args.seed)
    span = _span(args.span)
    rates = _floats(args.learning_rate, "--learning-rate")
    for name, value, low in (
        ("--steps", args.steps, 1),
        ("--starts", args.starts, 1),
        ("--resolution", args.resolution, 2),
    ):
        if value < low:
            raise CommandError(f"{name} must be at least {low}; got {value}.")
    (a0, a1), (b0, b1) = span_ranges(span)
    draws = np.random.default_rng(args.seed).uniform(0.1, 0.9, size=(args.starts, 2))
    starts = core.explicit_starts(
        problem, plane.lift(a0 + draws[:, 0] * (a1 - a0), b0 + draws[:, 1] * (b1 - b0))
    )
    print(
        f"basinview report: {problem!r}, labels {list(problem.labels)[:8]}"
        f"{' ...' if problem.size > 8 else ''}"
    )
    results = _analyse(
        problem,
        plane,
        span=span,
        resolution=args.resolution,
        starts=starts,
        learning_rates=rates,
        optimizer=args.optimizer,
        steps=args.steps,
        basin_resolution=args.basin_resolution,
        basin_rate=min(rates),
        sweep_count=args.sweep_rates,
    )
    _print_tables(problem, results["runs"], results["minima"], results.get("basin_map"))
    _finish(args.out, args.force, results, args.title or f"basinview report: {args.function}", "")
    return 0


_FORCE = ("--force", {"action": "store_true", "help": "replace a file that is not a report"})
_DEMO_OPTIONS: tuple[tuple[str, dict[str, Any]], ...] = (
    ("--starts", {"type": int, "default": 12, "help": "random starts (default 12)"}),
    ("--seed", {"type": int, "default": 0, "help": "seed of the starts (default 0)"}),
    ("--out", {"default": "basinview-demo.html", "help": "report file (./basinview-demo.html)"}),
    _FORCE,
)
_REPORT_OPTIONS: tuple[tuple[str, dict[str, Any]], ...] = (
    ("function", {"metavar": "MODULE:FUNCTION", "help": "loss(params, *data) to analyse"}),
    ("--params", {"required": True, "metavar": "FILE", "help": "parameters (.npz or .json)"}),
    ("--data", {"metavar": "FILE.npz", "help": "arrays passed to the loss after the params"}),
    ("--data-keys", {"metavar": "K1,K2", "help": "order of the data arrays (default: sorted)"}),
    (
        "--out",
        {"default": "basinview-report.html", "help": "report file (./basinview-report.html)"},
    ),
    _FORCE,
    ("--plane", {"metavar": "X,Y", "help": "two parameter labels (default: a random plane)"}),
    ("--span", {"default": "1", "help": "half-width s, 'sa,sb' or 'a0,a1,b0,b1' (default 1)"}),
    ("--resolution", {"type": int, "default": 61, "help": "grid points per axis (default 61)"}),
    ("--learning-rate", {"default": "0.01", "help": "rate(s), comma-separated (default 0.01)"}),
    ("--optimizer", {"default": "gradient_descent", "help": "update rule (gradient_descent)"}),
    ("--steps", {"type": int, "default": 500, "help": "step budget per run (default 500)"}),
    ("--starts", {"type": int, "default": 12, "help": "random starts on the plane (default 12)"}),
    ("--seed", {"type": int, "default": 0, "help": "seed of the plane and starts (default 0)"}),
    ("--basin-resolution", {"type": int, "default": 21, "help": "basin grid; 0 skips (21)"}),
    ("--sweep-rates", {"type": int, "default": 12, "help": "rates in the sweep; 0 skips (12)"}),
    ("--title", {"help": "report title"}),
)


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="basinview", description=__doc__.splitlines()[0])
    parser.add_argument("--traceback", action="store_true", help="show internal tracebacks")
    sub = parser.add_subparsers(dest="command", required=True)
    for name, options, func, text in (
        ("demo", _DEMO_OPTIONS, _demo, "run the embedded demo scenario and write a report"),
        ("report", _REPORT_OPTIONS, _report, "analyse your own loss and write a report"),
    ):
        command = sub.add_parser(name, help=text)
        for flag, kwargs in options:
            command.add_argument(flag, **kwargs)
        command.set_defaults(func=func)
    return parser


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

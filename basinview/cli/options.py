"""The command line's options, and the plane and starts they describe.

``report`` draws the slice on an axes plane (``--plane X,Y``, or both
coordinates of a two-parameter model) or on a random plane whose directions
are scaled by ``--normalise`` (``filter``, ``layer`` or ``none``). Without
``--normalise`` the plane is filter-normalised; where the starting weights
make that impossible (all zero, say) it falls back to raw Gaussian
directions and says so. ``--origin FILE`` centres the plane (and the
starts) at other parameters than ``--params``.
"""

from __future__ import annotations

import argparse
from collections.abc import Callable, Sequence
from typing import Any

from ..core.errors import ParameterError
from ..core.planes import NORMALISATIONS, Plane, axes_plane, random_plane
from ..core.problem import Problem
from .inputs import CommandError, load_params

__all__ = ["DEMO_OPTIONS", "REPORT_OPTIONS", "build_parser", "plane_from_options"]

Option = tuple[str, dict[str, Any]]

_FORCE: Option = (
    "--force",
    {"action": "store_true", "help": "replace a file that is not a report"},
)
DEMO_OPTIONS: tuple[Option, ...] = (
    ("--starts", {"type": int, "default": 12, "help": "random starts (default 12)"}),
    ("--seed", {"type": int, "default": 0, "help": "seed of the starts (default 0)"}),
    ("--out", {"default": "basinview-demo.html", "help": "report file (./basinview-demo.html)"}),
    _FORCE,
)
REPORT_OPTIONS: tuple[Option, ...] = (
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
    (
        "--normalise",
        {
            "choices": NORMALISATIONS,
            "help": "scaling of a random plane's directions: filter (default; falls back to "
            "none where the weights are zero), layer or none",
        },
    ),
    (
        "--origin",
        {
            "metavar": "FILE",
            "help": "centre of the plane and the starts, shaped like --params (default: --params)",
        },
    ),
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

Command = tuple[str, Sequence[Option], Callable[[argparse.Namespace], int], str]


def build_parser(description: str, commands: Sequence[Command]) -> argparse.ArgumentParser:
    """The ``basinview`` parser with one sub-command per entry of ``commands``."""
    parser = argparse.ArgumentParser(prog="basinview", description=description)
    parser.add_argument("--traceback", action="store_true", help="show internal tracebacks")
    sub = parser.add_subparsers(dest="command", required=True)
    for name, options, func, text in commands:
        command = sub.add_parser(name, help=text)
        for flag, kwargs in options:
            command.add_argument(flag, **kwargs)
        command.set_defaults(func=func)
    return parser


def plane_from_options(problem: Problem, args: argparse.Namespace) -> tuple[Plane, str]:
    """The plane ``--plane``, ``--normalise``, ``--origin`` and ``--seed`` describe.

    Returns:
        ``(plane, note)``: the note is empty unless the default filter-normalised
        plane was replaced by raw directions, and then says why.
    """
    origin = None
    if args.origin:
        origin = load_params(args.origin)
        problem.flatten(origin, what="plane origin (--origin)")
    if args.plane:
        if args.normalise:
            raise CommandError(
                f"--normalise {args.normalise} scales a random plane's directions; --plane "
                f"{args.plane} is an axes plane. Drop one of the two options."
            )
        names = [s.strip() for s in args.plane.split(",")]
        if len(names) != 2:
            raise CommandError(
                f"--plane takes two parameter labels, e.g. --plane w[0],b; got {args.plane!r}."
            )
        return axes_plane(problem, *names, origin=origin), ""
    if problem.size == 2 and not args.normalise:
        return axes_plane(problem, *problem.labels, origin=origin), ""
    normalise = args.normalise or "filter"
    try:
        return random_plane(problem, seed=args.seed, normalise=normalise, origin=origin), ""
    except ParameterError as exc:
        if args.normalise:
            raise CommandError(
                f"--normalise {normalise}: {exc} On the command line: --normalise none, or "
                "--origin FILE with non-zero weights."
            ) from None
        reason = str(exc).split(", so ")[0].split(" Use normalise=")[0]
    plane = random_plane(problem, seed=args.seed, normalise="none", origin=origin)
    note = (
        f"the default filter-normalised random plane cannot be drawn here ({reason}); the "
        "plane uses raw Gaussian directions instead (--normalise none), so distances on it are "
        "not scaled to the weights. Choose with --normalise filter|layer|none, or centre the "
        "plane elsewhere with --origin FILE."
    )
    return plane, note

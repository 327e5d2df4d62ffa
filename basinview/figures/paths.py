"""Which descent runs to draw, in which colour, and with how many points.

Runs are drawn in groups (one trace per group, paths separated by NaN
gaps), so a figure with hundreds of runs has a handful of traces and builds
quickly. Groups are by the minimum a run reached, by learning rate, or by
start; runs that diverged always form their own grey, dashed group.

Colouring by minimum reads each point's letter and colour index from the
:class:`~basinview.core.Minima` (the problem's registry), so a point has
the same letter and colour in every figure. Runs that reached no point are
drawn by outcome, with the names of :data:`basinview.core.OUTCOMES`
(``max_steps``, ``not stationary``, ``diverged``).
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..core.descent import Runs
from ..core.errors import ParameterError
from ..core.minima import DIVERGED_LABEL, MAX_STEPS_LABEL, NOT_STATIONARY_LABEL
from ..core.runs import oscillation_measures
from .style import (
    DISTINCT_COLOURS,
    DIVERGED,
    LEGEND_LIMIT,
    MAX_STEPS,
    NOT_STATIONARY,
    category_colour,
    colour_round,
)
from .text import significant

__all__ = [
    "COLOR_BY",
    "CYCLE_SYMBOLS",
    "OUTCOME_KEYS",
    "PathGroup",
    "colour_note",
    "draw_indices",
    "group_runs",
    "legend_groups",
    "legend_summary",
    "percent",
    "select_runs",
    "settled",
    "stack_paths",
]

COLOR_BY = ("auto", "minimum", "solution", "scheme", "learning_rate", "start", "status")

#: Group keys of runs that reached no critical point (one per outcome label).
OUTCOME_KEYS = ("max_steps", "not-stationary", "diverged")

#: End-marker shapes of the first, second, ... round of the 21 distinct category colours.
CYCLE_SYMBOLS = ("circle", "square", "diamond", "triangle-up", "pentagon")


def colour_note(groups: list[PathGroup]) -> str:
    """A note for figures where groups share a colour (empty otherwise).

    Points keep their registry colour, so two points can share one (the 1st
    and 22nd registered, say) even when few are drawn.
    """
    cats = [g for g in groups if g.key not in OUTCOME_KEYS]
    colours = len({g.colour for g in cats})
    if colours == len(cats):
        return ""
    return (
        f"{len(cats)} groups share {colours} colours: after every {DISTINCT_COLOURS} the "
        "end-marker shape changes (circle, square, diamond, ...); hover or the legend tells "
        "them apart."
    )


def settled(runs: Runs, members: np.ndarray) -> np.ndarray:
    """Which of ``members`` converged without oscillating (drawn bold; the rest faint).

    A run counts as oscillating by the measure of the runs table
    (:func:`~basinview.core.runs.oscillation_measures`: the loss alternates up
    and down, or successive gradients point against each other, in at least
    half the steps of the run's later half).
    """
    members = np.asarray(members, dtype=int)
    status = np.asarray(runs.status)[members]
    out = status == "converged"
    for i in np.flatnonzero(out):
        r = int(members[i])
        alt, rev = oscillation_measures(runs.losses[r], runs.cosines[r], int(runs.stop_step[r]))
        out[i] = max(alt, rev) < 0.5
    return out


def legend_groups(groups: list[PathGroup], limit: int = LEGEND_LIMIT) -> set[str]:
    """Keys of the groups the legend names: the ``limit`` largest categories and every outcome.

    Outcome groups (``max_steps``, ``not stationary``, ``diverged``) are always
    named; of the others the largest (most runs before any cap; ties in
    drawing order) are named, the rest summed up by :func:`legend_summary`.
    """
    if isinstance(limit, bool) or not isinstance(limit, (int, np.integer)) or limit < 1:
        raise ParameterError(f"legend_limit must be a positive integer; got {limit!r}.")
    cats = [g for g in groups if g.key not in OUTCOME_KEYS]
    order = sorted(range(len(cats)), key=lambda i: -cats[i].total)
    # one line summing up a single group saves nothing: name it instead
    keep = {cats[i].key for i in order[: limit + 1 if len(cats) == limit + 1 else limit]}
    return keep | {g.key for g in groups if g.key in OUTCOME_KEYS}


def legend_summary(
    rest: int, share: float | None, *, noun: str = "groups", of: str = "runs"
) -> str:
    """The legend line standing for groups the legend does not name.

    ``noun`` is plural; one group drops its final "s".

    Examples:
        >>> legend_summary(17, 0.3123, noun="basins", of="starts")
        '+ 17 more basins (31% of starts)'
        >>> legend_summary(1, 0.004)
        '+ 1 more group (<1% of runs)'
    """
    word = noun[:-1] if rest == 1 and noun.endswith("s") else noun
    if share is None:
        return f"+ {rest} more {word}"
    return f"+ {rest} more {word} ({percent(share)} of {of})"


def percent(share: float) -> str:
    """A share as a percentage for legends: whole percents, ``<1%`` for small non-zero shares.

    Examples:
        >>> percent(0.3123), percent(0.004), percent(0.0), percent(0.9996)
        ('31%', '<1%', '0%', '>99%')
    """
    pct = 100 * float(share)
    if 0 < pct < 0.5:
        return "<1%"
    if 99.5 <= pct < 100:
        return ">99%"
    return f"{pct:.0f}%"


@dataclass(frozen=True)
class PathGroup:
    """Runs drawn alike.

    Attributes:
        key: short stable id used in trace uids (``"m0"`` for the point with colour
            index 0, ``"lr1"``, ``"max_steps"``, ``"not-stationary"``, ``"diverged"``).
        name: legend text.
        colour, dash, end_symbol: line colour, dash style and end-marker symbol.
        runs: indices of the runs of this group that are drawn.
        total: runs in the group before the cap on drawn paths.
    """

    key: str
    name: str
    colour: str
    dash: str
    end_symbol: str
    runs: np.ndarray
    total: int


def _candidates(runs: Runs, which: Any) -> np.ndarray:
    n = len(runs)
    if which is None:
        return np.arange(n)
    arr = np.asarray(list(which) if isinstance(which, Iterable) else which)
    if arr.dtype == bool:
        if arr.shape != (n,):
            raise ParameterError(
                f"a boolean `which` needs one entry per run ({n}); got {arr.shape}."
            )
        return np.flatnonzero(arr)
    if arr.size == 0:
        raise ParameterError("`which` selects no runs; pass None to draw all runs.")
    if not np.issubdtype(arr.dtype, np.integer) or arr.min() < 0 or arr.max() >= n:
        raise ParameterError(
            f"`which` must hold run indices from 0 to {n - 1}; got {arr.tolist()}."
        )
    return np.unique(arr)


def _fmt(x: float) -> str:
    return significant(x, 3)


def group_runs(
    runs: Runs,
    *,
    minima: Any = None,
    color_by: str = "auto",
    which: Any = None,
    solutions: Any = None,
) -> list[PathGroup]:
    """Group runs for drawing (before any cap on their number).

    Args:
        runs: the runs.
        minima: optional :class:`~basinview.core.minima.Minima` of these runs;
            its ``assignment`` gives each run's minimum.
        color_by: ``"minimum"`` (needs ``minima``), ``"solution"`` (needs
            ``solutions``: groups by connectivity, named ``S1``, ``S2``, ...),
            ``"scheme"`` (the runs' initialisation scheme, colours in the
            order the schemes were given, as in the scheme figures),
            ``"learning_rate"``, ``"start"``, ``"status"``, or ``"auto"``
            (solution when ``solutions`` is given, else minimum when
            ``minima`` is given and some drawn run reached one, else learning
            rate when there are several, else start).
        which: run indices or a boolean mask of runs to draw (default all).
        solutions: optional :class:`~basinview.core.Solutions` of these runs
            (:func:`~basinview.core.connect_runs`); its ``label`` gives each
            run's group.
    """
    if color_by not in COLOR_BY:
        raise ParameterError(f"color_by must be one of {COLOR_BY}; got {color_by!r}.")
    idx = _candidates(runs, which)
    lrs = runs.hyper.get("learning_rate", np.zeros(len(runs)))
    if color_by == "auto" and solutions is not None:
        color_by = "solution"
    if color_by == "auto":
        reached = minima is not None and np.any(np.asarray(minima.assignment)[idx] >= 0)
        if reached:
            color_by = "minimum"
        elif len(np.unique(lrs)) > 1:
            color_by = "learning_rate"
        else:
            color_by = "start"
    if color_by == "minimum" and minima is None:
        raise ParameterError("color_by='minimum' needs minima=find_minima(problem, runs).")
    if color_by == "solution" and solutions is None:
        raise ParameterError("color_by='solution' needs solutions=connect_runs(problem, runs).")
    if color_by == "scheme" and runs.scheme is None:
        raise ParameterError(
            "color_by='scheme' needs runs from named start sets (descend(problem, "
            "{'name': starts, ...}) or scheme_starts)."
        )
    status = np.asarray(runs.status)
    diverged = idx[status[idx] == "diverged"]
    rest = idx[status[idx] != "diverged"]
    groups: list[PathGroup] = []

    def add(key: str, name: str, members: np.ndarray, k: int) -> None:
        # colours repeat after 21 categories; the end-marker shape then changes
        if members.size:
            symbol = CYCLE_SYMBOLS[colour_round(k) % len(CYCLE_SYMBOLS)]
            groups.append(
                PathGroup(
                    key, name, category_colour(k), "solid", symbol, members, int(members.size)
                )
            )

    def add_outcome(key: str, style: dict[str, str], members: np.ndarray) -> None:
        if members.size:
            groups.append(
                PathGroup(
                    key,
                    style["legend"],
                    style["colour"],
                    style["dash"],
                    style["end_symbol"],
                    members,
                    int(members.size),
                )
            )

    if color_by == "minimum":
        assignment = np.asarray(minima.assignment)
        if assignment.shape != (len(runs),):
            raise ParameterError(
                f"minima.assignment has {assignment.shape[0]} entries but there are "
                f"{len(runs)} runs; find the minima of these runs."
            )
        labels = list(minima.labels)
        colours = np.asarray(minima.colour_index)
        # letter order: the registry's order, whatever order this result lists points in
        for k in np.argsort(colours, kind="stable"):
            kind = str(minima.kind[k])
            name = f"{labels[k]}: {kind}, loss {_fmt(float(minima.loss[k]))}"
            cid = int(colours[k])
            add(f"m{cid}", name, rest[assignment[rest] == k], cid)
        diverged = np.union1d(diverged, idx[assignment[idx] == DIVERGED_LABEL])
        unresolved = np.setdiff1d(rest[assignment[rest] == NOT_STATIONARY_LABEL], diverged)
        spent = np.setdiff1d(rest[assignment[rest] == MAX_STEPS_LABEL], diverged)
        add_outcome("max_steps", MAX_STEPS, spent)
        add_outcome("not-stationary", NOT_STATIONARY, unresolved)
    elif color_by == "solution":
        label = np.asarray(solutions.label)
        if label.shape != (len(runs),):
            raise ParameterError(
                f"solutions.label has {label.size} entries but there are {len(runs)} runs; "
                "group the end points of these runs (connect_runs(problem, runs))."
            )
        colours = np.asarray(solutions.colour_index)
        # the registry's order (S1, S2, ...), whatever order this result lists groups in
        for k in np.argsort(colours, kind="stable"):
            members = rest[label[rest] == k]
            name = (
                f"{solutions.names[k]}: {len(members)} run{'s' if len(members) != 1 else ''}, "
                f"loss {_fmt(float(solutions.loss_median[k]))}"
            )
            add(f"g{int(colours[k])}", name, members, int(colours[k]))
        diverged = np.union1d(diverged, idx[label[idx] == DIVERGED_LABEL])
        add_outcome(
            "max_steps", MAX_STEPS, np.setdiff1d(rest[label[rest] == MAX_STEPS_LABEL], diverged)
        )
    elif color_by == "scheme":
        names = np.asarray(runs.scheme, dtype=object)
        for k, name in enumerate(dict.fromkeys(names.tolist())):
            members = rest[names[rest] == name]
            add(
                f"sc{k}",
                f"{name} ({len(members)} run{'s' if len(members) != 1 else ''})",
                members,
                k,
            )
    elif color_by == "learning_rate":
        for k, lr in enumerate(np.unique(lrs[rest])):
            add(
                f"lr{k}",
                f"learning rate {_fmt(float(lr))}",
                rest[lrs[rest] == lr],
                k,
            )
    elif color_by == "start":
        starts = np.asarray(runs.start_index)
        for k, s in enumerate(np.unique(starts[rest])):
            add(f"s{s}", f"start {s}", rest[starts[rest] == s], k)
    else:  # status
        add("converged", "converged", rest[status[rest] == "converged"], 2)
        add_outcome("max_steps", MAX_STEPS, rest[status[rest] == "max_steps"])
    if diverged.size:
        groups.append(
            PathGroup(
                "diverged",
                DIVERGED["legend"],
                DIVERGED["colour"],
                DIVERGED["dash"],
                DIVERGED["end_symbol"],
                diverged,
                int(diverged.size),
            )
        )
    return groups


def select_runs(groups: list[PathGroup], max_paths: int) -> tuple[list[PathGroup], int]:
    """Cap the number of drawn runs at ``max_paths``, keeping every group visible.

    Each group keeps a share of ``max_paths`` proportional to its size (at
    least one run), taken evenly spaced through the group so the choice is
    deterministic. Returns the capped groups and the number of runs left out.
    """
    if isinstance(max_paths, bool) or not isinstance(max_paths, (int, np.integer)) or max_paths < 1:
        raise ParameterError(f"max_paths must be a positive integer; got {max_paths!r}.")
    total = sum(g.total for g in groups)
    if total <= max_paths:
        return groups, 0
    sizes = np.array([g.total for g in groups])
    quota = max_paths * sizes / total
    keep = np.minimum(np.maximum(1, np.floor(quota).astype(int)), sizes)
    # hand out what is left of the budget by largest remainder
    for i in np.argsort(-(quota - np.floor(quota)), kind="stable"):
        if keep.sum() >= max_paths:
            break
        if keep[i] < sizes[i]:
            keep[i] += 1
    out = []
    drawn = 0
    for g, k in zip(groups, keep):
        pick = np.unique(np.linspace(0, g.total - 1, int(k)).round().astype(int))
        out.append(PathGroup(g.key, g.name, g.colour, g.dash, g.end_symbol, g.runs[pick], g.total))
        drawn += pick.size
    return out, total - drawn


def draw_indices(n_points: int, max_points: int) -> np.ndarray:
    """Indices of the iterates to draw from a path of ``n_points``.

    Keeps everything up to ``max_points``; beyond, keeps the first quarter of
    the budget step by step (where paths move most) and thins the rest
    geometrically, always keeping the last iterate. Hover labels show the
    true step numbers.

    Examples:
        >>> draw_indices(5, 10).tolist()
        [0, 1, 2, 3, 4]
        >>> idx = draw_indices(10_000, 100)
        >>> int(idx[0]), int(idx[-1]), len(idx) <= 100
        (0, 9999, True)
    """
    if max_points < 4:
        raise ParameterError(f"max_points must be at least 4; got {max_points!r}.")
    if n_points <= max_points:
        return np.arange(n_points)
    head = max_points // 4
    tail = np.unique(np.geomspace(head, n_points - 1, max_points - head).round().astype(int))
    idx = np.concatenate([np.arange(head), tail])
    return idx


def stack_paths(
    runs: Runs,
    members: np.ndarray,
    *,
    max_points: int,
    with_z: bool = False,
) -> dict[str, np.ndarray]:
    """Concatenate the paths of ``members`` with NaN rows between them.

    Returns ``x``, ``y`` (plane coordinates), ``z`` (recorded loss, when
    ``with_z``) and ``custom`` (rows ``[run, step, loss, off_plane]`` for
    hover labels). Non-finite coordinates become NaN gaps.
    """
    xs, ys, cs = [], [], []
    for r in members:
        stop = int(runs.stop_step[r])
        keep = draw_indices(stop + 1, max_points)
        xy = np.asarray(runs.path[r, keep], dtype=np.float64)
        loss = np.asarray(runs.losses[r, keep], dtype=np.float64)
        off = np.asarray(runs.off_plane[r, keep], dtype=np.float64)
        bad = ~np.isfinite(xy).all(axis=1)
        xy[bad] = np.nan
        xs.append(np.append(xy[:, 0], np.nan))
        ys.append(np.append(xy[:, 1], np.nan))
        rows = np.stack([np.full(keep.size, r, dtype=np.float64), keep, loss, off], axis=1)
        cs.append(np.vstack([rows, np.full((1, 4), np.nan)]))
    if not xs:
        empty = np.zeros(0)
        return {"x": empty, "y": empty, "z": empty, "custom": np.zeros((0, 4))}
    custom = np.vstack(cs)
    out = {"x": np.concatenate(xs), "y": np.concatenate(ys), "custom": custom}
    if with_z:
        z = custom[:, 2].copy()
        z[~np.isfinite(z)] = np.nan
        out["z"] = z
    return out

"""Initialisation schemes and solution groups in the Explorer (widget-free).

An Explorer given ``schemes=`` (the forms :func:`~basinview.core.scheme_starts`
takes: a mapping from a name to an explicit list of starts, a random draw, or
an initialiser drawn ``init_count`` times with ``init_seed``) runs from one
scheme's starts at a time, or from all of them side by side
(:data:`ALL_SCHEMES`); every run carries its scheme's name. Clicked starts join
as a scheme of their own (:data:`CLICKED`). The comparison per scheme is
:func:`~basinview.core.compare_schemes` on the runs shown.

Solutions are named by critical point (:func:`~basinview.core.find_minima`,
letters ``A``, ``B``...) or, when runs end near rather than at critical
points, by connectivity (:func:`~basinview.core.connect_runs`, groups ``S1``,
``S2``...; the problem's registry keeps the names stable across control
changes). :func:`uses_connectivity` decides which for ``grouping="auto"``.
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from typing import Any

import numpy as np

from ..core import (
    ParameterError,
    Problem,
    Runs,
    SchemeComparison,
    Starts,
    compare_schemes,
    connect_runs,
    explicit_starts,
    scheme_starts,
)
from ..core.minima import DIVERGED_LABEL, MAX_STEPS_LABEL
from ..core.segments import SMALL_CALL
from ..figures.text import significant

__all__ = [
    "ALL_SCHEMES",
    "CLICKED",
    "CONNECTIVITY_BELOW",
    "GROUPINGS",
    "group_solutions",
    "resolve_schemes",
    "scheme_comparison",
    "scheme_fields",
    "scheme_start_set",
    "schemes_from_settings",
    "solution_labels",
    "solution_names",
    "uses_connectivity",
]

#: The scheme selector's entry for every scheme side by side.
ALL_SCHEMES = "all schemes"
#: The scheme name clicked starts carry while schemes are shown.
CLICKED = "clicked starts"
#: How solutions are named: by critical point, by connectivity, or chosen from the runs.
GROUPINGS = ("auto", "critical points", "connectivity")
#: ``grouping="auto"`` groups by connectivity when fewer than this share of the runs
#: that did not diverge converged (the others end near, not at, critical points).
CONNECTIVITY_BELOW = 0.5


def resolve_schemes(
    problem: Problem, schemes: Any, *, count: int | None = None, seed: int = 0
) -> dict[str, Starts]:
    """Each scheme's starts, drawn once (``schemes`` as :func:`scheme_starts` takes them).

    ``count`` and ``seed`` are the draws per initialiser scheme and their
    seed (``count=`` and ``init_seed=`` of :func:`~basinview.core.compare_schemes`).
    """
    if schemes is None:
        return {}
    if isinstance(schemes, Starts) and schemes.spec.get("kind") == "schemes":
        joined = schemes
    else:
        if not isinstance(schemes, Mapping):
            raise ParameterError(
                "schemes must map a scheme's name to its starts, e.g. {'small': "
                "random_starts(problem, 16, scale=0.1), 'fan-in': init}; got "
                f"{type(schemes).__name__}."
            )
        joined = scheme_starts(problem, schemes, count=count, seed=seed)
    out: dict[str, Starts] = {}
    lo = 0
    for row in joined.spec["schemes"]:
        name, n = str(row["name"]), int(row["count"])
        if name in (ALL_SCHEMES, CLICKED):
            raise ParameterError(
                f"the scheme name {name!r} is the Explorer's own (its entry for "
                f"{'every scheme' if name == ALL_SCHEMES else 'clicked starts'}); rename "
                "that scheme."
            )
        out[name] = Starts(joined.points[lo : lo + n], row["starts"])
        lo += n
    return out


def scheme_start_set(
    problem: Problem, schemes: Mapping[str, Starts], chosen: str, clicked: Any = ()
) -> Starts:
    """The starts of scheme ``chosen`` (or of all, :data:`ALL_SCHEMES`), clicked starts last."""
    if chosen == ALL_SCHEMES:
        names = list(schemes)
    elif chosen in schemes:
        names = [chosen]
    else:
        raise ParameterError(
            f"there is no scheme {chosen!r}; this Explorer has {sorted(schemes)} (or "
            f"{ALL_SCHEMES!r})."
        )
    parts: dict[str, Any] = {n: schemes[n] for n in names}
    if len(clicked):
        parts[CLICKED] = explicit_starts(problem, np.asarray(clicked, dtype=problem.dtype))
    return scheme_starts(problem, parts)


def _rows(spec: Mapping[str, Any]) -> list[dict[str, Any]]:
    rows = spec.get("schemes")
    if not isinstance(rows, list) or not rows or not all(isinstance(r, dict) for r in rows):
        raise ParameterError("these settings' scheme starts hold no list of schemes.")
    return rows


def scheme_fields(spec: Mapping[str, Any]) -> dict[str, Any]:
    """View-state fields of a recorded ``"schemes"`` starts spec.

    The scheme shown (its name, or :data:`ALL_SCHEMES` when several were
    recorded) and the clicked starts.
    """
    rows = _rows(spec)
    names = [str(r.get("name")) for r in rows if r.get("name") != CLICKED]
    if not names:
        raise ParameterError("these settings' scheme starts hold clicked starts only.")
    points = [
        p for r in rows if r.get("name") == CLICKED for p in r.get("starts", {}).get("points", [])
    ]
    return {
        "scheme": names[0] if len(names) == 1 else ALL_SCHEMES,
        "start_points": tuple(tuple(float(x) for x in p) for p in points),
    }


def _same_spec(a: Any, b: Any) -> bool:
    return json.dumps(a, sort_keys=True) == json.dumps(b, sort_keys=True)


def schemes_from_settings(
    problem: Problem,
    spec: Mapping[str, Any],
    given: Mapping[str, Starts] | None = None,
    *,
    initializers: Mapping[str, Any] | None = None,
) -> dict[str, Starts]:
    """The schemes an Explorer rebuilt from a recorded ``"schemes"`` starts spec offers.

    With ``given`` (the Explorer's ``schemes=``, resolved), every recorded
    scheme must be among them with the same record (names, draws, seeds,
    initialiser names), else :class:`ParameterError` names the difference;
    ``given`` is returned. Without, the recorded schemes are rebuilt
    (initialisers need ``initializers={name: function}``).
    """
    from ..core import starts_from_spec

    rows = [r for r in _rows(spec) if r.get("name") != CLICKED]
    if given is None:
        return {
            str(r["name"]): starts_from_spec(
                problem, r["starts"], initializers=dict(initializers or {})
            )
            for r in rows
        }
    for r in rows:
        name = str(r.get("name"))
        if name not in given:
            raise ParameterError(
                f"these settings were recorded with the scheme {name!r}, which schemes= lacks; "
                f"pass it too (schemes= has {sorted(given)}), or leave schemes= out to "
                "rebuild the recorded ones."
            )
        if not _same_spec(given[name].spec, r.get("starts")):
            raise ParameterError(
                f"the scheme {name!r} of schemes= is not the one recorded (other starts, "
                "draws or seed); pass the recorded scheme, or leave schemes= out to rebuild it."
            )
    if len(rows) > 1 and {str(r["name"]) for r in rows} != set(given):
        raise ParameterError(
            f"these settings show the schemes {[r['name'] for r in rows]} side by side; "
            f"schemes= has {sorted(given)}. Pass exactly the recorded schemes."
        )
    return dict(given)


def uses_connectivity(grouping: str, runs: Runs) -> bool:
    """Whether solutions are named by connectivity for ``grouping`` and these runs.

    ``"auto"``: when fewer than :data:`CONNECTIVITY_BELOW` of the runs that
    did not diverge converged (the rest end near, not at, critical points,
    so critical points cannot say which runs found the same solution).
    """
    if grouping not in GROUPINGS:
        raise ParameterError(f"grouping must be one of {GROUPINGS}; got {grouping!r}.")
    status = np.asarray(runs.status)
    alive = int(np.sum(status != "diverged"))
    if grouping == "critical points" or alive == 0:
        return False
    if grouping == "connectivity":
        return True
    return int(np.sum(status == "converged")) < CONNECTIVITY_BELOW * alive


def group_solutions(
    problem: Problem, runs: Runs, grouping: str, options: Mapping[str, Any] | None = None
) -> Any:
    """:func:`~basinview.core.connect_runs` of ``runs`` when ``grouping`` asks for it, else None.

    ``options`` are passed to connect_runs (``tolerance``, ``symmetries``,
    ``samples``, ``block``, ``call_size``: :data:`~basinview.core.segments.SMALL_CALL`
    segments per call unless given).
    """
    if not uses_connectivity(grouping, runs):
        return None
    # One compiled segment program for any number of runs and representatives: a
    # request of a new size must not compile while the user moves a control.
    return connect_runs(problem, runs, **{"call_size": SMALL_CALL, **dict(options or {})})


def solution_labels(solutions: Any) -> np.ndarray:
    """Each run's solution name (``S1``...) or outcome (``diverged``, ``max_steps``)."""
    names = list(solutions.names)
    outcome = {DIVERGED_LABEL: "diverged", MAX_STEPS_LABEL: "max_steps"}
    return np.asarray(
        [names[k] if k >= 0 else outcome.get(int(k), "diverged") for k in solutions.label],
        dtype=object,
    )


def solution_names(solutions: Any, limit: int = 6) -> str:
    """`` · solutions by connectivity S1 (12 runs), S2 (3 runs)`` for the status line."""
    if solutions is None or not len(solutions):
        return ""
    order = np.argsort(np.asarray(solutions.colour_index), kind="stable")
    parts = [
        f"{solutions.names[k]} ({int(solutions.count[k])} run"
        f"{'s' if int(solutions.count[k]) != 1 else ''})"
        for k in order[:limit]
    ]
    if len(order) > limit:
        parts.append(f"+ {len(order) - limit} more")
    return " · solutions by connectivity " + ", ".join(parts)


def same_level_note(solutions: Any, rtol: float = 1e-3) -> str:
    """A status note when two or more groups end at the same loss and no symmetry is declared.

    Groups of equal loss that no low segment joins are often copies of one
    solution under a symmetry of the model (a periodic parameter, a sign flip,
    exchangeable units); declared symmetries merge them. Empty when that does
    not apply.
    """
    if solutions is None or len(solutions) < 2 or solutions.symmetries:
        return ""
    low = np.asarray(solutions.loss_min, dtype=float)
    ok = np.isfinite(low)
    if ok.sum() < 2:
        return ""
    ref = float(np.min(low[ok]))
    same = [
        solutions.names[k]
        for k in np.flatnonzero(ok)
        if abs(low[k] - ref) <= rtol * max(abs(ref), 1e-12)
    ]
    if len(same) < 2:
        return ""
    return (
        f"{', '.join(same)} reach the same lowest loss ({significant(ref)}; the legend gives "
        "each group's median): if the model has a symmetry (a periodic "
        "parameter, a sign flip, exchangeable units), declare it with "
        "connect_options={'symmetries': [...]} to merge its copies"
    )


def scheme_comparison(
    problem: Problem, runs: Runs, minima: Any, solutions: Any, *, confidence: float = 0.95
) -> SchemeComparison | None:
    """:func:`~basinview.core.compare_schemes` of the runs shown (None without schemes).

    A run's solution is its connectivity group when ``solutions`` is given,
    else its critical point (``minima``), else its outcome. No descent is run
    and no sharpness computed (the Explorer keeps a change cheap).
    """
    if runs.scheme is None:
        return None
    if solutions is not None:
        labels: Any = solution_labels(solutions)
    elif minima is not None:
        labels = minima
    else:
        labels = np.asarray(runs.status, dtype=object)
    return compare_schemes(problem, runs, solutions=labels, sharpness=False, confidence=confidence)

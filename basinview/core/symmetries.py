"""Declared parameter symmetries: transformations that leave the loss unchanged.

Many models have several parameter vectors for one function: a phase and the
same phase plus a period, the components of a mixture listed in another
order, a hidden unit's weights with their signs flipped (odd activations such
as tanh), the hidden units of a dense layer in another order. Runs that end
at such copies are the same solution. The user declares the symmetries of
their model; grouping (:func:`~basinview.core.find_minima` and
:func:`~basinview.core.connect_runs`) then works modulo them.

A declaration names coordinates in the problem's own terms: a coordinate
label (``"phase"``, ``"w[0]"``), a leaf or a sub-tree (``"mu"``,
``"components[0]"``: every coordinate under it), a flat index, or a list of
these. :func:`resolve_symmetries` turns declarations into a
:class:`Symmetries` of flat index tables for one problem, which can

- **align** a vector to a reference: pick the symmetric copy nearest to the
  reference (for permutations, the weight matching of Ainsworth, Hayase &
  Srinivasa 2023: a linear assignment maximising the inner product of
  matched units, solved with :func:`scipy.optimize.linear_sum_assignment`,
  several layers by coordinate descent), and
- **canonicalise** a vector: one representative per set of copies (periods
  wrapped into ``[0, period)``, blocks and units sorted by their first
  coordinate, signs making each group's first coordinate non-negative).

Each transformation also returns a *copy key* (the shift, the order, the
signs), so a group can say how many distinct copies it merged.

Declarations:

- :func:`periodic` ``(coords, period)``: each coordinate may move by whole
  periods.
- :func:`exchangeable` ``(blocks)``: equally shaped blocks (lists of
  coordinates, or sub-trees) may be reordered: mixture components,
  identical experts.
- :func:`sign_flip` ``(groups)``: each group may change sign as a whole.
  A mapping ``{leaf: axis}`` makes one group per hidden unit.
- :func:`hidden_units` ``({leaf: axis})``: the units of a dense layer may be
  permuted; the mapping names every leaf that carries the unit index and its
  axis, e.g. ``{"w1": 1, "b1": 0, "w2": 0}`` for ``tanh(x @ w1 + b1) @ w2``.

Caution: basinview does not check that a declared symmetry really leaves the
loss unchanged; :meth:`Symmetries.check` compares the loss at a few copies.

References:
    Ainsworth, S. K., Hayase, J. & Srinivasa, S. (2023). Git Re-Basin:
    merging models modulo permutation symmetries. ICLR. arXiv:2209.04836.
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.optimize import linear_sum_assignment

from .errors import ParameterError, SymmetryWarning

__all__ = [
    "Symmetries",
    "SymmetrySpec",
    "exchangeable",
    "hidden_units",
    "periodic",
    "resolve_symmetries",
    "sign_flip",
    "warn_if_not_symmetric",
]

_KINDS = ("periodic", "exchangeable", "sign_flip", "hidden_units", "signed_units")


@dataclass(frozen=True)
class SymmetrySpec:
    """A declared symmetry, in the problem's names (resolved by :func:`resolve_symmetries`).

    Attributes:
        kind: ``"periodic"``, ``"exchangeable"``, ``"sign_flip"`` or ``"hidden_units"``.
        parts: what the declaration names (coordinates, blocks or ``{leaf: axis}``).
        period: the period (``periodic`` only).
    """

    kind: str
    parts: Any
    period: float | None = None

    @property
    def name(self) -> str:
        if self.kind == "periodic":
            return f"periodic({self.period:g})"
        return self.kind


def periodic(coords: Any, period: float) -> SymmetrySpec:
    """Coordinates that may move by whole multiples of ``period`` (a phase, an angle)."""
    if not (isinstance(period, (int, float, np.floating)) and np.isfinite(period) and period > 0):
        raise ParameterError(
            f"periodic: period must be a positive finite number, got {period!r}; "
            "e.g. periodic('phase', 2 * np.pi)."
        )
    return SymmetrySpec("periodic", coords, float(period))


def exchangeable(blocks: Sequence[Any]) -> SymmetrySpec:
    """Equally sized blocks of coordinates that may be listed in any order.

    Example: a two-component mixture with parameters ``{"mu": (2,), "log_sd":
    (2,), "logit": (2,)}`` has blocks ``[["mu[0]", "log_sd[0]", "logit[0]"],
    ["mu[1]", "log_sd[1]", "logit[1]"]]``; components stored as sub-trees
    ``{"c": [comp0, comp1]}`` have blocks ``["c[0]", "c[1]"]``.
    """
    if isinstance(blocks, (str, int)) or len(blocks) < 2:
        raise ParameterError(
            f"exchangeable needs a list of at least two blocks, got {blocks!r}; e.g. "
            "exchangeable([['mu[0]', 'sd[0]'], ['mu[1]', 'sd[1]']])."
        )
    return SymmetrySpec("exchangeable", tuple(blocks))


def sign_flip(groups: Any) -> SymmetrySpec:
    """Groups of coordinates that may change sign together.

    ``groups`` is a list of groups (each a coordinate reference), or a mapping
    ``{leaf: axis}`` as for :func:`hidden_units`, giving one group per unit.
    """
    return SymmetrySpec("sign_flip", dict(groups) if isinstance(groups, Mapping) else groups)


def hidden_units(tensors: Mapping[str, int], *, odd: bool = False) -> SymmetrySpec:
    """The hidden units of a dense layer, which may be permuted.

    Args:
        tensors: every leaf that carries the layer's unit index, with the
            axis of that index: incoming weights, bias and outgoing weights,
            e.g. ``{"w1": 1, "b1": 0, "w2": 0}``.
        odd: the activation is odd (tanh, sin), so each unit may also change
            sign as a whole; matching then pairs units by the absolute inner
            product and flips the ones that match with a negative sign.
    """
    if not isinstance(tensors, Mapping) or not tensors:
        raise ParameterError(
            "hidden_units takes a mapping {leaf name: unit axis}, e.g. "
            f"{{'w1': 1, 'b1': 0, 'w2': 0}}; got {tensors!r}."
        )
    return SymmetrySpec("signed_units" if odd else "hidden_units", dict(tensors))


# ----------------------------------------------------------------- resolving
def _coords(problem: Any, ref: Any) -> np.ndarray:
    """Flat indices that a coordinate reference names (label, leaf, sub-tree, index, list)."""
    fl = problem.flattener
    if isinstance(ref, (int, np.integer)) and not isinstance(ref, bool):
        if not 0 <= int(ref) < problem.size:
            raise ParameterError(f"coordinate index {ref} is outside 0..{problem.size - 1}.")
        return np.array([int(ref)])
    if isinstance(ref, str):
        if ref in fl.labels:
            return np.array([fl.labels.index(ref)])
        hit = [
            np.arange(leaf.start, leaf.stop)
            for leaf in fl.leaves
            if leaf.name == ref
            or leaf.name.startswith(ref + ".")
            or leaf.name.startswith(ref + "[")
        ]
        if hit:
            return np.concatenate(hit)
        fl.index(ref)  # raises the standard unknown-label error
    if isinstance(ref, Sequence) and not isinstance(ref, str) and len(ref):
        return np.concatenate([_coords(problem, r) for r in ref])
    raise ParameterError(
        f"cannot read {ref!r} as coordinates: give a label such as {fl.labels[0]!r}, a leaf "
        "or sub-tree name, a flat index, or a list of these."
    )


def _unit_table(problem: Any, tensors: Mapping[str, int]) -> np.ndarray:
    """``(units, m)`` flat indices: row ``i`` holds every coordinate of unit ``i``."""
    leaves = {leaf.name: leaf for leaf in problem.flattener.leaves}
    cols, units = [], None
    for name, axis in tensors.items():
        if name not in leaves:
            raise ParameterError(
                f"hidden units: no leaf called {name!r}; leaves of this problem: {sorted(leaves)}."
            )
        leaf = leaves[name]
        if not isinstance(axis, (int, np.integer)) or not -len(leaf.shape) <= axis < len(
            leaf.shape
        ):
            raise ParameterError(
                f"hidden units: axis {axis!r} is not an axis of {name!r} (shape {leaf.shape})."
            )
        idx = np.moveaxis(np.arange(leaf.start, leaf.stop).reshape(leaf.shape), int(axis), 0)
        if units is not None and idx.shape[0] != units:
            raise ParameterError(
                f"hidden units: {name!r} has {idx.shape[0]} units along axis {axis} but the other "
                f"leaves have {units}; every leaf must carry the same units."
            )
        units = idx.shape[0]
        cols.append(idx.reshape(units, -1))
    return np.concatenate(cols, axis=1)


def _blocks(problem: Any, blocks: Sequence[Any]) -> np.ndarray:
    rows = [_coords(problem, b) for b in blocks]
    if len({r.size for r in rows}) != 1:
        raise ParameterError(
            f"exchangeable blocks must have the same size; got sizes {[r.size for r in rows]}."
        )
    return np.stack(rows)


def _signs(signs: np.ndarray) -> tuple[int, ...]:
    """Sign part of a unit copy key (empty when no unit is flipped)."""
    return tuple(int(v) for v in signs) if np.any(np.asarray(signs) < 0) else ()


@dataclass(frozen=True, eq=False)
class _Resolved:
    kind: str
    table: np.ndarray  # periodic: (m,) indices; others: (rows, m) index table
    period: float = 0.0


def _check_disjoint(items: list[_Resolved]) -> None:
    for r in items:
        flat = r.table.ravel()
        if np.unique(flat).size != flat.size:
            raise ParameterError(
                f"a {r.kind} declaration names some coordinates twice; each coordinate may "
                "appear once per declaration."
            )


@dataclass(frozen=True, eq=False)
class Symmetries:
    """Declared symmetries resolved to flat indices of one problem.

    Attributes:
        names: one name per declaration, in order.
        size: number of parameters.
        sweeps: passes over the declarations when aligning (coordinate
            descent over layers, as in weight matching).
    """

    names: tuple[str, ...]
    size: int
    items: tuple[_Resolved, ...]
    sweeps: int = 3

    def __len__(self) -> int:
        return len(self.items)

    def canonical(self, x: Any) -> tuple[np.ndarray, tuple[Any, ...]]:
        """One representative of ``x``'s copies, and the copy key that maps ``x`` there."""
        y = np.array(x, dtype=np.float64).reshape(self.size)
        keys = []
        for r in self.items:
            if r.kind == "periodic":
                k = np.floor(y[r.table] / r.period)
                y[r.table] -= k * r.period
                keys.append(tuple(int(v) for v in -k))
            elif r.kind == "sign_flip":
                s = np.where(y[r.table[:, 0]] < 0, -1.0, 1.0)
                y[r.table] *= s[:, None]
                keys.append(tuple(int(v) for v in s))
            else:
                vals = y[r.table]
                signs = np.ones(vals.shape[0])
                if r.kind == "signed_units":
                    signs = np.where(vals[:, 0] < 0, -1.0, 1.0)
                    vals = vals * signs[:, None]
                order = np.lexsort(vals.T[::-1])
                y[r.table] = vals[order]
                keys.append(tuple(int(v) for v in order) + _signs(signs[order]))
        return y, tuple(keys)

    def align(self, x: Any, reference: Any) -> tuple[np.ndarray, tuple[Any, ...]]:
        """The copy of ``x`` nearest ``reference``, and its copy key (identity: no change).

        Periods: each coordinate shifted by the whole periods nearest the
        reference. Signs: each group's sign that brings it closest. Blocks and
        units: the permutation maximising the summed inner products of matched
        rows (weight matching), by linear assignment; declarations are
        revisited ``sweeps`` times, since matching one layer changes the
        best match of the next. With ``hidden_units(..., odd=True)`` units
        are matched by the absolute inner product and flipped where it is
        negative.

        Examples:
            >>> import jax.numpy as jnp
            >>> from basinview.core import Problem
            >>> prob = Problem(lambda p: jnp.sin(p["phase"]) ** 2 + p["a"] ** 2,
            ...                {"a": 0.0, "phase": 0.0})
            >>> syms = resolve_symmetries(prob, periodic("phase", 2 * np.pi))
            >>> y, key = syms.align([1.0, 0.1 + 2 * np.pi], [1.0, 0.0])
            >>> np.round(y, 6).tolist(), key
            ([1.0, 0.1], ((-1,),))
        """
        y = np.array(x, dtype=np.float64).reshape(self.size)
        ref = np.asarray(reference, dtype=np.float64).reshape(self.size)
        state: list[Any] = [None] * len(self.items)
        for _ in range(self.sweeps if len(self.items) > 1 else 1):
            changed = False
            for i, r in enumerate(self.items):
                if r.kind == "periodic":
                    k = np.round((ref[r.table] - y[r.table]) / r.period)
                    y[r.table] += k * r.period
                    state[i] = (0 if state[i] is None else state[i]) + k
                    changed |= bool(np.any(k))
                elif r.kind == "sign_flip":
                    dots = np.sum(y[r.table] * ref[r.table], axis=1)
                    s = np.where(dots < 0, -1.0, 1.0)
                    y[r.table] *= s[:, None]
                    state[i] = s if state[i] is None else state[i] * s
                    changed |= bool(np.any(s < 0))
                else:
                    vals = y[r.table]
                    score = ref[r.table] @ vals.T
                    signed = r.kind == "signed_units"
                    _, cols = linear_sum_assignment(
                        np.abs(score) if signed else score, maximize=True
                    )
                    rows = np.arange(len(cols))
                    s = np.where(score[rows, cols] < 0, -1.0, 1.0) if signed else np.ones(len(cols))
                    y[r.table] = vals[cols] * s[:, None]
                    old = (rows, np.ones(len(cols))) if state[i] is None else state[i]
                    state[i] = (old[0][cols], old[1][cols] * s)
                    changed |= bool(np.any(cols != rows) or np.any(s < 0))
            if not changed:
                break
        keys: list[tuple[int, ...]] = []
        for s in state:
            if s is None:
                keys.append(())
            elif isinstance(s, tuple):  # (order, signs) of units
                keys.append(tuple(int(v) for v in s[0]) + _signs(s[1]))
            else:
                keys.append(tuple(int(v) for v in np.asarray(s)))
        return y, tuple(keys)

    def identity_key(self, x: Any) -> tuple[Any, ...]:
        """The copy key of ``x`` aligned to itself (what "no transformation" reads as)."""
        return self.align(x, x)[1]

    def check(self, problem: Any, x: Any, *, copies: int = 4, seed: int = 0) -> float:
        """Largest relative change of the loss over a few random copies of ``x``.

        A declared symmetry of the loss gives about machine precision; a
        large value means the declaration is wrong.
        """
        rng = np.random.default_rng(seed)
        base = np.array(x, dtype=np.float64).reshape(self.size)
        f0 = float(problem.value(base.astype(problem.dtype)))
        worst = 0.0
        for _ in range(copies):
            y = base.copy()
            for r in self.items:
                if r.kind == "periodic":
                    y[r.table] += rng.integers(-2, 3, r.table.size) * r.period
                elif r.kind == "sign_flip":
                    y[r.table] *= rng.choice([-1.0, 1.0], r.table.shape[0])[:, None]
                else:
                    y[r.table] = y[r.table][rng.permutation(r.table.shape[0])]
                    if r.kind == "signed_units":
                        y[r.table] *= rng.choice([-1.0, 1.0], r.table.shape[0])[:, None]
            f = float(problem.value(y.astype(problem.dtype)))
            worst = max(worst, abs(f - f0) / max(abs(f0), 1e-300))
        return worst


#: Largest relative change of the loss a declared symmetry may cause before it is called wrong.
SYMMETRY_RTOL = 1e-3


def warn_if_not_symmetric(syms: Symmetries | None, problem: Any, x: Any) -> float:
    """Check the declared symmetries at ``x``; warn (:class:`SymmetryWarning`) if they change the loss.

    Returns the largest relative change seen over eight random copies (0.0
    when nothing is declared).
    """
    if syms is None or not np.all(np.isfinite(np.asarray(x, dtype=np.float64))):
        return 0.0
    worst = syms.check(problem, x, copies=8)
    if not worst <= SYMMETRY_RTOL:
        warnings.warn(
            f"the declared symmetries change the loss by {worst:.3g} (relative) at the lowest "
            "end point, so they are not symmetries of this loss and grouping modulo them "
            "merges points that differ. Check each declaration (e.g. a sign change that only "
            "leaves the loss unchanged together with a shift of another parameter is not a "
            "plain sign_flip), or drop symmetries=.",
            SymmetryWarning,
            stacklevel=3,
        )
    return worst


def resolve_symmetries(problem: Any, symmetries: Any) -> Symmetries | None:
    """Resolve declarations (a :class:`SymmetrySpec`, a list of them, or a
    :class:`Symmetries`) against ``problem``; ``None`` or ``[]`` gives ``None``."""
    if symmetries is None:
        return None
    if isinstance(symmetries, Symmetries):
        if symmetries.size != problem.size:
            raise ParameterError(
                f"these symmetries were resolved for {symmetries.size} parameters; the problem "
                f"has {problem.size}. Pass the declarations (periodic(...), ...) instead."
            )
        return symmetries if len(symmetries) else None
    specs = [symmetries] if isinstance(symmetries, SymmetrySpec) else list(symmetries)
    items = []
    for spec in specs:
        if not isinstance(spec, SymmetrySpec):
            raise ParameterError(
                f"symmetries must be declarations made with periodic, exchangeable, sign_flip "
                f"or hidden_units (basinview.core.symmetries); got {spec!r}."
            )
        if spec.kind == "periodic":
            items.append(_Resolved("periodic", _coords(problem, spec.parts), spec.period or 0.0))
        elif spec.kind == "exchangeable":
            items.append(_Resolved("exchangeable", _blocks(problem, spec.parts)))
        elif spec.kind in ("hidden_units", "signed_units"):
            items.append(_Resolved(spec.kind, _unit_table(problem, spec.parts)))
        elif isinstance(spec.parts, Mapping):
            items.append(_Resolved("sign_flip", _unit_table(problem, spec.parts)))
        else:
            groups = [spec.parts] if isinstance(spec.parts, (str, int)) else list(spec.parts)
            rows = [_coords(problem, g) for g in groups]
            width = max(r.size for r in rows)
            # ragged groups: pad by repeating each group's first index is wrong (it
            # would flip twice), so sign groups must be equally sized
            if any(r.size != width for r in rows):
                raise ParameterError(
                    f"sign_flip groups must have equal sizes; got {[r.size for r in rows]}. "
                    "Declare groups of different sizes as separate sign_flip(...) entries."
                )
            items.append(_Resolved("sign_flip", np.stack(rows)))
    if not items:
        return None
    _check_disjoint(items)
    return Symmetries(names=tuple(s.name for s in specs), size=problem.size, items=tuple(items))

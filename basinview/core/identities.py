"""Stable names for critical points: one letter and one colour per point of a problem.

Every critical point found on a :class:`~basinview.core.Problem` is entered
once in that problem's :class:`CriticalPointRegistry`, kept with the problem
(``problem.cached``; no global state), and keeps the letter and colour index
it got there in every later call on the same problem: the minima of a slice's
runs, a basin map, the tables and figures built from them, the Explorer's
views and status line, the command line summary, and recomputations after
new runs or new starts (:func:`~basinview.core.find_minima` and
:func:`~basinview.core.basin_map` both ask the registry). Figures never number points
themselves; they read :attr:`Minima.labels <basinview.core.Minima.labels>`
and :attr:`Minima.colour_index <basinview.core.Minima.colour_index>`.

The rules:

- **Letters** follow registration order: ``A`` .. ``Z``, then ``AA``, ``AB``,
  .. ``AZ``, ``BA`` .. (see :func:`letter`). Within one call, new points are
  registered lowest loss first, so on a fresh problem ``A`` is the lowest
  point of the first result. A point found later never renames an earlier
  one, even if it is lower.
- **Colour index** is the registration index (``A`` is 0, ``B`` is 1, ...);
  figures turn it into a colour of their palette.
- **Matching** is by location, in the problem's own units. A point ``p``
  matches a registered point ``q`` when
  ``|p - q| <= rtol * max(|p|, |q|, spread, |theta0|)`` (Euclidean norms of
  flat parameter vectors), where ``spread`` is the root-mean-square distance
  of all registered points (and the new ones) from their centroid, and
  ``theta0`` the problem's reference parameters; when all of these are zero
  the length is 1. The tolerance thus scales with the size of the parameters
  and with how far apart the critical points lie, so parameters of size
  ``1e-3`` and ``1e3`` are treated alike. ``rtol`` is ``1e-4`` in float64 and
  ``1e-2`` in float32 (about the accuracy of a refined point in each).
  The nearest match wins; a registered point is given to at most one point
  of a call, so one result never shows a letter twice.
- The registry grows only; it lives as long as the problem. A new
  :class:`~basinview.core.Problem` (even of the same loss) starts afresh.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

__all__ = ["CriticalPointRegistry", "critical_points", "length_scale", "letter"]


def letter(index: int) -> str:
    """The letter name of the point registered ``index``-th (0-based).

    Examples:
        >>> [letter(i) for i in (0, 1, 25, 26, 27, 51, 52, 701, 702)]
        ['A', 'B', 'Z', 'AA', 'AB', 'AZ', 'BA', 'ZZ', 'AAA']
    """
    if index < 0:
        raise ValueError(f"a registry index is 0 or more; got {index}.")
    out = ""
    k = index + 1
    while k:
        k, r = divmod(k - 1, 26)
        out = chr(ord("A") + r) + out
    return out


def default_rtol(dtype: Any) -> float:
    """Relative matching tolerance of the registry for a float dtype."""
    return 1e-4 if np.dtype(dtype) == np.float64 else 1e-2  # common practice: ~ sqrt(eps)


def length_scale(points: np.ndarray, reference: np.ndarray | None = None) -> float:
    """A length in parameter units for relative tolerances.

    The largest of: the root-mean-square distance of ``points`` (``(K, n)``)
    from their centroid, the largest norm among them, and the norm of
    ``reference``; 1.0 when all are zero (or nothing is given).

    Examples:
        >>> length_scale(np.array([[1e-3, 0.0], [-1e-3, 0.0]]))
        0.001
    """
    pts = np.asarray(points, dtype=np.float64)
    pts = pts.reshape(-1, pts.shape[-1]) if pts.ndim else pts.reshape(1, 1)
    parts = [0.0]
    finite = pts[np.all(np.isfinite(pts), axis=1)]
    if finite.shape[0]:
        centred = finite - finite.mean(axis=0)
        parts.append(float(np.sqrt(np.mean(np.sum(centred**2, axis=1)))))
        parts.append(float(np.max(np.linalg.norm(finite, axis=1))))
    if reference is not None:
        ref = np.asarray(reference, dtype=np.float64).ravel()
        if np.all(np.isfinite(ref)):
            parts.append(float(np.linalg.norm(ref)))
    scale = max(parts)
    return scale if scale > 0 else 1.0


class CriticalPointRegistry:
    """The critical points found so far on one problem, each with a fixed letter.

    Get the registry of a problem with :func:`critical_points`; results
    (:class:`~basinview.core.Minima`) carry the letters it hands out. See the
    module docstring for the matching rule.

    Args:
        size: number of parameters ``n``.
        dtype: float dtype of the problem (sets the default tolerance).
        reference: the problem's reference parameters (a length for the
            tolerance when the points themselves give none).
        rtol: relative matching tolerance (default by dtype).
    """

    def __init__(
        self,
        size: int,
        dtype: Any,
        reference: np.ndarray | None = None,
        *,
        rtol: float | None = None,
    ) -> None:
        self.size = int(size)
        self.rtol = default_rtol(dtype) if rtol is None else float(rtol)
        self._reference = None if reference is None else np.asarray(reference, np.float64).ravel()
        self._points = np.zeros((0, self.size))
        self._loss: list[float] = []
        self._kind: list[str] = []

    def __len__(self) -> int:
        return int(self._points.shape[0])

    def __repr__(self) -> str:
        return f"CriticalPointRegistry({len(self)} points: {', '.join(self.letters)})"

    @property
    def letters(self) -> list[str]:
        """Letters of the registered points, in registration order."""
        return [letter(i) for i in range(len(self))]

    @property
    def points(self) -> np.ndarray:
        """``(K, n)`` registered locations (float64, read-only copy)."""
        return self._points.copy()

    def scale(self, extra: np.ndarray | None = None) -> float:
        """The length the tolerance is relative to (see :func:`length_scale`)."""
        pts = self._points if extra is None else np.vstack([self._points, extra])
        return length_scale(pts, self._reference)

    def identify(
        self,
        points: np.ndarray,
        loss: Any = None,
        kind: Any = None,
        align: Any = None,
    ) -> np.ndarray:
        """Registry indices of ``points`` (``(K, n)``), registering new ones in the order given.

        Args:
            points: locations (flat parameter vectors).
            loss, kind: optional ``(K,)`` loss and type, recorded for new points.
            align: optional ``align(p, q) -> p'``, the copy of ``p`` nearest ``q``
                under declared symmetries; each point is compared with every
                registered point through it, so a symmetric copy of a known
                point keeps that point's letter. Points are stored as given.

        Returns:
            ``(K,)`` indices; ``letter(i)`` names index ``i`` and ``i`` is its
            colour index. No index occurs twice.
        """
        pts = np.asarray(points, dtype=np.float64).reshape(-1, self.size)
        k = pts.shape[0]
        losses = [np.nan] * k if loss is None else [float(v) for v in np.ravel(loss)]
        kinds = [""] * k if kind is None else [str(v) for v in np.ravel(kind)]
        length = self.scale(pts)
        out = np.full(k, -1, dtype=np.int64)
        taken: set[int] = set()
        for i, p in enumerate(pts):
            if len(self) and np.all(np.isfinite(p)):
                seen = (
                    np.broadcast_to(p, self._points.shape)
                    if align is None
                    else np.array([np.asarray(align(p, q), dtype=np.float64) for q in self._points])
                )
                dist = np.linalg.norm(self._points - seen, axis=1)
                norms = np.linalg.norm(self._points, axis=1)
                tol = self.rtol * np.maximum(np.maximum(norms, np.linalg.norm(p)), length)
                for j in np.argsort(dist, kind="stable"):
                    if dist[j] > tol[j]:
                        break
                    if int(j) not in taken:
                        out[i] = int(j)
                        break
            if out[i] < 0:
                out[i] = len(self)
                self._points = np.vstack([self._points, p[None]])
                self._loss.append(losses[i])
                self._kind.append(kinds[i])
            taken.add(int(out[i]))
        return out

    @property
    def table(self) -> pd.DataFrame:
        """One row per registered point: letter, colour index, type and loss when first found."""
        return pd.DataFrame(
            {
                "point": self.letters,
                "colour_index": np.arange(len(self)),
                "kind": self._kind,
                "loss": self._loss,
            }
        )


def critical_points(problem: Any) -> CriticalPointRegistry:
    """The registry of critical points of ``problem`` (created on first use, kept with it).

    Examples:
        >>> import jax.numpy as jnp
        >>> from basinview.core import Problem
        >>> prob = Problem(lambda p: jnp.sum((p - 1.0) ** 2), jnp.zeros(2))
        >>> reg = critical_points(prob)
        >>> reg.identify([[1.0, 1.0], [3.0, 0.0]]).tolist(), reg.letters
        ([0, 1], ['A', 'B'])
        >>> reg.identify([[3.0, 0.0], [1.0, 1.0000001]]).tolist()
        [1, 0]
        >>> critical_points(prob) is reg
        True
    """
    return problem.cached(
        ("critical_points",),
        lambda: CriticalPointRegistry(problem.size, problem.dtype, problem.theta0),
    )

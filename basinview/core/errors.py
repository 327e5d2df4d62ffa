"""Exceptions and warnings raised by basinview.

Every error message says what was expected, what was received and how to
fix it. All errors derive from :class:`BasinviewError`, itself a
``ValueError``, so ``except ValueError`` keeps working for callers that do
not know about basinview.
"""

from __future__ import annotations

__all__ = [
    "LINT_CHECKS",
    "BasinviewError",
    "ClosedOverDataWarning",
    "ClusterError",
    "DiscardedPrecisionWarning",
    "FingerprintWarning",
    "IntegerDataWarning",
    "LossError",
    "LossLintWarning",
    "MinimaWarning",
    "MixedPrecisionWarning",
    "NoCriticalPointError",
    "ParameterError",
    "ResultsFileError",
    "RowBroadcastWarning",
    "SettingsError",
]


class BasinviewError(ValueError):
    """Base class of every error basinview raises on bad input."""


class LossError(BasinviewError):
    """The user's loss function cannot be used as given."""


class ParameterError(BasinviewError):
    """Parameters, planes, spans, starts or hyper-parameters are unusable."""


class SettingsError(BasinviewError):
    """A settings record (usually JSON) is malformed, truncated or too new."""


class ClusterError(BasinviewError):
    """A run over several processes cannot start, disagrees, or lost a process."""


class ResultsFileError(BasinviewError):
    """A results file is missing, malformed, truncated or too new."""


class FingerprintWarning(UserWarning):
    """Settings were recorded for different data or initial parameters."""


class NoCriticalPointError(BasinviewError, IndexError):
    """A result holds no critical point of the kind asked for (also an ``IndexError``)."""


class MinimaWarning(UserWarning):
    """find_minima found no critical point, or its result may mislead; the message names the fixes."""


class SymmetryWarning(MinimaWarning):
    """A declared symmetry changes the loss: it is not a symmetry of this model, so
    grouping modulo it would merge points that differ."""


class LossLintWarning(UserWarning):
    """A pattern in the loss that runs without error but can give a wrong answer.

    Raised once, when a :class:`~basinview.core.Problem` is built, by the loss
    lint (:mod:`basinview.core.lint`). Each kind of finding is a subclass
    with a short name in ``check``; silence one with
    ``Problem(..., lint={"ignore": [name]})``, all with ``lint=False``, or
    with a standard warnings filter on the class.
    """

    check: str = ""


class RowBroadcastWarning(LossLintWarning):
    """The loss builds an intermediate with two axes of the data's row count."""

    check = "row-broadcast"


class ClosedOverDataWarning(LossLintWarning):
    """The loss closes over a large constant array instead of taking it as data."""

    check = "closed-over-data"


class DiscardedPrecisionWarning(LossLintWarning):
    """The loss casts parameters or data down to a lower floating precision."""

    check = "discarded-precision"


class MixedPrecisionWarning(LossLintWarning):
    """The loss computes in a higher precision than the parameters have."""

    check = "mixed-precision"


class IntegerDataWarning(LossLintWarning):
    """Integer data used as numbers hold values the loss's float type rounds."""

    check = "integer-data"


LINT_CHECKS: dict[str, type[LossLintWarning]] = {
    cls.check: cls
    for cls in (
        RowBroadcastWarning,
        ClosedOverDataWarning,
        DiscardedPrecisionWarning,
        MixedPrecisionWarning,
        IntegerDataWarning,
    )
}
"""Every lint check by name (the names ``lint={"ignore": [...]}`` accepts)."""

"""Exceptions and warnings raised by basinview.

Every error message says what was expected, what was received and how to
fix it. All errors derive from :class:`BasinviewError`, itself a
``ValueError``, so ``except ValueError`` keeps working for callers that do
not know about basinview.
"""

from __future__ import annotations

__all__ = [
    "BasinviewError",
    "FingerprintWarning",
    "LossError",
    "MinimaWarning",
    "NoCriticalPointError",
    "ParameterError",
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


class FingerprintWarning(UserWarning):
    """Settings were recorded for different data or initial parameters."""


class NoCriticalPointError(BasinviewError, IndexError):
    """A result holds no critical point of the kind asked for (also an ``IndexError``)."""


class MinimaWarning(UserWarning):
    """find_minima found no critical point, or its result may mislead; the message names the fixes."""

"""Numbers and table headers as a reader wants them: a few significant digits, plain words.

Titles, hover labels, notes and status lines show numbers through
:func:`significant` (``0.13213097769650292`` becomes ``0.1321``); tables
shown to a user go through :func:`readable_table` (``grad_norm`` becomes
``gradient norm``, missing values become blanks). Both are display helpers:
the results themselves keep every digit.
"""

from __future__ import annotations

import math
import numbers
import re
from collections.abc import Mapping
from typing import Any

import numpy as np
import pandas as pd

__all__ = ["HEADERS", "HEADER_WORDS", "readable_header", "readable_table", "significant"]

#: Whole column names with a header of their own (checked before word by word).
HEADERS: dict[str, str] = {
    "max_steps": "step budget spent",
    "colour_index": "colour",
    "off_plane_end": "off-plane distance at the end",
    "off_plane": "off-plane distance",
    "share_low": "share, low",
    "share_high": "share, high",
    "lambda_max": "λmax",
    "lambda_min": "λmin",
    "a_start": "a at start",
    "b_start": "b at start",
    "a_end": "a at end",
    "b_end": "b at end",
    "steps_to_tol": "steps to tolerance",
    "median_steps_to_tol": "median steps to tolerance",
}

#: Abbreviations spelled out word by word in other column names.
HEADER_WORDS: dict[str, str] = {
    "grad": "gradient",
    "tol": "tolerance",
    "lr": "learning rate",
    "n": "number of",
    "num": "number of",
    "std": "standard deviation",
    "se": "standard error",
    "lambda": "λ",
}

# plain notation from 1e-4 up to (not including) 1e6; scientific beyond
_PLAIN_LOW = 1e-4
_PLAIN_HIGH = 1e6


def significant(x: Any, digits: int = 4) -> str:
    """``x`` as text with at most ``digits`` significant digits.

    Plain notation from ``1e-4`` to below ``1e6`` (integer digits are never
    cut: ``123456.7`` is ``"123457"``), scientific notation beyond
    (``"3.2e-07"``, ``"1.235e+09"``); trailing zeros are dropped. Integers
    print in full, ``True``/``False`` as ``"yes"``/``"no"``, ``None`` and
    ``pandas.NA`` as ``"n/a"``, NaN as ``"nan"`` and infinities as
    ``"inf"``/``"-inf"``. Strings pass through.

    Args:
        x: a number (Python, NumPy or a 0-d array), ``None`` or ``pandas.NA``.
        digits: significant digits, 1 or more.

    Examples:
        >>> significant(0.13213097769650292)
        '0.1321'
        >>> significant(2.0), significant(-0.5), significant(9999.7), significant(123456.7)
        ('2', '-0.5', '10000', '123457')
        >>> significant(3.21e-7), significant(1.23456e9, 3), significant(0.0)
        ('3.21e-07', '1.23e+09', '0')
        >>> significant(float("nan")), significant(float("-inf")), significant(None), significant(12)
        ('nan', '-inf', 'n/a', '12')
    """
    if isinstance(digits, bool) or not isinstance(digits, numbers.Integral) or digits < 1:
        raise ValueError(f"digits must be a whole number of at least 1; got {digits!r}.")
    digits = int(digits)
    if x is None or x is pd.NA or x is pd.NaT:
        return "n/a"
    if isinstance(x, str):
        return x
    if isinstance(x, np.ndarray):
        if x.ndim:
            raise ValueError(f"significant formats one number; got an array of shape {x.shape}.")
        x = x.item()
    if isinstance(x, (bool, np.bool_)):
        return "yes" if x else "no"
    if isinstance(x, numbers.Integral):
        return str(int(x))
    if not isinstance(x, numbers.Real):
        raise TypeError(f"significant formats a real number; got {type(x).__name__} {x!r}.")
    v = float(x)
    if math.isnan(v):
        return "nan"
    if math.isinf(v):
        return "inf" if v > 0 else "-inf"
    if v == 0:
        return "0"
    mag = abs(v)
    if _PLAIN_LOW <= mag < _PLAIN_HIGH:
        decimals = max(0, digits - 1 - math.floor(math.log10(mag)))
        text = f"{v:.{decimals}f}"
        if "." in text:
            text = text.rstrip("0").rstrip(".")
        return "0" if text in ("-0", "0") else text
    mantissa, exponent = f"{v:.{digits - 1}e}".split("e")
    if "." in mantissa:
        mantissa = mantissa.rstrip("0").rstrip(".")
    return f"{mantissa}e{exponent}"


def readable_header(name: Any) -> str:
    """A column name in plain words: no underscores, abbreviations spelled out.

    Examples:
        >>> readable_header("grad_norm"), readable_header("final_grad_norm")
        ('gradient norm', 'final gradient norm')
        >>> readable_header("median_steps_to_tol"), readable_header("learning_rate")
        ('median steps to tolerance', 'learning rate')
    """
    text = str(name)
    if text in HEADERS:
        return HEADERS[text]
    words = [w for w in re.split(r"[_\s]+", text) if w]
    return " ".join(HEADER_WORDS.get(w.lower(), w) for w in words) or text


def readable_table(
    frame: pd.DataFrame,
    *,
    digits: int = 4,
    headers: Mapping[str, str] | None = None,
) -> pd.DataFrame:
    """A copy of ``frame`` for display: readable headers, formatted numbers, blanks for gaps.

    Every cell becomes text: numbers through :func:`significant`, missing
    values (``None``, ``NaN``, ``pandas.NA``) as empty strings, so a table
    shows no ``<NA>`` or ``NaN``. Column names go through
    :func:`readable_header`, or ``headers`` where it names them. The index
    is kept. Use the result for showing only; compute on the original.

    Args:
        frame: a pandas DataFrame (e.g. ``runs.table`` or ``minima.table``).
        digits: significant digits of floating-point numbers.
        headers: optional ``{column: header}`` overriding the automatic names.

    Raises:
        TypeError: when ``frame`` is not a DataFrame.
        ValueError: when two columns would get the same header.

    Examples:
        >>> t = pd.DataFrame(
        ...     {"grad_norm": [0.000123456, np.nan], "steps_to_tol": pd.array([3, None], "Int64")}
        ... )
        >>> readable_table(t).to_dict("list")
        {'gradient norm': ['0.0001235', ''], 'steps to tolerance': ['3', '']}
    """
    if not isinstance(frame, pd.DataFrame):
        raise TypeError(
            f"readable_table takes a pandas DataFrame; got {type(frame).__name__}. "
            "Pass e.g. runs.table or minima.table."
        )
    extra = dict(headers or {})
    names = [extra.get(str(c), readable_header(c)) for c in frame.columns]
    seen: dict[str, Any] = {}
    for column, name in zip(frame.columns, names):
        if name in seen:
            raise ValueError(
                f"columns {seen[name]!r} and {column!r} would both be shown as {name!r}; "
                "pass headers={...} to name one of them."
            )
        seen[name] = column

    def cell(value: Any) -> str:
        if isinstance(value, str):
            return value
        try:
            missing = bool(pd.isna(value))
        except (TypeError, ValueError):
            missing = False
        if missing:
            return ""
        if isinstance(value, (numbers.Number, np.generic)):
            return significant(value, digits)
        return str(value)

    out = pd.DataFrame(
        {n: [cell(v) for v in frame[c].tolist()] for c, n in zip(frame.columns, names)},
        index=frame.index,
    )
    return out

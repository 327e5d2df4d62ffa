"""Numbers and table headers for display (basinview/figures/text.py)."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from basinview.figures.text import readable_header, readable_table, significant


@pytest.mark.parametrize(
    ("value", "digits", "text"),
    [
        (0.13213097769650292, 4, "0.1321"),
        (2.0, 4, "2"),
        (-0.5, 4, "-0.5"),
        (1.23456, 3, "1.23"),
        (9999.7, 4, "10000"),  # rounding up keeps plain notation
        (0.099996, 4, "0.1"),
        (123456.7, 4, "123457"),  # integer digits are never cut below 1e6
        (1234567.0, 4, "1.235e+06"),
        (3.21e-7, 4, "3.21e-07"),
        (-2.5e-12, 2, "-2.5e-12"),
        (0.00012345, 3, "0.000123"),
        (0.0, 4, "0"),
        (-0.0, 4, "0"),
        (-1e-20 * 0, 4, "0"),
        (7, 2, "7"),
        (np.int64(123456789), 2, "123456789"),  # integers print in full
        (np.float32(0.1), 4, "0.1"),  # float32 0.1 is 0.100000001...: not printed
        (np.array(2.5), 4, "2.5"),
        (True, 4, "yes"),
        (None, 4, "n/a"),
        (pd.NA, 4, "n/a"),
        (float("nan"), 4, "nan"),
        (np.inf, 4, "inf"),
        (-np.inf, 4, "-inf"),
        ("text", 4, "text"),
    ],
)
def test_significant(value, digits, text):
    assert significant(value, digits) == text


def test_significant_agrees_with_rounding_to_significant_digits():
    # Source: the definition of rounding to n significant digits,
    # round(x, n - 1 - floor(log10|x|)) (common practice); checked with numpy's
    # np.format_float_positional(x, precision=n, unique=False, fractional=False, trim="-").
    rng = np.random.default_rng(0)
    for x in rng.lognormal(0.0, 5.0, 300) * rng.choice([-1.0, 1.0], 300):
        for n in (2, 4, 6):
            text = significant(float(x), n)
            if abs(x) < 10**n or abs(x) >= 1e6:  # between, whole digits are kept
                assert math.isclose(float(text), float(f"{x:.{n}g}"), rel_tol=1e-12), (x, n)
            else:
                assert text == str(round(x)), (x, n, text)
            if 1e-4 <= abs(x) < 10**n:
                reference = np.format_float_positional(
                    x, precision=n, unique=False, fractional=False, trim="-"
                )
                assert float(text) == float(reference), (x, n, text, reference)
            digits = text.lstrip("-").split("e")[0].replace(".", "").lstrip("0")
            if abs(x) < 10**n or "e" in text:
                assert len(digits) <= n, (x, n, text)


def test_significant_rejects_bad_arguments():
    with pytest.raises(ValueError, match="digits"):
        significant(1.0, 0)
    with pytest.raises(ValueError, match="shape"):
        significant(np.arange(3.0))
    with pytest.raises(TypeError, match="real number"):
        significant(1 + 2j)


def test_readable_headers_have_no_snake_case():
    assert readable_header("grad_norm") == "gradient norm"
    assert readable_header("final_grad_norm") == "final gradient norm"
    assert readable_header("median_steps_to_tol") == "median steps to tolerance"
    assert readable_header("max_steps") == "step budget spent"
    assert readable_header("lambda_max") == "λmax"
    assert readable_header("share_low") == "share, low"
    assert readable_header("w[0]") == "w[0]"  # parameter labels pass through


def test_readable_table_formats_cells_and_blanks_missing_values():
    frame = pd.DataFrame(
        {
            "run": [0, 1, 2],
            "status": ["converged", "diverged", "max_steps"],
            "oscillating": [False, True, False],
            "steps_to_tol": pd.array([12, pd.NA, pd.NA], dtype="Int64"),
            "final_loss": [0.13213097769650292, np.nan, 1.5e-9],
            "final_grad_norm": [1e-5, np.inf, None],
        },
        index=[10, 11, 12],
    )
    shown = readable_table(frame)
    assert list(shown.columns) == [
        "run",
        "status",
        "oscillating",
        "steps to tolerance",
        "final loss",
        "final gradient norm",
    ]
    assert list(shown.index) == [10, 11, 12]
    assert shown.to_dict("list") == {
        "run": ["0", "1", "2"],
        "status": ["converged", "diverged", "max_steps"],
        "oscillating": ["no", "yes", "no"],
        "steps to tolerance": ["12", "", ""],
        "final loss": ["0.1321", "", "1.5e-09"],
        "final gradient norm": ["1e-05", "inf", ""],
    }
    text = shown.to_string()
    assert "<NA>" not in text and "NaN" not in text and "_" not in " ".join(shown.columns)
    # the original frame is untouched
    assert frame["final_loss"].iloc[0] == 0.13213097769650292


def test_readable_table_on_a_real_runs_table():
    from basinview import core

    prob = core.Problem(lambda p: (p["x"] - 1.0) ** 2 + 4.0 * p["y"] ** 2, {"x": 0.0, "y": 0.5})
    runs = core.descend(
        prob, np.array([[0.0, 0.5], [3.0, -1.0]], np.float32), learning_rate=[0.1, 0.3], steps=30
    )
    shown = readable_table(runs.table)
    assert all("_" not in c for c in shown.columns)
    assert "learning rate" in shown.columns and "final gradient norm" in shown.columns
    for value in shown.to_numpy().ravel():
        assert value not in ("<NA>", "nan", "NaN")
        mantissa = value.lstrip("-").split("e")[0].replace(".", "").lstrip("0")
        if mantissa.isdigit() and "." in value:
            assert len(mantissa) <= 4, value


def test_readable_table_refuses_clashing_headers_and_non_frames():
    with pytest.raises(ValueError, match="headers="):
        readable_table(pd.DataFrame({"grad": [1.0], "gradient": [2.0]}))
    fixed = readable_table(pd.DataFrame({"grad": [1.0], "gradient": [2.0]}), headers={"grad": "g"})
    assert list(fixed.columns) == ["g", "gradient"]
    with pytest.raises(TypeError, match="DataFrame"):
        readable_table({"a": [1]})

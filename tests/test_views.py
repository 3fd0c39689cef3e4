"""Tests of the views layer: number formatting, text sections, charts and JSON.

Results are built by the real accumulators and engine on small data made here; the
checks compare against numpy, statsmodels and Python's own float parsing.
"""

from __future__ import annotations

import json
import math
import re

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from triage.views.format import NA, format_count, format_number, format_p, truncate

ANSI = re.compile(r"\x1b\[")


# ── format ──────────────────────────────────────────────────────────────────────────


@given(
    st.floats(allow_nan=False, allow_infinity=False, min_value=-1e300, max_value=1e300).filter(
        lambda v: v != 0.0 and abs(v) > 1e-300
    ),
    st.integers(min_value=1, max_value=8),
)
def test_format_number_keeps_significant_digits(value: float, digits: int) -> None:
    # Oracle: Python's float() parses the text back; rounding to `digits` significant
    # digits leaves a relative error of at most half a unit in the last digit.
    text = format_number(value, digits=digits)
    back = float(text)
    assert abs(back - value) <= 0.5 * 10 ** (1 - digits) * abs(value) * (1 + 1e-12)
    mantissa = text.lstrip("-").split("e")[0].replace(".", "").lstrip("0")
    assert len(mantissa) == digits or abs(value) >= 10**digits


def test_format_number_examples() -> None:
    # Expected strings written out by hand for the format's stated rules.
    assert format_number(0.03125, digits=3) == "0.0312"  # round-half-even of 3.125e-2
    assert format_number(12345.678) == "12350"
    assert format_number(9.99996) == "10.00"
    assert format_number(1.5e7) == "1.500e7"
    assert format_number(-3.1e-9, digits=2) == "-3.1e-9"
    assert format_number(2.5, digits=3, trim=True) == "2.5"
    assert format_number(0.0) == "0"
    assert format_number(float("inf")) == "inf"
    assert format_number(np.float32(0.5)) == "0.5000"


@pytest.mark.parametrize("missing", [None, float("nan"), np.nan, np.float64("nan")])
def test_format_missing_is_not_available_mark(missing: object) -> None:
    assert format_number(missing) == NA
    assert format_p(missing) == NA
    assert format_count(missing) == NA


def test_format_p_values() -> None:
    assert format_p(0.0312) == "0.0312"
    assert format_p(0.0) == "<1e-300"
    assert format_p(1e-310) == "<1e-300"
    assert format_p(3.14159e-9) == "3.1e-9"
    assert format_p(1.0) == "1.00"
    # Oracle: scipy's normal tail gives a p-value that underflows to exactly 0.
    from scipy import stats

    assert format_p(2 * stats.norm.sf(40.0)) == "<1e-300"


def test_format_count_separators() -> None:
    assert format_count(1204) == "1,204"
    assert format_count(np.int64(60_000_000)) == "60,000,000"
    assert format_count(0) == "0"


@given(st.text(min_size=0, max_size=40), st.integers(min_value=0, max_value=50))
def test_truncate_fits_and_marks_cuts(text: str, width: int) -> None:
    out = truncate(text, width)
    assert len(out) <= width
    if len(text) <= width:
        assert out == text
    elif width == 0:
        assert out == ""
    else:
        assert out.endswith("…")
        assert text.startswith(out[:-1])

"""The one NaN cleaner and number formatters (actdoc/formatting.py) shared by every output.

JSON (RFC 8259 section 6) has no spelling for NaN or the infinities: Python's json module with
``allow_nan=False`` is the reference that refuses them, so every cleaned value must pass it.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from actdoc.formatting import clean_number, exact, from_json_number, number, percent, plain, share


@pytest.mark.parametrize("value, cleaned", [
    (None, None), (0.25, 0.25), (3, 3), (True, 1), (np.int64(7), 7), (np.float32(0.5), 0.5),
    (math.nan, None), (math.inf, None), (-math.inf, None), (np.float64("nan"), None),
])
def test_clean_number_is_json_safe(value, cleaned):
    out = clean_number(value)
    assert out == cleaned and type(out) is type(cleaned)
    json.dumps(out, allow_nan=False)  # raises ValueError on NaN or infinity
    if isinstance(value, float) and out is None:
        assert math.isnan(from_json_number(out))


def test_plain_cleans_nested_numpy_values():
    data = {"a": np.array([1.0, np.nan, np.inf]), 2: (np.bool_(True), np.int32(4)),
            "s": np.str_("x"), "n": None}
    out = plain(data)
    assert out == {"a": [1.0, None, None], "2": [True, 4], "s": "x", "n": None}
    assert type(out["2"][0]) is bool and type(out["2"][1]) is int and type(out["s"]) is str
    json.dumps(out, allow_nan=False)


@pytest.mark.parametrize("value, text", [
    (None, ""), (0.5, "0.5"), (-1.25e-7, "-1.25e-07"), (123456789.0, "1.23457e+08"),
    (math.nan, "nan"), (math.inf, "inf"),
])
def test_exact_keeps_six_significant_digits(value, text):
    assert exact(value) == text
    if text not in ("", "nan", "inf"):
        assert float(text) == pytest.approx(value, rel=5e-6)


def test_share_spellings_of_each_output():
    assert share(0.5) == "50.0%" and share(None) == ""            # Markdown table
    assert share(0.253, 0) == "25%"                                  # terminal report
    assert share(0.031, 1, 5) == "  3.1%" and share(1.0, 1, 5) == "100.0%"  # progress, compare


def test_table_cells_of_the_dashboard():
    assert number(None) == "–" and number(12345) == "12,345" and number(math.nan) == "–"
    assert number(math.inf) == "∞" and number(0.000123) == "1.23e-04" and number(0.5) == "0.5"
    assert percent(0.0) == "0%" and percent(0.0004) == "<0.1%" and percent(0.05) == "5.0%"
    assert percent(0.5) == "50%" and percent(None) == "–"

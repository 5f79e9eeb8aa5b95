"""The text and Markdown reports on the findings added for real models: the probe batch, findings
about it, whole-layer findings (gradient_flow, saturated_layer, in_place_record) and related ones.

References: the probe's figures against numpy on the stored probe input (numpy.std with its
default ddof=0, over the rows with no NaN); an in-place ReLU record (preact == output == max(z, 0),
never negative) is the in_place_record pattern of docs/checks.md; scipy.special.expit is the
logistic.
"""

from __future__ import annotations

import re

import numpy as np
import pytest
from scipy.special import expit

from actdoc.analysis import analyze
from actdoc.io.memory import dump_from_arrays
from actdoc.reports.tables import render_markdown
from actdoc.reports.text import render_text


@pytest.fixture(scope="module")
def findings():
    """An in-place ReLU record, a logistic layer driven into saturation by raw inputs, and a
    probe with one NaN row and features far from unit scale (planted, common practice)."""
    rng = np.random.default_rng(5)
    x = rng.normal(0.0, 1.0, (600, 4)) * np.array([1.0, 50.0, 200.0, 3.0])
    x[7, 1] = np.nan
    z1 = rng.normal(0.0, 1.0, (600, 10))
    y1 = np.maximum(z1, 0.0)
    z2 = rng.normal(0.0, 1.0, (600, 6)) * 100.0
    layers = {
        "fc1": {"activation": "relu", "preact": y1, "output": y1,
                "weight": rng.normal(0, 0.5, (10, 4))},
        "fc2": {"activation": "logistic", "preact": z2, "output": expit(z2),
                "weight": rng.normal(0, 0.5, (6, 10))},
    }
    return x, analyze(dump_from_arrays(layers, probe_input=x), digest=False)


def test_text_report_names_the_probe_and_the_whole_layer_findings(findings):
    x, result = findings
    text = render_text(result)
    clean = x[np.isfinite(x).all(axis=1)]
    header = " ".join(line.strip() for line in text.splitlines()[2:4])
    assert "probe: 600 samples, 4 input features" in header
    assert f"std up to {np.std(clean, axis=0).max():.3g}" in header   # numpy as the reference
    assert "1 row with NaN or infinity" in header
    fc1 = next(line for line in text.splitlines() if "] fc1" in line)
    assert "in_place_record" in fc1            # a whole-layer finding shows on its layer's line
    fc2 = next(line for line in text.splitlines() if "] fc2" in line)
    assert "saturated_layer" in fc2
    assert "(? = activation inferred" not in text      # every kind here is declared
    assert re.search(r"^  WARNING  probe batch / probe_nonfinite$", text, re.M)
    assert "probe/input" not in text
    related = [f for f in result.findings if f.related]
    assert related
    assert "see also on this layer: " + ", ".join(related[0].related) in text.replace(
        "\n      ", " ")


def test_markdown_report_has_a_probe_line_and_whole_layer_column(findings):
    _x, result = findings
    text = render_markdown(result)
    assert "- probe batch: 600 samples, 4 input features" in text
    header = next(line for line in text.splitlines() if line.startswith("| # |"))
    assert header.rstrip(" |").endswith("whole-layer findings")
    row = next(line for line in text.splitlines() if line.startswith("| 0 |"))
    assert row.rstrip(" |").endswith("in\\_place\\_record") or "in_place_record" in row
    section = text.split("`probe_nonfinite` in the probe batch", 1)[1].split("###", 1)[0]
    assert "- units:" not in section and "- measure: 1 " in section
    inplace = text.split("`in_place_record` in `fc1`", 1)[1].split("###", 1)[0]
    assert "- units: the whole layer" in inplace

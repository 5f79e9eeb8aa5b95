"""The four report formats and the findings archive, from one hand-built Findings object.

The object here is a fixture for the formats only; whether the engine finds the right units is
tested in tests/analysis against outside references.
"""

from __future__ import annotations

import csv
import io
import json

import numpy as np
import pytest

from actdoc.model import (
    CAVEAT, ActivationKind, ActivationSource, ArrayInfo, Finding, Findings, Histogram, LayerInfo,
    LayerReport, LayerStatus, Severity, SourceInfo, WeightSummary,
)
from actdoc.reports import load_findings, render, save_findings, to_document


def _report(name, index, kind, units, status, fractions, weights=None):
    info = LayerInfo(name=name, index=index, kind=kind, kind_source=ActivationSource.DECLARED,
                     units=units, samples=64, spatial_shape=(),
                     arrays={"preact": ArrayInfo((64, units), "float32")})
    table = {"mean": np.linspace(0, 1, units), "state": np.array(["dead"] + [""] * (units - 1))}
    hist = {"preact": Histogram("preact", np.linspace(-1, 1, 5), np.array([1, 2, 3, 4]))}
    return LayerReport(info=info, fractions=fractions, status=status, output_scale=0.5,
                       gradient_gain=float("nan"), unit_table=table, histograms=hist,
                       weights=weights)


@pytest.fixture
def findings():
    weights = WeightSummary(fan_in=3, fan_out=4, std=0.2, reference_std=0.8, reference="He",
                            row_norms=np.ones(4), bias=np.zeros(4))
    layers = (
        _report("fc1", 0, ActivationKind.RELU, 4, LayerStatus.CRITICAL,
                {"dead": 0.5, "dormant": 0.0}, weights),
        _report("fc2", 1, ActivationKind.LOGISTIC, 3, LayerStatus.HEALTHY,
                {"saturated": 0.0}),
    )
    found = (
        Finding("dead", Severity.CRITICAL, "fc1", (0, 2), 0.5, 0.5, "Half the units never fire.",
                "a large learning rate", "lower the rate", unit_measures=(0.0, 0.0)),
        Finding("vanishing_signal", Severity.WARNING, "fc2", (), 0.05, 0.1, "Signal shrinks.",
                "small weights", "He initialisation"),
    )
    return Findings(SourceInfo("m.h5", "ab" * 32, "hdf5", 64), layers, found,
                    settings={"dormant_fraction": 0.01})


def test_json_document_has_the_interface_fields(findings):
    # docs/contract.md section 4: keys and value types of the findings document.
    doc = json.loads(render(findings, "json"))
    assert doc["schema"] == "actdoc.findings/1"
    assert doc["source"] == {"file": "m.h5", "sha256": "ab" * 32, "format": "hdf5", "samples": 64}
    layer = doc["layers"][0]
    for key, kind in [("name", str), ("index", int), ("activation", str),
                      ("activation_source", str), ("units", int), ("samples", int),
                      ("observations", int), ("fractions", dict), ("status", str)]:
        assert isinstance(layer[key], kind), key
    assert layer["status"] in ("healthy", "warning", "critical")
    entry = doc["findings"][0]
    # the contract's keys, plus the one extension docs/findings.md documents for a finding
    assert set(entry) == {"check", "severity", "layer", "units", "measure", "threshold",
                          "summary", "cause", "remedy", "related"}
    assert entry["related"] == []
    assert entry["units"] == [0, 2]
    # NaN has no JSON spelling: it must come out as null, not as a bare NaN token.
    assert doc["layers"][0]["gradient_gain"] is None
    assert doc["caveat"] == CAVEAT


def test_csv_has_one_row_per_flagged_unit(findings):
    rows = list(csv.DictReader(io.StringIO(render(findings, "csv"))))
    assert [(r["layer"], r["unit"], r["check"]) for r in rows] == [
        ("fc1", "0", "dead"), ("fc1", "2", "dead"), ("fc2", "", "vanishing_signal")]
    assert rows[0]["severity"] == "critical" and float(rows[0]["measure"]) == 0.0


def test_markdown_and_text_carry_verdict_findings_and_caveat(findings):
    md = render(findings, "md")
    text = render(findings, "text")
    for out in (md, text):
        assert "fc1" in out and "dead" in out and "lower the rate" in out
    assert "| `fc1` |" in md.replace("| 0 | `fc1` |", "| `fc1` |")
    assert "probe batch" in md and "probe batch" in text
    # Most serious first.
    assert md.index("CRITICAL") < md.index("WARNING")


def test_unknown_format_is_refused(findings):
    with pytest.raises(ValueError, match="unknown report format"):
        render(findings, "xml")


def test_archive_round_trip_keeps_everything(findings, tmp_path):
    save_findings(findings, tmp_path / "cache")
    back = load_findings(tmp_path / "cache")
    assert to_document(back) == to_document(findings)
    assert back.findings[0].unit_measures == (0.0, 0.0)
    np.testing.assert_array_equal(back.layers[0].unit_table["state"],
                                  findings.layers[0].unit_table["state"])
    np.testing.assert_array_equal(back.layers[0].weights.row_norms, np.ones(4))
    assert back.layers[1].weights is None
    assert back.layers[0].info == findings.layers[0].info

"""The writer refuses a layer's weight or bias whose shape does not match its units (the dump
layout of docs/contract.md section 1: one weight row and one bias entry per unit), and flags
pre-activations that are a copy of the outputs (in-place capture)."""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from actdoc.io import open_dump
from actdoc.io.writer import DumpWriter, InPlaceWarning

RNG = np.random.default_rng(3)


@pytest.mark.parametrize("kwargs, message", [
    ({"units": 8, "weight": np.ones((4, 3))}, "weight has 4 rows but the layer has 8 units"),
    ({"units": 8, "weight": np.ones((8, 3)), "bias": np.ones(5)},
     "weight has 8 rows but bias has 5 entries"),
    ({"units": 8, "bias": np.ones(7)}, "bias has 7 entries but the layer has 8 units"),
    ({"units": 8, "weight": np.ones(8)}, "expected [units, fan_in]"),
    ({"units": 8, "bias": np.ones((8, 1))}, "expected shape [units]"),
    ({"preact": np.ones((5, 8)), "weight": np.ones((6, 3))},
     "weight has 6 rows but the layer has 8 units"),
    ({"units": 3, "spatial": (4, 4), "weight": np.ones((2, 1, 3, 3))},
     "weight has 2 rows but the layer has 3 units"),
])
def test_parameter_shapes_are_checked(tmp_path, kwargs, message):
    path = tmp_path / "bad.h5"
    with pytest.raises(ValueError, match=message.replace("[", r"\[").replace("]", r"\]")):
        with DumpWriter(path) as out:
            out.add_layer("fc", "relu", **kwargs)
    assert not path.exists()


def test_units_learnt_from_the_first_block_are_checked(tmp_path):
    path = tmp_path / "late.h5"
    with pytest.raises(ValueError, match="weight has 4 rows but the layer has 6 units"):
        with DumpWriter(path) as out:
            out.add_layer("fc", "relu", weight=np.ones((4, 2)))
            out.append("fc", preact=np.ones((3, 6)))
    assert not path.exists()


def test_matching_parameters_are_written(tmp_path):
    w, b = RNG.normal(size=(6, 4)), RNG.normal(size=6)
    z = RNG.normal(size=(20, 6))
    with warnings.catch_warnings():
        warnings.simplefilter("error", InPlaceWarning)
        with DumpWriter(tmp_path / "ok.h5") as out:
            out.add_layer("fc", "relu", units=6, weight=w, bias=b)
            out.append("fc", preact=z, output=np.maximum(z, 0))
    with open_dump(tmp_path / "ok.h5") as dump:
        np.testing.assert_allclose(dump.layer("fc").weight(), w.astype(np.float64), rtol=1e-6)
        assert dump.layer("fc").info.kind_note == ""


def test_in_place_copy_is_flagged_on_write_and_open(tmp_path):
    """z == y and z >= 0 on every block of a relu layer: what a hook that kept z while an
    in-place ReLU overwrote it stores (common practice: in-place ops share storage)."""
    y = np.maximum(RNG.normal(size=(30, 5)), 0).astype(np.float32)
    with pytest.warns(InPlaceWarning, match="hidden"):
        with DumpWriter(tmp_path / "copy.h5") as out:
            out.add_layer("hidden", "relu", units=5)
            out.append("hidden", preact=y[:10], output=y[:10])
            out.append("hidden", preact=y[10:], output=y[10:])
    with open_dump(tmp_path / "copy.h5") as dump:
        assert "in-place activation" in dump.layer("hidden").info.kind_note
    # a linear layer's z == y is what it should be: no note
    with warnings.catch_warnings():
        warnings.simplefilter("error", InPlaceWarning)
        with DumpWriter(tmp_path / "linear.h5") as out:
            out.add_layer("head", "linear", preact=y, output=y)
    with open_dump(tmp_path / "linear.h5") as dump:
        assert dump.layer("head").info.kind_note == ""

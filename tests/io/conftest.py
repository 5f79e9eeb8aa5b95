"""Fixtures for the io tests; the model and its writers live in tests/support/io.py."""

from __future__ import annotations

import numpy as np
import pytest

from tests.support.io import WRITERS, reference_layers


@pytest.fixture
def layers() -> dict[str, dict]:
    return reference_layers()


@pytest.fixture(params=sorted(WRITERS))
def written(request, tmp_path, layers):
    """(path, layers, probe) for every way of writing the reference model."""
    suffix = ".h5" if "hdf5" in request.param else ".npz"
    path = tmp_path / f"model{suffix}"
    probe = np.random.default_rng(1).normal(size=(300, 6)).astype(np.float32)
    WRITERS[request.param](path, layers, probe)
    return path, layers, probe

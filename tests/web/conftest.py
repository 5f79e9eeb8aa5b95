"""Fixtures for the dashboard tests, in the style of Flask's tutorial: app, client, workspace.

The test dumps plant known pathologies. Their expected readings follow from definitions, each
named where it is used: a ReLU unit whose total input is negative on every sample never fires
(dead; common practice), and a logistic unit whose input stays above ln 99 (scipy's logit(0.99))
has every output above 0.99 (saturated, interfaces.md section 4).
"""

from __future__ import annotations

import time
from pathlib import Path

import h5py
import numpy as np
import pytest
from scipy.special import expit

from actdoc.io.writer import write_dump
from actdoc.web import create_app

SAMPLES = 240
DEAD_UNITS = tuple(range(13))  # over half the layer: a critical finding
SATURATED_UNITS = (0, 1, 2)
#: Small enough to test the size limit cheaply, large enough for the planted dumps.
TEST_UPLOAD_LIMIT = 4 * 1024 * 1024


def planted_layers(seed: int = 7) -> dict:
    """Three layers: relu with dead units, logistic with saturated units, a linear read-out."""
    rng = np.random.default_rng(seed)
    z1 = rng.normal(0.0, 1.0, (SAMPLES, 24)).astype(np.float32)
    z1[:, list(DEAD_UNITS)] -= 12.0  # N(0,1) minus 12 stays negative: never active
    z2 = rng.normal(0.0, 1.0, (SAMPLES, 16)).astype(np.float32)
    z2[:, list(SATURATED_UNITS)] += 12.0  # stays above ln 99 ~ 4.595 on every sample
    z3 = rng.normal(0.0, 1.0, (SAMPLES, 3)).astype(np.float32)
    return {
        "hidden1": {"activation": "relu", "preact": z1, "output": np.maximum(z1, 0),
                    "weight": rng.normal(0, np.sqrt(2 / 8), (24, 8)).astype(np.float32),
                    "bias": rng.normal(0, 0.1, 24).astype(np.float32)},
        "hidden2": {"activation": "logistic", "preact": z2,
                    "output": expit(z2).astype(np.float32),  # scipy's logistic
                    "weight": rng.normal(0, np.sqrt(2 / 40), (16, 24)).astype(np.float32),
                    "bias": np.zeros(16, np.float32)},
        "readout": {"activation": "linear", "preact": z3, "output": z3},
    }


@pytest.fixture(scope="session")
def planted_dump(tmp_path_factory) -> Path:
    """An HDF5 dump of the planted layers, written with actdoc's writer."""
    return write_dump(tmp_path_factory.mktemp("dumps") / "planted.h5", planted_layers())


@pytest.fixture(scope="session")
def other_dump(tmp_path_factory) -> Path:
    """A second, different dump (another seed)."""
    return write_dump(tmp_path_factory.mktemp("dumps") / "other.h5", planted_layers(seed=11))


@pytest.fixture
def broken_dump(tmp_path) -> Path:
    """HDF5 that breaks the layout: a layer's preact is one-dimensional."""
    path = tmp_path / "broken.h5"
    with h5py.File(path, "w") as f:
        group = f.create_group("layers/fc1")
        group.attrs["activation"] = "relu"
        group.create_dataset("preact", data=np.zeros(10, np.float32))
    return path


@pytest.fixture
def workspace_dir(tmp_path) -> Path:
    return tmp_path / "workspace"


@pytest.fixture
def app(workspace_dir):
    app = create_app(workspace_dir, max_upload_bytes=TEST_UPLOAD_LIMIT)
    app.config["TESTING"] = True
    return app


@pytest.fixture
def client(app):
    return app.test_client()


@pytest.fixture
def workspace(app):
    return app.extensions["actdoc"].workspace


def post_file(client, path: Path, name: str | None = None, **kwargs):
    with open(path, "rb") as handle:
        return client.post("/api/dumps", data={"file": (handle, name or path.name)},
                           content_type="multipart/form-data", **kwargs)


def wait_until_done(client, dump_id: str, timeout: float = 60.0) -> dict:
    """Poll the API until the analysis ends; returns the final dump object."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        body = client.get(f"/api/dumps/{dump_id}").get_json()
        if body["status"] in ("ready", "failed"):
            return body
        time.sleep(0.05)
    raise AssertionError(f"analysis of {dump_id} still {body['status']} after {timeout} s")


@pytest.fixture
def ready_dump(client, planted_dump) -> str:
    """The planted dump uploaded and analysed; returns its id."""
    response = post_file(client, planted_dump)
    assert response.status_code == 201, response.get_json()
    body = wait_until_done(client, response.get_json()["id"])
    assert body["status"] == "ready", body
    return body["id"]

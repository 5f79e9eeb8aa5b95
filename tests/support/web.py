"""Helpers for the dashboard tests: the planted test model and small HTTP conveniences.

The test dumps plant known pathologies. Their expected readings follow from definitions, each
named where it is used: a ReLU unit whose total input is negative on every sample never fires
(dead; common practice), and a logistic unit whose input stays above ln 99 (scipy's logit(0.99))
has every output above 0.99 (saturated, docs/checks.md).
"""

from __future__ import annotations

import time
from pathlib import Path

import numpy as np
from scipy.special import expit

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



def stop_server(server) -> None:
    """Stop a waitress server served from a thread of the test process: its task threads first,
    then its sockets. Closed the other way, a thread still answering a request (a page that
    polls) pulls the server's closed trigger, writing into whatever file reuses that descriptor
    number, such as a later test's SQLite catalog."""
    server.task_dispatcher.shutdown()
    server.close()

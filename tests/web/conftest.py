"""Fixtures for the dashboard tests, in the style of Flask's tutorial: app, client, workspace.

The planted model and the HTTP helpers live in tests/support/web.py, the browser harness in
tests/support/browser.py.
"""

from __future__ import annotations

from pathlib import Path

import h5py
import numpy as np
import pytest

from actdoc.io.writer import write_dump
from actdoc.web import create_app
from tests.support.browser import launched_chromium, serve_in_thread
from tests.support.web import TEST_UPLOAD_LIMIT, planted_layers, post_file, wait_until_done


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


@pytest.fixture
def ready_dump(client, planted_dump) -> str:
    """The planted dump uploaded and analysed; returns its id."""
    response = post_file(client, planted_dump)
    assert response.status_code == 201, response.get_json()
    body = wait_until_done(client, response.get_json()["id"])
    assert body["status"] == "ready", body
    return body["id"]


@pytest.fixture(scope="session")
def browser():
    """One headless chromium for every browser test of the session (Playwright's sync API
    allows one running instance per process; skips, or fails in CI, without one)."""
    with launched_chromium() as launched:
        yield launched


@pytest.fixture(scope="session")
def demo_app(tmp_path_factory):
    """The dashboard in demo mode, every bundled dump analysed."""
    app = create_app(tmp_path_factory.mktemp("demo-workspace"), demo=True)
    client = app.test_client()
    for dump in client.get("/api/dumps").get_json():
        assert wait_until_done(client, dump["id"])["status"] == "ready", dump["name"]
    return app


@pytest.fixture(scope="session")
def demo_url(demo_app):
    """The analysed demo dashboard served on loopback."""
    yield from serve_in_thread(demo_app)

"""Fixtures for the dashboard tests, in the style of Flask's tutorial: app, client, workspace.

The planted model and the HTTP helpers live in tests/support/web.py.
"""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import h5py
import numpy as np
import pytest

from actdoc.io.writer import write_dump
from actdoc.web import create_app
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


#: Debian's chromium, headless, with nothing that would reach the network on its own.
CHROMIUM_ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
                 "--no-first-run", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync"]


def no_browser(reason: str):
    if os.environ.get("CI"):
        pytest.fail(f"browser tests need chromium in CI: {reason}")
    pytest.skip(reason)


@pytest.fixture(scope="session")
def browser():
    """One headless Chromium for every browser test of the session (Playwright's sync API
    allows one running instance per process)."""
    executable = shutil.which("chromium")
    if executable is None:
        no_browser("no 'chromium' on PATH (Debian: apt-get install chromium)")
    from playwright.sync_api import Error, sync_playwright

    with sync_playwright() as playwright:
        try:
            launched = playwright.chromium.launch(executable_path=executable, args=CHROMIUM_ARGS)
        except Error as error:
            no_browser(f"chromium did not start: {error.message.splitlines()[0]}")
        yield launched
        launched.close()



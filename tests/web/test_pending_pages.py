"""A dump the readers have not opened yet shows where it is, never "0 layers · 0 samples".

The runner is held (Workspace.start does nothing here), so each stage stays put while the pages
are read; the checks then run synchronously with Workspace.check, in the confined child.
"""

from __future__ import annotations

import re

import pytest

from actdoc.web import create_app
from actdoc.workspace import Workspace
from tests.support.web import SAMPLES, post_file, stop_server


@pytest.fixture
def held(tmp_path, monkeypatch):
    monkeypatch.setattr(Workspace, "start", lambda self: None)
    app = create_app(tmp_path / "ws")
    return app.test_client(), app.extensions["actdoc"].workspace


def text(response) -> str:
    assert response.status_code == 200
    return re.sub(r"\s+", " ", response.get_data(as_text=True))


def no_fake_zeros(page: str) -> None:
    assert not re.search(r"\b0 (layers|samples|probe samples)\b", page)


def test_a_waiting_and_a_checking_dump_say_so(held, planted_dump):
    client, store = held
    dump = post_file(client, planted_dump).get_json()
    assert dump["stage"] == "waiting to be checked" and dump["layers"] is None
    shelf, survey = text(client.get("/")), text(client.get(dump["page"]))
    for page in (shelf, survey):
        assert "waiting to be checked" in page
        no_fake_zeros(page)
    assert "Survey of the whole model · hdf5 · waiting to be checked</p>" in survey
    assert "<h2>Waiting to be checked</h2>" in survey

    store.catalog.update(dump["id"], phase="checking")
    assert client.get(f"/api/dumps/{dump['id']}").get_json()["stage"] == "checking"
    shelf, survey = text(client.get("/")), text(client.get(dump["page"]))
    for page in (shelf, survey):
        assert 'class="progress-label muted">checking</span>' in page
        no_fake_zeros(page)
    assert "<h2>Checking</h2>" in survey


def test_a_checked_dump_shows_its_layers_while_it_waits(held, planted_dump):
    client, store = held
    dump = post_file(client, planted_dump).get_json()
    assert store.check(dump["id"]).checked
    twin = client.get(f"/api/dumps/{dump['id']}").get_json()
    assert twin["layers"] == 3 and twin["samples"] == SAMPLES
    assert twin["status"] == "queued" and twin["stage"] == "waiting for analysis"
    survey = text(client.get(dump["page"]))
    assert f"· hdf5 · 3 layers · {SAMPLES} probe samples</p>" in survey
    assert "<h2>Waiting for analysis</h2>" in survey
    assert f"hdf5 · {SAMPLES} samples ·" in text(client.get("/"))


def test_a_refused_dump_shows_its_one_sentence(held, broken_dump):
    client, store = held
    dump = post_file(client, broken_dump).get_json()
    failed = store.check(dump["id"])
    assert failed.status == "failed" and failed.error.startswith("broken.h5")
    shelf, survey = text(client.get("/")), text(client.get(dump["page"]))
    from markupsafe import escape

    for page in (shelf, survey):
        assert str(escape(failed.error)) in page
        no_fake_zeros(page)
    assert "· hdf5 · not read</p>" in survey
    twin = client.get(f"{dump['page']}?format=json").get_json()
    assert twin["dump"]["layers"] is None and twin["dump"]["stage"] == "failed"


@pytest.mark.browser
def test_the_shelf_in_a_browser_follows_the_check(browser, held, tmp_path, planted_dump,
                                                  other_dump, broken_dump):
    """In Chromium: the rows say where each dump is; when the check reads the waiting file the
    page reloads by itself and shows its samples and layers (screenshots in tests/artifacts/:
    pending-shelf-before.png, pending-shelf-after.png)."""
    import threading
    import time
    from pathlib import Path

    import waitress

    client, store = held
    waiting = post_file(client, planted_dump).get_json()
    checked = post_file(client, other_dump).get_json()
    refused = post_file(client, broken_dump).get_json()
    store.check(checked["id"])
    store.check(refused["id"])
    app = client.application
    server = waitress.create_server(app, host="127.0.0.1", port=0, threads=4)
    threading.Thread(target=server.run, daemon=True).start()
    artifacts = Path(__file__).resolve().parents[2] / "tests" / "artifacts"
    artifacts.mkdir(exist_ok=True)
    page = browser.new_page(viewport={"width": 1280, "height": 900})
    try:
        errors = []
        page.on("pageerror", lambda error: errors.append(str(error)))
        page.goto(f"http://127.0.0.1:{server.effective_port}/")

        def row(name: str) -> str:
            return " ".join(page.locator(f'tr[data-name="{name}"]').inner_text().split())

        assert "waiting to be checked" in row("planted.h5")
        assert f"{SAMPLES} samples" in row("other.h5") and "waiting for analysis" in row(
            "other.h5")
        assert "not read" in row("broken.h5") and "broken.h5, layer 'fc1'" in row("broken.h5")
        for name in ("planted.h5", "other.h5", "broken.h5"):
            assert not re.search(r"\b0 samples\b", row(name))
        page.screenshot(path=str(artifacts / "pending-shelf-before.png"), full_page=True)

        store.check(waiting["id"])
        deadline = time.monotonic() + 30
        while f"{SAMPLES} samples" not in row("planted.h5"):  # the reload after the check
            assert time.monotonic() < deadline, "the Shelf did not follow the check"
            page.wait_for_timeout(200)
        assert "waiting for analysis" in row("planted.h5")
        page.screenshot(path=str(artifacts / "pending-shelf-after.png"), full_page=True)
        assert errors == []
    finally:
        page.close()  # it keeps polling
        stop_server(server)

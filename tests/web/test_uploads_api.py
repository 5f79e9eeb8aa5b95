"""The HTTP API of docs/contract.md section 6 and the workspace behind it, through Flask's client."""

from __future__ import annotations

import io
import json
import math

from scipy.special import logit

from actdoc.web import create_app
from tests.support.web import (DEAD_UNITS, SATURATED_UNITS, TEST_UPLOAD_LIMIT, planted_layers,
                      post_file, wait_until_done)


def test_upload_answers_201_and_the_analysis_reaches_ready(client, planted_dump):
    response = post_file(client, planted_dump)
    assert response.status_code == 201
    body = response.get_json()
    assert {"id", "name", "status", "progress"} <= body.keys()
    assert body["name"] == "planted.h5"
    assert body["status"] in ("queued", "analysing", "ready")
    assert body["duplicate"] is False
    assert response.headers["Location"].endswith(f"/api/dumps/{body['id']}")

    done = wait_until_done(client, body["id"])
    assert done["status"] == "ready" and done["progress"] == 1.0
    assert done["verdicts"]["critical"] + done["verdicts"]["warning"] \
        + done["verdicts"]["healthy"] == 3
    listed = client.get("/api/dumps").get_json()
    assert [d["id"] for d in listed] == [body["id"]]


def test_findings_document_names_the_planted_units(client, ready_dump):
    document = client.get(f"/api/dumps/{ready_dump}/findings.json").get_json()
    assert document["schema"] == "actdoc.findings/1"
    assert document["source"]["file"] == "planted.h5"
    assert [layer["name"] for layer in document["layers"]] == ["hidden1", "hidden2", "readout"]
    by_check = {(f["layer"], f["check"]): f for f in document["findings"]}
    # ReLU inputs below zero on every sample: never active (dead; common practice).
    assert by_check[("hidden1", "dead")]["units"] == list(DEAD_UNITS)
    # Inputs above logit(0.99) = ln 99 (scipy) on every sample: saturated on one side.
    planted = planted_layers()["hidden2"]["preact"][:, list(SATURATED_UNITS)]
    assert planted.min() > logit(0.99)
    assert by_check[("hidden2", "saturated")]["units"] == list(SATURATED_UNITS)


def test_findings_come_as_csv_markdown_and_text(client, ready_dump):
    csv = client.get(f"/api/dumps/{ready_dump}/findings.csv")
    assert csv.status_code == 200 and csv.mimetype == "text/csv"
    assert "dead" in csv.get_data(as_text=True)
    md = client.get(f"/api/dumps/{ready_dump}/findings.md?download=1")
    assert md.status_code == 200 and md.mimetype == "text/markdown"
    assert 'filename="planted-findings.md"' in md.headers["Content-Disposition"]
    assert client.get(f"/api/dumps/{ready_dump}/findings.xml").status_code == 404
    text = client.get(f"/api/dumps/{ready_dump}/findings.txt")
    assert text.status_code == 200 and text.mimetype == "text/plain"
    assert "hidden1" in text.get_data(as_text=True)
    assert "Content-Disposition" not in text.headers


def test_same_bytes_uploaded_twice_are_one_dump(client, workspace, planted_dump):
    first = post_file(client, planted_dump).get_json()
    second = post_file(client, planted_dump, name="copy-of-planted.h5")
    assert second.status_code == 201
    assert second.get_json()["id"] == first["id"]
    assert second.get_json()["duplicate"] is True
    assert len(client.get("/api/dumps").get_json()) == 1
    assert len(list((workspace.root / "dumps").iterdir())) == 1


def test_unknown_dump_is_404_everywhere(client):
    for url in ("/api/dumps/feedbeef", "/api/dumps/feedbeef/findings.json"):
        response = client.get(url)
        assert response.status_code == 404
        assert "feedbeef" in response.get_json()["error"]
    assert client.delete("/api/dumps/feedbeef").status_code == 404
    page = client.get("/dumps/feedbeef")
    assert page.status_code == 404 and page.mimetype == "text/html"
    assert b"feedbeef" in page.data and b"actdoc" in page.data


def test_findings_before_ready_are_409(client, workspace, planted_dump):
    # Stored through the workspace directly: nothing submits it to the worker.
    record, created = workspace.ingest_path(planted_dump)
    assert created and record.status == "queued"
    response = client.get(f"/api/dumps/{record.id}/findings.json")
    assert response.status_code == 409
    assert "queued" in response.get_json()["error"]
    assert client.get(f"/dumps/{record.id}/layers/0").status_code == 409
    overview = client.get(f"/dumps/{record.id}")
    assert overview.status_code == 200 and b"progressbar" in overview.data


def test_upload_past_the_limit_is_413(client, tmp_path, workspace):
    # Just past the limit: werkzeug lets the body in, the workspace's spool counts and stops it.
    just_over = tmp_path / "big.h5"
    just_over.write_bytes(b"\x89HDF\r\n\x1a\n" + bytes(TEST_UPLOAD_LIMIT))
    response = post_file(client, just_over)
    assert response.status_code == 413
    assert "big.h5" in response.get_json()["error"]
    # Far past it: refused from the Content-Length before anything is read.
    far_over = tmp_path / "huge.h5"
    far_over.write_bytes(bytes(TEST_UPLOAD_LIMIT + 200_000))
    assert post_file(client, far_over).status_code == 413
    assert list((workspace.root / "tmp").iterdir()) == []
    assert client.get("/api/dumps").get_json() == []


def test_file_of_neither_type_is_415(client, tmp_path, workspace):
    text = tmp_path / "notes.txt"
    text.write_text("layer,unit\n1,2\n")
    response = post_file(client, text)
    assert response.status_code == 415
    message = response.get_json()["error"]
    assert message.startswith("notes.txt: ") and "HDF5" in message
    assert list((workspace.root / "tmp").iterdir()) == []


def test_invalid_dump_fails_in_the_background_with_the_readers_sentence(client, broken_dump):
    """The readers run in the background (docs/dashboard.md): the upload answers 201 queued,
    then the dump turns failed with the very sentence ``open_dump`` gives."""
    from actdoc.errors import ActdocError
    from actdoc.io import open_dump

    try:
        open_dump(broken_dump)
    except ActdocError as error:
        expected = error.message
    response = post_file(client, broken_dump)
    assert response.status_code == 201 and response.get_json()["status"] == "queued"
    done = wait_until_done(client, response.get_json()["id"])
    assert done["status"] == "failed" and done["error"] == expected
    assert "fc1" in expected and "preact" in expected
    refused = client.get(f"/api/dumps/{done['id']}/findings.json")
    assert refused.status_code == 409 and expected in refused.get_json()["error"]


def test_malformed_upload_requests_are_400(client):
    assert client.post("/api/dumps", data=b"raw bytes").status_code == 400
    no_file = client.post("/api/dumps", data={"other": "x"},
                          content_type="multipart/form-data")
    assert no_file.status_code == 400
    assert "file" in no_file.get_json()["error"]


def test_delete_removes_row_file_and_findings(client, workspace, ready_dump):
    record = workspace.get(ready_dump)
    assert workspace.findings_dir(record).is_dir()
    assert client.delete(f"/api/dumps/{ready_dump}").status_code == 204
    assert client.get(f"/api/dumps/{ready_dump}").status_code == 404
    assert not workspace.dump_path(record).exists()
    assert not workspace.findings_dir(record).exists()


def test_a_restarted_app_keeps_its_dumps(workspace_dir, ready_dump):
    again = create_app(workspace_dir).test_client()
    listed = again.get("/api/dumps").get_json()
    assert [d["id"] for d in listed] == [ready_dump]
    assert again.get(f"/api/dumps/{ready_dump}/findings.json").status_code == 200


def test_catalog_uses_write_ahead_logging(workspace):
    import sqlite3

    with sqlite3.connect(workspace.catalog_path) as db:
        assert db.execute("PRAGMA journal_mode").fetchone()[0] == "wal"


def test_upload_without_script_redirects_to_the_survey(client, planted_dump):
    with open(planted_dump, "rb") as handle:
        response = client.post("/upload", data={"file": (handle, "planted.h5")},
                               content_type="multipart/form-data")
    assert response.status_code == 303
    assert response.headers["Location"].startswith("/dumps/")


def test_stream_ingest_outside_flask(tmp_path, planted_dump):
    from actdoc.workspace import Workspace

    store = Workspace(tmp_path / "ws")
    record, created = store.ingest(io.BytesIO(planted_dump.read_bytes()), "../../etc/x.h5")
    assert created and record.name == "x.h5"
    assert store.dump_path(record).parent.parent == store.root / "dumps"
    assert json.loads(json.dumps(record.to_dict()))["status"] == "queued"
    assert math.isclose(record.progress, 0.0)


def test_demo_mode_stores_each_bundled_dump_once(workspace_dir):
    from demo_models import bundled_dumps

    demos = bundled_dumps()
    client = create_app(workspace_dir, demo=True).test_client()
    listed = client.get("/api/dumps").get_json()
    assert sorted(d["name"] for d in listed) == sorted(p.name for p in demos)
    for dump in listed:
        assert wait_until_done(client, dump["id"])["status"] == "ready"
    again = create_app(workspace_dir, demo=True).test_client()
    assert len(again.get("/api/dumps").get_json()) == len(demos)

"""The HTTP API of docs/contract.md section 6, and the upload step the pages share with it."""

from __future__ import annotations

from pathlib import Path

from flask import Blueprint, Response, current_app, jsonify, request, url_for
from werkzeug.exceptions import BadRequest, NotFound

from actdoc.errors import ActdocError
from actdoc.io import parse_activations
from actdoc.reports import MEDIA_TYPES, render
from actdoc.web.headers import attachment
from actdoc.workspace import DumpRecord, UploadSpool

blueprint = Blueprint("api", __name__, url_prefix="/api")

#: File endings of the findings downloads and the report format each one names.
DOWNLOADS = {"json": "json", "csv": "csv", "md": "md", "txt": "text"}


def state():
    """The workspace (with its runner) of the running app."""
    return current_app.extensions["actdoc"]


def declared_activations(file_name: str) -> tuple[str, ...]:
    """The optional multipart fields ``activation`` (repeatable, each one or more specs
    separated by commas): the command line's ``--activation`` syntax, one bare ``KIND`` and/or
    ``LAYER=KIND``. A kind actdoc does not know is a 400 before anything is stored; a layer
    name is checked against the file when the readers open it."""
    specs = tuple(part.strip() for value in request.form.getlist("activation")
                  for part in value.split(",") if part.strip())
    try:
        parse_activations(specs, Path(file_name), option="the field 'activation'")
    except ActdocError as error:
        raise BadRequest(error.message) from None
    return specs


def receive_upload() -> tuple[DumpRecord, bool]:
    """Adopt this request's multipart field ``file`` into the workspace and queue it, with the
    activation kinds its ``activation`` fields declare (declared_activations).

    Returns the record and whether it is new (False: the same bytes were already stored).
    The readers check the file in the background runner, never inside this request.
    """
    if request.mimetype != "multipart/form-data":
        raise BadRequest("send the dump as multipart/form-data, in a field named 'file'")
    upload = request.files.get("file")
    if upload is None or not upload.filename:
        raise BadRequest("the request holds no file in the multipart field 'file'")
    activations = declared_activations(upload.filename)
    workspace = state().workspace
    if isinstance(upload.stream, UploadSpool):
        record, created = workspace.adopt(upload.stream, activations)
    else:
        record, created = workspace.ingest(upload.stream, upload.filename, activations)
    if created:
        workspace.submit(record.id)
    return record, created


def dump_object(record: DumpRecord) -> dict:
    """A dump as the API shows it, with links to its page and its findings."""
    data = record.to_dict()
    data["page"] = url_for("pages.overview", dump_id=record.id)
    data["findings"] = url_for("api.findings", dump_id=record.id, ending="json")
    return data


@blueprint.post("/dumps")
def upload():
    record, created = receive_upload()
    body = dump_object(record)
    body["duplicate"] = not created
    response = jsonify(body)
    response.status_code = 201
    response.headers["Location"] = url_for("api.dump", dump_id=record.id)
    return response


@blueprint.get("/dumps")
def dumps():
    return jsonify([dump_object(record) for record in state().workspace.list()])


@blueprint.get("/dumps/<dump_id>")
def dump(dump_id: str):
    return jsonify(dump_object(state().workspace.get(dump_id)))


@blueprint.get("/dumps/<dump_id>/findings.<ending>")
def findings(dump_id: str, ending: str):
    fmt = DOWNLOADS.get(ending)
    if fmt is None:
        raise NotFound(f"findings come as {', '.join('findings.' + e for e in DOWNLOADS)}")
    workspace = state().workspace
    record = workspace.get(dump_id)
    response = Response(render(workspace.findings(dump_id), fmt), mimetype=None,
                        content_type=MEDIA_TYPES[fmt])
    if request.args.get("download"):
        stem = record.name.rsplit(".", 1)[0] or "dump"
        response.headers["Content-Disposition"] = attachment(f"{stem}-findings.{ending}")
    return response


@blueprint.delete("/dumps/<dump_id>")
def delete(dump_id: str):
    state().workspace.delete(dump_id)
    return Response(status=204)

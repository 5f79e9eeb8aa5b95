"""The one place where failures become HTTP answers: a page in the app's style, or JSON.

Statuses: a dump the readers refuse 422 with their sentence, a file of neither type 415, a file
or member too large 413, an unknown dump 404, findings asked for too early or a
repeated upload that declares other activation kinds 409, a malformed
request or dumps that cannot be compared 400. Any other exception is a bug: 500 with a short
sentence, the traceback in the log.
"""

from __future__ import annotations

import logging

from flask import Flask, jsonify, make_response, render_template, request
from werkzeug.exceptions import HTTPException

from actdoc.errors import ActdocError, DumpTooLarge, IncomparableDumps, UnsupportedFormat
from actdoc.escaping import visible
from actdoc.workspace import NotReady, StoredWithOtherKinds, UnknownDump, UploadTooLarge

log = logging.getLogger(__name__)

#: Most specific first: the first class an error is an instance of decides its status.
STATUS_BY_CLASS: tuple[tuple[type[BaseException], int], ...] = (
    (UnknownDump, 404),
    (NotReady, 409),
    (StoredWithOtherKinds, 409),
    (UploadTooLarge, 413),
    (DumpTooLarge, 413),
    (UnsupportedFormat, 415),
    (IncomparableDumps, 400),
    (ActdocError, 422),
)

TITLES = {
    400: "That request is not one this dashboard understands",
    401: "Access token needed",
    403: "Not allowed from here",
    404: "Nothing here",
    405: "Not an action this address takes",
    409: "Not possible yet",
    413: "Too large",
    415: "Not a dump file",
    422: "The dump cannot be used",
    500: "Something broke inside actdoc",
}


def status_and_message(error: BaseException) -> tuple[int, str]:
    """The HTTP status and the one sentence to show for ``error``."""
    for cls, status in STATUS_BY_CLASS:
        if isinstance(error, cls):
            return status, getattr(error, "message", str(error))
    if isinstance(error, HTTPException):
        return error.code or 500, error.description or error.name
    return 500, "the dashboard hit an internal error; the server log has the details"


def wants_json() -> bool:
    """API routes, ``?format=json`` and clients that prefer JSON get JSON errors."""
    if request.path.startswith("/api/") or request.path.endswith(".json"):
        return True
    if request.args.get("format") == "json":
        return True
    best = request.accept_mimetypes.best_match(["text/html", "application/json"])
    return best == "application/json"


def handle(error: BaseException):
    status, message = status_and_message(error)
    if status >= 500:
        # The path arrives URL-decoded (%1b is ESC): shown escaped, it cannot drive the console.
        log.error("request %s %s failed", visible(request.method), visible(request.path),
                  exc_info=error)
    if wants_json():
        response = jsonify({"error": message})
    else:
        response = make_response(render_template(
            "error.html", status=status, title=TITLES.get(status, "Error"), message=message))
    response.status_code = status
    if status == 401:
        response.headers["WWW-Authenticate"] = "Bearer"
    return response


def register(app: Flask) -> None:
    """Route every exception through ``handle``."""
    app.register_error_handler(Exception, handle)

"""Running the dashboard: waitress (a production WSGI server, not Flask's), and its access token."""

from __future__ import annotations

import json
import secrets
import sys
from pathlib import Path
from typing import TextIO

from waitress.channel import HTTPChannel
from waitress.server import BaseWSGIServer
from waitress.task import ErrorTask

from actdoc.confine import JobLimits
from actdoc.io.limits import ReadLimits
from actdoc.web.app import LOOPBACK_HOSTS, create_app
from actdoc.web.headers import SECURITY_HEADERS
from actdoc.workspace import DEFAULT_MAX_UPLOAD_BYTES

DEFAULT_PORT = 8150
#: Request-handling threads of the server.
THREADS = 8


class JsonErrorTask(ErrorTask):
    """waitress's own error answers (a body past the upload limit, a malformed request) as
    ``{"error": ...}`` with the security headers, like every other answer of the dashboard,
    not as plain text: the app never sees these requests, so its ``after_request`` cannot."""

    def execute(self):
        error = self.request.error
        if error.code == 413:
            limit = self.channel.server.adj.max_request_body_size
            sentence = (f"the request passes the dashboard's upload limit of "
                        f"{limit / 1024**2:.0f} MiB")
        else:
            sentence = f"waitress refused the request: {error.reason} ({error.body})"
        body = json.dumps({"error": sentence}).encode("utf-8")
        self.status = f"{error.code} {error.reason}"
        self.response_headers.append(("Content-Type", "application/json"))
        self.response_headers.extend(SECURITY_HEADERS.items())
        self.set_close_on_finish()
        self.content_length = len(body)
        self.write(body)


class JsonErrorChannel(HTTPChannel):
    error_task_class = JsonErrorTask


def create_server(app, host: str = "127.0.0.1", port: int = DEFAULT_PORT,
                  threads: int = THREADS):
    """A waitress server for ``app`` whose body limit is the app's own: one upload limit
    (``MAX_CONTENT_LENGTH``, from ``max_upload_bytes``), answered as JSON 413 whichever of
    waitress and the app sees the body first."""
    import waitress

    sockets: dict = {}
    server = waitress.create_server(app, map=sockets, host=host, port=port, threads=threads,
                                    max_request_body_size=app.config["MAX_CONTENT_LENGTH"])
    for dispatcher in list(sockets.values()):
        if isinstance(dispatcher, BaseWSGIServer):
            dispatcher.channel_class = JsonErrorChannel
    return server


def is_loopback(host: str) -> bool:
    return host.strip("[]").lower() in LOOPBACK_HOSTS


def resolve_token(host: str, token: str | None) -> str | None:
    """The token the server demands: the given one, else a fresh one off loopback, else None."""
    if token:
        return token
    return None if is_loopback(host) else secrets.token_urlsafe(24)


def address(host: str, port: int, token: str | None) -> str:
    shown = f"[{host}]" if ":" in host and not host.startswith("[") else host
    return f"http://{shown}:{port}/" + (f"?token={token}" if token else "")


def serve(host: str = "127.0.0.1", port: int = DEFAULT_PORT,
          workspace: str | Path | None = None, demo: bool = False, token: str | None = None,
          *, max_upload_bytes: int = DEFAULT_MAX_UPLOAD_BYTES,
          read_limits: ReadLimits | None = None, job_limits: JobLimits | None = None,
          check_slot: bool = True, analysis_slots: int = 1,
          out: TextIO = sys.stdout) -> None:
    """Serve the dashboard with waitress until interrupted, printing its address first.

    Bound to anything but a loopback address, every request needs the token (printed here).
    The limits are create_app's (docs/dashboard.md).
    """
    token = resolve_token(host, token)
    app = create_app(workspace, demo=demo, token=token, max_upload_bytes=max_upload_bytes,
                     read_limits=read_limits, job_limits=job_limits, check_slot=check_slot,
                     analysis_slots=analysis_slots)
    server = create_server(app, host=host, port=port)
    print(f"actdoc dashboard on {address(host, server.effective_port, token)}", file=out)
    if token:
        print(f"every request needs the header 'Authorization: Bearer {token}' "
              "(the address above sets it in the browser)", file=out)
    print(f"workspace: {app.extensions['actdoc'].workspace.root}", file=out, flush=True)
    try:
        server.run()
    except KeyboardInterrupt:
        pass
    finally:
        server.close()

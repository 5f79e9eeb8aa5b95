"""The Flask app factory: workspace, worker, blueprints, the access guard and the error pages."""

from __future__ import annotations

import hmac
from pathlib import Path
from urllib.parse import urlsplit

from flask import Flask, Request, current_app, g, request
from werkzeug.exceptions import Forbidden, Unauthorized

import actdoc
from actdoc.web import api, assets, errors, pages, views
from actdoc.web.describe import describe
from actdoc.web.headers import add_security_headers
from actdoc.formatting import number, percent
from actdoc.web.embed import embed_json, first_sentence
from actdoc.confine import JobLimits
from actdoc.io.limits import ReadLimits
from actdoc.workspace import (DEFAULT_MAX_UPLOAD_BYTES, UploadSpool, Workspace,
                              default_workspace_dir)

#: Cookie that carries the access token after a visit to ``/?token=...`` (browsers cannot set
#: an Authorization header on a plain page load).
TOKEN_COOKIE = "actdoc_token"
LOOPBACK_HOSTS = frozenset({"127.0.0.1", "localhost", "::1"})


def asset_folder(name: str) -> Path:
    """``templates`` or ``static``: inside the package in a wheel, at the repo root when
    editable."""
    package = Path(actdoc.__file__).resolve().parent
    for candidate in (package / name, package.parent / name):
        if candidate.is_dir():
            return candidate
    raise FileNotFoundError(f"actdoc's {name} folder is missing from {package} and its parent")


class UploadRequest(Request):
    """Streams multipart file parts straight into the workspace, hashed and size-limited."""

    def _get_file_stream(self, total_content_length, content_type, filename=None,
                         content_length=None):
        spool = current_app.extensions["actdoc"].workspace.begin_upload(filename)
        g.setdefault("upload_spools", []).append(spool)
        return spool


class State:
    """What the blueprints share: the workspace (with its background runner)."""

    def __init__(self, workspace: Workspace, demo: bool):
        self.workspace = workspace
        self.demo = demo
        #: In demo mode: bundled dump id -> (its demo_models.Demo, position among its files).
        self.demo_files: dict = {}


def create_app(workspace_dir: str | Path | None = None, *, demo: bool = False,
               token: str | None = None,
               max_upload_bytes: int = DEFAULT_MAX_UPLOAD_BYTES,
               read_limits: ReadLimits | None = None,
               job_limits: JobLimits | None = None, check_slot: bool = True,
               analysis_slots: int = 1) -> Flask:
    """Build the dashboard for the workspace in ``workspace_dir`` (default: the per-user one).

    ``token``, when given, is required on every request (``Authorization: Bearer``, or once as
    ``?token=`` which then sets a cookie). ``demo`` adds the bundled demo dumps to the workspace.
    ``read_limits`` (default ``ReadLimits.for_uploads()``) bound what an uploaded file may
    declare; ``job_limits`` the time and memory of each confined check and analysis;
    ``check_slot`` and ``analysis_slots`` how many of them run at once
    (docs/dashboard.md).
    """
    app = Flask("actdoc", template_folder=str(asset_folder("templates")),
                static_folder=str(asset_folder("static")), static_url_path="/static")
    app.request_class = UploadRequest
    # werkzeug refuses bodies past this with 413 before parsing; the spool enforces the same
    # limit for bodies of unknown length. The slack covers multipart headers.
    app.config["MAX_CONTENT_LENGTH"] = max_upload_bytes + 64 * 1024
    app.config["ACTDOC_TOKEN"] = token
    app.json.sort_keys = False

    workspace = Workspace(workspace_dir or default_workspace_dir(),
                          max_upload_bytes=max_upload_bytes,
                          read_limits=read_limits or ReadLimits.for_uploads(),
                          job_limits=job_limits, check_slot=check_slot,
                          analysis_slots=analysis_slots)
    app.extensions["actdoc"] = State(workspace, demo)

    app.jinja_env.filters.update(embed_json=embed_json, first_sentence=first_sentence,
                                  number=number, percent=percent, describe=describe)
    app.jinja_env.globals.update(app_version=actdoc.__version__,
                                 weights_only_note=views.WEIGHTS_ONLY_NOTE,
                                 asset_url=assets.asset_url)
    app.before_request(guard)
    app.after_request(remember_token)
    app.after_request(add_security_headers)
    app.teardown_request(discard_unused_spools)
    for blueprint in (pages.blueprint, api.blueprint, assets.blueprint):
        app.register_blueprint(blueprint)
    errors.register(app)

    if demo:
        app.extensions["actdoc"].demo_files = add_demo_dumps(workspace)
    workspace.start()
    assets.warm_plotly()
    return app


def add_demo_dumps(workspace: Workspace) -> dict:
    """Put the bundled demo dumps in the workspace (already stored ones are recognised).

    Returns each stored dump's id mapped to the ``demo_models.Demo`` it belongs to and its
    file's position among the demo's files (checkpoints of one run count from 0).
    """
    from demo_models import DEMOS, bundled_dumps

    demo_of = {file_name: demo for demo in DEMOS for file_name in demo.files}
    demo_files = {}
    for path in bundled_dumps():
        record, _created = workspace.ingest_path(path)
        if path.name in demo_of:
            demo = demo_of[path.name]
            demo_files[record.id] = (demo, demo.files.index(path.name))
    return demo_files


def _token_matches(candidate: str | None) -> bool:
    expected = current_app.config["ACTDOC_TOKEN"]
    return bool(candidate) and hmac.compare_digest(candidate.encode(), expected.encode())


def host_name(host: str) -> str:
    """The name part of a Host header: "[::1]:8750" -> "::1", "localhost:80" -> "localhost"."""
    if host.startswith("["):
        return host[1:].split("]", 1)[0]
    return host.rsplit(":", 1)[0] if host.count(":") == 1 else host


def guard() -> None:
    """Refuse requests the dashboard must not serve.

    With a token: every request carries it. Without one (loopback only): the Host must be a
    loopback name (a page on another site cannot reach the API by DNS rebinding), and a request
    that changes something must not come from another origin's page.
    """
    if current_app.config["ACTDOC_TOKEN"] is not None:
        header = request.headers.get("Authorization", "")
        bearer = header[7:].strip() if header.lower().startswith("bearer ") else None
        if not (_token_matches(bearer) or _token_matches(request.cookies.get(TOKEN_COOKIE))
                or _token_matches(request.args.get("token"))):
            raise Unauthorized("this dashboard needs its access token: send "
                               "'Authorization: Bearer <token>' or open the address printed "
                               "at start")
    elif host_name(request.host) not in LOOPBACK_HOSTS:
        raise Forbidden(f"this dashboard only answers on a loopback address, "
                        f"not '{request.host}'")
    if request.method not in ("GET", "HEAD", "OPTIONS"):
        origin = request.headers.get("Origin")
        if origin and urlsplit(origin).netloc != request.host:
            raise Forbidden(f"a page from {origin} may not change this dashboard")


def remember_token(response):
    """After a visit with a valid ``?token=``, keep it in a same-site cookie."""
    token = request.args.get("token")
    if token and current_app.config["ACTDOC_TOKEN"] is not None and _token_matches(token):
        response.set_cookie(TOKEN_COOKIE, token, httponly=True, samesite="Strict")
    return response


def discard_unused_spools(_error: BaseException | None) -> None:
    """Remove upload parts that no view adopted (extra fields, aborted requests)."""
    spools: list[UploadSpool] = g.pop("upload_spools", [])
    for spool in spools:
        spool.discard()

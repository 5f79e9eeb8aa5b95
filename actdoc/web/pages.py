"""The dashboard's pages. Each one has a JSON twin: the same data with ``?format=json``."""

from __future__ import annotations

from pathlib import Path
from typing import Any

from flask import (Blueprint, jsonify, make_response, redirect, render_template, request,
                   url_for)
from werkzeug.exceptions import BadRequest, NotFound

import actdoc
from actdoc.model import CAVEAT, LayerReport
from actdoc.web import drift as drift_view
from actdoc.web import explain, looks, markdown, shelf, text, views
from actdoc.web.api import dump_object, receive_upload, state
from actdoc.formatting import plain

blueprint = Blueprint("pages", __name__)


def respond(template: str, payload: dict[str, Any]):
    """The page, or with ``?format=json`` the very data it was drawn from."""
    if request.args.get("format") == "json":
        return jsonify(plain(payload))
    return render_template(template, **payload)


def int_arg(name: str, default: int) -> int:
    text = request.args.get(name)
    if text is None or text == "":
        return default
    try:
        return int(text)
    except ValueError:
        raise BadRequest(f"the query parameter '{name}' must be a whole number, not '{text}'")


def layer_report(dump_id: str, index: int):
    """The findings of a ready dump and one layer's report (404 for a layer it lacks)."""
    findings = state().workspace.findings(dump_id)
    if not 0 <= index < len(findings.layers):
        raise NotFound(f"the dump has {len(findings.layers)} layers; there is no layer {index}")
    return findings, findings.layers[index]


def check_unit(report: LayerReport, unit: int) -> None:
    if not 0 <= unit < report.info.units:
        raise NotFound(f"layer '{report.name}' has {report.info.units} units; "
                       f"there is no unit {unit}")


@blueprint.get("/")
def home():
    """The Shelf: ``?q=`` words to search, ``sort=`` and ``show=`` (see web/shelf.py)."""
    dumps = []
    for record in state().workspace.list():
        entry = dump_object(record)
        if record.id in state().demo_files:
            demo, position = state().demo_files[record.id]
            entry["demo"] = {"name": demo.name, "title": demo.title,
                             "description": demo.description, "checkpoint": position + 1,
                             "checkpoints": len(demo.files)}
        dumps.append(entry)
    payload = shelf.arranged(dumps, request.args.get("q", ""),
                             request.args.get("sort", "name"), request.args.get("show", "all"))
    payload.update(demo=state().demo, demo_series=demo_series_links())
    return respond("home.html", payload)


def demo_series_links() -> list[dict[str, str]]:
    """For each demo made of several checkpoints, the Drift page over all of them."""
    series: dict[str, list[tuple[int, str]]] = {}
    titles: dict[str, str] = {}
    for dump_id, (demo, position) in state().demo_files.items():
        if len(demo.files) > 1:
            series.setdefault(demo.name, []).append((position, dump_id))
            titles[demo.name] = demo.title
    return [{"title": titles[name], "url": url_for("pages.compare",
                                                    dump=[i for _p, i in sorted(picked)])}
            for name, picked in series.items()]


@blueprint.get("/drift")  # registered second: url_for builds /compare
@blueprint.get("/compare")
def compare():
    """Compare: several ready dumps of one model side by side (``?dump=ID&dump=ID...``).
    ``/drift`` is the page's earlier address, kept so old links still work."""
    workspace = state().workspace
    try:
        ids = drift_view.picked_ids(request.args.getlist("dump"))
    except drift_view.TooFewDumps as error:
        raise BadRequest(str(error))
    records = drift_view.series_order([workspace.get(dump_id) for dump_id in ids])
    series = [workspace.findings(record.id) for record in records]
    payload = drift_view.drift(records, series)
    payload["dumps"] = [{**dump_object(record), "label": label}
                        for record, label in zip(records, payload["labels"])]
    return respond("compare.html", payload)


@blueprint.post("/upload")
def upload_form():
    """The upload form without script: store, then go to the dump's page."""
    record, _created = receive_upload()
    return redirect(url_for("pages.overview", dump_id=record.id), code=303)


@blueprint.get("/dumps/<dump_id>")
def overview(dump_id: str):
    record = state().workspace.get(dump_id)
    payload: dict[str, Any] = {"dump": dump_object(record), "caveat": CAVEAT}
    if record.ready:
        payload.update(views.overview(state().workspace.findings(dump_id)))
    return respond("overview.html", payload)


@blueprint.post("/dumps/<dump_id>/delete")
def delete_form(dump_id: str):
    state().workspace.delete(dump_id)
    return redirect(url_for("pages.home"), code=303)


@blueprint.get("/dumps/<dump_id>/layers/<int:index>")
def layer(dump_id: str, index: int):
    record = state().workspace.get(dump_id)
    findings, report = layer_report(dump_id, index)
    payload = views.layer_detail(
        findings, report, sort=request.args.get("sort", "unit"),
        descending=request.args.get("order") == "desc", page=int_arg("page", 1),
        per_page=int_arg("per_page", views.UNITS_PER_PAGE),
        state=request.args.get("state") or None, finding=request.args.get("finding") or None)
    payload["dump"] = dump_object(record)
    payload["layer_count"] = len(findings.layers)
    # The unit map and norm chart append a clicked unit's index to this address.
    payload["unit_url_base"] = url_for("pages.unit", dump_id=dump_id, index=index, unit=0)[:-1]
    return respond("layer.html", payload)


@blueprint.get("/dumps/<dump_id>/layers/<int:index>/units/<int:unit>")
def unit(dump_id: str, index: int, unit: int):
    workspace = state().workspace
    record = workspace.get(dump_id)
    findings, report = layer_report(dump_id, index)
    check_unit(report, unit)
    with workspace.open_dump(dump_id) as dump:
        payload = views.unit_detail(findings, dump, report, unit)
    payload["dump"] = dump_object(record)
    return respond("unit.html", payload)


def checks_document() -> str | None:
    """docs/checks.md: packed beside the package in a wheel, at the repository root when
    editable; None when neither holds it."""
    package = Path(actdoc.__file__).resolve().parent
    for candidate in (package / "docs" / "checks.md", package.parent / "docs" / "checks.md"):
        if candidate.is_file():
            return candidate.read_text(encoding="utf-8")
    return None


@blueprint.get("/help/checks")
def help_checks():
    """How the checks work: docs/checks.md, the measures in plain words, every threshold."""
    from actdoc.analysis.checks import all_checks

    text = checks_document()
    payload = {
        "document": text,
        "explain": explain.explained({}),
        "checks": [{"id": check.name, "scope": check.scope, "look": looks.as_dict(check.name),
                    "cause": check.cause, "remedy": check.remedy}
                   for check in all_checks()],
    }
    if request.args.get("format") == "json":
        return jsonify(plain(payload))
    return render_template("help_checks.html", html=markdown.render(text or ""), **payload)


@blueprint.get("/looks.css")
def looks_css():
    """A class per check (``look-<id>``) in that check's colour, from the one table in
    web/looks.py; checks it does not list get their fallback look."""
    from actdoc.analysis.checks import all_checks

    ids = sorted({check.name for check in all_checks()} | set(looks.LOOKS) | {""})
    rules = []
    for check in ids:
        face = looks.look(check)
        rules.append(f".look-{looks.css_name(check)} {{ --look: {face.colour}; }}")
    response = make_response("\n".join(rules) + "\n")
    response.mimetype = "text/css"
    response.cache_control.max_age = 300
    return response


@blueprint.app_template_filter("look_class")
def look_class(check: str | None) -> str:
    return looks.css_name(check)


@blueprint.record_once
def show_controls_visibly(setup) -> None:
    """Every string a page prints shows control characters (ANSI/OSC escapes, newlines,
    bidirectional overrides) as visible stand-ins: names come from untrusted files."""
    setup.app.jinja_env.finalize = text.finalize


@blueprint.app_template_global("row_look")
def row_look(check: str | None) -> dict:
    return looks.as_dict(check)

"""plotly.js from the installed plotly package: the dashboard never reaches a CDN."""

from __future__ import annotations

from pathlib import Path

from flask import Blueprint, send_file
from werkzeug.exceptions import NotFound

blueprint = Blueprint("assets", __name__, url_prefix="/assets")


def plotly_js_path() -> Path:
    """plotly/package_data/plotly.min.js of the plotly Python package."""
    import plotly

    return Path(plotly.__file__).resolve().parent / "package_data" / "plotly.min.js"


@blueprint.get("/plotly.min.js")
def plotly_js():
    path = plotly_js_path()
    if not path.is_file():
        raise NotFound("plotly.min.js is missing from the installed plotly package")
    return send_file(path, mimetype="text/javascript", max_age=86400)

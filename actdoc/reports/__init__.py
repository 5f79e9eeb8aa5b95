"""Findings as the JSON document, CSV, Markdown and terminal text: all four from one Findings."""

from __future__ import annotations

import json

from actdoc.model import Findings
from actdoc.reports.archive import load_findings, save_findings
from actdoc.reports.document import SCHEMA, to_document
from actdoc.reports.tables import render_csv, render_markdown
from actdoc.reports.text import render_text

FORMATS = ("json", "csv", "md", "text")
MEDIA_TYPES = {
    "json": "application/json",
    "csv": "text/csv; charset=utf-8",
    "md": "text/markdown; charset=utf-8",
    "text": "text/plain; charset=utf-8",
}


def render_json(findings: Findings) -> str:
    return json.dumps(to_document(findings), indent=2, allow_nan=False) + "\n"


_RENDERERS = {"json": render_json, "csv": render_csv, "md": render_markdown, "text": render_text}


def render(findings: Findings, fmt: str) -> str:
    """The findings in ``fmt`` (one of FORMATS)."""
    try:
        renderer = _RENDERERS[fmt]
    except KeyError:
        raise ValueError(f"unknown report format '{fmt}'; choose one of {', '.join(FORMATS)}")
    return renderer(findings)


__all__ = ["FORMATS", "MEDIA_TYPES", "SCHEMA", "load_findings", "render", "render_csv",
           "render_json", "render_markdown", "render_text", "save_findings", "to_document"]

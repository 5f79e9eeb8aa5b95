"""Turning numbers and figures into what a page or a JSON answer can carry safely.

``embed_json`` (through actdoc.formatting.plain: NaN and infinities become null, which JSON can
spell) writes JSON for a ``<script type="application/json">`` block: the characters that
could end the block or confuse an HTML parser are escaped, so data never becomes markup.
"""

from __future__ import annotations

import json
from typing import Any

from markupsafe import Markup

from actdoc.formatting import plain

_SCRIPT_ESCAPES = {
    "&": "\\u0026",
    "<": "\\u003c",
    ">": "\\u003e",
    "\u2028": "\\u2028",
    "\u2029": "\\u2029",
}


def embed_json(value: Any) -> Markup:
    """JSON text safe to place inside ``<script type="application/json">``."""
    text = json.dumps(plain(value), separators=(",", ":"), allow_nan=False)
    for char, escape in _SCRIPT_ESCAPES.items():
        text = text.replace(char, escape)
    return Markup(text)


def first_sentence(text: str) -> str:
    """The first sentence of a paragraph (up to the first full stop followed by a space)."""
    head, stop, _rest = str(text).partition(". ")
    return head + "." if stop else head

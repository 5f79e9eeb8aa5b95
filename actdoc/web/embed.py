"""Turning numbers and figures into what a page or a JSON answer can carry safely.

``plain`` makes numpy values JSON-ready (NaN and infinities become null, which JSON can spell).
``embed_json`` writes JSON for a ``<script type="application/json">`` block: the characters that
could end the block or confuse an HTML parser are escaped, so data never becomes markup.
"""

from __future__ import annotations

import json
import math
from typing import Any

import numpy as np
from markupsafe import Markup

_SCRIPT_ESCAPES = {
    "&": "\\u0026",
    "<": "\\u003c",
    ">": "\\u003e",
    "\u2028": "\\u2028",
    "\u2029": "\\u2029",
}


def plain(value: Any) -> Any:
    """``value`` with numpy arrays and scalars as Python lists and numbers; NaN/inf as None."""
    if isinstance(value, dict):
        return {str(k): plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [plain(v) for v in value]
    if isinstance(value, np.ndarray):
        return plain(value.tolist())
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        number = float(value)
        return number if math.isfinite(number) else None
    if isinstance(value, np.str_):
        return str(value)
    return value


def embed_json(value: Any) -> Markup:
    """JSON text safe to place inside ``<script type="application/json">``."""
    text = json.dumps(plain(value), separators=(",", ":"), allow_nan=False)
    for char, escape in _SCRIPT_ESCAPES.items():
        text = text.replace(char, escape)
    return Markup(text)


def number(value: Any, digits: int = 3) -> str:
    """A number for a table cell: compact, with a dash for missing values."""
    if value is None:
        return "–"
    if isinstance(value, (int, np.integer)) and not isinstance(value, bool):
        return f"{int(value):,}"
    if not isinstance(value, (float, np.floating)):
        return str(value)
    value = float(value)
    if not math.isfinite(value):
        return "–" if math.isnan(value) else ("∞" if value > 0 else "−∞")
    if value != 0 and (abs(value) >= 1e5 or abs(value) < 1e-3):
        return f"{value:.{digits - 1}e}"
    return f"{value:.{digits}g}"


def percent(value: Any) -> str:
    """A share as a percentage for a table cell."""
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "–"
    share = float(value) * 100
    if share == 0:
        return "0%"
    if share < 0.1:
        return "<0.1%"
    return f"{share:.1f}%" if share < 10 else f"{share:.0f}%"


def first_sentence(text: str) -> str:
    """The first sentence of a paragraph (up to the first full stop followed by a space)."""
    head, stop, _rest = str(text).partition(". ")
    return head + "." if stop else head

"""Numbers made ready for an output: the one NaN cleaner and the one set of number formatters.

JSON has no spelling for NaN or the infinities, so every JSON output (the findings document, the
findings archive, the comparison document, the dashboard's embedded data) passes numbers through
``clean_number`` or ``plain``, and ``from_json_number`` reads the ``null`` back as NaN. The text
formatters are shared by the reports (CSV, Markdown, terminal text), the command line and the
dashboard's tables, each output keeping its own spelling:

- ``exact``: six significant digits, "" for a missing value (CSV and Markdown figures);
- ``share``: a fraction as a percentage with fixed decimals, "" for a missing value (report
  tables, the terminal report, the progress bar);
- ``number`` and ``percent``: compact table cells with a dash for missing values (dashboard).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np


def clean_number(value: Any) -> float | int | None:
    """A JSON-safe number: NaN and the infinities become None; whole numbers (Python or numpy,
    booleans included) stay whole; anything else becomes a float."""
    if value is None:
        return None
    if isinstance(value, (bool, int, np.bool_, np.integer)):
        return int(value)
    number = float(value)
    return number if math.isfinite(number) else None


def from_json_number(value: Any) -> float:
    """The reverse of ``clean_number`` for a stored float: None (JSON null) reads back as NaN."""
    return math.nan if value is None else float(value)


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
    if isinstance(value, (int, np.integer, float, np.floating)):
        return clean_number(value)
    if isinstance(value, np.str_):
        return str(value)
    return value


def exact(value: Any) -> str:
    """A figure with six significant digits ("nan" and "inf" spelled out); "" when missing."""
    if value is None:
        return ""
    return f"{float(value):.6g}"


def share(value: Any, decimals: int = 1, width: int = 0) -> str:
    """A fraction as a percentage, ``decimals`` after the point, right-aligned in ``width``
    characters before the sign ("50.0%", "  3.1%"); "" when missing."""
    if value is None:
        return ""
    return f"{100 * float(value):{width}.{decimals}f}%"


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
    value = float(value) * 100
    if value == 0:
        return "0%"
    if value < 0.1:
        return "<0.1%"
    return f"{value:.1f}%" if value < 10 else f"{value:.0f}%"

"""Names from a dump made safe to show: on a page and in a chart.

Dump, layer and file names are chosen by whoever wrote the file. On a page Jinja escapes HTML,
but control characters (ANSI/OSC escape sequences, newlines, bidirectional overrides) would
still reach the reader raw; ``actdoc.escaping.visible`` (shared with the terminal and error
outputs) shows each as the escape a programmer would type (``\\x1b``, ``\\n``, ``\\u202e``),
which every font can draw. Plotly renders a subset of HTML in every text it draws (titles,
axis labels, tick labels, legends, hover text), so ``chart_text`` also turns ``& < >`` into
entities, which plotly.js decodes back into the characters themselves: an ``<a href>`` in a
name is drawn as text, never as a link.
"""

from __future__ import annotations

from typing import Any

from markupsafe import Markup

from actdoc.escaping import visible


def chart_text(text: Any) -> str:
    """``text`` for a plotly string: controls made visible and plotly's markup neutralised."""
    shown = visible(text)
    return shown.replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")


def finalize(value: Any) -> Any:
    """Jinja's finalize hook: every string a template prints shows its controls visibly.
    Markup (macro output, embedded JSON) is already safe and passes unchanged."""
    if isinstance(value, str) and not isinstance(value, Markup):
        return visible(value)
    return value

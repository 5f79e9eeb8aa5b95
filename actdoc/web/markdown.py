"""The project's own Markdown documents (docs/checks.md) as HTML for the dashboard's help page.

Only what those documents use: headings, paragraphs, bullet lists, tables, fenced code, and
inline code, bold, italics and links. Every character is HTML-escaped before any markup is
added, and links become plain text (the page must not lead off the machine).
"""

from __future__ import annotations

import re

from markupsafe import Markup, escape

_INLINE = (
    (re.compile(r"`([^`]+)`"), r"<code>\1</code>"),
    (re.compile(r"\*\*([^*]+)\*\*"), r"<strong>\1</strong>"),
    (re.compile(r"(?<![\w*])\*([^*\s][^*]*)\*(?![\w*])"), r"<em>\1</em>"),
    (re.compile(r"\[([^\]]+)\]\([^)]*\)"), r"\1"),
)


def inline(text: str) -> str:
    """One line's inline markup; ``\\|`` is a literal bar inside tables."""
    html = str(escape(text.replace("\\|", "|")))
    for pattern, replacement in _INLINE:
        html = pattern.sub(replacement, html)
    return html


def slug(text: str) -> str:
    return re.sub(r"[^a-z0-9]+", "-", text.lower()).strip("-")


def _cells(line: str) -> list[str]:
    parts = re.split(r"(?<!\\)\|", line.strip().strip("|"))
    return [part.strip() for part in parts]


def render(text: str) -> Markup:
    """``text`` (Markdown) as safe HTML."""
    out: list[str] = []
    lines = text.splitlines()
    i = 0
    while i < len(lines):
        line = lines[i]
        if not line.strip():
            i += 1
        elif line.startswith("```"):
            block = []
            i += 1
            while i < len(lines) and not lines[i].startswith("```"):
                block.append(lines[i])
                i += 1
            i += 1
            out.append(f"<pre><code>{escape(chr(10).join(block))}</code></pre>")
        elif line.startswith("#"):
            level = min(len(line) - len(line.lstrip("#")) + 1, 4)  # h1 is the page's own
            title = line.lstrip("#").strip()
            out.append(f'<h{level} id="{slug(title)}">{inline(title)}</h{level}>')
            i += 1
        elif line.lstrip().startswith("|"):
            rows = []
            while i < len(lines) and lines[i].lstrip().startswith("|"):
                rows.append(_cells(lines[i]))
                i += 1
            body = [row for row in rows[1:] if not all(set(c) <= set("-: ") for c in row)]
            head = "".join(f'<th scope="col">{inline(c)}</th>' for c in rows[0])
            cells = "".join("<tr>" + "".join(f"<td>{inline(c)}</td>" for c in row) + "</tr>"
                            for row in body)
            out.append(f'<div class="scroll"><table class="doc"><thead><tr>{head}</tr></thead>'
                       f"<tbody>{cells}</tbody></table></div>")
        elif re.match(r"\s*[-*] ", line):
            items: list[str] = []
            while i < len(lines) and (re.match(r"\s*[-*] ", lines[i]) or (
                    lines[i].startswith("  ") and lines[i].strip() and items)):
                if re.match(r"\s*[-*] ", lines[i]):
                    items.append(re.sub(r"^\s*[-*] ", "", lines[i]))
                else:
                    items[-1] += " " + lines[i].strip()
                i += 1
            out.append("<ul>" + "".join(f"<li>{inline(item)}</li>" for item in items) + "</ul>")
        else:
            paragraph = []
            while i < len(lines) and lines[i].strip() and not re.match(
                    r"(#|```|\s*\||\s*[-*] )", lines[i]):
                paragraph.append(lines[i].strip())
                i += 1
            out.append(f"<p>{inline(' '.join(paragraph))}</p>")
    return Markup("\n".join(out))

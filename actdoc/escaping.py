"""Names from a dump made safe for the outputs that are not web pages: terminal, Markdown, CSV.

Layer, array and file names are chosen by whoever wrote the dump, so they are untrusted text.

- Terminal and one-line messages (``visible``): ECMA-48 (5th edition, 1991) defines the C0 set
  (0x00-0x1F), DEL (0x7F) and the C1 set (0x80-0x9F, which includes the 8-bit CSI 0x9B and OSC
  0x9D); ESC (0x1B) starts the 7-bit escape sequences (CSI ``ESC [``, OSC ``ESC ]``) that recolour,
  move the cursor, retitle the window or draw hyperlinks. Each such character is shown as a
  Python-style escape (``\\x1b``, ``\\n``, ``\\r``, ``\\t``), so it is seen rather than obeyed and
  a message stays on one line. The Unicode line and paragraph separators (U+2028, U+2029) and the
  bidirectional controls that reorder what a reader sees (U+200E, U+200F, U+202A-U+202E,
  U+2066-U+2069, the "Trojan Source" characters of CVE-2021-42574) are shown as ``\\uXXXX``.
  Backslashes are kept as they are, so ``visible`` is idempotent: text escaped once (by
  ``errors.describe`` say) is unchanged when escaped again (by the command line).
- Markdown (``markdown_text``, ``markdown_code``): CommonMark 0.31.2. Any ASCII punctuation may be
  backslash-escaped (section 2.4); a code span's content is taken literally and is delimited by a
  backtick string longer than any inside it, padded with one space where the content begins or
  ends with a backtick (section 6.1). In a GitHub-flavoured table (GFM 0.29, section 4.10) a pipe
  splits cells even inside a code span unless it is written ``\\|``.
- CSV (``csv_text``, ``csv_field``): OWASP's "CSV Injection" guidance: a text cell that begins with
  ``=``, ``+``, ``-``, ``@``, tab or carriage return (and, by OWASP ASVS 5.0 requirement 1.2.10,
  NUL) is read as a formula by spreadsheets; it is prefixed with a single quote and quoted.
  RFC 4180 section 2 (rules 6 and 7): a field holding a comma, a double quote, CR or LF is
  enclosed in double quotes, and a double quote inside it is doubled.
"""

from __future__ import annotations

import re
from typing import Any

#: ECMA-48's C0 set, DEL and C1 set; the Unicode line and paragraph separators; the Unicode
#: bidirectional controls.
CONTROL = re.compile("[\x00-\x1f\x7f-\x9f\u2028\u2029\u200e\u200f\u202a-\u202e\u2066-\u2069]")

_NAMED = {"\n": "\\n", "\r": "\\r", "\t": "\\t"}


def _escape(match: re.Match) -> str:
    char = match.group()
    if char in _NAMED:
        return _NAMED[char]
    code = ord(char)
    return f"\\x{code:02x}" if code < 0x100 else f"\\u{code:04x}"


def visible(text: Any) -> str:
    """``text`` with every control character shown as an escape: safe for a terminal, one line."""
    return CONTROL.sub(_escape, str(text))


def visible_lines(text: str) -> str:
    """Multi-line ``text`` made terminal-safe line by line, keeping its line feeds."""
    return "\n".join(visible(line) for line in str(text).split("\n"))


# CommonMark: characters that can start inline markup anywhere (code spans, emphasis, links,
# images, raw HTML and autolinks, entity references, hard line breaks) and GFM's strikethrough
# and table pipes. "_", "<" and "&" are escaped only where they could act (see _markdown_char).
_INLINE = set("\\`*[]|~")
_BLOCK_START = re.compile(r"^([#>+=-]|\d{1,9}[.)])")


def _markdown_char(text: str, i: int) -> str:
    char = text[i]
    before = text[i - 1] if i else ""
    after = text[i + 1] if i + 1 < len(text) else ""
    if char in _INLINE:
        return "\\" + char
    if char == "_" and not (before.isalnum() and after.isalnum()):
        return "\\_"  # an intraword "_" can neither open nor close emphasis (section 6.2)
    if char == "<" and after and not after.isspace():
        return "\\<"  # raw HTML (6.6) and autolinks (6.5) need a non-space right after "<"
    if char == "&" and (after.isalnum() or after == "#"):
        return "\\&"  # entity and numeric character references (2.5)
    return char


def markdown_text(text: Any) -> str:
    """Untrusted text as CommonMark inline text that renders as exactly that text.

    Control characters are first made visible (so the text stays on one line); then every
    character that could start markup is backslash-escaped, and so is a leading character that
    would open a block (heading, block quote, list item, setext underline); leading and trailing
    whitespace becomes numeric references (``&#32;``). Ordinary prose comes out unchanged.
    """
    text = visible(text)
    out = "".join(_markdown_char(text, i) for i in range(len(text)))
    lead = _BLOCK_START.match(out)
    if lead:
        marker = lead.group()
        out = (marker[:-1] + "\\" + marker[-1]) + out[len(marker):]
    # A paragraph drops its leading and trailing spaces (section 4.8; some renderers drop any
    # Unicode whitespace) and four leading spaces open an indented code block (4.4): keep them
    # as numeric character references (2.5).
    start = len(out) - len(out.lstrip())
    end = start + len(out.strip())
    return _references(out[:start]) + out[start:end] + _references(out[end:])


def _references(spaces: str) -> str:
    return "".join(f"&#{ord(char)};" for char in spaces)


def markdown_code(text: Any, table: bool = False) -> str:
    """Untrusted text as a CommonMark code span showing exactly that text (control characters
    made visible); with ``table``, pipes are escaped for a GFM table cell."""
    content = visible(text)
    if table:
        content = content.replace("|", "\\|")
    longest = max((len(run) for run in re.findall("`+", content)), default=0)
    fence = "`" * (longest + 1)
    pad = (content.startswith("`") or content.endswith("`")
           or (content.startswith(" ") and content.endswith(" ") and content.strip(" "))
           or not content)
    space = " " if pad else ""
    return f"{fence}{space}{content}{space}{fence}"


#: First characters that make a spreadsheet read a cell as a formula (OWASP CSV Injection; NUL
#: from OWASP ASVS 5.0 requirement 1.2.10; LF is leading whitespace like CR and tab).
FORMULA_START = ("=", "+", "-", "@", "\t", "\r", "\n", "\x00")


def csv_text(text: Any) -> tuple[str, bool]:
    """A text cell's value, neutralised when it could be read as a formula: (value, neutralised).

    Only text cells go through here. Numbers actdoc writes itself (measures, thresholds, unit
    indices) are never prefixed, so a negative measure stays a number in a spreadsheet; a layer
    named "-1" is text and becomes "'-1".
    """
    text = str(text)
    if text.startswith(FORMULA_START):
        return "'" + text, True
    return text, False


def csv_field(value: str, quote: bool = False) -> str:
    """One RFC 4180 field: enclosed in double quotes (inner quotes doubled) when it holds a comma,
    a double quote, CR or LF, or when ``quote`` asks for it."""
    if quote or any(char in value for char in ',"\r\n'):
        return '"' + value.replace('"', '""') + '"'
    return value

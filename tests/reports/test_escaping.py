"""The escaping rules of actdoc/escaping.py, checked against the standards they follow.

- Terminal: ECMA-48 (5th edition, 1991), section 5: the C0 set is 0x00-0x1F, the C1 set
  0x80-0x9F, and DEL 0x7F; none may reach a terminal from a name.
- Markdown: CommonMark 0.31.2 through markdown-it-py (a CommonMark-compliant parser, with the
  GFM table extension enabled): escaped text renders as exactly that text, with no link, no raw
  HTML, no emphasis and no block other than one paragraph.
- CSV: OWASP "CSV Injection" (leading = + - @ tab CR) and RFC 4180 section 2 rules 6-7 (fields
  with comma, double quote, CR or LF quoted, quotes doubled), read back with Python's csv module.
"""

from __future__ import annotations

import csv
import io

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from markdown_it import MarkdownIt

from actdoc.escaping import (
    FORMULA_START, csv_field, csv_text, markdown_code, markdown_text, visible, visible_lines,
)
from actdoc.model import Finding, Findings, Severity, SourceInfo
from actdoc.reports import render_csv

# ECMA-48 section 5.2 (C0), 5.3 (C1) and DEL, plus the Unicode line/paragraph separators and
# bidirectional controls (Unicode Standard Annex #9, from memory; CVE-2021-42574).
FORBIDDEN = ({chr(c) for c in range(0x20)} | {"\x7f"} | {chr(c) for c in range(0x80, 0xA0)}
             | set("\u2028\u2029\u200e\u200f\u202a\u202b\u202c\u202d\u202e")
             | set("\u2066\u2067\u2068\u2069"))

COMMONMARK = MarkdownIt("commonmark").enable("table")

ANY_TEXT = st.text(alphabet=st.characters(blacklist_categories=("Cs",)), max_size=40)


def _inline_text(children) -> str:
    """The text a reader sees in an inline token's children, refusing anything but text."""
    kinds = {child.type for child in children}
    assert kinds <= {"text", "text_special", "code_inline"}, kinds
    return "".join(child.content for child in children)


@pytest.mark.parametrize("raw, shown", [
    ("\x1b[31mred\x1b[0m", "\\x1b[31mred\\x1b[0m"),                           # CSI (ESC [)
    ("\x1b]8;;http://x\x1b\\link\x1b]8;;\x1b\\", "\\x1b]8;;http://x\\x1b\\link\\x1b]8;;\\x1b\\"),
    ("bell\x07", "bell\\x07"),
    ("two\nlines", "two\\nlines"),
    ("cr\rover", "cr\\rover"),
    ("tab\there", "tab\\there"),
    ("c1 csi \x9b31m", "c1 csi \\x9b31m"),                                     # 8-bit CSI
    ("rtl \u202eabc", "rtl \\u202eabc"),
    ("line\u2028sep", "line\\u2028sep"),
    ("ünïcode 模型 `|<a>", "ünïcode 模型 `|<a>"),
])
def test_visible_shows_every_control_character(raw, shown):
    assert visible(raw) == shown
    assert visible(shown) == shown  # idempotent: escaping twice changes nothing


@settings(max_examples=300, deadline=None)
@given(ANY_TEXT)
def test_visible_never_lets_a_control_through_and_is_one_line(text):
    out = visible(text)
    assert not set(out) & FORBIDDEN
    assert len(out.splitlines()) <= 1
    assert visible(out) == out
    line = text.replace("\n", "")
    assert visible_lines(line + "\n" + line) == visible(line) + "\n" + visible(line)


@settings(max_examples=300, deadline=None)
@given(ANY_TEXT)
def test_markdown_text_renders_as_itself(text):
    # CommonMark: one paragraph holding exactly the (visible) text, nothing else.
    tokens = COMMONMARK.parse(markdown_text(text))
    if not visible(text):
        assert tokens == []
        return
    assert [t.type for t in tokens] == ["paragraph_open", "inline", "paragraph_close"]
    assert _inline_text(tokens[1].children) == visible(text)


@settings(max_examples=300, deadline=None)
@given(ANY_TEXT.filter(bool))
def test_markdown_code_renders_as_itself(text):
    # CommonMark 6.1: a code span shows its content literally (after the leading "x ").
    tokens = COMMONMARK.parse("x " + markdown_code(text))
    children = tokens[1].children
    assert [c.type for c in children] == ["text", "code_inline"]
    assert children[1].content == visible(text)


@settings(max_examples=200, deadline=None)
@given(ANY_TEXT.filter(bool), ANY_TEXT)
def test_markdown_in_a_table_keeps_its_cells(name, words):
    # GFM 0.29 section 4.10: a pipe splits cells, even in a code span, unless written "\|".
    table = ("| a | b | c |\n|---|---|---|\n"
             f"| {markdown_code(name, table=True)} | {markdown_text(words)} | end |\n")
    tokens = COMMONMARK.parse(table)
    cells = [t for t in tokens if t.type == "inline"][3:]
    assert len(cells) == 3
    assert cells[0].children[0].type == "code_inline"
    assert cells[0].children[0].content == visible(name)
    assert _inline_text(cells[1].children) == visible(words)
    assert cells[2].content == "end"


@pytest.mark.parametrize("name", ['<a href="http://x">y</a>', "<http://x>", "[y](http://x)",
                                  "![i](http://x/i.png)", "&lt;b&gt;", "&#65;", "*em* _em_ **b**",
                                  "# heading", "> quote", "1. item", "- item", "    code",
                                  "```", "a | b", "tick`s``"])
def test_markdown_text_has_no_links_html_or_blocks(name):
    # CommonMark 6.3-6.6 (links, images, autolinks, raw HTML): none may come out of a name.
    html = COMMONMARK.render(markdown_text(name))
    assert html.startswith("<p>") and html.count("<") == 2 and 'href="' not in html
    assert _inline_text(COMMONMARK.parse(markdown_text(name))[1].children) == name


def test_ordinary_prose_is_left_as_it_is():
    # Escaping only where markup could start: the reports' own sentences are unchanged.
    prose = ("the unit's total input is negative for every probe sample: z < 0 everywhere, "
             "He et al. 2015 (std sqrt(2/fan_in)), Ioffe & Szegedy 2015; near_binary")
    assert markdown_text(prose) == prose
    assert markdown_code("fc1") == "`fc1`"


@pytest.mark.parametrize("text, cell", [
    ('=HYPERLINK("http://x","y")', '"\'=HYPERLINK(""http://x"",""y"")"'),
    ("+1", "\"'+1\""),
    ("-1", "\"'-1\""),
    ("@SUM(A1)", "\"'@SUM(A1)\""),
    ("\t=1", "\"'\t=1\""),
    ("\r=1", "\"'\r=1\""),
    ("fc1", "fc1"),
    ("a,b", '"a,b"'),
    ('say "hi"', '"say ""hi"""'),
    ("cr\rinside", '"cr\rinside"'),
    ("lf\ninside", '"lf\ninside"'),
])
def test_csv_text_cells_follow_owasp_and_rfc_4180(text, cell):
    # OWASP CSV Injection: prefix a single quote and quote the cell; RFC 4180 2.6-2.7: quote
    # fields with comma, quote, CR or LF, doubling inner quotes.
    assert csv_field(*csv_text(text)) == cell


@settings(max_examples=300, deadline=None)
@given(ANY_TEXT.filter(bool), st.floats(allow_nan=False, allow_infinity=False, width=32))
def test_csv_reads_back_row_by_row(name, measure):
    # Python's csv module reads RFC 4180 quoting: one record per unit whatever the layer name
    # holds; a text cell never begins with a formula character; a measure stays a number.
    finding = Finding("dead", Severity.WARNING, name, (0, 1), measure, 0.5, "s", "c", "r",
                      unit_measures=(measure, -abs(measure)))
    out = render_csv(Findings(SourceInfo("m.h5", "", "hdf5", 8), (), (finding,)))
    rows = list(csv.reader(io.StringIO(out, newline=""), strict=True))
    assert len(rows) == 3
    for row in rows[1:]:
        assert row[0] == ("'" + name if name.startswith(FORMULA_START) else name)
        assert not row[0].startswith(FORMULA_START)
    assert float(rows[1][4]) == pytest.approx(measure, rel=1e-5, abs=1e-30)
    assert float(rows[2][4]) == pytest.approx(-abs(measure), rel=1e-5, abs=1e-30)

"""Hostile layer and file names through every output that is not a web page.

The dump is written by numpy's own ``np.savez`` (docs/dump-layout.md section NPZ: a layer name
may hold any character, "/" included), one ReLU layer per hostile name with one planted dead
unit, so every name reaches a finding. Standards the outputs are held to:

- terminal (text report, ``check``, ``compare``, progress bar, error line): ECMA-48 section 5,
  no C0 (0x00-0x1F except the line feeds actdoc writes itself), DEL or C1 (0x80-0x9F) character;
  the error is one line;
- Markdown: CommonMark 0.31.2 with GFM 0.29 tables, parsed by markdown-it-py;
- CSV: OWASP "CSV Injection" and RFC 4180 section 2, read back by Python's csv module.
"""

from __future__ import annotations

import csv
import io
import sys

import numpy as np
import pytest
from markdown_it import MarkdownIt

from actdoc.cli import ProgressBar, main
from actdoc.errors import ActdocError, InvalidDump, describe
from actdoc.escaping import visible

HOSTILE = (
    '=HYPERLINK("http://x","y")', "+1", "@SUM(A1)", "\t=1", "\r=1", "-1",   # formulas (OWASP)
    "\x1b[31mred\x1b[0m",                                                     # ECMA-48 CSI (SGR)
    "\x1b]8;;http://x\x1b\\click\x1b]8;;\x1b\\",                              # OSC 8 hyperlink
    "bell\x07", "two\nlines", "cr\rover", "csi8\x9b2J",                       # BEL, LF, CR, C1 CSI
    "tick`s``", "pi|pe", "back\\|slash", '<a href="http://x">y</a>',          # Markdown syntax
    "*em* _em_ [l](http://x)", "&lt;b&gt;",
)
FORMULA = ("=", "+", "-", "@", "\t", "\r")
CONTROLS = {chr(c) for c in range(0x20)} | {"\x7f"} | {chr(c) for c in range(0x80, 0xA0)}
COMMONMARK = MarkdownIt("commonmark").enable("table")


def _write_dump(path, names=HOSTILE) -> None:
    rng = np.random.default_rng(7)
    arrays = {}
    for name in names:
        # 1000 samples: enough that the probe_size finding (docs/checks.md) stays out of the
        # counts below, which hold one finding per hostile name
        z = rng.normal(size=(1000, 4))
        z[:, 0] = -1.0 - np.abs(z[:, 0])  # unit 0 never active: a dead unit (common practice)
        arrays[f"{name}/preact"] = z
        arrays[f"{name}/output"] = np.maximum(z, 0.0)
    np.savez(path, **arrays)


@pytest.fixture(scope="module")
def dump(tmp_path_factory):
    path = tmp_path_factory.mktemp("hostile") / "model\x1b[2J\n.npz"
    _write_dump(path)
    return path


def _terminal_safe(text: str) -> None:
    assert not (set(text) - {"\n"}) & CONTROLS, sorted(set(text) & CONTROLS)


def test_text_report_shows_names_never_their_controls(dump, capsys):
    assert main(["analyze", str(dump)]) == 0
    out = capsys.readouterr().out
    _terminal_safe(out)
    lines = out.splitlines()
    assert lines[0].startswith("actdoc: model\\x1b[2J\\n.npz (npz, 1000 probe samples)")
    layer_lines = [line for line in lines if line.startswith("  [")]
    assert len(layer_lines) == len(HOSTILE)  # one line per layer: no name split a line
    for name, line in zip(HOSTILE, layer_lines):
        assert f"] {visible(name)} " in line
        assert f"  WARNING  {visible(name)} / dead" in lines


def test_check_and_compare_print_one_safe_line_each(dump, tmp_path, capsys):
    assert main(["check", str(dump), "--fail-on", "warning"]) == 1
    out = capsys.readouterr().out
    _terminal_safe(out)
    assert len(out.splitlines()) == 1 + len(HOSTILE)
    later = tmp_path / "later\x07.npz"
    _write_dump(later, HOSTILE)
    assert main(["compare", str(dump), str(later)]) == 0
    out = capsys.readouterr().out
    _terminal_safe(out)
    assert "[2] later\\x07.npz" in out and "\x1b" not in out
    assert sum(line.startswith(visible(HOSTILE[6])) for line in out.splitlines()) == 1


def test_progress_bar_label_is_shown_not_obeyed():
    stream = io.StringIO()
    bar = ProgressBar("analysing \x1b]0;owned\x07\nname.h5", stream=stream, enabled=True)
    bar(0.5)
    bar(1.0)
    written = stream.getvalue()
    # The bar's own controls: CR to redraw the line, LF when done. Nothing from the name.
    assert written.count("\r") == 2 and written.count("\n") == 1 and written.endswith("\n")
    _terminal_safe(written.replace("\r", ""))
    assert "analysing \\x1b]0;owned\\x07\\nname.h5 [" in written


def test_a_report_printed_to_a_terminal_is_made_safe(dump, capsys, monkeypatch):
    # CSV keeps exact names for programs; shown on a terminal, its controls are escaped too.
    monkeypatch.setattr(sys.stdout, "isatty", lambda: True, raising=False)
    assert main(["analyze", str(dump), "--format", "csv"]) == 0
    out = capsys.readouterr().out
    _terminal_safe(out)
    assert '"\'\\r=1",0,dead' in out


def test_error_lines_stay_one_line(tmp_path, capsys):
    bad = tmp_path / "bad\x1b[31m.npz"
    name = "x\x1b]8;;http://x\x1b\\\nred"
    np.savez(bad, **{f"{name}/preact": np.zeros((8, 4)), f"{name}/output": np.zeros((8, 3))})
    assert main(["analyze", str(bad)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and err.endswith("\n")
    _terminal_safe(err)
    assert err.startswith("actdoc: bad\\x1b[31m.npz, layer 'x\\x1b]8;;http://x\\x1b\\\\nred', "
                          "array 'output'")
    assert main(["analyze", str(tmp_path / "gone\r\n\x1b[2J.h5")]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "gone\\r\\n\\x1b[2J.h5" in err
    _terminal_safe(err)


def test_describe_and_error_messages_escape_names():
    assert describe("/tmp/a\nb.h5", "l\x1b[0m", "pre\ract") == \
        "a\\nb.h5, layer 'l\\x1b[0m', array 'pre\\ract'"
    error = InvalidDump("m.h5, layer 'two\nlines': broken")
    assert str(error) == "m.h5, layer 'two\\nlines': broken" and error.message == str(error)
    assert isinstance(error, ActdocError)


def test_markdown_renders_every_name_as_itself(dump, tmp_path):
    out = tmp_path / "report.md"
    assert main(["analyze", str(dump), "--format", "md", "--output", str(out)]) == 0
    text = out.read_text(encoding="utf-8")
    _terminal_safe(text)
    tokens = COMMONMARK.parse(text)
    kinds = {t.type for t in tokens} | {c.type for t in tokens for c in t.children or ()}
    assert not kinds & {"html_inline", "html_block", "link_open", "image", "em_open",
                        "strong_open", "code_block", "fence"}
    # The layers table (GFM): every body row keeps its cells; the layer cell is a code span
    # holding exactly the (visible) name.
    rows, row = [], None
    for token in tokens:
        if token.type == "tr_open":
            row = []
        elif token.type == "inline" and row is not None:
            row.append(token)
        elif token.type == "tr_close":
            rows.append(row)
            row = None
    header, body = rows[0], rows[1:]
    assert len(body) == len(HOSTILE) and all(len(r) == len(header) for r in body)
    assert [r[1].children[0].content for r in body] == [visible(n) for n in HOSTILE]
    # Each finding's heading names the layer in a code span; its summary reads as plain text.
    headings = [tokens[i + 1] for i, t in enumerate(tokens) if t.type == "heading_open"
                and t.tag == "h3"]
    assert [h.children[-1].content for h in headings] == [visible(n) for n in HOSTILE]
    paragraphs = list(_plain_paragraphs(tokens))
    for name in HOSTILE:
        summary = f"Layer '{visible(name)}': 1 of 4 units (25.0%) are never active"
        assert sum(p.startswith(summary) for p in paragraphs) == 1, name


def _plain_paragraphs(tokens):
    for i, token in enumerate(tokens):
        if token.type == "paragraph_open":
            yield "".join(child.content for child in tokens[i + 1].children)


def test_csv_neutralises_formulas_and_quotes_line_breaks(dump, tmp_path):
    out = tmp_path / "report.csv"
    assert main(["analyze", str(dump), "--format", "csv", "--output", str(out)]) == 0
    raw = out.read_bytes().decode("utf-8")
    rows = list(csv.reader(io.StringIO(raw, newline=""), strict=True))
    assert rows[0] == ["layer", "unit", "check", "severity", "measure", "layer_measure",
                       "threshold"]
    assert len(rows) == 1 + len(HOSTILE)  # CR and LF inside names split no record (RFC 4180)
    for name, row in zip(HOSTILE, rows[1:]):
        if name.startswith(FORMULA):  # OWASP: a leading quote, and the cell quoted
            assert row[0] == "'" + name
            assert raw.count('"' + "'" + name.replace('"', '""') + '",') == 1
        else:
            assert row[0] == name
        assert row[1:5] == ["0", "dead", "warning", "0"]
    for line_break_name in ("two\nlines", "cr\rover"):
        assert f'"{line_break_name}",0,dead' in raw

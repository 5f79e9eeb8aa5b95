"""plotly.js as the dashboard serves it: the plotly package's own bundle, with only the trace
types actdoc draws registered.

The bundle that ships with the plotly Python package registers all of plotly.js's ~45 trace
types (3-D, maps, polar, finance, ...) when the script runs, and on a first visit that start-up
is most of the time a chart page takes (about 550 ms of 1.1 s in headless chromium on a 2-core
machine, docs/dashboard.md). plotly.js's own documentation offers "partial bundles" built
with npm for exactly this; actdoc cannot count on npm, so it makes the same cut at serve time:
the bundle's one ``register([...])`` call of trace modules keeps the traces in
``DRAWN_TRACES`` and every entry that is not a trace (the calendars component). The code of
the other traces stays in the file but never runs. The licence header and every other byte are
untouched.

The cut is checked, not assumed: each entry of the list must resolve to a module that names
its ``moduleType`` and ``name``, and every trace actdoc draws must be among them. A bundle that
does not read that way (another plotly version, another bundler) is served whole: slower, never
broken.
"""

from __future__ import annotations

import re

#: Every trace type a figure of actdoc.web may use (tests/web/test_plotly_bundle.py holds every
#: figure of the demo pages to it). "scatter" is part of plotly.js's core and needs no entry.
DRAWN_TRACES = frozenset({"scatter", "bar", "heatmap"})

_REGISTER = re.compile(r"\.register\(\[((?:[\w$]+\(\),)+[\w$]+\(\))\]\)")
#: The minimum size of the list that registers trace modules (47 entries in plotly.js 4.1).
_MIN_ENTRIES = 20


_KIND = re.compile(r'moduleType:"(\w+)",name:"(\w+)"')
_CALL = re.compile(r"(?<![\w$.])([\w$]+)\(\)")
#: How far an entry is followed (entry -> index -> base object) to find its kind.
_MAX_DEPTH = 3


class _Modules:
    """The bundle's lazily run modules (``NAME=WRAPPER((exports,module)=>{...})``), each as
    the stretch of text up to the next module's definition."""

    def __init__(self, source: str, wrapper: str):
        self.source = source
        starts = [(match.start(), match.group(1)) for match in re.finditer(
            r"(?<![\w$.])([\w$]+)=" + re.escape(wrapper) + r"\(", source)]
        self.spans: dict[str, tuple[int, int]] = {}
        for (start, name), (end, _next) in zip(starts, starts[1:] + [(len(source), "")]):
            self.spans.setdefault(name, (start, end))

    def kind(self, name: str, depth: int = 0) -> tuple[str, str] | None:
        """(moduleType, name) the module declares, or that the first module it runs which
        declares one does."""
        start, end = self.spans[name]
        body = self.source[start:end]
        declared = _KIND.search(body)
        if declared is not None:
            return declared.group(1), declared.group(2)
        if depth >= _MAX_DEPTH:
            return None
        for callee in _CALL.findall(body):
            if callee in self.spans and callee != name:
                found = self.kind(callee, depth + 1)
                if found is not None:
                    return found
        return None


def _wrapper_name(source: str, entry: str) -> str | None:
    """The name of the bundler's lazy-module function, read off the first entry's definition."""
    found = re.search(r"(?<![\w$.])" + re.escape(entry) + r"=([\w$]+)\(", source)
    return found.group(1) if found else None


def trimmed_bundle(source: str) -> str | None:
    """The bundle with only the drawn traces (and every non-trace entry) registered, or None
    when the bundle cannot be read as described in the module docstring."""
    lists = [match for match in _REGISTER.finditer(source)
             if match.group(1).count("(),") + 1 >= _MIN_ENTRIES]
    if len(lists) != 1:
        return None
    found = lists[0]
    entries = found.group(1)[:-2].split("(),")
    wrapper = _wrapper_name(source, entries[0])
    if wrapper is None:
        return None
    modules = _Modules(source, wrapper)
    kept, traces = [], []
    for entry in entries:
        kind = modules.kind(entry) if entry in modules.spans else None
        if kind is None:
            return None
        module_type, name = kind
        if module_type != "trace" or name in DRAWN_TRACES:
            kept.append(entry)
        if module_type == "trace":
            traces.append(name)
    if len(set(traces)) != len(traces) or not (DRAWN_TRACES - {"scatter"}) <= set(traces):
        return None
    register = ".register([" + ",".join(entry + "()" for entry in kept) + "])"
    return source[:found.start()] + register + source[found.end():]

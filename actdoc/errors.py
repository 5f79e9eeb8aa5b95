"""The exceptions actdoc raises for input it cannot use.

Every error a user can cause carries one sentence that names the file, the layer and the array
where that makes sense, and what is wrong. The command line prints that sentence alone and exits
with status 2; the web layer maps each class to an HTTP status in one place. Names in a message
come from the dump and are untrusted: control characters in them (ANSI/OSC escape sequences, CR,
LF) are shown as escapes (actdoc/escaping.py), so a message is always one line and never drives
the terminal it is printed on.
"""

from __future__ import annotations

from actdoc.escaping import visible


class ActdocError(Exception):
    """Base class: a problem with the user's input, explained in one sentence."""

    exit_status = 2

    def __init__(self, message: str):
        message = visible(message)
        super().__init__(message)
        self.message = message

    def __str__(self) -> str:
        return self.message


class UnreadableDump(ActdocError):
    """The file is missing, not HDF5, NPZ or safetensors, truncated or corrupt."""


class UnsupportedFormat(UnreadableDump):
    """The file's leading bytes match no reader (neither HDF5 nor a zip-based NPZ)."""


class InvalidDump(ActdocError):
    """The file was read, but what it holds breaks the dump layout."""


class UnknownActivation(InvalidDump):
    """A layer names an activation kind actdoc does not know."""


class UnsafeDump(InvalidDump):
    """The dump reaches outside itself (external links, external or virtual datasets) or
    holds pickled objects."""


class DumpTooLarge(InvalidDump):
    """An archive member declares more bytes than the configured limit allows."""


class IncomparableDumps(ActdocError):
    """Two dumps cannot be compared: their layers differ in name, unit count or kind."""


class InvalidSetting(ActdocError):
    """A threshold override names an unknown setting or gives an unusable value."""


def describe(path: object, layer: str | None = None, array: str | None = None) -> str:
    """The "where" part of an error sentence: file, then layer, then array, each name with its
    control characters shown as escapes."""
    from pathlib import Path

    where = visible(Path(str(path)).name)
    if layer is not None:
        where += f", layer '{visible(layer)}'"
    if array is not None:
        where += f", array '{visible(array)}'"
    return where

"""Following HDF5 links without ever leaving the file, and reading attributes within bounds.

A dump must be self-contained (docs/contract.md section 1). HDF5 resolves external links
(``h5py.ExternalLink``: a file name and a path in it) silently whenever a path is opened, even
through ``name in group``, and a soft link (``h5py.SoftLink``) may resolve through one. So actdoc
never opens a path whose links it has not looked at: ``resolve`` walks each name one link at a
time with ``Group.get(name, getlink=True)`` (h5py's documented way to see a link without
following it), refuses external and user-defined links, and follows soft links itself, component
by component, at most ``MAX_LINK_DEPTH`` deep (the HDF5 library's own default limit on soft-link
traversals, H5L_NUM_LINKS = 16).

Every call turns the library's own failures on a damaged file (OSError, RuntimeError, KeyError,
ValueError, TypeError, ...) into one ``UnreadableDump`` sentence naming the file, layer and array.
"""

from __future__ import annotations

from contextlib import contextmanager
from typing import Any, Iterator

import h5py
import numpy as np

from actdoc.errors import ActdocError, InvalidDump, UnreadableDump, UnsafeDump

MAX_LINK_DEPTH = 16
#: The layer attributes actdoc reads (docs/dump-layout.md); any other attribute is never read.
LAYER_ATTRIBUTES = ("activation", "order", "negative_slope", "threshold")
#: Largest attribute read, in values and in bytes: these attributes hold one value each.
MAX_ATTRIBUTE_VALUES = 1024
MAX_ATTRIBUTE_BYTES = 64 * 1024


@contextmanager
def damaged(where: str, doing: str) -> Iterator[None]:
    """Turn the HDF5 library's failures inside the block into one sentence about ``where``."""
    try:
        yield
    except (ActdocError, MemoryError):
        raise
    except Exception as exc:  # h5py maps HDF5's error stack onto many Python classes
        text = str(exc).replace("\n", " ")[:200]
        raise UnreadableDump(f"{where}: {doing} failed; the file is truncated or corrupt "
                             f"({type(exc).__name__}: {text})") from None


def resolve(group: h5py.Group, name: str, where: str, what: str = "",
            depth: int = 0) -> Any:
    """``group[name]`` reached only through links inside the file, or None when absent.

    ``name`` is one link name (no '/'). External and user-defined links are refused; soft links
    are followed here, never by the library.
    """
    subject = f"{what} is" if what else "is"
    if depth > MAX_LINK_DEPTH:
        raise InvalidDump(f"{where}: soft links form a loop or a chain longer than "
                          f"{MAX_LINK_DEPTH}")
    with damaged(where, "looking up a link"):
        try:
            link = group.get(name, getlink=True)
        except TypeError:  # h5py knows hard, soft and external links only
            raise UnsafeDump(f"{where}: {subject} a user-defined link, which could lead outside "
                             f"the file; a dump must be self-contained") from None
    if link is None:
        return None
    if isinstance(link, h5py.ExternalLink):
        if depth:
            raise UnsafeDump(f"{where}: a soft link leads through an external link to "
                             f"'{link.filename}', another file; a dump must be self-contained")
        raise UnsafeDump(f"{where}: {subject} an external link to '{link.filename}'; a dump "
                         f"must be self-contained")
    if isinstance(link, h5py.SoftLink):
        return follow(group, link.path, where, what, depth + 1)
    with damaged(where, "opening it"):
        return group[name]


def follow(group: h5py.Group, target: str, where: str, what: str, depth: int) -> Any:
    """The object at a soft link's ``target`` path, walked one link at a time."""
    with damaged(where, "following a soft link"):
        current = group.file["/"] if target.startswith("/") else group
    for part in (p for p in target.split("/") if p and p != "."):
        if not isinstance(current, h5py.Group):
            return None
        current = resolve(current, part, where, what, depth)
        if current is None:
            return None
    return current


def read_attributes(obj: h5py.HLObject, where: str) -> dict[str, Any]:
    """The layer attributes actdoc uses, as Python values, each checked for size before it is
    read (bytes decoded, one-element arrays unwrapped)."""
    out: dict[str, Any] = {}
    for key in LAYER_ATTRIBUTES:
        with damaged(where, f"reading attribute '{key}'"):
            if not obj.attrs.__contains__(key):
                continue
            attr = h5py.h5a.open(obj.id, key.encode())
            space = attr.get_space()
            values = 1 if space.get_simple_extent_type() == h5py.h5s.SCALAR \
                else int(space.get_simple_extent_npoints())
            size = values * attr.get_type().get_size()
            if values > MAX_ATTRIBUTE_VALUES or size > MAX_ATTRIBUTE_BYTES:
                raise InvalidDump(f"{where}: attribute '{key}' declares {values} values "
                                  f"({size} bytes); expected one value")
            value = obj.attrs[key]
        if isinstance(value, bytes):
            value = value.decode("utf-8", "replace")
        elif isinstance(value, np.ndarray) and value.size == 1:
            value = value.reshape(()).item()
        elif isinstance(value, np.generic):
            value = value.item()
        out[key] = value.decode("utf-8", "replace") if isinstance(value, bytes) else value
    return out

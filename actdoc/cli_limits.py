"""The ``analyze`` and ``check`` options that bound what a dump may declare (ReadLimits).

Each option sets one field of ``actdoc.io.ReadLimits`` (docs/dump-layout.md, "Size limits");
a dump past one is refused with one sentence and exit status 2, before any data is read.
"""

from __future__ import annotations

import argparse


def byte_size(text: str) -> int | None:
    """``--max-*-bytes`` values: a count of bytes with an optional binary suffix (K, M, G, T;
    ``2G`` is 2 GiB), or ``none`` for no limit."""
    value = text.strip().lower().removesuffix("ib").removesuffix("b")
    if value in ("none", "off"):
        return None
    scale = 1
    if value and value[-1] in "kmgt":
        scale = 1024 ** ("kmgt".index(value[-1]) + 1)
        value = value[:-1]
    try:
        number = float(value)
    except ValueError:
        raise argparse.ArgumentTypeError(f"'{text}' is not a size (e.g. 500M, 8G, none)") from None
    if not number >= 0 or number * scale > 2**63:
        raise argparse.ArgumentTypeError(f"'{text}' is not a size (e.g. 500M, 8G, none)")
    return int(number * scale)


def unit_count(text: str) -> int | None:
    """``--max-units``: a positive whole number, or ``none``."""
    if text.strip().lower() in ("none", "off"):
        return None
    if not text.strip().isdigit() or int(text) < 1:
        raise argparse.ArgumentTypeError(f"'{text}' is not a positive whole number")
    return int(text)


def size_words(nbytes: int | None) -> str:
    """A limit as the options write it: ``8G``, ``256M``, ``65536`` or ``none``."""
    if nbytes is None:
        return "none"
    for suffix, scale in (("T", 1024**4), ("G", 1024**3), ("M", 1024**2), ("K", 1024)):
        if nbytes >= scale and nbytes % scale == 0:
            return f"{nbytes // scale}{suffix}"
    return str(nbytes)


def add_limit_options(parser: argparse.ArgumentParser, defaults=None) -> None:
    """What a dump may declare before it is refused (docs/dump-layout.md, "Size limits").

    ``defaults`` (a ReadLimits) gives each option's default: the command line's own
    (``ReadLimits()``) unless given; ``serve`` passes ``ReadLimits.for_uploads()``.
    """
    from actdoc.io.limits import ReadLimits

    defaults = defaults or ReadLimits()
    group = parser.add_argument_group("size limits (a number with K, M, G or T, or 'none')")
    group.add_argument("--max-total-bytes", type=byte_size, metavar="SIZE",
                       default=defaults.total_bytes,
                       help="all arrays of the dump together, as declared "
                            f"(default: {size_words(defaults.total_bytes)})")
    group.add_argument("--max-member-bytes", type=byte_size, metavar="SIZE",
                       default=defaults.member_bytes,
                       help="one NPZ member, uncompressed "
                            f"(default: {size_words(defaults.member_bytes)})")
    group.add_argument("--max-weight-bytes", type=byte_size, metavar="SIZE",
                       default=defaults.weight_bytes,
                       help="one layer's weight array "
                            f"(default: {size_words(defaults.weight_bytes)})")
    group.add_argument("--max-units", type=unit_count, metavar="N",
                       default=defaults.units_per_layer,
                       help="units (or channels) of one layer "
                            f"(default: {defaults.units_per_layer or 'none'})")


def declared_limits(args: argparse.Namespace):
    """The ReadLimits the command-line options describe (the defaults for a command without
    them, such as ``compare``)."""
    from actdoc.io.limits import ReadLimits

    if not hasattr(args, "max_member_bytes"):
        return ReadLimits()
    return ReadLimits(member_bytes=args.max_member_bytes if args.max_member_bytes is not None
                      else 2**63, total_bytes=args.max_total_bytes,
                      units_per_layer=args.max_units, weight_bytes=args.max_weight_bytes)

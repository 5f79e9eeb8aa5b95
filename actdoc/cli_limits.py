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


def add_limit_options(parser: argparse.ArgumentParser) -> None:
    """What a dump may declare before it is refused (docs/dump-layout.md, "Size limits")."""
    group = parser.add_argument_group("size limits (a number with K, M, G or T, or 'none')")
    group.add_argument("--max-total-bytes", type=byte_size, metavar="SIZE", default=None,
                       help="all arrays of the dump together, as declared (default: none)")
    group.add_argument("--max-member-bytes", type=byte_size, metavar="SIZE", default="8G",
                       help="one NPZ member, uncompressed (default: 8G)")
    group.add_argument("--max-weight-bytes", type=byte_size, metavar="SIZE", default=None,
                       help="one layer's weight array (default: none)")
    group.add_argument("--max-units", type=unit_count, metavar="N", default=None,
                       help="units (or channels) of one layer (default: none)")


def declared_limits(args: argparse.Namespace):
    """The ReadLimits the command-line options describe (the defaults for a command without
    them, such as ``compare``)."""
    from actdoc.io.limits import ReadLimits

    if not hasattr(args, "max_member_bytes"):
        return ReadLimits()
    return ReadLimits(member_bytes=args.max_member_bytes if args.max_member_bytes is not None
                      else 2**63, total_bytes=args.max_total_bytes,
                      units_per_layer=args.max_units, weight_bytes=args.max_weight_bytes)

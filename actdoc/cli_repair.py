"""Command-line parts for checkpoints and repair: probe options and ``actdoc repair``.

``add_probe_options`` gives ``analyze`` and ``check`` ``--probe FILE`` and ``--synthetic-probe
SAMPLES`` (the forward pass of a weights-only checkpoint, docs/dump-layout.md); ``register``
adds the ``repair`` command (docs/checks.md, "Repair"). Like cli.py, this only parses, calls
the core and prints; every input error is an ActdocError, one line and exit status 2.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from actdoc.errors import ActdocError
from actdoc.escaping import visible

EXIT_OK = 0


def add_probe_options(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--probe", type=Path, metavar="FILE",
        help="inputs to run a weights-only checkpoint (a chain of dense layers) on: a .npy "
             "array, or an HDF5 or NPZ file holding probe/input")
    parser.add_argument(
        "--synthetic-probe", type=int, metavar="SAMPLES",
        help="run a weights-only checkpoint on SAMPLES standard normal inputs instead of data "
             "(a stand-in, loudly flagged: prefer --probe)")


def synthetic_warning(args: argparse.Namespace) -> None:
    """The loud warning on stderr when the activations come from invented inputs."""
    count = getattr(args, "synthetic_probe", None)
    if count is not None:
        from actdoc.forward import SYNTHETIC_WARNING

        print(f"actdoc: {SYNTHETIC_WARNING.format(n=count)}", file=sys.stderr)


def register(sub) -> None:
    """Add ``actdoc repair`` to the command's subparsers."""
    repair = sub.add_parser(
        "repair", help="recycle dead and dormant units (ReDo) and write a fixed copy")
    repair.add_argument("dump", type=Path, metavar="DUMP",
                        help="a weights-only checkpoint (safetensors, state-dict NPZ/HDF5) or a "
                             "dump with weights and /probe/input, of a chain of dense layers")
    repair.add_argument("--output", type=Path, required=True, metavar="FIXED",
                        help="where to write the repaired copy (never the input)")
    repair.add_argument("--probe", type=Path, metavar="FILE",
                        help="the inputs to find dead units on and to check the outputs with "
                             "(default: the dump's /probe/input)")
    repair.add_argument("--activation", action="append", default=[], metavar="KIND|LAYER=KIND",
                        help="activation kinds, as for analyze")
    repair.add_argument("--layer", dest="layers", action="append", default=[], metavar="NAME",
                        help="repair only this layer (repeatable; default: every ReLU layer "
                             "that has a next layer)")
    repair.add_argument("--dead-only", action="store_true",
                        help="recycle only units that never fire (outputs then stay unchanged "
                             "on every probe sample)")
    repair.add_argument("--seed", type=int, default=0,
                        help="seed of the fresh incoming weights (default 0)")
    repair.add_argument("--overwrite", action="store_true",
                        help="replace FIXED if it exists (the input is never replaced)")
    repair.add_argument("--set", dest="overrides", action="append", default=[],
                        metavar="NAME=VALUE", help="override one threshold (see docs/checks.md)")
    repair.add_argument("--config", type=Path, metavar="TOML",
                        help="a TOML file of threshold overrides")


def cmd_repair(args: argparse.Namespace) -> int:
    from actdoc.analysis.defaults import load_settings
    from actdoc.io import open_dump
    from actdoc.probefile import open_probe
    from actdoc.repair import recycle, same_file
    from actdoc.repair_output import write_repaired

    source, output = Path(args.dump), Path(args.output)
    if same_file(source, output):
        raise ActdocError(f"{output}: is the input itself; repair never overwrites its input, "
                          f"choose another --output")
    if output.exists() and not args.overwrite:
        raise ActdocError(f"{output}: already exists; pass --overwrite to replace it")
    settings = load_settings(args.config, args.overrides)
    with open_dump(source, activations=args.activation) as dump:
        probe = open_probe(args.probe) if args.probe is not None else dump.probe_input
        try:
            report = recycle(dump, probe, settings, seed=args.seed, layers=args.layers or None,
                             dead_only=args.dead_only)
            try:
                written = write_repaired(dump, report.forward, output, args.overwrite)
            except FileExistsError:
                raise ActdocError(f"{output}: already exists; pass --overwrite to replace "
                                  f"it") from None
            except OSError as err:
                raise ActdocError(f"cannot write {output}: {err.strerror or err}") from None
        finally:
            if args.probe is not None:
                probe.close()
    for line in report.lines():  # layer names come from the file: shown, never obeyed
        print(visible(line))
    print(visible(f"wrote {written} to {output} ({report.recycled} unit(s) recycled, seed "
                  f"{report.seed}); analyse it to confirm"))
    return EXIT_OK

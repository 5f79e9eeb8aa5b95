"""The ``actdoc`` command: analyse a dump, gate a pipeline, serve the dashboard, write demos.

The command only wraps the core and the app: it parses arguments, calls them, and maps every
input error to one line on stderr and exit status 2. Names from a dump reach the terminal only
through ``visible`` (actdoc/escaping.py), so escape sequences in them are shown, never obeyed.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path
from typing import Callable, Sequence

from actdoc import __version__, cli_limits, cli_repair
from actdoc.errors import ActdocError
from actdoc.escaping import visible, visible_lines

EXIT_OK, EXIT_FLAGGED, EXIT_INVALID = 0, 1, 2


class ProgressBar:
    """A one-line progress bar on stderr; silent when stderr is not a terminal."""

    def __init__(self, label: str, stream=None, enabled: bool | None = None):
        self.stream = stream or sys.stderr
        self.enabled = self.stream.isatty() if enabled is None else enabled
        self.label = visible(label)
        self._last = -1.0
        self._started = time.monotonic()

    def __call__(self, fraction: float) -> None:
        if not self.enabled:
            return
        from actdoc.formatting import share  # numpy: imported once the command runs

        fraction = min(1.0, max(0.0, float(fraction)))
        if fraction - self._last < 0.005 and fraction < 1.0:
            return
        self._last = fraction
        filled = int(round(30 * fraction))
        elapsed = time.monotonic() - self._started
        self.stream.write(f"\r{self.label} [{'#' * filled}{'.' * (30 - filled)}] "
                          f"{share(fraction, 1, 5)}  {elapsed:5.1f}s")
        if fraction >= 1.0:
            self.stream.write("\n")
        self.stream.flush()


def _input_options(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("dump", help="the dump: an HDF5, NPZ or safetensors file (docs/dump-layout.md), or a "
                                     "folder or glob of shard files (docs/scale.md)")
    parser.add_argument(
        "--activation", action="append", default=[], metavar="KIND|LAYER=KIND",
        help="activation kind for weight archives: KIND for every layer but the last (which "
             "stays linear), or LAYER=KIND for one layer; repeatable; also overrides a "
             "declared or inferred kind")
    parser.add_argument("--set", dest="overrides", action="append", default=[],
                        metavar="NAME=VALUE", help="override one threshold (see docs/checks.md)")
    parser.add_argument("--config", type=Path, metavar="TOML",
                        help="a TOML file of threshold overrides")
    parser.add_argument("--scheduler", metavar="ADDRESS",
                        help="measure on a dask.distributed cluster at ADDRESS, or 'local' for "
                             "a cluster on this machine (needs the 'dask' extra)")
    parser.add_argument("--workers", type=int, metavar="N",
                        help="measuring threads of the local engine (default: the cores, "
                             "at most 3)")
    cli_repair.add_probe_options(parser)
    parser.add_argument("--time-limit", type=float, metavar="SECONDS",
                        help="open and measure the dump in a separate process, stopped when "
                             "checking or measuring takes longer than this (docs/dashboard.md)")
    parser.add_argument("--memory-limit", type=int, metavar="MB",
                        help="open and measure the dump in a separate process that may use "
                             "at most this much memory beyond its start-up and the file")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="actdoc",
        description="Find hidden units that have stopped doing useful work in a model dump.")
    parser.add_argument("--version", action="version", version=f"actdoc {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    analyze = sub.add_parser("analyze", help="print or write the findings for a dump")
    _input_options(analyze)
    cli_limits.add_limit_options(analyze)
    analyze.add_argument("--format", choices=("json", "csv", "md", "text"), default="text")
    analyze.add_argument("--output", type=Path, metavar="FILE",
                         help="write the report here instead of standard output")

    check = sub.add_parser("check", help="exit 1 when a finding reaches the given level")
    _input_options(check)
    cli_limits.add_limit_options(check)
    check.add_argument("--fail-on", choices=("warning", "critical"), default="critical")

    serve = sub.add_parser("serve", help="open the dashboard")
    serve.add_argument("--host", default="127.0.0.1")
    serve.add_argument("--port", type=int, default=8150)
    serve.add_argument("--workspace", type=Path, metavar="DIR",
                       help="where uploads and analyses are kept (default: a per-user folder)")
    serve.add_argument("--demo", action="store_true", help="load the bundled demo dumps")
    serve.add_argument("--token", help="access token required off loopback (default: random)")
    serve.add_argument("--max-upload", type=int, default=2048, metavar="MiB",
                       help="largest upload, answered 413 past it (default: 2048)")
    serve.add_argument("--check-time", type=float, default=60.0, metavar="SECONDS",
                       help="time allowed to open and check one upload (default: 60)")
    serve.add_argument("--analysis-time", type=float, default=1800.0, metavar="SECONDS",
                       help="time allowed to measure one upload (default: 1800)")
    serve.add_argument("--memory-limit", type=int, default=4096, metavar="MB",
                       help="memory allowed to check and measure one upload (default: 4096)")
    serve.add_argument("--check-slot", action=argparse.BooleanOptionalAction, default=True,
                       help="check new uploads in a child of their own while an analysis runs "
                            "(default; --no-check-slot: the analysis slots check too)")
    serve.add_argument("--analysis-slots", type=int, default=1, metavar="N",
                       help="dumps analysed at once, each in its own child (default 1)")
    from actdoc.io.limits import ReadLimits

    cli_limits.add_limit_options(serve, ReadLimits.for_uploads())

    compare = sub.add_parser(
        "compare", help="what changed between analyses of checkpoints of one model")
    compare.add_argument("dumps", nargs="+", metavar="DUMP",
                         help="two or more dumps of the same layers, oldest first")
    compare.add_argument("--format", choices=("text", "json"), default="text")
    compare.add_argument("--set", dest="overrides", action="append", default=[],
                         metavar="NAME=VALUE", help="override one threshold")
    compare.add_argument("--config", type=Path, metavar="TOML",
                         help="a TOML file of threshold overrides")

    demo = sub.add_parser("demo", help="train the demo networks and write their dumps")
    demo.add_argument("--output", type=Path, default=Path("actdoc-demo"), metavar="DIR")
    cli_repair.register(sub)
    return parser


#: Report formats that show the dump's SHA-256; the others never hash the file.
DIGEST_FORMATS = frozenset({"json", "md"})


def _analyse(args: argparse.Namespace, label: str, path: Path | None = None,
             digest: bool = True):
    """Open the dump, run the engine with a progress bar, return the Findings.

    With ``digest``, a single file is hashed by a thread started before the engine is even
    imported, so the hash (about as costly as the analysis on a big dump) overlaps all of it.
    """
    target = path or args.dump
    scheduler = getattr(args, "scheduler", None)
    workers = getattr(args, "workers", None)
    if workers is not None and workers < 1:
        raise ActdocError(f"--workers must be at least 1, not {workers}")
    limits = _confinement(args)
    if limits is not None:
        from actdoc.confine import Job, analyse_in_child

        job = Job(target=str(target), overrides=tuple(args.overrides),
                  config=None if args.config is None else str(args.config),
                  activations=tuple(getattr(args, "activation", ())), workers=workers,
                  scheduler=scheduler, digest=digest,
                  probe=None if getattr(args, "probe", None) is None else str(args.probe),
                  synthetic_probe=getattr(args, "synthetic_probe", None),
                  read_limits=cli_limits.declared_limits(args))
        cli_repair.synthetic_warning(args)
        return analyse_in_child(job, limits, Path(target).name, ProgressBar(label))
    hashing = None
    if digest and scheduler is None and Path(target).is_file():
        from actdoc.digest import BackgroundDigest

        hashing = BackgroundDigest(target)
    from dataclasses import replace

    from actdoc.analysis.defaults import load_settings
    from actdoc.cluster import analyze_target

    settings = load_settings(args.config, args.overrides)
    findings = analyze_target(target, settings, scheduler=scheduler, progress=ProgressBar(label),
                              activations=getattr(args, "activation", ()), workers=workers,
                              digest=digest and hashing is None, probe=getattr(args, "probe", None),
                              synthetic_probe=getattr(args, "synthetic_probe", None),
                              limits=cli_limits.declared_limits(args))
    cli_repair.synthetic_warning(args)
    if hashing is not None:
        try:
            sha256 = hashing.result()
        except OSError as err:
            raise ActdocError(f"{Path(target).name}: cannot be read to compute its SHA-256 "
                              f"({err.strerror or err})") from None
        findings = replace(findings, source=replace(findings.source, sha256=sha256))
    return findings


def _confinement(args: argparse.Namespace):
    """The child-process limits asked for with --time-limit/--memory-limit, else None."""
    seconds = getattr(args, "time_limit", None)
    memory = getattr(args, "memory_limit", None)
    if seconds is None and memory is None:
        return None
    if (seconds is not None and seconds <= 0) or (memory is not None and memory <= 0):
        raise ActdocError("--time-limit and --memory-limit must be positive")
    from actdoc.confine import JobLimits

    return JobLimits(check_seconds=seconds, analysis_seconds=seconds, memory_mb=memory)


def write_atomically(path: Path, text: str) -> None:
    """Write ``text`` to ``path`` through a temporary file, so a failure leaves any old file."""
    path = Path(path)
    folder = path.parent if str(path.parent) else Path(".")
    handle, temp = tempfile.mkstemp(dir=folder, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(handle, "w", encoding="utf-8", newline="") as out:
            out.write(text)
        os.replace(temp, path)
    except BaseException:
        Path(temp).unlink(missing_ok=True)
        raise


def cmd_analyze(args: argparse.Namespace) -> int:
    from actdoc.reports import render

    findings = _analyse(args, "analysing", digest=args.format in DIGEST_FORMATS)
    report = render(findings, args.format)
    if args.output is None:
        sys.stdout.write(visible_lines(report) if sys.stdout.isatty() else report)
    else:
        try:
            write_atomically(args.output, report)
        except OSError as err:
            raise ActdocError(f"cannot write the report to {args.output}: {err.strerror}")
    return EXIT_OK


def cmd_check(args: argparse.Namespace) -> int:
    from actdoc.model import Severity

    findings = _analyse(args, "checking", digest=False)
    level = Severity(args.fail_on)
    hits = [f for f in findings.findings if f.severity.rank >= level.rank]
    name = visible(findings.source.file)
    if hits:
        layers = sorted({visible(f.layer) for f in hits})
        print(f"{name}: {len(hits)} finding(s) at or above {level.value} "
              f"in {', '.join(layers)}")
        for finding in hits:
            print(f"  {finding.severity.value}: {visible(finding.layer)} / "
                  f"{visible(finding.check)}: {visible(finding.summary)}")
        return EXIT_FLAGGED
    print(f"{name}: nothing at or above {level.value} "
          f"({len(findings.findings)} finding(s) below it)")
    return EXIT_OK


def cmd_compare(args: argparse.Namespace) -> int:
    import json

    from actdoc.compare import compare_series, comparison_document
    from actdoc.formatting import share

    if len(args.dumps) < 2:
        raise ActdocError("actdoc compare needs at least two dumps")
    # The comparison names each dump by its file and never shows its digest: no hashing.
    series = [_analyse(args, f"analysing {Path(p).name}", Path(p), digest=False)
              for p in args.dumps]
    comparison = compare_series(series)
    if args.format == "json":
        sys.stdout.write(json.dumps(comparison_document(comparison), indent=2) + "\n")
        return EXIT_OK
    print("share of units per check, in the order given: "
          + ", ".join(f"[{i + 1}] {visible(name)}" for i, name in enumerate(comparison.files)))
    for track in comparison.layers:
        shown = [c for c in track.checks if any(s > 0 for s in track.shares[c])]
        for check in shown:
            shares = "  ".join(share(s, 1, 5) for s in track.shares[check])
            print(f"{visible(track.name):<16} {visible(check):<16} {shares}")
    for step in comparison.steps:
        before, after = comparison.files[step.before], comparison.files[step.after]
        print(f"\n{visible(before)} -> {visible(after)}:")
        if not step.changes:
            print("  no unit changed state")
        for change in step.changes:
            print(f"  {visible(change.sentence())}")
    return EXIT_OK


def cmd_serve(args: argparse.Namespace) -> int:
    from actdoc.confine import JobLimits
    from actdoc.web import serve

    if min(args.max_upload, args.check_time, args.analysis_time, args.memory_limit,
           args.analysis_slots) <= 0:
        raise ActdocError("--max-upload, --check-time, --analysis-time, --memory-limit and "
                          "--analysis-slots must be positive")
    job_limits = JobLimits(check_seconds=args.check_time, analysis_seconds=args.analysis_time,
                           memory_mb=args.memory_limit)
    try:
        serve(host=args.host, port=args.port, workspace=args.workspace, demo=args.demo,
              token=args.token, max_upload_bytes=args.max_upload * 1024**2,
              read_limits=cli_limits.declared_limits(args), job_limits=job_limits,
              check_slot=args.check_slot, analysis_slots=args.analysis_slots)
    except OSError as err:
        raise ActdocError(f"cannot serve the dashboard on {args.host}:{args.port}: "
                          f"{err.strerror or err}") from None
    return EXIT_OK


def cmd_demo(args: argparse.Namespace) -> int:
    from demo_models.generate import write_all

    started = time.monotonic()
    try:
        paths = write_all(args.output)
    except OSError as err:
        raise ActdocError(f"cannot write the demo dumps to {args.output}: {err.strerror or err}")
    for path in paths:
        print(path)
    print(f"wrote {len(paths)} demo dumps to {args.output} in "
          f"{time.monotonic() - started:.1f}s", file=sys.stderr)
    return EXIT_OK


COMMANDS: dict[str, Callable[[argparse.Namespace], int]] = {
    "analyze": cmd_analyze, "check": cmd_check, "compare": cmd_compare, "serve": cmd_serve,
    "demo": cmd_demo, "repair": cli_repair.cmd_repair,
}


def _quiet_blas() -> None:
    """One BLAS thread for this process, unless the user chose otherwise.

    actdoc makes no BLAS calls worth threading, but OpenBLAS (numpy's BLAS) starts a thread per
    core at import whose idle spinning took CPU from the measuring threads (about 10% of a 2 GB
    analysis on two cores). Takes effect only before numpy is imported, as in the command.
    """
    for name in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS"):
        os.environ.setdefault(name, "1")


def main(argv: Sequence[str] | None = None) -> int:
    _quiet_blas()
    args = build_parser().parse_args(argv)
    try:
        return COMMANDS[args.command](args)
    except ActdocError as err:
        print(f"actdoc: {visible(err)}", file=sys.stderr)
        return EXIT_INVALID
    except KeyboardInterrupt:
        print("actdoc: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())

"""The long reader fuzz run: ``python -m tests.fuzz.long_run --cases 10000``.

Not part of the test suite (it takes an hour or more on two cores). Each case is a seed dump
(tests/support/mutants.py) with one to three random mutations, run in a forked child under a
wall-clock and an address-space limit (tests/support/fuzzing.py). The report counts outcomes and
lists every crash, hang and memory failure with the seed, the mutations and the stack, so that a
case can be rebuilt. The result of the last run is recorded in docs/reader-fuzzing.md.
"""

from __future__ import annotations

import argparse
import collections
import json
import random
import sys
import tempfile
import time
from pathlib import Path

from tests.support.fuzzing import DEFAULT_MEMORY, CaseRunner
from tests.support.mutants import random_mutation, structure_positions, write_seeds


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m tests.fuzz.long_run")
    parser.add_argument("--cases", type=int, default=10_000)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--timeout", type=float, default=20.0, help="seconds per case")
    parser.add_argument("--memory", type=int, default=DEFAULT_MEMORY // 2**20,
                        help="MiB of address space a case may add")
    parser.add_argument("--analyze", action="store_true",
                        help="run the whole analysis instead of reading every array")
    parser.add_argument("--report", type=Path, default=Path("fuzz-report.json"))
    args = parser.parse_args(argv)

    rng = random.Random(args.seed)
    counts: collections.Counter[str] = collections.Counter()
    failures = []
    peak = 0
    started = time.monotonic()
    with tempfile.TemporaryDirectory(prefix="actdoc-fuzz-") as tmp, CaseRunner() as runner:
        folder = Path(tmp)
        seeds = write_seeds(folder / "seeds")
        originals = {name: path.read_bytes() for name, path in seeds.items()}
        structure = {name: structure_positions(path) for name, path in seeds.items()}
        names = sorted(seeds)
        for case in range(args.cases):
            name = names[case % len(names)]
            data = originals[name]
            mutations = [random_mutation(rng, len(data), structure[name])
                         for _ in range(rng.choice((1, 1, 1, 2, 3)))]
            for mutation in mutations:
                data = mutation.apply(data)
            target = folder / f"case{Path(name).suffix}"
            target.write_bytes(data)
            limits = "uploads" if case % 2 else "default"
            result = runner.run(target, limits=limits, timeout=args.timeout,
                                memory=args.memory * 2**20,
                                mode="analyze" if args.analyze else "read")
            outcome = result["outcome"]
            if outcome == "hang":
                outcome = f"hang ({result['where']})"
            counts[outcome] += 1
            peak = max(peak, result["peak_rss"])
            if result["outcome"] not in ("ok", "refused"):
                failures.append({"case": case, "seed": name, "limits": limits,
                                 "mutations": [m.describe() for m in mutations], **result})
                print(f"case {case} {name} {[m.describe() for m in mutations]}: {outcome} "
                      f"{result.get('error', '')} {result.get('message', '')[:200]}",
                      flush=True)
            if case % 500 == 499:
                print(f"{case + 1} cases, {dict(counts)}, {time.monotonic() - started:.0f} s",
                      flush=True)
    report = {"cases": args.cases, "seed": args.seed, "timeout_s": args.timeout,
              "memory_mib": args.memory, "mode": "analyze" if args.analyze else "read",
              "counts": dict(counts), "peak_rss_mib": round(peak / 2**20, 1),
              "seconds": round(time.monotonic() - started, 1), "failures": failures}
    args.report.write_text(json.dumps(report, indent=1))
    print(json.dumps({k: v for k, v in report.items() if k != "failures"}))
    return 0 if not failures else 1


if __name__ == "__main__":
    sys.exit(main())

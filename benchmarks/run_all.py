"""Run every ``benchmarks/bench_*.py`` in turn, each in its own Python process.

Usage::

    python benchmarks/run_all.py            # all benchmarks, in name order
    python benchmarks/run_all.py forward    # only those whose file name contains "forward"

Each benchmark prints its own figures. The exit status is non-zero if any
benchmark fails (non-zero exit status of its own, e.g. a failed correctness
check) or if none is found; timings never fail a run.
"""

from __future__ import annotations

import argparse
import glob
import os
import subprocess
import sys
import time

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)


def discover(patterns: list[str]) -> list[str]:
    """Paths of ``bench_*.py`` beside this file whose names contain any of ``patterns``."""
    scripts = sorted(glob.glob(os.path.join(HERE, "bench_*.py")))
    if patterns:
        scripts = [s for s in scripts if any(p in os.path.basename(s) for p in patterns)]
    return scripts


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description="Run the benchmarks in benchmarks/bench_*.py.")
    parser.add_argument("patterns", nargs="*", help="run only benchmarks whose file name contains one of these")
    args = parser.parse_args(argv)

    scripts = discover(args.patterns)
    if not scripts:
        print(f"no benchmarks found in {HERE} matching {args.patterns or 'bench_*.py'}", file=sys.stderr)
        return 1
    results = []
    for path in scripts:
        name = os.path.basename(path)
        print(f"=== {name} ===", flush=True)
        t0 = time.perf_counter()
        try:
            code = subprocess.call([sys.executable, path], cwd=ROOT)
        except KeyboardInterrupt:
            print(f"\ninterrupted during {name}", file=sys.stderr)
            return 130
        elapsed = time.perf_counter() - t0
        results.append((name, code, elapsed))
        print(f"=== {name}: {'ok' if code == 0 else f'FAILED (exit status {code})'} in {elapsed:.1f} s ===\n",
              flush=True)

    print("Summary")
    for name, code, elapsed in results:
        print(f"  {name:<40} {'ok' if code == 0 else f'FAILED ({code})':<12} {elapsed:7.1f} s")
    failed = [name for name, code, _ in results if code != 0]
    if failed:
        print(f"{len(failed)} of {len(results)} benchmarks failed: {', '.join(failed)}", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())

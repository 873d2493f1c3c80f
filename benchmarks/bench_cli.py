"""Responsiveness of the command line: how long until ``--help`` is on the screen.

Each figure is the median wall time of 5 fresh Python processes (after one unmeasured warm-up
run, so that the files are in the page cache), started from the repository root so that this
checkout's adfit is the one imported:

  adfit --help        the CLI's entry point (adfit.cli:main) asked for the list of commands
  adfit fit --help    the same for one command's options
  import adfit        the package alone

Nothing here computes: these figures are the cost of Python, typer and whatever adfit imports
before it knows what it was asked for. JAX (about 2 s to import on the 2-core machine) should
only be imported by the commands that compute.

Usage:  python benchmarks/bench_cli.py [--repeat 5]
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import time

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))

# Run the entry point the console script runs (the installed `adfit` script may point at
# another checkout); `python -c` puts the current folder, ROOT, first on sys.path.
CLI = "import sys; sys.argv = ['adfit', *sys.argv[1:]]; from adfit.cli import main; main()"

CASES = (
    ("adfit --help", [sys.executable, "-c", CLI, "--help"]),
    ("adfit fit --help", [sys.executable, "-c", CLI, "fit", "--help"]),
    ("python -c 'import adfit'", [sys.executable, "-c", "import adfit"]),
    ("python -c 'import adfit, jax' (for scale)", [sys.executable, "-c", "import adfit, jax"]),
)


def wall(cmd: list[str]) -> float:
    t = time.perf_counter()
    out = subprocess.run(cmd, cwd=ROOT, capture_output=True, text=True,
                         env={**os.environ, "COLUMNS": "80"})
    dt = time.perf_counter() - t
    if out.returncode != 0:
        raise SystemExit(f"{' '.join(cmd)} failed ({out.returncode}):\n{out.stderr}")
    return dt


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--repeat", type=int, default=5)
    args = ap.parse_args()
    commit = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=ROOT, capture_output=True,
                            text=True).stdout.strip()
    print(f"{os.cpu_count()} CPUs; load average {' '.join(f'{x:.2f}' for x in os.getloadavg())}; "
          f"commit {commit}; {sys.version.split()[0]}")
    for label, cmd in CASES:
        wall(cmd)  # warm-up: page cache, .pyc files
        ts = [wall(cmd) for _ in range(args.repeat)]
        print(f"{label:<44} median {statistics.median(ts):.3f} s  "
              f"(min {min(ts):.3f}, max {max(ts):.3f}, {args.repeat} runs)")


if __name__ == "__main__":
    main()

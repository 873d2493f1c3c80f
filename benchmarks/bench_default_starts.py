"""What the default starts cost: ``fit(net, data)`` (4 starts with latent nodes: complete-family
counts, then random Dirichlet draws after 10 EM steps) against one start (``restarts=1``),
on latent workloads. Both timed after a warm-up fit (compiled programs cached), end to end
inside ``fit`` (starts, KKT checks, boundary and saddle moves). Prints wall time, objective
reached, the number of starts at the best objective, and the moves the optimiser made.

Workloads (seeded, synthetic except Stouffer-Toby):
* ``st3``: Stouffer & Toby's role-conflict data, three latent classes (216 respondents);
* ``lcm7``: 3 classes x 7 three-state items, 3 000 records, 5 % MCAR (the latent class case of
  the stationarity tests, seed 10);
* ``lcm20``: ``workloads.latent_class_workload`` with 20 000 records (4 classes x 20 binary
  items, planned missingness).

    python benchmarks/bench_default_starts.py [--only st3,lcm7,lcm20]
"""

from __future__ import annotations

import argparse
import os
import platform
import sys
import time
import warnings

sys.path.insert(0, os.path.dirname(__file__))
sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", "tests"))

from adfit.data import encode_frame, load_data  # noqa: E402
from adfit.fit import fit  # noqa: E402


def workloads(only):
    if "st3" in only:
        from published import stouffer_toby

        net, df = stouffer_toby(3)
        yield "st3", net, encode_frame(net, df, count_column="count")
    if "lcm7" in only:
        from test_stationarity import _latent_class_records

        net, df = _latent_class_records(10)
        yield "lcm7", net, load_data(net, df)
    if "lcm20" in only:
        from workloads import latent_class_workload

        net, data = latent_class_workload(n_rows=20_000)
        yield "lcm20", net, data


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--only", default="st3,lcm7,lcm20")
    args = ap.parse_args()
    print(f"# {platform.node()} {os.cpu_count()} cores, load {os.getloadavg()[0]:.1f}")
    print("| workload | starts | wall s | objective | starts at best | moves (boundary/saddle) | converged |")
    print("|---|---|---|---|---|---|---|")
    for name, net, data in workloads(args.only.split(",")):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            fit(net, data, restarts=1)          # warm-up: compile
            fit(net, data)
            for restarts in (1, None):
                t = time.perf_counter()
                r = fit(net, data, restarts=restarts)
                dt = time.perf_counter() - t
                st = r.extras["stationarity"]
                sec = r.extras["restarts"]
                print(f"| {name} | {r.settings['restarts']}{' (default)' if restarts is None else ''} | {dt:.2f} | "
                      f"{r.objective_value:.4f} | {sec.get('starts_at_best_objective')} | "
                      f"{st['boundary_escapes']}/{st['saddle_escapes']} | {r.converged} |", flush=True)


if __name__ == "__main__":
    main()

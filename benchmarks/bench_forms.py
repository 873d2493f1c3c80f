"""The cost of each CPT form against the full table on the same network and records.

Network (synthetic): ``--causes`` binary root causes (some cells missing) and one binary
effect with all of them as parents, plus a second effect tied to the first; the records are
simulated from a noisy-OR truth and the causes' cells are missing completely at random with
probability ``--missing``. The same records are fitted with the effect's CPT as a full table
(one row per cause configuration), a noisy-OR, a noisy-MAX (the same two states), a
logistic CPT and a monotone table (``increasing_with = ["c0"]``, or ``["c0", "c1"]``, which the noisy-OR truth
satisfies), side by side in one run; then records in which c0 *lowers* the effect's
probability, fitted as a table and as the monotone table (whose constraints then bind). For each form the table gives the free parameters, the
time of one value-and-gradient evaluation of the fit's objective (warm, median of
``--repeats``), the whole `fit()` (one start, compile included, then warm), the iterations and
the log-likelihood reached.

    python benchmarks/bench_forms.py                     # 6 causes, 20 000 records
    python benchmarks/bench_forms.py --causes 8 --records 50000

Copy the printed table into docs/performance.md ("Structured CPTs").
"""

from __future__ import annotations

import argparse
import os
import platform
import statistics
import sys
import time
import warnings
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from adfit.data import load_data  # noqa: E402
from adfit.fit import Fitter, FitSettings, fit  # noqa: E402
from adfit.network import parse_network  # noqa: E402
from adfit.params import free_layout  # noqa: E402


def network(causes: int, form: str):
    nodes = {f"c{i}": {"states": ["no", "yes"]} for i in range(causes)}
    par = [f"c{i}" for i in range(causes)]
    extra = ({} if form == "table" else {"increasing_with": ["c0", "c1"]} if form.startswith("monotone along two")
             else {"increasing_with": ["c0"]} if form.startswith("monotone") else {"cpd": form})
    nodes["effect"] = {"states": ["no", "yes"], "parents": par, **extra}
    nodes["effect2"] = {"states": ["no", "yes"], "parents": par, "tied_to": "effect"}
    return parse_network({"nodes": nodes})


def simulate(causes: int, n: int, missing: float, seed: int, flip: bool = False) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    on = rng.random((n, causes)) < rng.uniform(0.1, 0.4, size=causes)
    strength = rng.uniform(0.2, 0.8, size=causes)
    if flip:  # c0 protects instead of causing: the monotone constraint along c0 binds
        strength[0] = -1.0
    df = pd.DataFrame({f"c{i}": np.where(on[:, i], "yes", "no") for i in range(causes)})
    for e in ("effect", "effect2"):
        absent = np.minimum(0.95 * np.prod(np.where(on, 1 - strength, 1.0), axis=1), 0.99)
        df[e] = np.where(rng.random(n) < absent, "no", "yes")
    mask = rng.random((n, causes)) < missing
    for i in range(causes):
        df.loc[mask[:, i], f"c{i}"] = None
    return df


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--causes", type=int, default=6)
    ap.add_argument("--records", type=int, default=20000)
    ap.add_argument("--missing", type=float, default=0.2)
    ap.add_argument("--repeats", type=int, default=7)
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args(argv)
    df = simulate(args.causes, args.records, args.missing, args.seed)
    flipped = simulate(args.causes, args.records, args.missing, args.seed, flip=True)
    print(f"# {platform.platform()}, {os.cpu_count()} CPUs, load {os.getloadavg()[0]:.1f}; "
          f"{args.causes} causes, {args.records} records, {args.missing:.0%} of cause cells missing")
    print("| form | free parameters | value+gradient (ms) | fit, cold (s) | fit, warm (s) | iterations | log-likelihood "
          "| binding | converged |")
    print("|---|---|---|---|---|---|---|---|---|")
    for form in ("table", "noisy_or", "noisy_max", "logistic", "monotone", "table, flipped", "monotone, binding",
                 "monotone along two", "monotone along two, binding"):
        net = network(args.causes, form.replace("table, flipped", "table"))
        coded = load_data(net, flipped if form.endswith("flipped") or form.endswith("binding") else df)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            t = time.perf_counter()
            r = fit(net, coded, restarts=1)
            cold = time.perf_counter() - t
            t = time.perf_counter()
            fit(net, coded, restarts=1)
            warm = time.perf_counter() - t
        f = Fitter(net, coded, settings=FitSettings())
        lay = free_layout(net)
        z = np.random.default_rng(1).normal(size=lay.size) * 0.1
        ones, pseudo = np.ones(lay.size), np.zeros(lay.size)
        f.objective_fg(z, ones, pseudo, 0.0, f.n_total)
        times = []
        for _ in range(args.repeats):
            t = time.perf_counter()
            f.objective_fg(z, ones, pseudo, 0.0, f.n_total)
            times.append(time.perf_counter() - t)
        bind = len(((r.extras.get("nodes") or {}).get("effect") or {}).get("binding") or [])
        print(f"| {form} | {net.n_free_parameters()} | {1e3 * statistics.median(times):.2f} | {cold:.2f} | "
              f"{warm:.2f} | {r.iterations} | {r.log_likelihood:.3f} | {bind} | {'yes' if r.converged else 'NO'} |")


if __name__ == "__main__":
    main()

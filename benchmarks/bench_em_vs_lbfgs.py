"""Time to reach the optimum: L-BFGS and Adam (JAX core) against EM (numpy reference).

For each workload the target is the best objective found by any method (each run to its own
tight stopping rule), and a method "reaches" it when its objective is within 1e-6 relative of
the target. Times are wall-clock from the start of the optimiser loop; for the JAX methods a
warm-up call compiles first (the compile time is printed apart). Every method starts from the
same seeded random CPTs.

Workloads (seeded, synthetic: they measure speed, not accuracy):

* ``net37``: the 37-node banded random network of ``workloads.local_network`` (2-4 states,
  <= 3 parents), 20 000 sampled records with 20% of the cells missing (MCAR);
* ``lcm``: latent class model, 4 classes and 20 binary items, 100 000 records, no gaps;
* ``linkage``: the linkage data of Dempster, Laird & Rubin (1977), one free parameter.

    python benchmarks/bench_em_vs_lbfgs.py                  # all three (several minutes)
    python benchmarks/bench_em_vs_lbfgs.py --only linkage --rows-scale 0.1

Copy the printed table into docs/performance.md ("EM versus gradient").
"""

from __future__ import annotations

import argparse
import os
import platform
import sys
import time
import warnings
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

from workloads import coded, local_network, mask_mcar, random_cpts, sample  # noqa: E402

from adfit.data import encode_frame  # noqa: E402
from adfit.em import em_fit, random_start  # noqa: E402
from adfit.fit import fit  # noqa: E402
from adfit.network import network_from_dict  # noqa: E402

REL = 1e-6


def workload(name: str, scale: float):
    if name == "net37":
        net = local_network(37, seed=0)
        x = sample(net, random_cpts(net, seed=1), int(20_000 * scale), seed=2)
        return net, coded(net, mask_mcar(net, x, 0.2, seed=3))
    if name == "lcm":
        nodes = {"cls": {"states": [f"k{i}" for i in range(4)], "latent": True}}
        nodes |= {f"i{j:02d}": {"states": ["0", "1"], "parents": ["cls"]} for j in range(20)}
        net = network_from_dict(nodes)
        rng = np.random.default_rng(7)
        truth = {"cls": rng.dirichlet(np.full(4, 5.0))}
        truth |= {f"i{j:02d}": rng.dirichlet(np.full(2, 0.7), size=4) for j in range(20)}
        x = sample(net, truth, int(100_000 * scale), seed=8)
        return net, coded(net, mask_mcar(net, x, 0.0, seed=9))
    if name == "linkage":
        from published import linkage_one_parameter

        net, df = linkage_one_parameter()
        return net, encode_frame(net, df, count_column="count")
    raise SystemExit(f"unknown workload {name!r}")


def run_em(net, data, start, max_iter):
    times, t0 = [0.0], time.perf_counter()
    res = em_fit(net, data, init=start, max_iter=max_iter, callback=lambda k, p: times.append(time.perf_counter() - t0))
    total = time.perf_counter() - t0
    return {"objective": np.array(res.trace), "times": np.array(times[: len(res.trace)]), "total": total,
            "iterations": res.iterations, "converged": res.converged, "final": res.objective_value, "rate": res.rate}


def run_gradient(net, data, start, method, max_iter):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t0 = time.perf_counter()
        fit(net, data, method=method, init=start, max_iter=2)  # compile
        compile_s = time.perf_counter() - t0
        objs, times = [], []
        t0 = time.perf_counter()
        res = fit(net, data, method=method, init=start, max_iter=max_iter,
                  progress=lambda s, it, o, g: (objs.append(o), times.append(time.perf_counter() - t0)))
        total = time.perf_counter() - t0
    return {"objective": np.array(objs), "times": np.array(times), "total": total, "compile": compile_s,
            "iterations": res.iterations, "converged": res.converged, "final": res.objective_value}


def time_to(run, target):
    ok = np.flatnonzero(run["objective"] >= target - REL * abs(target))
    return (float(run["times"][ok[0]]), int(ok[0])) if ok.size else (None, None)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--only", choices=["net37", "lcm", "linkage"], action="append")
    ap.add_argument("--rows-scale", type=float, default=1.0, help="multiply the number of records")
    ap.add_argument("--max-iter", type=int, default=5000)
    ap.add_argument("--seed", type=int, default=0, help="seed of the common random start")
    args = ap.parse_args(argv)
    print(f"# {platform.platform()}, {os.cpu_count()} CPUs, python {platform.python_version()}, numpy {np.__version__}")
    print(f"# reached = objective within {REL:g} relative of the best final objective of the three")
    print(f"{'workload':9s} {'rows':>8s} {'distinct':>8s} {'method':6s} {'to target s':>11s} {'iter':>6s} "
          f"{'total s':>8s} {'iters':>6s} {'conv':>5s} {'compile s':>9s} {'final objective':>18s}")
    for name in args.only or ["linkage", "net37", "lcm"]:
        net, data = workload(name, args.rows_scale)
        start = random_start(net, args.seed)
        runs = {"em": run_em(net, data, start, args.max_iter),
                "lbfgs": run_gradient(net, data, start, "lbfgs", args.max_iter),
                "adam": run_gradient(net, data, start, "adam", args.max_iter)}
        target = max(r["final"] for r in runs.values())
        for m, r in runs.items():
            t, k = time_to(r, target)
            print(f"{name:9s} {data.n_rows:8.0f} {data.n_distinct:8d} {m:6s} "
                  f"{'never' if t is None else f'{t:.3f}':>11s} {'' if k is None else k:>6} {r['total']:8.3f} "
                  f"{r['iterations']:6d} {str(r['converged']):>5s} "
                  f"{'' if 'compile' not in r else format(r['compile'], '.2f'):>9s} {r['final']:18.8f}"
                  + (f"  (EM rate {r['rate']:.4f})" if m == "em" else ""))
        sys.stdout.flush()


if __name__ == "__main__":
    main()

"""K starts side by side (adfit.restarts, vmapped evaluations) against K separate fits.

For each workload the same K starts (as ``fit(seed=0, restarts=K)`` draws them) are run
twice: one after the other with ``Fitter.run`` (the single-start code), and together with
``adfit.restarts.run_starts``. Both are timed warm (compiled beforehand; the compile times are
printed apart), each ``--repeats`` times, interleaved; the table gives the fastest and the
median wall-clock time. It also prints how many K-wide rounds were run, the fraction of their
K slots that carried a live start (the rest are finished starts, masked), the rounds with one
start left (evaluated by the single-start programs), and the largest difference between the
objectives each start reached in the two modes. The compile times are those of the first
evaluation of each program ("single" is cached after the first K of a workload).

Workloads (seeded):

* ``lcm3``: Stouffer & Toby's role-conflict data (216 respondents, 16 patterns) with three
  latent classes (published data; several local optima);
* ``net37``: the 37-node banded random network of ``workloads.local_network`` (2-4 states,
  <= 3 parents), sampled records with 20 % of the cells missing (MCAR), synthetic.

    python benchmarks/bench_restarts.py                       # both, K = 4 and 8
    python benchmarks/bench_restarts.py --only lcm3 --starts 4,8,16

Copy the printed table into docs/performance.md ("Restarts").
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

sys.path.insert(0, str(Path(__file__).resolve().parent))
sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

from workloads import coded, local_network, mask_mcar, random_cpts, sample  # noqa: E402

from adfit.data import encode_frame  # noqa: E402
from adfit.fit import Fitter, FitSettings, complete_family_start, random_start  # noqa: E402
from adfit.likelihood import logits_from_probs  # noqa: E402
from adfit.restarts import run_starts  # noqa: E402


def workload(name: str, rows: int):
    if name == "lcm3":
        from published import stouffer_toby

        net, df = stouffer_toby(3)
        return net, encode_frame(net, df, count_column="count")
    if name == "net37":
        net = local_network(37, seed=0)
        x = sample(net, random_cpts(net, seed=1), rows, seed=2)
        return net, coded(net, mask_mcar(net, x, 0.2, seed=3))
    raise SystemExit(f"unknown workload {name!r}")


def starts_for(net, data, fitter, k, seed=0):
    rng = np.random.default_rng(seed)
    out = []
    for i in range(k):
        p0 = complete_family_start(net, data, rng, fitter.pseudo) if i == 0 else random_start(net, rng)
        out.append(logits_from_probs(net, p0))
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--only", default="lcm3,net37")
    ap.add_argument("--starts", default="4,8", help="comma-separated K")
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--rows", type=int, default=5000, help="records of net37")
    ap.add_argument("--max-iter", type=int, default=1000)
    args = ap.parse_args()
    print(f"# {platform.machine()}, {os.cpu_count()} cores, Python {platform.python_version()}")
    print("| workload | K | compile single s | compile K-wide s | K separate fits s (min / median) "
          "| K together s (min / median) | speed-up (min) | K-wide rounds | slot use | single rounds "
          "| max abs Δ objective |")
    print("| --- | ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: |")
    for name in args.only.split(","):
        net, data = workload(name, args.rows)
        for k in (int(s) for s in args.starts.split(",")):
            fitter = Fitter(net, data, settings=FitSettings(max_iter=args.max_iter))
            starts = starts_for(net, data, fitter, k)
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                # compile: one evaluation of each program (the single-start and the K-wide one)
                t = time.perf_counter()
                fitter.evaluate(starts[0])
                lay = fitter.layout  # the optimiser's flat vectors
                ones = np.ones(lay.size)
                fitter.objective_fg(lay.flatten(starts[0]), ones, *_consts(fitter))
                c_single = time.perf_counter() - t
                from adfit.restarts import BatchedObjective

                t = time.perf_counter()
                BatchedObjective(fitter, k)({i: ("fg", lay.flatten(starts[i]), ones) for i in range(k)})
                c_batch = time.perf_counter() - t
                seq_t, bat_t, stats = [], [], {}
                for _ in range(args.repeats):
                    t = time.perf_counter()
                    rs, _ = run_starts(fitter, starts, batched=False)
                    seq_t.append(time.perf_counter() - t)
                    t = time.perf_counter()
                    rb, _ = run_starts(fitter, starts, batched=True, stats=stats)
                    bat_t.append(time.perf_counter() - t)
            dobj = max(abs(a.value - b.value) for a, b in zip(rs, rb))
            print(f"| {name} | {k} | {c_single:.1f} | {c_batch:.1f} | {min(seq_t):.2f} / {statistics.median(seq_t):.2f} "
                  f"| {min(bat_t):.2f} / {statistics.median(bat_t):.2f} | {min(seq_t) / min(bat_t):.1f} "
                  f"| {stats['rounds']} | {stats['slot_use']:.2f} | {stats['single_rounds']} | {dobj:.1e} |", flush=True)


def _consts(fitter):
    import jax.numpy as jnp

    return (jnp.asarray(fitter.pseudo_flat), jnp.asarray(float(fitter.settings.l2)),
            jnp.asarray(fitter.n_total))


if __name__ == "__main__":
    main()

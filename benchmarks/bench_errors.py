"""Cost of the observed information (error bars) on the 37-node / 100 000-record workload.

The workload is the one of ``bench_scale.py rows`` and ``bench_commands.py``: the 37-node banded
network of ``workloads.local_network(37, seed=0)``, CPTs ``random_cpts(seed=1)``, 100 000
sampled records with 20 % of the cells missing completely at random (every row distinct). The
information is taken at the generating CPTs (the cost of a Hessian-vector product does not depend
on the point; every coordinate is interior there, so the coordinates are all the free parameters).

Printed, each after a warm-up call that compiles the program:

  gradient      one value-and-expected-counts evaluation (what ``cli_errors`` times)
  one column    Hessian-vector products one column at a time (batch 1): seconds per product on a
                sample of ``--sample`` columns, extrapolated to all P columns (``--full-before``
                runs them all)
  batched       the dense information as ``compute_uncertainty`` forms it (batches of
                ``--batch`` columns, vmapped forward-over-reverse): compile, all columns, per product
  estimate      what ``cli_errors`` estimates for this job and whether it would skip it
  agreement     largest relative difference between the batched and the one-column columns

Usage:  PYTHONPATH=. python benchmarks/bench_errors.py [--rows 100000] [--batch 32] [--sample 16]
                                                     [--extra-batches 8,64] [--full-before] [--keep-chunks]
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

from workloads import coded, local_network, mask_mcar, random_cpts, sample  # noqa: E402

from adfit import uncertainty as U  # noqa: E402
from adfit.likelihood import Likelihood  # noqa: E402


def load() -> str:
    return " ".join(f"{x:.1f}" for x in os.getloadavg())


def commit() -> str:
    try:
        return subprocess.run(["git", "rev-parse", "--short", "HEAD"], capture_output=True, text=True,
                              cwd=Path(__file__).resolve().parent).stdout.strip()
    except OSError:  # pragma: no cover
        return "?"


def timed_products(pb: U._Problem, cols: np.ndarray) -> tuple[float, float, np.ndarray]:
    """(first call incl. compile, seconds of the rest, I @ e_cols) for columns ``cols``."""
    P = pb.co.size
    E = np.zeros((P, len(cols)))
    E[cols, np.arange(len(cols))] = 1.0
    b = pb.batch
    t = time.perf_counter()
    first = pb.information_times(E[:, :b])
    t_first = time.perf_counter() - t
    t = time.perf_counter()
    rest = pb.information_times(E[:, b:]) if len(cols) > b else np.zeros((P, 0))
    return t_first, time.perf_counter() - t, np.concatenate([first, rest], axis=1)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", type=int, default=100_000)
    ap.add_argument("--batch", type=int, default=U.HVP_BATCH)
    ap.add_argument("--sample", type=int, default=16)
    ap.add_argument("--extra-batches", default="")
    ap.add_argument("--full-before", action="store_true")
    ap.add_argument("--keep-chunks", action="store_true",
                    help="also run the batched products on the prepared likelihood, without cutting its chunks")
    a = ap.parse_args()
    print(f"commit {commit()}, load at start {load()}, {os.cpu_count()} cores")
    net = local_network(37, seed=0)
    probs = random_cpts(net, seed=1)
    data = coded(net, mask_mcar(net, sample(net, probs, a.rows, seed=2), 0.2, seed=3))
    t = time.perf_counter()
    lik = Likelihood(net, data)
    print(f"{a.rows} records, {len(data.codes)} distinct rows; plan {time.perf_counter() - t:.2f} s")
    t_grad = U.gradient_seconds(lik, probs)
    _, counts = lik.expected_counts(probs)
    pseudo = U._pseudo(net, None)
    co = U.make_coordinates(net, probs, {k: counts[k] for k in net.free_names})
    P = net.n_free_parameters()
    print(f"free parameters P = {P}, coordinates {co.size}; gradient {t_grad:.3f} s")
    est = P * U.HVP_COST * t_grad
    print(f"estimate (cli_errors): {est:.0f} s = {P} x {U.HVP_COST:g} x {t_grad:.3f} s -> "
          f"{'skipped' if est > U.AUTO_MAX_SECONDS else 'computed'} (limit {U.AUTO_MAX_SECONDS:g} s)")

    rng = np.random.default_rng(0)
    cols = np.sort(rng.choice(co.size, size=min(a.sample, co.size), replace=False))
    one = U._Problem(net, data, co, pseudo, 0.0, 1, lik)
    c1, r1, I1 = timed_products(one, cols)
    per1 = r1 / max(1, len(cols) - 1)
    print(f"one column at a time: compile+first {c1:.2f} s, {per1:.3f} s per product "
          f"({per1 / t_grad:.2f} gradients) -> {per1 * co.size:.0f} s for all {co.size} columns (extrapolated)")
    if a.full_before:
        t = time.perf_counter()
        one.information_times(np.eye(co.size))
        print(f"one column at a time, all columns: {time.perf_counter() - t:.1f} s")

    runs = [(b, True) for b in [a.batch] + [int(x) for x in a.extra_batches.split(",") if x]]
    if a.keep_chunks:
        runs.append((a.batch, False))
    for b, rechunk in runs:
        kw = {} if rechunk else {"rechunk": False}
        t = time.perf_counter()
        pb = U._Problem(net, data, co, pseudo, 0.0, b, lik, **kw)
        t_setup = time.perf_counter() - t
        print(f"batch {b}, {'row chunks cut by the batch (a plan of its own)' if pb.lik is not lik else 'the prepared likelihood as it is'}"
              f", {'threads over ' + str(len(pb.part_aux)) + ' parts' if getattr(pb, 'part_aux', None) else 'one program'}: "
              f"setup {t_setup:.2f} s", flush=True)
        t = time.perf_counter()
        pb.information_times(np.eye(co.size)[:, :pb.batch])
        t_c = time.perf_counter() - t
        t = time.perf_counter()
        info = pb.dense_information()
        t_all = time.perf_counter() - t
        per = t_all / co.size
        rel = float(np.abs(info[:, cols] - I1).max() / np.abs(I1).max())
        print(f"batched ({pb.batch} columns): compile+first batch {t_c:.2f} s, all {co.size} columns {t_all:.1f} s "
              f"({per:.3f} s per product, {per / t_grad:.2f} gradients); compile + all {t_c + t_all:.1f} s; "
              f"largest difference to one column at a time, relative to the largest entry, {rel:.1e}", flush=True)
    print(f"load at end {load()}")


if __name__ == "__main__":
    main()

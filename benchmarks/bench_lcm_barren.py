"""Cost of barren items in the latent class evaluation (a measured idea, see docs/performance.md).

Times one value-and-expected-counts call of the JAX core (``Likelihood.expected_counts``) on

* the ``lcm`` workload of ``bench_em_vs_lbfgs.py`` (4 classes x 20 binary items, three-form
  planned missingness: every row has 5 unasked items, barren nodes of its hidden component), and
* the same kind of model without barren nodes: 4 classes x 15 binary items, every item observed
  (100 000 sampled records, P(item = 1 | class) = 0.5 +- 0.15),

and prints the plan of each (``Plan.describe()``). The lcm workload is timed twice: with the
barren leaves in their components (``adfit.likelihood.SUM_BARREN_LEAVES = False``, the full
elimination) and summed out of them (the default: their expected counts follow from their
parents' posterior); the two must give the same value and expected counts (printed: the largest
difference).

    python benchmarks/bench_lcm_barren.py
"""

from __future__ import annotations

import os
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

from workloads import coded, latent_class_workload, sample  # noqa: E402

from adfit.data import HIDDEN  # noqa: E402
from adfit.em import random_start  # noqa: E402
from adfit.likelihood import Likelihood  # noqa: E402
from adfit.network import network_from_dict  # noqa: E402


def bench(net, data, label, rounds=7):
    """Returns (value, expected counts) at the seeded start (to compare two plans)."""
    t = time.perf_counter()
    lik = Likelihood(net, data)
    plan_s = time.perf_counter() - t
    p = random_start(net, 0)
    lik.expected_counts(p)  # compile
    ts = []
    for _ in range(rounds):
        time.sleep(0.2)  # let the thread pool settle between calls
        t = time.perf_counter()
        lik.expected_counts(p)
        ts.append(time.perf_counter() - t)
    print(f"{label}: {data.n_distinct} distinct rows, plan {plan_s:.2f} s, value + counts min {min(ts) * 1e3:.1f} ms, "
          f"median {np.median(ts) * 1e3:.1f} ms, {min(ts) / data.n_distinct * 1e9:.0f} ns per distinct row")
    print(f"    {lik.plan.describe()}")
    return lik.expected_counts(p)


def main():
    print(f"# load average {os.getloadavg()[0]:.2f}")
    import adfit.likelihood as L

    net, data = latent_class_workload(100_000)
    L.SUM_BARREN_LEAVES = False
    va, ca = bench(net, data, "lcm, 3-form design (5 barren items per row), barren leaves kept (full elimination)")
    L.SUM_BARREN_LEAVES = True
    vb, cb = bench(net, data, "lcm, 3-form design, barren leaves summed out (default)")
    print(f"    same value and expected counts: |delta value| {abs(va - vb):.2e} (value {va:.6f}), "
          f"largest |delta count| {max(float(np.abs(ca[k] - cb[k]).max()) for k in ca):.2e}")
    nodes = {"cls": {"states": [f"k{i}" for i in range(4)], "latent": True}}
    nodes |= {f"i{j:02d}": {"states": ["0", "1"], "parents": ["cls"]} for j in range(15)}
    net15 = network_from_dict(nodes)
    rng = np.random.default_rng(0)
    p1 = 0.5 + 0.15 * rng.choice([-1.0, 1.0], size=(4, 15))
    truth = {"cls": np.full(4, 0.25)} | {f"i{j:02d}": np.stack([1 - p1[:, j], p1[:, j]], axis=1) for j in range(15)}
    x = sample(net15, truth, 100_000, seed=1)
    x[:, 0] = HIDDEN
    bench(net15, coded(net15, x), "4 classes x 15 items, all observed (no barren node)")
    print(f"# load average {os.getloadavg()[0]:.2f}")


if __name__ == "__main__":
    main()

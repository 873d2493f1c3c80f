"""Cost of the query features: the most probable explanation by max-product elimination, soft
evidence, and many queries at once (``adfit query --explain``, ``--given N=s:w,...``, ``--batch``).

Figures printed (wall time, median of --repeat runs after one warm-up):

  max-product MPE     adfit.explain.max_product on chains of N three-state nodes (3**N joint
                      states; enumeration, the previous method, stopped at 2e6 of them) and on a
                      5x5 grid of binary nodes (each node's parents: left and upper neighbours)
  batch of R queries  adfit.batch.answer_batch on R rows of hard and soft evidence over the grid,
                      posteriors of every node (one posterior pass), with and without --explain
  single query        adfit.impute.query with soft evidence, the compiled program warm

Usage:  python benchmarks/bench_queries.py [--repeat 3]
"""

from __future__ import annotations

import argparse
import statistics
import time

import numpy as np
import pandas as pd


def timed(fn, repeat):
    fn()
    out = []
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        out.append(time.perf_counter() - t)
    return statistics.median(out)


def random_probs(net, seed):
    rng = np.random.default_rng(seed)
    return {n.name: rng.dirichlet(np.ones(n.card), size=net.cpt_shape(n.name)[:-1]).reshape(net.cpt_shape(n.name))
            for n in net.nodes}


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--repeat", type=int, default=3)
    a = ap.parse_args()
    from adfit.batch import answer_batch
    from adfit.explain import max_product
    from adfit.impute import query
    from adfit.network import network_from_dict

    for n in (10, 40, 200):
        spec = {"x0": {"states": ["a", "b", "c"]}}
        for i in range(1, n):
            spec[f"x{i}"] = {"states": ["a", "b", "c"], "parents": [f"x{i - 1}"]}
        net = network_from_dict(spec)
        probs = random_probs(net, n)
        t = timed(lambda: max_product(net, probs, {"x3": "b"}), a.repeat)
        print(f"max-product MPE, chain of {n:3d} three-state nodes (3^{n} joint states): {t * 1e3:8.1f} ms")
    spec = {}
    for r in range(5):
        for c in range(5):
            par = ([f"g{r}{c - 1}"] if c else []) + ([f"g{r - 1}{c}"] if r else [])
            spec[f"g{r}{c}"] = {"states": ["0", "1"], "parents": par}
    grid = network_from_dict(spec)
    gp = random_probs(grid, 1)
    t = timed(lambda: max_product(grid, gp, {"g44": "1"}), a.repeat)
    print(f"max-product MPE, 5x5 grid of binary nodes: {t * 1e3:8.1f} ms")
    t = timed(lambda: query(grid, gp, {"g00": "1"}, ["g44"], soft={"g22": {"0": 1.0, "1": 4.0}}), a.repeat)
    print(f"single query with soft evidence on the grid (warm): {t * 1e3:8.1f} ms")
    from adfit.batch import read_batch  # noqa: F401  (the path the CLI takes)

    for rows in (100, 1000):
        rng = np.random.default_rng(rows)
        codes = np.full((rows, len(grid)), -1, dtype=np.int32)
        codes[:, grid.index("g00")] = rng.integers(0, 2, rows)
        codes[:, grid.index("g44")] = rng.integers(0, 2, rows)
        w = {"g22": np.column_stack([np.ones(rows), rng.uniform(0.5, 4, rows)])}
        soft_rows = [{"g22": {"0": 1.0, "1": float(x)}} for x in w["g22"][:, 1]]
        frame = pd.DataFrame({"id": np.arange(rows)})
        t = timed(lambda: answer_batch(grid, gp, frame, codes, w, soft_rows), a.repeat)
        te = timed(lambda: answer_batch(grid, gp, frame, codes, w, soft_rows, explain=True), 1)
        print(f"batch of {rows:5d} queries on the grid: posteriors {t:6.2f} s, with --explain {te:6.2f} s")


if __name__ == "__main__":
    main()

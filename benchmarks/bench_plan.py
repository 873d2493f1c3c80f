"""Plan time of the likelihood (``adfit.likelihood.build_plan``), two source trees side by side.

The plan is most of a large fit (docs/performance.md, "Fit at scale"): it is built in plain
numpy and Python before anything is compiled. This script builds the plan of each workload in
a fresh process per tree (``--root A --root B``: each process imports adfit from that tree),
alternating the trees round by round so that both see the same load, and prints the plan's
seconds per tree (wall and process CPU time: the plan runs on one thread, so on a shared machine
its CPU time is the steadier figure) and their ratios. It also prints a fingerprint of each plan (a hash of every
block description and every array and weight of the plan): equal fingerprints mean the two
trees built the same plan, so every number computed from it is the same.

  net200  200-node random network (<= 3 parents among the 6 previous nodes), 100 000 rows,
          20 % of cells missing completely at random (the workload of bench_scale.py net200).
  big37   37-node random network, 10 000 000 rows with gaps in 5 columns missing at random
          (the chance of a gap depends on an always-observed column), kept as rows with count
          1, as ``bench_scale.py parquet-fit`` does (its fit is mostly this plan). The codes are
          written once into --data-dir (int32, 1.5 GB) and read by every process in the
          network's own code type (int8 here, where the tree has one).

The data are seeded random networks and CPTs (benchmarks/workloads.py): they measure speed,
not accuracy.

Usage:  python benchmarks/bench_plan.py [net200] [big37] --root TREE [--root TREE2]
                                        [--rounds 2] [--rows-net200 100000] [--rows-big37 10000000]
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import subprocess
import sys
import tempfile
import time

HERE = os.path.dirname(os.path.abspath(__file__))
GAP_COLUMNS = (3, 9, 15, 22, 30)
DRIVERS = (0, 6, 12, 19, 27)


def load() -> str:
    return " ".join(f"{x:.1f}" for x in os.getloadavg())


def fingerprint(obj, h=None):
    """sha256 over a plan: dataclass fields in order, arrays by dtype, shape and bytes."""
    import dataclasses

    import numpy as np
    top = h is None
    h = hashlib.sha256() if top else h
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        h.update(type(obj).__name__.encode())
        for f in dataclasses.fields(obj):
            if f.name == "network":
                h.update(repr(obj.network.names).encode())
            else:
                fingerprint(getattr(obj, f.name), h)
    elif isinstance(obj, np.ndarray):
        a = np.ascontiguousarray(obj)
        h.update(f"{a.dtype}{a.shape}".encode())
        h.update(a.tobytes())
    elif isinstance(obj, (tuple, list)):
        h.update(f"[{len(obj)}".encode())
        for x in obj:
            fingerprint(x, h)
    elif isinstance(obj, dict):
        for k in sorted(obj):
            h.update(repr(k).encode())
            fingerprint(obj[k], h)
    else:
        h.update(repr(obj).encode())
    return h.hexdigest() if top else None


def big37_codes(folder: str, rows: int) -> str:
    """The 10 M-row codes (int32, rows x 37), written once as .npy."""
    import numpy as np

    from workloads import local_network, random_cpts, sample
    path = os.path.join(folder, f"big37_{rows}.npy")
    if os.path.exists(path):
        return path
    net = local_network(37, seed=0)
    probs = random_cpts(net, seed=1)
    out = np.lib.format.open_memmap(path + ".part.npy", mode="w+", dtype=np.int32, shape=(rows, len(net)))
    block = 1_000_000
    for b, start in enumerate(range(0, rows, block)):
        n = min(block, rows - start)
        x = sample(net, probs, n, seed=1000 + b)
        rng = np.random.default_rng(2000 + b)
        for j, d in zip(GAP_COLUMNS, DRIVERS):
            x[rng.random(n) < np.where(x[:, d] == 0, 0.45, 0.15), j] = -1  # MAR: depends on an observed cell
        out[start:start + n] = x
    out.flush()
    del out
    os.replace(path + ".part.npy", path)
    return path


def child(what: str, arg: str) -> None:
    import numpy as np

    from workloads import coded, local_network, mask_mcar, random_cpts, sample
    if what == "net200":
        net = local_network(200, window=6, seed=0)
        probs = random_cpts(net, seed=1)
        data = coded(net, mask_mcar(net, sample(net, probs, int(arg), seed=2), 0.2, seed=3))
    else:
        from adfit.data import CodedData
        net = local_network(37, seed=0)
        try:  # the network's small integer type, as read and validated data hold it
            from adfit.data import codes_dtype
            dtype = codes_dtype(net)
        except ImportError:  # a tree from before lean codes: int32
            dtype = np.int32
        codes = np.array(np.load(arg, mmap_mode="r"), dtype=dtype)  # in memory, as after reading a file
        data = CodedData(codes, np.ones(len(codes)), None, arg)
    from adfit.likelihood import build_plan
    t, c = time.perf_counter(), time.process_time()
    plan = build_plan(net, data)
    t_plan, c_plan = time.perf_counter() - t, time.process_time() - c
    print(json.dumps({"plan_s": t_plan, "plan_cpu_s": c_plan, "fingerprint": fingerprint(plan)[:16], "route": plan.route,
                      "describe": plan.describe()[:160], "load": load()}))


def run_child(root: str, what: str, arg: str) -> dict:
    env = {**os.environ, "PYTHONPATH": os.path.abspath(root) + os.pathsep + HERE}
    out = subprocess.run([sys.executable, os.path.abspath(__file__), "--child", what, arg], capture_output=True,
                         text=True, env=env, cwd=os.path.abspath(root))
    if out.returncode != 0:
        raise SystemExit(out.stderr)
    return json.loads(out.stdout.strip().splitlines()[-1])


def commit(root: str) -> str:
    r = subprocess.run(["git", "-C", root, "rev-parse", "--short", "HEAD"], capture_output=True, text=True)
    dirty = subprocess.run(["git", "-C", root, "status", "--porcelain", "adfit"], capture_output=True, text=True)
    return (r.stdout.strip() or "?") + ("+changes" if dirty.stdout.strip() else "")


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("what", nargs="*", default=["net200", "big37"])
    ap.add_argument("--root", action="append", default=None, help="source tree to import adfit from (repeat)")
    ap.add_argument("--rounds", type=int, default=2)
    ap.add_argument("--rows-net200", type=int, default=100_000)
    ap.add_argument("--rows-big37", type=int, default=10_000_000)
    ap.add_argument("--data-dir", default=os.path.join(tempfile.gettempdir(), "adfit-bench-plan"))
    ap.add_argument("--child", nargs=2, default=None, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        sys.path.insert(0, HERE)
        child(*args.child)
        return
    roots = args.root or [os.path.dirname(HERE)]
    print(f"{os.cpu_count()} CPUs; load average at start {load()}")
    for r in roots:
        print(f"tree {r}: commit {commit(r)}")
    for what in args.what:
        if what == "net200":
            arg = str(args.rows_net200)
        else:
            sys.path.insert(0, HERE)
            os.makedirs(args.data_dir, exist_ok=True)
            arg = big37_codes(args.data_dir, args.rows_big37)
        times = {r: [] for r in roots}
        cpu = {r: [] for r in roots}
        prints = {r: set() for r in roots}
        print(f"\n== {what}")
        for k in range(args.rounds):
            for r in (roots if k % 2 == 0 else roots[::-1]):
                out = run_child(r, what, arg)
                times[r].append(out["plan_s"])
                cpu[r].append(out["plan_cpu_s"])
                prints[r].add(out["fingerprint"])
                print(f"  round {k + 1} {r}: plan {out['plan_s']:.2f} s (CPU {out['plan_cpu_s']:.2f} s), fingerprint {out['fingerprint']}, "
                      f"route {out['route']}  (load {out['load']})")
        best = {r: min(ts) for r, ts in times.items()}
        best_cpu = {r: min(ts) for r, ts in cpu.items()}
        for r in roots:
            print(f"  {r}: plan min {best[r]:.2f} s, median {sorted(times[r])[len(times[r]) // 2]:.2f} s; "
                  f"CPU min {best_cpu[r]:.2f} s; fingerprints {sorted(prints[r])}")
        if len(roots) == 2:
            same = prints[roots[0]] == prints[roots[1]] and len(prints[roots[0]]) == 1
            print(f"  ratio {roots[0]} / {roots[1]} (minima): wall {best[roots[0]] / best[roots[1]]:.2f}, "
                  f"CPU {best_cpu[roots[0]] / best_cpu[roots[1]]:.2f}; same plan: {same}")
    print(f"\nload average at end {load()}")


if __name__ == "__main__":
    main()

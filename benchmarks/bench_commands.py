"""End to end time of the commands that evaluate given CPTs (`adfit score`), cold and warm.

Workload: the 37-node network of benchmarks/workloads.py (<= 3 parents among the 4 previous
nodes, 2-4 states, treewidth about 4), 100 000 records sampled from seeded random CPTs with 20 %
of the cells missing completely at random (about 99 000 distinct rows), written once into
--data-dir as a network file, a CSV file and a result file holding the CPTs that drew them.
These are synthetic figures for speed, not accuracy.

  score    `adfit score NET CSV --params FIT.json --json`, each run a fresh process started from
           the checkout given by --root (default: this one):
             cold   an empty compilation cache folder ($ADFIT_COMPILE_CACHE): every program is
                    traced and compiled;
             warm   the same folder again (median of --repeat runs): programs come from disk,
                    tracing is still paid.
           The printed log-likelihood must be the same in every run and for every checkout.
  phases   one process, no compilation cache: where the time of a score goes (import, read and
           reduce, likelihood plan, the impossible-row check, the score, a second score).
  fit      `adfit fit NET CSV --out OUT -q` (default error bars: computed or skipped by the time
           estimate; --fit-args adds options, e.g. "--errors"), a fresh process with the
           compilation cache of its own: wall time, the lines it printed about error bars, and how
           many likelihood plans the process built (counted by a wrapper around
           ``adfit.likelihood.build_plan``).

Usage:  python benchmarks/bench_commands.py [score] [phases] [fit] [--root CHECKOUT] [--repeat 3]
                                            [--rows 100000] [--data-dir DIR] [--fit-args "..."]
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)

CLI = "import sys; sys.argv = ['adfit', *sys.argv[1:]]; from adfit.cli import main; main()"


def load() -> str:
    return " ".join(f"{x:.2f}" for x in os.getloadavg())


def commit_of(root: str) -> str:
    r = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=root, capture_output=True, text=True)
    return r.stdout.strip() or "?"


def _toml_str(s: str) -> str:
    return json.dumps(str(s))


def write_workload(folder: str, rows: int) -> tuple[str, str, str]:
    """Network file, CSV records and result file of the 37-node workload (written once)."""
    import numpy as np

    from adfit.data import HIDDEN
    from adfit.result import FitResult, write_result
    from workloads import local_network, mask_mcar, random_cpts, sample

    os.makedirs(folder, exist_ok=True)
    net_path = os.path.join(folder, "net37.toml")
    csv_path = os.path.join(folder, f"records37_{rows}.csv")
    fit_path = os.path.join(folder, "cpts37.json")
    if all(os.path.exists(p) for p in (net_path, csv_path, fit_path)):
        return net_path, csv_path, fit_path
    net = local_network(37, seed=0)
    probs = random_cpts(net, seed=1)
    lines = []
    for node in net.nodes:
        lines.append(f"[nodes.{node.name}]")
        lines.append("states = [" + ", ".join(_toml_str(s) for s in node.states) + "]")
        if node.parents:
            lines.append("parents = [" + ", ".join(_toml_str(p) for p in node.parents) + "]")
        lines.append("")
    with open(net_path, "w") as fh:
        fh.write("\n".join(lines))
    x = mask_mcar(net, sample(net, probs, rows, seed=2), 0.2, seed=3)
    states = [np.array(list(n.states) + [""], dtype=object) for n in net.nodes]
    cols = [states[j][np.where(x[:, j] == HIDDEN, len(net.nodes[j].states), x[:, j])] for j in range(len(net))]
    import pandas as pd

    pd.DataFrame(dict(zip(net.names, cols))).to_csv(csv_path, index=False)
    write_result(fit_path, FitResult(network=net, method="lbfgs", objective="mle", probs=probs,
                                     log_likelihood=float("nan"), n_rows=float(rows)))
    return net_path, csv_path, fit_path


def run_score(root: str, files, cache: str) -> tuple[float, dict]:
    net, csv, fit = files
    env = {**os.environ, "ADFIT_COMPILE_CACHE": cache}
    t = time.perf_counter()
    r = subprocess.run([sys.executable, "-c", CLI, "score", net, csv, "--params", fit, "--json"], cwd=root,
                       capture_output=True, text=True, env=env)
    dt = time.perf_counter() - t
    if r.returncode != 0:
        raise SystemExit(f"adfit score failed ({r.returncode}):\n{r.stderr}")
    return dt, json.loads(r.stdout)


PHASES = r"""
import inspect, json, sys, time
t0 = time.perf_counter()
from adfit.likelihood import Likelihood, check_possible, score
from adfit.network import load_network
from adfit.data import load_data
from adfit.result import load_result
t1 = time.perf_counter()
net = load_network(sys.argv[1]); coded = load_data(net, sys.argv[2]); probs = load_result(sys.argv[3], net).probs
t2 = time.perf_counter()
lik = Likelihood(net, coded)
t3 = time.perf_counter()
check_possible(lik, probs)
t4 = time.perf_counter()
kw = {"likelihood": lik} if "likelihood" in inspect.signature(score).parameters else {}
s = score(net, coded, probs, **kw)
t5 = time.perf_counter()
s2 = score(net, coded, probs, **kw)
t6 = time.perf_counter()
print(json.dumps({"import": t1 - t0, "read": t2 - t1, "plan": t3 - t2, "check": t4 - t3, "score": t5 - t4,
                  "score_again": t6 - t5, "prepared": bool(kw), "log_likelihood": s["log_likelihood"],
                  "distinct": coded.n_distinct}))
"""


FIT = r"""
import sys, time
t0 = time.perf_counter()
import adfit.likelihood as L
n_plans = [0]
_orig = L.build_plan
def counted(*a, **k):
    n_plans[0] += 1
    return _orig(*a, **k)
L.build_plan = counted
sys.argv = ['adfit', *sys.argv[1:]]
from adfit.cli import main
try:
    main()
except SystemExit as e:
    code = e.code
else:
    code = 0
print(f"BENCH plans={n_plans[0]} seconds={time.perf_counter() - t0:.2f} exit={code}", file=sys.stderr)
"""


def run_fit(root: str, files, extra: list[str]) -> dict:
    net, csv, _ = files
    out = os.path.join(tempfile.mkdtemp(prefix="adfit-fit-"), "fit.json")
    cache = tempfile.mkdtemp(prefix="adfit-cc-")
    env = {**os.environ, "ADFIT_COMPILE_CACHE": cache}
    t = time.perf_counter()
    r = subprocess.run([sys.executable, "-c", FIT, "fit", net, csv, "--out", out, *extra], cwd=root,
                       capture_output=True, text=True, env=env)
    dt = time.perf_counter() - t
    shutil.rmtree(cache, ignore_errors=True)
    text = r.stdout + r.stderr
    bench = [ln for ln in text.splitlines() if ln.startswith("BENCH ")]
    if r.returncode != 0 or not bench or "exit=0" not in bench[-1]:
        raise SystemExit(f"adfit fit failed ({r.returncode}):\n{text[-3000:]}")
    info = dict(kv.split("=") for kv in bench[-1].split()[1:])
    with open(out) as fh:
        res = json.load(fh)
    errs = [ln.strip() for ln in text.splitlines() if "error bars" in ln.lower() or "standard error" in ln.lower()]
    return {"wall": dt, "plans": int(info["plans"]), "log_likelihood": res.get("log_likelihood"),
            "iterations": res.get("iterations"), "has_errors": "uncertainty" in (res.get("extras") or res),
            "lines": errs[:3]}


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("what", nargs="*", default=["score", "phases"])  # also: fit
    ap.add_argument("--root", default=os.path.dirname(HERE), help="checkout whose adfit is run")
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--rows", type=int, default=100_000)
    ap.add_argument("--fit-args", default="", help="extra options of adfit fit (one string)")
    ap.add_argument("--data-dir", default=os.path.join(tempfile.gettempdir(), "adfit-bench-commands"))
    args = ap.parse_args()
    root = os.path.abspath(args.root)
    files = write_workload(args.data_dir, args.rows)
    print(f"{os.cpu_count()} CPUs; load average at start {load()}; checkout {root} at commit {commit_of(root)}")
    if "score" in args.what:
        cache = tempfile.mkdtemp(prefix="adfit-cc-")
        try:
            cold, out = run_score(root, files, cache)
            warm = []
            for _ in range(args.repeat):
                dt, o = run_score(root, files, cache)
                warm.append(dt)
                assert o["log_likelihood"] == out["log_likelihood"], (o, out)
        finally:
            shutil.rmtree(cache, ignore_errors=True)
        print(f"adfit score, {out['n_rows']:,.0f} records ({out['n_distinct']:,} distinct), 37 nodes, 20 % MCAR: "
              f"cold cache {cold:.1f} s, warm cache median {statistics.median(warm):.1f} s "
              f"(min {min(warm):.1f}, {args.repeat} runs); log-likelihood {out['log_likelihood']!r}, "
              f"gradient norm {out['gradient_norm']!r}  (load {load()})")
    if "fit" in args.what:
        f = run_fit(root, files, args.fit_args.split())
        print(f"adfit fit {args.fit_args}, {args.rows:,} records, 37 nodes, 20 % MCAR, empty compilation cache: "
              f"{f['wall']:.1f} s wall, {f['plans']} likelihood plan(s) built, {f['iterations']} iterations, "
              f"log-likelihood {f['log_likelihood']!r}, error bars {'in the result' if f['has_errors'] else 'not in the result'}"
              f"  (load {load()})")
        for ln in f["lines"]:
            print(f"  | {ln}")
    if "phases" in args.what:
        env = {**os.environ, "ADFIT_COMPILE_CACHE": "0"}
        r = subprocess.run([sys.executable, "-c", PHASES, *files], cwd=root, capture_output=True, text=True, env=env)
        if r.returncode != 0:
            raise SystemExit(r.stderr)
        p = json.loads(r.stdout.strip().splitlines()[-1])
        print(f"one process, no compilation cache ({'one prepared likelihood' if p['prepared'] else 'score builds its own plan'}): "
              f"import {p['import']:.1f} s, read + reduce {p['read']:.1f} s, Likelihood(...) {p['plan']:.1f} s, "
              f"check_possible {p['check']:.1f} s, score {p['score']:.1f} s, a second score {p['score_again']:.2f} s; "
              f"log-likelihood {p['log_likelihood']!r}  (load {load()})")


if __name__ == "__main__":
    main()

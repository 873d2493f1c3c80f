"""Time to reach the optimum: L-BFGS and Adam (JAX core) against EM (numpy reference).

For each workload the target is the best final objective found by any of the three methods
(each run to its own tight stopping rule, or until its time budget is spent), and a method
"reaches" it when its objective is within 1e-6 relative of the target. Every method starts
from the same seeded random CPTs (``adfit.em.random_start``).

What is timed, for every method: wall-clock from the start of the optimiser loop, i.e. after
the plan (``adfit.em.EStep`` for EM, the elimination plan of ``adfit.likelihood.Likelihood``
for the JAX methods) was built; the time at which an objective counts as known is the end of
the evaluation that computed it (for EM: the end of the E-step at that iterate, so EM is not
credited with an objective before it has computed it). For the JAX methods a warm-up run of a
few iterations on the same ``Fitter`` compiles every program first; plan and compile times are
printed apart. The columns also give the iterations, the objective evaluations (L-BFGS: line
search steps and stopping checks; EM: one E-step per iteration), the cost of one iteration and
of one evaluation, and the share of the run spent outside the evaluations (the Python loop),
so that the reason for each ratio is visible.

Workloads (seeded, synthetic except the linkage data: they measure speed, not accuracy):

* ``linkage``: the linkage data of Dempster, Laird & Rubin (1977), 197 records in 4 cells, one
  free parameter (``tests/published.py: linkage_one_parameter``);
* ``net37``: the 37-node banded random network of ``workloads.local_network`` (2-4 states,
  <= 3 parents among the 4 previous nodes), 100 000 sampled records with 20 % of the cells
  missing completely at random;
* ``lcm``: latent class model with 4 classes and 20 binary items, 100 000 records, built to be
  the hard case for EM (much missing information) while still identified
  (``workloads.latent_class_workload``): equal class sizes; P(item = 1 | class) = 0.5 ± 0.15,
  the sign drawn at random per class and item (classes overlap: no item separates two classes
  by more than 0.3), and a three-form planned-missingness design: items 1-5 go to everyone,
  items 6-10, 11-15 and 16-20 form three blocks, and each respondent gets one of three forms
  at random, each form leaving out one block (25 % of the responses missing by design, missing
  completely at random). Both the overlap and the gaps raise the fraction of missing
  information; EM's observed rate (printed) shows it.

For each workload the script also checks that EM and L-BFGS end at the same optimum: the
largest difference of any probability between their final CPTs after matching the states of
the latent nodes (the labels of latent classes are arbitrary), and the difference of their
final objectives.

    python benchmarks/bench_em_vs_lbfgs.py                        # all three, full size (<~10 min)
    python benchmarks/bench_em_vs_lbfgs.py --only linkage
    python benchmarks/bench_em_vs_lbfgs.py --only lcm --rows-scale 0.1 --budget-em 60

Progress goes to stderr; stdout ends with one markdown table, ready to paste into
docs/performance.md ("EM, L-BFGS and Adam to the same optimum").
"""

from __future__ import annotations

import argparse
import itertools
import math
import os
import platform
import subprocess
import sys
import time
import warnings
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

from workloads import coded, latent_class_workload, local_network, mask_mcar, random_cpts, sample  # noqa: E402

import adfit.em as em  # noqa: E402
from adfit.data import encode_frame  # noqa: E402
from adfit.fit import Fitter, FitSettings  # noqa: E402
from adfit.likelihood import logits_from_probs  # noqa: E402

REL = 1e-6


def workload(name: str, scale: float):
    if name == "net37":
        net = local_network(37, seed=0)
        x = sample(net, random_cpts(net, seed=1), int(round(100_000 * scale)), seed=2)
        return net, coded(net, mask_mcar(net, x, 0.2, seed=3))
    if name == "lcm":
        return latent_class_workload(int(round(100_000 * scale)))
    if name == "linkage":
        from published import linkage_one_parameter

        net, df = linkage_one_parameter()
        return net, encode_frame(net, df, count_column="count")
    raise SystemExit(f"unknown workload {name!r}")


class _Stop(Exception):
    """Raised from a progress callback when a method's time budget is spent."""


def _log(msg: str) -> None:
    print(f"  [{time.strftime('%H:%M:%S')}] {msg}", file=sys.stderr, flush=True)


def run_em(net, data, start, max_iter, budget, label):
    """EM with the E-step timed: objective k is known at the end of the k-th E-step."""
    rec = {"t": [], "obj": [], "estep": 0.0, "plan": 0.0, "t0": None, "steps": [], "prev": start,
           "last_log": time.perf_counter()}
    w = np.asarray(data.counts, dtype=np.float64)

    class TimedEStep(em.EStep):
        def __init__(self, *a, **k):
            t = time.perf_counter()
            super().__init__(*a, **k)
            rec["plan"] = time.perf_counter() - t
            rec["t0"] = time.perf_counter()

        def __call__(self, probs):
            t = time.perf_counter()
            counts, row_ll = super().__call__(probs)
            t1 = time.perf_counter()
            rec["estep"] += t1 - t
            rec["obj"].append(em._weighted_sum(row_ll, w))
            rec["t"].append(t1 - rec["t0"])
            return counts, row_ll

    def callback(k, probs):
        rec["steps"].append(math.sqrt(sum(float(np.sum((probs[m] - rec["prev"][m]) ** 2)) for m in net.free_names)))
        rec["prev"] = probs
        now = time.perf_counter()
        if now - rec["last_log"] > 15:
            rec["last_log"] = now
            _log(f"{label} em: iteration {k}, {now - rec['t0']:.0f} s, objective {rec['obj'][-1]:.6f}")
        if now - rec["t0"] > budget:
            raise _Stop

    saved = em.EStep
    em.EStep = TimedEStep
    try:
        res = em_fit_or_stop(net, data, start, max_iter, callback)
    finally:
        em.EStep = saved
    total = time.perf_counter() - rec["t0"]
    iters = len(rec["steps"])
    return {"objective": np.array(rec["obj"]), "times": np.array(rec["t"]), "iters": np.arange(len(rec["obj"])),
            "total": total, "plan": rec["plan"], "last_step": rec["steps"][-1] if rec["steps"] else math.nan,
            "iterations": iters, "evals": len(rec["obj"]), "eval_time": rec["estep"],
            "converged": bool(res is not None and res.converged), "stopped": res is None,
            "final": float(rec["obj"][-1]), "rate": em._rate(rec["steps"]),
            "probs": res.probs if res is not None else rec["prev"]}


def em_fit_or_stop(net, data, start, max_iter, callback):
    try:
        return em.em_fit(net, data, init=start, max_iter=max_iter, callback=callback)
    except _Stop:
        return None


def run_gradient(net, data, start, method, max_iter, budget, label):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t = time.perf_counter()
        fitter = Fitter(net, data, settings=FitSettings(method=method, max_iter=3))
        plan_s = time.perf_counter() - t
        logits0 = logits_from_probs(net, start)
        t = time.perf_counter()
        fitter.run(logits0)  # compiles every program a run uses (cached per network and plan)
        compile_s = time.perf_counter() - t
        fitter.settings = FitSettings(method=method, max_iter=max_iter)
        acc = {"n": 0, "t": 0.0}

        def counted(f):
            def wrapper(*a, **k):
                t = time.perf_counter()
                try:
                    return f(*a, **k)
                finally:
                    acc["n"] += 1
                    acc["t"] += time.perf_counter() - t
            return wrapper

        fitter.objective_fg = counted(fitter.objective_fg)
        fitter.evaluate = counted(fitter.evaluate)
        objs, times, its, last_log = [], [], [], [time.perf_counter()]

        def progress(it, obj, gn):
            now = time.perf_counter() - t0
            objs.append(obj)
            its.append(it)
            times.append(now)
            if time.perf_counter() - last_log[0] > 15:
                last_log[0] = time.perf_counter()
                _log(f"{label} {method}: iteration {it}, {now:.0f} s, objective {obj:.6f}")
            if now > budget:
                raise _Stop

        t0 = time.perf_counter()
        try:
            run = fitter.run(logits0, progress=progress)
        except _Stop:
            run = None
        total = time.perf_counter() - t0
    out = {"objective": np.array(objs), "times": np.array(times), "iters": np.array(its), "total": total, "plan": plan_s,
           "compile": compile_s, "iterations": len(objs), "evals": acc["n"], "eval_time": acc["t"],
           "converged": bool(run is not None and run.converged), "stopped": run is None}
    if run is not None:
        out["final"] = float(run.value)
        out["probs"] = fitter.probs(run.logits)
    else:
        out["final"] = float(objs[-1])
    return out


def time_to(run, target):
    ok = np.flatnonzero(run["objective"] >= target - REL * abs(target))
    return (float(run["times"][ok[0]]), int(run["iters"][ok[0]])) if ok.size else (None, None)


def max_prob_diff(net, a, b) -> float:
    """Largest |θa − θb| over the free CPTs, minimised over relabellings of latent states."""
    latent = [n.name for n in net.nodes if n.latent and math.factorial(n.card) <= 5040]
    best = math.inf
    for perms in itertools.product(*(itertools.permutations(range(net.node(v).card)) for v in latent)):
        bb = {}
        for name in net.free_names:
            arr = np.asarray(b[name])
            fam = list(net.node(name).parents) + [name]
            for v, p in zip(latent, perms):
                if v in fam:
                    arr = np.take(arr, p, axis=fam.index(v))
            bb[name] = arr
        best = min(best, max(float(np.max(np.abs(np.asarray(a[n]) - bb[n]))) for n in net.free_names))
    return best


def _git_commit() -> str:
    try:
        root = Path(__file__).resolve().parents[1]
        c = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=root, capture_output=True, text=True).stdout.strip()
        dirty = subprocess.run(["git", "status", "--porcelain", "--untracked-files=no"], cwd=root, capture_output=True,
                               text=True).stdout.strip()
        return c + (" (with uncommitted changes)" if dirty else "")
    except OSError:
        return "unknown"


def _fmt_t(t):
    return "not reached" if t is None else (f"{t * 1e3:.1f} ms" if t < 0.1 else f"{t:.2f} s")


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--only", choices=["net37", "lcm", "linkage"], action="append")
    ap.add_argument("--rows-scale", type=float, default=1.0, help="multiply the number of records (1.0: full size)")
    ap.add_argument("--max-iter", type=int, default=10000)
    ap.add_argument("--budget-em", type=float, default=180.0, help="seconds of EM iterations per workload")
    ap.add_argument("--budget-lbfgs", type=float, default=200.0, help="seconds of L-BFGS iterations per workload")
    ap.add_argument("--budget-adam", type=float, default=30.0, help="seconds of Adam iterations per workload")
    ap.add_argument("--no-adam", action="store_true")
    ap.add_argument("--seed", type=int, default=0, help="seed of the common random start")
    ap.add_argument("--repeat", type=int, default=7, help="runs of each method on workloads that take < 1 s")
    ap.add_argument("--check-seeds", type=int, default=0,
                    help="also run L-BFGS from this many other random starts and compare the optima")
    args = ap.parse_args(argv)
    uname = platform.uname()
    print(f"# commit {_git_commit()}; {uname.system} {uname.machine}, {os.cpu_count()} CPUs, python "
          f"{platform.python_version()}, numpy {np.__version__}")
    print(f"# reached = objective within {REL:g} relative of the best final objective of the methods; "
          f"rows scale {args.rows_scale:g}, start seed {args.seed}; budgets EM {args.budget_em:g} s, "
          f"L-BFGS {args.budget_lbfgs:g} s, Adam {args.budget_adam:g} s")
    rows = []
    for name in args.only or ["linkage", "net37", "lcm"]:
        load0 = os.getloadavg()[0]
        _log(f"{name}: building the data")
        net, data = workload(name, args.rows_scale)
        start = em.random_start(net, args.seed)
        methods = {"L-BFGS": lambda: run_gradient(net, data, start, "lbfgs", args.max_iter, args.budget_lbfgs, name),
                   "EM": lambda: run_em(net, data, start, args.max_iter, args.budget_em, name)}
        if not args.no_adam:
            methods["Adam"] = lambda: run_gradient(net, data, start, "adam", args.max_iter, args.budget_adam, name)
        tries = {}
        for m, f in methods.items():
            _log(f"{name}: {m}")
            tries[m] = [f()]
        # tiny workloads (milliseconds): repeat every run and keep the median time to the target
        repeat = args.repeat if tries["L-BFGS"][0]["total"] < 1.0 and tries["EM"][0]["total"] < 1.0 else 1
        for _ in range(repeat - 1):
            for m, f in methods.items():
                tries[m].append(f())
        target = max(r["final"] for rs in tries.values() for r in rs)
        runs = {}
        for m, rs in tries.items():
            ts = [time_to(r, target)[0] for r in rs]
            order = sorted(range(len(rs)), key=lambda i: math.inf if ts[i] is None else ts[i])
            runs[m] = dict(rs[order[len(rs) // 2]])
            runs[m].update({k: rs[0][k] for k in ("plan", "compile") if k in rs[0]})  # the first run's
        load1 = os.getloadavg()[0]
        lb, e = runs["L-BFGS"], runs["EM"]
        same = (max_prob_diff(net, lb["probs"], e["probs"]) if "probs" in lb else math.nan)
        q = e["rate"]
        left = e["last_step"] * q / (1 - q) if 0 < q < 1 else math.nan
        t_lb, _ = time_to(lb, target)
        t_em, _ = time_to(e, target)
        ratio = (f"{t_em / t_lb:.1f}×" if t_lb and t_em else
                 f"> {e['total'] / t_lb:.1f}×" if t_lb and t_em is None else "—")
        print(f"# {name}: {data.n_rows:.0f} records, {data.n_distinct} distinct; load average {load0:.2f} → {load1:.2f}; "
              f"target {target:.6f}; EM rate {q:.4f}; {'' if repeat == 1 else f'median of {repeat} runs each; '}"
              f"EM vs L-BFGS at their ends: objective {e['final'] - lb['final']:+.3g}, max |Δθ| (latent states "
              f"matched) {same:.2g} (EM's projected remaining change {left:.2g}); EM time / L-BFGS time {ratio}")
        for sd in range(args.seed + 1, args.seed + 1 + args.check_seeds):
            _log(f"{name}: L-BFGS from start seed {sd}")
            other = run_gradient(net, data, em.random_start(net, sd), "lbfgs", args.max_iter, args.budget_lbfgs, name)
            d = max_prob_diff(net, lb["probs"], other["probs"]) if "probs" in other else math.nan
            print(f"#   L-BFGS from start seed {sd}: final objective {other['final']:.6f} "
                  f"({other['final'] - lb['final']:+.3g}), max |Δθ| to seed {args.seed} (latent states matched) {d:.2g}")
        for m, r in runs.items():
            t, k = time_to(r, target)
            per_it = r["total"] / max(1, r["iterations"])
            per_ev = r["eval_time"] / max(1, r["evals"])
            outside = 1.0 - r["eval_time"] / r["total"] if r["total"] > 0 else 0.0
            end = ("converged" if r["converged"] else f"budget spent ({r['total']:.0f} s)" if r["stopped"]
                   else "iteration limit")
            rows.append(f"| {name} | {m} | **{_fmt_t(t)}** | {'' if k is None else k} | {r['iterations']} | "
                        f"{r['evals']} | {_fmt_t(per_it)} | {_fmt_t(per_ev)} | {100 * outside:.0f} % | "
                        f"{r['plan']:.2f} s | {'' if 'compile' not in r else format(r['compile'], '.1f') + ' s'} | "
                        f"{r['final']:.6f} | {end} | "
                        f"{format(r['rate'], '.4f') if m == 'EM' else ''} |")
            _log(f"{name} {m}: to target {_fmt_t(t)} (iteration {k}), {r['iterations']} iterations, {end}")
        sys.stdout.flush()
    print()
    print("| workload | method | to target | iterations to target | iterations | evaluations | per iteration | "
          "per evaluation | outside evaluations | plan | compile | final objective | end | EM rate |")
    print("|---|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---|---:|")
    for r in rows:
        print(r)


if __name__ == "__main__":
    main()

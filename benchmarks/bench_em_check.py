"""What the EM cross-check costs beside the fit it checks (``fit --em-check``), before and after.

For each workload, in one process and one after the other: the fit (``adfit.fit.fit`` with its
defaults, the likelihood's plan built once beforehand and shared, as the CLI does), then
``adfit.crosscheck.em_check`` of that fit (its two EM runs plus the three measurements by the
JAX core) twice:

* **before**: the EM reference as it was: every row through the junction trees
  (``adfit.em.ENUM_MAX = 0``) and plain EM steps (``accelerate=False``);
* **after**: the present defaults: rows with few hidden assignments enumerated all at once, and
  both EM runs with squared extrapolation (SQUAREM).

It prints the wall time of each, the E-steps and the E-step's cost by itself (the mean of a few
calls at the fit's answer), each run's iterations, and the verdicts (they must agree: both
versions have the same fixed points and stopping rule). The target of issue 13: the check costs
at most as much as the fit.

Workloads (seeded, synthetic: they measure speed, not accuracy):

* ``latent15``: 15 nodes, two latent (:func:`latent15`: a 3-state latent over eight items, a
  2-state latent below it over five), 20 000 records sampled from random CPTs
  (``workloads.random_cpts``), 20 % of the observed cells missing completely at random;
* ``ridge15`` (only with ``--only``): the 15-node banded network of ``workloads.local_network``
  (seed 3; two latent nodes, with 2 and 3 states and three observed children each: a flat
  ridge, on which neither the fit nor EM meets its stopping rule in minutes), same data design;
* ``lcm``: the latent class model of ``workloads.latent_class_workload`` (4 classes, 20 binary
  items, planned missingness) at 20 000 records.

    python benchmarks/bench_em_check.py                  # both, before and after
    python benchmarks/bench_em_check.py --only lcm --skip-before
    python benchmarks/bench_em_check.py --estep          # the E-step alone, before and after (+ net37)
"""

from __future__ import annotations

import argparse
import os
import platform
import subprocess
import sys
import time
import warnings
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

from workloads import coded, latent_class_workload, local_network, mask_mcar, random_cpts, sample  # noqa: E402

import adfit.em as em  # noqa: E402
from adfit.crosscheck import em_check  # noqa: E402
from adfit.fit import fit  # noqa: E402
from adfit.likelihood import Likelihood  # noqa: E402
from adfit.network import Network, network_from_dict  # noqa: E402


def latent15() -> Network:
    """15 nodes, two latent: ``h`` (3 states) over eight observed items ``a0``-``a7`` (2-3 states;
    ``a1`` also depends on ``a0``, ``a5`` on ``a4``), and ``g`` (2 states, a child of ``h``) over
    five observed items ``b0``-``b4``; ``b2`` also depends on ``a2``."""
    d = {"h": {"states": ["h0", "h1", "h2"], "latent": True},
         "g": {"states": ["g0", "g1"], "parents": ["h"], "latent": True}}
    for i in range(8):
        pa = ["h"] + (["a0"] if i == 1 else ["a4"] if i == 5 else [])
        d[f"a{i}"] = {"states": [f"s{j}" for j in range(2 + i % 2)], "parents": pa}
    for i in range(5):
        d[f"b{i}"] = {"states": [f"s{j}" for j in range(2 + (i == 3))], "parents": ["g"] + (["a2"] if i == 2 else [])}
    return network_from_dict(d)


def workload(name: str, n_rows: int):
    if name == "latent15":
        net = latent15()
        x = sample(net, random_cpts(net, seed=1), n_rows, seed=2)
        return net, coded(net, mask_mcar(net, x, 0.2, seed=3))
    if name == "ridge15":
        net = local_network(15, seed=3, n_latent=2)
        x = sample(net, random_cpts(net, seed=1), n_rows, seed=2)
        return net, coded(net, mask_mcar(net, x, 0.2, seed=3))
    if name == "lcm":
        return latent_class_workload(n_rows)
    if name == "net37":  # no latent node: workloads.local_network(37), 20 % MCAR (as bench_em_vs_lbfgs)
        net = local_network(37, seed=0)
        x = sample(net, random_cpts(net, seed=1), n_rows, seed=2)
        return net, coded(net, mask_mcar(net, x, 0.2, seed=3))
    raise SystemExit(f"unknown workload {name!r}")


def _commit() -> str:
    root = Path(__file__).resolve().parents[1]
    try:
        c = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=root, capture_output=True, text=True).stdout
        dirty = subprocess.run(["git", "status", "--porcelain", "--untracked-files=no"], cwd=root,
                               capture_output=True, text=True).stdout.strip()
        return c.strip() + (" (with uncommitted changes)" if dirty else "")
    except OSError:
        return "unknown"


def _log(msg: str) -> None:
    print(f"  [{time.strftime('%H:%M:%S')}] {msg}", file=sys.stderr, flush=True)


def run_check(net, data, result, lik, *, enum_max: int, accelerate: bool, max_iter: int) -> dict:
    saved = em.ENUM_MAX
    em.ENUM_MAX = enum_max
    calls = {"n": 0, "t": 0.0}
    base = em.EStep

    class Counted(base):
        def __call__(self, probs):
            t = time.perf_counter()
            try:
                return super().__call__(probs)
            finally:
                calls["n"] += 1
                calls["t"] += time.perf_counter() - t

    em.EStep = Counted
    try:
        t = time.perf_counter()
        chk = em_check(result, data, likelihood=lik, accelerate=accelerate, max_iter=max_iter)
        wall = time.perf_counter() - t
        es = base(net, data)
        t = time.perf_counter()
        for _ in range(3):
            es(result.probs)
        per = (time.perf_counter() - t) / 3
    finally:
        em.EStep = base
        em.ENUM_MAX = saved
    return {"wall": wall, "estep": per, "calls": calls["n"], "estep_total": calls["t"], "check": chk}


def estep_only(names, n_rows: int) -> None:
    """The E-step alone, before (junction trees) and after (enumeration first), at a random start:
    mean of 3 calls each, side by side, and the largest difference of their expected counts."""
    print("| workload | distinct rows | enumerated rows | completions | plan before | plan after | "
          "E-step before | E-step after | ratio | max rel. count difference | load |")
    print("|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|---|")
    for name in names:
        net, data = workload(name, n_rows)
        p = em.random_start(net, 0)
        load0 = os.getloadavg()[0]
        got = {}
        for label, emax in (("before", 0), ("after", em.ENUM_MAX)):
            saved = em.ENUM_MAX
            em.ENUM_MAX = emax
            try:
                t = time.perf_counter()
                es = em.EStep(net, data)
                plan = time.perf_counter() - t
                t = time.perf_counter()
                for _ in range(3):
                    c, ll = es(p)
                got[label] = (plan, (time.perf_counter() - t) / 3, c, es)
            finally:
                em.ENUM_MAX = saved
        (p0, t0, c0, _), (p1, t1, c1, es1) = got["before"], got["after"]
        diff = max(float(np.max(np.abs(c0[k] - c1[k]) / np.maximum(1.0, np.abs(c0[k])))) for k in c0)
        ne = es1.enumerated
        print(f"| {name} | {data.n_distinct} | {0 if ne is None else ne.rows.size} | "
              f"{0 if ne is None else ne.n_completions} | {p0:.2f} s | {p1:.2f} s | {t0 * 1e3:.0f} ms | "
              f"{t1 * 1e3:.0f} ms | {t0 / t1:.1f}× | {diff:.1e} | {load0:.2f} → {os.getloadavg()[0]:.2f} |")
        sys.stdout.flush()


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--only", choices=["latent15", "lcm", "ridge15", "net37"], action="append")
    ap.add_argument("--rows", type=int, default=20_000)
    ap.add_argument("--skip-before", action="store_true", help="time only the present version")
    ap.add_argument("--max-iter", type=int, default=5000, help="iteration cap of each EM run (fit --em-max-iter)")
    ap.add_argument("--estep", action="store_true",
                    help="only the E-step, before and after (workloads latent15, lcm, ridge15 and net37)")
    args = ap.parse_args(argv)
    u = platform.uname()
    print(f"# commit {_commit()}; {u.system} {u.machine}, {os.cpu_count()} CPUs, python {platform.python_version()}, "
          f"numpy {np.__version__}")
    if args.estep:
        estep_only(args.only or ["latent15", "lcm", "ridge15", "net37"], args.rows)
        return
    rows = []
    for name in args.only or ["latent15", "lcm"]:
        net, data = workload(name, args.rows)
        load0 = os.getloadavg()
        _log(f"{name}: plan and fit")
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            t = time.perf_counter()
            lik = Likelihood(net, data)
            plan_s = time.perf_counter() - t
            t = time.perf_counter()
            res = fit(net, data, warn=False, likelihood=lik)
            fit_s = time.perf_counter() - t
        _log(f"{name}: fit {fit_s:.1f} s (plan {plan_s:.1f} s), converged {res.converged}")
        versions = [("after", em.ENUM_MAX, True)]
        if not args.skip_before:
            versions.append(("before", 0, False))
        out = {}
        for label, enum_max, acc in versions:
            _log(f"{name}: EM check, {label}")
            r = out[label] = run_check(net, data, res, lik, enum_max=enum_max, accelerate=acc, max_iter=args.max_iter)
            c = r["check"]
            a, b = c["em_from_fit"], c["em_own_start"]
            load1 = os.getloadavg()
            rows.append(f"| {name} | {label} | {fit_s:.1f} s | **{r['wall']:.1f} s** | {r['wall'] / fit_s:.2f} | "
                        f"{r['estep'] * 1e3:.1f} ms | {r['calls']} | {r['estep_total']:.1f} s | "
                        f"{a['iterations']} ({'yes' if a['converged'] else 'no'}) | "
                        f"{b['iterations']} ({'yes' if b['converged'] else 'no'}) | {c['verdict']} | "
                        f"{b['objective_value'] - c['fit']['objective_value']:+.2e} | "
                        f"{load0[0]:.2f} → {load1[0]:.2f} |")
            print("#", rows[-1], flush=True)  # as soon as it is known (the table follows at the end)
            _log(f"{name}: {label}: {r['wall']:.1f} s, verdict {c['verdict']}")
        print(f"# {name}: {len(net)} nodes, {data.n_rows:.0f} records, {data.n_distinct} distinct; load average "
              f"(1, 5, 15 min) {load0[0]:.2f} {load0[1]:.2f} {load0[2]:.2f} -> {load1[0]:.2f} {load1[1]:.2f} "
              f"{load1[2]:.2f}; fit {fit_s:.1f} s (plan {plan_s:.1f} s, beforehand), converged {res.converged}")
        if len(out) == 2:
            e0, e1 = out["before"]["estep"], out["after"]["estep"]
            print(f"# {name}: E-step before / after {e0 / e1:.1f}x; check before / after "
                  f"{out['before']['wall'] / out['after']['wall']:.1f}x; verdicts "
                  f"{out['before']['check']['verdict']} / {out['after']['check']['verdict']}")
        sys.stdout.flush()
    print()
    print("| workload | version | fit | EM check | check / fit | one E-step | E-steps | in E-steps | "
          "EM from the fit: iterations (converged) | EM own start: iterations (converged) | verdict | "
          "own start − fit objective | load (1 min) |")
    print("|---|---|---:|---:|---:|---:|---:|---:|---:|---:|---|---:|---|")
    for r in rows:
        print(r)


if __name__ == "__main__":
    main()

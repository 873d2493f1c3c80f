"""Cost of a missing-not-at-random sensitivity analysis (adfit.sensitivity) on the demo scenario.

The demo's wind-turbine gearbox network (9 nodes, one latent, 4 000 simulated records with gaps)
is fitted once under MAR (not timed here); then ``sensitivity_analysis`` is run from that fit
twice in the same process (the first run pays the compilations: the augmented network's
likelihood, the Hessian-vector products and the targets' programs; the second shows the warm
cost), with and without error bars and with a tipping point. Printed: the wall-clock seconds of
each run, the L-BFGS iterations of each refit, the objective evaluations, and the load of the
machine.

    python benchmarks/bench_sensitivity.py
    python benchmarks/bench_sensitivity.py --odds 0.125,0.25,0.5,1,2,4,8

Copy the printed table into docs/performance.md ("Sensitivity analysis").
"""

from __future__ import annotations

import argparse
import os
import platform
import time
import warnings


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--odds", default="0.25,0.5,1,2,4")
    ap.add_argument("--threshold", type=float, default=0.16)
    args = ap.parse_args()

    from adfit.demo import FOCUS_NODE, FOCUS_STATE, SENSITIVITY_PREDICTOR, load_demo
    from adfit.fit import fit
    from adfit.sensitivity import Shift, sensitivity_analysis

    net, prior, coded = load_demo()
    pseudo = prior.pseudo_counts(net)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        mar = fit(net, coded, prior=prior, restarts=2, seed=0)
    target = f"{FOCUS_NODE}={FOCUS_STATE}"
    kw = dict(targets=[target], predictors=[SENSITIVITY_PREDICTOR], pseudo_counts=pseudo, start=mar.probs)
    print(f"machine: {platform.machine()}, {os.cpu_count()} cores, load {os.getloadavg()[0]:.2f}")
    print(f"demo: {coded.n_rows:.0f} records, {coded.n_distinct} distinct rows, odds {args.odds}")
    print("| run | seconds | iterations per refit | notes |")
    print("|---|---|---|---|")
    cases = [("first run, error bars (compiles)", dict(errors=True)),
             ("second run, error bars", dict(errors=True)),
             ("second run, no error bars", dict(errors=False)),
             (f"second run, no error bars, tipping point at {args.threshold:g}", dict(errors=False,
                                                                                      threshold=args.threshold))]
    for label, extra in cases:
        t0 = time.perf_counter()
        res = sensitivity_analysis(net, coded, Shift(FOCUS_NODE, FOCUS_STATE), args.odds, **kw, **extra)
        dt = time.perf_counter() - t0
        its = ", ".join(str(r["iterations"]) for r in res.rows)
        tip = res.tipping_point
        note = "" if tip is None else (f"tipping point at odds {tip['odds']:.4g}" if tip["crossed"] else tip["note"])
        print(f"| {label} | {dt:.2f} | {its} | {note} |")
    print(f"load after: {os.getloadavg()[0]:.2f}")


if __name__ == "__main__":
    main()

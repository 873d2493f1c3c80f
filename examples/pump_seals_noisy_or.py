"""Seal failures on twin pumps: a noisy-OR node, a tied copy, and what the structure buys.

Scenario (invented; the inspection records are simulated below): a water utility runs pairs
of identical booster pumps. At each quarterly inspection the crew notes, for the pair, whether
the pumps ran ``overloaded``, whether the water carried ``grit``, whether a pump had run
``dry`` (a suction-side event), and, for each pump, whether its mechanical seal was found
``leaking``. A seal can be damaged by any of the three causes, each acting on its own, plus a
small rate of failures with none of them (the leak term). The two pumps are the same model in
the same duty, so they share one table (``tied_to``). The grit reading needs a lab sample and is
missing on a third of the inspections; the dry-run log is missing on some.

What the example shows:

* the seal CPT as a noisy-OR (``cpd = "noisy_or"``): 4 parameters instead of 8 rows, each with a
  meaning an engineer can check ("grit alone damages a seal with probability ...");
* the tie: pump B's seal uses pump A's parameters, estimated from both pumps' records;
* the fit against the EM reference on the hidden-cause network (``em_check``);
* the same network with a full table per seal: more parameters, a lower BIC for the noisy-OR.

Run: ``python examples/pump_seals_noisy_or.py [--inspections N] [--seed S]``.

Estimates rest on the network structure, on the causes acting independently (the noisy-OR
assumption) and on the missing-at-random assumption; they support, and do not replace,
engineering judgement, and the maintenance rules of the operator and the manufacturer come first.
"""

from __future__ import annotations

import argparse
import warnings

import numpy as np
import pandas as pd

import adfit  # noqa: F401  (float64 for JAX)
from adfit.data import load_data
from adfit.fit import fit
from adfit.gaps import information_criteria
from adfit.network import network_from_dict

CAUSES = ("overload", "grit", "dry_run")


def network(structured: bool = True):
    seal = {"states": ["sound", "leaking"], "parents": list(CAUSES)}
    nodes = {c: {"states": ["no", "yes"]} for c in CAUSES}
    nodes["seal_a"] = {**seal, **({"cpd": "noisy_or"} if structured else {})}
    nodes["seal_b"] = {**seal, **({"tied_to": "seal_a"} if structured else {})}
    return network_from_dict(nodes)


#: the simulation's truth (invented for the demo)
TRUTH = {"leak": 0.03, "strength": {"overload": 0.25, "grit": 0.40, "dry_run": 0.60}}
CAUSE_RATES = {"overload": 0.30, "grit": 0.20, "dry_run": 0.10}


def simulate(n: int, seed: int) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    cols = {c: rng.random(n) < CAUSE_RATES[c] for c in CAUSES}
    for seal in ("seal_a", "seal_b"):
        sound = np.full(n, 1 - TRUTH["leak"])
        for c in CAUSES:
            sound = sound * np.where(cols[c], 1 - TRUTH["strength"][c], 1.0)
        cols[seal] = rng.random(n) >= sound
    df = pd.DataFrame({c: np.where(cols[c], "yes", "no") for c in CAUSES})
    for seal in ("seal_a", "seal_b"):
        df[seal] = np.where(cols[seal], "leaking", "sound")
    df.loc[rng.random(n) < 1 / 3, "grit"] = ""
    df.loc[rng.random(n) < 0.15, "dry_run"] = ""
    return df


def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--inspections", type=int, default=800)
    ap.add_argument("--seed", type=int, default=3)
    args = ap.parse_args(argv)
    df = simulate(args.inspections, args.seed)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        noisy = fit(network(True), df, missing=[""], em_check=True)
        table = fit(network(False), df, missing=[""])
    par = noisy.extras["nodes"]["seal_a"]["parameters"]
    print(f"{len(df)} inspections; grit missing on {int((df['grit'] == '').sum())}, "
          f"dry-run log missing on {int((df['dry_run'] == '').sum())}")
    print(f"noisy-OR seal (pump B tied to pump A): converged {noisy.converged}, "
          f"EM check: {noisy.extras['em_check']['verdict']}")
    print(f"  leak (no cause present)     {par['leak']:.3f}   (simulated {TRUTH['leak']:.3f})")
    for c in CAUSES:
        print(f"  {c + ' alone':<27} {par['strength'][c]['yes']:.3f}   (simulated {TRUTH['strength'][c]:.3f})")
    ic_n = information_criteria(noisy.network, load_data(noisy.network, df, missing=[""]), noisy)
    ic_t = information_criteria(table.network, load_data(table.network, df, missing=[""]), table)
    print(f"free parameters: noisy-OR + tie {ic_n.n_parameters}, two full tables {ic_t.n_parameters}")
    print(f"BIC: noisy-OR + tie {ic_n.bic:.1f}, two full tables {ic_t.bic:.1f} (lower is better)")
    print("Estimates rest on the causes acting independently and on missing at random; they support, and do "
          "not replace, engineering judgement.")
    return {"data": df, "noisy": noisy, "table": table, "ic_noisy": ic_n, "ic_table": ic_t}


if __name__ == "__main__":
    main()

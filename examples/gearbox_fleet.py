"""A walk through the Python API on the demo's wind-turbine gearbox fleet.

Scenario (invented; the records are simulated, see ``adfit/demo/generate.py``): every quarter a
turbine reports its season, load, lubricant age, vibration alarm, oil debris, temperature alarm
and whether the gearbox failed within 90 days. Bearing wear is recorded only when a technician
inspected the gearbox, and inspections follow vibration alarms far more often than not: the
gaps in ``bearing_wear`` depend on an observed column (MAR). The oil's contamination is never
measured (a latent node).

Steps:

1. write the demo's network, prior and records into a folder and load them from there
   (``load_network``, ``load_prior``, ``load_data``);
2. fit the CPTs with the expert prior on ``oil_debris`` (MAP) from a few starts;
3. compare with the fit on the complete records only (``compare_complete_case``), and turn
   both into the chance of heavy wear (:func:`adfit.demo.marginal`);
4. cross-check the fit with the independent EM implementation (``em_check``).

Run: ``python examples/gearbox_fleet.py [--records N] [--restarts K] [--out DIR]``.

Estimates rest on the network structure, on the prior and on the missing-at-random assumption;
they support, and do not replace, engineering judgement.
"""

from __future__ import annotations

import argparse
import tempfile
import warnings
from pathlib import Path

import adfit  # noqa: F401  (float64 for JAX)
from adfit.crosscheck import em_check
from adfit.data import load_data
from adfit.demo import marginal, write_demo_files
from adfit.demo.generate import true_tables
from adfit.fit import fit
from adfit.gaps import compare_complete_case
from adfit.network import load_network
from adfit.priors import load_prior


def run(out_dir: Path, *, records: int | None = None, restarts: int = 2, seed: int = 0,
        verbose: bool = True) -> dict:
    """The walk-through; returns the objects it made (for tests and further play)."""
    # 1. files -> network, prior, records
    paths = write_demo_files(out_dir)
    net = load_network(paths["network"])
    prior = load_prior(paths["prior"], net)
    data_path = paths["data"]
    if records is not None:  # a shorter file with the first N records
        lines = data_path.read_text(encoding="utf-8").splitlines(keepends=True)
        data_path = out_dir / "gearbox_records_head.csv"
        data_path.write_text("".join(lines[: records + 1]), encoding="utf-8")
    coded = load_data(net, data_path)
    if verbose:
        print(f"network: {len(net)} nodes ({', '.join(net.names)}); latent: {', '.join(net.latent_names)}")
        print(f"records: {coded.n_rows:g} ({coded.n_distinct} distinct rows) from {data_path}")

    # 2. the fit (MAP: the prior's pseudo-counts are added to the expected counts)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)  # local optima are expected with a latent node
        result = fit(net, coded, prior=prior, restarts=restarts, seed=seed)
    if verbose:
        print("\n" + result.summary())
        print("\nP(bearing_wear | load, contamination):")
        print(result.cpt("bearing_wear").round(3).to_string())

    # 3. complete records only, and what it does to the chance of heavy wear
    cc_fits = []

    def keep(network, data, **kw):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", UserWarning)
            r = fit(network, data, **kw)
        cc_fits.append(r)
        return r

    cmp = compare_complete_case(net, coded, full=result, fit_fn=keep, prior=prior, restarts=restarts, seed=seed)
    heavy = net.node("bearing_wear").states.index("heavy")
    full_p = float(marginal(net, result.probs, "bearing_wear")[heavy])
    cc_p = float(marginal(net, cc_fits[0].probs, "bearing_wear")[heavy])
    truth = float(marginal(net, true_tables(), "bearing_wear")[heavy])
    if verbose:
        print(f"\n{cmp.format_text(top=5)}")
        word = "over-state" if cc_p > full_p else "under-state"
        print(f"\nP(bearing_wear = heavy): full likelihood {full_p:.3f}, complete records only {cc_p:.3f} "
              f"(simulation truth {truth:.3f})")
        print(f"dropping incomplete rows would {word} the chance of heavy wear by {100 * abs(cc_p - full_p):.1f} "
              f"percentage points")

    # 4. the EM cross-check
    check = em_check(result, coded, pseudo_counts=prior.pseudo_counts(net), seed=seed)
    if verbose:
        print(f"\nEM cross-check: {check['verdict']} ({check['detail']})")
        print("\nDemo data are simulated. Estimates rest on the network, the prior and the missing-at-random")
        print("assumption; they support, and do not replace, engineering judgement.")
    return {"network": net, "prior": prior, "data": coded, "data_path": data_path, "result": result,
            "complete_case": cmp, "complete_case_fit": cc_fits[0], "em_check": check,
            "heavy": {"full": full_p, "complete_case": cc_p, "truth": truth}}


def main(argv: list[str] | None = None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--records", type=int, default=None, help="use only the first N records (default: all)")
    ap.add_argument("--restarts", type=int, default=2)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--out", type=Path, default=None, help="folder for the demo files (default: a temporary one)")
    args = ap.parse_args(argv)
    if args.out is not None:
        args.out.mkdir(parents=True, exist_ok=True)
        return run(args.out, records=args.records, restarts=args.restarts, seed=args.seed)
    with tempfile.TemporaryDirectory() as tmp:
        return run(Path(tmp), records=args.records, restarts=args.restarts, seed=args.seed)


if __name__ == "__main__":
    main()

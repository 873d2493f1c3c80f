"""Latent classes of customers from five yes/no survey answers: restarts and relabelling.

Scenario (invented; the answers are simulated below): a subscription service asks its customers
five yes/no questions. The analyst supposes three kinds of customer (a latent node ``segment``
with three states) and that, within a segment, the answers are independent: the classic latent
class model, a network ``segment -> each item``. A few answers were skipped (at random).

What the example shows:

* the likelihood has several optima, so the fit is run from several starts (``restarts``), and
  the starts are listed with the optimum each reached;
* the states of a latent node have no names of their own: any permutation of them gives the same
  likelihood. To compare the fit with the simulation's truth (or with another fit) the states
  are first matched (:func:`adfit.crosscheck.align_latent_states`, then ``relabel``);
* the EM cross-check does the matching itself and agrees with the fit.

Run: ``python examples/survey_latent_classes.py [--customers N] [--restarts K] [--seed S]``.

The segments are a model of the answers, not facts about the customers; read them with care.
"""

from __future__ import annotations

import argparse
import warnings

import numpy as np
import pandas as pd

import adfit  # noqa: F401  (float64 for JAX)
from adfit.crosscheck import align_latent_states, em_check, relabel
from adfit.fit import fit
from adfit.likelihood import score
from adfit.network import network_from_dict

ITEMS = ("recommend", "weekly_use", "contacted_support", "price_fair", "will_renew")
SEGMENTS = ("s1", "s2", "s3")  # no meaning until matched: the fit may put any kind of customer in any state

NETWORK = network_from_dict({
    "segment": {"states": list(SEGMENTS), "latent": True},
    **{item: {"states": ["no", "yes"], "parents": ["segment"]} for item in ITEMS},
})

# The simulation's truth: enthusiasts, casual users, dissatisfied customers (in that order).
TRUE_SEGMENT = [0.45, 0.35, 0.20]
TRUE_YES = np.array([
    [0.90, 0.85, 0.20, 0.80, 0.90],  # enthusiasts
    [0.55, 0.25, 0.15, 0.60, 0.50],  # casual users
    [0.10, 0.40, 0.75, 0.20, 0.15],  # dissatisfied
])
SKIPPED = 0.03  # share of answers skipped, at random


def true_tables() -> dict[str, np.ndarray]:
    out = {"segment": np.asarray(TRUE_SEGMENT)}
    for j, item in enumerate(ITEMS):
        out[item] = np.stack([1 - TRUE_YES[:, j], TRUE_YES[:, j]], axis=1)
    return out


def simulate(n: int, seed: int) -> pd.DataFrame:
    """Simulated answers ("yes"/"no", "" for a skipped question); no segment column."""
    rng = np.random.default_rng(seed)
    seg = (rng.random(n)[:, None] >= np.cumsum(TRUE_SEGMENT)[None, :-1]).sum(axis=1)
    yes = rng.random((n, len(ITEMS))) < TRUE_YES[seg]
    skip = rng.random((n, len(ITEMS))) < SKIPPED
    cells = np.where(skip, "", np.where(yes, "yes", "no"))
    return pd.DataFrame(cells, columns=list(ITEMS))


def run(n_customers: int = 1200, restarts: int = 5, seed: int = 11, verbose: bool = True) -> dict:
    df = simulate(n_customers, seed)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)  # a LocalOptimaWarning is part of the lesson
        result = fit(NETWORK, df, restarts=restarts, seed=seed)
    sec = result.extras["restarts"]
    starts = sec["starts"] if isinstance(sec, dict) else sec

    truth = true_tables()
    perm = align_latent_states(NETWORK, result.probs, truth)
    matched = relabel(NETWORK, result.probs, perm)
    names = ("enthusiasts", "casual users", "dissatisfied")
    check = em_check(result, df, seed=seed + 1)
    ll_fit = score(NETWORK, _coded(df), dict(result.probs))["log_likelihood"]
    ll_matched = score(NETWORK, _coded(df), matched)["log_likelihood"]
    if verbose:
        print(f"{n_customers} simulated customers, {len(ITEMS)} yes/no questions, 3 latent segments; "
              f"{(df == '').to_numpy().mean():.1%} of answers skipped\n")
        print(f"{'start':>5} {'kind':<24} {'objective':>14} {'iterations':>10}  optimum")
        for r in starts:
            print(f"{r['start'] + 1:>5} {r['kind']:<24} {r['objective']:>14.4f} {r['iterations']:>10}  "
                  f"{r.get('optimum', '') if r.get('optimum') is None else r['optimum'] + 1}")
        print(f"best: start {result.extras['best_start'] + 1}, log-likelihood {result.log_likelihood:.4f}\n")
        print("fitted state -> simulated segment: "
              + ", ".join(f"{SEGMENTS[a]} -> {names[int(b)]}" for a, b in enumerate(perm["segment"])))
        print(f"log-likelihood before and after relabelling: {ll_fit:.6f} / {ll_matched:.6f} (labels carry no "
              f"information)\n")
        print(f"{'':<22}" + "".join(f"{n:>16}" for n in names))
        print(f"{'share of customers':<22}" + "".join(f"{matched['segment'][k]:>9.3f} ({TRUE_SEGMENT[k]:.2f})"
                                                      for k in range(3)))
        for j, item in enumerate(ITEMS):
            print(f"{'P(' + item + ' = yes)':<22}" + "".join(f"{matched[item][k, 1]:>9.3f} ({TRUE_YES[k, j]:.2f})"
                                                            for k in range(3)))
        print("(fitted, with the simulation's value in brackets)\n")
        print(f"EM cross-check: {check['verdict']} ({check['detail']})")
        moved = {k: v for k, v in check["latent_permutation"].items() if any(s != t for s, t in v.items())}
        if moved:
            print("  EM's own start found the states in another order: "
                  + "; ".join(", ".join(f"{s}->{t}" for s, t in v.items()) for v in moved.values()))
        print("\nThe segments are a model of the answers, not facts about the customers.")
    return {"data": df, "result": result, "starts": starts, "permutation": perm, "matched": matched,
            "em_check": check, "loglik": {"fit": ll_fit, "relabelled": ll_matched}}


def _coded(df: pd.DataFrame):
    from adfit.data import encode_frame

    return encode_frame(NETWORK, df)


def main(argv: list[str] | None = None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--customers", type=int, default=1200)
    ap.add_argument("--restarts", type=int, default=5)
    ap.add_argument("--seed", type=int, default=11)
    args = ap.parse_args(argv)
    return run(args.customers, args.restarts, args.seed)


if __name__ == "__main__":
    main()

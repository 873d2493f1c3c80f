"""A result that says "converged" is at a maximum: the simplex KKT ratio, boundary escapes, saddles.

References:
- KKT conditions on the probability simplex: Boyd & Vandenberghe (2004), Convex Optimization,
  §5.5.3 — at a maximum of F over a CPT row, ∂F/∂θ(x|u) = μ(u) where θ > 0 and ≤ μ(u) where
  θ = 0; for F = log L + Σ c log θ the ratio (N + c)/(θ(N(u) + Σc)) is ∂F/∂θ / μ(u).
- Boundary estimates in latent class models: Galindo-Garre & Vermunt (2006), Behaviormetrika 33(1).
- EM never lowers the likelihood (Dempster, Laird & Rubin 1977, Theorem 1): EM from a maximum
  cannot climb; the independent EM reference (adfit.em) is the judge of every maximum here.
- Lanczos: Golub & Van Loan (2013), Matrix Computations, §10.1; checked against numpy's eigvalsh.

The data sets of the trap and the saddle are seeded simulations (found by searching seeds for a
case where the logit stopping rule alone stops at a point that is not a maximum); what the tests
check them against is EM and closed forms, not values of the project.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pandas as pd
import pytest

from adfit.data import encode_frame, load_data
from adfit.em import em_fit
from adfit.em import log_likelihood as em_log_likelihood
from adfit.errors import OptionError
from adfit.fit import Fitter, FitSettings, complete_family_start, fit, kkt_ratios, lanczos_extremes
from adfit.likelihood import logits_from_probs
from adfit.network import network_from_dict
from published import STOUFFER_TOBY_COUNTS, STOUFFER_TOBY_ITEMS, stouffer_toby


# ============================================================================ the ratio itself
def _st_loglik(probs):
    """Closed form of the Stouffer-Toby latent class log-likelihood (numpy; linear tables need
    not sum to 1): Σ_patterns n log Σ_c π_c Π_j θ_j(x_j | c)."""
    pi = probs["cls"]
    tot = 0.0
    for k, n in enumerate(STOUFFER_TOBY_COUNTS):
        bits = [(k >> (3 - j)) & 1 for j in range(4)]
        p = sum(pi[c] * np.prod([probs[it][c, b] for it, b in zip(STOUFFER_TOBY_ITEMS, bits)])
                for c in range(len(pi)))
        tot += n * math.log(p)
    return tot


def test_kkt_ratio_is_the_simplex_derivative_including_cells_at_zero():
    # ratio(x|u) = (∂ log L/∂θ(x|u)) / N(u), N(u) = Σ_x θ(x|u) ∂ log L/∂θ(x|u) (Euler: log L is
    # a sum of logs of functions linear in each table), the derivative in closed form
    net, df = stouffer_toby(2)
    data = encode_frame(net, df, count_column="count")
    rng = np.random.default_rng(3)
    probs = {n: rng.dirichlet(np.ones(net.node(n).card), size=net.cpt_shape(n)[:-1]) for n in net.names}
    probs["item2"][0] = [1.0 - 1e-12, 1e-12]     # a cell near the boundary
    probs["item3"][1] = [1.0, 0.0]               # a cell exactly at 0 (the re-evaluation at a floor)
    f = Fitter(net, data, settings=FitSettings())
    _, counts = f.lik.expected_counts(probs)
    got = f.kkt(probs, counts)
    pi = probs["cls"]
    for j, name in enumerate(STOUFFER_TOBY_ITEMS):
        # ∂ log L/∂θ_j(x|c) = Σ_patterns n · 1(x_j = x) π_c Π_{i≠j} θ_i(x_i|c) / p(pattern)
        d = np.zeros_like(probs[name])
        for k, n in enumerate(STOUFFER_TOBY_COUNTS):
            bits = [(k >> (3 - i)) & 1 for i in range(4)]
            terms = [pi[c] * np.prod([probs[it][c, b] for it, b in zip(STOUFFER_TOBY_ITEMS, bits)])
                     for c in range(len(pi))]
            p = sum(terms)
            for c in range(len(pi)):
                others = pi[c] * np.prod([probs[it][c, b] for i, (it, b) in enumerate(zip(STOUFFER_TOBY_ITEMS, bits))
                                          if i != j])
                d[c, bits[j]] += n * others / p
        nu = (probs[name] * d).sum(axis=-1, keepdims=True)
        np.testing.assert_allclose(got[name], d / nu, rtol=2e-6)
    # the cell at exactly 0 has a ratio, and it is not the NaN the plain formula gives there
    assert np.isfinite(got["item3"][1, 1])
    assert np.isnan(kkt_ratios(net, probs, counts, f.pseudo)["item3"][1, 1])


def test_no_ratio_with_an_l2_penalty_and_a_bad_tolerance_is_refused():
    net, df = stouffer_toby(2)
    data = encode_frame(net, df, count_column="count")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = fit(net, data, l2=0.1)
    assert res.extras["stationarity"]["kkt_ratio"] is None
    for bad in (0.0, -1e-3, 1.0, float("nan")):
        with pytest.raises(OptionError, match="kkt-tol"):
            fit(net, data, kkt_tol=bad)


# ============================================================================ the boundary trap
def _latent_class_records(seed, n_items=7, k=3, n=3000, p_missing=0.05):
    """3 classes x 7 three-state items, 3000 records, 5 % of cells missing completely at random."""
    rng = np.random.default_rng(seed)
    pi = rng.dirichlet(np.ones(k) * 2)
    items = [rng.dirichlet(np.ones(3) * 0.5, size=k) for _ in range(n_items)]
    c = rng.choice(k, size=n, p=pi)
    cols = {}
    for i, t in enumerate(items):
        x = np.minimum((rng.random(n)[:, None] > np.cumsum(t[c], axis=1)).sum(1), 2)
        lab = np.array(["a", "b", "c"])[x].astype(object)
        lab[rng.random(n) < p_missing] = None
        cols[f"i{i}"] = lab
    d = {"C": {"states": [f"c{j}" for j in range(k)], "latent": True}}
    d.update({f"i{i}": {"states": ["a", "b", "c"], "parents": ["C"]} for i in range(n_items)})
    return network_from_dict(d), pd.DataFrame(cols)


@pytest.fixture(scope="module")
def trap():
    # seed 14, 5 items, 800 records: the logit rule stops on a false boundary (found by a search
    # over seeds; 3 000 records and 7 items give such cases too, e.g. seed 10, at more cost)
    net, df = _latent_class_records(14, n_items=5, n=800)
    data = load_data(net, df)
    f = Fitter(net, data, settings=FitSettings())
    start = complete_family_start(net, data, np.random.default_rng(0), f.pseudo,
                                  observed=f.lik.observed_family_counts())
    return net, data, f, logits_from_probs(net, start)


def test_the_logit_rule_alone_passes_at_a_false_boundary(trap):
    # the old stopping rule (gradient in logits, residual in probabilities) says converged ...
    net, data, f, z0 = trap
    r = f._run_phases(z0, max_iter=1000)
    ev = f.evaluate(r.logits)
    assert r.converged and ev["residual"] < 1e-8
    # ... where a cell near 0 has a KKT ratio far above 1: the likelihood rises if it grows
    assert ev["kkt_ratio"] > 2.0
    name, label, ratio = f.worst_kkt_cell(ev)
    assert ratio == ev["kkt_ratio"]
    flat = np.nanargmax(ev["kkt"][name])
    assert ev["probs"][name].ravel()[flat] < 1e-6
    # the independent EM reference's log-likelihood rises when that cell grows to 1e-3 (the rest
    # of its row scaled down): the point is not a maximum. (EM's own stopping rule — rise per
    # step — is as blind there: it multiplies a cell of about 1e-250 by the ratio each step.)
    row, col = divmod(int(flat), net.node(name).card)
    moved = {k: np.array(v) for k, v in ev["probs"].items()}
    tab = moved[name].reshape(-1, net.node(name).card)
    tab[row] *= (1 - 1e-3) / (1 - tab[row, col])
    tab[row, col] = 1e-3
    ll_moved = em_log_likelihood(net, moved, data)
    assert em_log_likelihood(net, ev["probs"], data) == pytest.approx(ev["log_likelihood"], rel=1e-10)
    assert ll_moved > ev["log_likelihood"] + 1e-3 * (ratio - 1) * 0.5


def test_the_fit_moves_off_the_false_boundary_and_reaches_the_maximum(trap):
    net, data, f, z0 = trap
    f.boundary_escapes = 0
    r = f.run(z0)
    ev = f.evaluate(r.logits)
    assert r.converged and f.boundary_escapes >= 1
    assert ev["kkt_ratio"] <= 1 + f.settings.kkt_tol
    # EM from the answer does not climb (DLR Theorem 1: a maximum is a fixed point of EM)
    em_here = em_fit(net, data, init=ev["probs"], max_iter=200, tol=0.0, gtol=0.0)
    assert em_here.log_likelihood - ev["log_likelihood"] <= 1e-6 * abs(ev["log_likelihood"])
    # and an independent EM run from a random start reaches no higher point
    best_em = em_fit(net, data, seed=0, max_iter=3000).log_likelihood
    assert ev["log_likelihood"] >= best_em - 1e-6 * abs(best_em)


# ============================================================================ saddles
def _empty_column_records(seed=0, n=1000):
    """7 nodes, none latent: A (its column entirely empty) with children B, C, D; E with children
    F, G. From complete-family counts the start is exactly symmetric in A's two states (A's
    table uniform, the rows of B, C, D identical): a stationary point that is not a maximum."""
    rng = np.random.default_rng(seed)
    a = rng.integers(0, 2, n)

    def child(par, k=3):
        t = rng.dirichlet(np.ones(k) * 0.7, size=2)
        return np.minimum((rng.random(len(par))[:, None] > np.cumsum(t[par], 1)).sum(1), k - 1)

    b, c, d = child(a), child(a), child(a)
    e = rng.integers(0, 2, n)
    fcol, g = child(e), child(e)
    df = pd.DataFrame({"A": [None] * n, **{k: [f"s{v}" for v in col] for k, col in
                                           zip("BCDEFG", (b, c, d, e, fcol, g))}}, dtype=object)
    s3, s2 = ["s0", "s1", "s2"], ["s0", "s1"]
    net = network_from_dict({"A": {"states": s2}, "B": {"states": s3, "parents": ["A"]},
                             "C": {"states": s3, "parents": ["A"]}, "D": {"states": s3, "parents": ["A"]},
                             "E": {"states": s2}, "F": {"states": s3, "parents": ["E"]},
                             "G": {"states": s3, "parents": ["E"]}})
    return net, df


@pytest.fixture(scope="module")
def saddle():
    net, df = _empty_column_records()
    data = load_data(net, df)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        old = fit(net, data, saddle_check=False)
        new = fit(net, data)
    return net, data, old, new


def test_without_the_curvature_check_the_fit_stops_at_the_symmetric_saddle(saddle):
    net, data, old, _ = saddle
    assert old.converged and old.extras["stationarity"]["holds"]
    np.testing.assert_allclose(old.probs["A"], [0.5, 0.5], atol=1e-9)
    for child in "BCD":
        np.testing.assert_allclose(old.probs[child][0], old.probs[child][1], atol=1e-9)
    # EM from a slightly perturbed copy of that point climbs far above it: not a maximum
    p = {k: np.array(v) for k, v in old.probs.items()}
    p["B"] = np.array([[0.3, 0.3, 0.4], [0.2, 0.4, 0.4]]) * 0.01 + p["B"] * 0.99
    em = em_fit(net, data, init=p, max_iter=2000)
    assert em.log_likelihood > old.log_likelihood + 10


def test_the_fit_moves_off_the_saddle_and_reaches_the_maximum(saddle):
    net, data, old, new = saddle
    st = new.extras["stationarity"]
    assert new.converged and st["saddle_escapes"] >= 1 and st["holds"]
    assert new.log_likelihood > old.log_likelihood + 10
    em_here = em_fit(net, data, init=new.probs, max_iter=200, tol=0.0, gtol=0.0)
    assert em_here.log_likelihood - new.log_likelihood <= 1e-6 * abs(new.log_likelihood)
    best_em = em_fit(net, data, seed=0, max_iter=3000).log_likelihood
    assert new.log_likelihood >= best_em - 1e-6 * abs(best_em)


def test_error_bars_at_a_saddle_withdraw_converged(saddle):
    # the observed information at the symmetric point has a negative eigenvalue; a result with
    # error bars computed there cannot say converged
    from adfit.uncertainty import attach_uncertainty

    net, data, old, new = saddle
    out = attach_uncertainty(old, data)
    assert not out.converged and "negative curvature" in out.stop_reason


# ============================================================================ Lanczos
def test_lanczos_extremes_match_numpy_eigvalsh():
    rng = np.random.default_rng(7)
    n = 60
    Q, _ = np.linalg.qr(rng.standard_normal((n, n)))
    lam = np.concatenate([[-0.03], np.zeros(10), rng.uniform(0.01, 1.0, n - 11)])
    A = (Q * lam) @ Q.T
    lo, hi, v = lanczos_extremes(lambda x: A @ x, n, steps=40, seed=1)
    ref = np.linalg.eigvalsh(A)
    assert lo == pytest.approx(ref[0], abs=1e-8) and hi == pytest.approx(ref[-1], rel=1e-3)
    # the Ritz vector is the eigenvector of the smallest eigenvalue (up to sign)
    assert abs(float(v @ Q[:, 0])) == pytest.approx(1.0, abs=1e-6)


# ============================================================================ property
# Seeded random small networks with latent nodes and MCAR/MAR gaps (tests/randomnets.latent_case).
# The full run over 200 networks is benchmarks/property_latent.py (figures in
# docs/performance.md); the suite runs the first PROPERTY_NETWORKS of them to stay fast.
PROPERTY_NETWORKS = 6


def test_property_converged_means_kkt_holds_em_does_not_climb_and_the_best_is_reached():
    from randomnets import latent_case

    reached = 0
    for seed in range(PROPERTY_NETWORKS):
        net, data = latent_case(seed)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            r = fit(net, data, seed=seed)        # the default starts (4 with latent nodes)
        assert r.settings["restarts"] == 4 and r.settings["restarts_chosen_by"] == "default"
        st = r.extras["stationarity"]
        ll = r.log_likelihood
        if r.converged:
            # KKT on every cell, recomputed here from the independent EM reference's E-step
            from adfit.em import expected_counts as em_counts

            counts, _ = em_counts(net, r.probs, data)
            for name in net.free_names:
                a = counts[name]
                mu = a.sum(axis=-1, keepdims=True)
                th = r.probs[name]
                ok = (mu >= 1e-6) & (th > 1e-250)
                ratio = np.where(ok, a / np.where(ok, th * mu, 1.0), 0.0)
                assert ratio.max() <= 1 + st["kkt_tol"] + 1e-9, (seed, name)
            # EM from the answer, a fixed number of steps, does not climb (DLR 1977, Theorem 1)
            climb = em_fit(net, data, init=r.probs, max_iter=100, tol=0.0, gtol=0.0).log_likelihood - ll
            assert climb <= 1e-6 * abs(ll), (seed, climb)
        best = max(em_fit(net, data, seed=s, max_iter=1000).log_likelihood for s in range(2))
        reached += ll >= best - 1e-6 * abs(best)
    # the benchmark's figure over 200 networks is the one the issue asks for (>= 95 %); on these
    # six every fit reaches the best of two EM starts
    assert reached == PROPERTY_NETWORKS

"""The EM reference for structured CPTs (adfit/emforms.py through adfit/em.py).

Each check is against something outside the module: the published definitions of the forms
computed by hand or by brute-force enumeration of the hidden causes, an independent scipy
optimisation of a hand-written likelihood, statsmodels' multinomial logit, brute-force
enumeration of the hidden cells, closed forms on complete data, and EM run on the explicitly
augmented network (hidden causes as latent nodes, a fixed deterministic child).
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pandas as pd
import pytest
from scipy.optimize import minimize
from scipy.special import expit, log_softmax

from adfit import emforms as F
from adfit.data import encode_frame
from adfit.em import em_fit, to_fit_result
from adfit.errors import NetworkError, OptionError, PriorError
from adfit.network import parse_network

AB = {"a": {"states": ["no", "yes"]}, "b": {"states": ["lo", "mid", "hi"]}}
TRUE_NOISY_OR = {"leak": 0.1, "strength": {"a": {"yes": 0.7}, "b": {"mid": 0.4, "hi": 0.8}}}


def net_with(child: dict, extra: dict | None = None):
    return parse_network({"nodes": {**AB, "y": {"parents": ["a", "b"], **child}, **(extra or {})}})


def group(net, name):
    return next(g for g in F.groups_of(net) if name in g.members)


def simulate(net, probs, n, seed, missing=None):
    """Ancestral sampling from CPT arrays; ``missing``: {column: probability of a blank}."""
    rng = np.random.default_rng(seed)
    codes = np.zeros((n, len(net)), dtype=int)
    for i, node in enumerate(net.nodes):
        rows = probs[node.name][tuple(codes[:, net.index(p)] for p in node.parents)]
        u = rng.random(n)[:, None]
        codes[:, i] = (u > np.cumsum(rows, axis=-1)).sum(axis=1).clip(max=node.card - 1)
    df = pd.DataFrame({node.name: np.array(node.states, dtype=object)[codes[:, i]]
                       for i, node in enumerate(net.nodes) if not node.latent})
    for col, p in (missing or {}).items():
        df.loc[rng.random(n) < p, col] = None
    return df


def brute_force_loglik(net, probs, df):
    """Oracle: each record's probability is the sum over every assignment of its hidden cells."""
    total = 0.0
    for _, rec in df.iterrows():
        hidden = [i for i, nd in enumerate(net.nodes) if nd.latent or pd.isna(rec.get(nd.name))]
        fixed = {i: nd.states.index(rec[nd.name]) for i, nd in enumerate(net.nodes) if i not in hidden}
        p = 0.0
        for ass in itertools.product(*[range(net.cards[i]) for i in hidden]):
            x = {**fixed, **dict(zip(hidden, ass))}
            q = 1.0
            for i, nd in enumerate(net.nodes):
                q *= probs[nd.name][tuple(x[net.index(u)] for u in nd.parents) + (x[i],)]
            p += q
        total += math.log(p)
    return total


def causes_by_enumeration(leak, strengths):
    """Noisy-MAX by its definition (Díez 1993): Y = max of independent causes, the leak cause with
    distribution ``leak`` and per active parent state a cause with its strength distribution;
    enumerating every cause value (no cumulative formula)."""
    K = len(leak)
    out = np.zeros(K)
    dists = [leak] + list(strengths)
    for zs in itertools.product(range(K), repeat=len(dists)):
        out[max(zs)] += math.prod(d[z] for d, z in zip(dists, zs))
    return out


# --------------------------------------------------------------------------- the forms' tables
def test_noisy_or_table_equals_the_published_formula_by_hand():
    # Pearl 1988, Probabilistic Reasoning in Intelligent Systems, §4.3.2 (leak: Henrion 1989):
    # P(absent | u) = (1 − leak) · Π over active parents (1 − strength). By hand:
    # no active parent: 0.9; a=yes only: 0.9·0.3 = 0.27; b=hi only: 0.9·0.2 = 0.18;
    # a=yes, b=mid: 0.9·0.3·0.6 = 0.162; a=yes, b=hi: 0.9·0.3·0.2 = 0.054.
    net = net_with({"states": ["absent", "present"], "cpd": "noisy_or"})
    g = group(net, "y")
    t = F.implied_table(g, F.from_json(net, g, TRUE_NOISY_OR))
    absent = t[..., 0]
    assert absent[0, 0] == pytest.approx(0.9, abs=1e-15)
    assert absent[1, 0] == pytest.approx(0.27, abs=1e-15)
    assert absent[0, 2] == pytest.approx(0.18, abs=1e-15)
    assert absent[1, 1] == pytest.approx(0.162, abs=1e-15)
    assert absent[1, 2] == pytest.approx(0.054, abs=1e-15)
    np.testing.assert_allclose(t.sum(axis=-1), 1.0, atol=1e-15)


def test_noisy_max_table_equals_enumeration_of_the_hidden_causes():
    # Díez 1993 (UAI): P(Y ≤ y | u) = L(≤ y) Π F_parent(≤ y); checked against the definition
    # Y = max(causes) by enumerating every cause value. Worked case by hand for one cell: leak
    # (0.8, 0.15, 0.05), a=yes strength (0.3, 0.5, 0.2): P(Y ≤ 0) = 0.8·0.3 = 0.24.
    net = net_with({"states": ["ok", "worn", "broken"], "cpd": "noisy_max"})
    g = group(net, "y")
    doc = {"leak": [0.8, 0.15, 0.05],
           "strength": {"a": {"yes": [0.3, 0.5, 0.2]}, "b": {"mid": [0.6, 0.3, 0.1], "hi": [0.1, 0.2, 0.7]}}}
    par = F.from_json(net, g, doc)
    t = F.implied_table(g, par)
    assert t[1, 0, 0] == pytest.approx(0.24, abs=1e-15)
    for a, b in itertools.product(range(2), range(3)):
        active = ([par["causes"][0][a]] if a else []) + ([par["causes"][1][b]] if b else [])
        np.testing.assert_allclose(t[a, b], causes_by_enumeration(par["leak"], active), atol=1e-15)


def test_parameters_round_trip_through_tables_and_the_result_layout():
    rng = np.random.default_rng(3)
    for child in ({"states": ["absent", "present"], "cpd": "noisy_or"},
                  {"states": ["ok", "worn", "broken"], "cpd": "noisy_max"},
                  {"states": ["u", "v", "w"], "cpd": "logistic"}):
        net = net_with(child)
        g = group(net, "y")
        par = F.random_params(g, rng)
        t = F.implied_table(g, par)
        back = F.from_table(g, t)
        np.testing.assert_allclose(F.implied_table(g, back), t, atol=1e-12)
        doc = F.to_json(net, g, par)
        np.testing.assert_allclose(F.implied_table(g, F.from_json(net, g, doc)), t, atol=1e-15)
        if child["cpd"] == "logistic":  # the references are present as 0
            assert doc["intercept"][0] == 0.0 and doc["coefficients"]["b"]["lo"] == [0.0, 0.0, 0.0]
            np.testing.assert_allclose(back, par, atol=1e-8)
    # a table that is not noisy-OR is refused as a start, in one line naming the node
    net = net_with({"states": ["absent", "present"], "cpd": "noisy_or"})
    g = group(net, "y")
    bad = np.full(g.shape, 0.5)
    bad[1, 2] = [0.9, 0.1]  # both causes active but less often present than with a alone
    with pytest.raises(OptionError, match="starting table of node 'y' is not a noisy_or table"):
        F.from_table(g, bad)


# --------------------------------------------------------------------------- noisy-OR by EM
def _noisy_or_negloglik(x, counts):
    """Hand-written noisy-OR log-likelihood of complete counts (a, b, y), logit parameters
    x = (leak, s_a_yes, s_b_mid, s_b_hi); value and gradient (Pearl 1988 §4.3.2)."""
    p = expit(x)
    keep = 1.0 - p  # probability that a cause does not fire
    f, g = 0.0, np.zeros(4)
    for (a, b, y), n in counts.items():
        used = [0] + ([1] if a == 1 else []) + ([2 if b == 1 else 3] if b > 0 else [])
        absent = math.prod(keep[j] for j in used)
        if y == 0:
            f += n * math.log(absent)
            for j in used:  # d log(absent) / d x_j = −p_j
                g[j] += n * (-p[j])
        else:
            f += n * math.log1p(-absent)
            for j in used:  # d log(1 − absent) / d x_j = absent · p_j / (1 − absent)
                g[j] += n * absent * p[j] / (1.0 - absent)
    return -f, -g


def test_noisy_or_em_on_complete_data_equals_scipy_on_the_hand_written_likelihood():
    # Independent reference: scipy's BFGS on the noisy-OR likelihood written by hand above.
    net = net_with({"states": ["absent", "present"], "cpd": "noisy_or"})
    g = group(net, "y")
    truth = F.implied_table(g, F.from_json(net, g, TRUE_NOISY_OR))
    probs = {"a": np.array([0.6, 0.4]), "b": np.array([0.5, 0.3, 0.2]), "y": truth}
    df = simulate(net, probs, 1500, seed=1)
    res = em_fit(net, df, tol=1e-14, gtol=1e-11, max_iter=20000, seed=2)
    assert res.converged
    counts = df.assign(a=df.a.map({"no": 0, "yes": 1}), b=df.b.map({"lo": 0, "mid": 1, "hi": 2}),
                       y=df.y.map({"absent": 0, "present": 1})).value_counts().to_dict()
    opt = minimize(_noisy_or_negloglik, np.zeros(4), args=(counts,), jac=True, method="BFGS",
                   options={"gtol": 1e-10, "maxiter": 1000})
    ref = expit(opt.x)
    got = res.parameters["y"]
    em_vec = [got["leak"], got["strength"]["a"]["yes"], got["strength"]["b"]["mid"], got["strength"]["b"]["hi"]]
    np.testing.assert_allclose(em_vec, ref, atol=1e-6)
    assert res.log_likelihood == pytest.approx(-opt.fun + _marginal_ll(df), abs=1e-6)
    assert np.min(np.diff(res.trace)) >= -1e-9 * abs(res.trace[-1])


def _marginal_ll(df):
    """Log-likelihood of the parent columns at their relative frequencies (closed form)."""
    total = 0.0
    for col in ("a", "b"):
        c = df[col].value_counts().to_numpy(dtype=float)
        total += float(np.sum(c * np.log(c / c.sum())))
    return total


def _augmented(strengths: dict):
    """The equivalent network of Meek & Heckerman 1997 / Heckerman & Breese 1996: one hidden cause
    per parent (its inactive row impossible-cell pinned at 'off'), a leak cause, and the child a
    fixed deterministic OR of the causes."""
    off = [{"given": {"a": "no"}, "state": "on"}]
    off_b = [{"given": {"b": "lo"}, "state": "on"}]
    det = [[1.0, 0.0] if not any(z) else [0.0, 1.0] for z in itertools.product((0, 1), repeat=3)]
    return parse_network({"nodes": {
        **AB,
        "z0": {"states": ["off", "on"], "latent": True},
        "za": {"states": ["off", "on"], "parents": ["a"], "latent": True, "impossible": off},
        "zb": {"states": ["off", "on"], "parents": ["b"], "latent": True, "impossible": off_b},
        "y": {"states": ["absent", "present"], "parents": ["z0", "za", "zb"], "fixed": det}}})


def test_noisy_or_em_equals_em_on_the_augmented_network_with_gaps():
    # Meek & Heckerman 1997 (UAI), Heckerman & Breese 1996 (IEEE SMC-A 26(6)): noisy-OR is the
    # marginal of the augmented network; EM on one is EM on the other, iterate by iterate. The
    # augmented network's E-step is the junction tree's (no closed-form cause posterior).
    net = net_with({"states": ["absent", "present"], "cpd": "noisy_or"})
    g = group(net, "y")
    truth = F.implied_table(g, F.from_json(net, g, TRUE_NOISY_OR))
    probs = {"a": np.array([0.6, 0.4]), "b": np.array([0.5, 0.3, 0.2]), "y": truth}
    df = simulate(net, probs, 400, seed=5, missing={"a": 0.3, "b": 0.2, "y": 0.2})
    start = {"leak": 0.3, "strength": {"a": {"yes": 0.5}, "b": {"mid": 0.5, "hi": 0.5}}}
    init = {"a": np.array([0.5, 0.5]), "b": np.full(3, 1 / 3)}
    res = em_fit(net, df, init={**init, "y": F.implied_table(g, F.from_json(net, g, start))},
                 max_iter=12, tol=0, gtol=0)
    aug = _augmented(start)
    ainit = {**init, "z0": np.array([0.7, 0.3]), "za": np.array([[1.0, 0.0], [0.5, 0.5]]),
             "zb": np.array([[1.0, 0.0], [0.5, 0.5], [0.5, 0.5]])}
    ref = em_fit(aug, df, init=ainit, max_iter=12, tol=0, gtol=0)
    np.testing.assert_allclose(res.trace, ref.trace, rtol=0, atol=1e-9)
    p = res.parameters["y"]
    assert p["leak"] == pytest.approx(ref.probs["z0"][1], abs=1e-12)
    assert p["strength"]["a"]["yes"] == pytest.approx(ref.probs["za"][1, 1], abs=1e-12)
    assert p["strength"]["b"]["hi"] == pytest.approx(ref.probs["zb"][2, 1], abs=1e-12)
    assert ref.probs["za"][0, 1] == 0.0  # the impossible cell stays exactly 0


@pytest.mark.parametrize("cpd, states", [("noisy_or", ["absent", "present"]),
                                         ("noisy_max", ["ok", "worn", "broken"]),
                                         ("logistic", ["u", "v", "w"])])
def test_em_with_gaps_and_a_latent_parent_matches_enumeration_and_rises(cpd, states):
    # Brute-force enumeration of the implied-table network (every hidden assignment) is the
    # marginal likelihood by definition; EM (and generalised EM) never lowers it
    # (Dempster, Laird & Rubin 1977, Theorem 1).
    net = parse_network({"nodes": {
        "h": {"states": ["h0", "h1"], "latent": True},
        "a": {"states": ["no", "yes"], "parents": ["h"]}, "b": {"states": ["lo", "mid", "hi"], "parents": ["h"]},
        "y": {"states": states, "parents": ["a", "b"], "cpd": cpd}}})
    g = group(net, "y")
    rng = np.random.default_rng(11)
    probs = {"h": np.array([0.4, 0.6]), "a": np.array([[0.8, 0.2], [0.3, 0.7]]),
             "b": np.array([[0.6, 0.3, 0.1], [0.2, 0.3, 0.5]]), "y": F.implied_table(g, F.random_params(g, rng))}
    df = simulate(net, probs, 120, seed=7, missing={"a": 0.25, "b": 0.25, "y": 0.2})
    seen = []
    res = em_fit(net, df, max_iter=60, seed=4, tol=0, gtol=0, callback=lambda k, p: seen.append(p))
    assert np.all(np.diff(res.trace) >= -1e-10 * abs(res.trace[-1]))
    assert res.log_likelihood == pytest.approx(brute_force_loglik(net, res.probs, df), abs=1e-9)
    # the table EM uses is the one its parameters imply
    np.testing.assert_allclose(F.implied_table(g, F.from_json(net, g, res.parameters["y"])), res.probs["y"], atol=1e-15)
    # a mid-run iterate too (the callback's tables)
    assert em_fit(net, df, init=seen[5], max_iter=0).log_likelihood == pytest.approx(
        brute_force_loglik(net, seen[5], df), abs=1e-9)


# --------------------------------------------------------------------------- logistic by EM
def test_logistic_em_on_complete_data_equals_statsmodels_mnlogit():
    # statsmodels' MNLogit (dummies with the first level dropped, first outcome the reference)
    # is the same model as a logistic CPT on complete data; its MLE must equal EM's M-step.
    sm = pytest.importorskip("statsmodels.api")
    net = net_with({"states": ["u", "v", "w"], "cpd": "logistic"})
    g = group(net, "y")
    true = np.array([[0.0, 0.3, -0.4], [0.0, 0.8, 0.2], [0.0, -0.5, 0.6], [0.0, 1.0, 1.2]])
    probs = {"a": np.array([0.55, 0.45]), "b": np.array([0.4, 0.35, 0.25]), "y": F.implied_table(g, true)}
    df = simulate(net, probs, 800, seed=21)
    res = em_fit(net, df, tol=1e-14, gtol=1e-11, seed=1)
    assert res.converged
    cats = {c: pd.CategoricalDtype(AB[c]["states"]) for c in ("a", "b")}
    X = pd.get_dummies(df[["a", "b"]].astype(cats), drop_first=True).astype(float)
    assert list(X.columns) == ["a_yes", "b_mid", "b_hi"]
    X.insert(0, "const", 1.0)
    y = df.y.map({"u": 0, "v": 1, "w": 2}).to_numpy()
    fit = sm.MNLogit(y, X).fit(method="newton", maxiter=100, tol=1e-14, disp=False)
    p = res.parameters["y"]
    got = np.array([p["intercept"][1:], p["coefficients"]["a"]["yes"][1:], p["coefficients"]["b"]["mid"][1:],
                    p["coefficients"]["b"]["hi"][1:]])
    np.testing.assert_allclose(got, np.asarray(fit.params), atol=1e-6)
    assert res.log_likelihood == pytest.approx(fit.llf + _marginal_ll(df), abs=1e-6)


def test_logistic_m_step_rises_and_impossible_cells_stay_zero():
    # A logistic node with an impossible cell: the cell is 0 in every iterate (log-softmax over
    # the possible cells), the GEM objective never falls (DLR 1977 §3).
    net = net_with({"states": ["u", "v", "w"], "cpd": "logistic",
                    "impossible": [{"given": {"a": "no", "b": "lo"}, "state": "w"}]})
    g = group(net, "y")
    probs = {"a": np.array([0.5, 0.5]), "b": np.array([0.4, 0.3, 0.3]),
             "y": F.implied_table(g, F.random_params(g, np.random.default_rng(0)))}
    df = simulate(net, probs, 300, seed=3, missing={"a": 0.3, "y": 0.2})
    seen = []
    res = em_fit(net, df, max_iter=40, tol=0, gtol=0, seed=5, callback=lambda k, p: seen.append(p["y"][0, 0, 2]))
    assert all(v == 0.0 for v in seen) and res.probs["y"][0, 0, 2] == 0.0
    assert np.all(np.diff(res.trace) >= -1e-10 * abs(res.trace[-1]))
    assert res.log_likelihood == pytest.approx(brute_force_loglik(net, res.probs, df), abs=1e-9)


# --------------------------------------------------------------------------- ties and impossible cells
def test_tied_tables_equal_the_pooled_counts_closed_form():
    # Complete data: the MLE of one table shared by two families is the pooled relative frequency
    # (N1(x,u) + N2(x,u)) / (N1(u) + N2(u)) (Koller & Friedman 2009, §17.5.3, shared parameters).
    net = parse_network({"nodes": {**AB, "y": {"states": ["s0", "s1", "s2"], "parents": ["a"]},
                                   "y2": {"states": ["s0", "s1", "s2"], "parents": ["a"], "tied_to": "y"}}})
    rng = np.random.default_rng(0)
    df = pd.DataFrame({"a": rng.choice(["no", "yes"], 200), "b": rng.choice(["lo", "mid", "hi"], 200),
                       "y": rng.choice(["s0", "s1", "s2"], 200, p=[0.5, 0.3, 0.2]),
                       "y2": rng.choice(["s0", "s1", "s2"], 200, p=[0.2, 0.3, 0.5])})
    res = em_fit(net, df, seed=1)
    pooled = (pd.crosstab(df.a, df.y) + pd.crosstab(df.a, df.y2)).loc[["no", "yes"], ["s0", "s1", "s2"]].to_numpy(float)
    np.testing.assert_allclose(res.probs["y"], pooled / pooled.sum(axis=1, keepdims=True), atol=1e-14)
    np.testing.assert_array_equal(res.probs["y"], res.probs["y2"])
    # with a prior: pseudo-counts of both members pooled too (the MAP closed form)
    c = {"y": np.ones((2, 3)), "y2": np.full((2, 3), 2.0)}
    res = em_fit(net, df, seed=1, pseudo_counts=c)
    num = pooled + 3.0
    np.testing.assert_allclose(res.probs["y2"], num / num.sum(axis=1, keepdims=True), atol=1e-14)


def test_tied_noisy_or_pools_both_families_with_gaps():
    # Two tied noisy-OR families: the brute-force likelihood of the implied network, EM rising,
    # and the same parameters for both members.
    net = net_with({"states": ["absent", "present"], "cpd": "noisy_or"},
                   {"y2": {"states": ["absent", "present"], "parents": ["a", "b"], "tied_to": "y"}})
    g = group(net, "y")
    t = F.implied_table(g, F.from_json(net, g, TRUE_NOISY_OR))
    df = simulate(net, {"a": np.array([0.6, 0.4]), "b": np.array([0.5, 0.3, 0.2]), "y": t, "y2": t}, 150,
                  seed=9, missing={"a": 0.3, "y": 0.2, "y2": 0.2})
    res = em_fit(net, df, max_iter=80, tol=0, gtol=0, seed=3)
    assert res.parameters["y"] == res.parameters["y2"]
    assert np.all(np.diff(res.trace) >= -1e-10 * abs(res.trace[-1]))
    assert res.log_likelihood == pytest.approx(brute_force_loglik(net, res.probs, df), abs=1e-9)


def test_impossible_cells_stay_exactly_zero_and_rows_renormalise():
    # Complete data: the MLE of a row with cells fixed at 0 is the relative frequency over the
    # possible cells (closed form). With gaps EM keeps the cells at exactly 0 although the data
    # would put mass there without the constraint.
    net = parse_network({"nodes": {**AB, "y": {"states": ["s0", "s1", "s2"], "parents": ["a"],
                                                "impossible": [{"given": {"a": "no"}, "state": "s2"}]}}})
    rng = np.random.default_rng(4)
    a = rng.choice(["no", "yes"], 300)
    y = np.where(a == "no", rng.choice(["s0", "s1"], 300), rng.choice(["s0", "s1", "s2"], 300))
    df = pd.DataFrame({"a": a, "b": rng.choice(["lo", "mid", "hi"], 300), "y": y})
    res = em_fit(net, df, seed=0, pseudo_counts={"y": np.ones((2, 3))})
    tab = pd.crosstab(df.a, df.y).reindex(columns=["s0", "s1", "s2"], fill_value=0).to_numpy(float) + 1.0
    tab[0, 2] = 0.0  # its pseudo-count has nothing to act on
    np.testing.assert_allclose(res.probs["y"], tab / tab.sum(axis=1, keepdims=True), atol=1e-14)
    assert res.probs["y"][0, 2] == 0.0
    gappy = df.copy()
    gappy.loc[rng.random(300) < 0.4, "a"] = None
    res = em_fit(net, gappy, seed=2, max_iter=50, tol=0, gtol=0)
    assert res.probs["y"][0, 2] == 0.0
    np.testing.assert_allclose(res.probs["y"].sum(axis=-1), 1.0, atol=1e-14)
    assert np.all(np.diff(res.trace) >= -1e-10 * abs(res.trace[-1]))


# --------------------------------------------------------------------------- refusals, results
def test_monotone_nodes_and_misshapen_priors_are_refused():
    net = net_with({"states": ["s0", "s1"], "increasing_with": ["b"]})
    df = pd.DataFrame({"a": ["no", "yes"], "b": ["lo", "hi"], "y": ["s0", "s1"]})
    with pytest.raises(NetworkError, match=r"nodes.y.increasing_with: EM cannot estimate"):
        em_fit(net, df)
    net = net_with({"states": ["absent", "present"], "cpd": "noisy_or"})
    df["y"] = ["absent", "present"]
    # noisy nodes take pseudo-counts on their cause rows (leak, a=yes, b=mid, b=hi), not CPT-shaped
    with pytest.raises(PriorError, match=r"pseudo-counts of node 'y' have shape \(2, 3, 2\), expected \(4, 2\)"):
        em_fit(net, df, pseudo_counts={"y": np.ones((2, 3, 2))})
    lnet = net_with({"states": ["s0", "s1"], "cpd": "logistic"})
    ldf = df.assign(y=["s0", "s1"])
    # a logistic node's prior is the precisions of a normal prior on its coefficients, not pseudo-counts
    with pytest.raises(PriorError, match=r"logistic node 'y' has shape \(2, 3, 2\); it takes the precisions"):
        em_fit(lnet, ldf, pseudo_counts={"y": np.ones((2, 3, 2))})
    with pytest.raises(PriorError, match="reference"):  # the first state's column must be 0
        em_fit(lnet, ldf, pseudo_counts={"y": np.ones((4, 2))})
    with pytest.raises(OptionError, match="EM starting parameters of node 'y': leak must be a probability"):
        em_fit(net, df, init_params={"y": {**TRUE_NOISY_OR, "leak": 1.5}})


def test_to_fit_result_carries_the_form_and_its_parameters():
    net = net_with({"states": ["absent", "present"], "cpd": "noisy_or"},
                   {"y2": {"states": ["absent", "present"], "parents": ["a", "b"], "tied_to": "y"}})
    g = group(net, "y")
    t = F.implied_table(g, F.from_json(net, g, TRUE_NOISY_OR))
    df = simulate(net, {"a": np.array([0.6, 0.4]), "b": np.array([0.5, 0.3, 0.2]), "y": t, "y2": t}, 200, seed=2)
    res = em_fit(net, df, seed=0)
    doc = to_fit_result(net, encode_frame(net, df), res).to_dict()
    for name in ("y", "y2"):
        assert doc["nodes"][name]["cpd"] == "noisy_or"
        assert doc["nodes"][name]["parameters"] == res.parameters["y"]
    assert set(doc["nodes"]["y"]["parameters"]["strength"]["b"]) == {"mid", "hi"}
    assert "cpd" not in doc["nodes"]["a"]


# --------------------------------------------------------------------------- the cross-check
def test_crosscheck_of_structured_forms_compares_tables_and_parameters():
    # The cross-check's own logic on a fit known to be at the optimum (EM's own answer, made a
    # result): EM from it stays (DLR 1977, Theorem 1), EM from its own start reaches the same
    # parameters; the gradient norms in the forms' coordinates vanish there.
    from adfit.crosscheck import em_check, format_em_check

    net = net_with({"states": ["absent", "present"], "cpd": "noisy_or"},
                   {"y2": {"states": ["absent", "present"], "parents": ["a", "b"], "tied_to": "y"},
                    "z": {"states": ["u", "v", "w"], "parents": ["a"], "cpd": "logistic"}})
    g = group(net, "y")
    t = F.implied_table(g, F.from_json(net, g, TRUE_NOISY_OR))
    probs = {"a": np.array([0.6, 0.4]), "b": np.array([0.5, 0.3, 0.2]), "y": t, "y2": t,
             "z": np.array([[0.5, 0.3, 0.2], [0.2, 0.3, 0.5]])}
    df = simulate(net, probs, 300, seed=4, missing={"a": 0.2, "y": 0.1})
    coded = encode_frame(net, df)
    em = em_fit(net, coded, tol=1e-14, gtol=1e-11, max_iter=20000, seed=8)
    result = to_fit_result(net, coded, em).with_extras(nodes={})  # parameters read off the tables
    chk = em_check(result, coded, tol=1e-13, gtol=1e-10)
    assert chk["verdict"] == "agree", chk["detail"]
    assert set(chk["parameters"]) == {"y", "z"}
    assert chk["parameters"]["y"]["max_abs_delta"] < 1e-4 and chk["parameters"]["y"]["scale"] == "probability"
    assert chk["parameters"]["z"]["in_verdict"] is False
    assert chk["fit"]["gradient_norm"] < 1e-6 and chk["em_from_fit"]["em_gradient_norm"] < 1e-6
    assert "y (noisy_or) parameters" in format_em_check(chk)
    # a fit that stopped early on the leak: EM from its answer climbs
    p = dict(em.parameters["y"], leak=em.parameters["y"]["leak"] + 0.05)
    early = F.implied_table(g, F.from_json(net, g, p))
    bad = to_fit_result(net, coded, em)
    bad = type(bad)(**{**bad.__dict__, "probs": {**em.probs, "y": early, "y2": early},
                       "log_likelihood": brute_force_loglik(net, {**em.probs, "y": early, "y2": early}, df),
                       "extras": {}})
    assert em_check(bad, coded, max_iter=3000)["verdict"] == "fit-not-at-maximum"


def test_crosscheck_refuses_monotone_nodes_in_one_line():
    from adfit.crosscheck import check_em_coverage

    net = net_with({"states": ["s0", "s1"], "increasing_with": ["b"]})
    with pytest.raises(OptionError, match=r"^nodes.y.increasing_with: the EM cross-check does not cover monotone") as e:
        check_em_coverage(net)
    assert "\n" not in str(e.value)

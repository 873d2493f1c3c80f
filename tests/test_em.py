"""EM reference (adfit.em): published tables, brute-force enumeration, closed forms, EM theory."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings, strategies as st
from scipy.optimize import minimize_scalar
from scipy.special import logsumexp

from adfit.data import HIDDEN, CodedData, encode_frame
from adfit.em import EStep, em_fit, expected_counts, random_start, stationarity_residual
from adfit.errors import ImpossibleDataError, OptionError, PriorError
from adfit.network import Network, Node, network_from_dict

from published import (LINKAGE_EM_ITERATES, LINKAGE_RATE, STOUFFER_TOBY_CLASS_SIZES, STOUFFER_TOBY_DF,
                       STOUFFER_TOBY_G2, STOUFFER_TOBY_P_PLUS, linkage_dlr, linkage_mle,
                       linkage_observed_information, linkage_one_parameter, stouffer_toby)


# ============================================================================ helpers (oracles)
def random_case(seed: int, *, n_nodes: int | None = None, n_rows: int = 40, p_missing: float = 0.3,
                latent: bool = True, fixed: bool = True) -> tuple[Network, CodedData, dict]:
    """A random small network (DAG over node order, <= 2 parents, cards 2-3, some latent and
    some fixed nodes), true CPTs and data sampled from them with cells hidden at random."""
    rng = np.random.default_rng(seed)
    n = n_nodes or int(rng.integers(2, 6))
    cards = rng.integers(2, 4, size=n)
    nodes = []
    latent_at = int(rng.integers(0, n - 1)) if latent and n > 1 and rng.random() < 0.7 else -1
    for i in range(n):
        k = int(rng.integers(0, min(i, 2) + 1))
        parents = tuple(f"v{j}" for j in sorted(rng.choice(i, size=k, replace=False))) if k else ()
        is_latent = i == latent_at
        nodes.append(Node(f"v{i}", tuple(f"s{j}" for j in range(cards[i])), parents, is_latent, None))
    net = Network(tuple(nodes))
    true = {}
    for nd in net.nodes:
        shape = net.cpt_shape(nd.name)
        true[nd.name] = rng.dirichlet(np.ones(shape[-1]) * 1.5, size=int(np.prod(shape[:-1]))).reshape(shape)
    if fixed:
        out = []
        for nd in net.nodes:
            if rng.random() < 0.2:
                nd = Node(nd.name, nd.states, nd.parents, nd.latent, tuple(true[nd.name].ravel()))
            out.append(nd)
        net = Network(tuple(out))
    codes = np.zeros((n_rows, n), dtype=np.int32)
    for i, nd in enumerate(net.nodes):
        pa = [net.index(p) for p in nd.parents]
        tab = true[nd.name].reshape(-1, nd.card)
        flat = np.zeros(n_rows, dtype=np.int64)
        for p in pa:
            flat = flat * net.nodes[p].card + codes[:, p]
        u = rng.random(n_rows)
        codes[:, i] = (u[:, None] > np.cumsum(tab[flat], axis=1)).sum(axis=1).clip(0, nd.card - 1)
    hide = rng.random(codes.shape) < p_missing
    for i, nd in enumerate(net.nodes):
        if nd.latent:
            hide[:, i] = True
    codes[hide] = HIDDEN
    from adfit.data import reduce_rows
    distinct, counts, inverse = reduce_rows(codes, None, net.cards)
    return net, CodedData(distinct, counts, inverse, f"<random {seed}>"), true


def enumerate_counts(net: Network, probs: dict, data: CodedData) -> tuple[dict, float]:
    """Brute force: enumerate every completion of every distinct row (test oracle only)."""
    counts = {m: np.zeros(net.cpt_shape(m)) for m in net.names}
    pa = net.parent_indices
    total = 0.0
    for row, w in zip(data.codes, data.counts):
        hid = [j for j in range(len(net)) if row[j] == HIDDEN]
        joints, fills = [], []
        for vals in itertools.product(*[range(net.cards[j]) for j in hid]):
            x = row.copy()
            x[hid] = vals
            p = 1.0
            for i, m in enumerate(net.names):
                p *= probs[m][tuple(x[list(pa[i])]) + (x[i],)]
            joints.append(p)
            fills.append(x)
        z = sum(joints)
        total += w * math.log(z) if z > 0 else -math.inf
        for p, x in zip(joints, fills):
            for i, m in enumerate(net.names):
                counts[m][tuple(x[list(pa[i])]) + (x[i],)] += w * p / z
    return counts, total


def softmax_rows(logits: np.ndarray) -> np.ndarray:
    e = np.exp(logits - logits.max(axis=-1, keepdims=True))
    return e / e.sum(axis=-1, keepdims=True)


# ============================================================================ published tables
def test_dlr_table1_iterates_and_rate():
    # Dempster, Laird & Rubin (1977), Table 1: EM iterates on the linkage data from π = 0.5
    # (printed to 9 decimals, the last one can be off by one: tolerance 2e-9), and §3: the ratio
    # of successive deviations settles at 0.1328, the fraction of missing information.
    net, df = linkage_dlr()
    data = encode_frame(net, df, count_column="count")
    path: list[float] = []
    res = em_fit(net, data, init={"g": np.full((2, 2), 0.5)}, tol=0.0, gtol=0.0, max_iter=14,
                 callback=lambda k, p: path.append(float(p["g"][1, 0])))
    assert len(path) == 14 and res.iterations == 14 and not res.converged
    np.testing.assert_allclose(path[:8], LINKAGE_EM_ITERATES, rtol=0, atol=2e-9)
    pi = linkage_mle()
    dev = np.array(path) - pi
    ratios = dev[1:] / dev[:-1]
    assert abs(ratios[7] - LINKAGE_RATE) < 5e-5
    assert abs(res.rate - LINKAGE_RATE) < 5e-5  # ratio of successive changes tends to the same
    # closed form of the rate (DLR §3): 1 − I_obs / I_com, with I_com the complete-data
    # information of DLR's complete data, (x2 + x3 + x4 + x5) / (π(1 − π)) at the MLE
    x2 = 125 * (pi / 4) / (0.5 + pi / 4)
    i_com = (x2 + 18 + 20 + 34) / (pi * (1 - pi))
    assert abs(res.rate - (1 - linkage_observed_information(pi) / i_com)) < 1e-6
    # the row g | half = yes does not enter the likelihood: EM leaves it where it started
    np.testing.assert_array_equal(res.probs["g"][0], [0.5, 0.5])
    # the trace is the log-likelihood of each iterate: 125 log(1/2 + π/4) + 38 log((1−π)/4) + 34 log(π/4)
    closed = [125 * math.log(0.5 + p / 4) + 38 * math.log((1 - p) / 4) + 34 * math.log(p / 4)
              for p in [0.5] + path[:-1]]
    np.testing.assert_allclose(res.trace[:14], closed, rtol=1e-13)


def test_linkage_one_parameter_mle_and_rate():
    # Same likelihood, one free parameter: MLE is the root of 197π² − 15π − 68 = 0 (closed form
    # from DLR's likelihood equation); EM rate 1 − I_obs/I_com with I_com = 197/(π(1−π)).
    net, df = linkage_one_parameter()
    assert net.n_free_parameters() == 1
    res = em_fit(net, encode_frame(net, df, count_column="count"), init={"g": np.array([0.5, 0.5])})
    pi = linkage_mle()
    assert res.converged
    assert abs(res.probs["g"][0] - pi) < 1e-8
    expected_rate = 1 - linkage_observed_information(pi) / (197 / (pi * (1 - pi)))
    assert abs(res.rate - expected_rate) < 1e-6
    assert res.stationarity <= 1e-9 * 197


def test_linkage_map_matches_scipy_on_closed_form():
    # MAP with pseudo-counts c = (3, 1) on (g = yes, g = no): maximise the closed-form
    # 125 log(2+π) + 38 log(1−π) + 34 log π + 3 log π + 1 log(1−π) with scipy (bounded Brent).
    net, df = linkage_one_parameter()
    c = np.array([3.0, 1.0])
    res = em_fit(net, encode_frame(net, df, count_column="count"), pseudo_counts={"g": c})
    f = lambda p: -(125 * np.log(2 + p) + 39 * np.log(1 - p) + 37 * np.log(p))  # noqa: E731
    opt = minimize_scalar(f, bounds=(1e-6, 1 - 1e-6), method="bounded", options={"xatol": 1e-12})
    assert res.objective == "map" and res.converged
    assert abs(res.probs["g"][0] - opt.x) < 1e-7
    assert res.log_prior == pytest.approx(3 * math.log(res.probs["g"][0]) + math.log(res.probs["g"][1]), rel=1e-12)


def _align_two_classes(est_sizes, est_p, ref_sizes, ref_p):
    best = None
    for perm in itertools.permutations(range(len(ref_sizes))):
        err = max(max(abs(est_sizes[perm[k]] - ref_sizes[k]) for k in range(len(ref_sizes))),
                  np.max(np.abs(np.asarray(est_p)[list(perm)] - np.asarray(ref_p))))
        best = err if best is None else min(best, err)
    return best


def test_stouffer_toby_latent_class():
    # Goodman (1974, Biometrika) two-class model of the Stouffer-Toby role-conflict data
    # (values from memory, printed to 3 decimals: tolerance 6e-4, up to relabelling of the classes).
    net, df = stouffer_toby()
    data = encode_frame(net, df, count_column="count")
    assert data.n_rows == 216
    fits = [em_fit(net, data, seed=s) for s in range(3)]
    best = max(fits, key=lambda r: r.log_likelihood)
    assert best.converged
    sizes = best.probs["cls"]
    p_plus = np.array([[best.probs[f"item{j + 1}"][k, 0] for j in range(4)] for k in range(2)])
    assert _align_two_classes(sizes, p_plus, STOUFFER_TOBY_CLASS_SIZES, STOUFFER_TOBY_P_PLUS) < 6e-4
    # G² = 2 Σ n log(n / μ̂) with μ̂ = 216 · P(pattern), on 15 − 9 = 6 degrees of freedom
    obs = df["count"].to_numpy(float)
    mu = np.empty(16)
    for k, row in df.iterrows():
        lp = [math.log(sizes[c]) + sum(math.log(best.probs[it][c, 0 if row[it] == "+" else 1])
                                       for it in ("item1", "item2", "item3", "item4")) for c in range(2)]
        mu[k] = 216 * math.exp(logsumexp(lp))
    g2 = 2 * np.sum(obs * np.log(obs / mu))
    assert abs(g2 - STOUFFER_TOBY_G2) < 0.006
    assert 15 - net.n_free_parameters() == STOUFFER_TOBY_DF
    # the log-likelihood EM reports is the same multinomial sum
    assert best.log_likelihood == pytest.approx(float(np.sum(obs * np.log(mu / 216))), rel=1e-12)


# ============================================================================ exact inference
GROUPINGS = {  # how EStep groups the rows: (ENUM_MAX, MIN_GROUP_ROWS, POOL_MAX_WIDTH, CHUNK_ENTRIES)
    "pooled": (0, 10 ** 9, 10 ** 9, 1 << 22),   # every row in one group with evidence indicators
    "per-pattern": (0, 1, 10 ** 9, 1 << 22),    # one junction tree per missingness pattern
    "pool-refused": (0, 10 ** 9, 1, 1 << 22),   # pooling refused (too wide): one tree per pattern
    "chunked": (0, 10 ** 9, 10 ** 9, 60),       # one pooled group split in chunks of a few rows
    "enumerated": (10 ** 9, 16, 1 << 12, 1 << 22),  # every row by enumeration, hidden leaves summed out
    "default": (None, None, None, None),         # the module's own: cheap rows enumerated, the rest trees
}


@pytest.mark.parametrize("grouping", list(GROUPINGS))
@pytest.mark.parametrize("seed", range(12))
def test_expected_counts_match_enumeration(seed, grouping, monkeypatch):
    # brute-force enumeration of every completion of every row (an oracle independent of the
    # junction tree and of the E-step's own enumeration: no hidden leaf summed out, plain loops),
    # at random CPTs, under every way of splitting and grouping the rows
    import adfit.em as em_mod

    for attr, val in zip(("ENUM_MAX", "MIN_GROUP_ROWS", "POOL_MAX_WIDTH", "CHUNK_ENTRIES"), GROUPINGS[grouping]):
        if val is not None:
            monkeypatch.setattr(em_mod, attr, val)
    net, data, _ = random_case(seed, p_missing=0.4)
    probs = random_start(net, seed + 100)
    counts, ll = expected_counts(net, probs, data)
    ref_counts, ref_ll = enumerate_counts(net, probs, data)
    assert ll == pytest.approx(ref_ll, rel=1e-12)
    for m in net.names:
        np.testing.assert_allclose(counts[m], ref_counts[m], rtol=1e-10, atol=1e-12)
    # each family's counts add up to the number of records
    for m in net.names:
        assert counts[m].sum() == pytest.approx(data.n_rows, rel=1e-12)


def test_expected_counts_wide_treewidth_matches_enumeration():
    # a hidden node with many hidden parents and children (clusters of 4-5 nodes), all hidden
    # in some rows; brute-force enumeration as the oracle
    net = network_from_dict({
        "a": {"states": ["0", "1"]}, "b": {"states": ["0", "1", "2"], "parents": ["a"]},
        "c": {"states": ["0", "1"], "parents": ["a", "b"]}, "d": {"states": ["0", "1"], "parents": ["b", "c"]},
        "h": {"states": ["0", "1"], "parents": ["a", "d"], "latent": True},
        "e": {"states": ["0", "1", "2"], "parents": ["h", "c"]}, "f": {"states": ["0", "1"], "parents": ["h", "e"]},
    })
    rng = np.random.default_rng(5)
    codes = np.column_stack([rng.integers(0, c, size=30) for c in net.cards]).astype(np.int32)
    codes[rng.random(codes.shape) < 0.5] = HIDDEN
    codes[:, net.index("h")] = HIDDEN
    codes[0, :] = HIDDEN
    from adfit.data import reduce_rows
    d, w, inv = reduce_rows(codes, rng.random(30) + 0.5, net.cards)
    data = CodedData(d, w, None)
    probs = random_start(net, 3)
    counts, ll = expected_counts(net, probs, data)
    ref_counts, ref_ll = enumerate_counts(net, probs, data)
    assert ll == pytest.approx(ref_ll, rel=1e-12)
    for m in net.names:
        np.testing.assert_allclose(counts[m], ref_counts[m], rtol=1e-10, atol=1e-12)


@pytest.mark.parametrize("seed", range(8))
def test_enumerated_rows_equal_the_junction_trees(seed, monkeypatch):
    # the E-step's two routes on the same rows: every row by enumeration of its hidden
    # assignments (hidden leaves summed out, all rows in one set of array operations) against
    # every row by the junction trees (ENUM_MAX = 0, the route used before enumeration), and a
    # split of the rows between both; each also against the brute-force oracle, to 1e-12
    import adfit.em as em_mod

    net, data, _ = random_case(seed, n_nodes=5, n_rows=120, p_missing=0.45)
    probs = random_start(net, seed + 7)
    got = {}
    for emax in (0, 10 ** 9, 4):
        monkeypatch.setattr(em_mod, "ENUM_MAX", emax)
        es = EStep(net, data)
        n_enum = 0 if es.enumerated is None else es.enumerated.rows.size
        if emax == 0:
            assert n_enum == 0 and es.patterns
        elif emax > 10 ** 6:
            assert n_enum == data.n_distinct and not es.patterns
        else:
            assert n_enum > 0  # (and in most seeds some rows go to the trees)
        got[emax] = es(probs)
    ref_counts, ref_ll = enumerate_counts(net, probs, data)
    for counts, row_ll in got.values():
        assert float(np.sum(row_ll * data.counts)) == pytest.approx(ref_ll, rel=1e-12)
        np.testing.assert_allclose(row_ll, got[0][1], rtol=1e-12, atol=1e-12)
        for m in net.names:
            np.testing.assert_allclose(counts[m], got[0][0][m], rtol=1e-12, atol=1e-12)
            np.testing.assert_allclose(counts[m], ref_counts[m], rtol=1e-12, atol=1e-11)


def test_hidden_leaf_counts_closed_form():
    # a -> b, b a leaf hidden in every row: it sums out to 1, so the log-likelihood is that of a
    # alone, and b's expected counts are θ(b | a) times the count of each a (closed form)
    net = network_from_dict({"a": {"states": ["0", "1", "2"]}, "b": {"states": ["0", "1"], "parents": ["a"]}})
    codes = np.array([[0, HIDDEN], [1, HIDDEN], [2, HIDDEN], [HIDDEN, HIDDEN]], dtype=np.int32)
    w = np.array([3.0, 5.0, 2.0, 4.0])
    probs = {"a": np.array([0.2, 0.5, 0.3]), "b": np.array([[0.9, 0.1], [0.4, 0.6], [0.25, 0.75]])}
    es = EStep(net, CodedData(codes, w, None))
    assert es.enumerated is not None and es.enumerated.rows.size == 4 and not es.patterns
    counts, row_ll = es(probs)
    np.testing.assert_allclose(row_ll, np.log([0.2, 0.5, 0.3, 1.0]), rtol=1e-15, atol=1e-15)
    n_a = np.array([3.0, 5.0, 2.0]) + 4.0 * probs["a"]
    np.testing.assert_allclose(counts["a"], n_a, rtol=1e-15)
    np.testing.assert_allclose(counts["b"], n_a[:, None] * probs["b"], rtol=1e-15)


@pytest.mark.parametrize("route", [0, 10 ** 9])
def test_em_objective_never_falls(route, monkeypatch):
    # EM's monotonicity (Dempster, Laird & Rubin 1977, Theorem 1): the objective at successive
    # iterates never falls, by either E-step route, on a latent class model from random starts
    # and on random networks with gaps; MAP too (the prior's term is part of the objective)
    import adfit.em as em_mod

    monkeypatch.setattr(em_mod, "ENUM_MAX", route)
    net, df = stouffer_toby()
    data = encode_frame(net, df, count_column="count")
    cases = [(net, data, None)] + [random_case(s, n_nodes=5, n_rows=80, p_missing=0.4)[:2] + (None,)
                                   for s in range(3)]
    cases.append((net, data, {m: np.full(net.cpt_shape(m), 0.5) for m in net.free_names}))
    for net_, data_, prior in cases:
        for seed in range(2):
            res = em_fit(net_, data_, seed=seed, max_iter=60, pseudo_counts=prior)
            tr = np.array(res.trace)
            assert np.all(np.diff(tr) >= -1e-11 * np.maximum(1.0, np.abs(tr[1:])))


def test_accelerated_em_reaches_the_published_optimum_monotonely():
    # SQUAREM (Varadhan & Roland 2008) on Goodman's (1974) two-class model of the Stouffer-Toby
    # data (published values from memory, 3 decimals, as in test_stouffer_toby_latent_class):
    # the same optimum as plain EM from the same start, the objective never falls, fewer E-steps
    net, df = stouffer_toby()
    data = encode_frame(net, df, count_column="count")
    for seed in range(3):
        plain = em_fit(net, data, seed=seed)
        fast = em_fit(net, data, seed=seed, accelerate=True)
        assert plain.converged and fast.converged
        assert fast.objective_value == pytest.approx(plain.objective_value, rel=1e-12, abs=1e-9)
        for m in net.free_names:
            np.testing.assert_allclose(fast.probs[m], plain.probs[m], atol=1e-6)
        tr = np.array(fast.trace)
        assert np.all(np.diff(tr) >= -1e-12 * np.abs(tr[1:]))
        assert fast.iterations < plain.iterations / 2 and math.isnan(fast.rate)
        assert fast.stationarity <= 1e-9 * 216
    p_plus = np.array([[fast.probs[f"item{j + 1}"][k, 0] for j in range(4)] for k in range(2)])
    assert _align_two_classes(fast.probs["cls"], p_plus, STOUFFER_TOBY_CLASS_SIZES, STOUFFER_TOBY_P_PLUS) < 6e-4


@pytest.mark.parametrize("seed", range(4))
def test_accelerated_em_is_monotone_and_stays_at_a_fixed_point(seed):
    # on random networks with gaps (and the three-class Stouffer-Toby model, where plain EM
    # crawls at rate ~0.999): the objective never falls under extrapolation; started at plain
    # EM's converged answer (a fixed point), accelerated EM does not move from it
    if seed == 3:
        net, df = stouffer_toby(3)
        data = encode_frame(net, df, count_column="count")
    else:
        net, data, _ = random_case(seed, n_nodes=5, n_rows=200, p_missing=0.4)
    fast = em_fit(net, data, seed=seed, accelerate=True, max_iter=20000)
    tr = np.array(fast.trace)
    assert fast.converged and np.all(np.diff(tr) >= -1e-12 * np.abs(tr[1:]))
    plain = em_fit(net, data, seed=seed, max_iter=20000)
    assert plain.converged and fast.iterations < plain.iterations
    again = em_fit(net, data, init=plain.probs, accelerate=True, max_iter=50)
    assert again.converged and again.objective_value >= plain.objective_value - 1e-9
    # (three classes on four items lie on a flat ridge, docs/performance.md: EM's stopping rule
    # there leaves the parameters free to about 1e-6 along it)
    for m in net.free_names:
        np.testing.assert_allclose(again.probs[m], plain.probs[m], atol=1e-5 if seed == 3 else 1e-7)


def test_accelerated_em_cap_counts_e_steps():
    net, df = stouffer_toby(3)
    data = encode_frame(net, df, count_column="count")
    seen = []
    res = em_fit(net, data, seed=0, accelerate=True, max_iter=7, callback=lambda k, p: seen.append(k))
    assert not res.converged and res.iterations == 7 and seen and max(seen) <= 7


def test_no_underflow_on_long_rows():
    # 1200 binary items under one latent class: each row's probability is far below the
    # smallest float64 (about 2^-1200), so messages must be rescaled; closed form by logsumexp
    k = 1200
    nodes = {"cls": {"states": ["a", "b"], "latent": True}}
    nodes |= {f"x{j}": {"states": ["0", "1"], "parents": ["cls"]} for j in range(k)}
    net = network_from_dict(nodes)
    rng = np.random.default_rng(0)
    x = rng.integers(0, 2, size=(3, k)).astype(np.int32)
    codes = np.column_stack([np.full(3, HIDDEN), x]).astype(np.int32)
    data = CodedData(codes, np.ones(3), None)
    probs = random_start(net, 1)
    counts, ll = expected_counts(net, probs, data)
    th = np.array([probs[f"x{j}"] for j in range(k)])  # (k, 2 classes, 2 states)
    lp = np.log(probs["cls"])[None, :] + np.stack(
        [np.log(th[np.arange(k), c, x]).sum(axis=1) for c in range(2)], axis=1)
    assert np.isfinite(ll) and ll < -700
    assert ll == pytest.approx(float(logsumexp(lp, axis=1).sum()), rel=1e-12)
    post = np.exp(lp - logsumexp(lp, axis=1, keepdims=True)).sum(axis=0)
    np.testing.assert_allclose(counts["cls"], post, rtol=1e-10)


@pytest.mark.parametrize("seed", range(6))
def test_fisher_identity_against_finite_differences(seed):
    # Fisher's identity (Dempster, Laird & Rubin 1977, eq. 2.13): the gradient of the marginal
    # log-likelihood w.r.t. the logits is N̂(x,u) − θ(x|u) N̂(u); checked by central differences
    # of the log-likelihood (this module's own value) in the logits
    net, data, _ = random_case(seed, n_nodes=4)
    probs = random_start(net, seed + 7)
    counts, ll0 = expected_counts(net, probs, data)
    h = 1e-5
    for m in net.free_names:
        logits = np.log(probs[m])
        grad = counts[m] - probs[m] * counts[m].sum(axis=-1, keepdims=True)
        for idx in itertools.islice(np.ndindex(*logits.shape), 6):
            vals = []
            for s in (+1, -1):
                lg = logits.copy()
                lg[idx] += s * h
                vals.append(expected_counts(net, {**probs, m: softmax_rows(lg)}, data)[1])
            fd = (vals[0] - vals[1]) / (2 * h)
            assert fd == pytest.approx(grad[idx], abs=1e-6 * max(1.0, data.n_rows))


# ============================================================================ EM behaviour
def _complete_frame_case():
    net = network_from_dict({"a": {"states": ["x", "y", "z"]}, "b": {"states": ["p", "q"], "parents": ["a"]}})
    df = pd.DataFrame({"a": ["x", "x", "y", "x", "y", "y", "x"], "b": ["p", "q", "q", "p", "q", "q", "p"]})
    return net, df


def test_complete_data_closed_forms_and_uninformed_rows():
    # complete data: MLE = relative frequencies, MAP = (n + c)/(n_u + c_u) (counted with pandas);
    # a = "z" never occurs: that row of b keeps its start value and is reported as uninformed
    net, df = _complete_frame_case()
    data = encode_frame(net, df)
    init = {"a": np.full(3, 1 / 3), "b": np.array([[0.5, 0.5], [0.5, 0.5], [0.2, 0.8]])}
    res = em_fit(net, data, init=init)
    freq_a = df["a"].value_counts(normalize=True).reindex(["x", "y", "z"], fill_value=0).to_numpy()
    tab = pd.crosstab(df["a"], df["b"]).reindex(index=["x", "y", "z"], columns=["p", "q"], fill_value=0).to_numpy(float)
    np.testing.assert_allclose(res.probs["a"], freq_a, atol=1e-15)
    np.testing.assert_allclose(res.probs["b"][:2], tab[:2] / tab[:2].sum(axis=1, keepdims=True), atol=1e-15)
    np.testing.assert_array_equal(res.probs["b"][2], [0.2, 0.8])
    assert res.uninformed == {"b": [2]}
    assert res.converged and res.iterations == 2  # one step reaches it, the next confirms
    c = {"a": np.array([1.0, 2.0, 0.5]), "b": np.array([[1.0, 0.0], [0.5, 0.5], [2.0, 3.0]])}
    res = em_fit(net, data, init=init, pseudo_counts=c)
    np.testing.assert_allclose(res.probs["a"], (tab.sum(axis=1) + c["a"]) / (7 + 3.5), atol=1e-15)
    np.testing.assert_allclose(res.probs["b"], (tab + c["b"]) / (tab + c["b"]).sum(axis=1, keepdims=True), atol=1e-15)
    assert res.uninformed == {"b": [2]}  # still not informed by the data (the prior sets it)


def test_fixed_cpts_stay_fixed_and_latent_nodes():
    net, data, _ = random_case(18, n_nodes=5)  # latent v1 (with a parent), fixed v2 and v3
    assert net.fixed_names and net.latent_names
    res = em_fit(net, data, seed=1, max_iter=50)
    for m in net.fixed_names:
        np.testing.assert_array_equal(res.probs[m], net.fixed_table(m))
    for m in net.free_names:
        np.testing.assert_allclose(res.probs[m].sum(axis=-1), 1.0, atol=1e-12)


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 10_000), map_=st.booleans(), p_missing=st.floats(0.0, 0.7))
def test_em_never_decreases_objective(seed, map_, p_missing):
    # Dempster, Laird & Rubin (1977), Theorem 1: each EM step does not decrease the likelihood
    # (the log-posterior under MAP); random networks with random gaps and random starts
    net, data, _ = random_case(seed, p_missing=p_missing)
    pc = {m: np.full(net.cpt_shape(m), 0.5) for m in net.free_names} if map_ else None
    res = em_fit(net, data, seed=seed, pseudo_counts=pc, max_iter=25, tol=0.0, gtol=0.0)
    tr = np.array(res.trace)
    assert np.all(np.diff(tr) >= -1e-10 * np.abs(tr[1:]).max())
    # the trace is the objective at each iterate: recompute the last one independently
    _, ll = enumerate_counts(net, res.probs, data)
    assert res.log_likelihood == pytest.approx(ll, rel=1e-10)


def test_em_stationary_point_and_residual():
    # at convergence the Fisher-identity residual is small and EM's own counts reproduce it
    net, data, _ = random_case(11, n_nodes=4, n_rows=80, latent=False)
    res = em_fit(net, data, seed=0, max_iter=20000)
    assert res.converged
    counts, ll = expected_counts(net, res.probs, data)
    assert ll == pytest.approx(res.log_likelihood, rel=1e-14)
    assert stationarity_residual(net, counts, res.probs) == pytest.approx(res.stationarity, rel=1e-9, abs=1e-15)
    assert res.stationarity <= 1e-9 * data.n_rows
    assert 0 <= res.rate < 1 or math.isnan(res.rate)


def test_start_from_optimum_stays():
    net, df = linkage_one_parameter()
    data = encode_frame(net, df, count_column="count")
    pi = linkage_mle()
    res = em_fit(net, data, init={"g": np.array([pi, 1 - pi])})
    assert res.converged and res.iterations <= 3
    assert abs(res.probs["g"][0] - pi) < 1e-12


# ============================================================================ bad inputs
def test_impossible_rows_are_named():
    # a fixed CPT with P(a = y) = 0 makes the record (a=y, b=p) impossible: the error names it
    net = network_from_dict({"a": {"states": ["x", "y"], "fixed": [1.0, 0.0]},
                             "b": {"states": ["p", "q"], "parents": ["a"]}})
    df = pd.DataFrame({"a": ["x", "x", "y", "x"], "b": ["p", "q", "p", ""]})
    with pytest.raises(ImpossibleDataError, match=r"row 3 \(a=y, b=p\)"):
        em_fit(net, encode_frame(net, df))
    counts, ll = expected_counts(net, {"b": np.full((2, 2), 0.5)}, encode_frame(net, df))
    assert ll == -math.inf
    assert counts["a"].sum() == pytest.approx(3.0)  # the impossible record contributes nothing


def test_bad_starts_and_pseudo_counts():
    net, df = _complete_frame_case()
    data = encode_frame(net, df)
    with pytest.raises(OptionError, match="'b'.*shape"):
        em_fit(net, data, init={"a": np.full(3, 1 / 3), "b": np.full((2, 2), 0.5)})
    with pytest.raises(OptionError, match="free node 'b'"):
        em_fit(net, data, init={"a": np.full(3, 1 / 3)})
    with pytest.raises(OptionError, match="row 1"):
        em_fit(net, data, init={"a": np.array([0.5, 0.5, 0.5]), "b": np.full((3, 2), 0.5)})
    with pytest.raises(PriorError, match=">= 0"):
        em_fit(net, data, pseudo_counts={"b": -np.ones((3, 2))})
    with pytest.raises(PriorError, match="unknown node"):
        em_fit(net, data, pseudo_counts={"zz": np.ones(2)})
    with pytest.raises(OptionError):
        em_fit(net, data, tol=-1.0)


def test_estep_reuse_is_pure():
    # the plan is built once; calling it twice at the same CPTs gives identical numbers
    net, data, _ = random_case(4)
    es = EStep(net, data)
    p = random_start(net, 2)
    c1, l1 = es(p)
    c2, l2 = es(p)
    np.testing.assert_array_equal(l1, l2)
    for m in net.names:
        np.testing.assert_array_equal(c1[m], c2[m])


# ============================================================================ command line
def test_cli_em_writes_result_and_fails_in_one_line(tmp_path):
    import json

    from typer.testing import CliRunner

    from adfit.cli import app

    net, df = stouffer_toby()
    csv = tmp_path / "st.csv"
    df.to_csv(csv, index=False)
    toml = tmp_path / "st.toml"
    toml.write_text('[nodes.cls]\nstates = ["k1", "k2"]\nlatent = true\n'
                    + "".join(f'[nodes.item{j}]\nstates = ["+", "-"]\nparents = ["cls"]\n' for j in range(1, 5)))
    out = tmp_path / "em.json"
    runner = CliRunner()
    r = runner.invoke(app, ["em", str(toml), str(csv), "--count-column", "count", "--out", str(out), "--seed", "1"])
    assert r.exit_code == 0, r.output
    doc = json.loads(out.read_text())
    assert doc["method"] == "em" and doc["format"] == "adfit-result/1" and doc["converged"]
    ref = em_fit(net, encode_frame(net, df, count_column="count"), seed=1)
    assert doc["log_likelihood"] == pytest.approx(ref.log_likelihood, rel=1e-14)
    assert "rate of convergence 0.90" in r.output  # Stouffer-Toby: about 0.905 (this EM)
    # starting from that result, EM stays
    again = tmp_path / "em2.json"  # (the start file itself is an input: never overwritten)
    r = runner.invoke(app, ["em", str(toml), str(csv), "--count-column", "count", "--out", str(again),
                            "--init", str(out)])
    assert r.exit_code == 0 and json.loads(again.read_text())["iterations"] <= 3
    # a bad input: one line on stderr, exit code 1, no file written
    bad = tmp_path / "bad.json"
    r = runner.invoke(app, ["em", str(toml), str(csv), "--out", str(bad)])
    assert r.exit_code == 1 and not bad.exists()
    assert r.output.count("\n") == 1 and "count" in r.output

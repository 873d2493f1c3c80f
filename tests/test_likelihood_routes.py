"""The routes of the likelihood core (observed families, enumerated components, elimination
tapes, uniform evidence) against brute-force enumeration: values, expected counts (barren and
latent families included), forward-mode derivatives, underflow and impossible rows."""

from __future__ import annotations

import itertools
import math

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import adfit.likelihood as lk
from adfit.data import HIDDEN, CodedData
from adfit.likelihood import Likelihood, build_plan, logcpts_from_probs
from adfit.network import network_from_dict
from published import STOUFFER_TOBY_COUNTS, STOUFFER_TOBY_ITEMS
from randomnets import random_network, random_probs, random_rows


def oracle(net, probs, data):
    """Brute force: every completion of every row; row log-likelihoods and expected family counts
    N(x, u) = sum_rows w P(x, u | row) (Dempster, Laird & Rubin 1977: the E-step)."""
    fams = [tuple(net.index(p) for p in node.parents) + (i,) for i, node in enumerate(net.nodes)]
    counts = {n: np.zeros(net.cpt_shape(n)) for n in net.names}
    ll = np.empty(len(data.codes))
    for r, (row, w) in enumerate(zip(data.codes, data.counts)):
        hid = [i for i, c in enumerate(row) if c < 0]
        joint = []
        for ass in itertools.product(*[range(net.cards[i]) for i in hid]):
            x = np.array(row)
            x[hid] = ass
            p = math.prod(probs[node.name][tuple(x[list(fams[i])])] for i, node in enumerate(net.nodes))
            joint.append((x, p))
        tot = sum(p for _, p in joint)
        ll[r] = math.log(tot) if tot > 0 else -math.inf
        for x, p in joint:
            for i, node in enumerate(net.nodes):
                counts[node.name][tuple(x[list(fams[i])])] += w * p / tot
    return ll, counts


def check_against_oracle(net, probs, data, **kw):
    ll_ref, n_ref = oracle(net, probs, data)
    lik = Likelihood(net, data, **kw)
    np.testing.assert_allclose(lik.row_logliks(probs), ll_ref, rtol=0, atol=1e-11)
    val, counts = lik.expected_counts(probs)
    assert val == pytest.approx(float(ll_ref @ data.counts), rel=1e-12)
    for name in net.names:
        np.testing.assert_allclose(counts[name], n_ref[name], rtol=1e-9, atol=1e-9)
    return lik


@pytest.mark.parametrize("seed", range(3))
def test_every_route_gives_enumeration_values_and_expected_counts(seed):
    # Expected counts include families of barren nodes (hidden with no observed descendant) and
    # of latent nodes: the brute-force posterior puts mass there even though they sum out to 1.
    rng = np.random.default_rng(100 + seed)
    net = random_network(rng, 7, p_latent=0.2, p_edge=0.5)
    probs = random_probs(net, rng)
    data = random_rows(net, rng, 90, p_missing=0.45)
    routes = set()
    for route in ("auto", "pattern", "uniform"):
        routes.add(check_against_oracle(net, probs, data, route=route).plan.route)
    assert {"per-pattern", "uniform evidence"} <= routes


def test_components_by_elimination_tape_and_hybrid(monkeypatch):
    # Make enumeration look expensive so that components go to elimination programs of their
    # own (route "pattern") and to the uniform program for whole rows (hybrid): every kind of
    # block is then checked against the oracle.
    rng = np.random.default_rng(7)
    net = random_network(rng, 7, p_latent=0.3, p_edge=0.5)
    probs = random_probs(net, rng)
    data = random_rows(net, rng, 80, p_missing=0.5)
    monkeypatch.setattr(lk, "ENUM_ALWAYS", 1)
    monkeypatch.setattr(lk, "T_ENUM", 1.0)
    lik = check_against_oracle(net, probs, data, route="pattern")
    assert any(isinstance(g, lk.TapeBlock) and g.kind == "pattern" for g in lik.plan.groups)
    # whole rows in the uniform program beside per-pattern blocks: tapes look cheap per row and
    # the uniform program cheap to compile, component programs dear to compile
    monkeypatch.setattr(lk, "ENUM_ALWAYS", 8)
    monkeypatch.setattr(lk, "MAX_PATTERN_GROUPS", 0)
    lik = check_against_oracle(net, probs, data, route="auto")
    assert lik.plan.route in ("hybrid (per-pattern + uniform evidence)", "uniform evidence")


def test_barren_latent_row_keeps_its_expected_count():
    # A latent node whose children are all missing for one parent state: P(cls | group = a1)
    # leaves the likelihood unchanged, but the E-step count of that row is 25 * theta (the
    # posterior equals the prior), which EM and the identifiability checks rely on.
    net = network_from_dict({"group": {"states": ["a0", "a1"]},
                             "cls": {"states": ["k1", "k2"], "parents": ["group"], "latent": True},
                             "item": {"states": ["+", "-"], "parents": ["cls"]}})
    codes = np.array([[0, HIDDEN, 0], [0, HIDDEN, 1], [1, HIDDEN, HIDDEN]], np.int32)
    data = CodedData(codes, np.array([10.0, 5.0, 25.0]))
    probs = {"group": np.array([0.4, 0.6]), "cls": np.array([[0.3, 0.7], [0.8, 0.2]]),
             "item": np.array([[0.9, 0.1], [0.2, 0.8]])}
    lik = check_against_oracle(net, probs, data)
    _, counts = lik.expected_counts(probs)
    np.testing.assert_allclose(counts["cls"][1], 25 * probs["cls"][1], rtol=1e-12)
    plan = build_plan(net, data)
    assert plan.groups[0].n_pruned == 2  # cls and item are barren in the third row


def test_duplicate_components_are_merged_with_summed_weights():
    # Rows that differ only far from a hidden cell share its component: one distinct instance.
    net = network_from_dict({"a": {"states": ["0", "1"]}, "b": {"states": ["0", "1"], "parents": ["a"]},
                             "c": {"states": ["0", "1", "2"], "parents": ["b"]}, "d": {"states": ["0", "1"]}})
    codes = np.array([[0, HIDDEN, 2, 0], [0, HIDDEN, 2, 1], [1, HIDDEN, 0, 1]], np.int32)
    data = CodedData(codes, np.array([2.0, 3.0, 1.0]))
    probs = random_probs(net, np.random.default_rng(3))
    lik = check_against_oracle(net, probs, data)
    enum = [g for g in lik.plan.groups if isinstance(g, lk.EnumBlock)]
    assert sum(g.n_components for g in enum) == 3 and sum(g.n_instances for g in enum) == 2


def test_long_hidden_chain_on_the_tape_does_not_underflow():
    # A 240-node binary chain, every node latent except every 30th, which is observed in a state
    # of probability 1e-45: P(row) < 1e-315, below the float64 range. The hidden stretches
    # are components of 29 nodes (2**29 assignments: not enumerable) that go to the elimination
    # tape. Oracle: the forward recursion in log space (scipy's logsumexp), the standard
    # hidden-Markov computation.
    from scipy.special import logsumexp
    n = 240
    d = {"n000": {"states": ["a", "b"]}}
    for i in range(1, n):
        d[f"n{i:03d}"] = {"states": ["a", "b"], "parents": [f"n{i - 1:03d}"], "latent": i % 30 != 0}
    net = network_from_dict(d)
    rng = np.random.default_rng(4)
    probs = {"n000": np.array([0.5, 0.5])}
    for i in range(1, n):
        if i % 30:
            probs[f"n{i:03d}"] = rng.dirichlet(np.ones(2), size=2)
        else:
            probs[f"n{i:03d}"] = np.array([[1 - 1e-45, 1e-45], [1 - 1e-45, 1e-45]])
    row = np.array([1 if i % 30 == 0 else HIDDEN for i in range(n)], dtype=np.int32)
    lik = Likelihood(net, CodedData(row[None, :], np.ones(1)))
    assert any(isinstance(g, lk.TapeBlock) for g in lik.plan.groups)
    got = lik.row_logliks(probs)[0]
    alpha = np.log(probs["n000"]) + np.log(np.array([1e-300, 1.0]))  # n000 observed = b
    alpha[0] = -np.inf
    for i in range(1, n):
        alpha = logsumexp(alpha[:, None] + np.log(probs[f"n{i:03d}"]), axis=0)
        if row[i] >= 0:
            alpha = np.array([-np.inf, alpha[1]])
    expect = logsumexp(alpha)
    assert expect < -708  # exp(expect) is not representable in float64
    assert got == pytest.approx(expect, rel=1e-12)
    val, _ = lik.expected_counts(probs)
    assert val == pytest.approx(expect, rel=1e-12)


def test_forward_mode_and_reverse_mode_agree_with_finite_differences():
    # _loglik_logcpt is differentiated in both modes by the error-bar code (Hessian-vector
    # products as jvp of grad); check a directional derivative both ways, and the Hessian-vector
    # product against central differences of the gradient, on a plan with every block kind.
    rng = np.random.default_rng(21)
    net = random_network(rng, 6, p_latent=0.3, p_edge=0.5)
    probs = random_probs(net, rng)
    data = random_rows(net, rng, 60, p_missing=0.5)
    lik = Likelihood(net, data, route="pattern")
    lc = tuple(jnp.asarray(x) for x in logcpts_from_probs(net, probs))
    free = [i for i, node in enumerate(net.nodes)]
    eta = tuple(jnp.log(jnp.asarray(probs[n])) for n in net.names)

    def f(eta):
        lcs = tuple(jax.nn.log_softmax(e, axis=-1) for e in eta)
        return lk._loglik_logcpt(net, lik.plan.groups, lcs, lik._codes, lik._weights)

    v = tuple(jnp.asarray(rng.normal(size=x.shape)) for x in eta)
    _, d_fwd = jax.jvp(f, (eta,), (v,))
    g = jax.grad(f)(eta)
    d_rev = sum(float(jnp.vdot(a, b)) for a, b in zip(g, v))
    eps = 1e-6
    fd = (float(f(tuple(a + eps * b for a, b in zip(eta, v)))) - float(f(tuple(a - eps * b for a, b in zip(eta, v))))) / (2 * eps)
    assert float(d_fwd) == pytest.approx(fd, rel=1e-6, abs=1e-6)
    assert d_rev == pytest.approx(fd, rel=1e-6, abs=1e-6)
    _, hv = jax.jvp(jax.grad(f), (eta,), (v,))
    gp = jax.grad(f)(tuple(a + eps * b for a, b in zip(eta, v)))
    gm = jax.grad(f)(tuple(a - eps * b for a, b in zip(eta, v)))
    for h, a, b in zip(hv, gp, gm):
        np.testing.assert_allclose(np.asarray(h), (np.asarray(a) - np.asarray(b)) / (2 * eps), rtol=1e-5, atol=1e-5)
    del lc, free


def test_impossible_rows_on_every_block_are_minus_inf_without_nan():
    # A fixed CPT with a zero: rows observing the impossible value give -inf, on the observed
    # families, in an enumerated component and on the tape; the other rows stay finite.
    net = network_from_dict({"a": {"states": ["x", "y"], "fixed": [1.0, 0.0]},
                             "b": {"states": ["u", "v"], "parents": ["a"]},
                             "c": {"states": ["u", "v"], "parents": ["b"]}})
    probs = {"a": np.array([1.0, 0.0]), "b": np.array([[0.5, 0.5], [0.5, 0.5]]), "c": np.array([[0.3, 0.7], [0.6, 0.4]])}
    codes = np.array([[1, 0, 0], [1, HIDDEN, 0], [0, HIDDEN, 1], [HIDDEN, HIDDEN, 1], [0, 1, 1]], np.int32)
    data = CodedData(codes, np.ones(len(codes)))
    for route in ("auto", "uniform"):
        lik = Likelihood(net, data, route=route)
        ll = lik.row_logliks(probs)
        assert ll[0] == -math.inf and ll[1] == -math.inf and np.all(np.isfinite(ll[2:]))
        val, counts = lik.expected_counts(probs)
        assert val == -math.inf and not any(np.isnan(c).any() for c in counts.values())
        ok = CodedData(codes[2:], np.ones(3))
        check_against_oracle(net, probs, ok, route=route)


def test_chunks_split_over_threads_give_the_same_results(monkeypatch):
    # The parts of a sharded plan run in threads; values, expected counts and per-row values
    # must equal the oracle, also under vmap (traced: the parts run one after the other).
    monkeypatch.setattr(lk, "SHARD_MIN_S", 0.0)
    monkeypatch.setenv("ADFIT_THREADS", "3")
    rng = np.random.default_rng(31)
    net = random_network(rng, 6, p_latent=0.3, p_edge=0.5)
    probs = random_probs(net, rng)
    data = random_rows(net, rng, 70, p_missing=0.45)
    lik = check_against_oracle(net, probs, data, route="pattern")
    assert lik.plan.n_shards == 3 and len(lik._codes.parts) == 3
    lc = tuple(jnp.asarray(x) for x in logcpts_from_probs(net, probs))
    val = float(lik.value_logcpt(lc))
    batched = jax.vmap(lambda s: lk._value_and_expected_counts(net, lik.plan.groups, tuple(s * x for x in lc),
                                                                 lik._codes, lik._weights)[0])(jnp.ones(2))
    np.testing.assert_allclose(np.asarray(batched), val, rtol=1e-12)


# ============================================================================ barren leaves summed out
def _barren_case(seed):
    rng = np.random.default_rng(300 + seed)
    net = random_network(rng, int(rng.integers(5, 8)), p_latent=0.3, p_edge=0.5)
    return net, random_probs(net, rng), random_rows(net, rng, 90, 0.45)


@pytest.mark.parametrize("seed", range(4))
@pytest.mark.parametrize("route", ["auto", "pattern"])
def test_summed_barren_leaves_equal_the_full_elimination(seed, route, monkeypatch):
    """A hidden leaf whose hidden parents have observed descendants is summed out of its
    component (its expected counts from its parents' posterior); value, expected counts, row
    log-likelihoods and the complete-family counts equal the plan that keeps it (the full
    elimination, itself checked against brute-force enumeration above) to 1e-10."""
    net, probs, data = _barren_case(seed)
    monkeypatch.setattr(lk, "SUM_BARREN_LEAVES", False)
    full = Likelihood(net, data, route=route)
    assert not lk._is_widened(full.plan.groups)
    monkeypatch.setattr(lk, "SUM_BARREN_LEAVES", True)
    lean = Likelihood(net, data, route=route)
    assert lk._is_widened(lean.plan.groups)  # the case under test: some leaf cells summed out
    v0, c0 = full.expected_counts(probs)
    v1, c1 = lean.expected_counts(probs)
    assert v1 == pytest.approx(v0, rel=1e-12)
    for name in net.names:
        np.testing.assert_allclose(c1[name], c0[name], rtol=1e-10, atol=1e-10)
    np.testing.assert_allclose(lean.row_logliks(probs), full.row_logliks(probs), rtol=0, atol=1e-10)
    np.testing.assert_array_equal(lean.observed_family_counts()[0], full.observed_family_counts()[0])


def test_summed_barren_leaves_against_enumeration_and_in_forward_mode():
    """The widened plan against brute force, and its forward-mode derivative (the product the
    error bars use) against central finite differences of its reverse-mode counts."""
    net, probs, data = _barren_case(1)
    lik = check_against_oracle(net, probs, data)
    assert lik.plan.groups[0].n_summed > 0
    lc = jnp.concatenate([jnp.ravel(x) for x in logcpts_from_probs(net, probs)])
    rng = np.random.default_rng(0)
    d = jnp.asarray(rng.normal(size=lc.shape))

    def counts(x):
        return lik.expected_counts_flat(x)[1][:-2]

    _, jv = jax.jvp(lambda x: lk._value_and_flat_counts(net, lik.plan.groups, x, lik._codes.parts[0],
                                                         lik._weights.parts[0])[1][:-2], (lc,), (d,))
    h = 1e-6
    fd = (np.asarray(counts(lc + h * d)) - np.asarray(counts(lc - h * d))) / (2 * h)
    np.testing.assert_allclose(np.asarray(jv), fd, rtol=1e-5, atol=1e-6 * np.abs(fd).max())


def test_latent_class_with_unasked_items_is_enumerated_over_the_class_only():
    """Stouffer & Toby's four items (tests/published.py) with the last two unasked in half of the
    records: the unasked items are barren leaves, summed out, so each component is the class
    alone (2 assignments); expected counts as by the full elimination, and the unasked items'
    counts are theta(item | class) times the class posterior (checked directly)."""
    nodes = {"cls": {"states": ["k1", "k2"], "latent": True}}
    for it in STOUFFER_TOBY_ITEMS:
        nodes[it] = {"states": ["+", "-"], "parents": ["cls"]}
    net = network_from_dict(nodes)
    rows, w = [], []
    for k, c in enumerate(STOUFFER_TOBY_COUNTS):
        bits = [(k >> (3 - j)) & 1 for j in range(4)]
        rows.append([HIDDEN, *bits])
        w.append(c)
        rows.append([HIDDEN, bits[0], bits[1], HIDDEN, HIDDEN])
        w.append(c)
    data = CodedData(np.array(rows, np.int32), np.array(w, float))
    rng = np.random.default_rng(5)
    probs = random_probs(net, rng)
    lik = check_against_oracle(net, probs, data)
    assert {g.A for g in lik.plan.groups if isinstance(g, lk.EnumBlock)} == {2}
    _, counts = lik.expected_counts(probs)
    # direct: class posterior of each half-asked record, times theta(item | class)
    post = np.zeros(2)
    for r, c in zip(rows[1::2], w[1::2]):
        p = probs["cls"] * probs[STOUFFER_TOBY_ITEMS[0]][:, r[1]] * probs[STOUFFER_TOBY_ITEMS[1]][:, r[2]]
        post += c * p / p.sum()
    full_rows = [r for r in rows[0::2]]
    asked = np.zeros((2, 2))
    for r, c in zip(full_rows, w[0::2]):
        p = probs["cls"].copy()
        for j, it in enumerate(STOUFFER_TOBY_ITEMS):
            p = p * probs[it][:, r[1 + j]]
        p = p / p.sum()
        asked[:, r[3]] += c * p
    np.testing.assert_allclose(counts[STOUFFER_TOBY_ITEMS[2]], asked + post[:, None] * probs[STOUFFER_TOBY_ITEMS[2]],
                               rtol=1e-10)

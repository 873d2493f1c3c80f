"""The exact marginal likelihood: against brute-force enumeration, published examples and
closed forms; gradients against finite differences; jit against non-jit; -inf paths."""

from __future__ import annotations

import itertools
import math

import jax
import numpy as np
import pytest

from adfit.data import HIDDEN, CodedData, reduce_rows
from adfit.errors import ImpossibleDataError
from adfit.likelihood import (Likelihood, build_plan, check_possible, logits_from_probs,
                              posterior_marginals, score)
from adfit.network import network_from_dict
from randomnets import random_network, random_probs, random_rows


def brute_force_row(net, probs, row):
    """Oracle: enumerate every assignment of the row's hidden cells."""
    hid = [i for i, c in enumerate(row) if c < 0]
    total = 0.0
    for ass in itertools.product(*[range(net.cards[i]) for i in hid]):
        x = list(row)
        for i, a in zip(hid, ass):
            x[i] = a
        p = 1.0
        for i, node in enumerate(net.nodes):
            p *= probs[node.name][tuple(x[net.index(q)] for q in node.parents) + (x[i],)]
        total += p
    return math.log(total) if total > 0 else -math.inf


@pytest.mark.parametrize("seed", range(4))
def test_elimination_equals_enumeration(seed):
    # Property: the marginal likelihood is by definition the sum over hidden assignments.
    rng = np.random.default_rng(seed)
    net = random_network(rng, 6)
    probs = random_probs(net, rng)
    data = random_rows(net, rng, 120, p_missing=0.35)
    oracle = np.array([brute_force_row(net, probs, r) for r in data.codes])
    for route in ("auto", "uniform"):
        lik = Likelihood(net, data, route=route)
        np.testing.assert_allclose(lik.row_logliks(probs), oracle, rtol=0, atol=1e-12)
        total = float(lik.value(logits_from_probs(net, probs)))
        assert total == pytest.approx(float(oracle @ data.counts), rel=1e-13)
    # one group per missingness pattern (compiled per pattern: keep to the first few patterns)
    hidden = data.codes < 0
    _, first = np.unique(hidden, axis=0, return_index=True)
    keep = np.isin(np.arange(len(data.codes)), np.sort(first)[:4]) | np.all(hidden == hidden[np.sort(first)[0]], axis=1)
    sub = data.subset(keep)
    lik = Likelihood(net, sub, route="pattern")
    np.testing.assert_allclose(lik.row_logliks(probs), oracle[keep], rtol=0, atol=1e-12)


def test_pattern_groups_prune_barren_nodes():
    # A hidden node whose descendants are all hidden sums out to 1 (it is barren).
    net = network_from_dict({"a": {"states": ["0", "1"]},
                             "b": {"states": ["0", "1", "2"], "parents": ["a"]},
                             "c": {"states": ["0", "1"], "parents": ["b"]}})
    codes = np.array([[0, HIDDEN, HIDDEN]] * 600 + [[1, HIDDEN, HIDDEN]] * 600, dtype=np.int32)
    d, c, _ = reduce_rows(codes, None, net.cards)
    plan = build_plan(net, CodedData(d, c), min_pattern_rows=1)
    assert plan.route == "per-pattern"
    assert plan.groups[0].n_pruned == 2 and not plan.groups[0].steps


def test_fully_hidden_rows_have_likelihood_one():
    net = network_from_dict({"a": {"states": ["0", "1"]}, "b": {"states": ["0", "1"], "parents": ["a"]}})
    rng = np.random.default_rng(0)
    probs = random_probs(net, rng)
    lik = Likelihood(net, CodedData(np.array([[HIDDEN, HIDDEN], [0, HIDDEN]], np.int32), np.ones(2)))
    np.testing.assert_allclose(lik.row_logliks(probs), [0.0, math.log(probs["a"][0])], atol=1e-15)


def burglary():
    # Russell & Norvig, Artificial Intelligence: A Modern Approach, 3rd ed., ch. 14 (Fig. 14.2).
    return network_from_dict({
        "burglary": {"states": ["true", "false"], "fixed": [0.001, 0.999]},
        "earthquake": {"states": ["true", "false"], "fixed": [0.002, 0.998]},
        "alarm": {"states": ["true", "false"], "parents": ["burglary", "earthquake"],
                  "fixed": [[0.95, 0.05], [0.94, 0.06], [0.29, 0.71], [0.001, 0.999]]},
        "john_calls": {"states": ["true", "false"], "parents": ["alarm"], "fixed": [[0.90, 0.10], [0.05, 0.95]]},
        "mary_calls": {"states": ["true", "false"], "parents": ["alarm"], "fixed": [[0.70, 0.30], [0.01, 0.99]]},
    })


def test_burglary_network_published_values():
    # AIMA 3rd ed. §14.4.1: P(j, m) = 0.0020841 (alpha^-1 of the worked example) and
    # P(Burglary = true | j, m) = 0.284.
    net = burglary()
    row = np.array([[HIDDEN, HIDDEN, HIDDEN, 0, 0]], dtype=np.int32)
    probs = {n: net.fixed_table(n) for n in net.names}
    lik = Likelihood(net, CodedData(row, np.ones(1)))
    assert math.exp(lik.row_logliks(probs)[0]) == pytest.approx(0.0020841, abs=5e-8)
    ll, post = posterior_marginals(net, probs, row)
    assert post["burglary"][0, 0] == pytest.approx(0.284, abs=5e-4)
    assert math.exp(ll[0]) == pytest.approx(0.0020841, abs=5e-8)


def test_posterior_marginals_equal_enumeration():
    rng = np.random.default_rng(11)
    net = random_network(rng, 6)
    probs = random_probs(net, rng)
    data = random_rows(net, rng, 40, p_missing=0.4)
    _, post = posterior_marginals(net, probs, data.codes)
    for r, row in enumerate(data.codes[:15]):
        base = brute_force_row(net, probs, row)
        for i in np.flatnonzero(row < 0):
            for s in range(net.cards[i]):
                rr = row.copy()
                rr[i] = s
                expect = math.exp(brute_force_row(net, probs, rr) - base)
                assert post[net.names[i]][r, s] == pytest.approx(expect, abs=1e-12)


def test_gradient_equals_finite_differences_and_jit_equals_no_jit():
    rng = np.random.default_rng(5)
    net = random_network(rng, 4)
    probs = random_probs(net, rng)
    data = random_rows(net, rng, 30, p_missing=0.3)
    lik = Likelihood(net, data)
    lg = logits_from_probs(net, probs)
    val, grad = lik.value_and_grad(lg)
    eps = 1e-6
    for name in net.free_names:
        base = np.asarray(lg[name])
        for k in range(base.size):
            e = np.zeros(base.size)
            e[k] = eps
            e = e.reshape(base.shape)
            fp = float(lik.value({**lg, name: base + e}))
            fm = float(lik.value({**lg, name: base - e}))
            assert float(np.asarray(grad[name]).flat[k]) == pytest.approx((fp - fm) / (2 * eps), rel=1e-6, abs=1e-6)
    with jax.disable_jit():
        val_nojit, grad_nojit = lik.value_and_grad(lg)
    assert float(val_nojit) == pytest.approx(float(val), rel=1e-13)
    for name in net.free_names:
        np.testing.assert_allclose(np.asarray(grad_nojit[name]), np.asarray(grad[name]), rtol=1e-11, atol=1e-11)
    # Fisher's identity: d loglik / d logit = N(x,u) - theta N(u) with N the expected counts.
    _, counts = lik.expected_counts(probs)
    for name in net.free_names:
        expect = counts[name] - probs[name] * counts[name].sum(axis=-1, keepdims=True)
        np.testing.assert_allclose(np.asarray(grad[name]), expect, atol=1e-9)


def test_long_chain_does_not_underflow():
    # A 120-node binary chain with every other node missing: P(row) is far below 1e-308, so
    # products in linear space would underflow. Oracle: the forward recursion in log space
    # (scipy's logsumexp), a standard hidden-Markov computation.
    from scipy.special import logsumexp
    n = 120
    d = {"n000": {"states": ["a", "b"]}}
    for i in range(1, n):
        d[f"n{i:03d}"] = {"states": ["a", "b"], "parents": [f"n{i - 1:03d}"]}
    net = network_from_dict(d)
    rng = np.random.default_rng(3)
    probs = {"n000": np.array([0.5, 0.5])}
    for i in range(1, n):
        pb = rng.uniform(1e-5, 1e-4, size=2)  # the observed state "b" is improbable
        probs[f"n{i:03d}"] = np.stack([1 - pb, pb], axis=1)
    row = np.array([1 if i % 3 else HIDDEN for i in range(n)], dtype=np.int32)
    lik = Likelihood(net, CodedData(row[None, :], np.ones(1)))
    got = lik.row_logliks(probs)[0]
    alpha = np.log(probs["n000"]) + (np.log(np.eye(2)[row[0]]) if row[0] >= 0 else 0)
    with np.errstate(divide="ignore"):
        for i in range(1, n):
            t = np.log(probs[f"n{i:03d}"])
            alpha = logsumexp(alpha[:, None] + t, axis=0)
            if row[i] >= 0:
                alpha = alpha + np.log(np.eye(2)[row[i]])
    expect = logsumexp(alpha)
    assert expect < -708  # really below float64 range in linear space
    assert got == pytest.approx(expect, rel=1e-12)


def test_impossible_rows_give_minus_inf_and_a_clear_error():
    net = network_from_dict({"a": {"states": ["x", "y"], "fixed": [1.0, 0.0]},
                             "b": {"states": ["u", "v"], "parents": ["a"]}})
    probs = {"a": np.array([1.0, 0.0]), "b": np.array([[0.5, 0.5], [0.5, 0.5]])}
    data = CodedData(np.array([[1, 0], [0, 1], [HIDDEN, 0]], np.int32), np.ones(3), source="toy.csv")
    lik = Likelihood(net, data)
    ll = lik.row_logliks(probs)
    assert ll[0] == -math.inf and np.all(np.isfinite(ll[1:])) and not np.any(np.isnan(ll))
    with pytest.raises(ImpossibleDataError, match=r"toy.csv: 1 distinct row\(s\) have probability 0.*a=y"):
        check_possible(lik, probs)


def test_score_gradient_norm_is_zero_at_complete_data_mle():
    # Complete data: the MLE is the normalised counts, where the gradient vanishes.
    net = network_from_dict({"a": {"states": ["0", "1"]}, "b": {"states": ["0", "1", "2"], "parents": ["a"]}})
    codes = np.array([[0, 0], [0, 1], [1, 2], [1, 1]], np.int32)
    counts = np.array([3.0, 1.0, 2.0, 6.0])
    probs = {"a": np.array([4 / 12, 8 / 12]), "b": np.array([[3 / 4, 1 / 4, 0.0], [0.0, 6 / 8, 2 / 8]])}
    s = score(net, CodedData(codes, counts), probs)
    assert s["gradient_norm"] < 1e-12
    assert s["log_likelihood"] == pytest.approx(float(counts @ np.log([3 / 4 * 4 / 12, 1 / 4 * 4 / 12, 2 / 8 * 8 / 12, 6 / 8 * 8 / 12])))


def test_unique_keys_by_hash_equal_numpy_unique():
    # The plan's component-type keys are deduplicated by a hash table; the result must be
    # numpy's np.unique of the raw rows (same order, same inverse), also when two keys collide.
    from adfit.likelihood import _unique_keys, _void_rows

    rng = np.random.default_rng(2)
    c = np.uint64(0x9E3779B97F4A7C15)
    cases = [rng.integers(0, 5, size=(5000, 2)).astype(np.uint64) << np.uint64(33),
             rng.integers(0, 3, size=(700, 4)).astype(np.uint64),
             np.array([[0, c], [1, 0], [0, c], [1, 0]], np.uint64),  # equal hashes h = 0*c + c = 1*c + 0
             np.zeros((0, 2), np.uint64)]
    for key in cases:
        uk, inv = _unique_keys(key)
        want_uk, want_inv = np.unique(_void_rows(key), return_inverse=True)
        assert uk.tobytes() == want_uk.tobytes()
        np.testing.assert_array_equal(inv, want_inv.reshape(-1))

"""Coded data in the smallest integer type (int8 up to 127 states, int16 beyond), and no overflow
anywhere the codes are computed with: strides into a CPT, flat indices into the log-CPT vector,
packed row keys. Each network below is chosen so that a code multiplied in its own type would
wrap (int8: a family index above 127; int16: above 32 767), and every figure is checked against
an oracle outside adfit: numpy's integer limits and ``np.unique``, pandas' categorical codes and
groupby counts, brute-force enumeration of the hidden cells, the closed-form complete-data
log-likelihood (sum of count x log theta). Test data are seeded random draws (demo data only).
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from adfit import em
from adfit.data import HIDDEN, CodedData, codes_dtype, decode, load_data, reduce_rows
from adfit.fit import complete_family_counts
from adfit.likelihood import Likelihood
from adfit.network import network_from_dict
from adfit.rowkeys import KeyLayout, code_dtype

from test_likelihood import brute_force_row


def _net(spec):
    return network_from_dict({k: {"states": [f"s{i}" for i in range(c)], "parents": list(pa), **extra}
                              for k, (c, pa, extra) in spec.items()})


# int8 codes; the CPT of d has 4*4*4*3 = 192 cells: its flat index a*48 + b*12 + c*3 + d reaches
# 191, so 48 * a computed in int8 wraps (48 * 3 = 144 > 127), and the log-CPT vector's offsets
# (hundreds) do too. h is latent, so the plan has hidden components and enumeration / programs.
WIDE8 = _net({"a": (4, (), {}), "b": (4, (), {}), "c": (4, ("a",), {}),
              "h": (2, ("a",), {"latent": True}),
              "d": (3, ("a", "b", "c"), {}), "e": (4, ("h", "d", "b"), {})})
# int16 codes; w's CPT has 200*150*2 = 60 000 cells (index z*300 + v*2 + w up to 59 999 > 32 767).
WIDE16 = _net({"z": (200, (), {}), "v": (150, (), {}), "w": (2, ("z", "v"), {}), "y": (3, ("z",), {})})


def _probs(net, rng):
    return {n.name: rng.dirichlet(np.ones(n.card), size=net.cpt_shape(n.name)[:-1]) for n in net.nodes}


def _sample(net, probs, n, rng):
    """Ancestral sampling (numpy), codes in int64."""
    x = np.zeros((n, len(net)), np.int64)
    for i, node in enumerate(net.nodes):
        pa = [net.index(q) for q in node.parents]
        t = probs[node.name][tuple(x[:, j] for j in pa)] if pa else np.broadcast_to(probs[node.name], (n, node.card))
        u = rng.random(n)[:, None]
        x[:, i] = np.minimum((np.cumsum(t, axis=1) < u).sum(axis=1), node.card - 1)
    return x


def test_code_dtype_is_the_smallest_that_holds_every_code():
    # numpy's integer limits: the codes run from -2 (a foreign label while coding) to card (the
    # plan's code of a summed barren leaf), so int8 holds up to 127 states, int16 up to 32 767.
    for top, want in [(2, np.int8), (127, np.int8), (128, np.int16), (32767, np.int16), (32768, np.int32)]:
        dt = code_dtype([3, top, 2])
        assert dt == np.dtype(want), top
        assert np.iinfo(dt).min <= -2 and np.iinfo(dt).max >= top
        smaller = {np.int16: np.int8, np.int32: np.int16}.get(want)
        assert smaller is None or np.iinfo(smaller).max < top
    assert codes_dtype(WIDE8) == np.int8 and codes_dtype(WIDE16) == np.int16


def test_two_hundred_states_read_into_int16_codes_equal_to_pandas_categories(tmp_path):
    # pandas' categorical codes (categories in the declared order, NaN -> -1) are the reference.
    rng = np.random.default_rng(0)
    n = 3000
    x = _sample(WIDE16, _probs(WIDE16, rng), n, rng)
    frame = pd.DataFrame({name: np.array(WIDE16.node(name).states, dtype=object)[x[:, j]]
                          for j, name in enumerate(WIDE16.names)})
    frame = frame.mask(rng.random(frame.shape) < 0.1)
    frame.to_csv(tmp_path / "r.csv", index=False)
    ref = np.stack([pd.Categorical(frame[name], categories=WIDE16.node(name).states).codes
                    for name in WIDE16.names], axis=1).astype(np.int64)
    ref_rows, ref_inv, ref_counts = np.unique(ref, axis=0, return_inverse=True, return_counts=True)
    for data in (load_data(WIDE16, frame), load_data(WIDE16, tmp_path / "r.csv")):
        assert data.codes.dtype == np.int16
        np.testing.assert_array_equal(data.codes, ref_rows)   # numpy's lexicographic unique
        np.testing.assert_array_equal(data.counts, ref_counts.astype(float))
        np.testing.assert_array_equal(data.codes[data.inverse], ref)
    back = decode(WIDE16, data.codes[data.inverse])
    pd.testing.assert_frame_equal(back.fillna("NA"), frame.fillna("NA").astype(object))


def test_packed_key_near_two_to_the_63_with_small_codes():
    # 38 two-state nodes and one three-state node: one word whose span 3**38 * 4 lies between
    # 2**62 and 2**63; the largest rows' words are within a factor 2 of the limit. Reference:
    # np.unique of the int64 code matrix.
    cards = (2,) * 38 + (3,)
    layout = KeyLayout(cards)
    assert layout.k == 1 and 2 ** 62 < layout.spans[0] < 2 ** 63 and layout.code_dtype == np.int8
    rng = np.random.default_rng(1)
    x = np.stack([rng.integers(-1, c, 4000) for c in cards], axis=1)
    x[:50] = np.array(cards) - 1                     # the largest word
    x[50:90] = np.array(cards) - 1
    x[50:90, 0] = 0
    words = layout.pack(x.astype(np.int8)).words
    assert int(words.max()) == layout.spans[0] - 1 and int(words.max()) > 2 ** 62
    assert int(words.min()) >= 0
    d, c, inv = reduce_rows(x.astype(np.int8), None, cards)
    ref_rows, ref_inv, ref_counts = np.unique(x, axis=0, return_inverse=True, return_counts=True)
    assert d.dtype == np.int8
    np.testing.assert_array_equal(d, ref_rows)
    np.testing.assert_array_equal(c, ref_counts.astype(float))
    np.testing.assert_array_equal(inv, ref_inv.reshape(-1))
    # two words with a 200-state column in each: int16 digits unpacked exactly
    cards2 = (200,) + (3,) * 30 + (200,) + (2,) * 5
    lay2 = KeyLayout(cards2)
    y = np.stack([rng.integers(-1, c, 2000) for c in cards2], axis=1)
    y[:5] = np.array(cards2) - 1
    assert lay2.k == 2 and lay2.code_dtype == np.int16
    np.testing.assert_array_equal(lay2.unpack(lay2.pack(y.astype(np.int16)).words), y)


@pytest.mark.parametrize("net", [WIDE8, WIDE16], ids=["int8", "int16"])
def test_complete_family_counts_do_not_wrap(net):
    # pandas groupby sizes of the rows whose family is observed are the reference.
    rng = np.random.default_rng(2)
    x = _sample(net, _probs(net, rng), 6000, rng)
    x[rng.random(x.shape) < 0.15] = HIDDEN
    for j, node in enumerate(net.nodes):
        if node.latent:
            x[:, j] = HIDDEN
    d, c, _ = reduce_rows(x, None, net.cards)
    assert d.dtype == codes_dtype(net)
    data = CodedData(d, c)
    names = [n.name for n in net.nodes if not n.latent and any(not net.node(p).latent for p in n.parents)]
    got = complete_family_counts(net, data, names)
    df = pd.DataFrame(x, columns=net.names)
    for name in names:
        fam = list(net.node(name).parents) + [name]
        if any(net.node(u).latent for u in fam):
            continue
        sub = df[fam][(df[fam] >= 0).all(axis=1)]
        want = np.zeros(net.cpt_shape(name))
        for key, k in sub.groupby(fam).size().items():
            want[key] = k
        assert want.ravel()[128:].sum() > 0 or math.prod(net.cpt_shape(name)) <= 128  # large indices occur
        np.testing.assert_array_equal(got[name], want)


def test_likelihood_on_int8_codes_equals_enumeration_and_em():
    # Brute-force enumeration of every row's hidden cells (tests/test_likelihood.py) is the
    # oracle of the marginal log-likelihood; EM's own inference (numpy, independent) gives the
    # same expected counts as the JAX core's gradient.
    rng = np.random.default_rng(3)
    probs = _probs(WIDE8, rng)
    x = _sample(WIDE8, probs, 3000, rng)
    full = x.copy()
    x[rng.random(x.shape) < 0.3] = HIDDEN
    x[:, WIDE8.index("h")] = HIDDEN
    x[:, :2] = full[:, :2]   # a and b always observed: the uniform program indexes d's CPT by a*48 + b*12
    d, c, _ = reduce_rows(x, None, WIDE8.cards)
    data = CodedData(d, c)
    assert data.codes.dtype == np.int8
    oracle = np.array([brute_force_row(WIDE8, probs, r) for r in d.tolist()])
    em_counts, em_ll = em.expected_counts(WIDE8, probs, data)
    assert em_ll == pytest.approx(float(oracle @ c), rel=1e-12)
    for route in ("auto", "uniform", "pattern"):
        lik = Likelihood(WIDE8, data, route=route)
        np.testing.assert_allclose(lik.row_logliks(probs), oracle, rtol=0, atol=1e-10)
        ll, counts = lik.expected_counts(probs)
        assert float(ll) == pytest.approx(float(oracle @ c), rel=1e-12)
        for name in WIDE8.names:
            np.testing.assert_allclose(np.asarray(counts[name]), em_counts[name], rtol=1e-9, atol=1e-9)


def test_likelihood_on_int16_codes_complete_data_closed_form_and_enumeration():
    # Complete rows: log L = sum over families of n(x, u) log theta(x | u), the counts from
    # pandas groupby. Rows with hidden cells: brute-force enumeration.
    rng = np.random.default_rng(4)
    probs = _probs(WIDE16, rng)
    x = _sample(WIDE16, probs, 2000, rng)
    df = pd.DataFrame(x, columns=WIDE16.names)
    closed = 0.0
    for name in WIDE16.names:
        fam = list(WIDE16.node(name).parents) + [name]
        for key, k in df.groupby(fam).size().items():
            closed += k * math.log(probs[name][key if isinstance(key, tuple) else (key,)])
    d, c, _ = reduce_rows(x, None, WIDE16.cards)
    assert d.dtype == np.int16 and int(d[:, 0].max()) > 127
    lik = Likelihood(WIDE16, CodedData(d, c))
    assert float(lik.expected_counts(probs)[0]) == pytest.approx(closed, rel=1e-12)
    # a few rows with z or v hidden (each enumerated over its 200 or 150 states)
    y = x[:40].copy()
    y[:20, WIDE16.index("z")] = HIDDEN
    y[10:30, WIDE16.index("v")] = HIDDEN
    y[35:, WIDE16.index("w")] = HIDDEN
    d2, c2, _ = reduce_rows(y, None, WIDE16.cards)
    oracle = np.array([brute_force_row(WIDE16, probs, r) for r in d2.tolist()])
    for route in ("auto", "uniform"):
        got = Likelihood(WIDE16, CodedData(d2, c2), route=route).row_logliks(probs)
        np.testing.assert_allclose(got, oracle, rtol=0, atol=1e-10)


# a barren leaf of 127 states: its summed code (127, the extra column of its widened CPT) is
# the largest int8; its widened CPT has 4*4*128 cells, index a*512 + b*128 + f.
LEAF127 = _net({"a": (4, (), {}), "b": (4, ("a",), {}), "f": (127, ("a", "b"), {}), "c": (3, ("b",), {})})


def test_a_summed_127_state_leaf_in_int8_codes_equals_enumeration():
    # Oracle: brute-force enumeration (the leaf summed out or not, the value is the same sum).
    rng = np.random.default_rng(5)
    probs = _probs(LEAF127, rng)
    x = _sample(LEAF127, probs, 400, rng)
    x[rng.random(x.shape) < np.array([0.2, 0.2, 0.4, 0.2])] = HIDDEN
    x[:20, LEAF127.index("f")] = HIDDEN
    x[:20, LEAF127.index("a")] = HIDDEN        # a hidden, b observed: f is summed out of these rows
    x[20:30, LEAF127.index("f")] = 126         # the largest state, observed
    d, c, _ = reduce_rows(x, None, LEAF127.cards)
    assert d.dtype == np.int8
    oracle = np.array([brute_force_row(LEAF127, probs, r) for r in d.tolist()])
    em_counts, em_ll = em.expected_counts(LEAF127, probs, CodedData(d, c))
    for route in ("auto", "pattern"):
        lik = Likelihood(LEAF127, CodedData(d, c), route=route)
        np.testing.assert_allclose(lik.row_logliks(probs), oracle, rtol=0, atol=1e-10)
        ll, counts = lik.expected_counts(probs)
        assert float(ll) == pytest.approx(float(oracle @ c), rel=1e-12) == em_ll
        for name in LEAF127.names:   # the summed leaf's expected counts: theta times the parents' posterior
            np.testing.assert_allclose(np.asarray(counts[name]), em_counts[name], rtol=1e-9, atol=1e-9)


def test_posteriors_of_int8_codes_equal_enumeration():
    # P(node = k | observed cells) by brute force: the joint of each completion, summed by the
    # node's value, divided by the row's total (both enumerated over every hidden cell).
    from adfit.impute import row_posteriors

    rng = np.random.default_rng(6)
    probs = _probs(WIDE8, rng)
    x = _sample(WIDE8, probs, 12, rng)
    x[rng.random(x.shape) < 0.35] = HIDDEN
    x[:, WIDE8.index("h")] = HIDDEN
    x[:, :2] = _sample(WIDE8, probs, 12, np.random.default_rng(7))[:, :2]  # a, b observed: offsets a*48 + b*12
    codes = x.astype(np.int8)
    ll, post = row_posteriors(WIDE8, probs, codes)
    for i, row in enumerate(codes.tolist()):
        assert ll[i] == pytest.approx(brute_force_row(WIDE8, probs, row), abs=1e-12)
        for j, name in enumerate(WIDE8.names):
            want = np.zeros(WIDE8.cards[j])
            for k in range(WIDE8.cards[j]):
                if row[j] >= 0 and row[j] != k:
                    continue
                fixed = list(row)
                fixed[j] = k
                want[k] = math.exp(brute_force_row(WIDE8, probs, fixed))
            np.testing.assert_allclose(post[name][i], want / want.sum(), rtol=1e-10, atol=1e-12)

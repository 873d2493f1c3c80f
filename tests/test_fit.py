"""The fit reaches the maximum of the marginal likelihood: closed forms and published values."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest

from adfit.data import HIDDEN, CodedData, encode_frame, reduce_rows
from adfit.errors import ConvergenceWarning, ImpossibleDataError, OptionError
from adfit.fit import fit
from adfit.likelihood import score
from adfit.network import network_from_dict
from adfit.result import load_result, result_from_dict, write_result

from published import linkage_mle, linkage_one_parameter


def penguins_complete():
    # palmerpenguins (Gorman, Williams & Fraser 2014, PLoS ONE), shipped in the PyPI package.
    from palmerpenguins import load_penguins

    df = load_penguins()[["species", "island", "sex"]].dropna()
    net = network_from_dict({
        "species": {"states": ["Adelie", "Chinstrap", "Gentoo"]},
        "island": {"states": ["Biscoe", "Dream", "Torgersen"], "parents": ["species"]},
        "sex": {"states": ["female", "male"], "parents": ["species"]},
    })
    return net, df


def test_complete_data_fit_equals_normalised_counts():
    # With complete records the MLE of a CPT row is its normalised counts (pandas crosstab).
    net, df = penguins_complete()
    res = fit(net, df)
    assert res.converged
    expect_island = pd.crosstab(df["species"], df["island"], normalize="index")
    expect_sex = pd.crosstab(df["species"], df["sex"], normalize="index")
    expect_species = df["species"].value_counts(normalize=True)
    got_island = res.cpt("island")
    for sp in net.node("species").states:
        for isl in net.node("island").states:
            e = expect_island.loc[sp, isl] if isl in expect_island.columns else 0.0
            assert got_island.loc[sp, isl] == pytest.approx(e, abs=2e-7)
        for sx in net.node("sex").states:
            assert res.cpt("sex").loc[sp, sx] == pytest.approx(expect_sex.loc[sp, sx], abs=1e-8)
        assert res.cpt("species").loc["(none)", sp] == pytest.approx(expect_species[sp], abs=1e-8)


def test_monotone_gaps_factored_likelihood_closed_form():
    # Rubin (1974, JASA); Little & Rubin, Statistical Analysis with Missing Data, ch. 7: with A
    # always observed and B missing in m rows (MAR), the MLE factors:
    # theta(a, b) = (n_a+ + m_a)/(n + m) * n_ab / n_a+.
    net = network_from_dict({"a": {"states": ["a0", "a1", "a2"]},
                             "b": {"states": ["b0", "b1"], "parents": ["a"]}})
    n_ab = np.array([[30, 10], [5, 25], [12, 12]], dtype=float)
    m_a = np.array([20, 3, 9], dtype=float)
    codes = [[a, b] for a in range(3) for b in range(2)] + [[a, HIDDEN] for a in range(3)]
    counts = list(n_ab.ravel()) + list(m_a)
    res = fit(net, CodedData(np.array(codes, np.int32), np.array(counts)))
    n, m = n_ab.sum(), m_a.sum()
    pa = (n_ab.sum(1) + m_a) / (n + m)
    pb = n_ab / n_ab.sum(1, keepdims=True)
    np.testing.assert_allclose(res.probs["a"], pa, atol=1e-8)
    np.testing.assert_allclose(res.probs["b"], pb, atol=1e-8)
    np.testing.assert_allclose(res.probs["a"][:, None] * res.probs["b"], pa[:, None] * pb, atol=1e-8)


def test_linkage_data_mle():
    # Dempster, Laird & Rubin (1977), §1: pi_hat = 0.6268214980 (closed form: positive root of
    # 197 pi^2 - 15 pi - 68 = 0).
    net, df = linkage_one_parameter()
    res = fit(net, df, count_column="count")
    assert res.converged
    pi = res.probs["g"][list(net.node("g").states).index("yes")]
    assert pi == pytest.approx(0.6268214980, abs=1e-8)
    assert pi == pytest.approx(linkage_mle(), abs=1e-8)


def test_adam_reaches_the_same_maximum():
    net, df = linkage_one_parameter()
    ref = fit(net, df, count_column="count")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        res = fit(net, df, count_column="count", method="adam", learning_rate=0.05, max_iter=3000, tol=1e-12)
    assert res.log_likelihood == pytest.approx(ref.log_likelihood, abs=1e-6)


def test_fit_is_deterministic_given_the_seed_and_reports_history():
    net, df = penguins_complete()
    a = fit(net, df, seed=4, restarts=2)
    b = fit(net, df, seed=4, restarts=2)
    for name in net.names:
        np.testing.assert_array_equal(a.probs[name], b.probs[name])
    assert len(a.history["gradient_norm"]) == a.iterations + 1
    assert a.gradient_norm == pytest.approx(score(net, encode_frame(net, df), a.probs)["gradient_norm"], rel=1e-6, abs=1e-9)


def test_boundary_mle_converges():
    # A zero count makes the MLE sit on the boundary (theta = 0): logits run off to -inf, but the
    # stopping rule is judged in probability units and must still hold.
    net = network_from_dict({"a": {"states": ["x", "y"]}, "b": {"states": ["u", "v", "w"], "parents": ["a"]}})
    df = pd.DataFrame({"a": ["x"] * 10 + ["y"] * 6 + ["?"] * 4, "b": ["u"] * 6 + ["v"] * 4 + ["w"] * 6 + ["u"] * 4})
    res = fit(net, df)
    assert res.converged
    assert res.probs["b"][0, 2] < 1e-6 and res.probs["b"][1, 0] < 1e-3


def test_result_json_round_trip(tmp_path):
    net, df = linkage_one_parameter()
    res = fit(net, df, count_column="count")
    path = tmp_path / "r.json"
    write_result(path, res)
    back = load_result(path)
    assert back.log_likelihood == pytest.approx(res.log_likelihood, rel=1e-15)
    for name in net.names:
        np.testing.assert_allclose(back.probs[name], res.probs[name], rtol=0, atol=1e-15)
    doc = res.to_dict()
    for key in ("format", "method", "objective", "log_likelihood", "gradient_norm", "converged", "iterations", "nodes"):
        assert key in doc
    assert doc["format"] == "adfit-result/1" and doc["objective"] == "mle"
    assert result_from_dict(doc).method == "lbfgs"


def test_bad_options_and_impossible_data():
    net, df = linkage_one_parameter()
    with pytest.raises(OptionError, match="--method"):
        fit(net, df, count_column="count", method="newton")
    with pytest.raises(OptionError, match="--restarts"):
        fit(net, df, count_column="count", restarts=0)
    net2 = network_from_dict({"a": {"states": ["x", "y"], "fixed": [1.0, 0.0]},
                              "b": {"states": ["u", "v"], "parents": ["a"]}})
    with pytest.raises(ImpossibleDataError, match="probability 0"):
        fit(net2, pd.DataFrame({"a": ["y", "x"], "b": ["u", "v"]}))


def test_minibatch_adam_reports_the_full_data_gradient():
    # Minibatch gradients are unbiased estimates; the run ends near the MLE and the gradient
    # norm it reports is the exact full-data one (checked against score()).
    net = network_from_dict({"a": {"states": ["x", "y"]}, "b": {"states": ["u", "v", "w"], "parents": ["a"]}})
    rng = np.random.default_rng(0)
    a = rng.choice(["x", "y"], 3000, p=[0.3, 0.7])
    b = np.where(a == "x", rng.choice(["u", "v", "w"], 3000, p=[0.5, 0.3, 0.2]), rng.choice(["u", "v", "w"], 3000, p=[0.1, 0.1, 0.8]))
    b = np.where(rng.random(3000) < 0.3, "?", b)
    df = pd.DataFrame({"a": a, "b": b})
    ref = fit(net, df)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        mb = fit(net, df, method="adam", batch_size=128, max_iter=300, learning_rate=0.05)
    for name in net.names:
        np.testing.assert_allclose(mb.probs[name], ref.probs[name], atol=0.03)
    full = score(net, encode_frame(net, df), mb.probs)
    assert mb.gradient_norm == pytest.approx(full["gradient_norm"], rel=1e-9)
    assert mb.settings["batch_size"] == 128
    with pytest.raises(OptionError, match="--batch-size"):
        fit(net, df, batch_size=64)


def test_api_em_check_flag():
    # The EM reference (own numpy inference) must reach the same optimum as the fit.
    net, df = linkage_one_parameter()
    res = fit(net, df, count_column="count", em_check=True)
    assert res.extras["em_check"]["verdict"] == "agree"
    with pytest.raises(OptionError, match="L2"):
        fit(net, df, count_column="count", em_check=True, l2=0.1)


def _head_test_network():
    """Four nodes, one of them fixed (with a zero entry), rows of 2, 3 and 4 states."""
    return network_from_dict({
        "a": {"states": ["x", "y", "z"], "fixed": [0.2, 0.0, 0.8]},
        "b": {"states": ["u", "v"], "parents": ["a"]},
        "c": {"states": ["p", "q", "r", "s"], "parents": ["a", "b"]},
        "d": {"states": ["e", "f", "g"], "parents": ["b"]},
    })


def test_flat_head_matches_per_node_softmax_and_the_closed_form_gradient():
    # The optimiser's head works on one flat vector of the free logits (rows grouped by their
    # number of states; fixed nodes spliced in). Against scipy's log_softmax node by node, and
    # its gradient against the closed form (Fisher's identity plus the prior and the penalty):
    # d/d eta [sum (n + c) log theta - l2 sum (eta - mean eta)^2] = (n + c) - theta sum(n + c)
    #                                                              - 2 l2 (eta - mean eta).
    import jax.numpy as jnp
    from scipy.special import log_softmax

    from adfit.params import fixed_log_tables, free_layout, head as _head, head_grad as _head_grad
    from adfit.likelihood import layout_of

    net = _head_test_network()
    lay = free_layout(net)
    assert lay.names == ("b", "c", "d") and lay.size == 3 * 2 + 6 * 4 + 2 * 3
    offsets, _, n_flat = layout_of(net)
    assert lay.n_flat == n_flat
    rng = np.random.default_rng(4)
    eta = {k: rng.normal(size=net.cpt_shape(k)) for k in lay.names}
    scale = rng.uniform(0.5, 2.0, lay.size)
    pseudo = {k: rng.uniform(0, 2, net.cpt_shape(k)) for k in lay.names}
    z = lay.flatten(eta) / scale
    l2, N = 0.3, 50.0
    full, rest = _head(net, jnp.asarray(z), jnp.asarray(scale), jnp.asarray(lay.flatten(pseudo)),
                       jnp.asarray(fixed_log_tables(net)), l2)
    full = np.asarray(full)
    for i, node in enumerate(net.nodes):
        size = int(np.prod(net.cpt_shape(node.name)))
        got = full[offsets[i]:offsets[i] + size].reshape(net.cpt_shape(node.name))
        with np.errstate(divide="ignore"):
            want = np.log(net.fixed_table(node.name)) if node.fixed is not None else log_softmax(eta[node.name], axis=-1)
        np.testing.assert_allclose(got, want, rtol=1e-14, atol=1e-14)
    pen = sum(np.sum((e - e.mean(axis=-1, keepdims=True)) ** 2) for e in eta.values())
    lp = sum(np.sum(pseudo[k] * log_softmax(eta[k], axis=-1)) for k in lay.names)
    assert float(rest) == pytest.approx(lp - l2 * pen, rel=1e-13)
    counts = rng.uniform(0, 10, n_flat + 2)  # any expected counts; the two trailing entries are ignored
    g = np.asarray(_head_grad(net, jnp.asarray(z), jnp.asarray(scale), jnp.asarray(lay.flatten(pseudo)),
                              jnp.asarray(fixed_log_tables(net)), l2, jnp.asarray(counts), N))
    want = {}
    for k in lay.names:
        i = net.index(k)
        size = int(np.prod(net.cpt_shape(k)))
        nc = counts[offsets[i]:offsets[i] + size].reshape(net.cpt_shape(k)) + pseudo[k]
        th = np.exp(log_softmax(eta[k], axis=-1))
        e = eta[k]
        want[k] = nc - th * nc.sum(axis=-1, keepdims=True) - 2 * l2 * (e - e.mean(axis=-1, keepdims=True))
    np.testing.assert_allclose(g, -lay.flatten(want) * scale / N, rtol=1e-12, atol=1e-14)
    back = lay.unflatten(lay.flatten(eta))
    for k in lay.names:
        np.testing.assert_array_equal(back[k], eta[k])


def test_complete_family_start_counts_and_the_plans_observed_families():
    # The start's counts are the rows' family counts where a node and its parents are all
    # observed (checked against pandas groupby); taken from the likelihood plan's gathered
    # counts, or partly from them and partly counted, they are the same numbers.
    from adfit.fit import complete_family_counts, complete_family_start
    from adfit.likelihood import Likelihood, layout_of

    net = network_from_dict({
        "a": {"states": ["x", "y", "z"]},
        "b": {"states": ["u", "v"], "parents": ["a"]},
        "h": {"states": ["h0", "h1"], "parents": ["a"], "latent": True},
        "c": {"states": ["p", "q", "r"], "parents": ["a", "b"]},
        "d": {"states": ["e", "f"], "parents": ["h", "c"]},
    })
    rng = np.random.default_rng(8)
    x = np.stack([rng.integers(0, k, 4000) for k in net.cards], axis=1).astype(np.int32)
    x[rng.random(x.shape) < 0.25] = HIDDEN
    x[:, net.index("h")] = HIDDEN
    d, c, _ = reduce_rows(x, None, net.cards)
    data = CodedData(d, c * 1.0)
    df = pd.DataFrame(x, columns=net.names)
    need = ["a", "b", "c"]
    counts = complete_family_counts(net, data, need)
    for name in need:
        fam = list(net.node(name).parents) + [name]
        sub = df[fam][(df[fam] >= 0).all(axis=1)]
        want = np.zeros(net.cpt_shape(name))
        for key, n in sub.groupby(fam).size().items():
            want[key if isinstance(key, tuple) else (key,)] = n
        np.testing.assert_array_equal(counts[name], want)
    ref = complete_family_start(net, data, np.random.default_rng(1))
    lik = Likelihood(net, data, route="pattern")
    obs = lik.observed_family_counts()
    assert obs is not None and obs[1].all()
    via_plan = complete_family_start(net, data, np.random.default_rng(1), observed=obs)
    # a part of the rows counted beforehand, the others here
    part = rng.random(len(d)) < 0.5
    offsets, _, n_flat = layout_of(net)
    flat = np.zeros(n_flat)
    for name, cnt in complete_family_counts(net, data, need, rows=part).items():
        i = net.index(name)
        flat[offsets[i]:offsets[i] + cnt.size] = cnt.ravel()
    mixed = complete_family_start(net, data, np.random.default_rng(1), observed=(flat, part))
    for name in net.free_names:
        np.testing.assert_array_equal(via_plan[name], ref[name])
        np.testing.assert_allclose(mixed[name], ref[name], rtol=1e-15)
    for name in need:
        np.testing.assert_allclose(ref[name], (counts[name] + 0.5) / (counts[name] + 0.5).sum(axis=-1, keepdims=True))


def test_numpy_head_equals_the_jax_head():
    # The single-start optimiser's numpy head (softmax per CPT row, prior, penalty) and its
    # closed-form gradient against the JAX head differentiated by autodiff through
    # jax.nn.log_softmax (the batched starts use the JAX head).
    import jax.numpy as jnp

    from adfit.params import (fixed_log_tables, free_layout, head as _head, head_grad as _head_grad,
                              head_grad_np as _head_grad_np, head_np as _head_np)

    net = _head_test_network()
    lay = free_layout(net)
    rng = np.random.default_rng(6)
    z, scale = rng.normal(size=lay.size), rng.uniform(0.5, 2.0, lay.size)
    pseudo, fixed = rng.uniform(0, 2, lay.size), fixed_log_tables(net)
    counts = rng.uniform(0, 10, lay.n_flat + 2)
    for l2 in (0.0, 0.4):
        full_j, rest_j = _head(net, jnp.asarray(z), jnp.asarray(scale), jnp.asarray(pseudo), jnp.asarray(fixed), l2)
        full_n, rest_n, blocks = _head_np(lay, z, scale, pseudo, fixed, l2)
        np.testing.assert_allclose(full_n, np.asarray(full_j), rtol=1e-14, atol=1e-14)
        assert rest_n == pytest.approx(float(rest_j), rel=1e-13)
        g_j = _head_grad(net, jnp.asarray(z), jnp.asarray(scale), jnp.asarray(pseudo), jnp.asarray(fixed), l2,
                         jnp.asarray(counts), 30.0)
        g_n = _head_grad_np(lay, blocks, scale, pseudo, l2, counts, 30.0)
        np.testing.assert_allclose(g_n, np.asarray(g_j), rtol=1e-12, atol=1e-14)

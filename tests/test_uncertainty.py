"""Error bars and identifiability (adfit.uncertainty): closed forms on complete data, the
published linkage example, finite differences of the gradient, flat directions, the matrix-free
route against the dense one, the result file and the CLI."""

from __future__ import annotations

import json
import math
import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from typer.testing import CliRunner

from adfit import em as em_ref
from adfit.data import CodedData, encode_frame
from adfit.errors import OptionError
from adfit.fit import fit
from adfit.likelihood import Likelihood
from adfit.network import network_from_dict
from adfit.result import FitResult, load_result, write_result
from adfit.uncertainty import (attach_uncertainty, compute_uncertainty, interval_frames, make_coordinates,
                               observed_information, se_frame)

from published import (LINKAGE_COUNTS, LINKAGE_RATE, STOUFFER_TOBY_COUNTS, STOUFFER_TOBY_ITEMS, linkage_dlr,
                       linkage_mle, linkage_observed_information, linkage_one_parameter)


def _logit_wald(p: float, se: float, level: float = 0.95) -> tuple[float, float]:
    """Wald interval on the logit scale, mapped back (delta method: SE(logit p) = SE(p)/(p(1−p)));
    the usual logit interval for a proportion (common practice)."""
    z = stats.norm.ppf(0.5 + level / 2)
    lg = math.log(p / (1 - p))
    h = z * se / (p * (1 - p))
    return 1 / (1 + math.exp(-(lg - h))), 1 / (1 + math.exp(-(lg + h)))


# ============================================================================ complete data
def test_complete_binary_node_binomial_se():
    # one binary node, complete data: SE(p̂) = sqrt(p̂(1 − p̂)/n) (textbook binomial; common practice)
    net = network_from_dict({"x": {"states": ["no", "yes"]}})
    n, k = 57, 19
    data = CodedData(np.array([[0], [1]], dtype=np.int32), np.array([n - k, k], dtype=float))
    p = k / n
    unc = compute_uncertainty(net, data, {"x": np.array([1 - p, p])})
    se = unc.se["x"]
    assert se[1] == pytest.approx(math.sqrt(p * (1 - p) / n), rel=1e-10)
    assert se[0] == pytest.approx(se[1], rel=1e-10)
    lo, hi = _logit_wald(p, math.sqrt(p * (1 - p) / n))
    assert unc.lower["x"][1] == pytest.approx(lo, rel=1e-9) and unc.upper["x"][1] == pytest.approx(hi, rel=1e-9)
    # complete data: the observed information is the complete-data information (Louis 1982: nothing missing)
    assert unc.missing["x"]["largest"] == pytest.approx(0.0, abs=1e-9)
    assert unc.em_rate == pytest.approx(0.0, abs=1e-9)
    # the information in the logit of 'no' against 'yes' (the reference state) is n p (1 − p)
    assert unc.information[0, 0] == pytest.approx(n * p * (1 - p), rel=1e-10)


@pytest.fixture(scope="module")
def penguins():
    from palmerpenguins import load_penguins

    df = load_penguins()[["species", "island"]]
    net = network_from_dict({
        "species": {"states": ["Adelie", "Chinstrap", "Gentoo"]},
        "island": {"states": ["Biscoe", "Dream", "Torgersen"], "parents": ["species"]},
    })
    data = encode_frame(net, df)
    tab = pd.crosstab(df["species"], df["island"]).loc[["Adelie", "Chinstrap", "Gentoo"], ["Biscoe", "Dream", "Torgersen"]]
    return net, data, tab.to_numpy(dtype=float)


def test_complete_multinomial_and_boundary_on_penguins(penguins):
    # palmerpenguins (PyPI), species -> island, complete records: the MLE is the row proportion
    # and Cov(θ̂_u) = (diag θ − θθᵀ)/n_u (textbook multinomial), so SE = sqrt(θ(1−θ)/n_u). Chinstrap
    # and Gentoo live on one island each: their zero cells sit on the boundary, where the
    # interval is the exact binomial (Clopper & Pearson 1934) one for 0 (or n) events in n_u,
    # here checked against scipy.stats.binomtest.
    net, data, tab = penguins
    n_u = tab.sum(axis=1)
    probs = {"species": n_u / n_u.sum(), "island": tab / n_u[:, None]}
    unc = compute_uncertainty(net, data, probs)
    th = probs["island"]
    # Adelie: every island interior
    np.testing.assert_allclose(unc.se["island"][0], np.sqrt(th[0] * (1 - th[0]) / n_u[0]), rtol=1e-9)
    assert list(unc.status["island"][0]) == [0, 0, 0]
    for u, only in ((1, 1), (2, 0)):
        ci0 = stats.binomtest(0, int(n_u[u])).proportion_ci(method="exact")
        ciN = stats.binomtest(int(n_u[u]), int(n_u[u])).proportion_ci(method="exact")
        for k in range(3):
            if k == only:  # the state that takes every record: [1 − U, 1], no SE
                assert unc.lower["island"][u, k] == pytest.approx(ciN.low, rel=1e-9)
                assert unc.upper["island"][u, k] == 1.0
            else:          # zero events: [0, U], no SE
                assert unc.lower["island"][u, k] == 0.0
                assert unc.upper["island"][u, k] == pytest.approx(ci0.high, rel=1e-9)
            assert math.isnan(unc.se["island"][u, k])
    # root: multinomial SEs on all 344 records
    ps = probs["species"]
    np.testing.assert_allclose(unc.se["species"], np.sqrt(ps * (1 - ps) / n_u.sum()), rtol=1e-9)
    summary = unc.summary()
    assert len(summary["boundary_entries"]) == 6
    assert {e["parents"]["species"] for e in summary["boundary_entries"]} == {"Chinstrap", "Gentoo"}
    assert not summary["not_identified"] and not summary["directions"]


def test_map_se_counts_the_pseudo_counts_as_records(penguins):
    # MAP with pseudo-counts c on complete data: the objective is that of N + c records (the
    # Dirichlet posterior mode (N + c)/(N_u + Σc), Koller & Friedman 2009 ch. 17), so the observed
    # information of a row is (N_u + Σc)(diag θ − θθᵀ) and SE = sqrt(θ̂(1 − θ̂)/(N_u + Σc))
    net, data, tab = penguins
    c = 2.0
    n_u = tab.sum(axis=1)
    th = (tab + c) / (n_u + 3 * c)[:, None]
    ns = n_u + c
    probs = {"species": ns / ns.sum(), "island": th}
    pc = {"species": np.full(3, c), "island": np.full((3, 3), c)}
    unc = compute_uncertainty(net, data, probs, pseudo_counts=pc)
    np.testing.assert_allclose(unc.se["island"], np.sqrt(th * (1 - th) / (n_u + 3 * c)[:, None]), rtol=1e-9)
    assert not unc.summary()["boundary_entries"]  # the prior lifts the zero cells off the boundary


# ============================================================================ the linkage example
@pytest.fixture(scope="module")
def linkage_fits():
    # the closed-form MLE stands in for a fit (the CLI test runs fit and error bars end to end);
    # in DLR's encoding the row g | half = yes keeps whatever the start gave it
    pi = linkage_mle()
    out = {}
    for make, g in ((linkage_dlr, np.array([[0.4, 0.6], [pi, 1 - pi]])), (linkage_one_parameter, np.array([pi, 1 - pi]))):
        net, df = make()
        data = encode_frame(net, df, count_column="count")
        probs = {"half": net.fixed_table("half"), "g": g, "y": net.fixed_table("y")}
        res = FitResult(network=net, method="lbfgs", objective="mle", probs=probs,
                        log_likelihood=em_ref.log_likelihood(net, probs, data), converged=True,
                        n_rows=data.n_rows, n_distinct=data.n_distinct, settings={"l2": 0.0})
        out[make.__name__] = (net, data, res, attach_uncertainty(res, data))
    return out


def test_linkage_observed_information_and_missing_fraction(linkage_fits):
    # Dempster, Laird & Rubin (1977) §1/§3, genetic linkage data 125, 18, 20, 34. The observed
    # information at π̂ = 0.6268 is 377.5 and SE(π̂) = 0.0515 (recomputed from the closed form
    # 125/(2+π)² + 38/(1−π)² + 34/π², values from memory); in DLR's encoding the fraction of
    # missing information, EM's rate, is 0.1328 (DLR §3, published).
    net, data, res, out = linkage_fits["linkage_dlr"]
    pi = linkage_mle()
    sec = out.extras["nodes"]["g"]
    se = sec["se"][1][0]
    assert se == pytest.approx(1 / math.sqrt(linkage_observed_information(pi)), rel=1e-6)
    assert se == pytest.approx(0.0515, abs=5e-5)
    # the information in π itself: I_φ / (dπ/dφ)², dπ/dφ = π(1 − π) for the logit φ
    I_phi = observed_information(net, data, res.probs)[0]
    co = make_coordinates(net, res.probs, Likelihood(net, data).expected_counts(res.probs)[1])
    j = [i for i, c in enumerate(co.coords) if c[:2] == ("g", 1)][0]
    assert I_phi[j, j] / (pi * (1 - pi)) ** 2 == pytest.approx(377.5, abs=0.05)
    assert sec["missing_information"]["rows"][1] == pytest.approx(LINKAGE_RATE, abs=5e-5)
    lo, hi = _logit_wald(pi, se)
    assert sec["interval"][0][1][0] == pytest.approx(lo, rel=1e-6) and sec["interval"][1][1][0] == pytest.approx(hi, rel=1e-6)


def test_linkage_one_parameter_missing_fraction_closed_form(linkage_fits):
    # same likelihood, g now a root hidden in all 197 records: complete-data information
    # 197/(π(1−π)), so the fraction of missing information is 1 − I_obs π(1−π)/197 (Louis 1982)
    net, data, res, out = linkage_fits["linkage_one_parameter"]
    pi = linkage_mle()
    want = 1 - linkage_observed_information(pi) * pi * (1 - pi) / sum(LINKAGE_COUNTS)
    mi = out.extras["nodes"]["g"]["missing_information"]
    assert mi["largest"] == pytest.approx(want, abs=1e-6)
    assert out.extras["uncertainty"]["em_rate"] == pytest.approx(want, abs=1e-6)
    assert out.extras["nodes"]["g"]["se"][0][0] == pytest.approx(1 / math.sqrt(linkage_observed_information(pi)), rel=1e-6)


def test_linkage_unused_row_is_flagged_not_given_a_tiny_se(linkage_fits):
    # DLR's encoding: the row g | half = yes does not enter the likelihood (cell 1 either way)
    net, data, res, out = linkage_fits["linkage_dlr"]
    # ground truth by the independent EM code: changing that row leaves the likelihood unchanged
    other = {**res.probs, "g": np.array([[0.05, 0.95], res.probs["g"][1]])}
    assert em_ref.log_likelihood(net, other, data) == pytest.approx(em_ref.log_likelihood(net, res.probs, data), abs=1e-10)
    sec = out.extras["nodes"]["g"]
    assert sec["se"][0] == [None, None]
    assert sec["interval"][0][0] == [0.0, 0.0] and sec["interval"][1][0] == [1.0, 1.0]
    assert sec["se_status"][0] == ["not identified", "not identified"]
    summ = out.extras["uncertainty"]
    assert summ["not_identified"] == [{"node": "g", "row": 0, "parents": {"half": "yes"}}]
    flat = [d for d in summ["directions"] if d["kind"] == "flat"]
    assert len(flat) == 1 and flat[0]["rows"][0]["node"] == "g" and flat[0]["rows"][0]["parents"] == {"half": "yes"}
    assert summ["em_rate"] == 1.0  # a flat direction: EM would not move along it at all
    assert sec["missing_information"]["largest"] == 1.0
    # g appears in the fixed CPT of y, so its labelling is pinned: no relabelling note
    assert summ["latent"] == {}


def test_wide_entries_listed_at_the_stated_threshold(linkage_fits):
    net, data, res, _ = linkage_fits["linkage_dlr"]
    out = attach_uncertainty(res, data, wide=0.15)   # the π interval is about 0.2 wide
    wide = out.extras["uncertainty"]["wide_entries"]
    assert out.extras["uncertainty"]["wide_threshold"] == 0.15
    assert {(e["row"], e["status"]) for e in wide} == {(0, "not identified"), (1, "interior")}
    assert all(e["width"] > 0.15 for e in wide)
    out = attach_uncertainty(res, data, wide=0.25)
    assert {e["status"] for e in out.extras["uncertainty"]["wide_entries"]} == {"not identified"}


# ============================================================================ finite differences
def _random_case(seed: int):
    """Small network (root v0 -> latent h -> v1, v2) with random CPTs and random records with
    hidden cells (the check is against finite differences, not the data)."""
    rng = np.random.default_rng(seed)
    net = network_from_dict({
        "v0": {"states": ["a", "b", "c"]},
        "h": {"states": ["h0", "h1"], "parents": ["v0"], "latent": True},
        "v1": {"states": ["x", "y"], "parents": ["h"]},
        "v2": {"states": ["p", "q"], "parents": ["h"]},
    })
    codes = np.stack([rng.integers(0, 3, 30), np.full(30, -1), rng.integers(0, 2, 30), rng.integers(0, 2, 30)], axis=1)
    hide = rng.random((30, 4)) < 0.3
    hide[:, 1] = True
    codes = np.where(hide, -1, codes).astype(np.int32)
    data = CodedData(codes, rng.integers(1, 4, 30).astype(float))
    probs = {n: rng.dirichlet(np.ones(net.cpt_shape(n)[-1]) * 2, size=net.cpt_shape(n)[:-1]) for n in net.free_names}
    return net, data, probs


def _fisher_gradient(lik, co, pseudo, l2, phi):
    """∂F/∂φ at coordinates φ from the expected counts (Fisher's identity, Dempster, Laird & Rubin
    1977 eq. 2.13), through the expected-counts program rather than the Hessian's autodiff."""
    probs = co.probs_at(phi)
    logits = co.logits_at(phi)
    _, counts = lik.expected_counts(probs)
    g = np.empty(co.size)
    for j, (name, u, k) in enumerate(co.coords):
        n = (counts[name] + pseudo.get(name, 0.0)).reshape(-1, probs[name].shape[-1])[u]
        th = probs[name].reshape(-1, n.size)[u]
        eta = logits[name].reshape(-1, n.size)[u]
        g[j] = n[k] - th[k] * n.sum() - 2 * l2 * (eta[k] - eta.mean())
    return g


@pytest.mark.parametrize("seed,with_prior,l2", [(0, False, 0.0), (1, True, 0.0), (2, True, 0.3)])
def test_hessian_equals_finite_differences_of_the_gradient(seed, with_prior, l2):
    net, data, probs = _random_case(seed)
    pseudo = {n: np.full(net.cpt_shape(n), 0.7) for n in net.free_names} if with_prior else {}
    info, co = observed_information(net, data, probs, pseudo_counts=pseudo or None, l2=l2, batch=8)
    assert co.size == net.n_free_parameters()  # random interior CPTs: every coordinate is free
    lik = Likelihood(net, data)
    h = 1e-5
    fd = np.empty_like(info)
    for j in range(co.size):
        e = np.zeros(co.size)
        e[j] = h
        fd[:, j] = -(_fisher_gradient(lik, co, pseudo, l2, e) - _fisher_gradient(lik, co, pseudo, l2, -e)) / (2 * h)
    np.testing.assert_allclose(info, fd, rtol=1e-6, atol=1e-6 * np.abs(info).max())


@pytest.mark.parametrize("batch", [4, 8])
def test_batched_information_equals_one_column_at_a_time(batch):
    """The vmapped batches of Hessian-vector products (padded last batch, smaller row chunks)
    give the same matrix as one Hessian-vector product per column (batch 1), to rounding; each
    single column is itself checked against finite differences above (jvp of the gradient is
    the directional derivative of the gradient, Griewank & Walther 2008, ch. 3)."""
    net, data, probs = _random_case(1)
    pseudo = {n: np.full(net.cpt_shape(n), 0.7) for n in net.free_names}
    one, co1 = observed_information(net, data, probs, pseudo_counts=pseudo, l2=0.3, batch=1)
    many, co = observed_information(net, data, probs, pseudo_counts=pseudo, l2=0.3, batch=batch)
    assert co.coords == co1.coords and co.size % batch != 0  # a padded last batch is exercised
    assert np.abs(one).max() > 1.0  # not a trivially small matrix
    np.testing.assert_allclose(many, one, rtol=1e-10, atol=1e-10 * np.abs(one).max())


# ============================================================================ a latent row the data never reach
@pytest.fixture(scope="module")
def latent_case():
    # Stouffer & Toby (1951) role-conflict items (Goodman 1974's two-class model) recorded for
    # group a0; group a1 adds 25 records with every item missing, so P(cls | group = a1) never
    # enters the likelihood: a latent node whose children are all missing for one parent state
    nodes = {"group": {"states": ["a0", "a1"]},
             "cls": {"states": ["k1", "k2"], "parents": ["group"], "latent": True}}
    for it in STOUFFER_TOBY_ITEMS:
        nodes[it] = {"states": ["+", "-"], "parents": ["cls"]}
    net = network_from_dict(nodes)
    rows = []
    for k, c in enumerate(STOUFFER_TOBY_COUNTS):
        bits = [(k >> (3 - j)) & 1 for j in range(4)]
        rows.append({"group": "a0", **{it: "+-"[b] for it, b in zip(STOUFFER_TOBY_ITEMS, bits)}, "count": c})
    rows.append({"group": "a1", **{it: "" for it in STOUFFER_TOBY_ITEMS}, "count": 25})
    data = encode_frame(net, pd.DataFrame(rows), count_column="count")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = fit(net, data, restarts=3, seed=1)
    return net, data, res


def test_latent_row_without_evidence_is_not_identified(latent_case):
    net, data, res = latent_case
    # ground truth by the independent EM code: the row cls | a1 leaves the likelihood unchanged
    moved = {**res.probs, "cls": np.array([res.probs["cls"][0], [0.9, 0.1]])}
    assert em_ref.log_likelihood(net, moved, data) == pytest.approx(em_ref.log_likelihood(net, res.probs, data), abs=1e-9)
    unc = compute_uncertainty(net, data, res.probs)
    summ = unc.summary()
    assert summ["not_identified"] == [{"node": "cls", "row": 1, "parents": {"group": "a1"}}]
    assert np.all(np.isnan(unc.se["cls"][1])) and list(unc.lower["cls"][1]) == [0, 0] and list(unc.upper["cls"][1]) == [1, 1]
    flat = [d for d in summ["directions"] if d["kind"] == "flat"]
    assert len(flat) == 1 and flat[0]["rows"][0]["parents"] == {"group": "a1"} and flat[0]["rows"][0]["share"] > 0.99
    # the rest is identified (Goodman's model on the a0 records): finite SEs, intervals inside (0, 1)
    for it in STOUFFER_TOBY_ITEMS:
        assert np.all(np.isfinite(unc.se[it])) and np.all(unc.status[it] == 0), it
        assert np.all((unc.lower[it] > 0) & (unc.upper[it] < 1))
    assert np.all(np.isfinite(unc.se["cls"][0]))
    assert "cls" in summ["latent"]  # a free latent root of the items: labels up to permutation


def test_matrix_free_route_matches_dense(latent_case):
    net, data, res = latent_case
    dense = compute_uncertainty(net, data, res.probs, method="dense")
    free = compute_uncertainty(net, data, res.probs, method="matrix-free", n_eig=3)
    for n in net.free_names:
        np.testing.assert_array_equal(dense.status[n], free.status[n])
        np.testing.assert_allclose(free.se[n], dense.se[n], rtol=1e-6, equal_nan=True)
        np.testing.assert_allclose(free.lower[n], dense.lower[n], rtol=1e-6, atol=1e-12)
    assert free.relative_eigenvalues[0] == pytest.approx(dense.relative_eigenvalues[0], abs=1e-8)
    assert free.em_rate == pytest.approx(dense.em_rate, abs=1e-8)
    assert free.missing["item1"]["largest"] == pytest.approx(dense.missing["item1"]["largest"], rel=1e-6)
    # only the requested node is computed
    part = compute_uncertainty(net, data, res.probs, method="matrix-free", nodes=["item2"], n_eig=3)
    np.testing.assert_allclose(part.se["item2"], dense.se["item2"], rtol=1e-6)
    assert np.all(part.status["item1"] == 4) and part.missing["item1"] is None


def test_parent_configuration_without_records():
    # an observed parent state that no record has: its row is "no data", interval [0, 1]; with a
    # prior it is informed by the prior alone, SE = sqrt(θ(1−θ)/Σc) (the Dirichlet mode's curvature)
    net = network_from_dict({"a": {"states": ["u", "v", "w"]}, "b": {"states": ["n", "y"], "parents": ["a"]}})
    data = CodedData(np.array([[0, 0], [0, 1], [1, 0], [1, 1]], dtype=np.int32), np.array([5.0, 3.0, 2.0, 6.0]))
    probs = {"a": np.array([0.5, 0.5, 0.0]), "b": np.array([[5 / 8, 3 / 8], [0.25, 0.75], [0.5, 0.5]])}
    unc = compute_uncertainty(net, data, probs)
    summ = unc.summary()
    assert summ["no_data_rows"] == [{"node": "b", "row": 2, "parents": {"a": "w"}}]
    assert [(e["node"], e["state"]) for e in summ["boundary_entries"]] == [("a", "w")]  # P(a = w) → 0
    assert list(unc.lower["b"][2]) == [0, 0] and list(unc.upper["b"][2]) == [1, 1] and np.all(np.isnan(unc.se["b"][2]))
    np.testing.assert_allclose(unc.se["b"][0], math.sqrt(15 / 64 / 8), rtol=1e-9)
    pc = {"a": np.ones(3), "b": np.full((3, 2), 1.5)}
    map_probs = {"a": np.array([9, 9, 1]) / 19, "b": np.array([[6.5, 4.5], [3.5, 7.5], [1.5, 1.5]]) / [[11], [11], [3]]}
    unc = compute_uncertainty(net, data, map_probs, pseudo_counts=pc)
    assert {"node": "b", "row": 2, "parents": {"a": "w"}} in unc.summary()["prior_only_rows"]
    np.testing.assert_allclose(unc.se["b"][2], math.sqrt(0.25 / 3.0), rtol=1e-9)


# ============================================================================ the result, options, the CLI
def test_result_file_layout_and_python_accessors(linkage_fits, tmp_path):
    net, data, res, out = linkage_fits["linkage_dlr"]
    path = tmp_path / "fit.json"
    write_result(path, out)
    doc = json.loads(path.read_text())
    g = doc["nodes"]["g"]
    assert np.shape(g["se"]) == np.shape(g["table"]) == (2, 2)
    assert np.shape(g["interval"]) == (2, 2, 2)
    assert doc["uncertainty"]["not_identified"][0]["parents"] == {"half": "yes"}
    back = load_result(path)
    se = se_frame(back, "g")
    lo, hi = interval_frames(back, "g")
    assert se.shape == lo.shape == hi.shape == back.cpt("g").shape
    assert np.isnan(se.iloc[0, 0]) and se.iloc[1, 0] == pytest.approx(g["se"][1][0])
    assert (lo.to_numpy() <= back.cpt("g").to_numpy() + 1e-12).all() and (back.cpt("g").to_numpy() <= hi.to_numpy() + 1e-12).all()
    with pytest.raises(OptionError, match="no error bars"):
        se_frame(res, "g")


def test_objective_must_match_the_fit(linkage_fits):
    import dataclasses

    net, data, res, _ = linkage_fits["linkage_one_parameter"]
    with pytest.raises(OptionError, match="L2 penalty of 0.1"):
        attach_uncertainty(dataclasses.replace(res, settings={"l2": 0.1}), data)
    with pytest.raises(OptionError, match="error bars of a MAP fit needs the prior"):
        attach_uncertainty(dataclasses.replace(res, objective="map"), data)
    with pytest.raises(OptionError, match="maximum-likelihood"):
        attach_uncertainty(res, data, pseudo_counts={"g": np.ones(2)})
    with pytest.raises(OptionError, match="level"):
        attach_uncertainty(res, data, level=95)


def test_cli_fit_prints_error_bars_and_no_errors_skips(tmp_path, monkeypatch):
    import adfit.uncertainty as unc_mod
    from adfit.cli import app

    (tmp_path / "net.toml").write_text('[nodes.x]\nstates = ["no", "yes"]\n[nodes.y]\nstates = ["lo", "hi"]\nparents = ["x"]\n')
    rows = ["x,y"] + ["no,lo"] * 7 + ["no,hi"] * 3 + ["yes,hi"] * 6 + ["yes,"] * 2 + ["yes,lo"] * 2
    (tmp_path / "d.csv").write_text("\n".join(rows) + "\n")
    runner = CliRunner()
    args = ["fit", str(tmp_path / "net.toml"), str(tmp_path / "d.csv"), "--out", str(tmp_path / "f.json")]
    r = runner.invoke(app, args + ["--verbose"])
    assert r.exit_code == 0, r.output
    assert "error bars: 95% intervals" in r.output and "intervals for P(y | x)" in r.output
    # estimates first, then intervals
    assert r.output.index("\nP(y | x)") < r.output.index("intervals for P(y | x)")
    short = runner.invoke(app, args)
    assert short.exit_code == 0, short.output
    assert "Error bars: 95% intervals" in short.output and "intervals for P(y | x)" not in short.output
    doc = json.loads((tmp_path / "f.json").read_text())
    # x is complete: SE of P(x = yes) = sqrt(p(1 − p)/n), n = 20, p = 0.5 (binomial)
    assert doc["nodes"]["x"]["se"][0][1] == pytest.approx(math.sqrt(0.25 / 20), rel=1e-6)
    assert "uncertainty" in doc
    r = runner.invoke(app, args + ["--no-errors"])
    assert r.exit_code == 0, r.output
    doc = json.loads((tmp_path / "f.json").read_text())
    assert "se" not in doc["nodes"]["x"] and "uncertainty" not in doc and "error bars" not in r.output
    # the default skips large jobs (here: any), saying why; --errors forces them
    monkeypatch.setattr(unc_mod, "AUTO_MAX_SECONDS", 0.0)
    r = runner.invoke(app, args + ["-q"])
    assert r.exit_code == 0 and "error bars skipped" in r.output and "--errors" in r.output
    assert "uncertainty" not in json.loads((tmp_path / "f.json").read_text())
    r = runner.invoke(app, args + ["-q", "--errors"])
    assert r.exit_code == 0 and "error bars skipped" not in r.output
    assert "uncertainty" in json.loads((tmp_path / "f.json").read_text())

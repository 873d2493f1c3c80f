"""EM cross-check (adfit.crosscheck) and EM against the JAX core: Fisher's identity, agreement on
identifiable cases, the published latent class example, the verdicts, the result file."""

from __future__ import annotations

import dataclasses
import json
import warnings

import numpy as np
import pandas as pd
import pytest

from adfit.crosscheck import align_latent_states, attach_em_check, em_check, format_em_check, relabel
from adfit.data import encode_frame
from adfit.em import em_fit, expected_counts, fit_em, random_start
from adfit.errors import OptionError
from adfit.fit import fit
from adfit.likelihood import Likelihood, logits_from_probs
from adfit.network import network_from_dict
from adfit.result import FitResult, load_result, write_result

from published import (STOUFFER_TOBY_CLASS_SIZES, STOUFFER_TOBY_P_PLUS, linkage_dlr, linkage_mle,
                       linkage_one_parameter, stouffer_toby)
from test_em import random_case


@pytest.fixture(scope="module")
def st_case():
    net, df = stouffer_toby()
    data = encode_frame(net, df, count_column="count")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = fit(net, data, seed=0, restarts=3)
    return net, data, res


def _as_fit(net, data, probs, *, converged=True, method="lbfgs", objective="mle", log_prior=0.0, **kw):
    """A FitResult at given CPTs (to drive the verdicts from known points)."""
    _, ll = expected_counts(net, probs, data)
    return FitResult(network=net, method=method, objective=objective, probs=probs, log_likelihood=ll,
                     log_prior=log_prior, converged=converged, n_rows=data.n_rows, n_distinct=data.n_distinct, **kw)


# ============================================================================ EM versus the JAX core
@pytest.mark.parametrize("seed", [0, 2, 5, 9])
def test_fisher_identity_jax_gradient_equals_em_counts(seed):
    # Fisher's identity (Dempster, Laird & Rubin 1977, eq. 2.13): d log L / d logit(x|u) equals
    # N̂(x,u) − θ(x|u) N̂(u), N̂ from EM's own expected counts; the JAX gradient must match
    net, data, _ = random_case(seed, n_nodes=4, p_missing=0.35)
    probs = random_start(net, seed + 1)
    counts, ll = expected_counts(net, probs, data)
    lik = Likelihood(net, data)
    val, grad = lik.value_and_grad(logits_from_probs(net, probs))
    assert float(val) == pytest.approx(ll, rel=1e-12)
    for m in net.free_names:
        ref = counts[m] - probs[m] * counts[m].sum(axis=-1, keepdims=True)
        np.testing.assert_allclose(np.asarray(grad[m]), ref, rtol=1e-9, atol=1e-10)


@pytest.mark.parametrize("seed", [1, 4])
def test_gradient_fit_and_em_agree_on_identifiable_cases(seed):
    # no latent node, 300 records, 20% of cells missing at random (MCAR): the MLE is unique
    # (identifiable), so L-BFGS and EM must meet. Tolerances: objective within 1e-8 relative,
    # every CPT entry within 1e-5.
    net, data, _ = random_case(seed, n_nodes=4, n_rows=300, p_missing=0.2, latent=False, fixed=False)
    res = fit(net, data, seed=0)
    assert res.converged
    chk = em_check(res, data, ll_rtol=1e-8, theta_atol=1e-5)
    assert chk["verdict"] == "agree", format_em_check(chk)
    assert chk["max_abs_delta_theta"] <= 1e-5
    assert chk["em_from_fit"]["max_abs_delta_theta"] <= 1e-5
    # the JAX gradient norm at EM's answer equals EM's own (Fisher's identity again)
    own = chk["em_own_start"]
    assert own["gradient_norm"] == pytest.approx(own["em_gradient_norm"], rel=1e-6, abs=1e-9)
    assert own["jax_log_likelihood"] == pytest.approx(own["log_likelihood"], rel=1e-12)


def test_stouffer_toby_gradient_fit_and_em_check(st_case):
    # Goodman (1974, Biometrika), Stouffer-Toby data, two classes (values from memory, 3 decimals:
    # tolerance 6e-4, up to relabelling); the gradient fit must reproduce them and EM must agree
    net, data, res = st_case
    p_plus = np.array([[res.probs[f"item{j + 1}"][k, 0] for j in range(4)] for k in range(2)])
    errs = []
    for perm in ([0, 1], [1, 0]):
        errs.append(max(np.max(np.abs(res.probs["cls"][perm] - STOUFFER_TOBY_CLASS_SIZES)),
                        np.max(np.abs(p_plus[perm] - STOUFFER_TOBY_P_PLUS))))
    assert min(errs) < 6e-4
    chk = em_check(res, data, seed=3)
    assert chk["verdict"] == "agree", format_em_check(chk)
    json.dumps(chk)  # JSON-ready
    # swap the classes in the fit's answer: the check must relabel EM's states to match
    sw = {"cls": res.probs["cls"][::-1].copy(), **{m: res.probs[m][::-1].copy() for m in net.names if m != "cls"}}
    swapped = dataclasses.replace(res, probs=sw)
    chk2 = em_check(swapped, data, seed=3)
    assert chk2["verdict"] == "agree"
    assert chk["latent_permutation"]["cls"] != chk2["latent_permutation"]["cls"]


# ============================================================================ verdicts
def test_saddle_point_gives_different_optima(st_case):
    # the symmetric point (both classes equal, items at their marginal frequencies) is a
    # stationary point of every latent class likelihood; EM stays there, EM from its own start
    # climbs to the Goodman optimum: the likelihood has several stationary points
    net, data, res = st_case
    _, df = stouffer_toby()
    probs = {"cls": np.array([0.5, 0.5])}
    for it in ("item1", "item2", "item3", "item4"):
        p = df.loc[df[it] == "+", "count"].sum() / 216
        probs[it] = np.array([[p, 1 - p], [p, 1 - p]])
    saddle = _as_fit(net, data, probs)
    chk = em_check(saddle, data, seed=1)
    assert chk["verdict"] == "disagree-different-optima", format_em_check(chk)
    assert chk["higher"] == "em"
    assert chk["em_own_start"]["objective_value"] == pytest.approx(res.log_likelihood, rel=1e-9)
    assert chk["fit"]["gradient_norm"] < 1e-9


def test_not_converged_verdicts():
    net, df = linkage_one_parameter()
    data = encode_frame(net, df, count_column="count")
    far = {"g": np.array([0.3, 0.7])}
    # the fit says it did not converge
    chk = em_check(_as_fit(net, data, far, converged=False), data)
    assert chk["verdict"] == "not-converged" and "the fit did not meet" in chk["detail"]
    # the fit claims convergence at a point that is not a maximum: EM from it climbs
    chk = em_check(_as_fit(net, data, far, converged=True), data)
    assert chk["verdict"] == "not-converged" and "climbed" in chk["detail"]
    # EM given too few iterations
    pi = linkage_mle()
    chk = em_check(_as_fit(net, data, {"g": np.array([pi, 1 - pi])}), data, max_iter=2)
    assert chk["verdict"] == "not-converged" and "own start did not converge" in chk["detail"]


def test_flat_row_gives_different_parameters():
    # linkage data in DLR's encoding: the row g | half = yes does not enter the likelihood, so EM
    # keeps its own random start there while the fit keeps the given value (not identified)
    net, df = linkage_dlr()
    data = encode_frame(net, df, count_column="count")
    pi = linkage_mle()
    at = _as_fit(net, data, {"g": np.array([[0.9, 0.1], [pi, 1 - pi]])})
    chk = em_check(at, data)
    assert chk["verdict"] == "disagree-different-parameters", format_em_check(chk)
    assert chk["em_own_start"]["largest_delta_at"]["parents"] == {"half": "yes"}
    assert abs(chk["objective_difference"]) < 1e-9


def test_map_check_and_prior_requirements():
    # MAP on the linkage data: EM's MAP M-step and the gradient fit of log L + Σ c log θ meet
    net, df = linkage_one_parameter()
    data = encode_frame(net, df, count_column="count")
    c = {"g": np.array([3.0, 1.0])}
    res = fit(net, data, pseudo_counts=c)
    assert res.objective == "map"
    chk = em_check(res, data, pseudo_counts=c)
    assert chk["verdict"] == "agree" and chk["objective"] == "map", format_em_check(chk)
    with pytest.raises(OptionError, match="needs the prior"):
        em_check(res, data)
    with pytest.raises(OptionError, match="L2"):
        em_check(dataclasses.replace(res, settings={"l2": 0.1}), data, pseudo_counts=c)


# ============================================================================ relabelling
def test_align_latent_states_recovers_a_permutation():
    # two latent nodes in a chain (h1 -> h2) with observed children; permute both and recover
    net = network_from_dict({
        "h1": {"states": ["a", "b", "c"], "latent": True},
        "h2": {"states": ["p", "q"], "parents": ["h1"], "latent": True},
        "x": {"states": ["0", "1", "2"], "parents": ["h1"]},
        "y": {"states": ["0", "1"], "parents": ["h2", "x"]},
        "z": {"states": ["0", "1"], "parents": ["h2"]},
    })
    ref = random_start(net, 4)
    perms = {"h1": np.array([2, 0, 1]), "h2": np.array([1, 0])}
    inv = {k: np.argsort(v) for k, v in perms.items()}
    moved = relabel(net, ref, inv)  # a relabelled copy of ref
    found = align_latent_states(net, moved, ref)
    for k in perms:
        np.testing.assert_array_equal(found[k], perms[k])
    back = relabel(net, moved, found)
    for m in net.names:
        np.testing.assert_allclose(back[m], ref[m], atol=0)


# ============================================================================ result file
def test_em_result_file_round_trip(tmp_path):
    net, df = stouffer_toby()
    data = encode_frame(net, df, count_column="count")
    res = fit_em(net, data, seed=2)
    assert res.method == "em" and res.converged
    em = em_fit(net, data, seed=2)
    assert res.log_likelihood == em.log_likelihood
    path = tmp_path / "r.json"
    write_result(path, res)
    doc = json.loads(path.read_text())
    assert doc["format"] == "adfit-result/1" and doc["method"] == "em" and doc["objective"] == "mle"
    assert doc["em"]["rate"] == pytest.approx(em.rate)
    back = load_result(path)
    for m in net.names:
        np.testing.assert_allclose(back.probs[m], res.probs[m], rtol=1e-15)
    checked = attach_em_check(res, data)
    assert checked.extras["em_check"]["verdict"] == "agree"
    write_result(path, checked)
    assert json.loads(path.read_text())["em_check"]["verdict"] == "agree"

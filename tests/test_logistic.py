"""Logistic CPTs in the gradient fit (adfit/forms.py through adfit/params.py).

Checks against outside references: statsmodels' multinomial logit (``MNLogit`` with the first
level of every factor dropped) on complete data, brute-force enumeration of the hidden cells,
finite differences, and the EM reference (generalised EM with Newton M-steps, adfit/emforms.py).
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from adfit import forms
from adfit.data import load_data
from adfit.fit import Fitter, FitSettings, fit
from adfit.likelihood import score
from adfit.network import parse_network
from adfit.params import free_layout, head, head_np

from test_emforms import brute_force_loglik, net_with, simulate

CHILD = {"states": ["low", "mid", "high"], "cpd": "logistic"}
TRUE = {"intercept": [0.0, 0.5, -1.0],
        "coefficients": {"a": {"no": [0, 0, 0], "yes": [0, 1.0, 2.0]},
                         "b": {"lo": [0, 0, 0], "mid": [0, -0.5, 0.7], "hi": [0, 0.3, 1.5]}}}


def _truth(net):
    rows = forms.rows_from_parameters(net, "y", TRUE)
    return {"a": np.array([0.6, 0.4]), "b": np.array([0.5, 0.3, 0.2]), "y": forms.implied_table(net, "y", rows)}


def _quiet_fit(*args, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return fit(*args, **kwargs)


def test_logistic_table_is_the_softmax_of_the_linear_predictor():
    # log P(y | a, b) = intercept(y) + coef_a(a, y) + coef_b(b, y) − log Σ exp(...) (by hand)
    net = net_with(CHILD)
    tab = _truth(net)["y"]
    for a, sa in enumerate(["no", "yes"]):
        for b, sb in enumerate(["lo", "mid", "hi"]):
            eta = (np.array(TRUE["intercept"]) + np.array(TRUE["coefficients"]["a"][sa])
                   + np.array(TRUE["coefficients"]["b"][sb]))
            np.testing.assert_allclose(tab[a, b], np.exp(eta) / np.exp(eta).sum(), atol=1e-15)
    # the parameters are read back off the table, and the JAX log-table agrees with numpy
    back = forms.parameters_json(net, "y", forms.rows_from_table(net, "y", tab))
    np.testing.assert_allclose(back["coefficients"]["b"]["hi"], TRUE["coefficients"]["b"]["hi"], atol=1e-12)
    rows = forms.rows_from_parameters(net, "y", TRUE)
    np.testing.assert_allclose(np.exp(np.asarray(forms.implied_log_table(net, "y", np.log(rows)))), tab, rtol=1e-13)


def test_complete_data_fit_equals_statsmodels_mnlogit():
    net = net_with(CHILD)
    df = simulate(net, _truth(net), 2000, seed=1)
    res = _quiet_fit(net, df, gtol=1e-11)
    assert res.converged
    par = res.extras["nodes"]["y"]["parameters"]
    assert res.extras["nodes"]["y"]["cpd"] == "logistic"
    # statsmodels: dummies with the first level dropped, the first outcome the reference
    X = sm.add_constant(pd.DataFrame({"a_yes": (df.a == "yes").astype(float), "b_mid": (df.b == "mid").astype(float),
                                      "b_hi": (df.b == "hi").astype(float)}))
    y = df.y.map({"low": 0, "mid": 1, "high": 2})
    ref = sm.MNLogit(y, X).fit(method="newton", tol=1e-12, disp=0, maxiter=100)
    got = np.array([par["intercept"][1:], par["coefficients"]["a"]["yes"][1:],
                    par["coefficients"]["b"]["mid"][1:], par["coefficients"]["b"]["hi"][1:]])
    np.testing.assert_allclose(got, ref.params.to_numpy(), atol=1e-6)
    # the references are present as 0
    assert par["coefficients"]["a"]["no"] == [0.0, 0.0, 0.0] and par["intercept"][0] == 0.0
    # standard errors: the observed information of the marginal likelihood in the coefficients
    # equals the multinomial logit's (statsmodels' bse, from its Hessian at the MLE)
    from adfit.uncertainty import attach_uncertainty

    sec = attach_uncertainty(res, df).extras["nodes"]["y"]
    se = sec["parameters_se"]
    got_se = np.array([se["intercept"][1:], se["coefficients"]["a"]["yes"][1:],
                       se["coefficients"]["b"]["mid"][1:], se["coefficients"]["b"]["hi"][1:]])
    np.testing.assert_allclose(got_se, ref.bse.to_numpy(), rtol=1e-5)
    assert se["intercept"][0] is None and se["coefficients"]["a"]["no"] == [None, None, None]
    lo, hi = sec["parameters_interval"]
    np.testing.assert_allclose(np.array(hi["coefficients"]["b"]["hi"][1:]) - np.array(lo["coefficients"]["b"]["hi"][1:]),
                               2 * 1.959963984540054 * ref.bse.to_numpy()[3], rtol=1e-5)  # Wald, z(0.975)
    assert sec["parameters_status"]["b=hi"] == ["constrained", "interior", "interior"]
    assert len(sec["se"]) == 6  # the implied table's, by the delta method
    # log L of the child given its parents equals statsmodels' (the parents' part is closed form)
    ll_y = res.log_likelihood - sum(float((c * np.log(c / c.sum())).sum())
                                    for c in (df.a.value_counts().to_numpy(float), df.b.value_counts().to_numpy(float)))
    assert ll_y == pytest.approx(ref.llf, abs=1e-6)


def test_head_agrees_in_jax_and_numpy_and_gradient_matches_finite_differences():
    net = parse_network({"nodes": {
        "h": {"states": ["x", "z"], "latent": True},
        "a": {"states": ["no", "yes"], "parents": ["h"]},
        "b": {"states": ["lo", "mid", "hi"]},
        "y": {"states": ["low", "mid", "high"], "parents": ["h", "b"], "cpd": "logistic"},
        "y2": {"states": ["low", "mid", "high"], "parents": ["h", "b"], "tied_to": "y"}}})
    rng = np.random.default_rng(2)
    probs = {"h": np.array([0.6, 0.4]), "a": np.array([[0.8, 0.2], [0.3, 0.7]]), "b": np.array([0.5, 0.3, 0.2])}
    truth_y = {"intercept": TRUE["intercept"], "coefficients": {"h": {"x": [0, 0, 0], "z": [0, 1.0, 2.0]},
                                                                "b": TRUE["coefficients"]["b"]}}
    probs["y"] = probs["y2"] = forms.implied_table(net, "y", forms.rows_from_parameters(net, "y", truth_y))
    df = simulate(net, probs, 600, seed=3, missing={"a": 0.3, "y": 0.2})
    f = Fitter(net, load_data(net, df), settings=FitSettings())
    lay = free_layout(net)
    z, scale = rng.normal(size=lay.size), rng.uniform(0.5, 2, size=lay.size)
    pseudo = np.zeros(lay.size)
    fj, rj = head(net, z, scale, pseudo, f.fixed_flat, 0.05)
    fn, rn, _ = head_np(lay, z, scale, pseudo, f.fixed_flat, 0.05)
    np.testing.assert_allclose(np.asarray(fj), fn, rtol=1e-12, atol=1e-12)
    _, g = f.objective_fg(z, scale, pseudo, 0.05, f.n_total)
    for i in rng.choice(lay.size, size=8, replace=False):
        e = np.zeros(lay.size)
        e[i] = 1e-6
        fd = (f.objective_fg(z + e, scale, pseudo, 0.05, f.n_total)[0]
              - f.objective_fg(z - e, scale, pseudo, 0.05, f.n_total)[0]) / 2e-6
        assert g[i] == pytest.approx(fd, rel=1e-5, abs=1e-9)
    # the fit: brute-force likelihood, the EM reference agrees, the tie holds, `score` is stationary
    res = _quiet_fit(net, df, restarts=2, em_check=True)
    # EM from the fit's answer converged without climbing (its own start may need more than the
    # default iterations: generalised EM on a latent logistic model is slow)
    assert res.converged and res.extras["em_check"]["verdict"] in ("agree", "em-own-start-not-converged")
    assert res.log_likelihood == pytest.approx(brute_force_loglik(net, res.probs, df), abs=1e-8)
    np.testing.assert_array_equal(res.probs["y"], res.probs["y2"])
    assert score(net, load_data(net, df), res.probs)["gradient_norm"] < 1e-3
    # h: 1, a: 2, b: 2, y: (intercept + 1 row for h + 2 rows for b) × 2 free entries each
    assert net.n_free_parameters() == 1 + 2 + 2 + 4 * 2

"""A normal prior on the coefficients of logistic CPTs (prior file keys coefficient_sd, intercept_sd).

The MAP objective adds ``−½ Σ (β/sd)²`` over the non-reference coefficients. Checks against
outside references: statsmodels' penalised binomial GLM (``GLM.fit_regularized`` with
``L1_wt=0``, whose documented objective is ``−loglike/n + alpha·|params|²/2``, so
``alpha = 1/(n·sd²)`` per coefficient), an independent scipy maximisation of a hand-written
penalised multinomial logit, statsmodels' ``MNLogit`` (the sd → ∞ limit is the MLE), the
inverse of the penalised Hessian written by hand (error bars), finite differences and the EM
reference (generalised EM with a penalised Newton M-step, adfit/emforms.py).
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
import scipy.optimize
import statsmodels.api as sm
from typer.testing import CliRunner

from adfit import forms
from adfit.cli import app
from adfit.data import load_data
from adfit.em import em_fit
from adfit.errors import PriorError
from adfit.fit import Fitter, FitSettings, fit
from adfit.params import free_layout, head, head_np
from adfit.priors import normal_spec, prior_from_dict
from adfit.uncertainty import attach_uncertainty

from test_emforms import net_with, simulate

TRUE2 = {"intercept": [0.0, -0.5],
         "coefficients": {"a": {"no": [0, 0], "yes": [0, 1.0]}, "b": {"lo": [0, 0], "mid": [0, -0.7], "hi": [0, 1.5]}}}
TRUE3 = {"intercept": [0.0, 0.5, -1.0],
         "coefficients": {"a": {"no": [0, 0, 0], "yes": [0, 1.0, 2.0]},
                          "b": {"lo": [0, 0, 0], "mid": [0, -0.5, 0.7], "hi": [0, 0.3, 1.5]}}}


def _setup(states, truth, n, seed, missing=None):
    net = net_with({"states": states, "cpd": "logistic"})
    probs = {"a": np.array([0.6, 0.4]), "b": np.array([0.5, 0.3, 0.2]),
             "y": forms.implied_table(net, "y", forms.rows_from_parameters(net, "y", truth))}
    return net, simulate(net, probs, n, seed=seed, missing=missing)


def _fit(*args, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return fit(*args, **kwargs)


def _design(df):
    # dummies with the first level dropped (the references of the logistic form)
    return sm.add_constant(pd.DataFrame({"a_yes": (df.a == "yes").astype(float), "b_mid": (df.b == "mid").astype(float),
                                         "b_hi": (df.b == "hi").astype(float)})).to_numpy()


def _coefs(par, k):
    """intercept, a=yes, b=mid, b=hi for child state k (against the first state)."""
    return np.array([par["intercept"][k], par["coefficients"]["a"]["yes"][k],
                     par["coefficients"]["b"]["mid"][k], par["coefficients"]["b"]["hi"][k]])


def test_two_state_child_equals_statsmodels_penalised_glm():
    net, df = _setup(["no", "yes"], TRUE2, 300, seed=4)
    sd, isd = 0.5, 4.0
    prior = prior_from_dict({"nodes": {"y": {"coefficient_sd": sd, "intercept_sd": isd}}}, net)
    res = _fit(net, df, prior=prior, gtol=1e-11)
    assert res.converged and res.objective == "map"
    got = _coefs(res.extras["nodes"]["y"]["parameters"], 1)
    X, y, n = _design(df), (df.y == "yes").astype(float).to_numpy(), len(df)
    # statsmodels documents the minimised function as -loglike/n + alpha*|params|^2/2 (L1_wt = 0):
    # our -1/2 sum (beta/sd)^2 on the log-likelihood's scale is alpha = 1/(n sd^2) per coefficient
    alpha = np.array([1 / isd ** 2, 1 / sd ** 2, 1 / sd ** 2, 1 / sd ** 2]) / n
    ref = sm.GLM(y, X, family=sm.families.Binomial()).fit_regularized(alpha=alpha, L1_wt=0.0, cnvrg_tol=1e-14,
                                                                      maxiter=2000)
    # statsmodels' coordinate descent stops about 1e-5 short of the optimum (its penalised score
    # there is ~1e-3 records); adfit's is the sharper optimum, checked next by the score equation
    np.testing.assert_allclose(got, np.asarray(ref.params), atol=5e-4)
    assert np.max(np.abs(got - np.asarray(ref.params))) < np.max(np.abs(np.asarray(ref.params))) * 1e-3
    p = 1 / (1 + np.exp(-X @ got))
    score_eq = X.T @ (y - p) - n * alpha * got  # the penalised score, by hand: 0 at the MAP
    assert np.max(np.abs(score_eq)) < 1e-6
    # the objective split: log-prior = -1/2 sum (beta/sd)^2 from the reported coefficients
    lp = -0.5 * (got[0] ** 2 / isd ** 2 + np.sum(got[1:] ** 2) / sd ** 2)
    assert res.log_prior == pytest.approx(lp, rel=1e-10)
    # the prior pulls every coefficient toward 0 compared with the MLE (statsmodels' Logit)
    mle = sm.Logit(y, X).fit(disp=0, tol=1e-12).params
    assert np.all(np.abs(got[1:]) < np.abs(mle[1:]))


def _penalised_mnlogit(X, Y, prec):
    """Hand-written penalised multinomial logit (the first outcome the reference), maximised by
    scipy's BFGS with its analytic gradient: sum log softmax(X B) - 1/2 sum prec * B^2."""
    D, K = X.shape[1], Y.shape[1]

    def f(b):
        B = np.concatenate([np.zeros((D, 1)), b.reshape(D, K - 1)], axis=1)
        E = X @ B
        ls = E - scipy.special.logsumexp(E, axis=1, keepdims=True)
        val = np.sum(Y * ls) - 0.5 * np.sum(prec * B * B)
        g = X.T @ (Y - np.exp(ls) * Y.sum(axis=1, keepdims=True)) - prec * B
        return -val, -g[:, 1:].ravel()

    r = scipy.optimize.minimize(f, np.zeros(D * (K - 1)), jac=True, method="BFGS", options={"gtol": 1e-10})
    return r.x.reshape(D, K - 1)


def test_three_state_child_equals_an_independent_scipy_fit_and_sd_large_gives_the_mle():
    net, df = _setup(["low", "mid", "high"], TRUE3, 500, seed=5)
    X = _design(df)
    Y = np.stack([(df.y == s).to_numpy(float) for s in ("low", "mid", "high")], axis=1)
    sd = 0.8
    res = _fit(net, df, prior=prior_from_dict({"nodes": {"y": {"coefficient_sd": sd}}}, net), gtol=1e-11)
    assert res.converged
    par = res.extras["nodes"]["y"]["parameters"]
    got = np.stack([_coefs(par, 1), _coefs(par, 2)], axis=1)
    prec = np.zeros((4, 3))
    prec[1:, 1:] = 1 / sd ** 2  # intercepts: no prior (the default)
    np.testing.assert_allclose(got, _penalised_mnlogit(X, Y, prec), atol=1e-6)
    # sd -> large (1e4, in [default]): the MAP is the MLE (statsmodels MNLogit) to 1e-5
    big = _fit(net, df, prior=prior_from_dict({"default": {"coefficient_sd": 1e4}}, net), gtol=1e-11)
    pb = big.extras["nodes"]["y"]["parameters"]
    ref = sm.MNLogit(np.argmax(Y, axis=1), X).fit(method="newton", tol=1e-12, disp=0, maxiter=100).params
    np.testing.assert_allclose(np.stack([_coefs(pb, 1), _coefs(pb, 2)], axis=1), np.asarray(ref), atol=1e-5)


def test_error_bars_are_the_inverse_penalised_hessian():
    # complete data: the observed information in the coefficients is X'WX of the multinomial
    # logit plus the prior's curvature diag(1/sd^2) (written out by hand below)
    net, df = _setup(["no", "yes"], TRUE2, 300, seed=6)
    sd = 0.6
    res = _fit(net, df, prior=prior_from_dict({"nodes": {"y": {"coefficient_sd": sd}}}, net), gtol=1e-11)
    sec = attach_uncertainty(res, df).extras["nodes"]["y"]
    se = sec["parameters_se"]
    got = np.array([se["intercept"][1], se["coefficients"]["a"]["yes"][1], se["coefficients"]["b"]["mid"][1],
                    se["coefficients"]["b"]["hi"][1]])
    b = _coefs(res.extras["nodes"]["y"]["parameters"], 1)
    X = _design(df)
    p = 1 / (1 + np.exp(-X @ b))
    H = X.T @ (X * (p * (1 - p))[:, None]) + np.diag([0.0, 1, 1, 1]) / sd ** 2
    np.testing.assert_allclose(got, np.sqrt(np.diag(np.linalg.inv(H))), rtol=1e-6)
    # without the curvature the standard errors would be larger: the prior's information counts
    assert np.all(got[1:] < np.sqrt(np.diag(np.linalg.inv(X.T @ (X * (p * (1 - p))[:, None]))))[1:])


def test_gradient_of_the_map_objective_matches_finite_differences_and_jax_head():
    net, df = _setup(["low", "mid", "high"], TRUE3, 200, seed=7, missing={"a": 0.3, "y": 0.2})
    prior = prior_from_dict({"default": {"pseudo_counts": 1.0, "coefficient_sd": 0.7, "intercept_sd": 2.0}}, net)
    pc = prior.pseudo_counts(net)
    f = Fitter(net, load_data(net, df), settings=FitSettings(), pseudo_counts=pc)
    lay = free_layout(net)
    rng = np.random.default_rng(1)
    z, scale = rng.normal(size=lay.size), rng.uniform(0.5, 2, size=lay.size)
    pseudo = f.pseudo_flat
    assert np.any(pseudo[lay.coef_mask] > 0)
    lj, rj = head(net, z, scale, pseudo, f.fixed_flat, 0.0)
    ln, rn, _ = head_np(lay, z, scale, pseudo, f.fixed_flat, 0.0)
    assert float(rj) == pytest.approx(rn, rel=1e-12)
    val, g = f.objective_fg(z, scale, pseudo, 0.0, f.n_total)
    for i in range(lay.size):
        e = np.zeros(lay.size)
        e[i] = 1e-6
        fd = (f.objective_fg(z + e, scale, pseudo, 0.0, f.n_total)[0]
              - f.objective_fg(z - e, scale, pseudo, 0.0, f.n_total)[0]) / 2e-6
        assert g[i] == pytest.approx(fd, rel=1e-5, abs=1e-9)
    # the prior part by hand: Dirichlet on a and b, -1/2 sum (beta/sd)^2 on y's coefficient rows
    eta = (z * scale)
    o = lay.offsets[lay.names.index("y")]
    E = eta[o:o + 12].reshape(4, 3)
    B = E - E[:, :1]
    by_hand = -0.5 * (np.sum(B[0] ** 2) / 2.0 ** 2 + np.sum(B[1:] ** 2) / 0.7 ** 2)
    for nm in ("a", "b"):
        oo = lay.offsets[lay.names.index(nm)]
        k = np.prod(lay.shapes[lay.names.index(nm)])
        by_hand += float(np.sum(scipy.special.log_softmax(eta[oo:oo + k]) * 1.0))
    assert rn == pytest.approx(by_hand, rel=1e-12)


def test_em_reference_agrees_on_incomplete_data():
    net, df = _setup(["low", "mid", "high"], TRUE3, 400, seed=8, missing={"a": 0.3, "y": 0.2})
    prior = prior_from_dict({"default": {"pseudo_counts": 1.0}, "nodes": {"y": {"coefficient_sd": 0.7}}}, net)
    res = _fit(net, df, prior=prior, gtol=1e-11, em_check=True)
    assert res.converged and res.extras["em_check"]["verdict"] == "agree"
    assert res.extras["em_check"]["objective"] == "map"
    # EM on its own, from its own start: the same MAP coefficients and the same objective
    em = em_fit(net, df, pseudo_counts=prior.pseudo_counts(net), seed=3, tol=1e-13, gtol=1e-10, max_iter=3000)
    assert em.converged and em.objective == "map"
    np.testing.assert_allclose(_coefs(em.parameters["y"], 2), _coefs(res.extras["nodes"]["y"]["parameters"], 2),
                               atol=1e-5)
    assert em.log_likelihood + em.log_prior == pytest.approx(res.log_likelihood + res.log_prior, abs=1e-7)
    # without the prior, EM's optimum differs: the check can see the prior
    em0 = em_fit(net, df, seed=3, tol=1e-12, max_iter=2000)
    assert np.max(np.abs(_coefs(em0.parameters["y"], 2) - _coefs(em.parameters["y"], 2))) > 1e-2


def test_result_json_round_trip_rebuilds_the_prior(tmp_path):
    from adfit.priors import result_pseudo_counts
    from adfit.result import load_result, write_result

    net, df = _setup(["no", "yes"], TRUE2, 120, seed=9)
    prior = prior_from_dict({"default": {"coefficient_sd": 1.5}}, net)
    res = _fit(net, df, prior=prior)
    assert res.extras["prior"]["coefficient_prior_sd"] == {"y": {"coefficient_sd": 1.5}}
    assert "y" not in res.extras["prior"]["total_pseudo_counts"]
    write_result(tmp_path / "r.json", res)
    back = load_result(tmp_path / "r.json")
    pc = result_pseudo_counts(back, None, what="test")
    np.testing.assert_array_equal(pc["y"], prior.pseudo_counts(net)["y"])
    assert pc["y"][1:, 1] == pytest.approx(1 / 1.5 ** 2) and pc["y"][0, 1] == 0.0 and not pc["y"][:, 0].any()


@pytest.mark.parametrize("entry, where, what", [
    ({"nodes": {"y": {"coefficient_sd": 0.0}}}, "[nodes.y]", "coefficient_sd = 0"),
    ({"nodes": {"y": {"coefficient_sd": -1.0}}}, "[nodes.y]", "coefficient_sd = -1"),
    ({"nodes": {"y": {"intercept_sd": "wide"}}}, "[nodes.y]", "intercept_sd must be a number > 0"),
    ({"nodes": {"y": {"coefficient_sd": True}}}, "[nodes.y]", "coefficient_sd must be a number > 0"),
    ({"nodes": {"y": {"coefficient_sd": float("inf")}}}, "[nodes.y]", "coefficient_sd = inf"),
    ({"default": {"coefficient_sd": float("nan")}}, "[default]", "coefficient_sd = nan"),
    ({"nodes": {"a": {"coefficient_sd": 1.0}}}, "[nodes.a]", "apply to nodes with cpd = 'logistic' only"),
    ({"nodes": {"y": {"pseudo_counts": 1.0}}}, "[nodes.y]", "Dirichlet priors do not apply"),
    ({"nodes": {"y": {"coefficient_sd": 1.0, "pseudo_counts": 1.0}}}, "[nodes.y]", "takes coefficient_sd"),
])
def test_bad_sd_is_a_one_line_error_naming_the_entry(entry, where, what):
    net = net_with({"states": ["no", "yes"], "cpd": "logistic"})
    with pytest.raises(PriorError) as e:
        prior_from_dict(entry, net, source="p.toml")
    msg = str(e.value)
    assert "\n" not in msg and msg.startswith(f"p.toml: {where}") and what in msg
    with pytest.raises(PriorError):
        normal_spec(coefficient_sd=0.0)


def test_cli_fit_with_a_normal_prior_and_a_bad_one(tmp_path):
    net_toml = tmp_path / "net.toml"
    net_toml.write_text('[nodes.a]\nstates = ["no", "yes"]\n[nodes.b]\nstates = ["lo", "mid", "hi"]\n'
                        '[nodes.y]\nstates = ["no", "yes"]\nparents = ["a", "b"]\ncpd = "logistic"\n')
    net, df = _setup(["no", "yes"], TRUE2, 150, seed=10)
    df.to_csv(tmp_path / "d.csv", index=False)
    good = tmp_path / "good.toml"
    good.write_text("[nodes.y]\ncoefficient_sd = 0.5\n")
    r = CliRunner().invoke(app, ["fit", str(net_toml), str(tmp_path / "d.csv"), "--prior", str(good),
                                 "--out", str(tmp_path / "r.json"), "--em-check", "--errors"])
    assert r.exit_code == 0, r.output
    from adfit.result import load_result

    back = load_result(tmp_path / "r.json")
    assert back.objective == "map" and back.extras["em_check"]["verdict"] == "agree"
    b = _coefs(back.extras["nodes"]["y"]["parameters"], 1)
    assert back.log_prior == pytest.approx(-0.5 * np.sum(b[1:] ** 2) / 0.25, rel=1e-9)
    bad = tmp_path / "bad.toml"
    bad.write_text("[nodes.y]\ncoefficient_sd = -2\n")
    r = CliRunner().invoke(app, ["fit", str(net_toml), str(tmp_path / "d.csv"), "--prior", str(bad),
                                 "--out", str(tmp_path / "r2.json")])
    assert r.exit_code == 1
    line = [x for x in r.output.splitlines() if "coefficient_sd" in x]
    assert len(line) == 1 and str(bad) in line[0] and "[nodes.y]" in line[0]
    assert not (tmp_path / "r2.json").exists()


def test_impossible_cells_on_noisy_nodes_are_refused_with_the_reason():
    from adfit.errors import NetworkError

    # noisy-OR (Pearl 1988, §4.3.2): P(absent | a, b) = (1 − leak)(1 − s_a)(1 − s_b); a zero at
    # (a=yes, b=hi, absent) needs leak, s_a or s_b = 1, which zeroes other configurations' cells too
    imp = [{"given": {"a": "yes", "b": "hi"}, "state": "absent"}]
    with pytest.raises(NetworkError) as e:
        net_with({"states": ["absent", "present"], "cpd": "noisy_or", "impossible": imp})
    msg = str(e.value)
    assert "\n" not in msg and "nodes.y.impossible" in msg and "sets cells of other parent configurations" in msg


IMP = [{"given": {"a": "no", "b": "lo"}, "state": "high"}]


def test_impossible_cell_on_a_logistic_node_complete_data_equals_a_masked_scipy_logit():
    from test_emforms import brute_force_loglik

    net = net_with({"states": ["low", "mid", "high"], "cpd": "logistic", "impossible": IMP})
    t = forms.implied_table(net, "y", forms.rows_from_parameters(net, "y", TRUE3))
    assert t[0, 0, 2] == 0.0 and t[0, 0].sum() == pytest.approx(1.0)
    # the coefficients are read back off a table of the form exactly (least squares on the possible cells)
    back = forms.parameters_json(net, "y", forms.rows_from_table(net, "y", t))
    np.testing.assert_allclose(_coefs(back, 2), _coefs(TRUE3, 2), atol=1e-10)
    probs = {"a": np.array([0.6, 0.4]), "b": np.array([0.5, 0.3, 0.2]), "y": t}
    df = simulate(net, probs, 400, seed=11)
    res = _fit(net, df, gtol=1e-11)
    assert res.converged and res.probs["y"][0, 0, 2] == 0.0
    # independent: a hand-written multinomial logit with the cell left out of its softmax, by scipy
    X = _design(df)
    Y = np.stack([(df.y == s).to_numpy(float) for s in ("low", "mid", "high")], axis=1)
    M = np.zeros_like(Y)
    M[((df.a == "no") & (df.b == "lo")).to_numpy(), 2] = -np.inf

    def f(b):
        B = np.concatenate([np.zeros((4, 1)), b.reshape(4, 2)], axis=1)
        E = X @ B + M
        ls = E - scipy.special.logsumexp(E, axis=1, keepdims=True)
        g = X.T @ (Y - np.exp(ls))
        return -np.sum(np.where(Y > 0, ls, 0.0)), -g[:, 1:].ravel()

    ref = scipy.optimize.minimize(f, np.zeros(8), jac=True, method="BFGS", options={"gtol": 1e-10}).x.reshape(4, 2)
    par = res.extras["nodes"]["y"]["parameters"]
    np.testing.assert_allclose(np.stack([_coefs(par, 1), _coefs(par, 2)], axis=1), ref, atol=1e-6)
    assert res.log_likelihood == pytest.approx(brute_force_loglik(net, res.probs, df), abs=1e-8)
    st = attach_uncertainty(res, df).extras["nodes"]["y"]["se_status"]
    assert st[0][2] == "constrained" and st[1][2] == "interior"


def test_impossible_cell_on_a_logistic_node_incomplete_data_agrees_with_em():
    from test_emforms import brute_force_loglik

    net = net_with({"states": ["low", "mid", "high"], "cpd": "logistic", "impossible": IMP})
    t = forms.implied_table(net, "y", forms.rows_from_parameters(net, "y", TRUE3))
    df = simulate(net, {"a": np.array([0.6, 0.4]), "b": np.array([0.5, 0.3, 0.2]), "y": t}, 400, seed=12,
                  missing={"a": 0.3, "y": 0.2})
    prior = prior_from_dict({"nodes": {"y": {"coefficient_sd": 1.5}}}, net)
    res = _fit(net, df, prior=prior, gtol=1e-11, em_check=True)
    assert res.converged and res.extras["em_check"]["verdict"] == "agree" and res.probs["y"][0, 0, 2] == 0.0
    assert res.log_likelihood == pytest.approx(brute_force_loglik(net, res.probs, df), abs=1e-8)
    em = em_fit(net, df, pseudo_counts=prior.pseudo_counts(net), seed=1, tol=1e-13, gtol=1e-10, max_iter=3000)
    assert em.converged
    np.testing.assert_allclose(_coefs(em.parameters["y"], 2), _coefs(res.extras["nodes"]["y"]["parameters"], 2),
                               atol=1e-5)

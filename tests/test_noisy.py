"""Noisy-OR and noisy-MAX nodes in the gradient fit (adfit/forms.py through adfit/params.py).

Each check is against something outside the gradient side: the published definitions computed
by hand (Pearl 1988, Probabilistic Reasoning in Intelligent Systems, §4.3.2, with Henrion's 1989
leak) or by enumerating the hidden causes (Díez 1993, UAI: the child is the largest of
independent causes), brute-force enumeration of the hidden cells, finite differences, an
independent scipy optimisation of a hand-written likelihood, and the EM reference of
adfit/emforms.py (EM on the network with one hidden cause per parent; Meek & Heckerman 1997).
"""

from __future__ import annotations

import json
import warnings

import numpy as np
import pytest
from scipy.optimize import minimize
from scipy.special import expit
from typer.testing import CliRunner

from adfit import forms
from adfit.cli import app
from adfit.data import load_data
from adfit.em import em_fit
from adfit.errors import OptionError, PriorError
from adfit.fit import Fitter, FitSettings, fit
from adfit.likelihood import score
from adfit.network import parse_network
from adfit.params import free_layout, head, head_np

from test_emforms import (TRUE_NOISY_OR, _marginal_ll, _noisy_or_negloglik, brute_force_loglik,
                          causes_by_enumeration, net_with, simulate)

OR_CHILD = {"states": ["absent", "present"], "cpd": "noisy_or"}


def _quiet_fit(*args, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return fit(*args, **kwargs)


def _latent_net(form: str = "noisy_max", tie: bool = True):
    states = ["none", "some", "severe"] if form == "noisy_max" else ["absent", "present"]
    nodes = {
        "h": {"states": ["ok", "worn"], "latent": True},
        "a": {"states": ["no", "yes"], "parents": ["h"]},
        "b": {"states": ["lo", "mid", "hi"]},
        "y": {"states": states, "parents": ["h", "b"], "cpd": form},
    }
    if tie:
        nodes["y2"] = {"states": states, "parents": ["h", "b"], "tied_to": "y"}
    return parse_network({"nodes": nodes})


def _latent_truth(net):
    K = net.node("y").card
    rows = (np.array([[0.8, 0.15, 0.05], [0.3, 0.5, 0.2], [0.6, 0.3, 0.1], [0.2, 0.3, 0.5]]) if K == 3 else
            np.array([[0.9, 0.1], [0.3, 0.7], [0.6, 0.4], [0.2, 0.8]]))
    tab = forms.implied_table(net, "y", rows)
    probs = {"h": np.array([0.7, 0.3]), "a": np.array([[0.9, 0.1], [0.2, 0.8]]), "b": np.array([0.5, 0.3, 0.2]),
             "y": tab}
    if "y2" in net:
        probs["y2"] = tab
    return rows, probs


# --------------------------------------------------------------------------- the implied tables
def test_noisy_or_table_equals_the_published_formula_by_hand():
    # Pearl 1988 §4.3.2 with a leak (Henrion 1989): P(absent | u) = (1 − leak) Π_active (1 − s).
    net = net_with(OR_CHILD)
    rows = forms.rows_from_parameters(net, "y", TRUE_NOISY_OR)
    tab = forms.implied_table(net, "y", rows)
    s = TRUE_NOISY_OR["strength"]
    for a, sa in enumerate([0.0, s["a"]["yes"]]):
        for b, sb in enumerate([0.0, s["b"]["mid"], s["b"]["hi"]]):
            absent = (1 - TRUE_NOISY_OR["leak"]) * (1 - sa) * (1 - sb)
            np.testing.assert_allclose(tab[a, b], [absent, 1 - absent], rtol=0, atol=1e-15)
    # the JAX log-table (used by the fit) agrees with the numpy table to rounding
    lt = np.asarray(forms.implied_log_table(net, "y", np.log(rows)))
    np.testing.assert_allclose(np.exp(lt), tab, rtol=1e-13, atol=0)
    back = forms.parameters_json(net, "y", rows)
    assert back["leak"] == pytest.approx(0.1) and back["strength"]["b"]["hi"] == pytest.approx(0.8)


def test_noisy_max_table_equals_enumeration_of_the_hidden_causes():
    # Díez 1993: the child is the max of independent causes (leak + one per active parent state).
    net = _latent_net("noisy_max", tie=False)
    rng = np.random.default_rng(4)
    rows = rng.dirichlet(np.ones(3), size=forms.cause_shape(net, "y")[0])
    tab = forms.implied_table(net, "y", rows)
    lt = np.exp(np.asarray(forms.implied_log_table(net, "y", np.log(rows))))
    spans = {"h": [None, rows[1]], "b": [None, rows[2], rows[3]]}
    for h in range(2):
        for b in range(3):
            active = [d for d in (spans["h"][h], spans["b"][b]) if d is not None]
            want = causes_by_enumeration(rows[0], active)
            np.testing.assert_allclose(tab[h, b], want, atol=1e-15)
            np.testing.assert_allclose(lt[h, b], want, rtol=1e-12, atol=1e-300)
    # a table of the form gives its cause rows back
    np.testing.assert_allclose(forms.rows_from_table(net, "y", tab), rows, atol=1e-12)


def test_tiny_cells_keep_their_relative_precision_in_log_space():
    # a strong leak-free cause: P(present | all inactive) = 1e-18 must not round to 0 (log space)
    net = net_with(OR_CHILD)
    rows = np.array([[1 - 1e-18, 1e-18], [0.5, 0.5], [0.5, 0.5], [0.5, 0.5]])
    lt = np.asarray(forms.implied_log_table(net, "y", np.log(rows)))
    assert lt[0, 0, 1] == pytest.approx(np.log(1e-18), rel=1e-12)


# --------------------------------------------------------------------------- the objective
def _fitter(net, df):
    coded = load_data(net, df)
    return Fitter(net, coded, settings=FitSettings()), coded


def test_head_in_jax_and_numpy_agree_and_gradient_matches_finite_differences():
    net = _latent_net("noisy_max")
    _, truth = _latent_truth(net)
    df = simulate(net, truth, 300, seed=5, missing={"a": 0.3, "b": 0.2, "y": 0.2})
    f, _ = _fitter(net, df)
    lay = free_layout(net)
    assert [n for n, *_ in lay.implied] == ["y"]
    rng = np.random.default_rng(0)
    z = rng.normal(size=lay.size)
    scale = rng.uniform(0.5, 2.0, size=lay.size)
    pseudo = np.zeros(lay.size)
    full_j, rest_j = head(net, z, scale, pseudo, f.fixed_flat, 0.1)
    full_n, rest_n, _ = head_np(lay, z, scale, pseudo, f.fixed_flat, 0.1)
    np.testing.assert_allclose(np.asarray(full_j), full_n, rtol=1e-12, atol=1e-12)
    assert float(rest_j) == pytest.approx(rest_n, rel=1e-12)
    val, g = f.objective_fg(z, scale, pseudo, 0.1, f.n_total)
    h = 1e-6
    for i in rng.choice(lay.size, size=8, replace=False):
        e = np.zeros(lay.size)
        e[i] = h
        fd = (f.objective_fg(z + e, scale, pseudo, 0.1, f.n_total)[0] -
              f.objective_fg(z - e, scale, pseudo, 0.1, f.n_total)[0]) / (2 * h)
        assert g[i] == pytest.approx(fd, rel=1e-5, abs=1e-9)


def test_log_likelihood_equals_brute_force_enumeration():
    net = _latent_net("noisy_or")
    _, truth = _latent_truth(net)
    df = simulate(net, truth, 60, seed=6, missing={"a": 0.4, "b": 0.3, "y": 0.3})
    res = _quiet_fit(net, df, restarts=1)
    assert res.log_likelihood == pytest.approx(brute_force_loglik(net, res.probs, df), abs=1e-9)


# --------------------------------------------------------------------------- the fit
def test_noisy_or_on_complete_data_equals_scipy_on_the_hand_written_likelihood():
    net = net_with(OR_CHILD)
    rows = forms.rows_from_parameters(net, "y", TRUE_NOISY_OR)
    probs = {"a": np.array([0.6, 0.4]), "b": np.array([0.5, 0.3, 0.2]), "y": forms.implied_table(net, "y", rows)}
    df = simulate(net, probs, 1500, seed=1)
    res = _quiet_fit(net, df, gtol=1e-11)
    assert res.converged
    counts = df.assign(a=df.a.map({"no": 0, "yes": 1}), b=df.b.map({"lo": 0, "mid": 1, "hi": 2}),
                       y=df.y.map({"absent": 0, "present": 1})).value_counts().to_dict()
    opt = minimize(_noisy_or_negloglik, np.zeros(4), args=(counts,), jac=True, method="BFGS",
                   options={"gtol": 1e-10, "maxiter": 1000})
    got = res.extras["nodes"]["y"]["parameters"]
    vec = [got["leak"], got["strength"]["a"]["yes"], got["strength"]["b"]["mid"], got["strength"]["b"]["hi"]]
    np.testing.assert_allclose(vec, expit(opt.x), atol=1e-6)
    assert res.log_likelihood == pytest.approx(-opt.fun + _marginal_ll(df), abs=1e-6)
    assert res.extras["stationarity"]["holds"]
    assert res.extras["nodes"]["y"]["cpd"] == "noisy_or"


@pytest.mark.parametrize("form", ["noisy_or", "noisy_max"])
def test_latent_and_tied_noisy_fit_agrees_with_the_em_reference(form):
    # EM on the hidden-cause network (adfit/emforms.py, written independently) from its own start
    net = _latent_net(form)
    _, truth = _latent_truth(net)
    df = simulate(net, truth, 1500, seed=2, missing={"a": 0.2, "b": 0.2, "y": 0.1})
    res = _quiet_fit(net, df, restarts=2, em_check=True)
    assert res.converged
    assert res.extras["em_check"]["verdict"] == "agree"
    assert res.extras["stationarity"]["kkt_ratio"] <= 1 + 1e-3
    em = em_fit(net, df, tol=1e-13, gtol=1e-10, max_iter=20000, seed=3)
    # the latent node's two labels may be swapped between the runs: compare the likelihoods
    assert res.log_likelihood == pytest.approx(em.log_likelihood, abs=1e-6)
    # the tied copy carries the same table and parameters
    np.testing.assert_array_equal(res.probs["y"], res.probs["y2"])
    assert res.extras["nodes"]["y2"]["parameters"] == res.extras["nodes"]["y"]["parameters"]
    # the fit's gradient norm, recomputed by `score` from the tables alone, is small
    coded = load_data(net, df)
    assert score(net, coded, res.probs)["gradient_norm"] < 1e-3


def test_free_parameter_count_is_the_forms_and_a_prior_of_the_wrong_shape_is_refused():
    net = _latent_net("noisy_max")
    # h: 1, a: 2, b: 2, y: (1 leak + 1 for h + 2 for b) rows × 2; y2 tied (counted once)
    assert net.n_free_parameters() == 1 + 2 + 2 + 4 * 2
    _, truth = _latent_truth(net)
    df = simulate(net, truth, 50, seed=3)
    with pytest.raises(PriorError, match=r"expected \(4, 3\) for the noisy_max node 'y' \(one row per cause: leak, h=worn"):
        _quiet_fit(net, df, pseudo_counts={"y": np.ones(net.cpt_shape("y"))})


def test_error_bars_of_the_noisy_or_parameters_equal_the_inverse_hessian_of_the_hand_written_likelihood():
    # Independent reference: the observed information of the hand-written noisy-OR likelihood
    # (Pearl 1988 §4.3.2) by central differences of its analytic gradient, in logit coordinates
    # x = logit(p); SE(p) = p (1 − p) SE(x) (delta method). The implied table's SE follows by the
    # delta method: θ(present | none) = leak has the leak's SE; θ(absent | a=yes, b=lo) =
    # (1 − leak)(1 − s_a) has gradient (−(1 − s_a), −(1 − leak)) in (leak, s_a).
    from adfit.uncertainty import attach_uncertainty

    net = net_with(OR_CHILD)
    rows = forms.rows_from_parameters(net, "y", TRUE_NOISY_OR)
    probs = {"a": np.array([0.6, 0.4]), "b": np.array([0.5, 0.3, 0.2]), "y": forms.implied_table(net, "y", rows)}
    df = simulate(net, probs, 1500, seed=1)
    res = attach_uncertainty(_quiet_fit(net, df, gtol=1e-11), df)
    par = res.extras["nodes"]["y"]["parameters"]
    p = np.array([par["leak"], par["strength"]["a"]["yes"], par["strength"]["b"]["mid"], par["strength"]["b"]["hi"]])
    counts = df.assign(a=df.a.map({"no": 0, "yes": 1}), b=df.b.map({"lo": 0, "mid": 1, "hi": 2}),
                       y=df.y.map({"absent": 0, "present": 1})).value_counts().to_dict()
    x, h = np.log(p / (1 - p)), 1e-5
    H = np.column_stack([(_noisy_or_negloglik(x + h * e, counts)[1] - _noisy_or_negloglik(x - h * e, counts)[1]) / (2 * h)
                         for e in np.eye(4)])
    C = np.linalg.inv(0.5 * (H + H.T)) * np.outer(p * (1 - p), p * (1 - p))
    sec = res.extras["nodes"]["y"]
    se = sec["parameters_se"]
    got = [se["leak"], se["strength"]["a"]["yes"], se["strength"]["b"]["mid"], se["strength"]["b"]["hi"]]
    np.testing.assert_allclose(got, np.sqrt(np.diag(C)), rtol=1e-5)
    table_se = np.asarray(sec["se"], dtype=float)
    assert table_se[0, 1] == pytest.approx(np.sqrt(C[0, 0]), rel=1e-5)
    g = np.array([-(1 - p[1]), -(1 - p[0])])
    assert table_se[3, 0] == pytest.approx(np.sqrt(g @ C[:2, :2] @ g), rel=1e-5)  # row (a=yes, b=lo)
    assert set(sec["parameters_status"]) == {"leak", "a=yes", "b=mid", "b=hi"}
    lo, hi = sec["interval"]
    tab = np.asarray(sec["table"] if "table" in sec else res.probs["y"]).reshape(-1, 2)
    assert np.all(np.asarray(lo) <= tab + 1e-12) and np.all(tab <= np.asarray(hi) + 1e-12)


def test_cli_round_trip_writes_the_parameters_and_their_error_bars(tmp_path):
    net = _latent_net("noisy_or", tie=False)
    _, truth = _latent_truth(net)
    df = simulate(net, truth, 400, seed=7, missing={"a": 0.2})
    toml = tmp_path / "n.toml"
    toml.write_text('[nodes.h]\nstates = ["ok", "worn"]\nlatent = true\n'
                    '[nodes.a]\nstates = ["no", "yes"]\nparents = ["h"]\n'
                    '[nodes.b]\nstates = ["lo", "mid", "hi"]\n'
                    '[nodes.y]\nstates = ["absent", "present"]\nparents = ["h", "b"]\ncpd = "noisy_or"\n')
    csv = tmp_path / "d.csv"
    df.to_csv(csv, index=False)
    out = tmp_path / "r.json"
    run = CliRunner().invoke(app, ["fit", str(toml), str(csv), "--out", str(out), "--quiet"])
    assert run.exit_code == 0, run.output
    doc = json.loads(out.read_text())
    y = doc["nodes"]["y"]
    assert y["cpd"] == "noisy_or" and set(y["parameters"]) == {"leak", "strength"}
    rows = forms.rows_from_parameters(net, "y", y["parameters"])
    np.testing.assert_allclose(np.asarray(y["table"]).reshape(2, 3, 2), forms.implied_table(net, "y", rows),
                               atol=1e-12)
    # error bars by default: on the implied table and on the parameters
    assert "parameters_se" in y and len(y["se"]) == 6
    assert set(y["parameters_se"]["strength"]["b"]) == {"mid", "hi"}
    # the report shows the parameters with their standard errors
    html = tmp_path / "r.html"
    run = CliRunner().invoke(app, ["report", str(out), "--out", str(html)])
    assert run.exit_code == 0, run.output
    page = html.read_text()
    assert "noisy_or parameters of y" in page
    hi_se = y["parameters_se"]["strength"]["b"]["hi"]  # b is observed: this strength is identified
    assert y["parameters_status"]["b=hi"] == ["interior", "interior"] and hi_se > 0
    assert f"{y['parameters']['strength']['b']['hi']:.4f}" in page and f"{hi_se:.4f}" in page
    # in a real browser (when one is installed; .ci/run installs Chromium as root): the page
    # builds without script errors and the parameters' table is laid out
    from test_report import TRAP, _chromium

    exe = _chromium()
    if exe is not None:
        import subprocess

        probe = tmp_path / "probe.html"
        probe.write_text(page.replace("<head>", "<head>" + TRAP, 1).replace(
            "</body>", "<script>window.addEventListener('load', function () { var t = document.querySelector("
                       "'table.params-table'); var d = document.createElement('div'); d.id = 'probe'; "
                       "d.textContent = 'params=' + (t ? t.getBoundingClientRect().height : -1) + ' errors=' + "
                       "window.__errors.length; document.body.appendChild(d); });</script></body>"), encoding="utf-8")
        dom = subprocess.run([exe, "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
                              f"--user-data-dir={tmp_path / 'profile'}", "--virtual-time-budget=5000", "--dump-dom",
                              probe.as_uri()], capture_output=True, text=True, timeout=120)
        import re

        m = re.search(r"params=([\d.-]+) errors=(\d+)", dom.stdout)
        assert m and float(m.group(1)) > 0 and int(m.group(2)) == 0, dom.stdout[-500:]
    # a parameter the data do not pin down (with a latent parent) has no SE, and says so
    for key, st in y["parameters_status"].items():
        assert set(st) <= {"interior", "not identified", "boundary", "no data"}, key


# --------------------------------------------------------------------------- priors on cause rows
def test_beta_prior_on_the_noisy_or_parameters_gives_the_map_of_the_hand_written_posterior(tmp_path):
    # Beta(c1 + 1, c0 + 1) on each probability p (leak, strengths) adds c1 log p + c0 log(1 − p) to
    # the hand-written log-likelihood (Pearl 1988 §4.3.2); scipy's BFGS finds its mode.
    from adfit.priors import load_prior

    net = net_with(OR_CHILD)
    rows = forms.rows_from_parameters(net, "y", TRUE_NOISY_OR)
    probs = {"a": np.array([0.6, 0.4]), "b": np.array([0.5, 0.3, 0.2]), "y": forms.implied_table(net, "y", rows)}
    df = simulate(net, probs, 300, seed=8)
    prior_file = tmp_path / "p.toml"
    # rows: the leak, a=yes, b=mid, b=hi; columns: absent, present
    prior_file.write_text("[nodes.y]\npseudo_counts = [[8.0, 2.0], [1.0, 3.0], [2.0, 2.0], [0.5, 4.0]]\n")
    prior = load_prior(prior_file, net)
    c = np.array([[8.0, 2.0], [1.0, 3.0], [2.0, 2.0], [0.5, 4.0]])
    res = _quiet_fit(net, df, prior=prior, gtol=1e-11)
    assert res.objective == "map" and res.converged
    counts = df.assign(a=df.a.map({"no": 0, "yes": 1}), b=df.b.map({"lo": 0, "mid": 1, "hi": 2}),
                       y=df.y.map({"absent": 0, "present": 1})).value_counts().to_dict()

    def neg_post(x):
        f, g = _noisy_or_negloglik(x, counts)
        p = expit(x)
        f -= float(np.sum(c[:, 1] * np.log(p) + c[:, 0] * np.log1p(-p)))
        g = g - (c[:, 1] * (1 - p) - c[:, 0] * p)
        return f, g

    opt = minimize(neg_post, np.zeros(4), jac=True, method="BFGS", options={"gtol": 1e-10, "maxiter": 1000})
    got = res.extras["nodes"]["y"]["parameters"]
    vec = [got["leak"], got["strength"]["a"]["yes"], got["strength"]["b"]["mid"], got["strength"]["b"]["hi"]]
    np.testing.assert_allclose(vec, expit(opt.x), atol=1e-6)
    assert res.log_prior == pytest.approx(float(np.sum(c[:, 1] * np.log(vec) + c[:, 0] * np.log1p(-np.array(vec)))),
                                          abs=1e-8)
    # the MAP EM on the hidden-cause network (Dirichlet rows on the causes) reaches the same point
    em = em_fit(net, df, pseudo_counts={"y": c}, tol=1e-13, gtol=1e-10, max_iter=20000, seed=1)
    assert em.converged
    np.testing.assert_allclose(em.probs["y"], res.probs["y"], atol=1e-6)
    assert em.log_prior == pytest.approx(res.log_prior, abs=1e-6)


def test_default_prior_reaches_cause_rows_and_the_em_check_agrees():
    from adfit.priors import prior_from_dict

    net = _latent_net("noisy_max")
    _, truth = _latent_truth(net)
    df = simulate(net, truth, 800, seed=9, missing={"a": 0.2, "b": 0.2, "y": 0.1})
    prior = prior_from_dict({"default": {"pseudo_counts": 1.0}}, net)
    pc = prior.pseudo_counts(net)
    assert pc["y"].shape == (4, 3) and pc["y2"].shape == (4, 3) and not pc["y2"].any()  # the tie: once
    res = _quiet_fit(net, df, prior=prior, restarts=2, em_check=True)
    assert res.converged
    assert res.extras["em_check"]["verdict"] in ("agree", "em-own-start-not-converged")
    assert res.extras["stationarity"]["holds"]


def test_error_bars_with_a_prior_name_the_cause_row_only_the_prior_informs():
    # A noisy-OR strength whose parent state never occurs in the records (b = hi dropped) is
    # informed by its Beta prior alone: its cause row has (virtual) count 0 and pseudo-counts 2
    # (Pearl 1988 §4.3.2: strength(b=hi) enters only rows with b = hi). The error bars list that
    # cause row, labelled by the configuration where it alone is active, and no other.
    from adfit.priors import prior_from_dict
    from adfit.uncertainty import compute_uncertainty

    net = net_with(OR_CHILD)
    rows = forms.rows_from_parameters(net, "y", TRUE_NOISY_OR)
    probs = {"a": np.array([0.6, 0.4]), "b": np.array([0.5, 0.3, 0.2]), "y": forms.implied_table(net, "y", rows)}
    df = simulate(net, probs, 300, seed=8)
    df = df[df.b != "hi"]
    prior = prior_from_dict({"default": {"pseudo_counts": 1.0}}, net)
    res = _quiet_fit(net, df, prior=prior)
    unc = compute_uncertainty(net, df, res.probs, pseudo_counts=prior.pseudo_counts(net))
    assert unc.prior_only_rows() == [{"node": "y", "row": 3, "cause": "b=hi", "parents": {"a": "no", "b": "hi"}}]
    assert unc.summary()["prior_only_rows"] == unc.prior_only_rows()

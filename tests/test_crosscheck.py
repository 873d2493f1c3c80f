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
    assert own["log_likelihood_recomputed"] == pytest.approx(own["log_likelihood"], rel=1e-12)
    assert "jax_log_likelihood" not in own  # keys name what they hold, not the implementation


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


def test_accelerated_and_plain_em_checks_reach_the_same_verdict(st_case):
    # the check's EM runs with squared extrapolation (the default) against plain EM steps, on the
    # Stouffer-Toby two-class fit: the same verdict, the same optimum (objective and CPTs of EM's
    # own start), fewer E-steps; the accelerated runs report no rate (not observed under it)
    net, data, res = st_case
    fast = em_check(res, data, seed=3)
    plain = em_check(res, data, seed=3, accelerate=False)
    assert fast["verdict"] == plain["verdict"] == "agree", format_em_check(fast)
    for run in ("em_from_fit", "em_own_start"):
        assert fast[run]["objective_value"] == pytest.approx(plain[run]["objective_value"], rel=1e-12)
    assert abs(fast["max_abs_delta_theta"] - plain["max_abs_delta_theta"]) < 1e-6
    assert fast["em_own_start"]["iterations"] < plain["em_own_start"]["iterations"]
    assert fast["em_own_start"]["rate"] is None and plain["em_own_start"]["rate"] is not None


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


def test_fit_not_converged_names_the_fit():
    # the fit's own flag, at the closed-form MLE (linkage data: DLR 1977, Rao 1973; EM from it
    # does not climb) and at a point far from it (EM climbs: the detail says so)
    net, df = linkage_one_parameter()
    data = encode_frame(net, df, count_column="count")
    pi = linkage_mle()
    chk = em_check(_as_fit(net, data, {"g": np.array([pi, 1 - pi])}, converged=False), data)
    assert chk["verdict"] == "fit-not-converged", format_em_check(chk)
    assert chk["runs_not_converged"] == ["fit"] and "did not climb" in chk["detail"]
    assert abs(chk["climb_from_fit"]) <= chk["tolerances"]["objective_abs"]
    chk = em_check(_as_fit(net, data, {"g": np.array([0.3, 0.7])}, converged=False), data)
    assert chk["verdict"] == "fit-not-converged" and "climbed" in chk["detail"], format_em_check(chk)
    assert chk["climb_from_fit"] > 1.0


def test_fit_not_at_maximum_when_em_from_the_answer_climbs():
    # the fit claims convergence at a point that is not a maximum (π = 0.3 against the closed-form
    # π* = 0.6268: Rao 1973 via DLR 1977): EM from it climbs to the closed-form log-likelihood
    net, df = linkage_one_parameter()
    data = encode_frame(net, df, count_column="count")
    far = _as_fit(net, data, {"g": np.array([0.3, 0.7])}, converged=True)
    chk = em_check(far, data)
    assert chk["verdict"] == "fit-not-at-maximum", format_em_check(chk)
    assert chk["runs_not_converged"] == [] and "stopped short" in chk["detail"]
    pi = linkage_mle()
    ll_star = 125 * np.log((2 + pi) / 4) + 38 * np.log((1 - pi) / 4) + 34 * np.log(pi / 4)  # DLR's multinomial
    assert chk["em_from_fit"]["log_likelihood"] == pytest.approx(ll_star, rel=1e-9)
    assert chk["climb_from_fit"] == pytest.approx(ll_star - far.log_likelihood, rel=1e-9)


def test_boundary_trap_is_blamed_on_the_fit(st_case):
    # Goodman's two-class optimum (Stouffer-Toby) with P(item1 = + | k1) pushed to 1e-13: in logits
    # that cell's gradient N - θN(u) is ~1e-11, but the likelihood rises if it grows (EM's ratio
    # N/(θ N(u)) > 1: the simplex KKT condition fails, Boyd & Vandenberghe 2004 §5.5.3). EM from
    # that point multiplies the cell up and climbs back to the optimum.
    net, data, res = st_case
    probs = {k: v.copy() for k, v in res.probs.items()}
    k = int(np.argmax(probs["item1"][:, 0]))  # the class where item1 = + is likely
    probs["item1"][k] = [1e-13, 1 - 1e-13]
    trap = _as_fit(net, data, probs, converged=True)
    chk = em_check(trap, data, seed=3)
    assert chk["verdict"] == "fit-not-at-maximum", format_em_check(chk)
    assert chk["em_from_fit"]["objective_value"] == pytest.approx(res.log_likelihood, rel=1e-8)


def test_em_from_fit_not_converged_does_not_blame_the_fit():
    # a point 1e-5 from the closed-form MLE: the objective is within the tolerance (the climb is
    # about I_obs·δ²/2 ~ 1e-7 with I_obs from the closed form), but one EM step cannot meet EM's
    # stopping rule (it needs three objective values to project the remaining rise)
    net, df = linkage_one_parameter()
    data = encode_frame(net, df, count_column="count")
    pi = linkage_mle() + 1e-5
    chk = em_check(_as_fit(net, data, {"g": np.array([pi, 1 - pi])}), data, max_iter=1)
    assert chk["verdict"] == "em-from-fit-not-converged", format_em_check(chk)
    assert chk["runs_not_converged"] == ["em_from_fit", "em_own_start"]
    assert 0 <= chk["climb_from_fit"] <= chk["tolerances"]["objective_abs"]
    assert "nothing speaks against the fit" in chk["detail"] and "also: EM from its own start" in chk["detail"]
    assert chk["tolerances"]["em_max_iter"] == 1


def test_em_own_start_not_converged_when_only_its_cap_is_hit():
    # the case: EM from the fit's answer (the closed-form MLE) agrees at once, EM from its
    # own random start hits a cap of 2 iterations; the verdict names EM's own start, not the fit
    net, df = linkage_one_parameter()
    data = encode_frame(net, df, count_column="count")
    pi = linkage_mle()
    chk = em_check(_as_fit(net, data, {"g": np.array([pi, 1 - pi])}), data, max_iter=2)
    assert chk["verdict"] == "em-own-start-not-converged", format_em_check(chk)
    assert chk["runs_not_converged"] == ["em_own_start"] and chk["em_from_fit"]["converged"]
    assert "own start did not converge in 2 iterations" in chk["detail"]
    # the same check with the default cap agrees
    assert em_check(_as_fit(net, data, {"g": np.array([pi, 1 - pi])}), data)["verdict"] == "agree"
    with pytest.raises(OptionError, match="iteration cap"):
        em_check(_as_fit(net, data, {"g": np.array([pi, 1 - pi])}), data, max_iter=0)


def test_every_verdict_is_documented():
    # each verdict is listed and explained in the user guide and in the method notes
    from pathlib import Path

    from adfit.crosscheck import VERDICT_MEANING, VERDICTS

    docs = Path(__file__).resolve().parents[1] / "docs"
    guide, method = (docs / "user-guide.md").read_text(), (docs / "method.md").read_text()
    assert set(VERDICTS) == set(VERDICT_MEANING)
    for v in VERDICTS:
        assert f"`{v}`" in guide, v
        assert f"`{v}`" in method, v


def _tiny_missing_parent(tmp_path):
    """x -> y, both binary; x missing in 7 of 27 records (EM converges linearly, not in 3 steps)."""
    (tmp_path / "net.toml").write_text('[nodes.x]\nstates = ["no", "yes"]\n[nodes.y]\nstates = ["lo", "hi"]\n'
                                       'parents = ["x"]\n')
    rows = ["x,y"] + ["no,lo"] * 7 + ["no,hi"] * 3 + ["yes,hi"] * 6 + [",hi"] * 4 + [",lo"] * 3 + ["yes,lo"] * 2 + ["no,"] * 2
    (tmp_path / "d.csv").write_text("\n".join(rows) + "\n")
    return tmp_path / "net.toml", tmp_path / "d.csv"


def test_cli_em_max_iter_names_the_run_that_hit_the_cap(tmp_path):
    from typer.testing import CliRunner

    from adfit.cli import app

    net, csv = _tiny_missing_parent(tmp_path)
    out = tmp_path / "f.json"
    args = ["fit", str(net), str(csv), "--out", str(out), "--em-check", "--no-errors", "-q"]
    r = CliRunner().invoke(app, args + ["--em-max-iter", "3"])
    assert r.exit_code == 0, r.output
    chk = json.loads(out.read_text())["em_check"]
    # EM converges linearly (DLR 1977 §3): from a random start, 3 steps are too few for a
    # projected rise below 1e-10 relative; from the converged fit one step suffices
    assert chk["verdict"] == "em-own-start-not-converged", chk["detail"]
    assert chk["tolerances"]["em_max_iter"] == 3 and chk["em_own_start"]["iterations"] == 3
    assert chk["em_from_fit"]["converged"]
    r = CliRunner().invoke(app, args)
    assert r.exit_code == 0, r.output
    chk = json.loads(out.read_text())["em_check"]
    assert chk["verdict"] == "agree" and chk["tolerances"]["em_max_iter"] == 5000, chk["detail"]
    r = CliRunner().invoke(app, args + ["--em-max-iter", "0"])
    assert r.exit_code == 1 and len(r.stderr.strip().splitlines()) == 1 and "--em-max-iter" in r.stderr, r.output
    # the same cap through the Python API (fit -> attach_em_check)
    from adfit.network import load_network

    n = load_network(net)
    res = fit(n, pd.read_csv(csv, dtype=str, keep_default_na=False), em_check=True, em_max_iter=3)
    assert res.extras["em_check"]["verdict"] == "em-own-start-not-converged"
    with pytest.raises(OptionError, match="em_max_iter="):
        fit(n, pd.read_csv(csv, dtype=str, keep_default_na=False), em_check=True, em_max_iter=0)


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
    # a result file written before the key was renamed is read under the current name
    doc = json.loads(path.read_text())
    for side in ("em_from_fit", "em_own_start"):
        doc["em_check"][side]["jax_log_likelihood"] = doc["em_check"][side].pop("log_likelihood_recomputed")
    old = tmp_path / "old.json"
    old.write_text(json.dumps(doc))
    again = load_result(old).extras["em_check"]
    for side in ("em_from_fit", "em_own_start"):
        assert again[side]["log_likelihood_recomputed"] == checked.extras["em_check"][side]["log_likelihood_recomputed"]
        assert "jax_log_likelihood" not in again[side]

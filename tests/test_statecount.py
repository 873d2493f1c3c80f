"""Choosing the number of states of a latent node (adfit.statecount, ``adfit fit --latent-states``).

References outside the project:
- the relative entropy of Ramaswamy, DeSarbo, Reibstein & Robinson (1993), *Marketing Science*
  12(1): E = 1 - sum_i sum_k -p_ik ln p_ik / (n ln K), computed here by hand and with numpy;
- the Stouffer & Toby (1951) role-conflict data and Goodman's (1974, *Biometrika* 61) two-class
  latent class model (tests/published.py): its fit G^2 = 2.72 on 6 degrees of freedom (from
  memory) gives log L = log L_saturated - G^2 / 2; posteriors by Bayes' rule in numpy;
- AIC/BIC: for each candidate, adfit.gaps.information_criteria on a separate fit of that many
  classes, and the count of free parameters of a latent class model, (K - 1) + K * items, by hand.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from typer.testing import CliRunner

from adfit.cli import app
from adfit.data import load_data
from adfit.errors import OptionError
from adfit.fit import fit
from adfit.gaps import information_criteria
from adfit.network import network_from_dict
from adfit.statecount import parse_spec, relative_entropy, state_names, sweep, with_states
from published import STOUFFER_TOBY_COUNTS, STOUFFER_TOBY_G2, STOUFFER_TOBY_ITEMS, stouffer_toby


def test_relative_entropy_by_hand():
    # one record assigned with certainty, one split evenly: H = 0 + ln 2, E = 1 - ln 2 / (2 ln 2) = 1/2
    assert relative_entropy(np.array([[1.0, 0.0], [0.5, 0.5]]), np.ones(2)) == pytest.approx(0.5, abs=1e-15)
    # weights count records: the same rows with weights 3 and 1
    assert relative_entropy(np.array([[1.0, 0.0], [0.5, 0.5]]), np.array([3.0, 1.0])) == pytest.approx(
        1 - math.log(2) / (4 * math.log(2)), abs=1e-15)
    rng = np.random.default_rng(4)
    p = rng.dirichlet(np.ones(3), size=7)
    w = rng.integers(1, 5, size=7).astype(float)
    want = 1 - np.sum(w[:, None] * -p * np.log(p)) / (w.sum() * np.log(3))
    assert relative_entropy(p, w) == pytest.approx(want, abs=1e-14)
    assert relative_entropy(np.full((5, 4), 0.25), np.ones(5)) == pytest.approx(0.0, abs=1e-14)


def test_spec_parsing_and_refusals():
    net, _ = stouffer_toby(3)
    assert parse_spec("cls=2..4", net) == ("cls", (2, 3, 4))
    assert parse_spec(" cls = 5,2,3 ", net) == ("cls", (2, 3, 5))
    assert parse_spec("cls=3", net) == ("cls", (3,))
    assert state_names(("a", "b", "c"), 3) == ("a", "b", "c") and state_names(("a", "b", "c"), 2) == ("c1", "c2")
    assert with_states(net, "cls", 5).node("cls").states == ("c1", "c2", "c3", "c4", "c5")
    fixed_child = network_from_dict({"h": {"states": ["x", "y"], "latent": True},
                                     "o": {"states": ["u", "v"], "parents": ["h"], "fixed": [[0.5, 0.5], [0.1, 0.9]]}})
    for text, n, words in (("cls", net, "NODE=FIRST..LAST"), ("cls=4..2", net, "empty"), ("cls=1..3", net, "at least 2"),
                           ("cls=2..x", net, "whole numbers"), ("cls=2..99", net, "at most 50"),
                           ("item1=2..3", net, "is observed"), ("zz=2..3", net, "not a node"),
                           ("h=2..3", fixed_child, "fixed CPT")):
        with pytest.raises(OptionError, match=words):
            parse_spec(text, n)


@pytest.fixture(scope="module")
def stouffer():
    net, df = stouffer_toby(3)
    coded = load_data(net, df, count_column="count")
    fits = {}

    def fit_one(net_k, k):
        fits[k] = fit(net_k, coded, restarts=4, seed=1)
        return fits[k]

    best, sec = sweep(net, coded, "cls", (2, 3), fit_one=fit_one)
    return net, coded, best, sec, fits


def test_sweep_table_matches_information_criteria_and_goodman(stouffer):
    net, coded, best, sec, fits = stouffer
    assert [r["states"] for r in sec["candidates"]] == [2, 3]
    for r in sec["candidates"]:
        k = r["states"]
        ic = information_criteria(with_states(net, "cls", k), coded, fits[k])
        assert r["aic"] == pytest.approx(ic.aic, abs=1e-9) and r["bic"] == pytest.approx(ic.bic, abs=1e-9)
        assert r["n_parameters"] == (k - 1) + k * len(STOUFFER_TOBY_ITEMS)  # by hand
        assert r["bic"] == pytest.approx(-2 * r["log_likelihood"] + r["n_parameters"] * math.log(216), abs=1e-9)
    # Goodman (1974): two classes, G^2 = 2.72 on 6 df; log L = log L_sat - G^2 / 2
    n = np.array(STOUFFER_TOBY_COUNTS, float)
    ll_sat = float(np.sum(n * np.log(n / n.sum())))
    two = sec["candidates"][0]
    assert two["log_likelihood"] == pytest.approx(ll_sat - STOUFFER_TOBY_G2 / 2, abs=0.01)
    assert sec["chosen"] == 2 and best.network.node("cls").card == 2 and two["chosen"]
    assert two["state_names"] == ["c1", "c2"] and sec["candidates"][1]["state_names"] == ["k1", "k2", "k3"]


def test_sweep_entropy_matches_bayes_in_numpy(stouffer):
    net, coded, best, sec, fits = stouffer
    for r in sec["candidates"]:
        res = fits[r["states"]]
        prior = res.probs["cls"]
        codes = np.asarray(coded.codes)
        like = np.ones((len(codes), r["states"]))
        for it in STOUFFER_TOBY_ITEMS:
            j = res.network.index(it)
            like *= res.probs[it][:, codes[:, j]].T  # P(item = observed | class), per row
        post = like * prior
        post /= post.sum(axis=1, keepdims=True)
        w = np.asarray(coded.counts)
        want = 1 - np.sum(w[:, None] * -post * np.log(post)) / (w.sum() * np.log(r["states"]))
        assert r["relative_entropy"] == pytest.approx(want, abs=1e-9)


def test_cli_fit_latent_states_round_trip_and_refusals(tmp_path):
    net, df = stouffer_toby(3)
    df.to_csv(tmp_path / "st.csv", index=False)
    lines = ['[nodes.cls]', 'states = ["a", "b", "c"]', 'latent = true']
    for it in STOUFFER_TOBY_ITEMS:
        lines += [f'[nodes.{it}]', 'states = ["+", "-"]', 'parents = ["cls"]']
    (tmp_path / "st.toml").write_text("\n".join(lines) + "\n")
    base = ["fit", str(tmp_path / "st.toml"), str(tmp_path / "st.csv"), "--count-column", "count"]
    r = CliRunner().invoke(app, base + ["--out", str(tmp_path / "fit.json"), "--latent-states", "cls=2..3",
                                        "--restarts", "3", "--no-errors"])
    assert r.exit_code == 0, r.output
    assert "number of states of cls (chosen by BIC: 2)" in r.output and "<- lowest BIC" in r.output
    doc = json.loads((tmp_path / "fit.json").read_text())
    sec = doc["latent_states"]
    assert sec["chosen"] == 2 and [c["states"] for c in sec["candidates"]] == [2, 3]
    assert doc["network"]["nodes"]["cls"]["states"] == ["c1", "c2"]
    assert doc["information_criteria"]["bic"] == pytest.approx(sec["candidates"][0]["bic"], abs=1e-9)
    # the chosen fit is a result like any other: show / score read it
    r = CliRunner().invoke(app, ["score", str(tmp_path / "st.csv"), "--count-column", "count",
                                 "--params", str(tmp_path / "fit.json"), "--json"])
    assert r.exit_code == 0 and json.loads(r.output)["log_likelihood"] == pytest.approx(
        sec["candidates"][0]["log_likelihood"], abs=1e-6)
    for spec, words in (("item1=2..3", "is observed"), ("cls=3..2", "empty"), ("cls", "NODE=FIRST..LAST")):
        r = CliRunner().invoke(app, base + ["--out", str(tmp_path / "bad.json"), "--latent-states", spec])
        assert r.exit_code == 1 and r.output.count("\n") == 1 and words in r.output, r.output
    assert not (tmp_path / "bad.json").exists()


def test_report_shows_the_table(tmp_path):
    import html

    from adfit.report import render_report
    from adfit.result import result_from_dict

    net, df = stouffer_toby(2)
    coded = load_data(net, df, count_column="count")
    best, sec = sweep(net, coded, "cls", (2, 3), fit_one=lambda n, k: fit(n, coded, restarts=2, seed=0))
    page = render_report(best.with_extras(latent_states=sec).to_dict())
    assert "Number of states of cls" in page and "2 (chosen)" in page
    for c in sec["candidates"]:  # every BIC printed, rounded as the report rounds log-likelihoods
        from adfit.report import fmt_loglik

        assert html.escape(fmt_loglik(c["bic"])) in page
    plain = render_report(best.to_dict())
    assert "Number of latent states" in plain and "--latent-states" in plain

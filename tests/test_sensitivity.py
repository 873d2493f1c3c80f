"""Missing-not-at-random sensitivity analysis (adfit/sensitivity.py, docs/method.md).

Checks against things outside the project:
- the closed form of the selection model for one categorical node with a free missingness
  intercept (Little & Rubin 2002, Statistical Analysis with Missing Data, 2nd ed., ch. 15;
  derived in docs/method.md), its tipping point solved by hand, and the binomial standard error
  sqrt(p(1-p)/n_observed) of the MAR estimate (closed form);
- `adfit fit` on the Palmer penguins data (PyPI package palmerpenguins, Horst, Hill & Gorman
  2020), which has gaps in sex and body mass: odds 1 must reproduce the MAR fit;
- records simulated (numpy, fixed seed) with gaps of known odds: the refit at the true odds
  covers the truth, the MAR fit does not;
- the tipping point against a direct refit at the odds found.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

from adfit.cli import app
from adfit.data import CodedData, encode_frame
from adfit.errors import OptionError, ResultError
from adfit.network import network_from_dict
from adfit.sensitivity import (FORMAT, Shift, augment_network, load_sensitivity, parse_odds, sensitivity_analysis,
                               write_sensitivity)

ONE = network_from_dict({"x": {"states": ["a", "b", "c"]}})
N_OBS = np.array([30.0, 50.0, 20.0])  # observed counts of a, b, c
M = 40.0                              # missing cells


def one_node_data() -> CodedData:
    return CodedData(np.array([[0], [1], [2], [-1]], dtype=np.int32), np.concatenate([N_OBS, [M]]))


def closed_form(r: float, s: int = 0) -> np.ndarray:
    # Little & Rubin (2002) ch. 15 selection model, one categorical variable, free intercept:
    # p_s = (n_s + m r n_s / (r n_s + Σ_{j≠s} n_j)) / n, p_j = (n_j + m n_j / (...)) / n (docs/method.md)
    w = np.ones(3)
    w[s] = r
    den = float(np.dot(w, N_OBS))
    return (N_OBS + M * w * N_OBS / den) / (N_OBS.sum() + M)


@pytest.fixture(scope="module")
def one_node():
    return sensitivity_analysis(ONE, one_node_data(), Shift("x", "a"), [0.2, 0.5, 1, 3, 7])


def test_one_node_matches_the_closed_form(one_node):
    for row in one_node.rows:
        got = np.asarray(row["nodes"]["x"]["table"][0])
        np.testing.assert_allclose(got, closed_form(row["odds"]), atol=1e-8, rtol=0)
        for k, st in enumerate("abc"):
            assert abs(row["targets"][f"x={st}"]["value"] - closed_form(row["odds"])[k]) < 1e-8
        assert row["converged"]


def test_one_node_other_state_shifted():
    res = sensitivity_analysis(ONE, one_node_data(), Shift("x", "c"), [0.5, 2.5], errors=False)
    for row in res.rows:
        np.testing.assert_allclose(row["nodes"]["x"]["table"][0], closed_form(row["odds"], s=2), atol=1e-8, rtol=0)


def test_the_data_carry_no_information_about_the_odds(one_node):
    # the selection model is saturated here (K observed categories + "missing" = K free
    # parameters): its maximum is the multinomial one, sum of n_j log(n_j/n) + m log(m/n), for every r
    n = N_OBS.sum() + M
    saturated = float(np.sum(N_OBS * np.log(N_OBS / n)) + M * math.log(M / n))
    for row in one_node.rows:
        assert abs(row["log_likelihood"] - saturated) < 1e-7
    # while the tables themselves move (so the check above is not vacuous)
    assert one_node.rows[0]["targets"]["x=a"]["value"] < 0.28 < 0.3 < one_node.rows[-1]["targets"]["x=a"]["value"]


def test_mar_error_bar_is_the_binomial_one(one_node):
    # under MAR the estimate is n_a / n_observed with SE sqrt(p(1-p)/n_observed) (closed form)
    row = next(r for r in one_node.rows if r["odds"] == 1)
    p = N_OBS[0] / N_OBS.sum()
    assert abs(row["targets"]["x=a"]["se"] - math.sqrt(p * (1 - p) / N_OBS.sum())) < 1e-7
    lo, hi = row["targets"]["x=a"]["interval"]
    assert lo < p < hi


def test_tipping_point_one_node_by_hand():
    # solve p_a(r) = t for r from the closed form: with q = (t n - n_a)/m, r = q Σ_{j≠a} n_j / (n_a (1 - q))
    t = 0.36
    res = sensitivity_analysis(ONE, one_node_data(), Shift("x", "a"), [0.5, 1, 2, 4], targets=["x=a"],
                               threshold=t, errors=False)
    n = N_OBS.sum() + M
    q = (t * n - N_OBS[0]) / M
    r = q * N_OBS[1:].sum() / (N_OBS[0] * (1 - q))
    tip = res.tipping_point
    assert tip["crossed"] and tip["between"] == [2.0, 4.0]
    assert abs(tip["odds"] - r) < 1e-5 * r
    nt = sensitivity_analysis(ONE, one_node_data(), Shift("x", "a"), [0.5, 1, 2, 4], targets=["x=a"],
                              threshold=0.9, errors=False).tipping_point
    assert not nt["crossed"] and "does not cross" in nt["note"] and nt["odds"] is None


# ----------------------------------------------------------------------------- a real network with gaps
def penguins():
    from palmerpenguins import load_penguins

    df = load_penguins()
    out = pd.DataFrame({
        "species": df["species"],
        "sex": df["sex"],
        # body mass cut at 4 kg (2 records have no mass)
        "mass": np.where(df["body_mass_g"].isna(), None, np.where(df["body_mass_g"] >= 4000, "heavy", "light")),
    })
    net = network_from_dict({
        "species": {"states": ["Adelie", "Chinstrap", "Gentoo"]},
        "sex": {"states": ["female", "male"], "parents": ["species"]},
        "mass": {"states": ["light", "heavy"], "parents": ["species", "sex"]},
    })
    return net, encode_frame(net, out.astype(object))


def test_odds_one_reproduces_adfit_fit_on_penguins():
    from adfit.fit import fit

    net, coded = penguins()
    assert (coded.counts @ (coded.codes == -1)).tolist() == [0, 11, 2]  # gaps: 11 in sex, 2 in mass
    mar = fit(net, coded)
    assert mar.converged
    # started far from the answer (uniform tables), so that the refit itself must find it
    uniform = {n: np.full(net.cpt_shape(n), 1.0 / net.node(n).card) for n in net.names}
    res = sensitivity_analysis(net, coded, Shift("sex", "female"), [1, 3], predictors=["species"], start=uniform,
                               errors=False)
    row = res.rows[0]
    assert row["odds"] == 1 and row["converged"]
    for name in net.names:
        np.testing.assert_allclose(np.asarray(row["nodes"][name]["table"]), net.array_to_table(name, mar.probs[name]),
                                   atol=1e-6, rtol=0)
    assert abs(row["log_likelihood_cells"] - mar.log_likelihood) < 1e-6
    # odds 3 on female: missing sex cells are more likely female than MAR says
    f1 = res.rows[0]["targets"]["sex=female"]["value"]
    f3 = res.rows[1]["targets"]["sex=female"]["value"]
    assert f3 > f1 and res.rows[1]["log_likelihood_cells"] < row["log_likelihood_cells"]


# ----------------------------------------------------------------------------- simulated MNAR gaps
TRUE_ODDS = 4.0
SIM = network_from_dict({"x": {"states": ["a", "b", "c"]}, "y": {"states": ["n", "y"], "parents": ["x"]}})
P_X = np.array([0.25, 0.45, 0.30])
P_Y = np.array([[0.8, 0.2], [0.5, 0.5], [0.15, 0.85]])


def simulated(n: int = 6000, seed: int = 7) -> CodedData:
    rng = np.random.default_rng(seed)
    x = rng.choice(3, size=n, p=P_X)
    y = (rng.random(n) < P_Y[x, 1]).astype(np.int32)
    # P(x missing | x) = sigmoid(alpha + log(TRUE_ODDS) [x = a]), alpha = logit(0.25)
    eta = math.log(0.25 / 0.75) + math.log(TRUE_ODDS) * (x == 0)
    miss = rng.random(n) < 1 / (1 + np.exp(-eta))
    codes = np.stack([np.where(miss, -1, x), y], axis=1).astype(np.int32)
    u, inv = np.unique(codes, axis=0, return_inverse=True)
    return CodedData(u.astype(np.int32), np.bincount(inv.ravel()).astype(np.float64))


@pytest.fixture(scope="module")
def sim():
    return sensitivity_analysis(SIM, simulated(), Shift("x", "a"), [1, 2, TRUE_ODDS, 8], targets=["x=a", "y=y"])


def test_true_odds_recover_the_truth_mar_does_not(sim):
    rows = {r["odds"]: r for r in sim.rows}
    truth = {"x=a": P_X[0], "y=y": float(P_X @ P_Y[:, 1])}
    at_true = rows[TRUE_ODDS]["targets"]["x=a"]
    lo, hi = at_true["interval"]
    assert lo < truth["x=a"] < hi
    lo, hi = rows[1.0]["targets"]["x=a"]["interval"]
    assert not lo < truth["x=a"] < hi and hi < truth["x=a"]  # MAR under-states the shifted state
    # y is always recorded: every odds value estimates its marginal alike (within rounding of the fits)
    ys = [r["targets"]["y=y"]["value"] for r in sim.rows]
    assert max(ys) - min(ys) < 1e-6 and all(r["converged"] for r in sim.rows)


def test_tipping_point_matches_a_direct_refit(sim):
    t = 0.5 * (sim.rows[0]["targets"]["x=a"]["value"] + sim.rows[1]["targets"]["x=a"]["value"])
    res = sensitivity_analysis(SIM, simulated(), Shift("x", "a"), [0.5, 1, 2, 4], targets=["x=a"], threshold=t,
                               errors=False)
    tip = res.tipping_point
    assert tip["crossed"] and tip["between"] == [1.0, 2.0] and 1 < tip["odds"] < 2
    direct = sensitivity_analysis(SIM, simulated(), Shift("x", "a"), [tip["odds"]], targets=["x=a"], errors=False)
    row = next(r for r in direct.rows if r["odds"] == tip["odds"])
    assert abs(row["targets"]["x=a"]["value"] - t) < 1e-7


# ----------------------------------------------------------------------------- files, options, CLI
def test_json_layout_and_round_trip(tmp_path, one_node):
    p = tmp_path / "s.json"
    write_sensitivity(p, one_node)
    doc = load_sensitivity(p)
    assert doc["format"] == FORMAT and doc["node"] == "x" and doc["state"] == "a"
    assert [r["odds"] for r in doc["rows"]] == [0.2, 0.5, 1.0, 3.0, 7.0]
    assert set(doc["rows"][0]) >= {"odds", "log_likelihood", "converged", "targets", "nodes"}
    assert doc["rows"][0]["nodes"]["x"]["table"] == [list(doc["rows"][0]["nodes"]["x"]["table"][0])]
    assert doc["tipping_point"] is None and len(doc["cautions"]) == 4
    bad = dict(doc, format="adfit-result/1")
    p.write_text(json.dumps(bad))
    with pytest.raises(ResultError, match="not a sensitivity file"):
        load_sensitivity(p)


def test_option_refusals_in_python():
    with pytest.raises(OptionError, match="odds must be finite and > 0"):
        parse_odds("0.5,0,2")
    with pytest.raises(OptionError, match="not a number"):
        parse_odds("1,two")
    assert parse_odds("4,0.5,2") == (0.5, 1.0, 2.0, 4.0)
    with pytest.raises(OptionError, match="exactly one --target"):
        sensitivity_analysis(ONE, one_node_data(), Shift("x", "a"), [2], threshold=0.4)
    with pytest.raises(OptionError, match="no missing cells"):
        sensitivity_analysis(ONE, CodedData(np.array([[0], [1]], dtype=np.int32), np.ones(2)), Shift("x", "a"), [2])
    aug = augment_network(SIM, [Shift("x", "a")], ["y"])
    assert aug.node("x_missing").parents == ("x", "y") and aug.names[-1] == "x_missing"


NET_TOML = ('[nodes.load]\nstates = ["low", "high"]\n'
            '[nodes.wear]\nstates = ["none", "heavy"]\nparents = ["load"]\n'
            '[nodes.cause]\nstates = ["a", "b"]\nlatent = true\n')


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    d = tmp_path_factory.mktemp("sens")
    (d / "net.toml").write_text(NET_TOML)
    rng = np.random.default_rng(3)
    load = rng.choice(["low", "high"], 300)
    wear = np.where(rng.random(300) < np.where(load == "high", 0.5, 0.2), "heavy", "none")
    wear = np.where(rng.random(300) < 0.3, "", wear)
    pd.DataFrame({"load": load, "wear": wear}).to_csv(d / "d.csv", index=False)
    return d


@pytest.mark.parametrize("extra, message", [
    (["--node", "weer", "--state", "heavy"], "--node weer: not a node of the network"),
    (["--node", "wear", "--state", "severe"], "--state severe: not a state of 'wear'"),
    (["--node", "cause", "--state", "a"], "--node cause: is latent"),
    (["--node", "load", "--state", "low"], "--node load: has no missing cells"),
    (["--node", "wear", "--state", "heavy", "--odds", "0.5,0"], "--odds 0: odds must be finite and > 0"),
    (["--node", "wear", "--state", "heavy", "--odds", "-1"], "odds must be finite and > 0"),
    (["--node", "wear", "--state", "heavy", "--threshold", "0.3"], "--threshold needs exactly one --target"),
    (["--node", "wear", "--state", "heavy", "--target", "wear=heavy", "--target", "load=low", "--threshold", "0.3"],
     "--threshold needs exactly one --target NODE=STATE (got 2)"),
    (["--node", "wear", "--state", "heavy", "--target", "wear=bad"], "node 'wear' has no state 'bad'"),
    # the shared NODE=STATE check of --given (adfit/impute.py): a near miss gets a suggestion
    (["--node", "wear", "--state", "heavy", "--target", "wear=Heavy"], "did you mean 'heavy'?"),
    (["--node", "wear", "--state", "heavy", "--target", "weer=heavy"], "did you mean 'wear'?"),
    (["--node", "wear", "--state", "heavy", "--target", "wear="], "write NODE=STATE with both parts"),
    (["--node", "wear", "--node", "load", "--state", "heavy"], "give one --state for each --node"),
    (["--node", "wear", "--state", "heavy", "--predictor", "cause"], "--predictor cause: is latent"),
])
def test_cli_bad_inputs_one_line_exit_1(files, extra, message):
    out = files / "bad.json"
    r = CliRunner().invoke(app, ["sensitivity", str(files / "net.toml"), str(files / "d.csv"), "--out", str(out),
                                 *extra])
    assert r.exit_code == 1, r.output
    lines = [ln for ln in r.output.splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith("adfit: error: ") and message in lines[0], r.output
    assert not out.exists()


def test_cli_round_trip_and_report(files):
    out = files / "s.json"
    r = CliRunner().invoke(app, ["sensitivity", str(files / "net.toml"), str(files / "d.csv"), "--out", str(out),
                                 "--node", "wear", "--state", "heavy", "--odds", "0.5,2", "--predictor", "load",
                                 "--target", "wear=heavy", "--threshold", "0.3"])
    assert r.exit_code == 0, r.output
    doc = json.loads(out.read_text())
    assert doc["format"] == FORMAT and [row["odds"] for row in doc["rows"]] == [0.5, 1.0, 2.0]
    assert doc["predictors"] == ["load"] and doc["tipping_point"]["target"] == "wear=heavy"
    assert "odds" in r.output and "Cautions" in r.output and "1 MAR" in r.output
    v = [row["targets"]["wear=heavy"]["value"] for row in doc["rows"]]
    assert v[0] < v[1] < v[2]  # heavy wear missing more often: more of the gaps are heavy
    fit_json, page = files / "fit.json", files / "page.html"
    r = CliRunner().invoke(app, ["fit", str(files / "net.toml"), str(files / "d.csv"), "--out", str(fit_json), "-q"])
    assert r.exit_code == 0, r.output
    r = CliRunner().invoke(app, ["report", str(fit_json), "--out", str(page), "--sensitivity", str(out)])
    assert r.exit_code == 0, r.output
    text = page.read_text()
    assert 'id="sensitivity"' in text and "assumptions, not estimates" in text and "wear=heavy" in text
    (files / "bad.json").write_text('{"format": "adfit-sensitivity/1", "rows": []}')
    r = CliRunner().invoke(app, ["report", str(fit_json), "--out", str(page), "--sensitivity", str(files / "bad.json")])
    assert r.exit_code == 1 and r.output.count("\n") == 1 and "non-empty list" in r.output, r.output


def test_two_shifted_nodes_factorise_into_two_closed_forms():
    # two unconnected nodes, both shifted by the same odds: the selection model's likelihood is
    # the product of two one-node problems, so each table is the one-node closed form of its own
    # column's counts (Little & Rubin 2002 ch. 15; docs/method.md)
    net = network_from_dict({"x": {"states": ["a", "b", "c"]}, "w": {"states": ["u", "v"]}})
    rng = np.random.default_rng(11)
    x = rng.choice([0, 1, 2, -1], size=400, p=[0.3, 0.3, 0.2, 0.2])
    w = rng.choice([0, 1, -1], size=400, p=[0.5, 0.3, 0.2])
    u, inv = np.unique(np.stack([x, w], axis=1), axis=0, return_inverse=True)
    coded = CodedData(u.astype(np.int32), np.bincount(inv.ravel()).astype(np.float64))
    res = sensitivity_analysis(net, coded, [Shift("x", "a"), Shift("w", "v")], [0.5, 3], errors=False)
    doc = res.to_dict()
    assert doc["node"] == ["x", "w"] and doc["state"] == ["a", "v"] and len(doc["rows"][0]["missingness"]) == 2

    def one(counts, m, s, r):
        wts = np.ones(len(counts))
        wts[s] = r
        return (counts + m * wts * counts / float(np.dot(wts, counts))) / (counts.sum() + m)

    nx = np.array([(x == k).sum() for k in range(3)], dtype=float)
    nw = np.array([(w == k).sum() for k in range(2)], dtype=float)
    for row in res.rows:
        r = row["odds"]
        np.testing.assert_allclose(row["nodes"]["x"]["table"][0], one(nx, (x == -1).sum(), 0, r), atol=1e-8, rtol=0)
        np.testing.assert_allclose(row["nodes"]["w"]["table"][0], one(nw, (w == -1).sum(), 1, r), atol=1e-8, rtol=0)

"""Printing and exporting fitted CPTs (adfit.show, ``adfit show``), FitResult.table, and
``adfit query`` / ``adfit score`` on a network whose CPTs are all fixed.

References outside the project: on complete records the MLE of a CPT row is the row's relative
frequencies and its standard error the binomial sqrt(p(1-p)/n) (closed forms of the multinomial
likelihood, any statistics textbook); posteriors by brute-force enumeration of the joint (numpy).
"""

from __future__ import annotations

import json
import math
import tomllib

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

from adfit.cli import app
from adfit.network import load_network
from adfit.result import load_result
from adfit.show import defuse_cell, render

NET = """
[network]
title = "Two-node pump check"

[nodes.wear]
states = ["light", "heavy"]

[nodes.failure]
states = ["no", "yes"]
parents = ["wear"]
"""

runner = CliRunner()


def invoke(args):
    r = runner.invoke(app, [str(a) for a in args])
    return r


@pytest.fixture(scope="module")
def complete_fit(tmp_path_factory):
    """A fit on complete records (counts chosen by hand): wear light 30 (27 no, 3 yes), heavy 10 (6 no, 4 yes)."""
    d = tmp_path_factory.mktemp("show")
    (d / "net.toml").write_text(NET)
    rows = [("light", "no")] * 27 + [("light", "yes")] * 3 + [("heavy", "no")] * 6 + [("heavy", "yes")] * 4
    pd.DataFrame(rows, columns=["wear", "failure"]).to_csv(d / "rec.csv", index=False)
    r = invoke(["fit", d / "net.toml", d / "rec.csv", "--out", d / "fit.json", "-q"])
    assert r.exit_code == 0, r.output
    return d


def test_table_closed_form_on_complete_records(complete_fit):
    res = load_result(complete_fit / "fit.json")
    t = res.table("failure")
    assert list(t.columns) == ["estimate", "se", "lower", "upper"]
    assert t.index.names == ["wear", "state"]
    # MLE on complete records: relative frequencies (closed form)
    for (w, s), p in {("light", "yes"): 3 / 30, ("light", "no"): 27 / 30, ("heavy", "yes"): 4 / 10}.items():
        assert t.loc[(w, s), "estimate"] == pytest.approx(p, abs=1e-6)
    # standard error: binomial sqrt(p(1-p)/n) per parent row (closed form of the observed information)
    assert t.loc[("light", "yes"), "se"] == pytest.approx(math.sqrt(0.1 * 0.9 / 30), rel=1e-3)
    assert t.loc[("heavy", "yes"), "se"] == pytest.approx(math.sqrt(0.4 * 0.6 / 10), rel=1e-3)
    assert (t["lower"] <= t["estimate"]).all() and (t["estimate"] <= t["upper"]).all()
    w = res.table("wear")
    assert w.index.name == "state" and w.loc["light", "estimate"] == pytest.approx(0.75, abs=1e-6)


def test_table_unknown_node_is_a_one_line_error(complete_fit):
    from adfit.errors import ResultError
    with pytest.raises(ResultError, match="not a node"):
        load_result(complete_fit / "fit.json").table("pump")


def test_show_text_csv_markdown(complete_fit):
    r = invoke(["show", complete_fit / "fit.json"])
    assert r.exit_code == 0, r.output
    head = r.output.splitlines()[1]
    assert head.split()[:4] == ["given", "state", "estimate", "se"]   # estimates before intervals
    assert "wear=heavy  yes       0.400" in r.output
    r = invoke(["show", complete_fit / "fit.json", "--format", "csv", "--node", "failure"])
    assert r.exit_code == 0, r.output
    df = pd.read_csv(__import__("io").StringIO(r.output))
    assert list(df.columns) == ["node", "given", "state", "estimate", "se", "lower", "upper", "fixed"]
    assert len(df) == 4 and set(df["node"]) == {"failure"}
    res = load_result(complete_fit / "fit.json")
    np.testing.assert_allclose(df["estimate"], res.table("failure")["estimate"], rtol=0, atol=1e-15)
    r = invoke(["show", complete_fit / "fit.json", "--format", "markdown"])
    assert r.exit_code == 0 and "| wear=light | yes | 0.100 |" in r.output


def test_show_bad_options(complete_fit):
    r = invoke(["show", complete_fit / "fit.json", "--node", "pump"])
    assert r.exit_code == 1 and "not a node" in r.output
    r = invoke(["show", complete_fit / "fit.json", "--format", "xls"])
    assert r.exit_code == 1 and "choose one of" in r.output


def test_toml_round_trip_scores_the_same(complete_fit, tmp_path):
    """fit -> show --format toml -> score with the fixed network: the same log-likelihood."""
    d = complete_fit
    r = invoke(["show", d / "fit.json", "--format", "toml", "--out", tmp_path / "fixed.toml"])
    assert r.exit_code == 0, r.output
    net = load_network(tmp_path / "fixed.toml")
    assert net.free_names == ()
    res = load_result(d / "fit.json")
    for n in net.names:
        np.testing.assert_array_equal(net.fixed_table(n), res.probs[n])   # repr floats: exact
    a = invoke(["score", d / "net.toml", d / "rec.csv", "--params", d / "fit.json", "--json"])
    b = invoke(["score", tmp_path / "fixed.toml", d / "rec.csv", "--json"])
    assert a.exit_code == 0 and b.exit_code == 0, (a.output, b.output)
    la, lb = json.loads(a.output)["log_likelihood"], json.loads(b.output)["log_likelihood"]
    # closed form on complete records: sum of n log(n/N) over families
    closed = 30 * math.log(.75) + 10 * math.log(.25) + 27 * math.log(.9) + 3 * math.log(.1) + 6 * math.log(.6) + 4 * math.log(.4)
    assert la == pytest.approx(lb, abs=1e-12) and lb == pytest.approx(closed, abs=1e-8)


def test_query_without_params_on_fixed_network_matches_enumeration(tmp_path):
    text = NET + "fixed = [[0.9, 0.1], [0.6, 0.4]]\n"
    text = text.replace('states = ["light", "heavy"]', 'states = ["light", "heavy"]\nfixed = [0.75, 0.25]', 1)
    (tmp_path / "fixed.toml").write_text(text)
    r = invoke(["query", tmp_path / "fixed.toml", "--given", "failure=yes", "--json"])
    assert r.exit_code == 0, r.output
    q = json.loads(r.output)
    # brute force: P(w, yes) = P(w) P(yes | w)
    joint = np.array([0.75 * 0.1, 0.25 * 0.4])
    post = joint / joint.sum()
    assert q["posteriors"]["wear"]["heavy"] == pytest.approx(post[1], abs=1e-12)
    assert math.exp(q["log_p_evidence"]) == pytest.approx(joint.sum(), abs=1e-12)


def test_query_without_params_on_free_network_says_what_to_do(tmp_path):
    (tmp_path / "net.toml").write_text(NET)
    r = invoke(["query", tmp_path / "net.toml", "--given", "failure=yes"])
    assert r.exit_code == 1 and "--params" in r.output and len(r.output.strip().splitlines()) == 1


def test_csv_defuses_formula_like_labels(tmp_path):
    assert defuse_cell("=cmd()") == "'=cmd()" and defuse_cell("-1") == "'-1" and defuse_cell("ok") == "ok"
    assert defuse_cell(-1.5) == -1.5
    net_text = '[nodes.kind]\nstates = ["=HYPERLINK(1)", "plain"]\n'
    (tmp_path / "n.toml").write_text(net_text)
    pd.DataFrame({"kind": ["=HYPERLINK(1)"] * 3 + ["plain"]}).to_csv(tmp_path / "r.csv", index=False)
    r = invoke(["fit", tmp_path / "n.toml", tmp_path / "r.csv", "--out", tmp_path / "f.json", "-q"])
    assert r.exit_code == 0, r.output
    out = render(load_result(tmp_path / "f.json"), "csv")
    assert "'=HYPERLINK(1)" in out and "\n=" not in out and ",=" not in out
    # the toml export keeps the label as it is (it is a network file, not a spreadsheet)
    doc = tomllib.loads(render(load_result(tmp_path / "f.json"), "toml"))
    assert doc["nodes"]["kind"]["states"][0] == "=HYPERLINK(1)"

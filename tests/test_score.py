"""``score`` with a prepared likelihood, and ``adfit score`` building one plan.

References outside the project: the marginal likelihood by brute-force enumeration of every
hidden assignment (tests/test_likelihood.py, ``brute_force_row``); the gradient norm against
central finite differences of that enumeration in the free logits; the MAP objective's gradient
adds c(x,u) - theta(x|u) c(u) per row (derivative of sum c log softmax, a closed form).
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from typer.testing import CliRunner

import adfit.likelihood as likelihood_module
from adfit.cli import app
from adfit.data import CodedData
from adfit.errors import ImpossibleDataError, OptionError
from adfit.likelihood import Likelihood, check_possible, score
from randomnets import random_network, random_probs, random_rows
from test_likelihood import brute_force_row


def _case(seed=3, n=4, rows=40):
    rng = np.random.default_rng(seed)
    net = random_network(rng, n)
    probs = random_probs(net, rng)
    data = random_rows(net, rng, rows, p_missing=0.3)
    pseudo = {name: rng.uniform(0.0, 2.0, size=net.cpt_shape(name)) for name in net.free_names}
    return net, probs, data, pseudo


def _brute_objective(net, probs, data, pseudo, logits):
    """log-likelihood + sum c log theta by enumeration, with the free CPTs from ``logits``."""
    p = dict(probs)
    for name, z in logits.items():
        e = np.exp(z - z.max(axis=-1, keepdims=True))
        p[name] = e / e.sum(axis=-1, keepdims=True)
    ll = sum(w * brute_force_row(net, p, r) for r, w in zip(data.codes, data.counts))
    return ll + sum(float(np.sum(pseudo[k] * np.log(p[k]))) for k in pseudo)


@pytest.mark.parametrize("with_prior", [False, True])
def test_score_with_a_prepared_likelihood_equals_score_without(with_prior):
    net, probs, data, pseudo = _case()
    pc = pseudo if with_prior else None
    lik = Likelihood(net, data)
    a = score(net, data, probs, pseudo_counts=pc)
    b = score(net, data, probs, pseudo_counts=pc, likelihood=lik)
    c = score(net, data, probs, pseudo_counts=pc, likelihood=lik)   # reused again
    assert a == b == c   # the same plan and program: the same numbers to the last bit
    # and both are right: enumeration (value) and central differences of it (gradient norm)
    oracle = sum(w * brute_force_row(net, probs, r) for r, w in zip(data.codes, data.counts))
    assert b["log_likelihood"] == pytest.approx(oracle, rel=1e-12)
    logits = {k: np.log(probs[k]) for k in net.free_names}
    used = pc or {}
    g2, h = 0.0, 1e-6
    for name in net.free_names:
        for idx in np.ndindex(logits[name].shape):
            up = {k: v.copy() for k, v in logits.items()}
            dn = {k: v.copy() for k, v in logits.items()}
            up[name][idx] += h
            dn[name][idx] -= h
            d = (_brute_objective(net, probs, data, used, up) - _brute_objective(net, probs, data, used, dn)) / (2 * h)
            g2 += d * d
    assert b["gradient_norm"] == pytest.approx(math.sqrt(g2), rel=1e-6)


def test_score_refuses_a_likelihood_of_other_data_or_network():
    net, probs, data, _ = _case()
    other = CodedData(data.codes.copy(), data.counts.copy(), None, "<copy>")
    lik = Likelihood(net, other)
    with pytest.raises(OptionError, match=r"score: the likelihood= given was built for another data"):
        score(net, data, probs, likelihood=lik)
    net2, _, data2, _ = _case(seed=5)
    with pytest.raises(OptionError, match=r"another network"):
        score(net, data2, probs, likelihood=Likelihood(net2, data2))


NET = """
[nodes.wear]
states = ["light", "heavy"]
fixed = [0.75, 0.25]

[nodes.failure]
states = ["no", "yes"]
parents = ["wear"]
"""


def _count_plans(monkeypatch):
    calls = []
    real = likelihood_module.build_plan

    def counting(*a, **k):
        calls.append(1)
        return real(*a, **k)
    monkeypatch.setattr(likelihood_module, "build_plan", counting)
    return calls


def test_score_command_builds_one_plan(tmp_path, monkeypatch):
    (tmp_path / "net.toml").write_text(NET + "fixed = [[0.9, 0.1], [0.6, 0.4]]\n")
    (tmp_path / "rec.csv").write_text("wear,failure\nlight,no\nheavy,yes\n,yes\nlight,\n")
    calls = _count_plans(monkeypatch)
    r = CliRunner().invoke(app, ["score", str(tmp_path / "net.toml"), str(tmp_path / "rec.csv"), "--json"])
    assert r.exit_code == 0, r.output
    assert len(calls) == 1
    # closed form: P(light, no) P(heavy, yes) P(failure = yes) P(wear = light)
    want = math.log(0.75 * 0.9) + math.log(0.25 * 0.4) + math.log(0.75 * 0.1 + 0.25 * 0.4) + math.log(0.75)
    assert json.loads(r.output)["log_likelihood"] == pytest.approx(want, abs=1e-12)


def test_score_command_names_a_record_of_probability_zero(tmp_path, monkeypatch):
    # P(failure = yes | light) = 0: the record (light, yes) is impossible under the CPTs
    (tmp_path / "net.toml").write_text(NET + "fixed = [[1.0, 0.0], [0.6, 0.4]]\n")
    (tmp_path / "rec.csv").write_text("wear,failure\nlight,no\nlight,yes\n,yes\n")
    calls = _count_plans(monkeypatch)
    r = CliRunner().invoke(app, ["score", str(tmp_path / "net.toml"), str(tmp_path / "rec.csv")])
    assert r.exit_code == 1, r.output
    assert "have probability 0" in r.output and "wear=light" in r.output and "failure=yes" in r.output
    assert len(calls) == 1
    # the library's own check says the same of these records
    from adfit.data import load_data
    from adfit.network import load_network
    n = load_network(tmp_path / "net.toml")
    with pytest.raises(ImpossibleDataError, match="have probability 0"):
        check_possible(Likelihood(n, load_data(n, tmp_path / "rec.csv")), {k: n.fixed_table(k) for k in n.names})


def test_fit_command_builds_one_plan_for_fit_error_bars_and_em_check(tmp_path, monkeypatch):
    """`adfit fit --errors --em-check` plans the likelihood once (the fit, the error bars and the
    EM check's three measurements reuse it) and writes the same estimate as the library's fit
    without a prepared likelihood; the answer is checked against the independent EM reference
    by the command itself (verdict in the result)."""
    (tmp_path / "net.toml").write_text(NET)
    (tmp_path / "rec.csv").write_text("wear,failure\nlight,no\nheavy,yes\n,yes\nlight,\nheavy,no\nlight,no\n,no\n")
    calls = _count_plans(monkeypatch)
    out = tmp_path / "fit.json"
    r = CliRunner().invoke(app, ["fit", str(tmp_path / "net.toml"), str(tmp_path / "rec.csv"), "--out", str(out),
                                 "--errors", "--em-check", "-q"])
    assert r.exit_code == 0, r.output
    assert len(calls) == 1
    from adfit.data import load_data
    from adfit.fit import fit
    from adfit.network import load_network
    from adfit.result import load_result

    n = load_network(tmp_path / "net.toml")
    got = load_result(out, n)
    assert got.extras["em_check"]["verdict"].startswith("agree")
    assert "uncertainty" in got.extras
    ref = fit(n, load_data(n, tmp_path / "rec.csv"), warn=False)
    np.testing.assert_allclose(got.probs["failure"], ref.probs["failure"], rtol=0, atol=1e-12)


def test_fit_and_em_check_refuse_a_likelihood_of_other_data():
    from adfit.crosscheck import em_check
    from adfit.fit import fit

    net, probs, data, _ = _case()
    other = CodedData(data.codes.copy(), data.counts.copy())
    lik = Likelihood(net, other)
    with pytest.raises(OptionError, match=r"fit: the likelihood= given was built for another data"):
        fit(net, data, likelihood=lik, warn=False)
    res = fit(net, other, likelihood=lik, warn=False)
    with pytest.raises(OptionError, match=r"em_check: the likelihood= given was built for another data"):
        em_check(res, data, likelihood=lik)

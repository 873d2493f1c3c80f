"""Joint posteriors of several targets and the most probable explanation (adfit.explain,
``adfit query --target A --target B --explain``).

Reference outside the project: brute-force enumeration of the joint distribution of a tiny
network (the chain rule of a Bayesian network, a product of CPT entries, in plain Python loops).
"""

from __future__ import annotations

import itertools
import json
import math

import numpy as np
import pytest
from typer.testing import CliRunner

from adfit.cli import app
from adfit.errors import OptionError
from adfit.explain import joint_posterior, most_probable
from adfit.network import network_from_dict


def tiny():
    net = network_from_dict({
        "a": {"states": ["a0", "a1"]},
        "b": {"states": ["b0", "b1", "b2"], "parents": ["a"]},
        "c": {"states": ["c0", "c1"], "parents": ["a"], "latent": True},
        "d": {"states": ["d0", "d1", "d2"], "parents": ["b", "c"]},
    })
    rng = np.random.default_rng(7)
    probs = {n.name: rng.dirichlet(np.ones(n.card), size=net.cpt_shape(n.name)[:-1]).reshape(net.cpt_shape(n.name))
             for n in net.nodes}
    return net, probs


def brute_joint(net, probs):
    """{(state index per node): probability} by the chain rule, in loops."""
    out = {}
    for cfg in itertools.product(*(range(c) for c in net.cards)):
        p = 1.0
        for i, node in enumerate(net.nodes):
            idx = tuple(cfg[net.index(q)] for q in node.parents) + (cfg[i],)
            p *= float(probs[node.name][idx])
        out[cfg] = p
    return out


def test_joint_of_two_targets_matches_enumeration():
    net, probs = tiny()
    full = brute_joint(net, probs)
    given = {"d": "d2"}
    ia, ic, id_ = net.index("a"), net.index("c"), net.index("d")
    pe = sum(p for k, p in full.items() if k[id_] == 2)
    j = joint_posterior(net, probs, given, ["a", "c"])
    assert len(j["rows"]) == 4
    for r in j["rows"]:
        sa, sc = net.node("a").states.index(r["states"]["a"]), net.node("c").states.index(r["states"]["c"])
        want = sum(p for k, p in full.items() if k[id_] == 2 and k[ia] == sa and k[ic] == sc) / pe
        assert r["probability"] == pytest.approx(want, abs=1e-12)


@pytest.mark.parametrize("given", [{}, {"d": "d1"}, {"b": "b0", "d": "d2"}])
def test_most_probable_explanation_matches_enumeration(given):
    net, probs = tiny()
    full = brute_joint(net, probs)
    fixed = {net.index(k): net.node(k).states.index(v) for k, v in given.items()}
    cons = {k: p for k, p in full.items() if all(k[i] == s for i, s in fixed.items())}
    best = max(cons, key=cons.get)
    m = most_probable(net, probs, given)
    want = {n: net.node(n).states[best[net.index(n)]] for n in net.names if n not in given}
    assert m["assignment"] == want
    assert m["probability"] == pytest.approx(cons[best] / sum(cons.values()), rel=1e-12)
    assert m["joint_probability"] == pytest.approx(cons[best], rel=1e-12)
    assert m["ties"] == 1


def test_explain_refuses_when_nothing_hidden():
    net, probs = tiny()
    with pytest.raises(OptionError, match="nothing to explain"):
        most_probable(net, probs, {"a": "a0", "b": "b0", "c": "c0", "d": "d0"})


def test_cli_joint_and_explain(tmp_path):
    (tmp_path / "n.toml").write_text(
        '[nodes.wear]\nstates = ["light", "heavy"]\nfixed = [0.75, 0.25]\n'
        '[nodes.failure]\nstates = ["no", "yes"]\nparents = ["wear"]\nfixed = [[0.9, 0.1], [0.6, 0.4]]\n'
        '[nodes.alarm]\nstates = ["off", "on"]\nparents = ["failure"]\nfixed = [[0.95, 0.05], [0.2, 0.8]]\n')
    r = CliRunner().invoke(app, ["query", str(tmp_path / "n.toml"), "--given", "alarm=on", "--target", "wear",
                                 "--target", "failure", "--explain", "--json"])
    assert r.exit_code == 0, r.output
    doc = json.loads(r.output)
    # by hand: P(w, f, on) = P(w) P(f|w) P(on|f)
    pw, pf, pa = {"light": .75, "heavy": .25}, {"light": [.9, .1], "heavy": [.6, .4]}, [.05, .8]
    joint = {(w, f): pw[w] * pf[w][i] * pa[i] for w in pw for i, f in enumerate(["no", "yes"])}
    pe = sum(joint.values())
    got = {(r_["states"]["wear"], r_["states"]["failure"]): r_["probability"] for r_ in doc["joint"]["rows"]}
    for k, v in joint.items():
        assert got[k] == pytest.approx(v / pe, abs=1e-12)
    best = max(joint, key=joint.get)
    assert doc["explanation"]["assignment"] == {"wear": best[0], "failure": best[1]}
    assert doc["explanation"]["probability"] == pytest.approx(joint[best] / pe, abs=1e-12)
    assert math.exp(doc["log_p_evidence"]) == pytest.approx(pe, abs=1e-12)
    r = CliRunner().invoke(app, ["query", str(tmp_path / "n.toml"), "--given", "alarm=on", "--explain"])
    assert r.exit_code == 0 and "most probable state" in r.output and "probability of this whole assignment" in r.output

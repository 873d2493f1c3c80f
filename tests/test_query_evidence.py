"""Soft (likelihood) evidence, joint posteriors and the most probable explanation by max-product
(adfit.impute.query, adfit.explain, ``adfit query --given NODE=STATE:WEIGHT,...``).

References outside the project:
- brute-force enumeration of the joint distribution of tiny networks (the chain rule of a
  Bayesian network: a product of CPT entries, in plain Python loops);
- virtual evidence (Pearl 1988, *Probabilistic Reasoning in Intelligent Systems*, sect. 2.2.2):
  a likelihood vector lambda on X is the same as observing a dummy child of X whose CPT column
  for the observed value is proportional to lambda; the posterior is P(x | e) lambda(x) / sum;
- the Viterbi recursion (Viterbi 1967, IEEE Trans. Inf. Theory 13(2)) for the most probable
  state sequence of a chain, beyond the reach of enumeration.
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
from adfit.explain import joint_posterior, max_product, most_probable
from adfit.impute import parse_evidence, query
from adfit.network import network_from_dict


def random_probs(net, seed):
    rng = np.random.default_rng(seed)
    return {n.name: rng.dirichlet(np.ones(n.card), size=net.cpt_shape(n.name)[:-1]).reshape(net.cpt_shape(n.name))
            for n in net.nodes}


def diamond():
    return network_from_dict({
        "a": {"states": ["a0", "a1"]},
        "b": {"states": ["b0", "b1", "b2"], "parents": ["a"]},
        "c": {"states": ["c0", "c1"], "parents": ["a"], "latent": True},
        "d": {"states": ["d0", "d1", "d2"], "parents": ["b", "c"]},
        "e": {"states": ["e0", "e1"], "parents": ["d", "a"]},
    })


def brute(net, probs, hard=None, soft=None):
    """{config: P(config, hard) x prod weights} over the configurations consistent with ``hard``."""
    hard, soft = hard or {}, soft or {}
    out = {}
    for cfg in itertools.product(*(range(c) for c in net.cards)):
        if any(cfg[net.index(k)] != net.node(k).states.index(v) for k, v in hard.items()):
            continue
        p = 1.0
        for i, node in enumerate(net.nodes):
            p *= float(probs[node.name][tuple(cfg[net.index(q)] for q in node.parents) + (cfg[i],)])
        for k, ws in soft.items():
            p *= ws.get(net.node(k).states[cfg[net.index(k)]], 0.0)
        out[cfg] = p
    return out


SOFT_CASES = [
    ({}, {"d": {"d0": 0.2, "d1": 1.0, "d2": 3.0}}),
    ({"e": "e1"}, {"b": {"b0": 5.0, "b2": 1.0}}),                       # b1 left out: weight 0
    ({"a": "a0"}, {"c": {"c0": 0.3, "c1": 0.7}, "e": {"e0": 2.0, "e1": 0.5}}),
]


@pytest.mark.parametrize("hard,soft", SOFT_CASES)
def test_soft_evidence_posteriors_match_enumeration_with_the_likelihood_vector(hard, soft):
    net = diamond()
    probs = random_probs(net, 3)
    full = brute(net, probs, hard, soft)
    z = sum(full.values())
    q = query(net, probs, hard, None, soft=soft)
    assert q.log_p_evidence == pytest.approx(math.log(z), abs=1e-10)
    for v in q.posteriors:
        for k, s in enumerate(net.node(v).states):
            want = sum(p for c, p in full.items() if c[net.index(v)] == k) / z
            assert q.posteriors[v][s] == pytest.approx(want, abs=1e-12), (v, s)
    assert set(q.to_dict()["soft_evidence"]) == set(soft)


def test_soft_evidence_equals_an_observed_dummy_child():
    # Pearl's construction: a child V of d with P(V = seen | d) = lambda(d) / max lambda, observed.
    net = diamond()
    probs = random_probs(net, 5)
    lam = {"d0": 0.5, "d1": 2.0, "d2": 1.0}
    spec = {n.name: {"states": list(n.states), "parents": list(n.parents), **({"latent": True} if n.latent else {})}
            for n in net.nodes}
    spec["v"] = {"states": ["seen", "unseen"], "parents": ["d"]}
    aug = network_from_dict(spec)
    l = np.array([lam[s] for s in net.node("d").states]) / 2.0
    aprobs = dict(probs, v=np.stack([l, 1 - l], axis=1))
    a = query(net, probs, {"e": "e0"}, ["a", "b", "c"], soft={"d": lam})
    b = query(aug, aprobs, {"e": "e0", "v": "seen"}, ["a", "b", "c"])
    for v in ("a", "b", "c"):
        for s in net.node(v).states:
            assert a.posteriors[v][s] == pytest.approx(b.posteriors[v][s], abs=1e-12)
    assert a.log_p_evidence == pytest.approx(b.log_p_evidence + math.log(2.0), abs=1e-10)


def test_one_hot_weights_are_hard_evidence():
    net = diamond()
    probs = random_probs(net, 8)
    a = query(net, probs, {"b": "b2"}, ["a", "c"])
    b = query(net, probs, {}, ["a", "c"], soft={"b": {"b2": 1.0}})
    for v in ("a", "c"):
        for s in net.node(v).states:
            assert a.posteriors[v][s] == pytest.approx(b.posteriors[v][s], abs=1e-12)


@pytest.mark.parametrize("hard,soft", SOFT_CASES)
def test_joint_of_two_targets_with_soft_evidence_matches_enumeration(hard, soft):
    net = diamond()
    probs = random_probs(net, 11)
    full = brute(net, probs, hard, soft)
    z = sum(full.values())
    targets = [t for t in ("c", "b", "d") if t not in hard][:2]
    j = joint_posterior(net, probs, hard, targets, soft)
    assert len(j["rows"]) == math.prod(net.node(t).card for t in targets)
    for r in j["rows"]:
        idx = {net.index(t): net.node(t).states.index(s) for t, s in r["states"].items()}
        want = sum(p for c, p in full.items() if all(c[i] == k for i, k in idx.items())) / z
        assert r["probability"] == pytest.approx(want, abs=1e-12)


@pytest.mark.parametrize("seed", range(4))
@pytest.mark.parametrize("hard,soft", [({}, {})] + SOFT_CASES)
def test_max_product_explanation_matches_enumeration(seed, hard, soft):
    net = diamond()
    probs = random_probs(net, 100 + seed)
    full = brute(net, probs, hard, soft)
    best = max(full, key=full.get)
    m = most_probable(net, probs, hard, soft)
    assert m["assignment"] == {n: net.node(n).states[best[net.index(n)]] for n in net.names if n not in hard}
    assert m["joint_probability"] == pytest.approx(full[best], rel=1e-12)
    assert m["probability"] == pytest.approx(full[best] / sum(full.values()), rel=1e-10)
    assert m["ties"] == 1


def test_ties_are_counted_as_enumeration_counts_them():
    # every CPT uniform except one: the best assignments are all those with a = a1 (b, c, d, e free)
    net = diamond()
    probs = {n.name: np.full(net.cpt_shape(n.name), 1.0 / n.card) for n in net.nodes}
    probs["a"] = np.array([0.3, 0.7])
    full = brute(net, probs)
    top = max(full.values())
    n_best = sum(1 for p in full.values() if p >= top * (1 - 1e-12))
    m = most_probable(net, probs, {})
    assert m["ties"] == n_best == 3 * 2 * 3 * 2
    assert m["assignment"]["a"] == "a1"


def test_max_product_on_a_long_chain_matches_viterbi():
    # 40 three-state nodes in a chain: 3**40 joint states, far beyond enumeration
    n, k = 40, 3
    spec = {"x0": {"states": ["s0", "s1", "s2"]}}
    for i in range(1, n):
        spec[f"x{i}"] = {"states": ["s0", "s1", "s2"], "parents": [f"x{i - 1}"]}
    net = network_from_dict(spec)
    probs = random_probs(net, 21)
    hard = {"x17": "s1", "x39": "s2"}
    # Viterbi in log space, evidence as indicator vectors
    ind = np.ones((n, k))
    for name, s in hard.items():
        ind[int(name[1:])] = 0
        ind[int(name[1:]), int(s[1:])] = 1
    with np.errstate(divide="ignore"):
        delta = np.log(probs["x0"]) + np.log(ind[0])
        back = []
        for i in range(1, n):
            cand = delta[:, None] + np.log(probs[f"x{i}"]) + np.log(ind[i])[None, :]
            back.append(np.argmax(cand, axis=0))
            delta = np.max(cand, axis=0)
    path = [int(np.argmax(delta))]
    for b in reversed(back):
        path.append(int(b[path[-1]]))
    path.reverse()
    assign, top, ties = max_product(net, probs, hard)
    assert top == pytest.approx(float(np.max(delta)), abs=1e-9)
    assert all(assign[f"x{i}"] == path[i] for i in range(n) if f"x{i}" not in hard)


def test_evidence_parsing_and_refusals():
    net = diamond()
    hard, soft = parse_evidence(net, ["a=a0", "d=d1:2, d2:0.5", "a=a0"])
    assert hard == {"a": "a0"} and soft == {"d": {"d0": 0.0, "d1": 2.0, "d2": 0.5}}
    for items, words in ((["d=d1:-1"], "finite number >= 0"), (["d=d1:0,d2:0"], "every weight is 0"),
                         (["d=d9:1"], "no state 'd9'"), (["d=d1:1,d1:2"], "listed twice"),
                         (["d=d1:nan"], "finite number"), (["d=d1:inf"], "finite number"),
                         (["d=d1:1,d2"], "no ':WEIGHT'"), (["d=d1:1", "d=d0"], "twice"),
                         (["z=z0:1"], "not a node")):
        with pytest.raises(OptionError, match=words):
            parse_evidence(net, items)


NET = ('[nodes.wear]\nstates = ["light", "heavy"]\nfixed = [0.75, 0.25]\n'
       '[nodes.failure]\nstates = ["no", "yes"]\nparents = ["wear"]\nfixed = [[0.9, 0.1], [0.6, 0.4]]\n'
       '[nodes.alarm]\nstates = ["off", "on"]\nparents = ["failure"]\nfixed = [[0.95, 0.05], [0.2, 0.8]]\n')


def test_cli_soft_evidence_by_hand_and_bad_inputs(tmp_path):
    (tmp_path / "n.toml").write_text(NET)
    run = lambda *a: CliRunner().invoke(app, ["query", str(tmp_path / "n.toml"), *a])  # noqa: E731
    r = run("--given", "alarm=on:3,off:1", "--target", "wear", "--explain", "--json")
    assert r.exit_code == 0, r.output
    doc = json.loads(r.output)
    # by hand: P(w, f, a) x lambda(a), lambda = (off 1, on 3)
    pw, pf, pa, lam = {"light": .75, "heavy": .25}, {"light": [.9, .1], "heavy": [.6, .4]}, [[.95, .05], [.2, .8]], [1, 3]
    joint = {(w, f, a): pw[w] * pf[w][f] * pa[f][a] * lam[a] for w in pw for f in (0, 1) for a in (0, 1)}
    z = sum(joint.values())
    assert doc["posteriors"]["wear"]["heavy"] == pytest.approx(sum(p for k, p in joint.items() if k[0] == "heavy") / z,
                                                               abs=1e-12)
    assert doc["log_p_evidence"] == pytest.approx(math.log(z), abs=1e-12)
    best = max(joint, key=joint.get)
    assert doc["explanation"]["assignment"] == {"wear": best[0], "failure": ["no", "yes"][best[1]],
                                                "alarm": ["off", "on"][best[2]]}
    assert doc["soft_evidence"] == {"alarm": {"off": 1.0, "on": 3.0}}
    r = run("--given", "alarm=on:3,off:1")
    assert r.exit_code == 0 and "likelihood of the evidence alarm=off:1,on:3" in r.output, r.output
    for bad, words in (("alarm=on:-2", "finite number >= 0"), ("alarm=on:0", "every weight is 0"),
                       ("alarm=maybe:1", "no state 'maybe'"), ("alarm=on:x", "'x'")):
        r = run("--given", bad)
        assert r.exit_code == 1 and r.output.count("\n") == 1 and words in r.output, r.output


# ------------------------------------------------------------------ --batch: one query per row
def write_diamond(tmp_path, net, probs):
    """The diamond network with every CPT fixed (a TOML file), for the CLI."""
    lines = []
    for n in net.nodes:
        lines.append(f"[nodes.{n.name}]")
        lines.append("states = [" + ", ".join(f'"{s}"' for s in n.states) + "]")
        if n.parents:
            lines.append("parents = [" + ", ".join(f'"{p}"' for p in n.parents) + "]")
        if n.latent:
            lines.append("latent = true")
        lines.append(f"fixed = {json.dumps(net.array_to_table(n.name, probs[n.name]))}")
    (tmp_path / "d.toml").write_text("\n".join(lines) + "\n")
    return tmp_path / "d.toml"


BATCH_ROWS = [  # (id, {node: cell}); the id column is carried along
    ("=1+1", {}),
    ("r2", {"e": "e1"}),
    ("r3", {"a": "a0", "d": "d0:0.2,d1:1,d2:3"}),
    ("r4", {"b": "b0:5,b2:1", "e": "e0"}),
]


def test_batch_answers_every_row_as_enumeration_does(tmp_path):
    import pandas as pd

    net = diamond()
    probs = random_probs(net, 31)
    toml = write_diamond(tmp_path, net, probs)
    cols = ["id", "a", "b", "d", "e"]
    pd.DataFrame([[i] + [cells.get(c, "") for c in cols[1:]] for i, cells in BATCH_ROWS], columns=cols).to_csv(
        tmp_path / "cases.csv", index=False)
    r = CliRunner().invoke(app, ["query", str(toml), "--batch", str(tmp_path / "cases.csv"), "--out",
                                 str(tmp_path / "answers.csv"), "--ignore-columns", "id", "--target", "c",
                                 "--target", "b", "--explain"])
    assert r.exit_code == 0, r.output
    out = pd.read_csv(tmp_path / "answers.csv", dtype=str, keep_default_na=False)
    assert list(out["id"]) == ["'=1+1", "r2", "r3", "r4"]  # a formula-like cell defused
    assert len(out) == len(BATCH_ROWS)
    for k, (_, cells) in enumerate(BATCH_ROWS):
        hard = {c: v for c, v in cells.items() if ":" not in v}
        soft = {c: parse_evidence(net, [f"{c}={v}"])[1][c] for c, v in cells.items() if ":" in v}
        full = brute(net, probs, hard, soft)
        z = sum(full.values())
        row = out.iloc[k]
        assert float(row["row__log_p_evidence"]) == pytest.approx(math.log(z), abs=1e-10)
        for t in ("c", "b"):
            for j, s in enumerate(net.node(t).states):
                want = sum(p for cfg, p in full.items() if cfg[net.index(t)] == j) / z
                assert float(row[f"{t}__p_{s}"]) == pytest.approx(want, abs=1e-12)
        for sc in net.node("c").states:
            for sb in net.node("b").states:
                want = sum(p for cfg, p in full.items() if net.node("c").states[cfg[net.index("c")]] == sc
                           and net.node("b").states[cfg[net.index("b")]] == sb) / z
                assert float(row[f"joint__p_c={sc};b={sb}"]) == pytest.approx(want, abs=1e-12)
        best = max(full, key=full.get)
        assert {v: row[f"{v}__explain"] for v in net.names} == {v: net.node(v).states[best[net.index(v)]]
                                                                  for v in net.names}
        assert float(row["row__p_explanation"]) == pytest.approx(full[best] / z, rel=1e-10)


def test_batch_refusals_are_one_line_and_write_nothing(tmp_path):
    (tmp_path / "n.toml").write_text(NET)
    out = tmp_path / "answers.csv"
    run = lambda *a: CliRunner().invoke(app, ["query", str(tmp_path / "n.toml"), *map(str, a)])  # noqa: E731

    def case(text, *extra):
        (tmp_path / "b.csv").write_text(text)
        return run("--batch", tmp_path / "b.csv", *extra)

    checks = [
        (case("wear,colour\nlight,red\n", "--out", out), "column 'colour' is not a node"),
        (case("wear,alarm\nlight,on\nheavy,loud\n", "--out", out), "line 3 (data row 2), column 'alarm'"),
        (case("wear,alarm\nheavy,on:-1\n", "--out", out), "finite number >= 0"),
        (case("wear\nlight\n", "--out", out, "--given", "alarm=on"), "leave out --given"),
        (case("wear\nlight\n"), "--batch needs --out"),
        (case("wear\nlight\n", "--out", out, "--json"), "leave out --json"),
        (case("wear\n", "--out", out), "no rows"),
        (case("wear\nlight\n", "--out", out, "--ignore-columns", "id"), "not a column"),
        (run("--out", out), "goes with --batch"),
    ]
    (tmp_path / "z.toml").write_text(NET.replace("fixed = [0.75, 0.25]", "fixed = [1.0, 0.0]"))
    (tmp_path / "b.csv").write_text("wear\nlight\nheavy\n")
    r = CliRunner().invoke(app, ["query", str(tmp_path / "z.toml"), "--batch", str(tmp_path / "b.csv"), "--out", str(out)])
    checks.append((r, "line 3 (data row 2): the evidence of this row has probability 0"))
    for r, words in checks:
        assert r.exit_code == 1 and r.output.count("\n") == 1 and words in r.output, (words, r.output)
    assert not out.exists()

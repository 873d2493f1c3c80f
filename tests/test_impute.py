"""Posteriors of missing cells, joint draws and queries (adfit.impute, ``adfit impute`` / ``adfit query``).

References outside the project: the chest-clinic network of Lauritzen & Spiegelhalter (1988),
brute-force enumeration of the joint distribution of tiny networks (numpy), a chi-square
goodness-of-fit test (scipy), and the palmerpenguins data (Gorman, Williams & Fraser 2014)
with posteriors computed by hand from the fitted CPTs (pandas).
"""

from __future__ import annotations

import itertools
import json
import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from adfit.data import HIDDEN, CodedData, encode_frame
from adfit.errors import DataError, ImpossibleDataError, OptionError
from adfit.impute import (LOGP_COLUMN, draw_column, draw_hidden, impute, impute_file, imputed_frame,
                          mode_column, parse_assignments, prob_column, query, row_posteriors)
from adfit.network import Network, network_from_dict
from adfit.result import FitResult, write_result
from published import (CHEST_CLINIC_EVIDENCE, CHEST_CLINIC_POSTERIOR_PRINTED, CHEST_CLINIC_POSTERIOR_YES,
                       chest_clinic)


# ============================================================================ helpers
def random_network() -> tuple[Network, dict[str, np.ndarray]]:
    """A tiny network with a latent node, mixed cardinalities, random CPTs (Dirichlet(1) rows)."""
    net = network_from_dict({
        "a": {"states": ["a0", "a1"]},
        "b": {"states": ["b0", "b1", "b2"], "parents": ["a"]},
        "c": {"states": ["c0", "c1"], "parents": ["a"], "latent": True},
        "d": {"states": ["d0", "d1", "d2"], "parents": ["b", "c"]},
        "e": {"states": ["e0", "e1"], "parents": ["c", "d"]},
    })
    rng = np.random.default_rng(20240611)
    probs = {v: rng.dirichlet(np.ones(net.node(v).card), size=net.n_parent_configs(v)).reshape(net.cpt_shape(v))
             for v in net.names}
    return net, probs


def enumerate_joint(net: Network, probs) -> np.ndarray:
    """The full joint table P(x_1, ..., x_n) by brute force: one product per joint state."""
    joint = np.empty(net.cards)
    pa = net.parent_indices
    for x in itertools.product(*(range(c) for c in net.cards)):
        p = 1.0
        for i, name in enumerate(net.names):
            p *= probs[name][tuple(x[j] for j in pa[i]) + (x[i],)]
        joint[x] = p
    return joint


def enumerate_posterior(joint: np.ndarray, row: np.ndarray) -> tuple[float, list[np.ndarray], np.ndarray]:
    """(P(evidence), posterior marginal of every node, the joint posterior) for one coded row."""
    idx = tuple(slice(None) if c < 0 else slice(c, c + 1) for c in row)
    part = np.zeros_like(joint)
    part[idx] = joint[idx]
    pe = part.sum()
    post = part / pe
    n = joint.ndim
    marg = [post.sum(axis=tuple(j for j in range(n) if j != i)) for i in range(n)]
    return pe, marg, post


def toml_of(net: Network) -> str:
    """The network as a TOML file (for the command-line tests)."""
    lines = []
    for node in net.nodes:
        lines.append(f"[nodes.{node.name}]")
        lines.append("states = [" + ", ".join(json.dumps(s) for s in node.states) + "]")
        if node.parents:
            lines.append("parents = [" + ", ".join(json.dumps(p) for p in node.parents) + "]")
        if node.latent:
            lines.append("latent = true")
        if node.fixed is not None:
            lines.append(f"fixed = {json.dumps(net.array_to_table(node.name, net.fixed_table(node.name)))}")
    return "\n".join(lines) + "\n"


def write_inputs(tmp_path, net: Network, probs) -> tuple[str, str]:
    toml = tmp_path / "net.toml"
    toml.write_text(toml_of(net))
    res = FitResult(network=net, method="lbfgs", objective="mle", probs=probs, log_likelihood=float("nan"))
    params = tmp_path / "fit.json"
    write_result(params, res)
    return str(toml), str(params)


def run_cli(args):
    from typer.testing import CliRunner

    from adfit.cli import app

    return CliRunner().invoke(app, args)


def chest_probs(net: Network) -> dict[str, np.ndarray]:
    return {v: net.fixed_table(v) for v in net.names}


# ============================================================================ exact posteriors
def test_chest_clinic_posteriors_match_the_published_values():
    # Lauritzen & Spiegelhalter (1988), JRSS B 50: given asia = yes and dyspnoea = yes,
    # P(tub) = 0.0878, P(lung) = 0.0995, P(bronc) = 0.8114 (exact enumeration; printed .088, .100, .812)
    net = chest_clinic()
    probs = chest_probs(net)
    q = query(net, probs, CHEST_CLINIC_EVIDENCE, ["tub", "lung", "bronc"])
    for v, p in CHEST_CLINIC_POSTERIOR_YES.items():
        assert q.posteriors[v]["yes"] == pytest.approx(p, abs=5e-5)
        # the printed three places agree to one unit in the last place (.812 printed, 0.8114 exact)
        assert q.posteriors[v]["yes"] == pytest.approx(CHEST_CLINIC_POSTERIOR_PRINTED[v], abs=1e-3)
        assert q.posteriors[v]["yes"] + q.posteriors[v]["no"] == pytest.approx(1.0, abs=1e-12)
    # P(evidence) by brute-force enumeration of the 256 joint states
    joint = enumerate_joint(net, probs)
    row = np.full(len(net), HIDDEN)
    row[net.index("asia")] = row[net.index("dysp")] = 0
    pe, marg, _ = enumerate_posterior(joint, row)
    assert q.p_evidence == pytest.approx(pe, rel=1e-12)
    assert q.posteriors["bronc"]["yes"] == pytest.approx(marg[net.index("bronc")][0], rel=1e-12)
    # default targets: every node not given
    assert set(query(net, probs, CHEST_CLINIC_EVIDENCE).posteriors) == set(net.names) - set(CHEST_CLINIC_EVIDENCE)
    # no evidence: the prior marginals; P(smoke = yes) = 0.5 is a root of the published network
    q0 = query(net, probs, {}, ["smoke", "tub"])
    assert q0.log_p_evidence == pytest.approx(0.0, abs=1e-12)
    assert q0.posteriors["smoke"]["yes"] == pytest.approx(0.5, abs=1e-12)
    assert q0.posteriors["tub"]["yes"] == pytest.approx(0.01 * 0.05 + 0.99 * 0.01, abs=1e-12)


def test_posteriors_equal_brute_force_enumeration():
    net, probs = random_network()
    joint = enumerate_joint(net, probs)
    rng = np.random.default_rng(7)
    n = 40
    codes = np.stack([rng.integers(0, c, n) for c in net.cards], axis=1).astype(np.int32)
    codes[rng.random(codes.shape) < 0.45] = HIDDEN
    codes[:, net.index("c")] = HIDDEN  # latent
    codes[0] = HIDDEN                   # nothing observed: the prior marginals, P = 1
    ll, post = row_posteriors(net, probs, codes)
    for r in range(n):
        pe, marg, _ = enumerate_posterior(joint, codes[r])
        assert ll[r] == pytest.approx(math.log(pe), abs=1e-11)
        for i, v in enumerate(net.names):
            np.testing.assert_allclose(post[v][r], marg[i], rtol=0, atol=1e-12)
    # the same rows in several blocks of another size give the same numbers
    ll2, post2 = row_posteriors(net, probs, codes, block=16)
    np.testing.assert_allclose(ll2, ll, rtol=0, atol=1e-13)
    np.testing.assert_allclose(post2["d"], post["d"], rtol=0, atol=1e-13)


# ============================================================================ joint draws
def test_joint_draws_follow_the_enumerated_joint_posterior():
    net, probs = random_network()
    joint = enumerate_joint(net, probs)
    row = np.array([HIDDEN, HIDDEN, HIDDEN, HIDDEN, 1], dtype=np.int32)  # e observed; a, b, d missing, c latent
    _, _, jpost = enumerate_posterior(joint, row)
    K = 6000
    d = draw_hidden(net, probs, row[None, :], K, seed=11, nodes=["a", "b", "d"])
    assert set(d) == {"a", "b", "d"} and d["a"].shape == (1, K)
    target = jpost.sum(axis=(2, 4))[:, :, :]  # P(a, b, d | e), c summed out
    target = target.reshape(-1)
    cells = (d["a"][0] * 3 + d["b"][0]) * 3 + d["d"][0]
    observed = np.bincount(cells, minlength=target.size)
    expected = K * target
    keep = expected > 0
    assert observed[~keep].sum() == 0  # never a state of posterior probability 0
    chi2 = ((observed[keep] - expected[keep]) ** 2 / expected[keep]).sum()
    pval = stats.chi2.sf(chi2, keep.sum() - 1)  # Pearson's goodness-of-fit test (scipy)
    assert pval > 1e-3
    # the test has power: the product of the posterior marginals (independent draws) is rejected
    pa, pb, pd_ = (target.reshape(2, 3, 3).sum(axis=ax) for ax in ((1, 2), (0, 2), (0, 1)))
    indep = (pa[:, None, None] * pb[None, :, None] * pd_[None, None, :]).reshape(-1)
    chi2_ind = ((observed - K * indep) ** 2 / (K * indep)).sum()
    assert stats.chi2.sf(chi2_ind, indep.size - 1) < 1e-6
    # the latent node can be drawn too, and the observed cell repeats its value
    d2 = draw_hidden(net, probs, row[None, :], 4, seed=11)
    assert np.all(d2["e"] == 1) and set(d2) == set(net.names)


def test_impute_maps_distinct_rows_to_records_with_independent_draws():
    net, probs = random_network()
    joint = enumerate_joint(net, probs)
    df = pd.DataFrame({"a": ["a0", None, "a1", None, None, "a0"],
                       "b": ["b1", "b2", "b0", "b2", "b2", "b1"],
                       "d": ["d1", None, "d0", None, None, "d2"],
                       "e": ["e0", "e1", None, "e1", "e1", "e1"]})
    data = encode_frame(net, df)
    assert data.n_distinct == 4 and data.inverse is not None  # records 1, 3, 4 are the same
    imp = impute(net, probs, data, draws=40, seed=3)
    assert imp.nodes == ("a", "c", "d", "e")  # b has no gap; c is latent
    for r in range(len(df)):
        row = data.codes[data.inverse[r]]
        pe, marg, _ = enumerate_posterior(joint, row)
        assert imp.log_p_observed[r] == pytest.approx(math.log(pe), abs=1e-11)
        for v in imp.nodes:
            np.testing.assert_allclose(imp.posterior[v][r], marg[net.index(v)], atol=1e-12)
            assert imp.mode[v][r] == (row[net.index(v)] if row[net.index(v)] >= 0 else np.argmax(marg[net.index(v)]))
            if row[net.index(v)] >= 0:
                assert np.all(imp.draws[v][r] == row[net.index(v)])
    # identical records get their own draws (40 binary draws alike by chance: about 2^-40)
    assert not np.array_equal(imp.draws["a"][1], imp.draws["a"][3])
    # seeded: the same seed gives the same draws, another seed others
    again = impute(net, probs, data, draws=40, seed=3)
    other = impute(net, probs, data, draws=40, seed=4)
    assert all(np.array_equal(again.draws[v], imp.draws[v]) for v in imp.nodes)
    assert not all(np.array_equal(other.draws[v], imp.draws[v]) for v in imp.nodes)
    # columns: input kept, added names, one-hot and observed values where observed
    out = imputed_frame(df, imp)
    assert list(out.columns[:4]) == list(df.columns) and out[list(df.columns)].equals(df)
    assert out.loc[2, mode_column("e")] in ("e0", "e1") and out.loc[0, mode_column("a")] == "a0"
    assert out.loc[0, prob_column("a", "a0")] == 1.0 and out.loc[0, prob_column("a", "a1")] == 0.0
    assert (out[draw_column("d", 40)].iloc[[0, 2, 5]] == df["d"].iloc[[0, 2, 5]]).all()
    assert draw_column("c", 1) in out and LOGP_COLUMN in out and draw_column("b", 1) not in out


# ============================================================================ palmerpenguins
def _penguins(mass_parents: list[str]):
    palmerpenguins = pytest.importorskip("palmerpenguins")
    raw = palmerpenguins.load_penguins()
    # Gorman, Williams & Fraser (2014), PLoS ONE 9(3): e90081; the palmerpenguins package:
    # 344 birds, 152 Adelie / 68 Chinstrap / 124 Gentoo; sex missing for 11 (6 Adelie, 5 Gentoo)
    assert len(raw) == 344
    assert raw["species"].value_counts().to_dict() == {"Adelie": 152, "Chinstrap": 68, "Gentoo": 124}
    assert raw.loc[raw["sex"].isna(), "species"].value_counts().to_dict() == {"Adelie": 6, "Gentoo": 5}
    mass = pd.cut(raw["body_mass_g"], [0, 3500, 4500, np.inf], right=False, labels=["light", "medium", "heavy"])
    df = pd.DataFrame({"species": raw["species"].astype(object), "island": raw["island"].astype(object),
                       "sex": raw["sex"].astype(object), "mass": mass.astype(object)})
    net = network_from_dict({
        "species": {"states": ["Adelie", "Chinstrap", "Gentoo"]},
        "island": {"states": ["Biscoe", "Dream", "Torgersen"], "parents": ["species"]},
        "sex": {"states": ["female", "male"], "parents": ["species"]},
        "mass": {"states": ["light", "medium", "heavy"], "parents": mass_parents},
    })
    return net, df


def test_penguins_sex_posterior_equals_the_fitted_cpt_by_hand():
    from adfit.em import fit_em  # the project's plain-numpy fitter (fast); any converged fit will do

    net, df = _penguins(["species"])
    res = fit_em(net, encode_frame(net, df))
    assert res.converged
    imp = impute(net, res.probs, encode_frame(net, df), draws=2, seed=0)
    gaps = df["sex"].isna().to_numpy()
    assert imp.hidden["sex"].sum() == 11 and np.array_equal(imp.hidden["sex"], gaps)
    # by hand: sex depends on the other cells only through species, so P(sex | record) = P(sex | species)
    cpt = res.cpt("sex")  # pandas DataFrame, index species, columns female / male
    by_hand = cpt.loc[df.loc[gaps, "species"]].to_numpy()
    np.testing.assert_allclose(imp.posterior["sex"][gaps], by_hand, atol=1e-12)
    # and with sex missing at random beside a fully observed parent, the MLE of P(sex | species) is the
    # complete-case frequency (pandas crosstab)
    freq = pd.crosstab(df["species"], df["sex"], normalize="index")
    np.testing.assert_allclose(cpt.loc[freq.index, freq.columns].to_numpy(), freq.to_numpy(), atol=1e-6)
    assert np.all(imp.posterior["sex"][~gaps].max(axis=1) == 1.0)


def test_penguins_sex_posterior_uses_the_body_mass_when_mass_depends_on_sex():
    from adfit.em import fit_em

    net, df = _penguins(["species", "sex"])
    res = fit_em(net, encode_frame(net, df))
    assert res.converged
    imp = impute(net, res.probs, encode_frame(net, df))
    gaps = df["sex"].isna().to_numpy()
    # by hand with pandas: P(sex | species, mass) ∝ P(sex | species) P(mass | species, sex);
    # a bird without mass has P(sex | species)
    psex = res.cpt("sex")
    pmass = res.cpt("mass")  # index (species, sex), columns mass states
    for r in np.flatnonzero(gaps):
        sp, m = df.loc[r, "species"], df.loc[r, "mass"]
        w = psex.loc[sp].to_numpy().copy()
        if isinstance(m, str):
            w *= np.array([pmass.loc[(sp, s), m] for s in net.node("sex").states])
        np.testing.assert_allclose(imp.posterior["sex"][r], w / w.sum(), atol=1e-12)
    # the mass matters: birds of one species with different masses get different posteriors
    ad = [r for r in np.flatnonzero(gaps) if df.loc[r, "species"] == "Adelie" and isinstance(df.loc[r, "mass"], str)]
    assert len({round(float(imp.posterior["sex"][r][0]), 9) for r in ad}) > 1


# ============================================================================ errors
def test_bad_inputs_raise_one_line_errors():
    net = chest_clinic()
    probs = chest_probs(net)
    with pytest.raises(OptionError, match="no state 'maybe'.*yes, no"):
        query(net, probs, {"asia": "maybe"})
    with pytest.raises(OptionError, match="'asai' is not a node"):
        query(net, probs, {"asai": "yes"})
    with pytest.raises(OptionError, match=r"targets=\['lungs'\].*did you mean 'lung'"):  # Python's terms
        query(net, probs, {}, ["lungs"])
    with pytest.raises(OptionError, match="also given"):
        query(net, probs, {"tub": "yes"}, ["tub"])
    # tub = yes forces either = yes in the published network: the evidence is impossible
    with pytest.raises(ImpossibleDataError, match="probability 0"):
        query(net, probs, {"tub": "yes", "either": "no"})
    with pytest.raises(OptionError, match="NODE=STATE"):
        parse_assignments(["asia"])
    with pytest.raises(OptionError, match="twice"):
        parse_assignments(["asia=yes", "asia=no"])
    assert parse_assignments([" asia = yes ", "asia=yes"]) == {"asia": "yes"}
    # impossible record: named by its row
    df = pd.DataFrame({v: [None, None] for v in net.names})
    df.loc[1, "tub"], df.loc[1, "either"] = "yes", "no"
    with pytest.raises(ImpossibleDataError, match="data row 2.*tub=yes"):
        impute(net, probs, encode_frame(net, df))
    # no per-record order
    data = encode_frame(net, df.iloc[:1])
    with pytest.raises(DataError, match="pandas engine"):
        impute(net, probs, CodedData(data.codes, data.counts, None, "x.csv"))
    with pytest.raises(OptionError, match="'wear'"):
        impute(net, probs, data, nodes=["wear"])


# ============================================================================ command line
def test_cli_impute_writes_the_records_in_order_with_added_columns(tmp_path):
    net, probs = random_network()
    joint = enumerate_joint(net, probs)
    toml, params = write_inputs(tmp_path, net, probs)
    csv = tmp_path / "records.csv"
    csv.write_text("id,a,b,d,e,n\n"
                   "r1,a0,,d1,e0,2\n"
                   "r2,NA,b2,,e1,1\n"
                   "r3,a1, b0 ,d0,?,5\n"
                   "r4,NA,b2,,e1,1\n")
    out = tmp_path / "imputed.csv"
    r = run_cli(["impute", toml, str(csv), "--params", params, "--out", str(out), "--draws", "3", "--seed", "5",
                 "--ignore-columns", "id", "--count-column", "n"])
    assert r.exit_code == 0, r.output
    assert "wrote" in r.output and "4 records, 4 with hidden cells" in r.output
    table = pd.read_csv(out, dtype=str, keep_default_na=False)
    assert list(table["id"]) == ["r1", "r2", "r3", "r4"]
    assert list(table["a"]) == ["a0", "NA", "a1", "NA"] and list(table["b"]) == ["", "b2", " b0 ", "b2"]
    assert list(table["n"]) == ["2", "1", "5", "1"]
    expected_cols = {mode_column("b"), prob_column("b", "b2"), draw_column("b", 3), draw_column("c", 1), LOGP_COLUMN}
    assert expected_cols <= set(table.columns)
    coded = np.array([[0, HIDDEN, HIDDEN, 1, 0], [HIDDEN, 2, HIDDEN, HIDDEN, 1],
                      [1, 0, HIDDEN, 0, HIDDEN], [HIDDEN, 2, HIDDEN, HIDDEN, 1]])
    for i, row in enumerate(coded):
        pe, marg, _ = enumerate_posterior(joint, row)
        assert float(table.loc[i, LOGP_COLUMN]) == pytest.approx(math.log(pe), abs=1e-11)
        for s_i, s in enumerate(net.node("d").states):
            assert float(table.loc[i, prob_column("d", s)]) == pytest.approx(marg[net.index("d")][s_i], abs=1e-12)
    assert table.loc[0, draw_column("a", 2)] == "a0" and table.loc[2, mode_column("b")] == "b0"
    # --nodes restricts the added columns; a bad node name is one line and exit 1, nothing written
    out2 = tmp_path / "only_d.csv"
    r = run_cli(["impute", toml, str(csv), "--params", params, "--out", str(out2), "--nodes", "d",
                 "--ignore-columns", "id,n"])
    assert r.exit_code == 0, r.output
    added = [c for c in pd.read_csv(out2, dtype=str).columns if "__" in c]
    assert added == [mode_column("d")] + [prob_column("d", s) for s in net.node("d").states] + [LOGP_COLUMN]
    bad = tmp_path / "bad.csv"
    r = run_cli(["impute", toml, str(csv), "--params", params, "--out", str(bad), "--nodes", "wear",
                 "--ignore-columns", "id,n"])
    assert r.exit_code == 1 and r.output.count("\n") == 1 and "'wear'" in r.output and not bad.exists()
    r = run_cli(["impute", toml, str(csv), "--params", params, "--out", str(csv), "--ignore-columns", "id,n"])
    assert r.exit_code == 1 and "data file itself" in r.output
    # a data column with the name of an added column
    clash = tmp_path / "clash.csv"
    clash.write_text("a,b,d,e,row__log_p_observed\na0,,d1,e0,x\n")
    r = run_cli(["impute", toml, str(clash), "--params", params, "--out", str(bad),
                 "--ignore-columns", "row__log_p_observed"])
    assert r.exit_code == 1 and "row__log_p_observed" in r.output and not bad.exists()


def test_impute_file_reports_the_line_of_an_impossible_record(tmp_path):
    net = chest_clinic()
    csv = tmp_path / "clinic.csv"
    csv.write_text(",".join(net.names) + "\n" + ",".join([""] * 8) + "\n"
                   + ",".join({"tub": "yes", "either": "no"}.get(v, "") for v in net.names) + "\n")
    with pytest.raises(ImpossibleDataError, match=r"line 3 \(data row 2\)"):
        impute_file(net, chest_probs(net), csv, tmp_path / "out.csv")
    assert not (tmp_path / "out.csv").exists()


def test_cli_query_prints_posteriors_and_fails_in_one_line(tmp_path):
    net = chest_clinic()
    toml, params = write_inputs(tmp_path, net, chest_probs(net))
    r = run_cli(["query", toml, "--params", params, "--given", "asia=yes", "--given", "dysp=yes",
                 "--target", "tub", "--target", "lung", "--target", "bronc", "--json"])
    assert r.exit_code == 0, r.output
    doc = json.loads(r.output)
    assert doc["format"] == "adfit-query/1" and doc["given"] == CHEST_CLINIC_EVIDENCE
    for v, p in CHEST_CLINIC_POSTERIOR_YES.items():  # Lauritzen & Spiegelhalter (1988)
        assert doc["posteriors"][v]["yes"] == pytest.approx(p, abs=5e-5)
    r = run_cli(["query", toml, "--params", params, "--given", "asia=yes", "--target", "bronc"])
    assert r.exit_code == 0 and "P(bronc | asia=yes)" in r.output and "0.4500" in r.output  # 0.5·0.6 + 0.5·0.3
    for args, needle in ((["--given", "asia=perhaps"], "'perhaps'"), (["--given", "visit=yes"], "'visit'"),
                         (["--target", "cancer"], "'cancer'"), (["--given", "asia"], "NODE=STATE")):
        r = run_cli(["query", toml, "--params", params] + args)
        assert r.exit_code == 1 and r.output.count("\n") == 1 and needle in r.output, r.output


def test_console_entry_point_exits_1_on_a_bad_query(tmp_path, monkeypatch, capsys):
    from adfit.cli import main

    net = chest_clinic()
    toml, params = write_inputs(tmp_path, net, chest_probs(net))
    monkeypatch.setattr("sys.argv", ["adfit", "query", toml, "--params", params, "--given", "asia=perhaps"])
    with pytest.raises(SystemExit) as ex:
        main()
    assert ex.value.code == 1
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "'perhaps'" in err

"""Tied tables and impossible cells (network keys ``tied_to`` and ``impossible``).

Checked against closed forms computed with numpy/pandas (pooled and renormalised counts on
complete data), brute-force enumeration of the hidden cells (an E-step written here in numpy,
independent of adfit's likelihood), finite differences, and the binomial standard error.
"""

from __future__ import annotations

import itertools
import json
import math
import warnings

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

from adfit.errors import ImpossibleDataError, NetworkError, PriorError
from adfit.fit import fit
from adfit.network import network_from_dict
from adfit.uncertainty import attach_uncertainty

STATES = ["ok", "worn", "failed"]
P_PUMP = {"low": [0.7, 0.2, 0.1], "high": [0.4, 0.35, 0.25]}


def pumps_network(**extra):
    nodes = {
        "load": {"states": ["low", "high"]},
        "pump_a": {"states": STATES, "parents": ["load"]},
        "pump_b": {"states": STATES, "parents": ["load"], "tied_to": "pump_a"},
        "alarm": {"states": ["off", "on"], "parents": ["pump_a"],
                  "impossible": [{"given": {"pump_a": "ok"}, "state": "on"}]},
    }
    for k, v in extra.items():
        nodes[k].update(v)
    return network_from_dict(nodes)


def pumps_data(n=400, seed=0):
    # simulated records (seeded); the truth satisfies the tie and the impossible cell
    rng = np.random.default_rng(seed)
    load = rng.choice(["low", "high"], n, p=[0.6, 0.4])
    a = [rng.choice(STATES, p=P_PUMP[x]) for x in load]
    b = [rng.choice(STATES, p=P_PUMP[x]) for x in load]
    alarm = ["off" if x == "ok" else rng.choice(["off", "on"], p=[0.3, 0.7]) for x in a]
    return pd.DataFrame({"load": load, "pump_a": a, "pump_b": b, "alarm": alarm})


def _quiet_fit(*args, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return fit(*args, **kw)


def test_tied_tables_on_complete_data_equal_the_pooled_counts():
    # closed form: one multinomial per parent configuration, the two families' counts added
    net, df = pumps_network(), pumps_data()
    res = _quiet_fit(net, df)
    assert res.converged
    pooled = (pd.crosstab(df["load"], df["pump_a"]) + pd.crosstab(df["load"], df["pump_b"])).loc[["low", "high"], STATES]
    expect = (pooled.T / pooled.sum(axis=1)).T.to_numpy()
    np.testing.assert_allclose(res.probs["pump_a"], expect, atol=1e-7)
    np.testing.assert_array_equal(res.probs["pump_b"], res.probs["pump_a"])
    # error bars: the binomial standard error sqrt(θ(1-θ)/n_u) with n_u the pooled count (Wald)
    unc = attach_uncertainty(res, df).extras["nodes"]
    se = np.sqrt(expect * (1 - expect) / pooled.sum(axis=1).to_numpy()[:, None])
    np.testing.assert_allclose(np.asarray(unc["pump_a"]["se"], float), se, rtol=1e-6)
    assert unc["pump_b"]["se"] == unc["pump_a"]["se"]


def test_impossible_cells_stay_exactly_zero_and_the_rest_renormalise():
    net, df = pumps_network(), pumps_data()
    res = _quiet_fit(net, df)
    al = res.probs["alarm"]
    assert al[0, 1] == 0.0 and al[0, 0] == 1.0  # pump_a = ok: the alarm cannot sound
    ct = pd.crosstab(df["pump_a"], df["alarm"]).loc[STATES, ["off", "on"]].to_numpy(float)
    np.testing.assert_allclose(al[1:], ct[1:] / ct[1:].sum(axis=1, keepdims=True), atol=1e-7)
    sec = attach_uncertainty(res, df).extras["nodes"]["alarm"]
    assert sec["se_status"][0] == ["constrained", "constrained"]
    assert sec["interval"][0][0] == [1.0, 0.0] and sec["interval"][1][0] == [1.0, 0.0]
    assert sec["se"][0] == [None, None]
    # parameters: load 1, pump_a 2 x 2 (pump_b shares them), alarm 3 x 1 - 1 impossible cell
    assert net.n_free_parameters() == 1 + 4 + 2


def test_structural_zeros_in_a_published_dataset():
    # palmerpenguins (Gorman, Williams & Fraser 2014, PLoS ONE, shipped in the PyPI package):
    # Gentoo penguins were sampled on Biscoe only, Chinstrap on Dream only. Declared impossible,
    # those cells are exactly 0 and the fit equals the row-normalised crosstab (pandas).
    from palmerpenguins import load_penguins

    df = load_penguins()[["species", "island"]].dropna()
    islands = ["Biscoe", "Dream", "Torgersen"]
    net = network_from_dict({
        "species": {"states": ["Adelie", "Chinstrap", "Gentoo"]},
        "island": {"states": islands, "parents": ["species"],
                   "impossible": [{"given": {"species": "Gentoo"}, "state": "Dream"},
                                  {"given": {"species": "Gentoo"}, "state": "Torgersen"},
                                  {"given": {"species": "Chinstrap"}, "state": "Biscoe"}]},
    })
    res = _quiet_fit(net, df)
    assert res.converged
    expect = pd.crosstab(df["species"], df["island"], normalize="index").reindex(columns=islands, fill_value=0.0)
    np.testing.assert_allclose(res.probs["island"], expect.to_numpy(), atol=1e-7)
    assert res.probs["island"][2, 1] == 0.0 and res.probs["island"][2, 2] == 0.0 and res.probs["island"][2, 0] == 1.0
    sec = attach_uncertainty(res, df).extras["nodes"]["island"]
    assert sec["se_status"][2] == ["constrained"] * 3  # Gentoo: one possible island, nothing to estimate
    assert sec["se_status"][1][0] == "constrained" and sec["se_status"][1][1] != "constrained"


# --------------------------------------------------------------------------- incomplete data
def _brute_force_counts(net, df, probs):
    """Log-likelihood and expected family counts by enumerating every completion of each record
    (numpy only; independent of adfit.likelihood)."""
    names = list(net.names)
    counts = {n: np.zeros(net.cpt_shape(n)) for n in names}
    ll = 0.0
    for _, row in df.iterrows():
        choices = [[net.node(n).states.index(row[n])] if isinstance(row[n], str) and row[n] else
                   list(range(net.node(n).card)) for n in names]
        joint = []
        for assign in itertools.product(*choices):
            a = dict(zip(names, assign))
            p = 1.0
            for n in names:
                idx = tuple(a[q] for q in net.node(n).parents) + (a[n],)
                p *= probs[n][idx]
            joint.append((p, a))
        tot = sum(p for p, _ in joint)
        ll += math.log(tot)
        for p, a in joint:
            for n in names:
                counts[n][tuple(a[q] for q in net.node(n).parents) + (a[n],)] += p / tot
    return ll, counts


def test_incomplete_data_fit_is_the_pooled_em_fixed_point_of_the_brute_force_likelihood():
    net = pumps_network()
    df = pumps_data(n=120, seed=3)
    rng = np.random.default_rng(4)
    df.loc[rng.random(len(df)) < 0.3, "pump_a"] = ""
    df.loc[rng.random(len(df)) < 0.2, "alarm"] = ""
    res = _quiet_fit(net, df.replace("", None), restarts=1)
    assert res.converged
    ll, c = _brute_force_counts(net, df, res.probs)
    assert ll == pytest.approx(res.log_likelihood, abs=1e-8)
    # at a maximum under the tie, θ = (N_a + N_b)/(N_a(u) + N_b(u)) (the EM fixed point of the
    # pooled M-step); under the impossible cell, the other cells renormalise
    pooled = c["pump_a"] + c["pump_b"]
    np.testing.assert_allclose(res.probs["pump_a"], pooled / pooled.sum(axis=-1, keepdims=True), atol=1e-6)
    np.testing.assert_allclose(res.probs["alarm"], c["alarm"] / c["alarm"].sum(axis=-1, keepdims=True), atol=1e-6)
    assert res.probs["alarm"][0, 1] == 0.0
    # several starts side by side (the vmapped program) reach the same optimum
    res3 = _quiet_fit(net, df.replace("", None), restarts=3)
    assert res3.log_likelihood == pytest.approx(res.log_likelihood, abs=1e-7)
    np.testing.assert_allclose(res3.probs["pump_a"], res.probs["pump_a"], atol=1e-5)


def test_constrained_heads_match_each_other_and_finite_differences():
    # the numpy head equals the JAX head (jit), and the objective's gradient equals central
    # differences, with a tie and an impossible cell in the layout
    from adfit._jax import jnp
    from adfit.data import load_data
    from adfit.fit import Fitter, FitSettings
    from adfit.params import fixed_log_tables, free_layout, head, head_np

    net = pumps_network()
    df = pumps_data(n=60, seed=5)
    df.loc[::4, "pump_a"] = None
    lay = free_layout(net)
    assert lay.tied and lay.mask is not None and lay.size == 2 + 6 + 6  # pump_b has no block of its own
    rng = np.random.default_rng(0)
    z, scale = rng.normal(size=lay.size), rng.uniform(0.5, 2, lay.size)
    pseudo = np.where(np.isfinite(lay.mask), rng.uniform(0, 2, lay.size), 0.0)
    for l2 in (0.0, 0.3):
        full_j, rest_j = head(net, jnp.asarray(z), jnp.asarray(scale), jnp.asarray(pseudo),
                              jnp.asarray(fixed_log_tables(net)), l2)
        full_n, rest_n, _ = head_np(lay, z, scale, pseudo, fixed_log_tables(net), l2)
        np.testing.assert_allclose(np.asarray(full_j), full_n, atol=1e-12)
        assert float(rest_j) == pytest.approx(rest_n, rel=1e-12)
    coded = load_data(net, df)
    fitter = Fitter(net, coded, settings=FitSettings(l2=0.2))
    args = (scale, lay.flatten({k: np.zeros(net.cpt_shape(k)) for k in lay.names}), 0.2, 60.0)
    f0, g = fitter.objective_fg(z, *args)
    h = 1e-6
    for j in rng.choice(lay.size, 6, replace=False):
        e = np.zeros(lay.size)
        e[j] = h
        fd = (fitter.objective_fg(z + e, *args)[0] - fitter.objective_fg(z - e, *args)[0]) / (2 * h)
        assert g[j] == pytest.approx(fd, abs=1e-7)


# --------------------------------------------------------------------------- refusals
def test_a_record_that_needs_an_impossible_cell_is_named():
    net, df = pumps_network(), pumps_data(n=50)
    df.loc[7, ["pump_a", "alarm"]] = ["ok", "on"]
    with pytest.raises(ImpossibleDataError) as e:
        _quiet_fit(net, df)
    msg = str(e.value)
    assert "alarm=on with pump_a=ok" in msg and "nodes.alarm.impossible" in msg and "\n" not in msg


def test_priors_on_tied_nodes():
    from adfit.priors import prior_from_dict

    net, df = pumps_network(), pumps_data(n=80)
    with pytest.raises(PriorError, match=r"\[nodes.pump_b\]: node 'pump_b' is tied to 'pump_a'.*\[nodes.pump_a\]"):
        prior_from_dict({"nodes": {"pump_b": {"pseudo_counts": 1.0}}}, net).pseudo_counts(net)
    # a [default] prior applies once to the shared parameters: MAP = (pooled counts + c) / (n_u + Kc)
    res = _quiet_fit(net, df, prior=prior_from_dict({"default": {"pseudo_counts": 2.0}}, net))
    pooled = (pd.crosstab(df["load"], df["pump_a"]) + pd.crosstab(df["load"], df["pump_b"])).loc[["low", "high"], STATES]
    expect = ((pooled + 2.0).T / (pooled.sum(axis=1) + 6.0)).T.to_numpy()
    np.testing.assert_allclose(res.probs["pump_a"], expect, atol=1e-7)
    # the impossible cell takes no pseudo-count: the row renormalises over the possible cells
    assert res.probs["alarm"][0, 1] == 0.0


def test_monotone_constraints_are_refused_by_em():
    # the gradient fit estimates them (tests/test_monotone.py); the EM reference does not
    from adfit.em import em_fit

    net = network_from_dict({"wear": {"states": ["low", "high"]},
                             "fail": {"states": ["no", "yes"], "parents": ["wear"], "increasing_with": ["wear"]}})
    with pytest.raises(NetworkError, match="nodes.fail.increasing_with: EM cannot estimate"):
        em_fit(net, pd.DataFrame({"wear": ["low", "high"], "fail": ["no", "yes"]}))


def test_cli_round_trip_with_ties_and_impossible_cells(tmp_path):
    from adfit.cli import app

    (tmp_path / "net.toml").write_text(
        '[nodes.load]\nstates = ["low", "high"]\n'
        '[nodes.pump_a]\nstates = ["ok", "worn", "failed"]\nparents = ["load"]\n'
        '[nodes.pump_b]\nstates = ["ok", "worn", "failed"]\nparents = ["load"]\ntied_to = "pump_a"\n'
        '[nodes.alarm]\nstates = ["off", "on"]\nparents = ["pump_a"]\n'
        'impossible = [{ given = { pump_a = "ok" }, state = "on" }]\n')
    df = pumps_data(n=150)
    df.loc[::5, "pump_a"] = ""
    df.to_csv(tmp_path / "d.csv", index=False)
    run = CliRunner().invoke
    r = run(app, ["fit", str(tmp_path / "net.toml"), str(tmp_path / "d.csv"), "--out", str(tmp_path / "r.json"),
                  "--errors", "--quiet"])
    assert r.exit_code == 0, r.output
    r = run(app, ["score", str(tmp_path / "net.toml"), str(tmp_path / "d.csv"), "--params", str(tmp_path / "r.json")])
    assert r.exit_code == 0, r.output
    gn = float(r.output.split("gradient norm ")[1].split()[0])
    assert gn < 1e-3  # at the constrained maximum: the pooled gradient vanishes
    r = run(app, ["fit", str(tmp_path / "net.toml"), str(tmp_path / "d.csv"), "--out", str(tmp_path / "r2.json"),
                  "--em-check"])
    # the EM reference pools the tied counts and keeps impossible cells at 0 (adfit/emforms.py):
    # EM from the fit's answer stays, EM from its own start reaches the same optimum
    assert r.exit_code == 0, r.output
    chk = json.loads((tmp_path / "r2.json").read_text())["em_check"]
    assert chk["verdict"] == "agree", chk["detail"]

"""Priors: parsing and validation, BDeu, closed forms, the objective pieces.

External references used below:
- Koller & Friedman (2009), Probabilistic Graphical Models, ch. 17: the posterior of a CPT row
  under a Dirichlet(α) prior with counts N is Dirichlet(α + N); the mode of a Dirichlet(β) with
  all β_k >= 1 is (β_k − 1) / (Σβ − K).
- Heckerman, Geiger & Chickering (1995), "Learning Bayesian networks: the combination of
  knowledge and statistical data", Machine Learning 20: BDeu uses α_ijk = ESS / (q_i r_i), and
  the BDe marginal likelihood is equal for Markov-equivalent structures (score equivalence).
- scipy.stats.dirichlet (log density), scipy.optimize (numerical maximisation), pandas
  (family counts), jax.grad (stationarity of the objective).
"""

from __future__ import annotations

import math
import warnings

import jax
import jax.numpy as jnp
import numpy as np
import pandas as pd
import pytest
from scipy import optimize, stats
from scipy.special import gammaln

import adfit  # noqa: F401  (enables float64 in JAX)
from adfit.errors import AdfitError, PriorError
from adfit.network import network_from_dict
from adfit.priors import (
    Prior,
    alpha_spec,
    check_l2,
    complete_data_map,
    describe_rows,
    ess_spec,
    expert_spec,
    l2_penalty,
    load_prior,
    log_prior,
    log_prior_logits,
    prior_from_dict,
    prior_only_rows,
    pseudo_counts_spec,
    resolve_pseudo_counts,
)


def _net():
    # wear -> vibration, wear -> oil_temp (3 states), load fixed, load -> wear
    return network_from_dict({
        "load": {"states": ["low", "high"], "fixed": [0.7, 0.3]},
        "wear": {"states": ["ok", "worn"], "parents": ["load"]},
        "vibration": {"states": ["normal", "high"], "parents": ["wear"]},
        "oil_temp": {"states": ["cool", "warm", "hot"], "parents": ["wear", "load"]},
    })


NET = _net()
EXPERT = [[0.9, 0.1], [0.2, 0.8]]


# ---------------------------------------------------------------- parsing
def test_load_prior_file_and_round_trip(tmp_path):
    f = tmp_path / "prior.toml"
    f.write_text(
        "[default]\npseudo_counts = 1.0\n\n"
        "[nodes.vibration]\ntable = [[0.9, 0.1], [0.2, 0.8]]\nstrength = 30\n\n"
        "[nodes.oil_temp]\nequivalent_sample_size = 12\n", encoding="utf-8")
    p = load_prior(f, NET)
    c = p.pseudo_counts(NET)
    assert set(c) == set(NET.free_names) == {"wear", "vibration", "oil_temp"}
    for n in c:
        assert c[n].shape == NET.cpt_shape(n)
    np.testing.assert_allclose(c["wear"], np.ones((2, 2)))
    np.testing.assert_allclose(c["vibration"], 30 * np.array(EXPERT))  # strength spread as the table
    np.testing.assert_allclose(c["oil_temp"], np.full((2, 2, 3), 12 / (4 * 3)))
    assert p.source == str(f)
    again = prior_from_dict(p.to_dict(), NET, source=str(f))
    assert again == p and hash(again) == hash(p)
    d = p.describe(NET)
    assert d["total_pseudo_counts"] == pytest.approx({"wear": 4.0, "vibration": 60.0, "oil_temp": 12.0})
    import json
    json.dumps(d)  # JSON-ready


def test_no_default_means_zero_counts_and_python_constructors():
    p = Prior(nodes=(("vibration", expert_spec(EXPERT, 10)),))
    c = p.pseudo_counts(NET)
    assert np.all(c["wear"] == 0) and np.all(c["oil_temp"] == 0)
    np.testing.assert_allclose(c["vibration"], [[9, 1], [2, 8]])
    assert Prior.flat(0.5).pseudo_counts(NET)["oil_temp"].tolist() == np.full((2, 2, 3), 0.5).tolist()
    # a node's own entry replaces the default
    p2 = Prior.flat(1.0).with_node("vibration", pseudo_counts_spec(0.0))
    assert np.all(p2.pseudo_counts(NET)["vibration"] == 0)
    # alpha given directly: c = alpha - 1
    np.testing.assert_allclose(Prior(alpha_spec(3.0)).pseudo_counts(NET)["wear"], 2.0)
    np.testing.assert_allclose(Prior(ess_spec(8)).pseudo_counts(NET)["vibration"], 2.0)


def test_parentless_node_accepts_flat_list():
    net = network_from_dict({"a": {"states": ["x", "y", "z"]}})
    c = prior_from_dict({"nodes": {"a": {"pseudo_counts": [1, 2, 3]}}}, net)
    np.testing.assert_allclose(c.pseudo_counts(net)["a"], [1, 2, 3])


BAD = [
    ({"nodes": {"vibration": {"pseudo_counts": [[1, -1], [0, 0]]}}}, ["vibration", "row 1", "'high'", ">= 0"]),
    ({"default": {"pseudo_counts": -0.5}}, ["[default]", ">= 0"]),
    ({"nodes": {"vibration": {"table": [[0.9, 0.2], [0.2, 0.8]], "strength": 5}}}, ["row 1", "wear=ok", "sums to 1.1"]),
    ({"nodes": {"vibration": {"table": [[0.9, 0.1]], "strength": 5}}}, ["1 row(s) of 2", "expected 2 row(s) of 2"]),
    ({"nodes": {"oil_temp": {"pseudo_counts": [[1, 1], [1, 1], [1, 1], [1, 1]]}}}, ["expected 4 row(s) of 3"]),
    ({"nodes": {"vibraton": {"pseudo_counts": 1}}}, ["unknown node 'vibraton'", "wear, vibration, oil_temp"]),
    ({"nodes": {"load": {"pseudo_counts": 1}}}, ["node 'load' has a fixed CPT; a prior does not apply"]),
    ({"nodes": {"vibration": {"table": EXPERT, "strength": -1}}}, ["strength = -1", ">= 0"]),
    ({"default": {"alpha": 0.5}}, ["alpha", "0.5 < 1", "mode", "unbounded", "alpha >= 1"]),
    ({"nodes": {"vibration": {"alpha": [[1, 1], [2, 0.9]]}}}, ["row 2", "wear=worn", "'high'", "0.9 < 1", "mode"]),
    ({"default": {"equivalent_sample_size": -3}}, ["equivalent_sample_size = -3"]),
    ({"priors": {}}, ["unknown top-level key(s) ['priors']"]),
    ({"default": {"pseudo_count": 1}}, ["unknown key(s) ['pseudo_count']"]),
    ({"nodes": {"vibration": {"table": EXPERT, "strength": 3, "weight": 1}}}, ["unknown key(s) ['weight']"]),
    ({"default": {"table": EXPERT, "strength": 3}}, ["belong in a [nodes.NAME] entry"]),
    ({"nodes": {"vibration": {"table": EXPERT}}}, ["without strength"]),
    ({"nodes": {"vibration": {"strength": 3}}}, ["without table"]),
    ({"nodes": {"vibration": {"pseudo_counts": 1, "alpha": 2}}}, ["alpha and pseudo_counts", "only one"]),
    ({"nodes": {"vibration": {}}}, ["empty entry"]),
    ({"nodes": {"vibration": {"pseudo_counts": "lots"}}}, ["pseudo_counts must be a number"]),
    ({"nodes": {"vibration": {"pseudo_counts": [[1, "a"], [1, 1]]}}}, ["row 1 is not a list of numbers"]),
    ({"default": {"pseudo_counts": True}}, ["pseudo_counts must be"]),
    ({"default": {"pseudo_counts": float("inf")}}, ["finite"]),
    ({"nodes": {"vibration": {"table": EXPERT, "strength": float("nan")}}}, ["strength = nan"]),
    ({"default": {"pseudo_counts": [[1, 1]]}}, ["must be one number here"]),
]


@pytest.mark.parametrize("doc, parts", BAD)
def test_invalid_priors_raise_one_line_prior_errors(doc, parts):
    with pytest.raises(PriorError) as ei:
        prior_from_dict(doc, NET, source="p.toml")
    msg = str(ei.value)
    assert isinstance(ei.value, AdfitError) and "\n" not in msg
    assert msg.startswith("p.toml: ")
    for part in parts:
        assert part in msg, (part, msg)


def test_file_errors(tmp_path):
    with pytest.raises(PriorError, match="prior file not found"):
        load_prior(tmp_path / "nope.toml", NET)
    bad = tmp_path / "bad.toml"
    bad.write_text("[default\npseudo_counts = 1", encoding="utf-8")
    with pytest.raises(PriorError, match="not valid TOML"):
        load_prior(bad, NET)
    inf = tmp_path / "inf.toml"
    inf.write_text("[default]\npseudo_counts = inf\n", encoding="utf-8")
    with pytest.raises(PriorError, match="finite"):
        load_prior(inf, NET)


def test_prior_built_in_python_is_validated_on_use():
    p = Prior(nodes=(("vibration", expert_spec([[0.5, 0.6], [0.5, 0.5]], 2)),))
    with pytest.raises(PriorError, match="sums to 1.1"):
        p.pseudo_counts(NET)
    with pytest.raises(PriorError, match="more than one prior entry"):
        Prior(nodes=(("wear", ess_spec(1)), ("wear", ess_spec(2))))


def test_resolve_pseudo_counts_from_mapping():
    c = resolve_pseudo_counts({"oil_temp": np.arange(12.0).reshape(2, 2, 3)}, NET)
    np.testing.assert_array_equal(c["oil_temp"], np.arange(12.0).reshape(2, 2, 3))
    assert np.all(c["wear"] == 0)
    assert all(np.all(v == 0) for v in resolve_pseudo_counts(None, NET).values())
    with pytest.raises(PriorError, match="expected"):
        resolve_pseudo_counts({"oil_temp": np.zeros((3, 2, 2))}, NET)
    with pytest.raises(PriorError, match=">= 0"):
        resolve_pseudo_counts({"wear": [[1, -1], [1, 1]]}, NET)


# ---------------------------------------------------------------- BDeu
def test_bdeu_cells_are_ess_over_q_r():
    # Heckerman, Geiger & Chickering (1995): alpha_ijk = ESS / (q_i r_i).
    ess = 10.0
    c = Prior.bdeu(ess).pseudo_counts(NET)
    for name, q, r in [("wear", 2, 2), ("vibration", 2, 2), ("oil_temp", 4, 3)]:
        np.testing.assert_allclose(c[name], ess / (q * r))
        assert c[name].sum() == pytest.approx(ess)  # the node's total equals the ESS


def _log_bd(counts_by_node, alpha_by_node):
    """Bayesian-Dirichlet log marginal likelihood (Heckerman, Geiger & Chickering 1995, eq. for BD):
    Σ_ij [lnΓ(α_ij) − lnΓ(α_ij + N_ij)] + Σ_ijk [lnΓ(α_ijk + N_ijk) − lnΓ(α_ijk)]."""
    total = 0.0
    for n, N in counts_by_node.items():
        a = alpha_by_node[n].reshape(-1, N.shape[-1])
        N = N.reshape(-1, N.shape[-1])
        total += np.sum(gammaln(a.sum(1)) - gammaln(a.sum(1) + N.sum(1)))
        total += np.sum(gammaln(a + N) - gammaln(a))
    return total


def _family_counts(net, df):
    out = {}
    for n in net.names:
        node = net.node(n)
        cols = list(node.parents) + [n]
        levels = [net.node(c).states for c in cols]
        idx = pd.MultiIndex.from_product(levels, names=cols)
        cnt = df.groupby(cols).size().reindex(idx, fill_value=0)
        out[n] = cnt.to_numpy(dtype=float).reshape(net.cpt_shape(n))
    return out


def test_bdeu_is_score_equivalent_and_flat_counts_are_not():
    # Score equivalence (Heckerman, Geiger & Chickering 1995, theorem on BDe): Markov-equivalent
    # structures A->B->C, A<-B<-C and A<-B->C get the same marginal likelihood with BDeu
    # hyperparameters ESS/(q_i r_i). The same data with K2-style alpha = 1 per cell do not
    # (negative control: the check can fail).
    rng = np.random.default_rng(3)
    df = pd.DataFrame({"A": rng.choice(["a0", "a1"], 60), "B": rng.choice(["b0", "b1", "b2"], 60),
                       "C": rng.choice(["c0", "c1"], 60)})
    st = {"A": ["a0", "a1"], "B": ["b0", "b1", "b2"], "C": ["c0", "c1"]}
    structures = [{"B": ["A"], "C": ["B"]}, {"A": ["B"], "B": ["C"]}, {"A": ["B"], "C": ["B"]}]
    bdeu, k2 = [], []
    for pa in structures:
        net = network_from_dict({v: {"states": st[v], "parents": pa.get(v, [])} for v in "ABC"})
        N = _family_counts(net, df)
        bdeu.append(_log_bd(N, Prior.bdeu(6.0).pseudo_counts(net)))
        k2.append(_log_bd(N, {n: np.ones(net.cpt_shape(n)) for n in net.names}))
    assert bdeu[1] == pytest.approx(bdeu[0], abs=1e-9) and bdeu[2] == pytest.approx(bdeu[0], abs=1e-9)
    assert abs(k2[1] - k2[0]) > 1e-3 or abs(k2[2] - k2[0]) > 1e-3


# ---------------------------------------------------------------- closed forms
def test_complete_data_map_matches_dirichlet_posterior_mode_and_numerical_max():
    rng = np.random.default_rng(0)
    N = rng.integers(0, 20, size=(4, 3)).astype(float)
    c = rng.uniform(0, 3, size=(4, 3))
    got = complete_data_map(N, c)
    # Koller & Friedman 2009, ch. 17: posterior Dirichlet(α + N), mode (α_k + N_k − 1)/(Σα + N − K)
    alpha = c + 1.0
    K = N.shape[-1]
    kf = (alpha + N - 1) / (alpha.sum(-1, keepdims=True) + N.sum(-1, keepdims=True) - K)
    np.testing.assert_allclose(got, kf, rtol=1e-12)
    # scipy: maximise Σ (N + c) log θ on the simplex, row by row
    for u in range(4):
        w = N[u] + c[u]
        res = optimize.minimize(lambda t: -np.sum(w * np.log(t)), np.full(K, 1 / K), method="SLSQP",
                                bounds=[(1e-12, 1)] * K, constraints=[{"type": "eq", "fun": lambda t: t.sum() - 1}],
                                options={"ftol": 1e-14, "maxiter": 500})
        np.testing.assert_allclose(got[u], res.x, atol=1e-6)
    # an unseen row without prior is undefined
    assert np.all(np.isnan(complete_data_map(np.zeros((1, 2)), np.zeros((1, 2)))))
    # dicts keyed by node
    d = complete_data_map({"x": N}, {"x": c})
    np.testing.assert_allclose(d["x"], got)


def test_strength_limits_on_complete_data():
    N = np.array([[40.0, 2.0], [3.0, 5.0]])
    table = np.array(EXPERT)
    mle = N / N.sum(-1, keepdims=True)
    c0 = Prior(nodes=(("vibration", expert_spec(EXPERT, 0)),)).pseudo_counts(NET)["vibration"]
    np.testing.assert_allclose(complete_data_map(N, c0), mle, rtol=1e-14)
    big = Prior(nodes=(("vibration", expert_spec(EXPERT, 1e9)),)).pseudo_counts(NET)["vibration"]
    np.testing.assert_allclose(complete_data_map(N, big), table, atol=1e-7)
    # in between, the estimate is the weighted mean of the MLE and the expert table
    s = 30.0
    mid = complete_data_map(N, s * table)
    lam = N.sum(-1, keepdims=True) / (N.sum(-1, keepdims=True) + s)
    np.testing.assert_allclose(mid, lam * mle + (1 - lam) * table, rtol=1e-12)


def test_log_prior_is_dirichlet_log_density_up_to_constant():
    # scipy.stats.dirichlet.logpdf with α = c + 1: differences between two points equal
    # differences of Σ c·log θ (the normalising constant cancels).
    c = np.array([[0.5, 2.0, 1.0], [3.0, 0.0, 0.25]])
    t1 = np.array([[0.2, 0.5, 0.3], [0.6, 0.1, 0.3]])
    t2 = np.array([[0.4, 0.4, 0.2], [0.3, 0.3, 0.4]])
    ref = sum(stats.dirichlet.logpdf(t1[u], c[u] + 1) - stats.dirichlet.logpdf(t2[u], c[u] + 1) for u in range(2))
    assert log_prior({"n": t1}, {"n": c}) - log_prior({"n": t2}, {"n": c}) == pytest.approx(ref, rel=1e-12)
    assert log_prior({"n": t1, "fixed": np.ones(3)}, {"n": c}) == pytest.approx(np.sum(c * np.log(t1)))
    # 0·log 0 = 0, and c > 0 at θ = 0 gives -inf
    t0 = np.array([[0.5, 0.5, 0.0], [1.0, 0.0, 0.0]])
    c0 = np.array([[1.0, 1.0, 0.0], [1.0, 0.0, 0.0]])
    assert log_prior({"n": t0}, {"n": c0}) == pytest.approx(2 * math.log(0.5))
    assert log_prior({"n": t0}, {"n": np.ones((2, 3))}) == -math.inf
    with pytest.raises(PriorError, match="shape"):
        log_prior({"n": t0[:1]}, {"n": c0})


def test_log_prior_logits_matches_and_has_no_softmax_jacobian():
    # Stationarity check with jax.grad: Σ N·log softmax(z) + Σ c·log softmax(z) has zero gradient
    # at softmax(z) = (N + c)/(N_u + Σc) (Koller & Friedman 2009, ch. 17 mode with α = c + 1), and a
    # non-zero gradient at (N + c + 1)/(N_u + Σc + K), the mode one would get if the
    # log-Jacobian of the softmax (Σ log θ) were added to the prior.
    N = np.array([[7.0, 1.0, 0.0], [2.0, 2.0, 9.0]])
    c = np.array([[1.0, 0.5, 0.0], [0.0, 3.0, 1.0]])

    def obj(z):
        return jnp.sum(N * jax.nn.log_softmax(z, axis=-1)) + log_prior_logits({"x": z}, {"x": c})

    g = jax.jit(jax.grad(obj))
    with np.errstate(divide="ignore"):
        z_map = np.log(np.maximum(complete_data_map(N, c), 1e-300))
    z_jac = np.log(complete_data_map(N, c + 1.0))
    assert np.max(np.abs(np.asarray(g(jnp.asarray(z_map))))) < 1e-9
    assert np.max(np.abs(np.asarray(g(jnp.asarray(z_jac))))) > 0.1
    z = jnp.asarray(np.random.default_rng(1).normal(size=(2, 3)))
    th = np.asarray(jax.nn.softmax(z, axis=-1))
    assert float(log_prior_logits({"x": z}, {"x": c})) == pytest.approx(log_prior({"x": th}, {"x": c}), rel=1e-12)


# ---------------------------------------------------------------- L2
def test_l2_penalty_formula_and_shift_invariance():
    z = {"a": np.array([[1.0, 2.0, 6.0], [0.0, 0.0, 3.0]]), "b": np.array([0.5, -0.5])}
    # by hand: row means 3 and 1 -> (4+1+9) + (1+1+4) = 20; b: 0.25+0.25 = 0.5
    assert l2_penalty(z, 0.1) == pytest.approx(0.1 * 20.5)
    shifted = {"a": z["a"] + np.array([[5.0], [-2.0]]), "b": z["b"] + 7}
    assert l2_penalty(shifted, 0.1) == pytest.approx(l2_penalty(z, 0.1))
    zj = {k: jnp.asarray(v) for k, v in z.items()}
    assert float(jax.jit(lambda d: l2_penalty(d, 0.1))(zj)) == pytest.approx(0.1 * 20.5)
    assert l2_penalty(z, 0.0) == 0.0
    assert check_l2(0) == 0.0 and check_l2(2.5) == 2.5
    for bad in (-1.0, float("inf"), float("nan"), "x", True):
        with pytest.raises(PriorError, match="--l2"):
            check_l2(bad)


# ---------------------------------------------------------------- prior-only rows
def test_prior_only_rows_for_unseen_parent_configuration():
    # complete records in which load is always "low": the rows of oil_temp with load=high have no
    # data; with a prior they are prior-only, without one they are not reported here.
    df = pd.DataFrame({"load": ["low"] * 6, "wear": ["ok", "ok", "worn", "ok", "worn", "ok"],
                       "vibration": ["normal"] * 6, "oil_temp": ["cool"] * 6})
    N = _family_counts(NET, df)
    parent_weight = {n: N[n].sum(-1).reshape(-1) for n in NET.free_names}  # pandas-counted
    rows = prior_only_rows(NET, parent_weight, Prior.flat(1.0).pseudo_counts(NET))
    assert rows == {"wear": [1], "oil_temp": [1, 3]}  # load=high rows (last parent fastest)
    assert describe_rows(NET, rows) == ["wear | load=high", "oil_temp | wear=ok, load=high",
                                        "oil_temp | wear=worn, load=high"]
    assert prior_only_rows(NET, parent_weight, Prior().pseudo_counts(NET)) == {}
    # and there the closed-form estimate is the prior mode (here uniform)
    np.testing.assert_allclose(complete_data_map(N["oil_temp"], np.ones((2, 2, 3)))[:, 1], 1 / 3)
    with pytest.raises(PriorError, match="expected 4"):
        prior_only_rows(NET, {"oil_temp": np.zeros(3)}, {"oil_temp": np.ones((2, 2, 3))})


def test_label_switching_symmetric_prior_vs_asymmetric_expert_table():
    # Swapping the two states of a latent node (and the matching rows of its children's tables)
    # leaves the likelihood unchanged (checked with the EM module's own inference); a symmetric
    # prior leaves the objective unchanged too, an asymmetric expert table does not.
    from adfit.em import log_likelihood
    net = network_from_dict({"H": {"states": ["h0", "h1"], "latent": True},
                             "A": {"states": ["a0", "a1"], "parents": ["H"]},
                             "B": {"states": ["b0", "b1", "b2"], "parents": ["H"]}})
    rng = np.random.default_rng(5)
    df = pd.DataFrame({"A": rng.choice(["a0", "a1", ""], 40), "B": rng.choice(["b0", "b1", "b2"], 40)})
    probs = {"H": np.array([0.3, 0.7]), "A": np.array([[0.9, 0.1], [0.25, 0.75]]),
             "B": np.array([[0.5, 0.3, 0.2], [0.1, 0.2, 0.7]])}
    swapped = {"H": probs["H"][::-1], "A": probs["A"][::-1], "B": probs["B"][::-1]}
    assert log_likelihood(net, swapped, df) == pytest.approx(log_likelihood(net, probs, df), rel=1e-12)
    sym = Prior.bdeu(4.0).pseudo_counts(net)
    assert log_prior(swapped, sym) == pytest.approx(log_prior(probs, sym), rel=1e-12)
    asym = Prior.flat(0.5).with_node("A", expert_spec([[0.8, 0.2], [0.2, 0.8]], 10)).pseudo_counts(net)
    assert abs(log_prior(swapped, asym) - log_prior(probs, asym)) > 1.0


# ---------------------------------------------------------------- through the real fit
# Each fit compiles its objective (seconds), so the fits are shared through module fixtures.
@pytest.fixture(scope="module")
def complete_fit():
    """One complete-data fit exercising several kinds of entry at once (decomposable objective)."""
    from adfit.fit import fit
    net = network_from_dict({
        "load": {"states": ["low", "high"]},
        "wear": {"states": ["ok", "worn"], "parents": ["load"]},
        "vibration": {"states": ["normal", "high"], "parents": ["wear"]},
        "oil_temp": {"states": ["cool", "warm", "hot"], "parents": ["wear", "load"]},
    })
    rng = np.random.default_rng(11)
    n = 160
    df = pd.DataFrame({"load": rng.choice(["low", "high"], n, p=[0.6, 0.4]),
                       "wear": rng.choice(["ok", "worn"], n, p=[0.6, 0.4]),
                       "vibration": rng.choice(["normal", "high"], n, p=[0.7, 0.3]),
                       "oil_temp": rng.choice(["cool", "warm", "hot"], n)})
    df = df[~((df.wear == "worn") & (df.load == "high"))].reset_index(drop=True)  # one unseen parent config
    prior = prior_from_dict({
        "default": {"pseudo_counts": 1.0},
        "nodes": {"load": {"alpha": [3.0, 1.5]},                                   # c = [2, 0.5]
                  "wear": {"table": [[0.7, 0.3], [0.4, 0.6]], "strength": 1e6},    # -> expert table
                  "vibration": {"table": EXPERT, "strength": 0}}}, net)            # -> MLE
    from adfit.errors import IdentifiabilityWarning
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        # the unseen parent configuration is reported as informed by the prior only
        with pytest.warns(IdentifiabilityWarning, match=r"prior only.*oil_temp \| wear=worn, load=high"):
            res = fit(net, df, prior=prior)
    return net, df, prior, res


def test_fit_map_on_complete_data_is_the_closed_form(complete_fit):
    # Koller & Friedman 2009, ch. 17: θ̂ = (N + c)/(N_u + Σc); counts by pandas.
    net, df, prior, res = complete_fit
    N = _family_counts(net, df)
    c = prior.pseudo_counts(net)
    assert res.converged
    for n in net.free_names:
        np.testing.assert_allclose(res.probs[n], complete_data_map(N[n], c[n]), atol=1e-7, err_msg=n)
    # strength -> infinity gives the expert table, strength 0 the maximum-likelihood estimate
    np.testing.assert_allclose(res.probs["wear"], [[0.7, 0.3], [0.4, 0.6]], atol=1e-4)
    assert np.all(N["vibration"] > 0)  # the MLE is interior
    np.testing.assert_allclose(res.probs["vibration"], N["vibration"] / N["vibration"].sum(-1, keepdims=True), atol=1e-7)


def test_fit_has_no_softmax_jacobian_in_the_prior(complete_fit):
    # With the log-Jacobian of the softmax added, the mode would be (N + c + 1)/(N_u + Σc + K).
    net, df, prior, res = complete_fit
    N = _family_counts(net, df)
    c = prior.pseudo_counts(net)
    for n in ("load", "oil_temp"):
        jac = complete_data_map(N[n], c[n] + 1.0)
        assert np.max(np.abs(res.probs[n] - jac)) > 2e-3, n
        assert np.max(np.abs(res.probs[n] - complete_data_map(N[n], c[n]))) < 1e-7


def test_fit_reports_objective_split_and_prior_only_rows(complete_fit):
    net, df, prior, res = complete_fit
    N = _family_counts(net, df)
    c = prior.pseudo_counts(net)
    # log-likelihood of complete data: Σ N log θ (counts by pandas)
    ll = sum(float(np.sum(np.where(N[n] > 0, N[n] * np.log(np.where(N[n] > 0, res.probs[n], 1.0)), 0.0)))
             for n in net.names)
    assert res.log_likelihood == pytest.approx(ll, rel=1e-10)
    assert res.log_prior == pytest.approx(log_prior(res.probs, c), rel=1e-10)
    assert res.penalty == 0.0
    # the unseen configuration (wear=worn, load=high) of oil_temp is prior-only: uniform here
    weights = {n: N[n].sum(-1).reshape(-1) for n in net.free_names}
    rows = prior_only_rows(net, weights, c)
    assert rows == {"oil_temp": [3]}
    np.testing.assert_allclose(res.probs["oil_temp"][1, 1], [1 / 3] * 3, atol=1e-7)


@pytest.fixture(scope="module")
def l2_fit():
    from adfit.fit import fit
    net = network_from_dict({"wear": {"states": ["ok", "worn"]},
                             "oil_temp": {"states": ["cool", "warm", "hot"], "parents": ["wear"]}})
    df = pd.DataFrame({"wear": ["ok"] * 30 + ["worn"] * 10,
                       "oil_temp": ["cool"] * 20 + ["warm"] * 8 + ["hot"] * 2 + ["cool"] * 1 + ["warm"] * 3 + ["hot"] * 6})
    lam = 2.0
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        res = fit(net, df, l2=lam)
    return net, df, lam, res


def test_l2_estimate_solves_the_penalised_problem_and_shrinks_toward_uniform(l2_fit):
    net, df, lam, res = l2_fit
    N = _family_counts(net, df)
    # two states: N_1 − N θ_1 = λ log(θ_1/θ_2), solved with scipy.optimize.brentq
    n1, nt = N["wear"][0], N["wear"].sum()
    t1 = optimize.brentq(lambda t: n1 - nt * t - lam * math.log(t / (1 - t)), 1e-9, 1 - 1e-9, xtol=1e-14)
    assert res.probs["wear"][0] == pytest.approx(t1, abs=1e-7)
    # three states, row by row: maximise Σ N log softmax(z) − λ Σ (z − mean z)² with scipy BFGS
    for u in range(2):
        w = N["oil_temp"][u]

        def negf(z):
            z = z - z.max()
            return -(np.sum(w * (z - np.log(np.exp(z).sum()))) - lam * np.sum((z - z.mean()) ** 2))

        z = optimize.minimize(negf, np.zeros(3), method="BFGS", options={"gtol": 1e-10}).x
        th = np.exp(z - z.max()) / np.exp(z - z.max()).sum()
        np.testing.assert_allclose(res.probs["oil_temp"][u], th, atol=1e-6)
    # its effect: every row is closer to uniform than the MLE
    for n in net.names:
        mle = N[n] / N[n].sum(-1, keepdims=True)
        k = N[n].shape[-1]
        assert np.all(np.abs(res.probs[n] - 1 / k).max(-1) < np.abs(mle - 1 / k).max(-1)), n
    logits = {n: np.log(res.probs[n]) for n in net.names}
    assert res.penalty == pytest.approx(l2_penalty(logits, lam), rel=1e-6)
    assert res.log_prior == 0.0


def test_em_map_equals_gradient_map_with_gaps_and_a_latent_node():
    # Two independent implementations of the same objective (EM with a MAP M-step, numpy; the
    # gradient fit, JAX) must reach the same point. The asymmetric expert table on A fixes the
    # labelling of the latent H; EM is run from three random starts and the best is kept.
    from adfit.em import em_fit
    from adfit.fit import fit
    net = network_from_dict({"H": {"states": ["h0", "h1"], "latent": True},
                             "A": {"states": ["a0", "a1"], "parents": ["H"]},
                             "B": {"states": ["b0", "b1"], "parents": ["H"]},
                             "C": {"states": ["c0", "c1", "c2"], "parents": ["H"]}})
    rng = np.random.default_rng(1)
    n = 200
    h = rng.random(n) < 0.4
    a = np.where(rng.random(n) < np.where(h, 0.85, 0.2), "a1", "a0")
    b = np.where(rng.random(n) < np.where(h, 0.7, 0.1), "b1", "b0")
    pc = np.where(h[:, None], [0.1, 0.3, 0.6], [0.6, 0.3, 0.1])
    cc = np.array([rng.choice(["c0", "c1", "c2"], p=p) for p in pc])
    df = pd.DataFrame({"A": a, "B": b, "C": cc})
    df.loc[rng.random(n) < 0.3, "A"] = ""
    df.loc[rng.random(n) < 0.2, "C"] = ""
    prior = prior_from_dict({"default": {"pseudo_counts": 0.5},
                             "nodes": {"A": {"table": [[0.8, 0.2], [0.2, 0.8]], "strength": 10}}}, net)
    c = prior.pseudo_counts(net)
    res = fit(net, df, prior=prior)
    ems = [em_fit(net, df, pseudo_counts=c, seed=s) for s in range(3)]
    best = max(ems, key=lambda e: e.objective_value)
    assert res.converged and best.converged
    for name in net.names:
        np.testing.assert_allclose(res.probs[name], best.probs[name], atol=1e-6, err_msg=name)
    assert res.log_likelihood + res.log_prior == pytest.approx(best.objective_value, abs=1e-6)
    assert best.log_prior == pytest.approx(log_prior(best.probs, c), rel=1e-10)
    # and the prior moved the estimate: the MLE differs
    mle = max((em_fit(net, df, seed=s) for s in range(3)), key=lambda e: e.objective_value)
    assert max(np.abs(mle.probs[k] - best.probs[k]).max() for k in net.names) > 1e-2

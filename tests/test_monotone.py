"""Monotone CPTs (network key ``increasing_with``): the gradient fit through fractions.

Checked against the definition of first-order stochastic dominance (Shaked & Shanthikumar 2007,
Stochastic Orders, §1.A: Y_u ≤st Y_u' iff P(Y_u ≤ y) ≥ P(Y_u' ≤ y) for every y), an independent
scipy.optimize SLSQP maximisation of a multinomial likelihood written here under the linear
dominance constraints, the closed-form multinomial maximum (counts / row totals) and its
binomial standard error, brute-force enumeration of a missing parent, central finite
differences, and the KKT conditions of a box (Boyd & Vandenberghe 2004, Convex Optimization,
§5.5.3). Data are simulated here (seeded); no value is taken from adfit itself.
"""

from __future__ import annotations

import json
import math
import warnings

import numpy as np
import pandas as pd
import pytest
from scipy.optimize import minimize
from typer.testing import CliRunner

from adfit import forms, monotone as mono
from adfit.errors import NetworkError, PriorError
from adfit.fit import Fitter, FitSettings, fit
from adfit.network import network_from_dict

C_STATES = ["ok", "worn", "failed"]
LEVELS = ["low", "mid", "high"]


def net_ab(listed=("wear",)):
    """wear (3 levels) and load (3 levels) -> gauge (3 ordered states), monotone along ``listed``."""
    return network_from_dict({
        "wear": {"states": LEVELS}, "load": {"states": LEVELS},
        "gauge": {"states": C_STATES, "parents": ["wear", "load"], "increasing_with": list(listed)}})


def data_ab(n, p_of, seed):
    rng = np.random.default_rng(seed)
    w, l = rng.integers(0, 3, n), rng.integers(0, 3, n)
    g = np.array([rng.choice(3, p=p_of(a, b)) for a, b in zip(w, l)])
    df = pd.DataFrame({"wear": np.array(LEVELS)[w], "load": np.array(LEVELS)[l], "gauge": np.array(C_STATES)[g]})
    N = np.zeros((3, 3, 3))
    np.add.at(N, (w, l, g), 1.0)
    return df, N


def quiet_fit(*a, **k):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return fit(*a, **k)


def dominance_gaps(table, axis):
    """max over (other parents, y) of F_{u+1}(y) − F_u(y) along ``axis`` (≤ 0 when monotone)."""
    F = np.cumsum(table, axis=-1)[..., :-1]
    return float(np.max(np.diff(F, axis=axis)))


def slsqp_constrained(N, axis, x0=None):
    """Maximise Σ N log θ over tables whose rows are distributions and whose cumulative
    probabilities do not increase along ``axis`` (scipy SLSQP, written independently of adfit)."""
    shape = N.shape
    K = shape[-1]

    def negll(x):
        th = x.reshape(shape)
        return -float(np.sum(np.where(N > 0, N * np.log(np.maximum(th, 1e-300)), 0.0)))

    def grad(x):
        th = x.reshape(shape)
        return -np.where(N > 0, N / np.maximum(th, 1e-300), 0.0).ravel()

    cons = [{"type": "eq", "fun": lambda x: x.reshape(-1, K).sum(axis=1) - 1.0}]
    cons.append({"type": "ineq",  # F_u(y) − F_{u+1}(y) ≥ 0 along the axis
                 "fun": lambda x: -np.diff(np.cumsum(x.reshape(shape), axis=-1)[..., :-1], axis=axis).ravel()})
    x0 = np.full(N.size, 1.0 / K) if x0 is None else x0
    res = minimize(negll, x0, jac=grad, method="SLSQP", bounds=[(1e-10, 1.0)] * N.size, constraints=cons,
                   options={"ftol": 1e-15, "maxiter": 2000})
    return -res.fun, res.x.reshape(shape)


def test_implied_table_is_monotone_and_gives_back_its_fractions():
    net = net_ab()
    rng = np.random.default_rng(0)
    R, _ = forms.cause_shape(net, "gauge")
    v = rng.dirichlet([1.0, 1.0], size=R)
    T = forms.implied_table(net, "gauge", v)
    assert np.allclose(T.sum(axis=-1), 1.0, atol=1e-14) and (T >= 0).all()
    assert dominance_gaps(T, 0) <= 1e-15          # along wear: dominance
    assert dominance_gaps(T, 1) > 0.01           # along load: no constraint (this draw violates it)
    # the recursion of the definition, written out: F_u(y) = F_u(y-1) + (F_pred(y) - F_u(y-1)) σ
    F = np.zeros((3, 3, 3))
    for a in range(3):
        for b in range(3):
            prev = 0.0
            for y in range(2):
                ub = F[a - 1, b, y] if a > 0 else 1.0
                F[a, b, y] = prev + (ub - prev) * v[(a * 3 + b) * 2 + y, 1]
                prev = F[a, b, y]
            F[a, b, 2] = 1.0
    assert np.abs(np.cumsum(T, axis=-1) - F).max() < 1e-15
    assert np.abs(forms.rows_from_table(net, "gauge", T) - v).max() < 1e-12
    # a table that is not monotone is read into one that is
    bad = rng.dirichlet(np.ones(3), size=(3, 3))
    assert dominance_gaps(forms.implied_table(net, "gauge", forms.start_rows(net, "gauge", bad)), 0) <= 1e-15


def test_fit_on_complete_data_equals_an_independent_constrained_maximum():
    # the child's distribution moves *down* with wear in the middle: the constraint must bind
    probs = {0: [0.2, 0.5, 0.3], 1: [0.5, 0.3, 0.2], 2: [0.1, 0.3, 0.6]}
    df, N = data_ab(300, lambda a, b: probs[(a + b) % 3], seed=1)
    assert dominance_gaps(N / N.sum(axis=-1, keepdims=True), 0) > 0.05  # the unconstrained maximum violates it
    res = quiet_fit(net_ab(), df)
    assert res.converged, res.stop_reason
    T = res.probs["gauge"]
    assert dominance_gaps(T, 0) <= 1e-12
    ll_fit = float(np.sum(np.where(N > 0, N * np.log(T), 0.0)))
    ll_ref, T_ref = slsqp_constrained(N, axis=0)
    assert abs(ll_fit - ll_ref) < 1e-6, (ll_fit, ll_ref)
    assert np.abs(T - T_ref).max() < 1e-3
    st = res.extras["stationarity"]
    assert st["holds"] and st["monotone"]["box_kkt"] <= 1e-3
    sec = res.extras["nodes"]["gauge"]
    assert sec["increasing_with"] == ["wear"] and sec["binding"]
    # every binding constraint reported is one: F equal to the lower wear level's
    F = np.cumsum(T, axis=-1)
    for text in sec["binding"]:
        if "equals" in text:
            y = C_STATES.index(text.split("<=")[1].split(" |")[0])
            cfg = dict(kv.split("=") for kv in text.split("| ")[1].split(")")[0].split(", "))
            a, b = LEVELS.index(cfg["wear"]), LEVELS.index(cfg["load"])
            assert abs(F[a, b, y] - F[a - 1, b, y]) < 1e-12


def test_fit_equals_the_unconstrained_maximum_when_the_data_satisfy_the_order():
    # counts / row totals is the multinomial maximum; when it is already monotone the constraint
    # changes nothing (and the standard errors are the binomial sqrt(θ(1-θ)/N(u)))
    probs = {0: [0.7, 0.2, 0.1], 1: [0.45, 0.3, 0.25], 2: [0.2, 0.3, 0.5]}
    df, N = data_ab(900, lambda a, b: probs[a], seed=2)
    closed = N / N.sum(axis=-1, keepdims=True)
    assert dominance_gaps(closed, 0) < -0.01  # strictly inside: no constraint binds
    res = quiet_fit(net_ab(), df, restarts=1)
    assert res.converged
    assert np.abs(res.probs["gauge"] - closed).max() < 1e-6
    assert res.extras["nodes"]["gauge"]["binding"] == []
    from adfit.uncertainty import compute_uncertainty

    u = compute_uncertainty(net_ab(), df, res.probs, converged=True)
    nu = N.sum(axis=-1, keepdims=True)
    assert np.allclose(u.se["gauge"], np.sqrt(closed * (1 - closed) / nu), rtol=1e-4)


def test_missing_parent_brute_force_likelihood_and_constrained_maximum():
    # a tiny network: wear (3) -> gauge (3), monotone along wear; a third of the records miss wear
    net = network_from_dict({"wear": {"states": LEVELS},
                             "gauge": {"states": C_STATES, "parents": ["wear"], "increasing_with": ["wear"]}})
    rng = np.random.default_rng(3)
    truth = np.array([[0.3, 0.5, 0.2], [0.5, 0.3, 0.2], [0.2, 0.3, 0.5]])  # violates the order at mid
    w = rng.choice(3, 240, p=[0.3, 0.4, 0.3])
    g = np.array([rng.choice(3, p=truth[a]) for a in w])
    ws = np.array(LEVELS, dtype=object)[w]
    ws[::3] = None
    df = pd.DataFrame({"wear": ws, "gauge": np.array(C_STATES)[g]})
    res = quiet_fit(net, df, restarts=1)
    assert res.converged, res.stop_reason
    assert dominance_gaps(res.probs["gauge"], 0) <= 1e-12

    obs = ~pd.isna(df["wear"]).to_numpy()
    wi = np.array([LEVELS.index(x) if x is not None else -1 for x in ws])

    def loglik(pw, T):  # brute force: a record without wear sums P(wear) P(gauge | wear) over wear
        ll = np.log(pw[wi[obs]] * T[wi[obs], g[obs]]).sum()
        return ll + np.log((pw[:, None] * T[:, g[~obs]]).sum(axis=0)).sum()

    assert abs(loglik(res.probs["wear"], res.probs["gauge"]) - res.log_likelihood) < 1e-9
    # the same maximum by SLSQP on the brute-force likelihood under the dominance constraints
    def neg(x):
        pw, T = x[:3], x[3:].reshape(3, 3)
        return -loglik(np.maximum(pw, 1e-12), np.maximum(T, 1e-12))

    cons = [{"type": "eq", "fun": lambda x: np.r_[x[:3].sum() - 1, x[3:].reshape(3, 3).sum(axis=1) - 1]},
            {"type": "ineq", "fun": lambda x: -np.diff(np.cumsum(x[3:].reshape(3, 3), axis=1)[:, :-1], axis=0).ravel()}]
    best = -np.inf
    for x0 in (np.full(12, 1 / 3), np.r_[res.probs["wear"], res.probs["gauge"].ravel()]):
        r = minimize(neg, x0, method="SLSQP", bounds=[(1e-9, 1)] * 12, constraints=cons,
                     options={"ftol": 1e-15, "maxiter": 3000})
        best = max(best, -r.fun)
    assert abs(best - res.log_likelihood) < 1e-6, (best, res.log_likelihood)


def test_gradient_equals_finite_differences_and_the_box_check_sees_a_non_maximum():
    from adfit.data import load_data

    net = net_ab()
    df, _ = data_ab(120, lambda a, b: [0.4, 0.3, 0.3] if a != 1 else [0.6, 0.3, 0.1], seed=4)
    df.loc[::4, "wear"] = None
    coded = load_data(net, df)
    f = Fitter(net, coded, settings=FitSettings())
    lay = f.layout
    rng = np.random.default_rng(5)
    R, _ = forms.cause_shape(net, "gauge")
    probs = {"wear": rng.dirichlet(np.ones(3)), "load": rng.dirichlet(np.ones(3)),
             "gauge": rng.dirichlet([2.0, 2.0], size=R)}
    z = lay.flatten(f.logits_of(probs))
    scale = np.ones_like(z)
    fg = lambda zz: f.objective_fg(zz, scale, f.pseudo_flat, 0.0, f.n_total)
    _, g = fg(z)
    h = 1e-6
    fd = np.array([(fg(z + h * e)[0] - fg(z - h * e)[0]) / (2 * h) for e in np.eye(z.size)])
    assert np.abs(fd - g).max() < 1e-7 * max(1.0, np.abs(g).max())
    # the box KKT check (adfit.monotone.box_kkt) at the fit, and at a point moved off it
    res = quiet_fit(net, df, restarts=1)
    assert res.converged
    rows = forms.rows_from_table(net, "gauge", res.probs["gauge"])
    good = {**res.probs, "gauge": rows}
    ev = f.evaluate(f.logits_of(good))
    assert f.box_holds(ev)
    d = mono.dsigma(rows, ev["counts"]["gauge"])
    on = np.flatnonzero(rows[:, 0] <= 1e-9)  # binding constraints: σ = 1 with an outward derivative
    assert on.size and (d[on] >= -1e-6).all()
    moved = rows.copy()
    moved[on[0]] = (0.2, 0.8)
    ev2 = f.evaluate(f.logits_of({**good, "gauge": moved}))
    assert not f.box_holds(ev2) and ev2["objective"] < ev["objective"]


def slsqp_two_axes(N, starts=4):
    """Maximise Σ N log θ under dominance along both parent axes (scipy SLSQP, independent of
    adfit; several starts, the best kept)."""
    shape, K = N.shape, N.shape[-1]

    def negll(x):
        return -float(np.sum(np.where(N > 0, N * np.log(np.maximum(x.reshape(shape), 1e-300)), 0.0)))

    def grad(x):
        return -np.where(N > 0, N / np.maximum(x.reshape(shape), 1e-300), 0.0).ravel()

    cons = [{"type": "eq", "fun": lambda x: x.reshape(-1, K).sum(axis=1) - 1.0}]
    for ax in (0, 1):
        cons.append({"type": "ineq", "fun": lambda x, ax=ax: -np.diff(np.cumsum(x.reshape(shape), axis=-1)[..., :-1],
                                                                      axis=ax).ravel()})
    best = None
    for s in range(starts):
        x0 = np.full(N.size, 1.0 / K) if s == 0 else np.random.default_rng(s).dirichlet(np.ones(K), size=N.size // K).ravel()
        r = minimize(negll, x0, jac=grad, method="SLSQP", bounds=[(1e-10, 1.0)] * N.size, constraints=cons,
                     options={"ftol": 1e-15, "maxiter": 3000})
        if best is None or r.fun < best.fun:
            best = r
    return -best.fun, best.x.reshape(shape)


def face_covariance(T, N, tol=1e-9):
    """Covariance of the cells of a monotone table on complete data, conditional on its binding
    constraints, written here from the definitions: the log-likelihood Σ N log θ has Hessian
    −diag(N/θ²) in the cells; on the cumulative probabilities F (θ = L F) the binding
    constraints are linear equalities with null-space basis Z, and the covariance of the
    restricted maximum is L Z (Zᵀ Lᵀ diag(N/θ²) L Z)⁻¹ Zᵀ Lᵀ (Aitchison & Silvey 1958, Ann. Math.
    Statist. 29(3))."""
    from scipy.linalg import null_space

    R, K = int(np.prod(T.shape[:-1])), T.shape[-1]
    th, n = T.reshape(R, K), N.reshape(R, K)
    Fc = np.cumsum(th, axis=1)[:, :-1]
    L = np.zeros((R * K, R * (K - 1)))
    for r in range(R):
        for y in range(K):
            if y < K - 1:
                L[r * K + y, r * (K - 1) + y] += 1
            if y > 0:
                L[r * K + y, r * (K - 1) + y - 1] -= 1
    rows = []
    idx = lambda r, y: r * (K - 1) + y
    cards = T.shape[:-1]
    for r in range(R):
        a = np.unravel_index(r, cards)
        for y in range(K):  # cells at 0
            if th[r, y] <= tol:
                v = np.zeros(R * (K - 1))
                if y < K - 1:
                    v[idx(r, y)] += 1
                if y > 0:
                    v[idx(r, y - 1)] -= 1
                rows.append(v)
        for ax in range(len(cards)):  # ties with the configuration one state lower along an axis
            if a[ax] == 0:
                continue
            b = list(a)
            b[ax] -= 1
            q = int(np.ravel_multi_index(b, cards))
            for y in range(K - 1):
                if Fc[q, y] - Fc[r, y] <= tol:
                    v = np.zeros(R * (K - 1))
                    v[idx(r, y)], v[idx(q, y)] = 1, -1
                    rows.append(v)
    Z = null_space(np.array(rows)) if rows else np.eye(R * (K - 1))
    H = L.T @ np.diag((n / np.maximum(th, 1e-300) ** 2).ravel()) @ L
    return L @ Z @ np.linalg.inv(Z.T @ H @ Z) @ Z.T @ L.T, Z.shape[1]


def test_two_listed_parents_equal_an_independent_constrained_maximum_and_its_error_bars():
    # the child's distribution moves against both parents in places: constraints bind along
    # both, and configurations pool where a cell is bound to two predecessors (the fractions'
    # map takes a min over them there: the KKT check works on the cumulative probabilities)
    probs = {0: [0.2, 0.5, 0.3], 1: [0.5, 0.3, 0.2], 2: [0.1, 0.3, 0.6]}
    df, N = data_ab(400, lambda a, b: probs[(a + b) % 3], seed=1)
    net = net_ab(("wear", "load"))
    res = quiet_fit(net, df)
    assert res.converged, res.stop_reason
    T = res.probs["gauge"]
    assert dominance_gaps(T, 0) <= 1e-12 and dominance_gaps(T, 1) <= 1e-12
    ll_fit = float(np.sum(np.where(N > 0, N * np.log(T), 0.0)))
    ll_ref, T_ref = slsqp_two_axes(N)
    assert abs(ll_fit - ll_ref) < 1e-6, (ll_fit, ll_ref)
    assert np.abs(T - T_ref).max() < 1e-4
    st = res.extras["stationarity"]
    assert st["holds"] and st["monotone"]["cone_kkt"]["gauge"] <= 1e-8
    # every "equals its value at ..." reported is a tie of cumulative probabilities
    F = np.cumsum(T, axis=-1)
    texts = res.extras["nodes"]["gauge"]["binding"]
    assert any(" and at " in t for t in texts)  # a configuration bound to both predecessors
    for text in texts:
        y = C_STATES.index(text.split("<=")[1].split(" |")[0])
        cfg = dict(kv.split("=") for kv in text.split("| ")[1].split(")")[0].split(", "))
        a, b = LEVELS.index(cfg["wear"]), LEVELS.index(cfg["load"])
        for at in text.split("equals its value at ")[1].split(" and at "):
            o = dict(kv.split("=") for kv in at.split(", "))
            assert abs(F[a, b, y] - F[LEVELS.index(o["wear"]), LEVELS.index(o["load"]), y]) < 1e-12
    # error bars: conditional on the binding constraints, as the restricted maximum's
    from adfit.gaps import information_criteria
    from adfit.data import load_data
    from adfit.uncertainty import compute_uncertainty

    u = compute_uncertainty(net, df, res.probs, converged=True)
    cov, dim = face_covariance(T, N)
    se_ref = np.sqrt(np.maximum(np.diag(cov), 0.0)).reshape(T.shape)
    ok = np.isfinite(u.se["gauge"])
    assert ok.sum() >= 20
    assert np.abs(u.se["gauge"][ok] - se_ref[ok]).max() < 1e-5
    assert any("ties between predecessors" in n for n in u.notes)
    # AIC/BIC count the dimension of that face (Meyer & Woodroofe 2000, from memory)
    ic = information_criteria(net, load_data(net, df), res)
    assert ic.n_parameters == 2 + 2 + dim and ic.n_bound == 18 - dim
    assert abs(ic.aic - (-2 * res.log_likelihood + 2 * (4 + dim))) < 1e-9


def test_two_listed_parents_with_gaps_brute_force_and_constrained_maximum():
    # wear (2) and load (2) -> gauge (3), monotone along both; a third of the records miss load
    two = ["low", "high"]
    net = network_from_dict({"wear": {"states": two}, "load": {"states": two},
                             "gauge": {"states": C_STATES, "parents": ["wear", "load"],
                                       "increasing_with": ["wear", "load"]}})
    rng = np.random.default_rng(11)
    truth = {(0, 0): [0.3, 0.4, 0.3], (1, 0): [0.5, 0.3, 0.2], (0, 1): [0.4, 0.3, 0.3], (1, 1): [0.2, 0.3, 0.5]}
    w, l = rng.integers(0, 2, 300), rng.integers(0, 2, 300)
    g = np.array([rng.choice(3, p=truth[(a, b)]) for a, b in zip(w, l)])
    ls = np.array(two, dtype=object)[l]
    ls[::3] = None
    df = pd.DataFrame({"wear": np.array(two)[w], "load": ls, "gauge": np.array(C_STATES)[g]})
    res = quiet_fit(net, df, restarts=1)
    assert res.converged, res.stop_reason
    T = res.probs["gauge"]
    assert dominance_gaps(T, 0) <= 1e-12 and dominance_gaps(T, 1) <= 1e-12
    obs = ~pd.isna(df["load"]).to_numpy()
    li = np.where(obs, [two.index(x) if x is not None else 0 for x in ls], -1)

    def loglik(pw, pl, T):  # brute force: a record without load sums P(load) P(gauge | wear, load)
        a = np.log(pw[w[obs]] * pl[li[obs]] * T[w[obs], li[obs], g[obs]]).sum()
        return a + np.log(pw[w[~obs]] * (pl[None, :] * T[w[~obs], :, g[~obs]]).sum(axis=1)).sum()

    assert abs(loglik(res.probs["wear"], res.probs["load"], T) - res.log_likelihood) < 1e-9

    def neg(x):
        return -loglik(np.maximum(x[:2], 1e-12), np.maximum(x[2:4], 1e-12), np.maximum(x[4:].reshape(2, 2, 3), 1e-12))

    def dom(x):
        Fc = np.cumsum(x[4:].reshape(2, 2, 3), axis=-1)[..., :-1]
        return np.r_[-np.diff(Fc, axis=0).ravel(), -np.diff(Fc, axis=1).ravel()]

    cons = [{"type": "eq", "fun": lambda x: np.r_[x[:2].sum() - 1, x[2:4].sum() - 1,
                                                  x[4:].reshape(4, 3).sum(axis=1) - 1]},
            {"type": "ineq", "fun": dom}]
    best = -np.inf
    for x0 in (np.r_[0.5, 0.5, 0.5, 0.5, np.full(12, 1 / 3)],
               np.r_[res.probs["wear"], res.probs["load"], T.ravel()]):
        r = minimize(neg, x0, method="SLSQP", bounds=[(1e-9, 1)] * 16, constraints=cons,
                     options={"ftol": 1e-15, "maxiter": 3000})
        best = max(best, -r.fun)
    assert abs(best - res.log_likelihood) < 1e-6, (best, res.log_likelihood)


def test_the_cone_check_fails_off_the_maximum():
    # at the fit the KKT residual on the cumulative probabilities is ~0; halfway to a constant
    # table (still monotone: the constraints are linear) the objective is lower and it is not
    from adfit.data import load_data

    probs = {0: [0.2, 0.5, 0.3], 1: [0.5, 0.3, 0.2], 2: [0.1, 0.3, 0.6]}
    df, N = data_ab(300, lambda a, b: probs[(a + b) % 3], seed=6)
    net = net_ab(("wear", "load"))
    res = quiet_fit(net, df, restarts=1)
    assert res.converged, res.stop_reason
    f = Fitter(net, load_data(net, df), settings=FitSettings())
    at = lambda T: f.evaluate(f.logits_of({**res.probs, "gauge": forms.rows_from_table(net, "gauge", T)}))
    ev = at(res.probs["gauge"])
    assert f.box_holds(ev) and ev["cone"]["gauge"][0] <= 1e-6
    mixed = 0.5 * res.probs["gauge"] + 0.5 * np.broadcast_to([0.3, 0.4, 0.3], (3, 3, 3))
    ev2 = at(mixed)
    assert not f.box_holds(ev2) and ev2["objective"] < ev["objective"] - 1.0
    assert "cumulative probabilities of the monotone node 'gauge'" in f._kkt_reason(ev2, "here")


def test_aic_counts_a_single_parent_monotone_table_without_its_binding_constraints():
    # along one parent each binding constraint removes one parameter (they are independent)
    probs = {0: [0.2, 0.5, 0.3], 1: [0.5, 0.3, 0.2], 2: [0.1, 0.3, 0.6]}
    df, N = data_ab(300, lambda a, b: probs[(a + b) % 3], seed=1)
    res = quiet_fit(net_ab(), df)
    from adfit.data import load_data
    from adfit.gaps import information_criteria

    ic = information_criteria(net_ab(), load_data(net_ab(), df), res)
    nb = len(res.extras["nodes"]["gauge"]["binding"])
    assert nb > 0 and ic.n_bound == nb and ic.n_parameters == 2 + 2 + 18 - nb
    assert "removed by binding constraints" in ic.format_text()


def test_refusals_are_one_line_and_name_the_key():
    with pytest.raises(NetworkError, match="increasing_with with cpd = 'logistic' is not estimated yet"):
        network_from_dict({"wear": {"states": LEVELS}, "gauge": {"states": C_STATES, "parents": ["wear"],
                                                                  "cpd": "logistic", "increasing_with": ["wear"]}})
    both = network_from_dict({"wear": {"states": LEVELS}, "gauge": {
        "states": C_STATES, "parents": ["wear"], "increasing_with": ["wear"],
        "impossible": [{"given": {"wear": "low"}, "state": "failed"}]}})
    with pytest.raises(NetworkError, match="nodes.gauge.impossible cannot be combined with increasing_with"):
        quiet_fit(both, pd.DataFrame({"wear": ["low", "high"], "gauge": ["ok", "failed"]}))
    from adfit.priors import prior_from_dict

    net = net_ab()
    df = data_ab(30, lambda a, b: [0.3, 0.3, 0.4], 0)[0]
    with pytest.raises(PriorError, match="increasing_with: priors on monotone nodes are not available yet"):
        quiet_fit(net, df, prior=prior_from_dict({"default": {"pseudo_counts": 1.0}}, net))


def test_cli_fit_errors_score_and_em_check(tmp_path):
    from adfit.cli import app

    (tmp_path / "net.toml").write_text(
        '[nodes.wear]\nstates = ["low", "mid", "high"]\n'
        '[nodes.gauge]\nstates = ["ok", "worn", "failed"]\nparents = ["wear"]\nincreasing_with = ["wear"]\n')
    rng = np.random.default_rng(6)
    truth = np.array([[0.3, 0.5, 0.2], [0.5, 0.3, 0.2], [0.2, 0.3, 0.5]])
    w = rng.integers(0, 3, 200)
    df = pd.DataFrame({"wear": np.array(LEVELS)[w], "gauge": [C_STATES[rng.choice(3, p=truth[a])] for a in w]})
    df.loc[::5, "wear"] = ""
    df.to_csv(tmp_path / "d.csv", index=False)
    run = CliRunner().invoke
    r = run(app, ["fit", str(tmp_path / "net.toml"), str(tmp_path / "d.csv"), "--out", str(tmp_path / "r.json"),
                  "--errors", "--quiet"])
    assert r.exit_code == 0, r.output
    doc = json.loads((tmp_path / "r.json").read_text())
    T = np.array(doc["nodes"]["gauge"]["table"])
    assert dominance_gaps(T, 0) <= 1e-12
    assert doc["nodes"]["gauge"]["binding"]
    assert "boundary" in json.dumps(doc["nodes"]["gauge"]["parameters_status"])
    from adfit.result import load_result
    from adfit.summary import format_estimates

    # the printed estimates say the constraint, not only "table" (the node's cpd key)
    assert "P(gauge | wear) (table, increasing with wear)" in format_estimates(load_result(tmp_path / "r.json"))
    r = run(app, ["score", str(tmp_path / "net.toml"), str(tmp_path / "d.csv"), "--params", str(tmp_path / "r.json")])
    assert r.exit_code == 0, r.output
    r = run(app, ["fit", str(tmp_path / "net.toml"), str(tmp_path / "d.csv"), "--out", str(tmp_path / "r2.json"),
                  "--em-check"])
    assert r.exit_code == 1
    assert "the EM cross-check does not cover monotone nodes" in r.output
    assert not (tmp_path / "r2.json").exists()


def test_error_bars_of_a_monotone_node_when_a_prior_is_on_another_node(tmp_path):
    # A prior file with an entry on another node only (here a Beta on the alarm) leaves the
    # monotone node without a prior; its error bars are still computed (they failed on the
    # CPT-shaped zeros before). The monotone table keeps the dominance inequalities
    # (first-order stochastic dominance: Shaked & Shanthikumar 2007, Stochastic Orders, 1.A).
    from adfit.cli import app

    (tmp_path / "net.toml").write_text(
        '[nodes.wear]\nstates = ["low", "mid", "high"]\n'
        '[nodes.gauge]\nstates = ["ok", "worn", "failed"]\nparents = ["wear"]\nincreasing_with = ["wear"]\n'
        '[nodes.alarm]\nstates = ["off", "on"]\nparents = ["gauge"]\n')
    (tmp_path / "prior.toml").write_text("[nodes.alarm]\npseudo_counts = 1.0\n")
    rng = np.random.default_rng(7)
    truth = np.array([[0.6, 0.3, 0.1], [0.4, 0.4, 0.2], [0.2, 0.3, 0.5]])
    w = rng.integers(0, 3, 300)
    g = np.array([rng.choice(3, p=truth[a]) for a in w])
    df = pd.DataFrame({"wear": np.array(LEVELS)[w], "gauge": np.array(C_STATES)[g],
                       "alarm": np.where(rng.random(300) < np.array([0.1, 0.4, 0.9])[g], "on", "off")})
    df.loc[::4, "gauge"] = ""
    df.to_csv(tmp_path / "d.csv", index=False)
    r = CliRunner().invoke(app, ["fit", str(tmp_path / "net.toml"), str(tmp_path / "d.csv"), "--prior",
                                 str(tmp_path / "prior.toml"), "--out", str(tmp_path / "r.json"), "--errors", "-q"])
    assert r.exit_code == 0, r.output
    doc = json.loads((tmp_path / "r.json").read_text())
    assert dominance_gaps(np.array(doc["nodes"]["gauge"]["table"]), 0) <= 1e-12
    se = np.array(doc["nodes"]["gauge"]["se"], dtype=float)
    assert se.shape == (3, 3) and np.all(np.isfinite(se[~np.isnan(se)])) and np.nanmax(se) > 0

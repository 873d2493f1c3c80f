"""Several starts side by side (adfit.restarts): the batched starts against separate fits, the
optima of a latent class model with several local maxima, the report and its warning.

Data: Stouffer & Toby (1951) role-conflict data (tests/published.py), with two latent classes
(Goodman 1974: identified, one maximum up to relabelling) and with three (several local maxima,
checked below with the independent EM reference, and a ridge of equal likelihood: from memory,
three classes on four binary items are not identified, Goodman 1974).
"""

from __future__ import annotations

import itertools
import json
import threading
import warnings

import jax
import numpy as np
import pytest

from adfit.data import encode_frame
from adfit.em import em_fit
from adfit.errors import LocalOptimaWarning
from adfit.fit import BURN_IN_STEPS, Fitter, FitSettings, complete_family_start, em_burn_in, fit, random_start
from adfit.likelihood import logits_from_probs
from adfit.restarts import BatchedObjective, local_optima_message, run_starts, summarise_optima
from adfit.result import result_from_dict

from published import (STOUFFER_TOBY_CLASS_SIZES, STOUFFER_TOBY_COUNTS, STOUFFER_TOBY_ITEMS,
                       STOUFFER_TOBY_P_PLUS, stouffer_toby)

# Stouffer-Toby with three classes, 3 starts, seed 15 (as fit() draws them): one start ends at the
# best (-503.3011), the others at lower local maxima (-503.506 and -503.541); the best is reached
# by one start only. Found by a scan of seeds 0-24 on this code (which starts reach which optimum
# depends on the optimiser's path: re-scan when the line search or the preconditioner changes).
# seed 37: the complete-family start ends at a lower local maximum, the two random starts (after
# EM burn-in) at the best. (Before the burn-in and the boundary escapes, seed 15 had only one of
# three starts at the best; no seed in 0-39 does now: the warning for that case is tested on
# summaries built by hand below.)
ST3_SEED, ST3_STARTS = 37, 3


def fit_starts(net, data, fitter, seed, k):
    """The starts fit() draws for ``seed``: complete-family counts, then random Dirichlet draws
    followed by EM burn-in steps (the network is latent)."""
    rng = np.random.default_rng(seed)
    out = []
    for i in range(k):
        p0 = complete_family_start(net, data, rng, fitter.pseudo) if i == 0 else \
            em_burn_in(fitter, random_start(net, rng), BURN_IN_STEPS)
        out.append(logits_from_probs(net, p0))
    return out


def lcm_loglik(probs, n_classes):
    """Closed form of a latent class model on the 16 response patterns (numpy, no elimination):
    log L = sum_patterns n log sum_c pi_c prod_j theta_j(x_j | c)."""
    pi = probs["cls"]
    total = 0.0
    for k, n in enumerate(STOUFFER_TOBY_COUNTS):
        bits = [(k >> (3 - j)) & 1 for j in range(4)]
        p = sum(pi[c] * np.prod([probs[it][c, b] for it, b in zip(STOUFFER_TOBY_ITEMS, bits)])
                for c in range(n_classes))
        total += n * np.log(p)
    return total


@pytest.fixture(scope="module")
def st2():
    net, df = stouffer_toby(2)
    data = encode_frame(net, df, count_column="count")
    fitter = Fitter(net, data, settings=FitSettings())
    starts = fit_starts(net, data, fitter, 0, 4)
    return net, data, fitter, starts


@pytest.fixture(scope="module")
def st3():
    net, df = stouffer_toby(3)
    data = encode_frame(net, df, count_column="count")
    fitter = Fitter(net, data, settings=FitSettings())
    starts = fit_starts(net, data, fitter, ST3_SEED, ST3_STARTS)
    runs, finals = run_starts(fitter, starts)
    return net, df, data, runs, finals


@pytest.fixture(scope="module")
def st3_fit(st3):
    net, _, data, _, _ = st3
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        res = fit(net, data, restarts=ST3_STARTS, seed=ST3_SEED)
    return res, caught


# ============================================================================ batched = separate
def test_batched_starts_reach_the_optima_of_separate_fits(st2):
    # The same starts, once side by side (vmapped evaluations) and once one after the other
    # (Fitter.run): every start reaches the same point. Stouffer-Toby, two classes.
    net, data, fitter, starts = st2
    stats = {}
    rb, fb = run_starts(fitter, starts, batched=True, stats=stats)
    rs, fs = run_starts(fitter, starts, batched=False)
    assert stats["width"] == 4 and stats["rounds"] > 0 and 0 < stats["slot_use"] <= 1
    for k in range(len(starts)):
        assert rb[k].converged and rs[k].converged
        assert rb[k].value == pytest.approx(rs[k].value, rel=1e-11)
        for name in net.free_names:
            np.testing.assert_allclose(fb[k]["probs"][name], fs[k]["probs"][name], rtol=0, atol=1e-6)
        # the batched end point's log-likelihood is the closed form's
        assert fb[k]["log_likelihood"] == pytest.approx(lcm_loglik(fb[k]["probs"], 2), rel=1e-12)
    # and it is Goodman's (1974) two-class solution: class sizes and P(+ | class) (from memory,
    # to the three decimals shown), after matching the classes
    best = fb[int(np.argmax([f["objective"] for f in fb]))]["probs"]
    for perm in itertools.permutations(range(2)):
        sizes = best["cls"][list(perm)]
        if abs(sizes[0] - STOUFFER_TOBY_CLASS_SIZES[0]) < 0.01:
            break
    np.testing.assert_allclose(sizes, STOUFFER_TOBY_CLASS_SIZES, atol=1.5e-3)
    for j, it in enumerate(STOUFFER_TOBY_ITEMS):
        np.testing.assert_allclose(best[it][list(perm), 0], [STOUFFER_TOBY_P_PLUS[0][j], STOUFFER_TOBY_P_PLUS[1][j]],
                                   atol=1.5e-3)


def test_batched_map_with_l2_equals_separate_fits(st2):
    # The prior (pseudo-counts) and the L2 penalty enter the batched head as in the single
    # start: MAP + L2 fits side by side end where the separate ones do.
    net, data, _, starts = st2
    pc = {n: np.full(net.cpt_shape(n), 1.5) for n in net.free_names}
    fitter = Fitter(net, data, settings=FitSettings(l2=0.3), pseudo_counts=pc)
    rb, fb = run_starts(fitter, starts)
    rs, fs = run_starts(fitter, starts, batched=False)
    for a, b, fa, fb_ in zip(rb, rs, fb, fs):
        assert a.converged and b.converged and a.value == pytest.approx(b.value, rel=1e-11)
        assert fa["log_prior"] != 0 and fa["penalty"] > 0
        for name in net.free_names:
            np.testing.assert_allclose(fa["probs"][name], fb_["probs"][name], rtol=0, atol=1e-6)


def test_batched_objective_answers_each_slot_as_the_single_start_code(st2):
    # One round with mixed requests (optimiser points, exact evaluations, an empty slot): each
    # answer equals the single-start code's (Fitter.objective_fg, Likelihood.expected_counts).
    # The optimiser's points and gradients are flat vectors (fitter.layout).
    net, data, fitter, starts = st2
    lay = fitter.layout
    obj = BatchedObjective(fitter, 4)
    rng = np.random.default_rng(5)
    probs = [random_start(net, rng) for _ in range(3)]
    scale = rng.uniform(0.5, 2.0, lay.size)
    z0 = lay.flatten(logits_from_probs(net, probs[0])) / scale
    z2 = lay.flatten(logits_from_probs(net, probs[2])) / scale
    lc1 = {k: np.log(probs[1][k]) for k in net.free_names}
    out = obj({0: ("fg", z0, scale), 1: ("counts", lc1), 3: ("fg", z2, scale)})
    assert sorted(out) == [0, 1, 3]
    pseudo = jax.numpy.asarray(fitter.pseudo_flat)
    l2, n = jax.numpy.asarray(0.0), jax.numpy.asarray(fitter.n_total)
    for slot, z in ((0, z0), (3, z2)):
        f_ref, g_ref = fitter.objective_fg(z, scale, pseudo, l2, n)
        assert out[slot][0] == pytest.approx(f_ref, rel=1e-13)
        assert out[slot][1].shape == (lay.size,)
        np.testing.assert_allclose(out[slot][1], g_ref, rtol=1e-10, atol=1e-13)
    ll_ref, counts_ref = fitter.lik.expected_counts(probs[1])
    assert out[1][0] == pytest.approx(ll_ref, rel=1e-13)
    assert out[1][0] == pytest.approx(lcm_loglik(probs[1], 2), rel=1e-12)  # closed form
    for name in net.names:
        np.testing.assert_allclose(out[1][1][name], counts_ref[name], rtol=1e-11, atol=1e-12)
    # a round with one request left goes to the single-start programs: the same answers
    alone = obj({2: ("counts", lc1)})
    assert obj.single_calls == 1 and alone[2][0] == pytest.approx(ll_ref, rel=1e-13)


def test_batched_lbfgs_memories_equal_separate_optax_updates(st2):
    # Two starts' L-BFGS memories kept side by side (one with a fresh memory half-way, as at a
    # new phase) give the directions of optax.scale_by_lbfgs run separately for each.
    import optax

    from adfit.restarts import BatchedDirections

    # The optimiser's vectors are flat (fitter.layout).
    net, data, fitter, starts = st2
    rng = np.random.default_rng(11)
    memory = fitter.settings.memory
    opt = optax.scale_by_lbfgs(memory_size=memory)
    flat = [fitter.layout.flatten(s) for s in starts]
    dirs = BatchedDirections(3, memory, flat[0])
    ref_state = {0: opt.init(flat[0]), 2: opt.init(flat[1])}
    handle = dict(ref_state)
    z = {0: flat[0], 2: flat[1]}
    for step in range(6):
        if step == 3:  # slot 2 starts a new phase
            ref_state[2] = handle[2] = opt.init(z[2])
        g = {i: rng.standard_normal(z[i].shape) for i in z}
        out = dirs({i: ("dir", memory, g[i], handle[i], z[i]) for i in z})
        for i in z:
            d_ref, ref_state[i] = opt.update(g[i], ref_state[i], z[i])
            np.testing.assert_allclose(out[i][0], np.asarray(d_ref), rtol=1e-12, atol=1e-14)
            handle[i] = out[i][1]
            z[i] = z[i] - 0.1 * np.asarray(d_ref)


def test_an_error_in_one_start_is_raised_and_no_thread_is_left(st2):
    net, data, fitter, starts = st2
    before = threading.active_count()

    def progress(start, it, obj, gn):
        if start == 2 and it == 3:
            raise RuntimeError("stop here")

    with pytest.raises(RuntimeError, match="stop here"):
        run_starts(fitter, starts, progress=progress)
    assert threading.active_count() == before


# ============================================================================ several optima
def test_fit_lists_several_optima_and_keeps_the_best(st3, st3_fit):
    net, _, _, runs, finals = st3
    res, caught = st3_fit
    sec = res.extras["restarts"]
    opt = sec["optima"]
    objectives = [r["objective"] for r in sec["starts"]]
    # more than one optimum, at objective levels more than 0.1 apart
    assert len(opt) >= 2 and opt[0]["objective"] - min(o["objective"] for o in opt) > 0.1
    # the best is kept: the result is the highest start, its optimum is listed first
    assert res.objective_value == pytest.approx(max(objectives), rel=1e-13)
    assert opt[0]["objective"] == pytest.approx(res.objective_value, rel=1e-13)
    assert res.extras["best_start"] in opt[0]["starts"]
    assert all(o["objective"] <= opt[0]["objective"] for o in opt)
    # the kept CPTs' log-likelihood is the closed form's (numpy, sum over the classes)
    assert res.log_likelihood == pytest.approx(lcm_loglik(res.probs, 3), rel=1e-12)
    # every start is in exactly one optimum; counts add up
    assert sorted(s for o in opt for s in o["starts"]) == list(range(ST3_STARTS))
    for o in opt:
        assert o["count"] == len(o["starts"]) and all(sec["starts"][s]["optimum"] == o["optimum"] for s in o["starts"])
    # fit() ran the same starts as the fixture's batched run
    np.testing.assert_allclose(sorted(objectives), sorted(r.value for r in runs), rtol=1e-9)
    # the best was reached by two starts: no warning about local optima
    assert sec["starts_at_best_objective"] == 2
    assert not [w for w in caught if issubclass(w.category, LocalOptimaWarning)]
    # JSON-ready, and read back
    doc = json.loads(json.dumps(res.to_dict()))
    back = result_from_dict(doc)
    assert [o["objective"] for o in back.extras["restarts"]["optima"]] == pytest.approx([o["objective"] for o in opt])


def test_a_lower_optimum_is_a_local_maximum_for_the_em_reference(st3):
    # The independent EM reference (adfit.em, its own inference), started from a perturbation of
    # a lower optimum's CPTs, climbs back to that optimum and not to the best: it is a separate
    # local maximum, not a point where the optimiser stopped short.
    net, _, data, runs, finals = st3
    tol = 1e-6 * 504
    summary = summarise_optima(net, finals, gtol_abs=1e-9 * data.n_rows, ptol=1e-8)
    best = summary["optima"][0]["objective"]
    rng = np.random.default_rng(0)
    confirmed = 0
    for o in summary["optima"][1:]:
        if not o["stationary"] or best - o["objective"] < 0.1:
            continue
        p = finals[o["best_start"]]["probs"]
        q = {}
        for name in net.free_names:
            e = np.log(p[name]) + 0.05 * rng.standard_normal(p[name].shape)
            e = np.exp(e - e.max(axis=-1, keepdims=True))
            q[name] = e / e.sum(axis=-1, keepdims=True)
        em = em_fit(net, data, init=q, max_iter=20000)
        assert em.converged
        if abs(em.objective_value - o["objective"]) <= tol:
            confirmed += 1
            break
    assert confirmed == 1


def test_summary_matches_relabelled_states_and_separates_other_points(st2):
    # Three end points at Goodman's optimum: as found, with the classes swapped (the same
    # optimum) and with one P(+ | class) moved (another point); |Δθ| against a numpy search
    # over both class permutations.
    net, data, fitter, starts = st2
    rb, fb = run_starts(fitter, starts)
    p = fb[0]["probs"]
    swapped = {name: arr[::-1].copy() for name, arr in p.items()}  # class axis first in every table
    moved = {name: arr.copy() for name, arr in p.items()}
    moved["item4"][0] = [0.5, 0.5]
    finals = [fitter.evaluate(logits_from_probs(net, q)) for q in (p, swapped, moved)]
    s = summarise_optima(net, finals, gtol_abs=1e-9 * data.n_rows, ptol=1e-8)
    assert [o["count"] for o in s["optima"]] == [2, 1] and s["start_optimum"] == [0, 0, 1]
    assert s["optima"][0]["stationary"] and not s["optima"][1]["stationary"]
    assert not s["optima"][1]["same_objective_as_best"]
    brute = min(max(float(np.abs(moved[n][list(perm)] - p[n]).max()) for n in net.free_names)
                for perm in itertools.permutations(range(2)))
    assert s["optima"][1]["max_abs_delta_theta"] == pytest.approx(brute, abs=1e-12)
    assert s["optima"][1]["largest_delta_at"]["node"] == "item4"


def test_local_optima_message_rule():
    def summary(counts_at_best, n_starts, n_opt=2):
        opt = [{"objective": -10.0, "same_objective_as_best": True}] + [{"objective": -11.0}] * (n_opt - 1)
        return {"n_starts": n_starts, "optima": opt, "starts_at_best_objective": counts_at_best, "n_failed": 0}

    assert local_optima_message(summary(1, 1, 1)) is None          # a single start: nothing to compare
    assert local_optima_message(summary(2, 3)) is None             # two starts agree on the best
    msg = local_optima_message(summary(1, 3))
    assert "only 1 of 3 starts" in msg and "1 other optimum" in msg


# ============================================================================ command line
def test_cli_fit_restarts_prints_the_optima(tmp_path, st3):
    from typer.testing import CliRunner

    from adfit.cli import app

    net, df, _, runs, _ = st3
    csv = tmp_path / "st.csv"
    df.to_csv(csv, index=False)
    toml = tmp_path / "st3.toml"
    toml.write_text('[nodes.cls]\nstates = ["k1", "k2", "k3"]\nlatent = true\n'
                    + "".join(f'[nodes.item{j}]\nstates = ["+", "-"]\nparents = ["cls"]\n' for j in range(1, 5)))
    out = tmp_path / "fit.json"
    r = CliRunner().invoke(app, ["fit", str(toml), str(csv), "--count-column", "count", "--out", str(out),
                                 "--restarts", str(ST3_STARTS), "--seed", str(ST3_SEED), "--verbose"])
    assert r.exit_code == 0, r.output
    doc = json.loads(out.read_text())
    opt = doc["restarts"]["optima"]
    assert f"{len(opt)} distinct optima" in r.output
    for o in opt:
        assert f"{o['objective']:14,.2f}" in r.output  # objectives to 2 decimals, as everywhere in the summary
    assert "only 1 of" not in r.output  # two starts reached the best: no warning
    assert max(x.value for x in runs) == pytest.approx(doc["objective_value"], rel=1e-9)


# ============================================================================ honest summaries
def test_distinct_optima_exclude_starts_that_did_not_converge(st2):
    # End points built by hand at Goodman's two-class optimum (Goodman 1974, Stouffer-Toby; the
    # batched starts reach it): the optimum as found, the classes swapped (the same optimum), and
    # one P(+ | class) moved to 1/2 (not a maximum). Whether a start converged is the caller's
    # word (its stopping rule); a start that did not is not an optimum.
    net, data, fitter, starts = st2
    rb, fb = run_starts(fitter, starts)
    p = fb[0]["probs"]
    swapped = {name: arr[::-1].copy() for name, arr in p.items()}
    moved = {name: arr.copy() for name, arr in p.items()}
    moved["item4"][0] = [0.5, 0.5]
    finals = [fitter.evaluate(logits_from_probs(net, q)) for q in (p, moved, swapped)]
    kw = dict(gtol_abs=1e-9 * data.n_rows, ptol=1e-8)
    everything = summarise_optima(net, finals, **kw)  # no convergence given: every end point counts
    assert len(everything["optima"]) == 2 and everything["starts_at_best_objective"] == 2
    s = summarise_optima(net, finals, converged=[True, False, True], **kw)
    assert len(s["optima"]) == 1 and s["optima"][0]["starts"] == [0, 2]
    assert s["start_optimum"] == [0, None, 0] and s["n_converged"] == 2
    assert [u["start"] for u in s["not_converged"]] == [1] and not s["not_converged"][0]["above_best"]
    assert s["starts_at_best_objective"] == 2 and local_optima_message(s) is None
    # the tolerance on "the best objective": 1e-6 x max(1, |F|) (module docstring)
    best = float(finals[0]["objective"])
    assert s["best_objective"] == pytest.approx(best, rel=1e-13)
    assert s["best_objective_tolerance"] == pytest.approx(1e-6 * abs(best), rel=1e-12)
    # only one converged start at the best (the other stopped short): the warning is due, and
    # says how many did not converge
    s = summarise_optima(net, finals, converged=[True, False, False], **kw)
    assert s["starts_at_best_objective"] == 1 and s["n_converged"] == 1
    msg = local_optima_message(s)
    assert msg is not None and "only 1 of 3 starts" in msg and "2 did not converge" in msg
    # the optimum itself unconverged, the moved point converged: the unconverged start ended
    # above the best converged objective, and the kept start is not an optimum
    s = summarise_optima(net, finals, converged=[False, True, False], best=0, **kw)
    assert [o["starts"] for o in s["optima"]] == [[1]] and s["kept_start_is_optimum"] is False
    assert all(u["above_best"] for u in s["not_converged"])
    assert "stopped above it" in local_optima_message(s)
    # objectives within the tolerance of the best count as reaching it; beyond it they do not
    near = [dict(finals[0], objective=best - 0.4e-6 * abs(best)),
            dict(finals[0], objective=best - 3e-6 * abs(best)), finals[0]]
    s = summarise_optima(net, near, converged=[True, True, True], **kw)
    assert s["starts_at_best_objective"] == 2 and len(s["optima"]) == 2
    # none converged: no optimum, and the warning says so
    s = summarise_optima(net, finals, converged=[False, False, False], **kw)
    assert s["optima"] == [] and s["starts_at_best_objective"] == 0
    assert "none of the 3 starts converged" in local_optima_message(s)

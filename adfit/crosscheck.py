"""EM cross-check of a gradient fit, and its verdict.

Two EM runs (:mod:`adfit.em`, plain numpy, its own inference) are set beside the fit:

* **EM from the fit's answer**: if the fit stopped at a maximum, EM does not move from it (its
  CPTs stay within ``theta_atol`` and its objective does not rise by more than the tolerance);
* **EM from its own start** (a seeded random start): an independent search for the optimum.

Both runs take EM steps with squared extrapolation between them (SQUAREM, :func:`adfit.em.em_fit`
with ``accelerate``; plain EM steps for structured CPTs): an extrapolated point is kept only if
its objective is at least that of the EM step before it, so the fixed points, the stopping rule
and the monotone objective are EM's, at several times fewer E-steps where EM crawls;
``max_iter`` caps each run's E-steps. Such runs report no rate of convergence (null).

For each of the three points the log-likelihood, the objective and the gradient norm are
reported; the gradient norm is taken by the JAX core (:func:`adfit.likelihood.score`) at every
point, and EM's own Fisher-identity residual is given beside it (the two must match).

Latent nodes are identified only up to a relabelling of their states: before comparing, EM's
states of each latent node are matched to the fit's by the permutation that best aligns the CPTs
(least total |Δθ| over every table in which the node appears; an assignment problem per node,
repeated over the latent nodes until no permutation changes). A latent node that appears in a
fixed CPT is not relabelled (its labels are pinned by that table).

CPT rows whose parent configuration has expected count 0 (not informed by the data) are left
out of ``max |Δθ|`` and listed.

Structured CPTs (:mod:`adfit.emforms`: noisy-OR, noisy-MAX, logistic, ties, impossible cells) are
compared on their implied tables as above and, under ``"parameters"``, on the form's parameters
(the fit's as recorded in its result, else read off its tables): the largest difference between
the fit's and each EM run's leak/strength (probabilities) or logistic coefficients (log-odds),
leaving out parameters that only rows not informed by the data use. Differences of noisy-OR /
noisy-MAX parameters count in the verdict with ``theta_atol`` (a ridge shows there even when the
implied tables agree); logistic coefficients are reported only (log-odds are unbounded; where they
are identified, tables within ``theta_atol`` bound them). The gradient norms are then taken in the
forms' own coordinates. Monotone nodes (``increasing_with``) are not checked by EM: the check is
refused (:func:`check_em_coverage`).

Verdicts (``"verdict"``, in the order they are tested; the first that applies is given, and
``"runs_not_converged"`` lists every run whose stopping rule did not hold). The tolerance on the
objective is ``tol_obj = ll_rtol · max(1, |objective of the fit|)`` (``ll_rtol`` = 1e-6 by
default); EM *climbs* from the fit's answer when its objective ends more than ``tol_obj`` above
the fit's.

* ``"fit-not-converged"``: the fit itself says that its stopping rule did not hold (the detail
  adds whether EM from its answer climbed, and by how much);
* ``"fit-not-at-maximum"``: the fit says it converged, but EM started from its answer climbed by
  more than ``tol_obj``: the fit stopped short of a maximum (for example on a boundary cell
  whose logit gradient is tiny while the likelihood still rises). The only verdict besides the
  first that blames the fit;
* ``"em-from-fit-not-converged"``: EM started from the fit's answer hit its iteration cap
  (``max_iter``) without climbing by more than ``tol_obj``: nothing speaks against the fit, but
  the check is incomplete (raise ``max_iter``, ``fit --em-max-iter``);
* ``"em-own-start-not-converged"``: EM from the fit's answer agreed (it converged without
  climbing) but EM from its own random start hit its iteration cap, so the search for another
  optimum is incomplete: the fit is at a stationary point; raise ``max_iter`` to finish the check;
* ``"disagree-different-optima"``: every run converged, the objectives of the fit and of EM from
  its own start differ by more than ``tol_obj`` (the likelihood is multimodal); ``"higher"``
  says which is higher (``"em"``: the fit is at a lower local maximum, try more starts;
  ``"fit"``: EM's own start found a lower one);
* ``"disagree-different-parameters"``: every run converged to the same objective within
  ``tol_obj``, but some informed CPT entry differs by more than ``theta_atol`` after relabelling:
  a flat ridge (parameters the data do not identify) or equally high optima;
* ``"agree"``: every run converged; the fit and EM from its own start reach the same optimum
  (objectives within ``tol_obj``, every informed CPT entry within ``theta_atol``).

Results written before these verdicts were named may carry ``"not-converged"`` (any run that
did not converge, or a climb from the fit's answer); :data:`LEGACY_VERDICTS` keeps its meaning.
"""

from __future__ import annotations

import dataclasses
import math
from typing import Any, Iterable, Mapping

import numpy as np
from scipy.optimize import linear_sum_assignment

from . import emforms as _forms
from .data import CodedData, load_data
from .em import EMResult, em_fit
from .errors import OptionError, option
from .network import Network

__all__ = ["em_check", "attach_em_check", "format_em_check", "align_latent_states", "VERDICTS",
           "VERDICT_MEANING", "LEGACY_VERDICTS", "LL_RTOL", "THETA_ATOL", "EM_MAX_ITER", "check_em_max_iter",
           "check_em_coverage"]

#: every verdict, in the order they are tested (module docstring)
VERDICTS = ("fit-not-converged", "fit-not-at-maximum", "em-from-fit-not-converged", "em-own-start-not-converged",
            "disagree-different-optima", "disagree-different-parameters", "agree")
#: one sentence per verdict (terminal summary, report, demo)
VERDICT_MEANING = {
    "fit-not-converged": "the fit's stopping rule did not hold: its answer may not be a maximum",
    "fit-not-at-maximum": "the fit said it converged, but EM started from its answer climbed above it: "
                          "the fit stopped short of a maximum",
    "em-from-fit-not-converged": "EM started from the fit's answer hit its iteration cap without climbing: "
                                 "nothing speaks against the fit, but the check is incomplete (raise the EM iteration cap)",
    "em-own-start-not-converged": "EM from the fit's answer agreed (the fit is at a stationary point), but EM from "
                                  "its own start hit its iteration cap: the search for another optimum is incomplete "
                                  "(raise the EM iteration cap)",
    "disagree-different-optima": "every run converged, to different objective values: the likelihood has several "
                                 "maxima (try more starts)",
    "disagree-different-parameters": "same objective, different CPTs: some parameters are not pinned down by the data "
                                     "(a flat ridge), or there are equally high optima",
    "agree": "the fit and an independent EM run from its own start reach the same optimum",
}
#: verdicts of results written by earlier versions, with their meaning
LEGACY_VERDICTS = {
    "not-converged": "a run did not meet its stopping rule, or EM from the fit's answer climbed above it "
                     "(written by an earlier version, which did not say which run)",
}
#: default iteration cap of both EM runs (``fit --em-max-iter``)
EM_MAX_ITER = 5000
#: default tolerance on the objective: relative to max(1, |objective|)
LL_RTOL = 1e-6
#: default tolerance on CPT entries (probabilities)
THETA_ATOL = 1e-3


def check_em_max_iter(value: Any) -> int:
    """The iteration cap of the EM runs (``fit --em-max-iter``), validated: an integer >= 1."""
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
        raise OptionError(f"the EM cross-check's iteration cap must be an integer >= 1, got {value!r}; "
                          f"give {option('em_max_iter', str(EM_MAX_ITER))} (the default) or another count >= 1")
    return int(value)


def check_em_coverage(network: Network) -> None:
    """Refuse (OptionError, one line) a network the EM cross-check cannot cover: monotone nodes
    (``increasing_with``), whose M-step under stochastic-order constraints has no closed form
    (docs/method.md, "The EM reference")."""
    for n in network.nodes:
        if n.fixed is None and n.increasing_with:
            raise OptionError(f"nodes.{n.name}.increasing_with: the EM cross-check does not cover monotone nodes "
                              f"(EM has no closed-form M-step under stochastic-order constraints; docs/method.md); "
                              f"run the fit without the EM check")
    refusal = network.unsupported_structure(_forms.SUPPORTED, what="the EM cross-check")
    if refusal is not None:
        raise OptionError(refusal)


# ------------------------------------------------------------------------------- relabelling
def _permute(network: Network, probs: Mapping[str, np.ndarray], perms: Mapping[str, np.ndarray]) -> dict[str, np.ndarray]:
    """Relabel latent states: state ``a`` of node ``L`` becomes state ``perms[L][a]``."""
    out: dict[str, np.ndarray] = {}
    for name in network.names:
        arr = np.asarray(probs[name])
        fam = network.node(name).parents + (name,)
        for axis, u in enumerate(fam):
            if u in perms:
                inv = np.argsort(perms[u])  # new index b takes old index inv[b]
                arr = np.take(arr, inv, axis=axis)
        out[name] = arr
    return out


def align_latent_states(network: Network, probs: Mapping[str, np.ndarray], reference: Mapping[str, np.ndarray],
                        *, max_passes: int = 10) -> dict[str, np.ndarray]:
    """Permutations of the latent nodes' states that best align ``probs`` with ``reference``.

    Returns ``{latent name: perm}`` with ``perm[a]`` the reference state matched to state ``a``
    of ``probs``; apply with :func:`relabel`. Latent nodes that appear in a fixed CPT keep the
    identity.
    """
    latent = []
    for name in network.latent_names:
        tables = [m for m in network.names if m == name or name in network.node(m).parents]
        if any(network.node(m).fixed is not None for m in tables):
            continue
        latent.append((name, tables))
    perms = {name: np.arange(network.node(name).card) for name, _ in latent}
    for _ in range(max_passes):
        changed = False
        for name, tables in latent:
            others = {k: v for k, v in perms.items() if k != name}
            cur = _permute(network, probs, others)
            k = network.node(name).card
            cost = np.zeros((k, k))
            for m in tables:
                axis = (network.node(m).parents + (m,)).index(name)
                a_em = np.moveaxis(cur[m], axis, 0).reshape(k, -1)
                a_ref = np.moveaxis(np.asarray(reference[m]), axis, 0).reshape(k, -1)
                cost += np.abs(a_em[:, None, :] - a_ref[None, :, :]).sum(axis=2)
            _, cols = linear_sum_assignment(cost)
            if not np.array_equal(cols, perms[name]):
                perms[name] = cols
                changed = True
        if not changed:
            break
    return perms


def relabel(network: Network, probs: Mapping[str, np.ndarray], perms: Mapping[str, np.ndarray]) -> dict[str, np.ndarray]:
    """Apply the permutations of :func:`align_latent_states` to ``probs``."""
    return _permute(network, probs, perms)


# ------------------------------------------------------------------------------- comparison
def _delta(network: Network, a: Mapping[str, np.ndarray], b: Mapping[str, np.ndarray],
           skip: Mapping[str, set[int]]) -> tuple[float, dict[str, Any] | None]:
    worst, where = 0.0, None
    for name in network.free_names:
        node = network.node(name)
        d = np.abs(np.asarray(a[name]) - np.asarray(b[name])).reshape(-1, node.card)
        for i in skip.get(name, ()):
            d[i] = 0.0
        if d.size and d.max() > worst:
            i, j = np.unravel_index(int(np.argmax(d)), d.shape)
            worst = float(d[i, j])
            labels = network.parent_config_labels(name)[i]
            where = {"node": name, "row": int(i), "parents": dict(zip(node.parents, labels)),
                     "state": node.states[j]}
    return worst, where


def _score(network: Network, data: CodedData, probs: Mapping[str, np.ndarray],
           pseudo: Mapping[str, np.ndarray] | None, lik: Any = None) -> dict[str, float]:
    """Log-likelihood and gradient norm by the JAX core (only to measure, not to compute EM).

    With structured CPTs the gradient is taken in each form's own coordinates (those of
    :func:`adfit.emforms.gradient_norm`), from the JAX core's expected counts and the form's
    parameters read off the tables."""
    from .likelihood import score

    tables = {k: np.asarray(v, dtype=np.float64) for k, v in probs.items()}
    if not network.is_structured:
        s = score(network, data, tables, pseudo_counts=pseudo, likelihood=lik)
        return {"log_likelihood": float(s["log_likelihood"]), "gradient_norm": float(s["gradient_norm"])}
    ll, counts = lik.expected_counts(tables)
    params = {g.source: _forms.from_table(g, tables[g.source]) for g in _forms.groups_of(network)}
    return {"log_likelihood": float(ll), "gradient_norm": _forms.gradient_norm(network, counts, params, pseudo)}


def _fit_parameters(result: Any) -> dict[str, Any]:
    """The structured nodes' parameters a fit recorded (result layout), those EM can read."""
    net: Network = result.network
    nodes = (getattr(result, "extras", None) or {}).get("nodes") or {}
    out: dict[str, Any] = {}
    for g in _forms.groups_of(net):
        if g.kind == "table":
            continue
        doc = (nodes.get(g.source) or {}).get("parameters") if isinstance(nodes.get(g.source), Mapping) else None
        if doc is None:
            continue
        try:
            _forms.from_json(net, g, doc)
        except OptionError:
            continue
        out[g.source] = doc
    return out


def _leaves(doc: Any, path: str = "") -> list[tuple[str, float]]:
    if isinstance(doc, Mapping):
        return [x for k, v in doc.items() for x in _leaves(v, f"{path}.{k}" if path else str(k))]
    if isinstance(doc, (list, tuple)):
        return [x for i, v in enumerate(doc) for x in _leaves(v, f"{path}[{i}]")]
    return [(path, float(doc))]


def _compare_parameters(net: Network, fit_probs: Mapping[str, np.ndarray], fit_params: Mapping[str, Any],
                        em_from: EMResult, em_own: EMResult, perms: Mapping[str, np.ndarray],
                        skip: Mapping[str, set[int]]) -> dict[str, Any]:
    """Per structured node: the fit's, and EM's parameters and their largest differences.

    Parameters every row of which is not informed by the data are left out (as the rows are
    from ``max |Δθ|``). EM's own start is compared only when no latent state of the family was
    relabelled (its parameters would need the relabelling through the form)."""
    out: dict[str, Any] = {}
    for g in _forms.groups_of(net):
        if g.kind == "table":
            continue
        fit_doc = fit_params.get(g.source)
        if fit_doc is None:
            fit_doc = _forms.to_json(net, g, _forms.from_table(g, fit_probs[g.source]))
        node = net.node(g.source)
        rows = skip.get(g.source, set())
        ignored: set[str] = set()
        if rows:
            if len(rows) >= g.n_rows:
                ignored |= {"leak", "intercept"}
            for i, p in enumerate(node.parents):
                for s_i, label in enumerate(net.node(p).states):
                    have = set(np.flatnonzero(g.parent_states[i] == s_i).tolist())
                    if have and have <= rows:
                        ignored |= {f"strength.{p}.{label}", f"coefficients.{p}.{label}"}

        def delta(other: Any) -> tuple[float, str | None]:
            a, b = dict(_leaves(fit_doc)), dict(_leaves(other))
            worst, where = 0.0, None
            for k, v in a.items():
                if k not in b or any(k == x or k.startswith(x + ".") or k.startswith(x + "[") for x in ignored):
                    continue
                d = abs(v - b[k])
                if d > worst:
                    worst, where = d, k
            return worst, where

        d_from, at_from = delta(em_from.parameters[g.source])
        family = node.parents + (g.source,)
        moved = [u for u in family if u in perms and not np.array_equal(perms[u], np.arange(len(perms[u])))]
        entry: dict[str, Any] = {
            "cpd": g.kind, "scale": "log-odds" if g.kind == "logistic" else "probability",
            "in_verdict": g.kind != "logistic",
            "fit": fit_doc, "em_own_start": em_own.parameters[g.source],
            "em_from_fit_max_abs_delta": d_from, "em_from_fit_largest_delta_at": at_from,
            "not_informed": sorted(ignored),
        }
        if moved:
            entry.update(max_abs_delta=None, largest_delta_at=None,
                         note=f"not compared: the states of latent {', '.join(moved)} were relabelled")
        else:
            d_own, at_own = delta(em_own.parameters[g.source])
            entry.update(max_abs_delta=d_own, largest_delta_at=at_own)
        out[g.source] = entry
    return out


def _em_side(em: EMResult, jax_score: Mapping[str, float], delta: float, where: Any) -> dict[str, Any]:
    return {
        "log_likelihood": em.log_likelihood,
        "objective_value": em.objective_value,
        "gradient_norm": jax_score["gradient_norm"],
        "em_gradient_norm": em.gradient_norm,
        # EM's CPTs scored again by the gradient fit's own inference (an independent recomputation)
        "log_likelihood_recomputed": jax_score["log_likelihood"],
        "iterations": em.iterations,
        "converged": em.converged,
        "rate": None if math.isnan(em.rate) else em.rate,
        "max_abs_delta_theta": delta,
        "largest_delta_at": where,
    }


def _pseudo_for(result: Any, pseudo_counts: Mapping[str, np.ndarray] | None) -> dict[str, np.ndarray] | None:
    from .priors import result_pseudo_counts

    return result_pseudo_counts(result, pseudo_counts, what="the EM cross-check")


def em_check(result: Any, data: Any, *, pseudo_counts: Mapping[str, np.ndarray] | None = None, seed: int = 0,
             tol: float = 1e-10, gtol: float = 1e-9, max_iter: int = EM_MAX_ITER, ll_rtol: float = LL_RTOL,
             theta_atol: float = THETA_ATOL, missing: Iterable[str] | None = None,
             count_column: str | None = None, ignore_columns: Iterable[str] = (),
             likelihood: Any = None, accelerate: bool = True) -> dict[str, Any]:
    """Cross-check a fit (an :class:`adfit.result.FitResult`) against EM; JSON-ready dict.

    Args:
        result: the gradient fit (its ``network``, ``probs``, ``objective``, ``converged``).
        data: the data it was fitted to (anything :func:`adfit.data.load_data` accepts).
        pseudo_counts: the prior's pseudo-counts of a MAP fit (default: rebuilt from the prior
            recorded in ``result.extras["prior"]``; none for an MLE fit).
        seed: seed of EM's own random start.
        tol, gtol, max_iter: EM's stopping rule (:func:`adfit.em.em_fit`); ``max_iter`` caps
            each of the two EM runs (``fit --em-max-iter``).
        ll_rtol, theta_atol: the tolerances of the verdict (module docstring).
        accelerate: run both EM runs with squared extrapolation (:func:`adfit.em.em_fit`,
            ``accelerate``; default True): EM's fixed points and stopping rule, the objective
            never falls, ``max_iter`` caps the E-steps; False: plain EM steps.
        likelihood: a :class:`adfit.likelihood.Likelihood` of this network and data (the same
            :class:`adfit.CodedData` object) to reuse for the three measurements by the JAX core
            (by default one is built here).

    Raises:
        OptionError: the fit used an L2 penalty (EM has no M-step for it), or a MAP fit without
            a recoverable prior.
    """
    net: Network = result.network
    l2 = float((getattr(result, "settings", None) or {}).get("l2", 0.0) or 0.0)
    if l2 > 0 or getattr(result, "penalty", 0.0):
        raise OptionError(f"the EM cross-check covers the likelihood and Dirichlet priors, not the L2 penalty "
                          f"(l2 = {l2:g}); refit with --l2 0 to cross-check")
    if not (ll_rtol >= 0 and theta_atol >= 0):
        raise OptionError(f"cross-check tolerances must be >= 0 (ll_rtol={ll_rtol}, theta_atol={theta_atol})")
    check_em_max_iter(max_iter)
    check_em_coverage(net)
    coded = load_data(net, data, missing=missing, count_column=count_column, ignore_columns=ignore_columns)
    pseudo = _pseudo_for(result, pseudo_counts)
    fit_probs = {k: np.asarray(v, dtype=np.float64) for k, v in result.probs.items()}
    fit_params = _fit_parameters(result) if net.is_structured else {}

    # both runs accelerated (SQUAREM; plain EM for structured CPTs): the same fixed points and
    # stopping rule, the objective still never falls, several times fewer E-steps where EM crawls
    em_fit_start = em_fit(net, coded, init=fit_probs, init_params=fit_params or None, pseudo_counts=pseudo,
                          tol=tol, gtol=gtol, max_iter=max_iter, accelerate=accelerate)
    em_own = em_fit(net, coded, init=None, seed=seed, pseudo_counts=pseudo, tol=tol, gtol=gtol, max_iter=max_iter,
                    accelerate=accelerate)

    perms = align_latent_states(net, em_own.probs, fit_probs)
    own_aligned = relabel(net, em_own.probs, perms)
    skip: dict[str, set[int]] = {}
    for em in (em_fit_start, em_own):
        for name, rows in em.uninformed.items():
            skip.setdefault(name, set()).update(rows)
    d_from_fit, w_from_fit = _delta(net, em_fit_start.probs, fit_probs, skip)
    d_own, w_own = _delta(net, own_aligned, fit_probs, skip)

    from .likelihood import _prepared

    lik = _prepared(likelihood, net, coded, "em_check")  # one plan for the three measurements
    s_fit = _score(net, coded, fit_probs, pseudo, lik)
    s_ff = _score(net, coded, em_fit_start.probs, pseudo, lik)
    s_own = _score(net, coded, em_own.probs, pseudo, lik)
    params_cmp = (_compare_parameters(net, fit_probs, fit_params, em_fit_start, em_own, perms, skip)
                  if net.is_structured else {})
    d_par = max((e["max_abs_delta"] for e in params_cmp.values()
                 if e["in_verdict"] and e["max_abs_delta"] is not None), default=0.0)
    lp_fit = float(getattr(result, "log_prior", 0.0) or 0.0)
    obj_fit = float(result.log_likelihood) + lp_fit
    scale = max(1.0, abs(obj_fit))
    tol_obj = ll_rtol * scale

    fit_converged = bool(getattr(result, "converged", False))
    climb = em_fit_start.objective_value - obj_fit
    climbed = climb > tol_obj
    diff = em_own.objective_value - obj_fit
    not_converged = [name for name, ok in (("fit", fit_converged), ("em_from_fit", em_fit_start.converged),
                                           ("em_own_start", em_own.converged)) if not ok]
    cap = f"(cap {max_iter}; raise it with {option('em_max_iter', str(max(2 * max_iter, EM_MAX_ITER)))})"
    higher = None
    if not fit_converged:
        verdict = "fit-not-converged"
        detail = ("the fit did not meet its stopping rule"
                  + (f"; EM from its answer climbed {climb:.3g} above it" if climbed
                     else f"; EM from its answer did not climb above it by more than {tol_obj:.3g}"))
    elif climbed:
        verdict = "fit-not-at-maximum"
        detail = (f"the fit met its stopping rule, but EM from its answer climbed {climb:.3g} above it "
                  f"(more than {tol_obj:.3g}) in {em_fit_start.iterations} iterations: the fit stopped short "
                  f"of a maximum")
    elif not em_fit_start.converged:
        verdict = "em-from-fit-not-converged"
        detail = (f"EM from the fit's answer did not converge in {em_fit_start.iterations} iterations {cap}, "
                  f"climbing only {max(climb, 0.0):.3g} (tolerance {tol_obj:.3g}): nothing speaks against the fit, "
                  f"but the check is incomplete")
    elif not em_own.converged:
        verdict = "em-own-start-not-converged"
        its = f"{em_fit_start.iterations} iteration{'' if em_fit_start.iterations == 1 else 's'}"
        detail = (f"EM from the fit's answer agreed (converged in {its}, climbing "
                  f"{max(climb, 0.0):.3g} <= {tol_obj:.3g}); EM from its own start did not converge in "
                  f"{em_own.iterations} iterations {cap}, so the search for another optimum is incomplete")
    elif abs(diff) > tol_obj:
        verdict = "disagree-different-optima"
        higher = "em" if diff > 0 else "fit"
        detail = (f"both stationary, objectives differ by {abs(diff):.6g}: the likelihood is multimodal; "
                  f"the {'EM optimum' if higher == 'em' else 'fit'} is higher (try more restarts)")
    elif d_own > theta_atol or d_par > theta_atol:
        verdict = "disagree-different-parameters"
        higher = "equal"
        what = (f"CPT entries differ by up to {d_own:.3g}" if d_own > theta_atol else
                f"the implied CPTs agree but form parameters (leak, strengths) differ by up to {d_par:.3g}")
        detail = (f"same objective (they differ by {abs(diff):.3g}, tolerance {tol_obj:.3g}) but {what}: "
                  f"parameters not identified by the data (a flat ridge), or equally high optima")
    else:
        verdict = "agree"
        higher = "equal"
        detail = (f"same optimum: objectives differ by {abs(diff):.3g} (tolerance {tol_obj:.3g}), CPT entries by "
                  f"up to {d_own:.3g} (tolerance {theta_atol:g})")
    others = [f"{_RUN_NAMES[n]} did not converge" for n in not_converged
              if not (n == "fit" and verdict == "fit-not-converged")
              and not (n == "em_from_fit" and verdict == "em-from-fit-not-converged")
              and not (n == "em_own_start" and verdict == "em-own-start-not-converged")]
    if others:
        detail += "; also: " + ", ".join(others)

    perm_out = {name: {net.node(name).states[a]: net.node(name).states[int(b)] for a, b in enumerate(p)}
                for name, p in perms.items()}
    return {
        "verdict": verdict,
        "meaning": VERDICT_MEANING[verdict],
        "detail": detail,
        "higher": higher,
        "runs_not_converged": not_converged,
        "climb_from_fit": climb,
        "objective": "map" if pseudo and any(np.any(c > 0) for c in pseudo.values()) else "mle",
        "tolerances": {"objective_rtol": ll_rtol, "objective_abs": tol_obj, "theta_atol": theta_atol,
                       "em_tol": tol, "em_gtol": gtol, "em_max_iter": max_iter},
        "fit": {"method": getattr(result, "method", ""), "log_likelihood": float(result.log_likelihood),
                "objective_value": obj_fit, "gradient_norm": s_fit["gradient_norm"],
                "reported_gradient_norm": float(getattr(result, "gradient_norm", float("nan"))),
                "converged": fit_converged},
        "em_from_fit": _em_side(em_fit_start, s_ff, d_from_fit, w_from_fit),
        "em_own_start": {**_em_side(em_own, s_own, d_own, w_own), "seed": seed},
        "max_abs_delta_theta": d_own,
        "objective_difference": diff,
        "latent_permutation": perm_out,
        "excluded_rows": {k: sorted(v) for k, v in skip.items()},
        **({"parameters": params_cmp, "max_abs_delta_parameters": d_par} if params_cmp else {}),
    }


_RUN_NAMES = {"fit": "the fit", "em_from_fit": "EM from the fit's answer", "em_own_start": "EM from its own start"}


def attach_em_check(result: Any, data: Any, **kwargs: Any) -> Any:
    """Run :func:`em_check` and return ``result`` with the section ``"em_check"`` added."""
    return result.with_extras(em_check=em_check(result, data, **kwargs))


def format_em_check(check: Mapping[str, Any]) -> str:
    """A few plain lines for the CLI summary."""
    f, a, b = check["fit"], check["em_from_fit"], check["em_own_start"]

    def g(x: Any) -> str:
        return "n/a" if x is None else f"{x:.3e}"

    meaning = check.get("meaning") or VERDICT_MEANING.get(check["verdict"]) or LEGACY_VERDICTS.get(check["verdict"], "")

    def yn(x: Any) -> str:
        return "yes" if x else "no"

    lines = [
        f"EM check: {check['verdict']}: {meaning}",
        f"  {check['detail']}",
        f"  {'':18s} {'objective':>14s} {'gradient norm':>14s} {'max |dtheta|':>13s} {'iterations':>10s} {'converged':>9s}",
        f"  {'fit (' + str(f['method']) + ')':18s} {f['objective_value']:14,.2f} {g(f['gradient_norm']):>14s} "
        f"{'':>13s} {'':>10s} {yn(f.get('converged')):>9s}",
        f"  {'EM from the fit':18s} {a['objective_value']:14,.2f} {g(a['gradient_norm']):>14s} "
        f"{g(a['max_abs_delta_theta']):>13s} {a['iterations']:>10d} {yn(a.get('converged')):>9s}",
        f"  {'EM own start':18s} {b['objective_value']:14,.2f} {g(b['gradient_norm']):>14s} "
        f"{g(b['max_abs_delta_theta']):>13s} {b['iterations']:>10d} {yn(b.get('converged')):>9s}",
    ]
    moved = {k: v for k, v in check["latent_permutation"].items() if any(s != t for s, t in v.items())}
    if moved:
        lines.append("  latent states relabelled (EM -> fit): "
                     + "; ".join(f"{k}: " + ", ".join(f"{s}->{t}" for s, t in v.items()) for k, v in moved.items()))
    for name, e in (check.get("parameters") or {}).items():
        own = e.get("max_abs_delta")
        lines.append(f"  {name} ({e.get('cpd')}) parameters, max |difference| ({e.get('scale')}): EM own start "
                     + (g(own) + (f" at {e.get('largest_delta_at')}" if e.get("largest_delta_at") else "")
                        if own is not None else str(e.get("note", "n/a")))
                     + f"; EM from the fit {g(e.get('em_from_fit_max_abs_delta'))}")
    if check["excluded_rows"]:
        lines.append("  rows not informed by the data, left out of |dtheta|: "
                     + "; ".join(f"{k} rows {', '.join(str(i + 1) for i in v)}" for k, v in check["excluded_rows"].items()))
    return "\n".join(lines)

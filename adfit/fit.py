"""Maximise the marginal likelihood (or the MAP objective) with optax.

Objective (maximised), over the logits ``η`` of the free nodes, ``θ = softmax(η)`` per row::

    F(η) = log L(θ) + Σ c·log θ − λ Σ (η − mean_row η)²

with ``c`` the prior pseudo-counts (a Dirichlet prior with α = c + 1; the mode is taken in
probability space, so no Jacobian of the softmax enters) and ``λ`` the L2 strength.

Conditioning: the curvature of a CPT row in logit space scales with the expected count N(u) of
its parent configuration, which varies by orders of magnitude between rows. The optimiser
works on ``z = η·sqrt(N(u) + c(u) + 1)`` instead (N(u) from the expected counts at the start of
each phase), which makes every row's curvature of order one. After a phase stops, the scaling
is recomputed at the new point and the optimiser restarts, until the stopping rule holds at a
fresh scaling or the iteration budget is spent.

Stopping rule (``converged`` is True only when it held):
    * gradient: the norm of ∂F/∂η (in records; equals the stationarity residual of the expected
      counts, N(x,u) + c − θ·(N(u) + Σc)) is at most ``gtol`` × number of records; or
    * objective: the relative change of F stayed below ``tol`` for 5 iterations in a row and the
      largest per-row residual in probability units, |∂F/∂η| / (N(u) + Σc), is at most
      ``sqrt(tol)``. Cells whose MLE is on the boundary (θ → 0) have logits that run off to
      −∞; the probability-unit residual still goes to 0 there, so the rule stays meaningful.
"""

from __future__ import annotations

import math
import time
import warnings
from dataclasses import dataclass
from typing import Any, Callable, Iterable, Mapping

import jax
import jax.numpy as jnp
import numpy as np
import optax

from .data import HIDDEN, CodedData, load_data
from .errors import ConvergenceWarning, OptionError
from .likelihood import (Likelihood, _loglik_logcpt, _value_and_expected_counts, check_possible,
                         logits_from_probs, probs_from_logits)
from .network import Network
from .result import FitResult

METHODS = ("lbfgs", "adam")


@dataclass(frozen=True)
class FitSettings:
    method: str = "lbfgs"
    tol: float = 1e-10
    gtol: float = 1e-9
    max_iter: int = 1000
    learning_rate: float = 0.05
    memory: int = 20
    l2: float = 0.0

    def validate(self) -> None:
        if self.method not in METHODS:
            raise OptionError(f"--method must be one of {', '.join(METHODS)}, got {self.method!r}")
        if not (self.tol > 0):
            raise OptionError(f"--tol must be > 0, got {self.tol}")
        if not (self.gtol > 0):
            raise OptionError(f"--gtol must be > 0, got {self.gtol}")
        if self.max_iter < 1:
            raise OptionError(f"--max-iter must be >= 1, got {self.max_iter}")
        if not (self.l2 >= 0) or not math.isfinite(self.l2):
            raise OptionError(f"--l2 must be a finite number >= 0, got {self.l2}")
        if not (self.learning_rate > 0):
            raise OptionError(f"--learning-rate must be > 0, got {self.learning_rate}")


# --------------------------------------------------------------------------- objective pieces
def _pseudo(network: Network, pseudo_counts: Mapping[str, np.ndarray] | None) -> dict[str, np.ndarray]:
    out = {}
    for name in network.free_names:
        c = None if pseudo_counts is None else pseudo_counts.get(name)
        out[name] = np.zeros(network.cpt_shape(name)) if c is None else np.asarray(c, dtype=np.float64)
    return out


def log_prior_value(probs: Mapping[str, np.ndarray], pseudo: Mapping[str, np.ndarray]) -> float:
    """Σ c·log θ with 0·log 0 = 0."""
    tot = 0.0
    for name, c in pseudo.items():
        th = np.asarray(probs[name])
        with np.errstate(divide="ignore", invalid="ignore"):
            tot += float(np.sum(np.where(c > 0, c * np.log(th), 0.0)))
    return tot


def penalty_value(logits: Mapping[str, Any], l2: float) -> float:
    if l2 == 0:
        return 0.0
    tot = 0.0
    for eta in logits.values():
        e = np.asarray(eta)
        tot += float(np.sum((e - e.mean(axis=-1, keepdims=True)) ** 2))
    return l2 * tot


def objective_gradient(network: Network, probs: Mapping[str, np.ndarray], counts: Mapping[str, np.ndarray],
                       pseudo: Mapping[str, np.ndarray], logits: Mapping[str, Any] | None, l2: float) -> dict[str, np.ndarray]:
    """∂F/∂η for every free node from the expected counts (Fisher's identity)."""
    g = {}
    for name in network.free_names:
        n_xu = counts[name] + pseudo[name]
        th = np.asarray(probs[name])
        gi = n_xu - th * n_xu.sum(axis=-1, keepdims=True)
        if l2 and logits is not None:
            e = np.asarray(logits[name])
            gi = gi - 2 * l2 * (e - e.mean(axis=-1, keepdims=True))
        g[name] = gi
    return g


def _norm(tree: Mapping[str, np.ndarray]) -> float:
    return math.sqrt(sum(float(np.sum(np.asarray(v) ** 2)) for v in tree.values()))


# --------------------------------------------------------------------------- the fast objective
def _make_neg_objective(network: Network, groups, n_total: float):
    """−F/N as a function of (z, scale, pseudo, codes, weights), with a fast custom gradient.

    The gradient of the log-likelihood part uses the chunk-accumulating scan (expected counts),
    the forward value the cheaper value-only scan.
    """
    free = network.free_names

    @jax.custom_vjp
    def loglik(lc, codes, weights):
        return _loglik_logcpt(network, groups, lc, codes, weights)

    def fwd(lc, codes, weights):
        val, g = _value_and_expected_counts(network, groups, lc, codes, weights)
        return val, g

    def bwd(g, ct):
        return tuple(ct * x for x in g), None, None

    loglik.defvjp(fwd, bwd)

    def neg_obj(z, scale, pseudo, fixed_lc, l2, codes, weights):
        eta = {k: z[k] * scale[k] for k in free}
        lcs = []
        for n in network.nodes:
            lcs.append(jax.nn.log_softmax(eta[n.name], axis=-1) if n.fixed is None else fixed_lc[n.name])
        ll = loglik(tuple(lcs), codes, weights)
        lp = sum(jnp.sum(pseudo[k] * jax.nn.log_softmax(eta[k], axis=-1)) for k in free)
        pen = sum(jnp.sum((eta[k] - jnp.mean(eta[k], axis=-1, keepdims=True)) ** 2) for k in free)
        return -(ll + lp - l2 * pen) / n_total

    return neg_obj


@dataclass
class _Run:
    logits: dict[str, np.ndarray]
    value: float
    history_obj: list[float]
    history_gn: list[float]
    iterations: int
    converged: bool
    stop_reason: str


class Fitter:
    """Holds the compiled objective for one network and data set; runs starts from it."""

    def __init__(self, network: Network, data: CodedData, *, settings: FitSettings,
                 pseudo_counts: Mapping[str, np.ndarray] | None = None, route: str = "auto"):
        settings.validate()
        self.network = network
        self.data = data
        self.settings = settings
        self.lik = Likelihood(network, data, route=route)
        self.pseudo = _pseudo(network, pseudo_counts)
        self.n_total = float(data.n_rows)
        self.free = network.free_names
        with np.errstate(divide="ignore"):
            self.fixed_lc = {n: jnp.asarray(np.log(network.fixed_table(n))) for n in network.fixed_names}
        neg_obj = _make_neg_objective(network, self.lik.plan.groups, self.n_total)
        self._neg_obj = neg_obj
        if settings.method == "lbfgs":
            self.opt = optax.lbfgs(memory_size=settings.memory,
                                   linesearch=optax.scale_by_zoom_linesearch(max_linesearch_steps=40, initial_guess_strategy="one"))
        else:
            self.opt = optax.adam(settings.learning_rate)
        opt = self.opt

        def f(z, scale, pseudo, fixed_lc, l2, codes, weights):
            return neg_obj(z, scale, pseudo, fixed_lc, l2, codes, weights)

        if settings.method == "lbfgs":
            @jax.jit
            def step(z, state, scale, pseudo, fixed_lc, l2, codes, weights):
                fz = lambda zz: f(zz, scale, pseudo, fixed_lc, l2, codes, weights)  # noqa: E731
                value, grad = optax.value_and_grad_from_state(fz)(z, state=state)
                updates, state = opt.update(grad, state, z, value=value, grad=grad, value_fn=fz)
                return optax.apply_updates(z, updates), state, value
        else:
            @jax.jit
            def step(z, state, scale, pseudo, fixed_lc, l2, codes, weights):
                value, grad = jax.value_and_grad(f)(z, scale, pseudo, fixed_lc, l2, codes, weights)
                updates, state = opt.update(grad, state, z)
                return optax.apply_updates(z, updates), state, value
        self._step = step

    # -- helpers -------------------------------------------------------------------------
    def probs(self, logits: Mapping[str, Any]) -> dict[str, np.ndarray]:
        return probs_from_logits(self.network, logits)

    def evaluate(self, logits: Mapping[str, Any]) -> dict[str, Any]:
        """Log-likelihood, log-prior, penalty, gradient (∂F/∂η) and residuals at ``logits``."""
        probs = self.probs(logits)
        ll, counts = self.lik.expected_counts(probs)
        g = objective_gradient(self.network, probs, counts, self.pseudo, logits, self.settings.l2)
        resid = 0.0
        for name in self.free:
            denom = counts[name].sum(axis=-1, keepdims=True) + self.pseudo[name].sum(axis=-1, keepdims=True)
            r = np.abs(g[name]) / np.maximum(denom, 1.0)
            resid = max(resid, float(r.max(initial=0.0)))
        lp = log_prior_value(probs, self.pseudo)
        pen = penalty_value(logits, self.settings.l2)
        return {"probs": probs, "log_likelihood": ll, "log_prior": lp, "penalty": pen,
                "objective": ll + lp - pen, "grad": g, "gradient_norm": _norm(g),
                "residual": resid, "counts": counts}

    def _scale(self, counts: Mapping[str, np.ndarray]) -> dict[str, jax.Array]:
        out = {}
        for name in self.free:
            nu = counts[name].sum(axis=-1, keepdims=True) + self.pseudo[name].sum(axis=-1, keepdims=True)
            out[name] = jnp.asarray(1.0 / np.sqrt(nu + 1.0))
        return out

    def run(self, logits0: Mapping[str, Any], *, progress: Callable[[int, float, float], None] | None = None) -> _Run:
        s = self.settings
        logits = {k: np.asarray(logits0[k], dtype=np.float64) for k in self.free}
        ev = self.evaluate(logits)
        hist_obj = [ev["objective"]]
        hist_gn = [ev["gradient_norm"]]
        it = 0
        gtol_abs = s.gtol * self.n_total
        codes, weights = self.lik._codes, self.lik._weights
        pseudo = {k: jnp.asarray(v) for k, v in self.pseudo.items()}
        l2 = jnp.asarray(s.l2)
        stop_reason, converged = "", False
        if not math.isfinite(ev["objective"]):
            return _Run(logits, ev["objective"], hist_obj, hist_gn, 0, False, "objective not finite at the start")
        while it < s.max_iter:
            if ev["gradient_norm"] <= gtol_abs:
                converged, stop_reason = True, "gradient norm below gtol"
                break
            scale = self._scale(ev["counts"])
            z = {k: jnp.asarray(logits[k]) / scale[k] for k in self.free}
            state = self.opt.init(z)
            flat_count = 0
            phase_start = it
            prev = ev["objective"]
            phase_done = False
            while it < s.max_iter:
                z, state, value = self._step(z, state, scale, pseudo, self.fixed_lc, l2, codes, weights)
                it += 1
                obj = -float(value) * self.n_total  # value is at the point before the step
                logits_new = {k: np.asarray(z[k] * scale[k]) for k in self.free}
                # cheap bookkeeping every iteration: objective and gradient at the new point
                ev_new = self.evaluate(logits_new)
                if not math.isfinite(ev_new["objective"]):
                    stop_reason = "objective not finite (line search failure)"
                    phase_done = True
                    break
                logits, ev = logits_new, ev_new
                hist_obj.append(ev["objective"])
                hist_gn.append(ev["gradient_norm"])
                if progress is not None:
                    progress(it, ev["objective"], ev["gradient_norm"])
                if ev["gradient_norm"] <= gtol_abs:
                    converged, stop_reason = True, "gradient norm below gtol"
                    break
                rel = abs(ev["objective"] - prev) / max(1.0, abs(ev["objective"]))
                prev = ev["objective"]
                flat_count = flat_count + 1 if rel < s.tol else 0
                if flat_count >= 5:
                    if ev["residual"] <= math.sqrt(s.tol):
                        converged, stop_reason = True, "relative change below tol"
                        break
                    phase_done = True  # stalled with a large residual: rescale and restart
                    break
                if s.method == "lbfgs" and it - phase_start >= 200:
                    phase_done = True  # refresh the scaling now and then
                    break
            del obj
            if converged:
                break
            if phase_done and it - phase_start <= 5 and stop_reason.startswith("objective not finite"):
                break
            stop_reason = stop_reason or ""
        if not converged and not stop_reason:
            stop_reason = f"iteration limit {s.max_iter} reached"
        return _Run(logits, ev["objective"], hist_obj, hist_gn, it, converged, stop_reason)


# --------------------------------------------------------------------------- starts
def complete_family_start(network: Network, data: CodedData, rng: np.random.Generator,
                          pseudo: Mapping[str, np.ndarray] | None = None) -> dict[str, np.ndarray]:
    """Start from the counts of rows in which a node and all its parents are observed.

    Families that include a latent node (never observed together) get a random Dirichlet(1)
    draw, which also breaks the symmetry between latent states. Half a record is added to
    every cell so that no start sits on the boundary.
    """
    codes, w = data.codes, data.counts
    out = {}
    for name in network.free_names:
        i = network.index(name)
        node = network.node(name)
        fam = [network.index(p) for p in node.parents] + [i]
        shape = network.cpt_shape(name)
        if any(network.nodes[j].latent for j in fam):
            out[name] = rng.dirichlet(np.ones(node.card), size=shape[:-1]).reshape(shape)
            continue
        ok = np.all(codes[:, fam] != HIDDEN, axis=1)
        flat = np.ravel_multi_index(tuple(codes[ok][:, j] for j in fam), shape) if ok.any() else np.zeros(0, int)
        cnt = np.bincount(flat, weights=w[ok], minlength=int(np.prod(shape))).reshape(shape) + 0.5
        if pseudo is not None and name in pseudo:
            cnt = cnt + pseudo[name]
        out[name] = cnt / cnt.sum(axis=-1, keepdims=True)
    for name in network.fixed_names:
        out[name] = network.fixed_table(name)
    return out


def random_start(network: Network, rng: np.random.Generator) -> dict[str, np.ndarray]:
    out = {}
    for name in network.free_names:
        shape = network.cpt_shape(name)
        out[name] = rng.dirichlet(np.ones(shape[-1]), size=shape[:-1]).reshape(shape)
    for name in network.fixed_names:
        out[name] = network.fixed_table(name)
    return out


# --------------------------------------------------------------------------- the public API
def fit(network: Network, data: Any, *, method: str = "lbfgs", seed: int = 0, restarts: int = 1,
        tol: float = 1e-10, gtol: float = 1e-9, max_iter: int = 1000, prior: Any = None,
        pseudo_counts: Mapping[str, np.ndarray] | None = None, l2: float = 0.0,
        init: Mapping[str, np.ndarray] | None = None, learning_rate: float = 0.05,
        missing: Iterable[str] | None = None, count_column: str | None = None,
        ignore_columns: Iterable[str] = (), route: str = "auto",
        progress: Callable[[int, int, float, float], None] | None = None, warn: bool = True) -> FitResult:
    """Fit the free CPTs of ``network`` to ``data`` by maximising the marginal likelihood.

    Args:
        network: the network (see :func:`adfit.load_network`).
        data: a path (CSV/Parquet), a DataFrame, or :class:`adfit.CodedData`.
        method: ``"lbfgs"`` (default) or ``"adam"``.
        seed: seed of every random start (results are deterministic given the seed).
        restarts: number of starts; the first is from complete-family counts, the others are
            random Dirichlet draws. The best objective is kept; all are listed in
            ``result.extras["restarts"]``.
        tol, gtol, max_iter: stopping rule (module docstring).
        prior: an :class:`adfit.priors.Prior` (or anything with ``pseudo_counts(network)``).
        pseudo_counts: explicit pseudo-counts per free node (alternative to ``prior``).
        l2: strength λ of the penalty λ Σ (η − row mean η)².
        init: starting CPTs (probabilities, free nodes) for the first start.
        route: elimination route, see :func:`adfit.likelihood.build_plan`.
        progress: called as ``progress(start, iteration, objective, gradient_norm)``.

    Returns:
        A frozen :class:`adfit.result.FitResult`. A :class:`ConvergenceWarning` is issued when
        the stopping rule did not hold.
    """
    settings = FitSettings(method=method, tol=tol, gtol=gtol, max_iter=max_iter, learning_rate=learning_rate, l2=l2)
    settings.validate()
    if restarts < 1:
        raise OptionError(f"--restarts must be >= 1, got {restarts}")
    coded = load_data(network, data, missing=missing, count_column=count_column, ignore_columns=ignore_columns)
    prior_desc = None
    if prior is not None:
        if pseudo_counts is not None:
            raise OptionError("give either prior or pseudo_counts, not both")
        pseudo_counts = prior.pseudo_counts(network)
        prior_desc = prior.describe() if hasattr(prior, "describe") else None
    if not network.free_names:
        raise OptionError("every CPT of the network is fixed; nothing to estimate (use `adfit score` instead)")
    t0 = time.perf_counter()
    fitter = Fitter(network, coded, settings=settings, pseudo_counts=pseudo_counts, route=route)
    rng = np.random.default_rng(seed)
    starts = []
    for k in range(restarts):
        if k == 0:
            p0 = dict(init) if init is not None else complete_family_start(network, coded, rng, fitter.pseudo)
            for name in network.fixed_names:
                p0[name] = network.fixed_table(name)
        else:
            p0 = random_start(network, rng)
        starts.append(p0)
    check_possible(fitter.lik, starts[0])
    runs = []
    for k, p0 in enumerate(starts):
        cb = None if progress is None else (lambda it, o, g, k=k: progress(k, it, o, g))
        runs.append(fitter.run(logits_from_probs(network, p0), progress=cb))
    best_k = int(np.nanargmax([r.value if math.isfinite(r.value) else -np.inf for r in runs]))
    best = runs[best_k]
    ev = fitter.evaluate(best.logits)
    elapsed = time.perf_counter() - t0
    is_map = any(np.any(c > 0) for c in fitter.pseudo.values())
    restart_rows = [{"start": k, "kind": "complete-family counts" if k == 0 and init is None else ("given" if k == 0 else "random Dirichlet"),
                     "objective": r.value, "iterations": r.iterations, "converged": r.converged,
                     "gradient_norm": r.history_gn[-1]} for k, r in enumerate(runs)]
    result = FitResult(
        network=network, method=method, objective="map" if is_map else "mle", probs=ev["probs"],
        log_likelihood=ev["log_likelihood"], log_prior=ev["log_prior"], penalty=ev["penalty"],
        gradient_norm=ev["gradient_norm"], converged=best.converged, stop_reason=best.stop_reason,
        iterations=best.iterations, history={"objective": tuple(best.history_obj), "gradient_norm": tuple(best.history_gn)},
        n_rows=coded.n_rows, n_distinct=coded.n_distinct, seed=seed,
        settings={"tol": tol, "gtol": gtol, "max_iter": max_iter, "l2": l2, "restarts": restarts,
                  "route": fitter.lik.plan.route, "elapsed_s": elapsed, "max_residual": ev["residual"],
                  **({"learning_rate": learning_rate} if method == "adam" else {})},
        extras={"restarts": restart_rows, "best_start": best_k, **({"prior": prior_desc} if prior_desc else {})},
    )
    if warn and not best.converged:
        warnings.warn(f"the fit did not converge ({best.stop_reason}); gradient norm {ev['gradient_norm']:.3g}. "
                      f"Raise --max-iter or check the model", ConvergenceWarning, stacklevel=2)
    return result

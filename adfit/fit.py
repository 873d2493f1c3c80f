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
      ``ptol`` (1e-8 by default: for a completely observed row the residual is |θ̂ − θ|, so the
      printed probabilities are then accurate to about 1e-8). Cells whose MLE is on the
      boundary (θ → 0) have logits that run off to −∞; the probability-unit residual still goes
      to 0 there, so the rule stays meaningful.
"""

from __future__ import annotations

import math
import time
from functools import partial
import warnings
from dataclasses import dataclass
from typing import Any, Callable, Iterable, Mapping

from ._jax import jax, jnp  # first: float64 on before optax or anything else (adfit/_jax.py)
import numpy as np
import optax

from .data import HIDDEN, CodedData, load_data
from .errors import (ConvergenceWarning, IdentifiabilityWarning, ImpossibleDataError, LocalOptimaWarning, NetworkError,
                     OptionError, PriorError, option)
from .likelihood import (Likelihood, _prepared, check_possible,
                         logits_from_probs, probs_from_logits)
from .network import Network
from . import forms as _forms
from . import monotone as _mono
from .params import (FreeLayout, block_shape, coefficient_log_prior, coefficient_log_prior_grad, estimated_starts, fixed_log_tables, free_layout, full_logits, full_probs, mask_pseudo,
                     objective_fg as _objective_fg, pool_counts)
from .priors import describe_rows, prior_only_rows, resolve_pseudo_counts
from .result import FitResult

METHODS = ("lbfgs", "adam")
SCALE_EPS = 0.1
# L-BFGS restarts with a fresh preconditioner after these many iterations (then the last one)
PHASE_LENGTHS = (10, 20, 40, 80, 160)
# EM steps (from the same expected counts) tried when a quasi-Newton phase stalls
EM_POLISH_STEPS = 5
# KKT check on the simplex (module docstring): default tolerance on the ratio, the smallest
# expected parent-configuration weight N(u) + Σc (records) for which a row is checked, the
# probabilities below which a cell is re-evaluated at a floor (its expected count underflows)
KKT_TOL = 1e-3
KKT_MIN_WEIGHT = 1e-6
KKT_TINY = 1e-250
KKT_FLOOR = 1e-200
# boundary escapes: at most this many per start; the absolute levels a violating cell is raised to
MAX_BOUNDARY_ESCAPES = 20
ESCAPE_LEVELS = (0.25, 0.05, 1e-2, 1e-3, 1e-4, 1e-6)
# curvature check at a converged point (Fitter.curvature_check): Lanczos steps, the relative
# finite-difference step, the gate on the smallest Ritz value (relative to the largest), the
# predicted gains (log-likelihood units) of the trial moves, the most saddle escapes per start
LANCZOS_STEPS = 24
HVP_STEP = 1e-3
SADDLE_GATE = 1e-4
SADDLE_GAINS = (1e-3, 1e-1, 10.0)
MAX_SADDLE_ESCAPES = 3
# default starts (fit(restarts=None)): with latent nodes, this many starts, the random ones after
# BURN_IN_STEPS EM steps; fewer when LATENT_STARTS × EVALS_PER_START evaluations would take more
# than AUTO_STARTS_SECONDS
LATENT_STARTS = 4
BURN_IN_STEPS = 10
EVALS_PER_START = 150
AUTO_STARTS_SECONDS = 60.0
# default starts run side by side only when one evaluation takes at least this long
BATCH_MIN_EVAL_SECONDS = 0.01
# the structured-CPT features the gradient fit estimates (Network.unsupported_structure)
SUPPORTED_STRUCTURE = ("table", "noisy_or", "noisy_max", "logistic", "tied", "impossible", "increasing")
# active-set rule of monotone nodes (Fitter.pin): a fraction whose derivative points at a bound
# closer than PIN_DISTANCE is tried on the bound (adfit.monotone.PIN from it); one on a bound whose
# derivative points inward is released to one of RELEASE_LEVELS; at most MAX_PIN_STEPS per start
PIN_DISTANCE = 0.05
RELEASE_LEVELS = (1e-2, 1e-4, 1e-6, 0.1)
MAX_PIN_STEPS = 30
FINAL_PIN = 1e-4
# stop reasons of a stalled (not converged) quasi-Newton run, after which a boundary escape is tried
STALL_REASONS = ("line search found no better point", "no further progress after rescaling")


@dataclass(frozen=True)
class FitSettings:
    method: str = "lbfgs"
    tol: float = 1e-10
    gtol: float = 1e-9
    ptol: float = 1e-8
    max_iter: int = 1000
    learning_rate: float = 0.05
    memory: int = 20
    l2: float = 0.0
    batch_size: int | None = None
    kkt_tol: float = KKT_TOL

    def validate(self) -> None:
        if self.batch_size is not None:
            if self.method != "adam":
                raise OptionError("--batch-size (minibatch gradients) needs --method adam")
            if self.batch_size < 1:
                raise OptionError(f"--batch-size must be >= 1, got {self.batch_size}")
        if self.method not in METHODS:
            raise OptionError(f"--method must be one of {', '.join(METHODS)}, got {self.method!r}")
        if not (self.tol > 0):
            raise OptionError(f"--tol must be > 0, got {self.tol}")
        if not (self.ptol > 0):
            raise OptionError(f"--ptol must be > 0, got {self.ptol}")
        if not (self.gtol > 0):
            raise OptionError(f"--gtol must be > 0, got {self.gtol}")
        if not (0 < self.kkt_tol < 1):
            raise OptionError(f"--kkt-tol must be > 0 and < 1, got {self.kkt_tol}")
        if self.max_iter < 1:
            raise OptionError(f"--max-iter must be >= 1, got {self.max_iter}")
        if not (self.l2 >= 0) or not math.isfinite(self.l2):
            raise OptionError(f"--l2 must be a finite number >= 0, got {self.l2}")
        if not (self.learning_rate > 0):
            raise OptionError(f"--learning-rate must be > 0, got {self.learning_rate}")


# --------------------------------------------------------------------------- objective pieces
def _pseudo(network: Network, pseudo_counts: Mapping[str, np.ndarray] | None) -> dict[str, np.ndarray]:
    """Pseudo-counts by estimated node (tied nodes share their source's; impossible cells get 0)."""
    out = {}
    for name in network.free_names:
        c = None if pseudo_counts is None else pseudo_counts.get(name)
        src = network.tie_source(name)
        if src != name:
            if c is not None and np.any(np.asarray(c, dtype=np.float64) > 0):
                raise PriorError(f"node {name!r} is tied to {src!r} and shares its parameters: give the prior "
                                 f"on {src!r} only")
            continue
        if _forms.has_rows(network, name):
            shape = block_shape(network, name)
            if c is not None and np.any(np.asarray(c, dtype=np.float64) > 0):
                if _forms.is_monotone(network, name):
                    raise PriorError(f"node {name!r} has increasing_with: priors on monotone nodes are not "
                                     f"available yet; fit it without a prior on {name!r}")
                c = np.asarray(c, dtype=np.float64)
                if _forms.is_logistic(network, name):  # precisions 1/sd² of a normal prior on the coefficients
                    if c.shape != shape or not np.all(np.isfinite(c)) or np.any(c < 0) or np.any(c[:, 0] != 0):
                        raise PriorError(f"node {name!r} (logistic): the prior's precisions 1/sd^2 must be finite, "
                                         f">= 0, shaped {shape} (rows: {', '.join(_forms.cause_row_labels(network, name))}) "
                                         f"with 0 in the first (reference) state's column")
                    out[name] = c
                    continue
                if c.shape != shape:  # Dirichlet pseudo-counts on the cause rows (adfit.priors)
                    raise PriorError(f"node {name!r} ({network.cpd_form(name)}): pseudo-counts have shape {c.shape}, "
                                     f"expected {shape} (one row per cause: "
                                     f"{', '.join(_forms.cause_row_labels(network, name))})")
                out[name] = c
                continue
            out[name] = np.zeros(shape)
            continue
        out[name] = np.zeros(network.cpt_shape(name)) if c is None else np.asarray(c, dtype=np.float64)
    return mask_pseudo(network, out)


def dirichlet_part(network: Network, pseudo: Mapping[str, np.ndarray]) -> dict[str, np.ndarray]:
    """The prior arrays with a logistic node's (the precisions of its coefficients) set to 0:
    what enters wherever pseudo-counts act as imagined records (EM steps, row weights)."""
    return {k: (np.zeros_like(v) if _forms.is_logistic(network, k) else v) for k, v in pseudo.items()}


def coefficient_prior_value(network: Network, logits: Mapping[str, Any], pseudo: Mapping[str, np.ndarray]) -> float:
    """``−½ Σ (β/sd)²`` over the logistic nodes (``pseudo``'s entries there are the precisions
    ``1/sd²``; ``β`` their coefficients read off the logits of their parameter rows)."""
    tot = 0.0
    for name in network.estimated_names:
        if _forms.is_logistic(network, name) and name in pseudo and np.any(pseudo[name] > 0):
            tot += float(coefficient_log_prior(np.asarray(logits[name], dtype=np.float64), pseudo[name]))
    return tot


def log_prior_value(probs: Mapping[str, np.ndarray], pseudo: Mapping[str, np.ndarray],
                    network: Network | None = None, logits: Mapping[str, Any] | None = None) -> float:
    """Σ c·log θ with 0·log 0 = 0, plus (with ``network`` and ``logits``) the normal prior
    ``−½ Σ (β/sd)²`` of the logistic nodes (:func:`coefficient_prior_value`)."""
    tot = 0.0
    if network is not None:
        if logits is not None:
            tot += coefficient_prior_value(network, logits, pseudo)
        pseudo = dirichlet_part(network, pseudo)
    for name, c in pseudo.items():
        th = np.asarray(probs[name])
        with np.errstate(divide="ignore", invalid="ignore"):
            tot += float(np.sum(np.where(c > 0, c * np.log(th), 0.0)))
    return tot


def penalty_value(logits: Mapping[str, Any], l2: float, network: Network | None = None) -> float:
    """λ Σ (η − row mean η)² over the estimated nodes' logits (with ``network``: once per set of
    tied nodes, impossible cells left out, as in :func:`adfit.params.head`)."""
    if l2 == 0:
        return 0.0
    tot = 0.0
    names = logits.keys() if network is None else network.estimated_names
    for name in names:
        e = np.asarray(logits[name], dtype=np.float64)
        if network is not None and network.node(name).impossible:
            ok = ~network.impossible_mask(name)
            mean = np.sum(np.where(ok, e, 0.0), axis=-1, keepdims=True) / ok.sum(axis=-1, keepdims=True)
            tot += float(np.sum(np.where(ok, e - mean, 0.0) ** 2))
        else:
            tot += float(np.sum((e - e.mean(axis=-1, keepdims=True)) ** 2))
    return l2 * tot


def objective_gradient(network: Network, probs: Mapping[str, np.ndarray], counts: Mapping[str, np.ndarray],
                       pseudo: Mapping[str, np.ndarray], logits: Mapping[str, Any] | None, l2: float) -> dict[str, np.ndarray]:
    """∂F/∂η for every estimated node from the expected counts (Fisher's identity; pooled over
    tied nodes, :func:`adfit.params.pool_counts`)."""
    g = {}
    for name in network.estimated_names:
        logistic = _forms.is_logistic(network, name)
        n_xu = counts[name] + (0.0 if logistic else pseudo[name])
        th = np.asarray(probs[name])
        gi = n_xu - th * n_xu.sum(axis=-1, keepdims=True)
        if logistic and logits is not None and np.any(pseudo[name] > 0):  # the normal prior on the coefficients
            gi = gi + coefficient_log_prior_grad(np.asarray(logits[name], dtype=np.float64), pseudo[name])
        if l2 and logits is not None:
            e = np.asarray(logits[name], dtype=np.float64)
            if network.node(name).impossible:
                ok = ~network.impossible_mask(name)
                mean = np.sum(np.where(ok, e, 0.0), axis=-1, keepdims=True) / ok.sum(axis=-1, keepdims=True)
                gi = gi - 2 * l2 * np.where(ok, e - mean, 0.0)
            else:
                gi = gi - 2 * l2 * (e - e.mean(axis=-1, keepdims=True))
        g[name] = gi
    return g


def kkt_ratios(network: Network, probs: Mapping[str, np.ndarray], counts: Mapping[str, np.ndarray],
               pseudo: Mapping[str, np.ndarray], *, min_weight: float = KKT_MIN_WEIGHT) -> dict[str, np.ndarray]:
    """The simplex KKT ratio of every free cell, ``(N(x,u) + c) / (θ(x|u)·(N(u) + Σc))``.

    On the simplex of a CPT row, F = log L + Σ c log θ has the Lagrangian stationarity
    condition ∂F/∂θ(x|u) = μ(u) wherever θ(x|u) > 0 and ∂F/∂θ(x|u) ≤ μ(u) where θ(x|u) = 0
    (Boyd & Vandenberghe 2004, Convex Optimization, §5.5.3). With ∂F/∂θ = (N + c)/θ (Fisher's
    identity) and μ(u) = N(u) + Σc, the ratio above is ∂F/∂θ / μ: at a maximum it is 1 in the
    interior and ≤ 1 on the boundary. A ratio above 1 on a cell near 0 means F rises steeply if
    the cell grows — a point a stopping rule in logits cannot see, since there the logit
    gradient N − θN(u) is θ·(ratio − 1)·N(u) ≈ 0. It is also EM's multiplicative factor for the
    cell (Dempster, Laird & Rubin 1977).

    The likelihood is linear in each CPT (one entry per row's term), so N(x,u)/θ(x|u) does not
    depend on θ(x|u) and is finite at θ → 0; cells whose θ underflows are NaN here (see
    :meth:`Fitter.evaluate`). Rows with N(u) + Σc below ``min_weight`` records are not checked
    (NaN): no record informs them.
    """
    out = {}
    for name in network.estimated_names:
        th = np.asarray(probs[name], dtype=np.float64)
        if _forms.is_logistic(network, name) or _forms.is_monotone(network, name):
            # coefficients: no simplex, the logit rule is the condition; fractions of a monotone
            # node: a box, checked by Fitter.box (adfit.monotone.box_kkt)
            out[name] = np.full(th.shape, np.nan)
            continue
        a = np.asarray(counts[name], dtype=np.float64) + pseudo[name]
        mu = a.sum(axis=-1, keepdims=True)
        with np.errstate(divide="ignore", invalid="ignore"):
            r = a / (th * mu)
        ok = (mu >= min_weight) & (th > KKT_TINY) & np.isfinite(r)
        out[name] = np.where(ok, r, np.nan)
    return out


def lanczos_extremes(matvec: Callable[[np.ndarray], np.ndarray], n: int, *, steps: int = LANCZOS_STEPS,
                     seed: int = 0) -> tuple[float, float, np.ndarray] | None:
    """Smallest and largest eigenvalue estimates of a symmetric operator of size ``n`` given by
    ``matvec``, and the unit Ritz vector of the smallest: the Lanczos iteration with full
    re-orthogonalisation (Golub & Van Loan 2013, Matrix Computations, 4th ed., §10.1), at most
    ``steps`` products, stopped early once the smallest Ritz value's residual bound
    ``|β_j·y_j|`` is below 1e-3 of its size. None if a product is not finite."""
    rng = np.random.default_rng(seed)
    q = rng.standard_normal(n)
    q /= np.linalg.norm(q)
    Q, alpha, beta = [], [], []
    lam_min = lam_max = 0.0
    vec = np.ones(1)
    for j in range(min(steps, n)):
        w = np.asarray(matvec(q), dtype=np.float64)
        if not np.all(np.isfinite(w)):
            return None
        Q.append(q)
        alpha.append(float(np.dot(q, w)))
        Qm = np.asarray(Q)
        w = w - Qm.T @ (Qm @ w)
        w = w - Qm.T @ (Qm @ w)
        T = np.diag(alpha) + np.diag(beta, 1) + np.diag(beta, -1)
        vals, vecs = np.linalg.eigh(T)
        lam_min, lam_max, vec = float(vals[0]), float(vals[-1]), vecs[:, 0]
        b = float(np.linalg.norm(w))
        scale = max(abs(lam_min), abs(lam_max), 1e-300)
        if b < 1e-12 * scale or (j >= 4 and abs(b * vec[-1]) < 1e-3 * max(abs(lam_min), 1e-12 * scale)):
            break
        beta.append(b)
        q = w / b
    v = np.asarray(Q).T @ vec
    return lam_min, lam_max, v / np.linalg.norm(v)


def _cell_label(network: Network, name: str, flat: int) -> str:
    """``"node=state | parent=state, ..."`` for entry ``flat`` of the raveled CPT of ``name``."""
    node = network.node(name)
    row, col = divmod(int(flat), node.card)
    if _forms.has_rows(network, name):  # a cell of a parameter row (adfit.forms)
        kind = ("coefficient row" if _forms.is_logistic(network, name) else
                "fraction" if _forms.is_monotone(network, name) else "cause row")
        return f"{name}={node.states[col]} in the {kind} {_forms.cause_row_labels(network, name)[row]}"
    cfg = network.parent_config_labels(name)[row]
    given = ", ".join(f"{p}={v}" for p, v in zip(node.parents, cfg))
    return f"{name}={node.states[col]}" + (f" | {given}" if given else "")


def _max_finite(tree: Mapping[str, np.ndarray]) -> float:
    vals = [float(np.nanmax(v)) for v in tree.values() if np.size(v) and np.isfinite(v).any()]
    return max(vals) if vals else float("nan")


def _norm(tree: Mapping[str, np.ndarray]) -> float:
    return math.sqrt(sum(float(np.sum(np.asarray(v) ** 2)) for v in tree.values()))


@partial(jax.jit, static_argnums=(0,))
def _lbfgs_init(memory: int, params):
    return optax.scale_by_lbfgs(memory_size=memory).init(params)


@partial(jax.jit, static_argnums=(0,))
def _lbfgs_direction(memory: int, grad, state, params):
    """optax's L-BFGS direction and memory update (Nocedal & Wright 2006, Algorithms 7.4 and
    7.5) on the one flat vector of the free logits: one small program, compiled once per vector
    size and memory (kept by the persistent compilation cache of the CLI)."""
    return optax.scale_by_lbfgs(memory_size=memory).update(grad, state, params)


@partial(jax.jit, static_argnums=(0,))
def _adam_init(learning_rate: float, params):
    return optax.adam(learning_rate).init(params)


@partial(jax.jit, static_argnums=(0,))
def _adam_update(learning_rate: float, grad, state, params):
    updates, state = optax.adam(learning_rate).update(grad, state, params)
    return optax.apply_updates(params, updates), state


def _dot(a: np.ndarray, b: np.ndarray) -> float:
    return float(np.dot(a, b))


def _axpy(alpha: float, d: np.ndarray, x: np.ndarray) -> np.ndarray:
    return x + alpha * d


def wolfe_line_search(fg: Callable, x, f0: float, g0, d, *, c1: float = 1e-4, c2: float = 0.9,
                      alpha0: float = 1.0, max_evals: int = 30):
    """Strong-Wolfe line search (Nocedal & Wright 2006, Algorithms 3.5 and 3.6, with cubic
    interpolation). ``fg(x) -> (f, g)``; ``d`` a descent direction. Returns
    ``(alpha, f, g, n_evals)``, or ``(None, f0, g0, n)`` when no acceptable step was found.

    Near the optimum the decrease of ``f`` falls below its rounding error while the gradient is
    still informative; a point is then also accepted under the approximate Wolfe conditions of
    Hager & Zhang (2005, SIAM J. Optim. 16): ``f`` within a few ulps of ``f0`` and
    ``c2·φ'(0) ≤ φ'(α) ≤ (2c1 − 1)·φ'(0)``. The curvature part keeps ``yᵀs > 0``, so the
    L-BFGS update stays positive definite."""
    dphi0 = _dot(g0, d)
    if not dphi0 < 0:
        return None, f0, g0, 0
    eps_f = 16 * np.finfo(float).eps * max(1.0, abs(f0))

    def approx_wolfe(fa, da):
        return math.isfinite(fa) and fa <= f0 + eps_f and c2 * dphi0 <= da <= (2 * c1 - 1) * dphi0
    evals = 0
    a_prev, f_prev, dphi_prev = 0.0, f0, dphi0
    a = alpha0
    best = (None, f0, g0)

    def phi(alpha):
        nonlocal evals
        evals += 1
        f, g = fg(_axpy(alpha, d, x))
        f = float(f)
        return f, g, (_dot(g, d) if math.isfinite(f) else float("nan"))

    def zoom(lo, f_lo, dlo, hi, f_hi, dhi):
        nonlocal best
        while evals < max_evals:
            # cubic interpolation between lo and hi, safeguarded to the middle 80 %
            aj = _cubic(lo, f_lo, dlo, hi, f_hi, dhi)
            left, right = min(lo, hi), max(lo, hi)
            if not (math.isfinite(aj) and left + 0.1 * (right - left) <= aj <= right - 0.1 * (right - left)):
                aj = 0.5 * (lo + hi)
            fj, gj, dj = phi(aj)
            if approx_wolfe(fj, dj):
                return aj, fj, gj
            if not math.isfinite(fj) or fj > f0 + c1 * aj * dphi0 or fj >= f_lo:
                hi, f_hi, dhi = aj, fj if math.isfinite(fj) else f_hi, dj if math.isfinite(dj) else dhi
            else:
                if fj < best[1]:
                    best = (aj, fj, gj)
                if abs(dj) <= -c2 * dphi0:
                    return aj, fj, gj
                if dj * (hi - lo) >= 0:
                    hi, f_hi, dhi = lo, f_lo, dlo
                lo, f_lo, dlo = aj, fj, dj
            if abs(hi - lo) < 1e-14 * max(1.0, abs(lo)):
                break
        return best

    while evals < max_evals:
        fa, ga, da = phi(a)
        if not math.isfinite(fa):
            # stepped out of the domain (e.g. -inf log-likelihood): shrink
            a_hi = a
            a = 0.5 * (a_prev + a_hi)
            if a - a_prev < 1e-14:
                break
            continue
        if approx_wolfe(fa, da):
            return a, fa, ga, evals
        if fa > f0 + c1 * a * dphi0 or (evals > 1 and fa >= f_prev):
            return zoom(a_prev, f_prev, dphi_prev, a, fa, da) + (evals,)
        if fa < best[1]:
            best = (a, fa, ga)
        if abs(da) <= -c2 * dphi0:
            return a, fa, ga, evals
        if da >= 0:
            return zoom(a, fa, da, a_prev, f_prev, dphi_prev) + (evals,)
        a_prev, f_prev, dphi_prev = a, fa, da
        a = 2.0 * a
    return best + (evals,)


def _cubic(a, fa, da, b, fb, db) -> float:
    """Minimiser of the cubic through (a, fa, da) and (b, fb, db) (Nocedal & Wright eq. 3.59)."""
    try:
        d1 = da + db - 3 * (fa - fb) / (a - b)
        disc = d1 * d1 - da * db
        if disc < 0:
            return float("nan")
        d2 = math.copysign(math.sqrt(disc), b - a)
        return b - (b - a) * (db + d2 - d1) / (db - da + 2 * d2)
    except (ZeroDivisionError, OverflowError, ValueError):
        return float("nan")


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
                 pseudo_counts: Mapping[str, np.ndarray] | None = None, route: str = "auto",
                 likelihood: Likelihood | None = None):
        settings.validate()
        refusal = network.unsupported_structure(SUPPORTED_STRUCTURE, what="the gradient fit")
        if refusal is not None:
            raise NetworkError(refusal)
        for n in network.nodes:
            if n.fixed is None and n.increasing_with and n.impossible:
                raise NetworkError(f"nodes.{n.name}.impossible cannot be combined with increasing_with in the "
                                   f"gradient fit yet (a monotone table's zero cells follow from its fractions); "
                                   f"drop one of the keys")
        self.network = network
        self.data = data
        self.settings = settings
        self.lik = likelihood if likelihood is not None else Likelihood(network, data, route=route)
        self.pseudo = _pseudo(network, pseudo_counts)
        self.n_total = float(data.n_rows)
        self.free = network.estimated_names  # tied nodes share their source's parameters
        # logistic rows take no EM steps (coefficients have no closed-form M-step): the other
        # nodes' EM steps with them held fixed still never lower the objective (a GEM step)
        self.logistic = tuple(n for n in self.free if _forms.is_logistic(network, n))
        # monotone nodes' fractions live in a box: no EM step either (their M-step has no closed
        # form); the active-set rule (pin) and the box KKT check (box) cover them
        self.monotone = tuple(n for n in self.free if _forms.is_monotone(network, n))
        # with two or more listed parents the fractions map through a min (not differentiable
        # where predecessors tie): the KKT condition is checked on the cumulative probabilities
        # (adfit.monotone.cone_kkt), the box condition of the fractions is no certificate there
        self.cone_nodes = tuple(n for n in self.monotone if _mono.needs_cone(network, n))
        self.no_em = self.logistic + self.monotone
        self.em_free = tuple(n for n in self.free if n not in self.no_em)
        self.pin_steps = 0
        self.em_polish_steps = 0
        self.boundary_escapes = 0
        self.saddle_escapes = 0
        self.saddle_check = True
        # a saddle needs hidden cells: with every cell observed the log-likelihood is concave in
        # the logits (a sum of linear terms minus log-sum-exps)
        codes = np.asarray(data.codes)  # (a reduction: no boolean matrix of the size of the codes)
        self.has_hidden = bool(codes.size) and int(codes.min()) < 0
        with np.errstate(divide="ignore"):
            self.fixed_lc = {n: jnp.asarray(np.log(network.fixed_table(n))) for n in network.fixed_names}
        # the optimiser's flat vectors (FreeLayout): pseudo-counts and the fixed nodes' log-tables
        self.layout = free_layout(network)
        self.constrained = self.layout.tied or self.layout.mask is not None
        self.pseudo_flat = self.layout.flatten(self.pseudo)
        self.fixed_flat = fixed_log_tables(network)

    # -- helpers -------------------------------------------------------------------------
    def objective_fg(self, z, scale, pseudo, l2, n_total):
        """−F/N and its gradient w.r.t. the scaled logits ``z`` (flat vectors of
        :attr:`layout`, as ``scale`` and ``pseudo``; the gradient is a flat numpy array): every
        objective evaluation of :meth:`run` goes through here (:mod:`adfit.restarts` overrides
        it to evaluate the points of several starts in one vmapped call)."""
        return _objective_fg(self.network, self.lik.plan.groups, z, scale, pseudo, self.fixed_flat,
                             l2, n_total, self.lik._codes, self.lik._weights)

    def lbfgs_direction(self, memory: int, grad, state, params):
        """The L-BFGS direction and memory update for one start, on flat vectors
        (optax's ``scale_by_lbfgs``; :mod:`adfit.restarts` overrides it to update the memories
        of several starts in one vmapped optax call)."""
        d, state = _lbfgs_direction(memory, grad, state, params)
        return np.asarray(d), state

    def logits_of(self, probs: Mapping[str, np.ndarray]) -> dict[str, np.ndarray]:
        """Logits of the estimated nodes (tied nodes need no entry)."""
        return logits_from_probs(self.network, probs, names=self.free)

    def probs(self, logits: Mapping[str, Any]) -> dict[str, np.ndarray]:
        """CPTs of every node from the estimated nodes' logits (impossible cells 0, ties filled)."""
        return probs_from_logits(self.network, full_logits(self.network, logits))

    def counts(self, probs: Mapping[str, np.ndarray]) -> tuple[float, dict[str, np.ndarray]]:
        """Log-likelihood and expected counts at ``probs`` (CPTs of the estimated nodes, or of
        all), the constraints applied first (:func:`adfit.params.full_probs`) and the counts of
        tied families pooled into their source's (:func:`adfit.params.pool_counts`)."""
        ll, counts, _, _ = self.counts_and_families(probs)
        return ll, counts

    def counts_and_families(self, probs: Mapping[str, np.ndarray]):
        """:meth:`counts`, the CPT-shaped expected family counts of every node as the likelihood
        gives them (before pooling ties or the chain rule onto parameter rows), and the CPTs
        they were evaluated at (:meth:`tables`)."""
        if not self.constrained:
            ll, counts = self.lik.expected_counts(probs)
            return ll, counts, counts, probs
        tables = full_probs(self.network, probs)
        ll, fam = self.lik.expected_counts(tables)
        return ll, pool_counts(self.network, fam, probs), fam, tables

    def tables(self, probs: Mapping[str, np.ndarray]) -> dict[str, np.ndarray]:
        """The CPT of every node from the fitter's parameters (cause rows imply their tables)."""
        return full_probs(self.network, probs) if self.constrained else dict(probs)

    def evaluate(self, logits: Mapping[str, Any]) -> dict[str, Any]:
        """Log-likelihood, log-prior, penalty, gradient (∂F/∂η) and residuals at ``logits``."""
        probs = self.probs(logits)
        ll, counts, fam, tables = self.counts_and_families(probs)
        g = objective_gradient(self.network, probs, counts, self.pseudo, logits, self.settings.l2)
        resid = resid_smooth = 0.0
        weights = self._logistic_weights(tables, fam) if self.logistic else {}
        served = {n: _mono.served(self.network, n, self._pooled_family(fam, n)) for n in self.monotone}
        for name in self.free:
            if name in weights:  # records the coefficient row serves
                denom = weights[name][1][:, None]
            elif name in served:  # records of the fraction's parent configuration
                denom = served[name][:, None]
            else:
                denom = counts[name].sum(axis=-1, keepdims=True) + self.pseudo[name].sum(axis=-1, keepdims=True)
            r = np.abs(g[name]) / np.maximum(denom, 1.0)
            resid = max(resid, float(r.max(initial=0.0)))
            if name not in self.cone_nodes:
                resid_smooth = max(resid_smooth, float(r.max(initial=0.0)))
        lp = log_prior_value(probs, self.pseudo, self.network, logits)
        pen = penalty_value(logits, self.settings.l2, self.network)
        kkt = self.kkt(probs, counts) if self.settings.l2 == 0 else None
        box = ({n: _mono.box_kkt(probs[n], _mono.dsigma(probs[n], counts[n]), served[n]) for n in self.monotone}
               if self.settings.l2 == 0 else None)
        cone = ({n: self._cone(n, tables, fam) for n in self.cone_nodes} if self.settings.l2 == 0 else None)
        return {"probs": probs, "box": box, "cone": cone, "served": served, "log_likelihood": ll, "log_prior": lp, "penalty": pen,
                "objective": ll + lp - pen, "grad": g, "gradient_norm": _norm(g),
                "residual": resid, "residual_smooth": resid_smooth, "counts": counts, "kkt": kkt, "family_counts": fam, "tables": tables,
                "logistic_weights": weights,
                "kkt_ratio": _max_finite(kkt) if kkt is not None else None}

    def kkt(self, probs: Mapping[str, np.ndarray], counts: Mapping[str, np.ndarray]) -> dict[str, np.ndarray]:
        """:func:`kkt_ratios` at ``probs``. Cells whose probability underflowed (≤ KKT_TINY, where
        the expected count is lost too) in informed rows get their ratio from one more
        evaluation with those cells raised to KKT_FLOOR: the ratio N(x,u)/θ(x|u) does not depend
        on θ(x|u) (the likelihood is linear in each CPT), and the floor changes nothing else by
        more than about 1e-200."""
        r = kkt_ratios(self.network, probs, counts, self.pseudo)
        tiny = {}
        for name in self.em_free:
            th = np.asarray(probs[name])
            mu = counts[name].sum(axis=-1, keepdims=True) + self.pseudo[name].sum(axis=-1, keepdims=True)
            t = (th <= KKT_TINY) & (mu >= KKT_MIN_WEIGHT)
            if self.network.node(name).impossible:
                t &= ~self.network.impossible_mask(name)  # fixed at 0: not a boundary of the fit
            if t.any():
                tiny[name] = t
        if tiny:
            floored = dict(probs)
            for name, t in tiny.items():
                floored[name] = np.where(t, KKT_FLOOR, probs[name])
            _, c2 = self.counts(floored)
            r2 = kkt_ratios(self.network, floored, c2, self.pseudo)
            for name, t in tiny.items():
                r[name] = np.where(t, r2[name], r[name])
        return r

    def kkt_holds(self, ev: Mapping[str, Any]) -> bool:
        """The simplex KKT condition at an evaluated point: every checked cell's ratio ≤ 1 + kkt_tol
        (always true with an L2 penalty, whose maximum is interior: the logit rule covers it), and
        the box condition of every monotone fraction (:meth:`box_holds`)."""
        simplex = ev.get("kkt_ratio") is None or not (ev["kkt_ratio"] > 1.0 + self.settings.kkt_tol)
        return simplex and self.box_holds(ev)

    def box_holds(self, ev: Mapping[str, Any]) -> bool:
        """The KKT condition of the monotone nodes: along one listed parent, the box condition of
        the fractions (:func:`adfit.monotone.box_kkt`: every fraction's first-order gain towards
        the bound its derivative points at is at most kkt_tol per record served); along two or
        more, the cone condition on the cumulative probabilities (:func:`adfit.monotone.cone_kkt`,
        at most kkt_tol per record served). True with an L2 penalty or without monotone nodes."""
        return not ev.get("box") or self.worst_box(ev)[2] <= self.settings.kkt_tol

    def worst_box(self, ev: Mapping[str, Any]) -> tuple[str | None, str, float]:
        """(node, label, measure) of the largest monotone KKT measure (0.0 when none): a fraction's
        box measure, or a cone node's residual (label "" then)."""
        best: tuple[str | None, str, float] = (None, "", 0.0)
        for name, m in (ev.get("box") or {}).items():
            if name in self.cone_nodes:
                continue
            if m.size and float(np.max(m)) > best[2]:
                j = int(np.argmax(m))
                best = (name, _forms.cause_row_labels(self.network, name)[j], float(m[j]))
        for name, (m, _) in (ev.get("cone") or {}).items():
            if m > best[2]:
                best = (name, "", float(m))
        return best

    def _cone(self, name: str, tables: Mapping[str, np.ndarray], fam: Mapping[str, np.ndarray]):
        """:func:`adfit.monotone.cone_kkt` of a monotone node at its implied table (``tables``, as
        :meth:`counts_and_families` gives them: a monotone node's rows make the layout
        constrained), from the family counts pooled over ties: ∂LL/∂P(y | u) = N(y, u)/P(y | u)
        (the log-likelihood is linear in each CPT entry; no prior on monotone nodes)."""
        T = np.asarray(tables[name], dtype=np.float64)
        n = self._pooled_family(fam, name)
        return _mono.cone_kkt(self.network, name, T, _mono.cell_derivatives(T, n)[0], n)

    def cone_converged(self, ev: Mapping[str, Any]) -> bool:
        """Converged by the rule of the cone nodes: their KKT residual (:func:`adfit.monotone.cone_kkt`)
        and every other parameter's logit residual at most ptol (per record served)."""
        s = self.settings
        return (s.l2 == 0 and bool(ev.get("cone")) and max(m for m, _ in ev["cone"].values()) <= s.ptol
                and ev["residual_smooth"] <= s.ptol)

    def cone_step(self, ev: Mapping[str, Any], *, tol: float | None = None):
        """A projected-gradient step on the cumulative probabilities of the cone nodes whose KKT
        residual exceeds kkt_tol (:func:`adfit.monotone.cone_steps`): the best of the trial steps
        if it raises the objective. Returns ``(logits, evaluation)`` or None."""
        tol = self.settings.kkt_tol if tol is None else tol
        todo = [n for n, (m, _) in (ev.get("cone") or {}).items() if m > tol]
        if not todo:
            return None
        best = None
        trials = {n: [] for n in todo}
        for name in todo:
            # a Newton step on the face of the binding constraints first, then the projected
            # gradient (which also leaves constraints whose multiplier is 0)
            T = np.asarray(ev["tables"][name], dtype=np.float64)
            fam = self._pooled_family(ev["family_counts"], name)
            g, info = _mono.cell_derivatives(T, fam, floor=1e-12)
            snapped = _mono.snap(self.network, name, T, g, fam)
            if snapped is not None:
                # close the constraints it stops a hair from, then Newton on that face
                trials[name].append(snapped)
                T = snapped
                g, info = _mono.cell_derivatives(T, fam, floor=1e-12)
            d_newton = _mono.face_newton(self.network, name, T, g, info, fam)
            if d_newton is not None:
                trials[name] += _mono.cone_steps(self.network, name, T, d_newton, (1.0, 0.5, 0.25, 0.1), newton=True)
            trials[name] += _mono.cone_steps(self.network, name, T, ev["cone"][name][1])
        for k in range(max(len(t) for t in trials.values())):
            new = {n: ev["probs"][n] for n in self.free}
            for name in todo:
                steps = trials[name][k:k + 1]
                if steps:
                    new[name] = _mono.read_fractions(self.network, name, steps[0], floor=_mono.PIN)
            cand = self.logits_of(new)
            ev_c = self.evaluate(cand)
            if math.isfinite(ev_c["objective"]) and ev_c["objective"] > ev["objective"] and (
                    best is None or ev_c["objective"] > best[1]["objective"]):
                best = (cand, ev_c)
        return best

    def _pooled_family(self, fam: Mapping[str, np.ndarray], name: str) -> np.ndarray:
        """A node's expected family counts plus those of the nodes tied to it."""
        return sum((np.asarray(fam[t]) for t in self.network.tied_names(name)), np.asarray(fam[name]))

    def pin(self, ev: Mapping[str, Any], *, final: bool = False, near: float = 0.0):
        """The active-set step of the monotone fractions (docs/method.md, "Monotone CPTs"): a
        fraction whose box measure exceeds kkt_tol and whose derivative points at a bound closer
        than PIN_DISTANCE is put on that bound (PIN from it, where its logit gradient vanishes and
        L-BFGS leaves it); one on a bound whose derivative points inward is released to the best
        of RELEASE_LEVELS. A move is kept only if it raises the objective; all the pins together
        first, then one at a time (largest gain first). Returns ``(logits, evaluation)`` or None.

        ``final``: at a converged point, put every fraction within FINAL_PIN of a bound that its
        derivative points at on the bound (kept if the objective does not fall), so that the
        binding constraints are reported exactly and the error bars treat them as bounds.
        ``near``: as ``final`` within that distance, kept only if the objective rises (a run that
        stalled with the box condition holding: the fractions creep to their bounds)."""
        if near:
            final = True
        tol = self.settings.kkt_tol
        pins: list[tuple[float, str, int, float]] = []   # (gain, node, fraction, new σ)
        releases: list[tuple[str, int, int]] = []         # (node, fraction, direction +1: up from 0)
        for name in self.monotone:
            v = np.asarray(ev["probs"][name])
            d = _mono.dsigma(v, ev["counts"][name])
            m = ev["box"][name]
            for j in (np.flatnonzero(np.minimum(v[:, 0], v[:, 1]) < (near or FINAL_PIN)) if final
                      else np.flatnonzero(m > tol)):
                if d[j] > 0 and v[j, 0] < PIN_DISTANCE:
                    if v[j, 0] > _mono.PIN * 1.5:
                        pins.append((float(m[j]), name, int(j), 1.0))
                elif d[j] < 0 and v[j, 1] < PIN_DISTANCE:
                    if v[j, 1] > _mono.PIN * 1.5:
                        pins.append((float(m[j]), name, int(j), 0.0))
                elif d[j] > 0 and v[j, 1] < PIN_DISTANCE:
                    releases.append((name, int(j), 1))
                elif d[j] < 0 and v[j, 0] < PIN_DISTANCE:
                    releases.append((name, int(j), -1))

        def moved(changes):
            new = {n: ev["probs"][n] for n in self.free}
            for name, j, s1 in changes:
                v = np.array(new[name], dtype=np.float64)
                v[j] = (1.0 - s1, s1) if _mono.PIN < s1 < 1 - _mono.PIN else ((_mono.PIN, 1.0 - _mono.PIN) if s1 >= 1.0
                                                                                else (1.0 - _mono.PIN, _mono.PIN))
                new[name] = v
            cand = self.logits_of(new)
            return cand, self.evaluate(cand)

        def better(c):
            return math.isfinite(c[1]["objective"]) and (c[1]["objective"] > ev["objective"] or
                                                         (final and not near and c[1]["objective"] >= ev["objective"]))

        if final:
            releases = []

        tries = []
        if pins:
            tries.append([(n, j, s1) for _, n, j, s1 in pins])
            tries += [[(n, j, s1)] for _, n, j, s1 in sorted(pins, reverse=True)[:10]] if len(pins) > 1 else []
        for changes in tries:
            c = moved(changes)
            if better(c):
                return c
        best = None
        for level in RELEASE_LEVELS:
            if not releases:
                break
            c = moved([(n, j, level if di > 0 else 1.0 - level) for n, j, di in releases])
            if better(c) and (best is None or c[1]["objective"] > best[1]["objective"]):
                best = c
        return best

    def _logistic_weights(self, tables: Mapping[str, np.ndarray], fam: Mapping[str, np.ndarray]):
        """Per logistic node: (complete-data information of each coefficient, records per row),
        :func:`adfit.forms.logistic_weights`, at its CPT (``tables``) from the family counts
        pooled over ties."""
        out = {}
        for name in self.logistic:
            n = sum((np.asarray(fam[t]) for t in self.network.tied_names(name)), np.asarray(fam[name]))
            out[name] = _forms.logistic_weights(self.network, name, n, tables[name])
        return out

    def _scale_at(self, ev: Mapping[str, Any]) -> dict[str, np.ndarray]:
        """:meth:`_scale` at an evaluated point; a logistic node's coefficients are scaled by
        1/sqrt(their complete-data information + ε)."""
        out = self._scale(ev["counts"], ev["probs"])
        for name, (info, _) in (ev.get("logistic_weights") or {}).items():
            # the normal prior's curvature 1/sd² adds to each coefficient's information (the
            # reference column's logit carries the sum of its row's)
            prec = self.pseudo[name]
            prior_info = prec + np.where(np.arange(prec.shape[-1]) == 0, prec.sum(axis=-1, keepdims=True), 0.0)
            out[name] = 1.0 / np.sqrt(info + prior_info + SCALE_EPS)
        for name in self.monotone:
            # a fraction pair's logits: the diagonal of their complete-data information (a
            # fraction moves its configuration's cells and those above it along the parent)
            info = _mono.pair_information(self.network, name, ev["probs"][name],
                                          self._pooled_family(ev["family_counts"], name))
            out[name] = 1.0 / np.sqrt(info + SCALE_EPS)
        return out

    def _scale(self, counts: Mapping[str, np.ndarray], probs: Mapping[str, np.ndarray]) -> dict[str, np.ndarray]:
        """Diagonal preconditioner: 1/sqrt(N(u)·θ(x|u) + ε) per logit.

        For a completely observed CPT row with count N(u), the Hessian of the log-likelihood in
        the logits is −N(u)(diag θ − θθᵀ); scaling logit k by 1/sqrt(N(u)θ_k) turns it into
        −(I − √θ√θᵀ), whose non-zero eigenvalues are all 1. What is left for the quasi-Newton
        method is the conditioning due to missing information.
        """
        out = {}
        for name in self.free:
            if name in self.monotone:  # virtual counts of fractions are no records (see _scale_at)
                out[name] = np.ones(np.shape(probs[name]))
                continue
            c = 0.0 if name in self.logistic else self.pseudo[name].sum(axis=-1, keepdims=True)
            nu = counts[name].sum(axis=-1, keepdims=True) + c
            out[name] = 1.0 / np.sqrt(nu * np.asarray(probs[name]) + SCALE_EPS)
        return out

    def _run_minibatch(self, logits0: Mapping[str, Any], *, progress=None) -> _Run:
        """Minibatch Adam (adfit.minibatch), then the exact full-data stopping rule at the end."""
        from .minibatch import run_minibatch

        s = self.settings
        ev0 = self.evaluate(logits0)
        z, h_obj, h_gn = run_minibatch(self, logits0, batch_size=s.batch_size, max_iter=s.max_iter,
                                       learning_rate=s.learning_rate, seed=0, progress=progress)
        ev = self.evaluate(z)
        gtol_abs = s.gtol * self.n_total
        converged = ev["gradient_norm"] <= gtol_abs or ev["residual"] <= s.ptol
        reason = ("full-data gradient norm below gtol" if ev["gradient_norm"] <= gtol_abs else
                  "full-data residual below ptol" if converged else
                  f"minibatch run of {s.max_iter} steps ended; full-data gradient norm {ev['gradient_norm']:.3g}")
        return _Run(z, ev["objective"], [ev0["objective"]] + h_obj[:-1] + [ev["objective"]],
                    [ev0["gradient_norm"]] + h_gn[:-1] + [ev["gradient_norm"]], s.max_iter, converged, reason)

    def run(self, logits0: Mapping[str, Any], *, progress: Callable[[int, float, float], None] | None = None) -> _Run:
        """One start: the optimiser's phases, then the simplex KKT check (:func:`kkt_ratios`).

        Where the logit rule stopped (converged, or stalled) at a point whose KKT ratio exceeds
        1 + ``kkt_tol`` on some cell, the point is a false boundary: the cell is (near) 0 while
        the objective rises if it grows. :meth:`escape` moves probability mass onto those cells
        and the optimiser carries on from there, at most ``MAX_BOUNDARY_ESCAPES`` times. A run
        whose last point still violates the condition is not converged, whatever the logit rule
        said."""
        s = self.settings
        if s.batch_size is not None:
            r = self._run_minibatch(logits0, progress=progress)
            ev = self.evaluate(r.logits)
            if r.converged and not self.kkt_holds(ev):
                r.converged, r.stop_reason = False, self._kkt_reason(ev, "after the minibatch run")
            return r
        r = self._run_phases(logits0, max_iter=s.max_iter, progress=progress)
        escapes = saddles = pins = 0
        while True:
            ev = self.evaluate(r.logits)
            if not math.isfinite(ev["objective"]):
                break
            stalled = r.stop_reason in STALL_REASONS
            if self.kkt_holds(ev):
                moved = None
                if stalled and self.monotone and s.l2 == 0 and pins < MAX_PIN_STEPS and r.iterations < s.max_iter:
                    # stalled with the box condition holding: fractions creeping to their bounds
                    moved = self.pin(ev, near=PIN_DISTANCE)
                    if moved is None and self.cone_nodes:
                        # near a kink of the fractions' map: a projected step on the cumulative
                        # probabilities (the box rule cannot see one-sided derivatives)
                        moved = self.cone_step(ev, tol=0.0)
                if moved is not None:
                    pins += 1
                    self.pin_steps += 1
                    logits, ev_m = moved
                else:
                    if stalled and self.cone_nodes and self.cone_converged(ev):
                        r.converged = True
                        r.stop_reason = ("KKT conditions on the cumulative probabilities of " +
                                         ", ".join(repr(n) for n in self.cone_nodes) + " hold to ptol (the logit "
                                         "gradient is not defined at the kink of their fractions' map) and the "
                                         "residual of the other parameters is below ptol")
                    if not (r.converged and self.saddle_check and self.has_hidden):
                        break
                    found = self.curvature_check(r.logits, ev)
                    if found is None:
                        break
                    if saddles >= MAX_SADDLE_ESCAPES or r.iterations >= s.max_iter:
                        r.converged = False
                        r.stop_reason = (f"a direction of negative curvature remains after {saddles} move(s) off "
                                         f"stationary points that are not maxima (saddles)")
                        break
                    saddles += 1
                    self.saddle_escapes += 1
                    logits, ev_m = found
            elif not self.box_holds(ev):
                # monotone fractions: the active-set step (pin at a bound, or release from one)
                if not (r.converged or stalled):
                    break
                if pins >= MAX_PIN_STEPS or r.iterations >= s.max_iter:
                    r.converged, r.stop_reason = False, self._kkt_reason(ev, f"after {pins} active-set step(s)")
                    break
                moved = self.pin(ev)
                if moved is None and self.cone_nodes:
                    moved = self.cone_step(ev)
                if moved is None:
                    r.converged, r.stop_reason = False, self._kkt_reason(
                        ev, "and no active-set step raised the objective")
                    break
                pins += 1
                self.pin_steps += 1
                logits, ev_m = moved
            else:
                if not (r.converged or stalled):
                    break  # e.g. the iteration limit: the run reports not converged anyway
                if escapes >= MAX_BOUNDARY_ESCAPES or r.iterations >= s.max_iter:
                    r.converged, r.stop_reason = False, self._kkt_reason(ev, f"after {escapes} boundary escape(s)")
                    break
                moved = self.escape(ev)
                if moved is None:
                    r.converged, r.stop_reason = False, self._kkt_reason(
                        ev, "and no move onto those cells raised the objective")
                    break
                escapes += 1
                self.boundary_escapes += 1
                logits, ev_m = moved
            it0 = r.iterations
            cb = None if progress is None else (lambda it, o, g, it0=it0: progress(it0 + it, o, g))
            r2 = self._run_phases(logits, max_iter=s.max_iter - it0, progress=cb)
            r = _Run(r2.logits, r2.value, r.history_obj + [ev_m["objective"]] + r2.history_obj[1:],
                     r.history_gn + [ev_m["gradient_norm"]] + r2.history_gn[1:], it0 + r2.iterations,
                     r2.converged, r2.stop_reason)
        if not r.converged and r.stop_reason.startswith("iteration limit"):
            r.stop_reason = f"iteration limit {s.max_iter} reached"
        if r.converged and self.monotone and s.l2 == 0:
            ev = self.evaluate(r.logits)
            moved = self.pin(ev, final=True)
            if moved is not None and self.kkt_holds(moved[1]):
                r.logits, r.value = moved[0], moved[1]["objective"]
                ev = moved[1]
            if self.cone_nodes:
                # close exactly the constraints of the cone nodes it stopped a hair from, so that
                # the binding set (reported, counted by AIC/BIC, held by the error bars) is exact
                new = {n: ev["probs"][n] for n in self.free}
                changed = False
                for name in self.cone_nodes:
                    T = np.asarray(ev["tables"][name], dtype=np.float64)
                    fam = self._pooled_family(ev["family_counts"], name)
                    snapped = _mono.snap(self.network, name, T, _mono.cell_derivatives(T, fam)[0], fam)
                    if snapped is not None:
                        new[name] = _mono.read_fractions(self.network, name, snapped, floor=_mono.PIN)
                        changed = True
                if changed:
                    cand = self.logits_of(new)
                    ev_c = self.evaluate(cand)
                    if ev_c["objective"] >= ev["objective"] and self.kkt_holds(ev_c):
                        r.logits, r.value = cand, ev_c["objective"]
        return r

    def curvature_check(self, logits: Mapping[str, Any], ev: Mapping[str, Any]):
        """Is the stationary point ``logits`` a saddle? Returns ``(logits, evaluation)`` of a
        strictly better point found along a direction of negative curvature, or None.

        Lanczos iterations (Golub & Van Loan 2013, Matrix Computations, §10.1; full
        re-orthogonalisation) on the Hessian of −F/N in the preconditioned coordinates z, with
        Hessian-vector products by forward differences of the exact gradient, estimate its
        smallest eigenvalue. Where it is below −SADDLE_GATE times the largest, the point is moved
        along the Ritz vector, both ways, by the steps whose quadratic model gains SADDLE_GAINS
        log-likelihood units; the point is called a saddle only if one of those moves raises the
        objective beyond rounding (so a flat direction the data cannot identify, with curvature
        about zero, is never called one)."""
        lay = self.layout
        scale = lay.flatten(self._scale_at(ev))
        pseudo, l2, N = self.pseudo_flat, float(self.settings.l2), float(self.n_total)
        z0 = lay.flatten(logits) / scale
        f0 = -ev["objective"] / N
        g0 = -lay.flatten(ev["grad"]) * scale / N
        n = z0.size
        if n < 2:
            return None
        h = HVP_STEP

        def hvp(v):
            _, g = self.objective_fg(z0 + h * v, scale, pseudo, l2, N)
            return (np.asarray(g) - g0) / h

        found = lanczos_extremes(hvp, n, steps=LANCZOS_STEPS, seed=12345)
        if found is None:
            return None
        lam_min, lam_max, v = found
        if not (lam_max > 0 and lam_min < -SADDLE_GATE * lam_max):
            return None
        best = None
        for gain in SADDLE_GAINS:
            t = math.sqrt(2.0 * gain / (abs(lam_min) * N))
            for sign in (1.0, -1.0):
                cand = lay.unflatten((z0 + sign * t * v) * scale)
                cand = {k: np.array(x) for k, x in cand.items()}
                ev_c = self.evaluate(cand)
                if math.isfinite(ev_c["objective"]) and (best is None or ev_c["objective"] > best[1]["objective"]):
                    best = (cand, ev_c)
        if best is not None and best[1]["objective"] > ev["objective"] + 1e-9 * max(1.0, abs(ev["objective"])):
            return best
        return None

    def _kkt_reason(self, ev: Mapping[str, Any], tail: str) -> str:
        if not self.box_holds(ev):
            name, label, m = self.worst_box(ev)
            if not label:
                return (f"KKT condition violated: the cumulative probabilities of the monotone node {name!r} have a "
                        f"first-order gain of {m:.3g} per record > {self.settings.kkt_tol:g} along a move that keeps "
                        f"its binding constraints {tail}")
            return (f"KKT condition violated: the fraction {label} of the monotone node {name!r} has a first-order "
                    f"gain of {m:.3g} per record > {self.settings.kkt_tol:g} towards a bound {tail}")
        name, label, ratio = self.worst_kkt_cell(ev)
        return (f"KKT condition violated: cell {label} has ratio {ratio:.4g} > 1 + {self.settings.kkt_tol:g} "
                f"(the objective rises if it grows) {tail}")

    def worst_kkt_cell(self, ev: Mapping[str, Any]) -> tuple[str | None, str, float]:
        """(node, readable cell label, ratio) of the largest KKT ratio at an evaluated point."""
        best = (None, "", float("nan"))
        for name, r in (ev.get("kkt") or {}).items():
            if not np.isfinite(r).any():
                continue
            flat = int(np.nanargmax(r))
            val = float(r.ravel()[flat])
            if best[0] is None or val > best[2]:
                best = (name, _cell_label(self.network, name, flat), val)
        return best

    def escape(self, ev: Mapping[str, Any]):
        """Leave a false boundary: raise every cell whose KKT ratio exceeds 1 + kkt_tol to one of
        the levels ``ESCAPE_LEVELS`` (never lower; the other cells of its row scaled down, the
        raised cells of a row together at most 0.5), and keep the level with the best objective
        if it beats the current point. Along such a move the objective's slope is
        (ratio − 1)·(N(u) + Σc) per unit of probability moved, so a small enough level always
        gains; when none of the levels does, a few EM steps (never lowering the objective;
        Dempster, Laird & Rubin 1977) are tried instead. Returns ``(logits, evaluation)`` of the
        new point, or None when nothing raised the objective."""
        tol = self.settings.kkt_tol
        probs, ratios = ev["probs"], ev["kkt"]
        best = None
        for level in ESCAPE_LEVELS:
            new = dict(probs)
            changed = False
            for name in self.free:
                th = np.asarray(probs[name], dtype=np.float64)
                viol = np.nan_to_num(ratios[name], nan=0.0) > 1.0 + tol
                if not viol.any():
                    continue
                t = np.where(viol, np.maximum(th, level), 0.0)
                st = t.sum(axis=-1, keepdims=True)
                t = np.where(st > 0.5, t * (0.5 / np.maximum(st, 1e-300)), t)
                st = t.sum(axis=-1, keepdims=True)
                rest = np.where(viol, 0.0, th)
                sr = rest.sum(axis=-1, keepdims=True)
                row = viol.any(axis=-1, keepdims=True)
                moved = t + rest * ((1.0 - st) / np.where(sr > 0, sr, 1.0))
                new[name] = np.where(row & (sr > 0), moved, th)
                changed = True
            if not changed:
                return None
            cand = self.logits_of(new)
            ev_c = self.evaluate(cand)
            if math.isfinite(ev_c["objective"]) and (best is None or ev_c["objective"] > best[1]["objective"]):
                best = (cand, ev_c)
        if best is not None and best[1]["objective"] > ev["objective"]:
            return best
        cur, logits = ev, None
        for _ in range(10 * EM_POLISH_STEPS):
            new_probs = {n: cur["probs"][n] for n in self.no_em}
            for name in self.em_free:
                num = cur["counts"][name] + self.pseudo[name]
                den = num.sum(axis=-1, keepdims=True)
                new_probs[name] = np.where(den > 0, num / np.where(den > 0, den, 1.0), cur["probs"][name])
            cand = self.logits_of(new_probs)
            ev_c = self.evaluate(cand)
            if not (math.isfinite(ev_c["objective"]) and ev_c["objective"] >= cur["objective"]):
                break
            cur, logits = ev_c, cand
            if self.kkt_holds(cur):
                break
        if logits is not None and cur["objective"] > ev["objective"]:
            return logits, cur
        return None

    def _run_phases(self, logits0: Mapping[str, Any], *, max_iter: int,
                    progress: Callable[[int, float, float], None] | None = None) -> _Run:
        """The preconditioned quasi-Newton (or Adam) phases of one start, up to ``max_iter``
        iterations, with the stopping rule in logits. The per-iteration value and gradient are
        those the optimiser computed anyway; the exact residual is evaluated only when a
        stopping rule fires. :meth:`run` adds the KKT check and the boundary escapes."""
        s = self.settings
        N = self.n_total
        logits = {k: np.asarray(logits0[k], dtype=np.float64) for k in self.free}
        ev = self.evaluate(logits)
        hist_obj = [ev["objective"]]
        hist_gn = [ev["gradient_norm"]]
        it = 0
        gtol_abs = s.gtol * N
        lay = self.layout
        pseudo = self.pseudo_flat
        l2 = float(s.l2)
        n_total = float(N)
        stop_reason, converged = "", False
        if not math.isfinite(ev["objective"]):
            return _Run(logits, ev["objective"], hist_obj, hist_gn, 0, False, "objective not finite at the start")
        stalled_phases = 0
        n_phase = 0
        while it < max_iter and not converged:
            if ev["gradient_norm"] <= gtol_abs:
                converged, stop_reason = True, "gradient norm below gtol"
                break
            scale = lay.flatten(self._scale_at(ev))
            phase_len = PHASE_LENGTHS[min(n_phase, len(PHASE_LENGTHS) - 1)] if s.method == "lbfgs" else max_iter
            n_phase += 1

            def fg(zz):
                return self.objective_fg(zz, scale, pseudo, l2, n_total)

            z = lay.flatten(logits) / scale
            # ``ev`` holds the value and expected counts at this very point: −F/N and its
            # gradient in z (∂F/∂η times the scale) follow without another evaluation
            f = -ev["objective"] / N
            g = -lay.flatten(ev["grad"]) * scale / N
            if s.method == "lbfgs":
                state = _lbfgs_init(s.memory, z)
            else:
                state = _adam_init(s.learning_rate, z)
            phase_start = it
            prev = f
            flat_count = 0
            stop_phase = False
            while it < max_iter:
                if s.method == "lbfgs":
                    d, state = self.lbfgs_direction(s.memory, g, state, z)
                    d = -np.asarray(d)
                    # First step of a phase (empty memory: the direction is the gradient capped to
                    # norm 1). Under the preconditioner the complete-data curvature of F in z is
                    # about the identity, that of f = −F/N about I/N: try the step −N·g (the
                    # complete-data Newton step) instead of a unit step N times too short.
                    a0 = N * math.sqrt(_dot(g, g) / max(_dot(d, d), 1e-300)) if it == phase_start else 1.0
                    alpha, f_new, g_new, _ = wolfe_line_search(fg, z, f, g, d, alpha0=a0)
                    if alpha is None:
                        # No decrease along the direction: either the objective is flat to
                        # machine precision (converged if the residual is small) or the
                        # quasi-Newton memory is stale (restart the phase).
                        cand = lay.unflatten(z * scale)
                        ev_c = self.evaluate(cand)
                        if ev_c["residual"] <= s.ptol or ev_c["gradient_norm"] <= gtol_abs:
                            logits, ev = cand, ev_c
                            converged = True
                            stop_reason = ("gradient norm below gtol" if ev_c["gradient_norm"] <= gtol_abs
                                           else "objective flat to machine precision, residual below ptol")
                            break
                        if it - phase_start <= 1:
                            stop_reason = "line search found no better point"
                        stop_phase = True
                        break
                    z = z + alpha * d
                    f, g = f_new, g_new
                else:
                    z, state = _adam_update(s.learning_rate, g, state, z)
                    z = np.asarray(z)
                    f, g = fg(z)
                it += 1
                if not math.isfinite(f):
                    stop_reason = "objective not finite"
                    stop_phase = True
                    break
                obj = -f * N
                gv = N * g / scale
                gn = math.sqrt(float(np.dot(gv, gv)))
                hist_obj.append(obj)
                hist_gn.append(gn)
                if progress is not None:
                    progress(it, obj, gn)
                rel = abs(f - prev) / max(1.0 / N, abs(f))
                prev = f
                flat_count = flat_count + 1 if rel < s.tol else 0
                if gn <= gtol_abs or flat_count >= 5:
                    cand = lay.unflatten(z * scale)
                    ev_c = self.evaluate(cand)
                    if ev_c["gradient_norm"] <= gtol_abs:
                        logits, ev = cand, ev_c
                        converged, stop_reason = True, "gradient norm below gtol"
                        break
                    if flat_count >= 5 and ev_c["residual"] <= s.ptol:
                        logits, ev = cand, ev_c
                        converged, stop_reason = True, "relative change below tol"
                        break
                    if flat_count >= 5:
                        stop_phase = True  # stalled with a large residual: rescale and restart
                        break
                if it - phase_start >= phase_len:
                    break  # refresh the preconditioner
            if converged:
                break
            cand = lay.unflatten(z * scale)
            ev_c = self.evaluate(cand)
            resid_before = ev["residual"]
            if math.isfinite(ev_c["objective"]) and ev_c["objective"] >= ev["objective"]:
                logits, ev = cand, ev_c
            if stop_phase and s.l2 == 0 and ev["residual"] > s.ptol:
                # The quasi-Newton phase stalled with a residual above ptol: typically cells whose
                # estimate is on the boundary (their logits must run off to -inf, which a
                # line search along exponentially flat directions does slowly). A few EM steps
                # computed from the same expected counts, θ ← (N + c)/(N(u) + Σc), never lower
                # the objective (Dempster, Laird & Rubin 1977, Theorem 1) and set such cells to
                # (near) zero at once; the next phase then resumes the quasi-Newton method.
                for _ in range(EM_POLISH_STEPS):
                    new_probs = {n: ev["probs"][n] for n in self.no_em}
                    for name in self.em_free:
                        num = ev["counts"][name] + self.pseudo[name]
                        den = num.sum(axis=-1, keepdims=True)
                        new_probs[name] = np.where(den > 0, num / np.where(den > 0, den, 1.0), ev["probs"][name])
                    cand = self.logits_of(new_probs)
                    ev_c = self.evaluate(cand)
                    if not (math.isfinite(ev_c["objective"]) and ev_c["objective"] >= ev["objective"] - 1e-12 * abs(ev["objective"])):
                        break
                    logits, ev = cand, ev_c
                    self.em_polish_steps += 1
                    if ev["residual"] <= s.ptol or ev["gradient_norm"] <= gtol_abs:
                        break
            if self.monotone and s.l2 == 0 and ev["residual"] > s.ptol:
                # the active-set step between phases: fractions whose derivative points at a
                # bound they are creeping to are put on it (kept only if the objective rises)
                moved = self.pin(ev, near=PIN_DISTANCE)
                if moved is not None:
                    logits, ev = moved
                    self.pin_steps += 1
            if ev["gradient_norm"] <= gtol_abs:
                converged, stop_reason = True, "gradient norm below gtol"
                break
            if ev["residual"] <= s.ptol and stop_phase and flat_count >= 5:
                converged, stop_reason = True, "relative change below tol"
                break
            progressed = ev["residual"] < 0.9 * resid_before
            stalled_phases = 0 if progressed else stalled_phases + 1
            if stop_phase and stalled_phases >= 3:
                stop_reason = stop_reason or "no further progress after rescaling"
                break
        if not converged and not stop_reason:
            stop_reason = f"iteration limit {max_iter} reached"
        return _Run(logits, ev["objective"], hist_obj, hist_gn, it, converged, stop_reason)


# --------------------------------------------------------------------------- starts
def complete_family_start(network: Network, data: CodedData, rng: np.random.Generator,
                          pseudo: Mapping[str, np.ndarray] | None = None, *,
                          observed: tuple[np.ndarray, np.ndarray | None] | None = None) -> dict[str, np.ndarray]:
    """Start from the counts of rows in which a node and all its parents are observed.

    Families that include a latent node (never observed together) get a random Dirichlet(1)
    draw, which also breaks the symmetry between latent states. Half a record is added to
    every cell so that no start sits on the boundary.

    ``observed``: those counts already summed over some of the rows, as
    :meth:`adfit.likelihood.Likelihood.observed_family_counts` gives them (``(flat counts,
    mask of the rows counted)``); only the other rows are then counted here.
    """
    need = [name for name in network.free_names
            if not any(network.nodes[j].latent for j in (*map(network.index, network.node(name).parents), network.index(name)))]
    if observed is not None:
        from .likelihood import layout_of

        flat, counted = observed
        offsets = layout_of(network)[0]
        rest = None if counted is None else ~np.asarray(counted, dtype=bool)
        extra = complete_family_counts(network, data, need, rows=rest) if rest is not None and rest.any() else {}
        counts = {}
        for name in need:
            shape = network.cpt_shape(name)
            off = offsets[network.index(name)]
            c = np.asarray(flat[off:off + math.prod(shape)], dtype=np.float64).reshape(shape)
            counts[name] = c + extra[name] if name in extra else c
    else:
        counts = complete_family_counts(network, data, need)
    out = {}
    for name in network.free_names:
        node = network.node(name)
        shape = network.cpt_shape(name)
        if name not in counts:
            out[name] = rng.dirichlet(np.ones(node.card), size=shape[:-1]).reshape(shape)
            continue
        cnt = counts[name] + 0.5
        if pseudo is not None and name in pseudo:
            cnt = cnt + pseudo[name]
        out[name] = cnt / cnt.sum(axis=-1, keepdims=True)
    for name in network.fixed_names:
        out[name] = network.fixed_table(name)
    return out


#: rows of the code matrix handled at a time by :func:`complete_family_counts` (transposed blocks)
COUNT_BLOCK = 1 << 16


def complete_family_counts(network: Network, data: CodedData, names: Iterable[str],
                           rows: np.ndarray | None = None) -> dict[str, np.ndarray]:
    """For each node of ``names``: the summed weights of the rows (all, or those of the bool mask
    ``rows``) in which the node and all its parents are observed, by family configuration
    (CPT-shaped). The codes are read in blocks of rows, transposed so that each family member
    is a contiguous column (a row-major column read costs a pass over the whole block)."""
    codes, w = data.codes, np.asarray(data.counts, dtype=np.float64)
    names = list(names)
    fams = {name: [network.index(p) for p in network.node(name).parents] + [network.index(name)] for name in names}
    shapes = {name: tuple(network.cpt_shape(name)) for name in names}
    out = {name: np.zeros(math.prod(shapes[name])) for name in names}
    if not names:
        return {}
    sel = None if rows is None else np.flatnonzero(rows)
    R = len(codes) if sel is None else len(sel)
    for s0 in range(0, R, COUNT_BLOCK):
        if sel is None:
            blk, wb = codes[s0:s0 + COUNT_BLOCK], w[s0:s0 + COUNT_BLOCK]
        else:
            ix = sel[s0:s0 + COUNT_BLOCK]
            blk, wb = codes[ix], w[ix]
        cT = np.ascontiguousarray(blk.T)
        hid = cT < 0
        for name in names:
            fam, shape = fams[name], shapes[name]
            bad = np.zeros(cT.shape[1], bool)
            idx = np.zeros(cT.shape[1], np.intp)
            stride = 1
            for u, card in zip(reversed(fam), reversed(shape)):
                bad |= hid[u]
                idx += np.multiply(cT[u], stride, dtype=np.intp)  # widened: the codes may be int8
                stride *= card
            ok = ~bad
            if ok.all():
                out[name] += np.bincount(idx, weights=wb, minlength=stride)
            else:
                out[name] += np.bincount(idx[ok], weights=wb[ok], minlength=stride)
    return {name: out[name].reshape(shapes[name]) for name in names}


def default_starts(network: Network, fitter: "Fitter", start: Mapping[str, np.ndarray]) -> tuple[int, str | None, float]:
    """The number of starts when the user gave none: 1 for a network without latent nodes (its
    likelihood may still have several maxima, but complete-family counts start near the
    complete-data answer), ``LATENT_STARTS`` with latent nodes (latent-class practice runs
    several starts; measured in docs/performance.md), fewer when one objective evaluation is so
    slow that the starts, at about ``EVALS_PER_START`` evaluations each, would take more than
    ``AUTO_STARTS_SECONDS``. Returns ``(starts, note, seconds per evaluation)``, the note saying
    why fewer were run (seconds: NaN when not measured)."""
    if not any(n.latent for n in network.nodes):
        return 1, None, float("nan")
    fitter.counts(start)  # the first call compiles (the plan's programs, implied tables): not timed
    t = time.perf_counter()
    fitter.counts(start)
    per_eval = time.perf_counter() - t
    k = LATENT_STARTS
    while k > 1 and k * EVALS_PER_START * per_eval > AUTO_STARTS_SECONDS:
        k -= 1
    if k < LATENT_STARTS:
        return k, (f"{k} start(s) instead of {LATENT_STARTS}: one evaluation takes {per_eval:.2g} s, "
                   f"{LATENT_STARTS} starts would take about {LATENT_STARTS * EVALS_PER_START * per_eval:.0f} s"), per_eval
    return k, None, per_eval


def em_burn_in(fitter: "Fitter", probs: Mapping[str, np.ndarray], steps: int) -> dict[str, np.ndarray]:
    """``steps`` EM steps θ ← (N + c)/(N(u) + Σc) from ``probs`` with the fitter's expected
    counts (the exact E-step of the likelihood core; Dempster, Laird & Rubin 1977): the
    burn-in that latent-class practice runs from random starts before a faster optimiser
    (each step never lowers the objective; from a random point the first steps climb most).
    Rows no record informs keep their values. Fixed nodes are left as they are."""
    out = {k: np.asarray(v, dtype=np.float64) for k, v in probs.items()}
    for _ in range(int(steps)):
        _, counts = fitter.counts(out)
        for name in fitter.em_free:
            num = counts[name] + fitter.pseudo[name]
            den = num.sum(axis=-1, keepdims=True)
            out[name] = np.where(den > 0, num / np.where(den > 0, den, 1.0), out[name])
    return out


def _em_refusal(network: Network) -> str | None:
    """Why the EM cross-check cannot run on ``network`` (a structure EM does not estimate), or None."""
    from .em import SUPPORTED_STRUCTURE as em_supported

    return network.unsupported_structure(em_supported, what="the EM cross-check")


def check_impossible_cells(network: Network, data: CodedData) -> None:
    """Raise ImpossibleDataError naming the first record whose observed cells put a node and all
    its parents in a configuration the network calls impossible (``impossible`` cells)."""
    codes = np.asarray(data.codes)
    for node in network.nodes:
        if not node.impossible or node.fixed is not None:
            continue
        fam = [network.index(p) for p in node.parents] + [network.index(node.name)]
        sub = codes[:, fam]
        ok = np.all(sub >= 0, axis=1)
        if not ok.any():
            continue
        shape = network.cpt_shape(node.name)
        flat = np.ravel_multi_index(tuple(sub[ok].T), shape)
        mask = network.impossible_mask(node.name).ravel()
        hit = np.flatnonzero(mask[flat])
        if hit.size:
            row = int(np.flatnonzero(ok)[hit[0]])
            r, k = divmod(int(flat[hit[0]]), node.card)
            cfg = ", ".join(f"{p}={v}" for p, v in zip(node.parents, network.parent_config_labels(node.name)[r]))
            from .data import decode

            rec = decode(network, codes[row:row + 1]).to_dict("records")[0]
            shown = ", ".join(f"{c}={v}" for c, v in rec.items() if v is not None)
            n = float(np.sum(np.asarray(data.counts)[np.flatnonzero(ok)[hit]]))
            raise ImpossibleDataError(
                f"{data.source}: {n:g} record(s) have {node.name}={node.states[k]} with {cfg or 'no parents'}, a cell "
                f"the network declares impossible (nodes.{node.name}.impossible), e.g. [{shown}]; correct the "
                f"records or the network")


def _row_form_starts(network: Network, probs: Mapping[str, np.ndarray]) -> dict[str, np.ndarray]:
    """Starting CPTs with each noisy or logistic node's replaced by the parameter rows read off
    it (:func:`adfit.forms.start_rows`); rows given already (their shape) are kept."""
    out = dict(probs)
    for name in network.estimated_names:
        if _forms.has_rows(network, name) and np.shape(out[name]) == tuple(network.cpt_shape(name)):
            out[name] = _forms.start_rows(network, name, out[name])
    return out


def form_sections(network: Network, probs: Mapping[str, np.ndarray]) -> dict[str, dict[str, Any]]:
    """``{name: {"cpd": form, "parameters": ...}}`` for every noisy or logistic node (tied copies
    included), from the fitter's parameter rows (:func:`adfit.forms.parameters_json`)."""
    out = {}
    for name in network.free_names:
        if _forms.has_rows(network, name):
            src = network.tie_source(name)
            out[name] = {"cpd": network.cpd_form(src), "parameters": _forms.parameters_json(network, src, probs[src])}
            if _forms.is_monotone(network, src):
                out[name]["increasing_with"] = list(network.node(src).increasing_with)
                out[name]["binding"] = _mono.binding(network, src, probs[src],
                                                     _forms.implied_table(network, src, probs[src]))
    return out


def random_start(network: Network, rng: np.random.Generator) -> dict[str, np.ndarray]:
    out = {}
    for name in network.free_names:
        if _forms.has_rows(network, name):
            out[name] = _forms.random_rows(network, name, rng)
            continue
        shape = network.cpt_shape(name)
        out[name] = rng.dirichlet(np.ones(shape[-1]), size=shape[:-1]).reshape(shape)
    for name in network.fixed_names:
        out[name] = network.fixed_table(name)
    return out


def stationarity_section(fitter: Fitter, ev: Mapping[str, Any]) -> dict[str, Any]:
    """The result's ``"stationarity"`` section at the returned point: the largest simplex KKT
    ratio (``kkt_ratio``; None with an L2 penalty, where the logit rule is the whole condition),
    the cell where it is reached, how many cells exceed 1 + kkt_tol, the largest per-row
    residual in probability units, and the number of boundary escapes the fit made."""
    tol = fitter.settings.kkt_tol
    name, label, ratio = fitter.worst_kkt_cell(ev) if ev.get("kkt") is not None else (None, "", float("nan"))
    over = 0
    if ev.get("kkt") is not None:
        over = int(sum(int(np.sum(np.nan_to_num(r, nan=0.0) > 1.0 + tol)) for r in ev["kkt"].values()))
    return {"kkt_ratio": None if name is None else ratio, "kkt_tol": tol,
            "kkt_worst_cell": label or None, "cells_over_tolerance": over,
            "max_residual": ev["residual"], "boundary_escapes": int(fitter.boundary_escapes),
            "saddle_escapes": int(fitter.saddle_escapes),
            **({"monotone": _monotone_stationarity(fitter, ev)} if fitter.monotone else {}),
            "holds": bool(fitter.kkt_holds(ev))}


def _monotone_stationarity(fitter: "Fitter", ev: Mapping[str, Any]) -> dict[str, Any]:
    """The KKT check of the monotone nodes at the returned point: the largest measure (a
    fraction's :func:`adfit.monotone.box_kkt` or, for a node along two or more parents, the
    residual of :func:`adfit.monotone.cone_kkt`; both first-order gain per record served; None
    with an L2 penalty), its fraction ("" for a cone node), each cone node's residual, the
    fractions on a bound, the active-set steps taken."""
    name, label, m = fitter.worst_box(ev) if ev.get("box") else (None, "", float("nan"))
    on = {n: int(np.sum(np.min(np.asarray(ev["probs"][n]), axis=1) <= _mono.BOUND_TOL)) for n in fitter.monotone}
    out = {"box_kkt": None if not ev.get("box") else m, "worst_fraction": label or None,
           "fractions_on_a_bound": on, "active_set_steps": int(fitter.pin_steps)}
    if fitter.cone_nodes:
        out["cone_kkt"] = {n: (None if not ev.get("cone") else float(ev["cone"][n][0])) for n in fitter.cone_nodes}
    return out


# --------------------------------------------------------------------------- the public API
def fit(network: Network, data: Any, *, method: str = "lbfgs", seed: int = 0, restarts: int | None = None,
        tol: float = 1e-10, gtol: float = 1e-9, ptol: float = 1e-8, max_iter: int = 1000, prior: Any = None,
        pseudo_counts: Mapping[str, np.ndarray] | None = None, l2: float = 0.0,
        init: Mapping[str, np.ndarray] | None = None, learning_rate: float = 0.05,
        missing: Iterable[str] | None = None, count_column: str | None = None,
        ignore_columns: Iterable[str] = (), route: str = "auto", batch_size: int | None = None,
        em_check: bool = False, em_max_iter: int | None = None,
        progress: Callable[[int, int, float, float], None] | None = None, warn: bool = True,
        kkt_tol: float = KKT_TOL, saddle_check: bool = True, likelihood: Likelihood | None = None) -> FitResult:
    """Fit the free CPTs of ``network`` to ``data`` by maximising the marginal likelihood.

    Args:
        network: the network (see :func:`adfit.load_network`).
        data: a path (CSV/Parquet), a DataFrame, or :class:`adfit.CodedData`.
        method: ``"lbfgs"`` (default) or ``"adam"``.
        seed: seed of every random start (results are deterministic given the seed).
        restarts: number of starts; the first is from complete-family counts, the others are
            random Dirichlet draws (each followed by ``BURN_IN_STEPS`` EM steps when the network
            has latent nodes). None (default): :func:`default_starts` — one start, or
            ``LATENT_STARTS`` when the network has latent nodes (fewer when one evaluation is so
            slow that they would take more than ``AUTO_STARTS_SECONDS``). The best objective is kept; all are listed in
            ``result.extras["restarts"]``.
        tol, gtol, ptol, max_iter: stopping rule (module docstring).
        kkt_tol: tolerance of the simplex KKT check (:func:`kkt_ratios`): a result is converged
            only if no cell's ratio exceeds 1 + kkt_tol.
        saddle_check: at a converged point of data with hidden cells, look for a direction of
            negative curvature (:meth:`Fitter.curvature_check`) and move off it (default True).
        prior: an :class:`adfit.priors.Prior` (or anything with ``pseudo_counts(network)``).
        pseudo_counts: explicit pseudo-counts per free node (alternative to ``prior``).
        l2: strength λ of the penalty λ Σ (η − row mean η)².
        init: starting CPTs (probabilities, free nodes) for the first start.
        route: elimination route, see :func:`adfit.likelihood.build_plan`.
        batch_size: with ``method="adam"``, minibatch gradients from this many sampled distinct
            rows per step (:mod:`adfit.minibatch`); the full-data gradient norm is reported at
            the end and decides ``converged``.
        em_check: also run the independent EM reference from the answer and from its own start
            (:func:`adfit.crosscheck.em_check`); its verdict goes to ``result.extras["em_check"]``.
        em_max_iter: with ``em_check``, the iteration cap of each EM run (default
            :data:`adfit.crosscheck.EM_MAX_ITER`).
        progress: called as ``progress(start, iteration, objective, gradient_norm)``.
        likelihood: a :class:`adfit.likelihood.Likelihood` already built for this ``network``
            and this ``data`` (``data`` the same :class:`adfit.CodedData` object), to reuse its
            plan and compiled programs (a command builds one and passes it to the fit, the error
            bars and the EM check); ``route`` is then the one it was built with.

    Returns:
        A frozen :class:`adfit.result.FitResult`. A :class:`ConvergenceWarning` is issued when
        the stopping rule did not hold.
    """
    settings = FitSettings(method=method, tol=tol, gtol=gtol, ptol=ptol, max_iter=max_iter,
                           learning_rate=learning_rate, l2=l2, batch_size=batch_size, kkt_tol=kkt_tol)
    settings.validate()
    if restarts is not None and restarts < 1:
        raise OptionError(f"--restarts must be >= 1, got {restarts}")
    if em_check and l2:
        raise OptionError("em_check covers the likelihood and Dirichlet priors, not the L2 penalty; use l2=0")
    if em_check and (refusal := _em_refusal(network)) is not None:
        raise OptionError(f"{refusal} (or fit without {option('em_check')})")
    if em_max_iter is not None:
        from .crosscheck import check_em_max_iter

        check_em_max_iter(em_max_iter)
    coded = load_data(network, data, missing=missing, count_column=count_column, ignore_columns=ignore_columns)
    prior_desc = None
    if prior is not None:
        if pseudo_counts is not None:
            raise OptionError("give either prior or pseudo_counts, not both")
        prior_desc = prior.describe(network) if hasattr(prior, "describe") else None
        pseudo_counts = resolve_pseudo_counts(prior, network)
    elif pseudo_counts is not None:
        pseudo_counts = resolve_pseudo_counts(pseudo_counts, network)  # validates shapes and signs
    if not network.free_names:
        raise OptionError("every CPT of the network is fixed; nothing to estimate (use `adfit score` instead)")
    t0 = time.perf_counter()
    if likelihood is not None:
        likelihood = _prepared(likelihood, network, coded, "fit")
    fitter = Fitter(network, coded, settings=settings, pseudo_counts=pseudo_counts, route=route,
                    likelihood=likelihood)
    fitter.saddle_check = bool(saddle_check)
    rng = np.random.default_rng(seed)
    p0 = dict(init) if init is not None else complete_family_start(
        network, coded, rng, {k: v for k, v in fitter.pseudo.items() if not _forms.has_rows(network, k)},
        observed=fitter.lik.observed_family_counts())
    for name in network.fixed_names:
        p0[name] = network.fixed_table(name)
    p0 = _row_form_starts(network, p0)
    p0 = estimated_starts(network, p0)
    check_impossible_cells(network, coded)
    check_possible(fitter.lik, fitter.tables(p0),
                   given="the starting CPTs (init)" if init is not None else "the first start")
    auto_starts = restarts is None
    latent = any(n.latent for n in network.nodes)
    batched = True
    if auto_starts:
        restarts, starts_note, per_eval = default_starts(network, fitter, p0)
        # side by side (one vmapped program, compiled once: about a second or more) only where
        # the evaluations are slow enough for that to pay; otherwise one after the other
        batched = not (per_eval < BATCH_MIN_EVAL_SECONDS)
    else:
        starts_note = None
    if fitter.layout.implied:
        batched = False  # the side-by-side program evaluates tables, not parameter rows
    starts = [p0]
    for k in range(1, restarts):
        pk = random_start(network, rng)
        starts.append(em_burn_in(fitter, pk, BURN_IN_STEPS) if latent else pk)
    finals, restart_stats = None, {}
    if restarts == 1:
        cb = None if progress is None else (lambda it, o, g: progress(0, it, o, g))
        runs = [fitter.run(logits_from_probs(network, starts[0]), progress=cb)]
    else:
        # the K starts side by side, each objective evaluation of all K in one vmapped call
        from .restarts import run_starts

        runs, finals = run_starts(fitter, [logits_from_probs(network, p0) for p0 in starts], progress=progress,
                                  stats=restart_stats, batched=batched)
    best_k = int(np.nanargmax([r.value if math.isfinite(r.value) else -np.inf for r in runs]))
    best = runs[best_k]
    ev = fitter.evaluate(best.logits)
    tables = ev["tables"]
    elapsed = time.perf_counter() - t0
    is_map = any(np.any(c > 0) for c in fitter.pseudo.values())
    restart_rows = [{"start": k, "kind": "complete-family counts" if k == 0 and init is None else ("given" if k == 0 else "random Dirichlet"),
                     "objective": r.value, "iterations": r.iterations, "converged": r.converged,
                     "gradient_norm": r.history_gn[-1]} for k, r in enumerate(runs)]
    from .restarts import local_optima_message, restarts_report

    stationarity = stationarity_section(fitter, ev)
    finals = finals if finals is not None else [ev]
    if fitter.layout.implied:  # the optima are compared on their CPTs (parameter rows imply them)
        finals = [{**f, "probs": f["tables"], "counts": f["family_counts"]} for f in finals]
    restarts_section = restarts_report(network, restart_rows, finals, best=best_k,
                                       gtol_abs=gtol * coded.n_rows, ptol=ptol, batch_width=restart_stats.get("width", 1))
    result = FitResult(
        network=network, method=method, objective="map" if is_map else "mle", probs=tables,
        log_likelihood=ev["log_likelihood"], log_prior=ev["log_prior"], penalty=ev["penalty"],
        gradient_norm=ev["gradient_norm"], converged=best.converged, stop_reason=best.stop_reason,
        iterations=best.iterations, history={"objective": tuple(best.history_obj), "gradient_norm": tuple(best.history_gn)},
        n_rows=coded.n_rows, n_distinct=coded.n_distinct, seed=seed,
        settings={"tol": tol, "gtol": gtol, "ptol": ptol, "max_iter": max_iter, "l2": l2, "restarts": restarts,
                  "restarts_chosen_by": "default" if auto_starts else "user",
                  **({"burn_in_em_steps": BURN_IN_STEPS} if latent and restarts > 1 else {}),
                  "route": fitter.lik.plan.route, "elapsed_s": elapsed, "max_residual": ev["residual"],
                  "em_polish_steps": fitter.em_polish_steps, "kkt_tol": kkt_tol,
                  **({"learning_rate": learning_rate} if method == "adam" else {}),
                  **({"batch_size": batch_size} if batch_size else {})},
        extras={"restarts": restarts_section, "best_start": best_k, "stationarity": stationarity,
                **({"prior": prior_desc} if prior_desc else {}),
                **({"nodes": form_sections(network, ev["probs"])} if fitter.layout.implied else {})},
    )
    if is_map:
        parent_weight = {n: ev["counts"][n].sum(axis=-1) for n in network.estimated_names
                         if not _forms.has_rows(network, n)}
        only = prior_only_rows(network, parent_weight, fitter.pseudo)
        if only:
            labels = describe_rows(network, only)
            result = result.with_extras(prior_only_rows={"rows": only, "labels": labels,
                                                          "note": "no record informs these parent configurations: "
                                                                  "the estimate there is the prior mode"})
            if warn:
                warnings.warn(f"{len(labels)} CPT row(s) are informed by the prior only (no records): "
                              f"{'; '.join(labels[:5])}{' ...' if len(labels) > 5 else ''}",
                              IdentifiabilityWarning, stacklevel=2)
    if latent and restarts == 1:
        one = (starts_note or "the fit ran one start") + (
            ": with latent nodes local optima are likely; run --restarts 4 (or more) and compare the optima")
        result = result.with_extras(starts_note=one)
        if warn:
            warnings.warn(one, LocalOptimaWarning, stacklevel=2)
    if warn and (msg := local_optima_message(restarts_section)):
        warnings.warn(msg, LocalOptimaWarning, stacklevel=2)
    if em_check:
        if l2:
            raise OptionError("em_check covers the likelihood and Dirichlet priors, not the L2 penalty; use l2=0")
        from .crosscheck import attach_em_check

        result = attach_em_check(result, coded, pseudo_counts=fitter.pseudo if is_map else None, seed=seed,
                                 likelihood=fitter.lik, **({} if em_max_iter is None else {"max_iter": em_max_iter}))
    if warn and not best.converged:
        warnings.warn(f"the fit did not converge ({best.stop_reason}); gradient norm {ev['gradient_norm']:.3g}. "
                      f"Raise --max-iter or check the model", ConvergenceWarning, stacklevel=2)
    return result

"""Monotone CPTs (network key ``increasing_with``) in the gradient fit: the map from "fractions"
to a CPT whose rows are stochastically ordered.

A node with ``increasing_with = [p, ...]`` (on a table node) has, for every state ``y`` of its own
and every parent configuration ``u``, the cumulative probability ``F_u(y) = P(child ≤ y | u)``
non-increasing when one listed parent moves up one state with the others fixed (first-order
stochastic dominance; e.g. Shaked & Shanthikumar 2007, Stochastic Orders, §1.A). With ``pred(u)``
the configurations one listed parent lower than ``u``, the constraints are exactly

    F_u(y − 1) ≤ F_u(y) ≤ min over pred(u) of F_pred(y)          (y = 0 … K−2)

(the left one makes the row a distribution; the right one is the dominance over one step;
longer steps follow by transitivity). The interval is never empty: by induction
``F_u(y − 1) ≤ F_pred(y − 1) ≤ F_pred(y)``. So every monotone table is

    F_u(y) = F_u(y − 1) + (min_pred F_pred(y) − F_u(y − 1)) · σ_{u,y},   σ_{u,y} ∈ [0, 1],

computed in the table's row order (a predecessor comes before its successors), and every choice
of the **fractions** σ in the box gives a monotone table: the constraints hold by construction,
not by clipping. σ = 0 puts the cell ``P(y | u)`` at 0; σ = 1 makes the dominance constraint
between ``u`` and its lowest predecessor bind (equal cumulative probabilities at ``y``).

In the free vector each fraction is a two-state row ``(1 − σ, σ)`` (a softmax pair, so that the
layer's heads of :mod:`adfit.params` apply unchanged); its log-probabilities enter here
separately, ``1 − σ`` and ``σ`` are never formed by subtraction. The survival function
``S = 1 − F`` runs through the same recursion (with the max over predecessors), so that cells
near 1 and near 0 both keep their precision; each cell ``P(y | u) = σ_{u,y} · (room left)`` is
computed as a product, its log as a sum.

The fractions sit in a box, not on a simplex of counts: the implied table is not linear in a
fraction row with non-negative coefficients, so the simplex KKT ratio and the EM growth step of
:mod:`adfit.forms` do not apply to them. The fit checks the box KKT conditions instead
(:func:`box_kkt`) and pins fractions at their bounds by an active-set rule (:mod:`adfit.fit`,
docs/method.md "Monotone CPTs").
"""

from __future__ import annotations

import math
from functools import lru_cache

from ._jax import jax, jnp  # first: float64 on (adfit/_jax.py)
import numpy as np

from .network import Network

__all__ = ["is_monotone", "fraction_shape", "fraction_labels", "implied_log_table", "read_fractions",
           "fractions_from_table", "dsigma", "box_kkt", "binding", "cone_kkt", "cone_steps", "face_newton", "face_dimension", "binding_mask", "binding_normals", "snap", "cell_derivatives",
           "table_from_cumulative", "needs_cone", "PIN", "BOUND_TOL"]

#: distance from a bound at which the fit pins a fraction (σ = PIN or 1 − PIN): the objective
#: then differs from the bound's by about PIN × the records served, and the logit gradient of the
#: pinned coordinate is PIN times its derivative (it stays put)
PIN = 1e-16
#: a fraction this close to a bound counts as on it (binding constraint, cell at 0)
BOUND_TOL = 1e-9


def is_monotone(network: Network, name: str) -> bool:
    """Whether ``name`` (or its tie source) is a table node with ``increasing_with``."""
    n = network.node(network.tie_source(name))
    return n.fixed is None and n.cpd == "table" and bool(n.increasing_with)


def needs_cone(network: Network, name: str) -> bool:
    """Whether the node's fractions map through a min over several predecessors (two or more
    listed parents): its stationarity is then checked by :func:`cone_kkt`, not :func:`box_kkt`."""
    return is_monotone(network, name) and len(network.node(network.tie_source(name)).increasing_with) > 1


def fraction_shape(network: Network, name: str) -> tuple[int, int]:
    """``(R·(K − 1), 2)``: one two-state row per (parent configuration, state but the last)."""
    src = network.tie_source(name)
    R = network.n_parent_configs(src)
    return R * (network.node(src).card - 1), 2


@lru_cache(maxsize=256)
def _structure(network: Network, name: str):
    """Static index arrays: the configurations by level (sum of the listed parents' state
    indices: each depends only on the level before), and their predecessors (padded with the
    sentinel index R, whose F is 1 and S is 0: no constraint)."""
    src = network.node(network.tie_source(name))
    cards = [network.node(p).card for p in src.parents]
    R = int(math.prod(cards))
    axes = [src.parents.index(p) for p in src.increasing_with]
    grid = np.array(list(np.ndindex(*cards)), dtype=np.int64).reshape(R, len(cards))
    strides = np.array([int(math.prod(cards[i + 1:])) for i in range(len(cards))], dtype=np.int64)
    level = grid[:, axes].sum(axis=1) if axes else np.zeros(R, np.int64)
    pred = np.full((R, max(1, len(axes))), R, dtype=np.int64)
    for j, a in enumerate(axes):
        up = grid[:, a] > 0
        pred[up, j] = np.flatnonzero(up) - strides[a]
    groups = tuple((np.flatnonzero(level == lv), pred[level == lv]) for lv in np.unique(level))
    return R, src.card, groups


def _safe_log(x):
    pos = x > 0
    return jnp.where(pos, jnp.log(jnp.where(pos, x, 1.0)), -jnp.inf)


def implied_log_table(network: Network, name: str, logv):
    """log P(child | parents) (CPT-shaped, JAX) from the log fraction rows ``logv``
    (``fraction_shape``; column 0 is log(1 − σ), column 1 log σ)."""
    R, K, groups = _structure(network, name)
    src = network.tie_source(name)
    lv = logv.reshape(R, K - 1, 2)
    v0, v1 = jnp.exp(lv[..., 0]), jnp.exp(lv[..., 1])
    F_prev = jnp.zeros(R)
    S_prev = jnp.ones(R)
    cols = []
    for y in range(K - 1):
        F = jnp.ones(R + 1)                       # sentinel R: no predecessor, F = 1 ...
        S = jnp.zeros(R + 1)                      # ... and S = 0
        W = jnp.zeros(R)
        for idx, pred in groups:
            ub = jnp.min(F[pred], axis=1)
            sm = jnp.max(S[pred], axis=1)
            fp, sp = F_prev[idx], S_prev[idx]
            a0, a1 = v0[idx, y], v1[idx, y]
            F = F.at[idx].set(a0 * fp + a1 * ub)
            S = S.at[idx].set(a0 * sp + a1 * sm)
            # the room ub − F(y−1) = S(y−1) − max S_pred(y): from the smaller operands
            W = W.at[idx].set(jnp.maximum(jnp.where(ub <= sp, ub - fp, sp - sm), 0.0))
        cols.append(_safe_log(W) + lv[:, y, 1])
        F_prev, S_prev = F[:R], S[:R]
    cols.append(_safe_log(S_prev))
    return jnp.stack(cols, axis=-1).reshape(network.cpt_shape(src))


def read_fractions(network: Network, name: str, table: np.ndarray, *, floor: float = 0.0) -> np.ndarray:
    """Fraction rows ``(1 − σ, σ)`` from a CPT (numpy). A monotone table gives back its own
    fractions (up to rounding; where the room is empty, σ is irrelevant and set to 1/2); a table
    that is not monotone gives the fractions of a monotone one near it (each cumulative
    probability clipped into its interval, in row order). ``floor`` keeps every σ in
    [floor, 1 − floor] (a start off the bounds)."""
    R, K, groups = _structure(network, name)
    p = np.asarray(table, dtype=np.float64).reshape(R, K)
    F0 = np.cumsum(p, axis=1)
    out = np.empty((R, K - 1, 2))
    F_prev = np.zeros(R)
    for y in range(K - 1):
        F = np.ones(R + 1)
        for idx, pred in groups:
            ub = F[pred].min(axis=1)
            lo = F_prev[idx]
            t = np.clip(F0[idx, y], lo, ub)
            w = ub - lo
            ok = w > 1e-300
            s1 = np.where(ok, (t - lo) / np.where(ok, w, 1.0), 0.5)
            s0 = np.where(ok, (ub - t) / np.where(ok, w, 1.0), 0.5)
            if floor > 0:
                s1 = np.clip(s1, floor, 1.0 - floor)
                s0 = 1.0 - s1
            out[idx, y, 0], out[idx, y, 1] = s0, s1
            F[idx] = lo + w * s1
        F_prev = F[:R]
    rows = out.reshape(R * (K - 1), 2)
    return rows / rows.sum(axis=1, keepdims=True)


def fractions_from_table(network: Network, name: str, table: np.ndarray) -> np.ndarray:
    """σ per (configuration, state but the last), ``(R, K − 1)``, of a monotone table."""
    R, K, _ = _structure(network, name)
    return read_fractions(network, name, table)[:, 1].reshape(R, K - 1)


def room(network: Network, name: str, table: np.ndarray) -> np.ndarray:
    """``min_pred F_pred(y) − F_u(y − 1)`` per fraction (R·(K−1),): how much the cumulative
    probability may move; 0 where the fraction does not matter."""
    R, K, groups = _structure(network, name)
    F0 = np.cumsum(np.asarray(table, dtype=np.float64).reshape(R, K), axis=1)
    out = np.empty((R, K - 1))
    for y in range(K - 1):
        F = np.ones(R + 1)
        F[:R] = F0[:, y]
        for idx, pred in groups:
            out[idx, y] = F[pred].min(axis=1) - (F0[idx, y - 1] if y else 0.0)
    return np.maximum(out, 0.0).reshape(-1)


def dsigma(rows: np.ndarray, virtual: np.ndarray) -> np.ndarray:
    """∂F/∂σ per fraction from the rows' virtual counts ``a = ∂F/∂ log v`` (rows, 2): the
    derivative along the box, ∂F/∂v₁ − ∂F/∂v₀ = a₁/v₁ − a₀/v₀ (a is proportional to v, so the
    ratio stays finite near the bounds)."""
    v = np.asarray(rows, dtype=np.float64)
    a = np.asarray(virtual, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        d1 = np.where(v[:, 1] > 0, a[:, 1] / v[:, 1], 0.0)
        d0 = np.where(v[:, 0] > 0, a[:, 0] / v[:, 0], 0.0)
    return d1 - d0


def served(network: Network, name: str, family_counts: np.ndarray) -> np.ndarray:
    """Records of each fraction's parent configuration (R·(K−1),), from the family counts."""
    R, K, _ = _structure(network, name)
    n_u = np.asarray(family_counts, dtype=np.float64).reshape(R, K).sum(axis=1)
    return np.repeat(n_u, K - 1)


def box_kkt(rows: np.ndarray, d: np.ndarray, n_u: np.ndarray) -> np.ndarray:
    """The box KKT measure of every fraction, in records per record served: the first-order gain
    of moving σ to the bound its derivative points at, ``(∂F/∂σ)⁺ (1 − σ) + (∂F/∂σ)⁻ σ``, over
    ``max(N(u), 1)``. It is 0 exactly at a KKT point of the box (Boyd & Vandenberghe 2004,
    Convex Optimization, §5.5.3): an interior fraction has ∂F/∂σ = 0; a fraction at 0 has
    ∂F/∂σ ≤ 0 and one at 1 has ∂F/∂σ ≥ 0 (the multiplier of the binding bound ≥ 0). At a point
    that is not a maximum along some fraction it is positive."""
    v = np.asarray(rows, dtype=np.float64)
    gain = np.maximum(d, 0.0) * v[:, 0] + np.maximum(-d, 0.0) * v[:, 1]
    return gain / np.maximum(np.asarray(n_u, dtype=np.float64), 1.0)


def fraction_labels(network: Network, name: str) -> list[str]:
    """A label per fraction row: ``"<configuration>: <child> <= <state>"``."""
    src = network.node(network.tie_source(name))
    cfgs = network.parent_config_labels(src.name)
    out = []
    for lab in cfgs:
        cfg = ", ".join(f"{p}={s}" for p, s in zip(src.parents, lab))
        out += [f"{cfg}: {src.name}<={src.states[y]}" for y in range(src.card - 1)]
    return out


def binding(network: Network, name: str, rows: np.ndarray, table: np.ndarray | None = None,
            *, tol: float = BOUND_TOL) -> list[str]:
    """Readable descriptions of the constraints on their bounds at ``rows``: dominance
    constraints that bind (σ = 1 with a predecessor: the cumulative probability equals the
    lower configuration's) and cells at 0 (σ = 0). Fractions whose room is empty (they do not
    matter) are left out."""
    src = network.node(network.tie_source(name))
    R, K, groups = _structure(network, name)
    v = np.asarray(rows, dtype=np.float64)
    if table is None:
        table = np.exp(np.asarray(implied_log_table_jit(network, src.name, np.log(np.maximum(v, 0.0) + 0.0))))
    rm = room(network, name, table)
    cfgs = network.parent_config_labels(src.name)
    preds_of = [[] for _ in range(R)]              # each configuration's predecessors
    for idx, pred in groups:
        for u, ps in zip(idx, pred):
            preds_of[int(u)] = [int(p) for p in ps if p < R]
    F = np.cumsum(np.asarray(table, dtype=np.float64).reshape(R, K), axis=1)
    out = []
    for r in range(R * (K - 1)):
        u, y = divmod(r, K - 1)
        if rm[r] <= 1e-12:
            continue
        cfg = ", ".join(f"{p}={s}" for p, s in zip(src.parents, cfgs[u]))
        if v[r, 0] <= tol and preds_of[u]:
            if len(src.increasing_with) == 1:
                out.append(f"P({src.name}<={src.states[y]} | {cfg}) equals its value one {src.increasing_with[0]} "
                           f"state lower")
                continue
            # several predecessors: name those whose cumulative probability it equals
            eq = [p for p in preds_of[u] if abs(F[p, y] - F[u, y]) <= 1e-9] or preds_of[u]
            at = " and at ".join(", ".join(f"{q}={s_}" for q, s_ in zip(src.parents, cfgs[p])) for p in eq)
            out.append(f"P({src.name}<={src.states[y]} | {cfg}) equals its value at {at}")
        elif v[r, 1] <= tol:
            out.append(f"P({src.name}={src.states[y]} | {cfg}) = 0")
    return out


#: :func:`implied_log_table` compiled once per (network, node)
implied_log_table_jit = jax.jit(implied_log_table, static_argnums=(0, 1))


def _pair_info(network: Network, name: str, eta, n_u):
    lt = lambda e: implied_log_table(network, name, jax.nn.log_softmax(e, axis=-1)).reshape(-1)
    J = jax.jacfwd(lt)(eta)                                   # (cells, rows, 2)
    th = jnp.exp(lt(eta))
    K = network.node(network.tie_source(name)).card
    w = jnp.repeat(n_u, K) * th                               # N(u) θ(y | u) per cell
    return jnp.einsum("c,crk->rk", w, jnp.where(jnp.isfinite(J), J, 0.0) ** 2)


_pair_info_jit = jax.jit(_pair_info, static_argnums=(0, 1))


def pair_information(network: Network, name: str, rows: np.ndarray, family_counts: np.ndarray) -> np.ndarray:
    """The complete-data information of each fraction pair's logits (rows, 2), diagonal only:
    ``Σ_cells N(u) θ(y | u) (∂ log θ(y | u)/∂η)²`` (the Fisher information of the multinomial rows
    the fraction moves, the records taken as observed). A fraction moves the cells of its own
    configuration and of every configuration above it along the listed parent, so this is the
    preconditioner's curvature scale (a pair's own records would miss the others)."""
    R, K, _ = _structure(network, name)
    n_u = np.asarray(family_counts, dtype=np.float64).reshape(R, K).sum(axis=1)
    with np.errstate(divide="ignore"):
        eta = np.log(np.asarray(rows, dtype=np.float64))
    eta = np.where(np.isfinite(eta), eta, -745.0)
    return np.asarray(_pair_info_jit(network, name, jnp.asarray(eta), jnp.asarray(n_u)))


# --------------------------------------------------------------------------- KKT in the table's own
# coordinates: with two or more listed parents a configuration has several predecessors and the
# map from the fractions takes a min over them, which is not differentiable where two of them tie
# (where binding constraints pool configurations). The box condition on the fractions is then no
# certificate; the conditions below are, being written on the cumulative probabilities
# F_u(y) (y = 0 … K−2), in which the constraints are linear.

#: a constraint whose slack (in probability) is at most this counts as binding
CONE_SLACK = 1e-9
#: ... and so does one within CONE_NEAR that the gradient pushes on, whose closing would gain at
#: most CONE_GAIN per record (near a stationary interior point every push is ~0: hence the cap)
CONE_GAIN = 1e-7
CONE_NEAR = 1e-6


@lru_cache(maxsize=256)
def _constraints(network: Network, name: str):
    """Every constraint of a monotone table as a pair (lo, hi) meaning F_lo ≤ F_hi on the flat
    cumulative coordinates i = u·(K−1) + y; −1 stands for the constant 0 and −2 for the constant 1.
    A cell P(y | u) ≥ 0 is F_u(y−1) ≤ F_u(y); a dominance constraint is F_u(y) ≤ F_pred(y)."""
    R, K, groups = _structure(network, name)
    k = K - 1
    lo, hi = [], []
    for u in range(R):
        for y in range(K):
            lo.append(u * k + y - 1 if y > 0 else -1)
            hi.append(u * k + y if y < k else -2)
    for idx, pred in groups:
        for u, ps in zip(idx, pred):
            for p in ps:
                if p < R:
                    for y in range(k):
                        lo.append(int(u) * k + y)
                        hi.append(int(p) * k + y)
    return np.array(lo, np.int64), np.array(hi, np.int64)


def _cumulative(table: np.ndarray, R: int, K: int) -> np.ndarray:
    return np.cumsum(np.asarray(table, dtype=np.float64).reshape(R, K), axis=1)[:, :-1].reshape(-1)


def _slack(F: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """F_hi − F_lo per constraint (≥ 0 where it holds)."""
    f_lo = np.where(lo < 0, 0.0, F[np.maximum(lo, 0)])
    f_hi = np.where(hi < 0, 1.0, F[np.maximum(hi, 0)])
    return f_hi - f_lo


def _normals(lo: np.ndarray, hi: np.ndarray, n: int) -> np.ndarray:
    """Gradients of F_lo − F_hi (rows), constants dropped."""
    A = np.zeros((lo.size, n))
    r = np.arange(lo.size)
    A[r[lo >= 0], lo[lo >= 0]] += 1.0
    A[r[hi >= 0], hi[hi >= 0]] -= 1.0
    return A


def cell_derivatives(table: np.ndarray, family_counts: np.ndarray, *, floor: float = 1e-300):
    """``(∂ℓ/∂θ, N/θ²)`` per cell of a CPT from its expected family counts N: the log-likelihood
    is linear in each CPT entry, so ∂ℓ/∂θ(y | u) = N(y, u)/θ(y | u), and N/θ² is the cells'
    complete-data information. Cells at most ``floor`` get 0 and NaN (their constraint binds)."""
    T = np.asarray(table, dtype=np.float64)
    n = np.asarray(family_counts, dtype=np.float64).reshape(T.shape)
    ok = T > floor
    Ts = np.where(ok, T, 1.0)
    return np.where(ok, n / Ts, 0.0), np.where(ok, n / Ts ** 2, np.nan)


def _gradient_F(network: Network, name: str, cell_gradient: np.ndarray, family_counts: np.ndarray):
    R, K, _ = _structure(network, name)
    g = np.asarray(cell_gradient, dtype=np.float64).reshape(R, K)
    n_u = np.asarray(family_counts, dtype=np.float64).reshape(R, K).sum(axis=1)
    return (g[:, :-1] - g[:, 1:]).reshape(-1), np.repeat(1.0 / np.maximum(n_u, 1.0), K - 1)


def binding_mask(network: Network, name: str, table: np.ndarray, cell_gradient: np.ndarray,
                 family_counts: np.ndarray) -> np.ndarray:
    """Which constraints (:func:`_constraints` order) count as binding at ``table``: slack at
    most CONE_SLACK, or at most CONE_NEAR with the gradient pushing on it and closing it gaining
    at most CONE_GAIN per record (the fit stops a hair from a bound it is moving to; the KKT check, the face of the
    error bars and the snap of :func:`snap` all use this one rule)."""
    R, K, _ = _structure(network, name)
    lo, hi = _constraints(network, name)
    F = _cumulative(table, R, K)
    gF, D = _gradient_F(network, name, cell_gradient, family_counts)
    A = _normals(lo, hi, F.size)
    slack = _slack(F, lo, hi)
    push = np.maximum(A @ gF, 0.0) * (np.abs(A) * D[None, :]).max(axis=1)  # per record, towards it
    return (slack <= CONE_SLACK) | ((push > 0) & (slack <= CONE_NEAR) & (slack * push <= CONE_GAIN))


def binding_normals(network: Network, name: str, table: np.ndarray, cell_gradient: np.ndarray,
                    family_counts: np.ndarray) -> np.ndarray:
    """The normals (rows; on the flat cumulative coordinates) of the constraints that
    :func:`binding_mask` counts as binding at ``table``."""
    lo, hi = _constraints(network, name)
    on = binding_mask(network, name, table, cell_gradient, family_counts)
    R, K, _ = _structure(network, name)
    return _normals(lo[on], hi[on], R * (K - 1))


def snap(network: Network, name: str, table: np.ndarray, cell_gradient: np.ndarray,
         family_counts: np.ndarray) -> np.ndarray | None:
    """The table with every binding constraint (:func:`binding_mask`) closed exactly: the
    smallest change of the cumulative probabilities that makes them equalities (a least-norm
    correction), or None when nothing is open."""
    R, K, _ = _structure(network, name)
    lo, hi = _constraints(network, name)
    on = binding_mask(network, name, table, cell_gradient, family_counts)
    F = _cumulative(table, R, K)
    slack = _slack(F, lo, hi)
    if not (on & (slack > 0)).any():
        return None
    A = _normals(lo[on], hi[on], F.size)
    dF = np.linalg.lstsq(A, slack[on], rcond=None)[0]      # A dF = slack: F_lo − F_hi rises to 0
    return table_from_cumulative(network, name, F + dF)


def cone_kkt(network: Network, name: str, table: np.ndarray, cell_gradient: np.ndarray,
             family_counts: np.ndarray) -> tuple[float, np.ndarray]:
    """The KKT condition of a monotone table in its cumulative probabilities: the objective's
    gradient there must lie in the cone of the binding constraints' normals, ∇_F L = Σ λ_c a_c
    with λ ≥ 0 (Karush–Kuhn–Tucker for linear constraints; Nocedal & Wright 2006, Numerical
    Optimization, Theorem 12.1). λ comes from non-negative least squares (scipy's nnls,
    Lawson & Hanson 1974) on rows scaled by 1/max(N(u), 1); returns ``(measure, direction)``:
    the measure is the largest scaled residual (records per record served, per unit of
    cumulative probability; 0 at a KKT point, positive where some feasible move raises the
    objective to first order) and the direction the scaled residual D² (∇L − Aᵀλ), which keeps
    every binding constraint (A d ≤ 0) and climbs (∇Lᵀ d = ‖residual‖² > 0) — a projected
    gradient step. ``cell_gradient`` is ∂objective/∂P(y | u) (CPT-shaped), ``family_counts`` the
    family's expected counts (records served)."""
    from scipy.optimize import nnls

    gF, D = _gradient_F(network, name, cell_gradient, family_counts)
    Aa = binding_normals(network, name, table, cell_gradient, family_counts)
    if not Aa.shape[0]:
        r = D * gF
        return float(np.max(np.abs(r), initial=0.0)), D * r
    lam, _ = nnls((Aa * D[None, :]).T, D * gF, maxiter=50 * max(Aa.shape))
    r = D * (gF - Aa.T @ lam)
    return float(np.max(np.abs(r), initial=0.0)), D * r


def table_from_cumulative(network: Network, name: str, F: np.ndarray) -> np.ndarray:
    """The CPT of flat cumulative probabilities (clipped into [0, 1] and made non-decreasing in
    each row; the caller keeps F feasible, this only removes rounding)."""
    R, K, _ = _structure(network, name)
    Fm = np.clip(np.asarray(F, dtype=np.float64).reshape(R, K - 1), 0.0, 1.0)
    Fm = np.maximum.accumulate(Fm, axis=1)
    full = np.concatenate([np.zeros((R, 1)), Fm, np.ones((R, 1))], axis=1)
    cells = np.maximum(np.diff(full, axis=1), 0.0)
    src = network.tie_source(name)
    return (cells / cells.sum(axis=1, keepdims=True)).reshape(network.cpt_shape(src))


def face_dimension(network: Network, name: str, table: np.ndarray) -> int:
    """The dimension of the face of the monotone tables on which ``table`` lies: the free
    cumulative coordinates, R·(K−1), less the rank of the constraints that bind there (slack at
    most CONE_SLACK). It is the number of parameters the fit moves locally (binding constraints
    pool configurations, cells at 0 drop out), which is what order-restricted fits count as
    their degrees of freedom (Meyer & Woodroofe 2000, Ann. Statist. 28(4), from memory: the
    degrees of freedom of a projection onto a polyhedral cone are the expected dimension of the
    face it lands on)."""
    R, K, _ = _structure(network, name)
    lo, hi = _constraints(network, name)
    F = _cumulative(table, R, K)
    on = _slack(F, lo, hi) <= CONE_SLACK
    if not on.any():
        return int(F.size)
    return int(F.size - np.linalg.matrix_rank(_normals(lo[on], hi[on], F.size)))


def face_newton(network: Network, name: str, table: np.ndarray, cell_gradient: np.ndarray,
                cell_information: np.ndarray, family_counts: np.ndarray) -> np.ndarray | None:
    """A Newton direction on the face of the binding constraints (those :func:`cone_kkt` counts
    as binding, kept as equalities): Δ = Z (Zᵀ H Z)⁻¹ Zᵀ ∇_F L with Z a basis of the face's
    directions and H the information of the cumulative coordinates from the cells'
    ``cell_information`` N(y, u)/P(y | u)² (exact on complete data, where the log-likelihood is
    Σ N log P; with hidden values it is the complete-data information, a quasi-Newton step).
    On the face the binding constraints pool configurations and the objective is smooth, which
    the fractions' map (a min over predecessors) is not. None when the face is a point."""
    import scipy.linalg

    R, K, _ = _structure(network, name)
    n = R * (K - 1)
    gF, _ = _gradient_F(network, name, cell_gradient, family_counts)
    n_u = np.asarray(family_counts, dtype=np.float64).reshape(R, K).sum(axis=1)
    C = binding_normals(network, name, table, cell_gradient, family_counts)
    w = np.asarray(cell_information, dtype=np.float64).reshape(R, K)
    w = np.where(np.isfinite(w) & (w > 0), w, np.maximum(n_u, 1.0)[:, None])
    k = K - 1
    H = np.zeros((n, n))
    for u in range(R):
        b = u * k
        for y in range(k):
            H[b + y, b + y] = w[u, y] + w[u, y + 1]
            if y + 1 < k:
                H[b + y, b + y + 1] = H[b + y + 1, b + y] = -w[u, y + 1]
    Z = scipy.linalg.null_space(C) if C.shape[0] else np.eye(n)
    if Z.shape[1] == 0:
        return None
    Hz = Z.T @ H @ Z
    try:
        step = Z @ np.linalg.solve(Hz + 1e-12 * np.trace(Hz) / Hz.shape[0] * np.eye(Hz.shape[0]), Z.T @ gF)
    except np.linalg.LinAlgError:
        return None
    return step if np.all(np.isfinite(step)) else None


def cone_steps(network: Network, name: str, table: np.ndarray, direction: np.ndarray,
               fractions=(1.0, 0.5, 0.1, 1e-2, 1e-3, 1e-4, 1e-6), *, newton: bool = False) -> list[np.ndarray]:
    """Tables along the projected-gradient direction of :func:`cone_kkt`: the longest step that
    keeps every constraint (and no cumulative probability moving by more than 1), and the given
    fractions of it; each read back into fraction rows keeps the table monotone exactly.
    ``newton``: a direction of :func:`face_newton`, whose full step is 1 (capped by the
    constraints)."""
    R, K, _ = _structure(network, name)
    lo, hi = _constraints(network, name)
    F = _cumulative(table, R, K)
    d = np.asarray(direction, dtype=np.float64).reshape(-1)
    if not np.any(d):
        return []
    A = _normals(lo, hi, F.size)
    rate = A @ d                                      # slack falls at this rate
    slack = _slack(F, lo, hi)
    moving = rate > 1e-10 * float(np.abs(d).max())   # binding constraints move by rounding only
    lim = np.where(moving, np.maximum(slack, 0.0) / np.where(moving, rate, 1.0), np.inf)
    t_max = min(float(lim.min(initial=np.inf)), 1.0 / float(np.abs(d).max()), 1.0 if newton else np.inf)
    if not t_max > 0:
        return []
    return [table_from_cumulative(network, name, F + f * t_max * d) for f in fractions]

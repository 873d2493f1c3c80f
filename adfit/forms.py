"""Structured CPT forms in the gradient fit: noisy-OR and noisy-MAX through "cause rows".

A node of a causal-independence form is estimated through a small set of probability
distributions over its own states, its **cause rows** (a 2-D array, one row per distribution):

* row 0, the **leak**: the distribution of the child when every parent is in its first
  (inactive) state;
* then, for every parent in order and each of its other (active) states ``s``, the distribution
  of the child's value caused by that parent being in ``s`` alone, without the leak.

The CPT these rows imply is that of the child being the largest of independent causes (the leak
and one cause per parent; an inactive parent causes the first state): with ``Q_r(y)`` the
cumulative distribution of row ``r``,

    P(child ≤ y | u) = Q_leak(y) · Π over active parents i of Q_{i, u_i}(y)

(Díez 1993, "Parameter adjustment in Bayes networks. The generalized noisy OR-gate", UAI; for a
two-state child this is Pearl 1988, Probabilistic Reasoning in Intelligent Systems, §4.3.2, with
Henrion's 1989 leak: P(absent | u) = (1 − leak) · Π over active parents of (1 − strength)).

Every row is a point of a simplex, so the optimiser treats the rows exactly like the rows of a
table (softmax logits, :mod:`adfit.params`), and the simplex KKT check of :mod:`adfit.fit` applies
to them unchanged: the implied CPT is linear in each row (a product of cumulative sums, each
factor linear in one row), so the likelihood of a record is linear in each row and the ratio
``a / (v · Σa)`` with ``a = v · ∂F/∂v`` (the row's "virtual counts", :func:`virtual_counts`) is
finite at ``v → 0`` and is the row's KKT ratio; and ``v ← a / Σa`` is EM on the network with one
hidden cause per parent (the growth transform of a polynomial with non-negative coefficients,
Baum & Eagon 1967), which the fit's burn-in and boundary escapes use.

The log of the implied CPT is computed in log space (cumulative log-sum-exp of the rows' log
probabilities; differences of cumulative terms by ``expm1``), so that small cells keep their
relative precision. A ``logistic`` node, ``log P(y | u) = intercept(y) + Σ_i coefficient(i, u_i, y) − normaliser``
(the first child state and each parent's first state the references), is estimated through
the same kind of rows: row 0 holds the intercepts and each (parent, non-first state) row the
coefficients, each stored as a softmax row ``v_d`` whose log is the row up to a constant (the
constants cancel in the final softmax). There are no simplex constraints on coefficients, so
their virtual counts sum to 0 per row, the gradient in the logits is the virtual counts
themselves, and the KKT check and EM steps (which need counts) leave logistic rows out; the
preconditioner uses the complete-data information of each coefficient
(:func:`logistic_weights`). Impossible cells of a logistic node (network key ``impossible``)
are set to −∞ before its softmax, so its rows renormalise over the other states; its
coefficients are read off a table by least squares on the possible cells
(:func:`_logistic_least_squares`).

This module is written from the definitions above, independently of the EM
reference's :mod:`adfit.emforms`, so that the cross-check compares two implementations.
"""

from __future__ import annotations

from functools import partial
from typing import Any, Mapping

from ._jax import jax, jnp  # first: float64 on (adfit/_jax.py)
import numpy as np

from . import monotone as _mono
from .network import Network

__all__ = ["NOISY", "is_noisy", "cause_shape", "cause_row_labels", "implied_log_table", "implied_table",
           "virtual_counts", "row_sums", "logistic_weights", "is_logistic", "has_rows", "ROW_FORMS", "rows_from_table", "start_rows", "random_rows", "parameters_json", "parameters_layout", "rows_from_parameters", "format_parameters"]

#: the causal-independence forms (cause rows on simplices)
NOISY = ("noisy_or", "noisy_max")
#: the forms estimated through parameter rows (noisy: cause rows; logistic: coefficient rows)
ROW_FORMS = NOISY + ("logistic",)


def is_noisy(network: Network, name: str) -> bool:
    """Whether ``name`` (or the node it is tied to) has a noisy_or / noisy_max form."""
    return network.cpd_form(network.tie_source(name)) in NOISY


def is_logistic(network: Network, name: str) -> bool:
    """Whether ``name`` (or the node it is tied to) has the logistic form."""
    return network.cpd_form(network.tie_source(name)) == "logistic"


def is_monotone(network: Network, name: str) -> bool:
    """Whether ``name`` (or the node it is tied to) is a monotone table (``increasing_with``,
    :mod:`adfit.monotone`: estimated through fraction rows)."""
    return _mono.is_monotone(network, name)


def has_rows(network: Network, name: str) -> bool:
    """Whether ``name`` (or its tie source) is estimated through parameter rows (a form of
    :data:`ROW_FORMS`, or a monotone table's fraction rows) rather than its CPT's rows."""
    return network.cpd_form(network.tie_source(name)) in ROW_FORMS or _mono.is_monotone(network, name)


def _spans(network: Network, name: str) -> list[tuple[int, int]]:
    """Per parent: (first cause row, number of active states)."""
    out, r = [], 1
    for p in network.node(name).parents:
        c = network.node(p).card - 1
        out.append((r, c))
        r += c
    return out


def cause_shape(network: Network, name: str) -> tuple[int, int]:
    """``(rows, states)`` of the cause rows of a noisy node: 1 + Σ (parent states − 1), card
    (a monotone node: its fraction rows, :func:`adfit.monotone.fraction_shape`)."""
    if _mono.is_monotone(network, name):
        return _mono.fraction_shape(network, name)
    node = network.node(name)
    return 1 + sum(network.node(p).card - 1 for p in node.parents), node.card


def cause_row_labels(network: Network, name: str) -> list[str]:
    """A readable label per parameter row: ``leak`` (``intercept`` for a logistic node), then
    ``parent=state`` for each active (non-reference) state; a monotone node's fraction rows:
    ``configuration: child<=state``."""
    if _mono.is_monotone(network, name):
        return _mono.fraction_labels(network, name)
    out = ["intercept" if is_logistic(network, name) else "leak"]
    for p in network.node(name).parents:
        out += [f"{p}={s}" for s in network.node(p).states[1:]]
    return out


# --------------------------------------------------------------------------- the implied CPT
def _log_cum_jax(logv):
    """log Q(y) for each row: cumulative log-sum-exp along the states."""
    return jax.lax.cumlogsumexp(logv, axis=logv.ndim - 1)


def _linear_jax(network: Network, name: str, rows):
    """Σ over the node's parameter rows that apply to each parent configuration: row 0 always,
    the row of parent i's state s where u_i = s ≥ 1 (CPT-shaped; JAX)."""
    K = network.node(name).card
    shape = tuple(network.cpt_shape(name))
    out = jnp.broadcast_to(rows[0], shape)
    for i, (r0, c) in enumerate(_spans(network, name)):
        f = jnp.concatenate([jnp.zeros((1, K)), rows[r0:r0 + c]], axis=0)  # first state: nothing
        bshape = [1] * (len(shape) - 1) + [K]
        bshape[i] = c + 1
        out = out + f.reshape(bshape)
    return out


def implied_log_table(network: Network, name: str, logv):
    """log P(child | parents) (CPT-shaped, JAX) from the log parameter rows ``logv`` (rows,
    card): the cause rows of a noisy node, or for a logistic node the softmax rows whose logs
    are the intercept and coefficient rows up to a constant each (the constants cancel in the
    softmax: ``log P(· | u) = log_softmax(Σ_d X_ud logv_d)``); a monotone node's fraction rows
    (:func:`adfit.monotone.implied_log_table`)."""
    if _mono.is_monotone(network, name):
        return _mono.implied_log_table(network, name, logv)
    if is_logistic(network, name):
        lin = _linear_jax(network, name, logv)
        if network.node(name).impossible:  # cells fixed at 0: out of the softmax (its row renormalises)
            lin = jnp.where(network.impossible_mask(name), -jnp.inf, lin)
        return jax.nn.log_softmax(lin, axis=-1)
    node = network.node(name)
    K = node.card
    # every cumulative term is kept, the last one too (log of the row's sum, 0 on the simplex):
    # the implied table is then a polynomial linear in each row, so the row's virtual counts
    # (∂ log L/∂ log v) sum to the records the row serves, as a table row's counts do
    logQ = _log_cum_jax(logv)
    logC = logQ[0]
    shape = tuple(network.cpt_shape(name))
    logC = jnp.broadcast_to(logC, (*shape[:-1], K))
    for i, (r0, c) in enumerate(_spans(network, name)):
        f = jnp.concatenate([jnp.zeros((1, K)), logQ[r0:r0 + c]], axis=0)  # inactive: log 1
        bshape = [1] * (len(shape) - 1) + [K]
        bshape[i] = c + 1
        logC = logC + f.reshape(bshape)
    prev = jnp.concatenate([jnp.full((*shape[:-1], 1), -jnp.inf), logC[..., :-1]], axis=-1)
    d = prev - logC                                                           # ≤ 0
    live = d < 0
    safe = jnp.where(live, d, -1.0)
    return jnp.where(live, logC + jnp.log(-jnp.expm1(safe)), -jnp.inf)


#: :func:`implied_log_table` compiled once per (network, node)
implied_log_table_jit = jax.jit(implied_log_table, static_argnums=(0, 1))


def implied_table(network: Network, name: str, v: np.ndarray) -> np.ndarray:
    """P(child | parents) (CPT-shaped, numpy) from the parameter rows ``v`` (rows, card): the
    exponential of :func:`implied_log_table` (compiled), so that the fit's head and every
    table read off the parameters are one computation."""
    with np.errstate(divide="ignore"):
        logv = np.log(np.asarray(v, dtype=np.float64))
    return np.exp(np.asarray(implied_log_table_jit(network, name, logv)))


@partial(jax.jit, static_argnums=(0, 1))
def _virtual_counts(network: Network, name: str, logv, counts):
    _, vjp = jax.vjp(lambda lv: implied_log_table(network, name, lv), logv)
    (a,) = vjp(jnp.where(counts > 0, counts, 0.0))
    return a


def virtual_counts(network: Network, name: str, v: np.ndarray, counts: np.ndarray) -> np.ndarray:
    """The cause rows' virtual counts ``a = ∂ log L / ∂ log v`` (shape of ``v``) from the expected
    counts of the node's family ``counts`` (CPT-shaped, = ∂ log L / ∂ log θ; the chain rule
    through :func:`implied_log_table` by reverse-mode differentiation). Cells of the implied CPT
    that are 0 carry no count."""
    with np.errstate(divide="ignore"):
        logv = np.log(np.asarray(v, dtype=np.float64))
    return np.asarray(_virtual_counts(network, name, jnp.asarray(logv), jnp.asarray(counts, dtype=jnp.float64)))


# --------------------------------------------------------------------------- starts
#: smallest probability a start gives a cause row's cell (no start on the boundary)
START_FLOOR = 0.02


def rows_from_table(network: Network, name: str, table: np.ndarray) -> np.ndarray:
    """The cause rows of a CPT of the node's form, read off the rows where at most one parent is
    active (:func:`start_rows` without the floor); for a table of the form, implied by its cause
    rows, this returns them up to rounding wherever the leak's cumulative terms are positive."""
    return _read_rows(network, name, table, floor=0.0)


def start_rows(network: Network, name: str, table: np.ndarray) -> np.ndarray:
    """Starting cause rows read off a starting CPT ``table`` (for the fit: the smoothed
    complete-family counts, :func:`adfit.fit.complete_family_start`).

    The leak is the child's distribution in the row where every parent is inactive; the cause
    row of parent i in state s solves the form at the row where only that parent is active,
    ``Q_{i,s}(y) = P(child ≤ y | only i = s) / Q_leak(y)``, kept monotone; every cell is then
    floored at ``START_FLOOR`` (no start on the boundary). For a table of the form this recovers
    its rows (up to the floor)."""
    return _read_rows(network, name, table, floor=START_FLOOR)


def _softmax(x: np.ndarray) -> np.ndarray:
    e = np.exp(x - x.max(axis=-1, keepdims=True))
    return e / e.sum(axis=-1, keepdims=True)


def _read_rows(network: Network, name: str, table: np.ndarray, *, floor: float) -> np.ndarray:
    if _mono.is_monotone(network, name):
        return _mono.read_fractions(network, name, table, floor=floor)
    R, K = cause_shape(network, name)
    p = np.asarray(table, dtype=np.float64)
    node = network.node(name)
    if is_logistic(network, name) and node.impossible:
        return _softmax(_logistic_least_squares(network, name, p))
    if is_logistic(network, name):
        # log θ(· | u) = intercept + Σ coefficients − normaliser: the intercept row is read at the
        # all-first-states row, each coefficient row at the row where only its parent moves
        with np.errstate(divide="ignore"):
            lp = np.log(np.maximum(p, 1e-300))
        zero = (0,) * len(node.parents)
        out = np.empty((R, K))
        out[0] = lp[zero]
        for i, (r0, n_act) in enumerate(_spans(network, name)):
            for s in range(1, n_act + 1):
                at = list(zero)
                at[i] = s
                out[r0 + s - 1] = lp[tuple(at)] - lp[zero]
        return _softmax(out)
    zero = (0,) * len(node.parents)
    out = np.empty((R, K))
    out[0] = p[zero]
    Ql = np.maximum(np.cumsum(out[0]), 1e-300)
    for i, (r0, n_act) in enumerate(_spans(network, name)):
        for s in range(1, n_act + 1):
            at = list(zero)
            at[i] = s
            Q = np.maximum.accumulate(np.clip(np.cumsum(p[tuple(at)]) / Ql, 0.0, 1.0))
            Q[-1] = 1.0
            out[r0 + s - 1] = np.diff(Q, prepend=0.0)
    out = np.maximum(out, floor)
    return out / out.sum(axis=-1, keepdims=True)


def _logistic_least_squares(network: Network, name: str, p: np.ndarray) -> np.ndarray:
    """The coefficient rows ``B`` (rows, card; first column 0) of a logistic node with impossible
    cells, read off its table ``p``: ``log p(k | u) = Σ_d X_ud B_dk − A_u`` on every possible cell
    (``A_u`` the row's normaliser), solved by least squares (exact for a table of the form; the
    impossible cells carry no equation)."""
    node = network.node(name)
    R, K = cause_shape(network, name)
    shape = tuple(network.cpt_shape(name))
    Q = int(np.prod(shape[:-1]))
    X = np.zeros((Q, R))
    X[:, 0] = 1.0
    for u, cfg in enumerate(np.ndindex(*shape[:-1])):
        for i, (r0, _) in enumerate(_spans(network, name)):
            if cfg[i] > 0:
                X[u, r0 + cfg[i] - 1] = 1.0
    ok = ~network.impossible_mask(name).reshape(Q, K)
    lp = np.log(np.maximum(p.reshape(Q, K), 1e-300))
    rows, rhs = [], []
    n_b = R * (K - 1)
    for u in range(Q):
        for k in range(K):
            if not ok[u, k]:
                continue
            eq = np.zeros(n_b + Q)
            if k > 0:
                eq[np.arange(R) * (K - 1) + (k - 1)] = X[u]
            eq[n_b + u] = -1.0
            rows.append(eq)
            rhs.append(lp[u, k])
    sol = np.linalg.lstsq(np.asarray(rows), np.asarray(rhs), rcond=None)[0]
    B = np.zeros((R, K))
    B[:, 1:] = sol[:n_b].reshape(R, K - 1)
    return B


def row_sums(network: Network, name: str, m: np.ndarray) -> np.ndarray:
    """The transpose of the row-to-configuration map: for a CPT-shaped ``m``, per parameter row
    the sum of ``m`` over the parent configurations it applies to (rows, card)."""
    m = np.asarray(m, dtype=np.float64)
    R, K = cause_shape(network, name)
    k = m.ndim - 1
    out = np.empty((R, K))
    out[0] = m.reshape(-1, K).sum(axis=0)
    for i, (r0, n_act) in enumerate(_spans(network, name)):
        per = m.sum(axis=tuple(j for j in range(k) if j != i))  # (card_i, K)
        out[r0:r0 + n_act] = per[1:]
    return out


def logistic_weights(network: Network, name: str, family_counts: np.ndarray, table: np.ndarray):
    """For a logistic node at ``table`` with expected family counts ``family_counts`` (pooled
    over ties): the diagonal of the complete-data information of each coefficient,
    ``Σ_u X_ud N(u) π_uk (1 − π_uk)`` (rows, card), and the records each row serves,
    ``Σ_u X_ud N(u)`` (rows,)."""
    n_u = np.asarray(family_counts, dtype=np.float64).sum(axis=-1, keepdims=True)
    pi = np.asarray(table, dtype=np.float64)
    info = row_sums(network, name, n_u * pi * (1.0 - pi))
    served = row_sums(network, name, np.broadcast_to(n_u, pi.shape))[:, 0]
    return info, served


def random_rows(network: Network, name: str, rng: np.random.Generator) -> np.ndarray:
    """A Dirichlet(1) draw per cause row."""
    R, K = cause_shape(network, name)
    return rng.dirichlet(np.ones(K), size=R)


# --------------------------------------------------------------------------- the result file's layout
def parameters_json(network: Network, name: str, v: np.ndarray) -> dict[str, Any]:
    """The ``"parameters"`` section of a noisy node: ``{"leak": ..., "strength": {parent: {state:
    ...}}}``, each a probability (noisy_or: of the second, present state) or a list over the
    child's states (noisy_max); of a monotone node: ``{"fraction": {label: σ}}``
    (:func:`adfit.monotone.fraction_labels`)."""
    v = np.asarray(v, dtype=np.float64)
    if _mono.is_monotone(network, name):
        return {"fraction": {lab: float(x) for lab, x in zip(_mono.fraction_labels(network, name), v[:, 1])}}
    if is_logistic(network, name):
        with np.errstate(divide="ignore"):
            B = np.log(v)
        B = B - B[:, :1]  # the first child state is the reference
        coef: dict[str, Any] = {}
        for p, (r0, n_act) in zip(network.node(name).parents, _spans(network, name)):
            st = network.node(p).states
            coef[p] = {st[0]: [0.0] * v.shape[1]}
            for s in range(1, n_act + 1):
                coef[p][st[s]] = [float(x) for x in B[r0 + s - 1]]
        return {"intercept": [float(x) for x in B[0]], "coefficients": coef}
    two = network.cpd_form(network.tie_source(name)) == "noisy_or"

    def cell(row: np.ndarray) -> Any:
        return float(row[1]) if two else [float(x) for x in row]

    strength: dict[str, Any] = {}
    for p, (r0, n_act) in zip(network.node(name).parents, _spans(network, name)):
        st = network.node(p).states
        strength[p] = {st[s]: cell(v[r0 + s - 1]) for s in range(1, n_act + 1)}
    return {"leak": cell(v[0]), "strength": strength}


def parameters_layout(network: Network, name: str, a: np.ndarray, *, reference: Any = 0.0) -> dict[str, Any]:
    """A per-cell array over the parameter rows (an SE, a bound) in the ``"parameters"``
    layout: for noisy nodes the cells of the cause rows as :func:`parameters_json` places the
    probabilities; for a logistic node the coefficient cells themselves (the reference state's
    column as it is in ``a``)."""
    a = np.asarray(a, dtype=np.float64)
    if _mono.is_monotone(network, name):  # a fraction's cells (1 − σ, σ): the second is σ
        return {"fraction": {lab: float(x) for lab, x in zip(_mono.fraction_labels(network, name), a[:, 1])}}
    if not is_logistic(network, name):
        return parameters_json(network, name, a)
    coef: dict[str, Any] = {}
    for p, (r0, n_act) in zip(network.node(name).parents, _spans(network, name)):
        st = network.node(p).states
        coef[p] = {st[0]: [reference] * a.shape[1]}
        for s in range(1, n_act + 1):
            coef[p][st[s]] = [float(x) for x in a[r0 + s - 1]]
    return {"intercept": [float(x) for x in a[0]], "coefficients": coef}


def rows_from_parameters(network: Network, name: str, doc: Mapping[str, Any]) -> np.ndarray:
    """Cause rows from a ``"parameters"`` section (the inverse of :func:`parameters_json`)."""
    R, K = cause_shape(network, name)
    if _mono.is_monotone(network, name):
        s1 = np.asarray([float(doc["fraction"][lab]) for lab in _mono.fraction_labels(network, name)])
        return np.stack([1.0 - s1, s1], axis=1)
    if is_logistic(network, name):
        out = np.empty((R, K))
        out[0] = np.asarray(doc["intercept"], dtype=np.float64)
        for p, (r0, n_act) in zip(network.node(name).parents, _spans(network, name)):
            st = network.node(p).states
            for s in range(1, n_act + 1):
                out[r0 + s - 1] = np.asarray(doc["coefficients"][p][st[s]], dtype=np.float64)
        return _softmax(out)
    two = network.cpd_form(network.tie_source(name)) == "noisy_or"

    def row(x: Any) -> np.ndarray:
        return np.array([1.0 - float(x), float(x)]) if two else np.asarray(x, dtype=np.float64)

    out = np.empty((R, K))
    out[0] = row(doc["leak"])
    for p, (r0, n_act) in zip(network.node(name).parents, _spans(network, name)):
        st = network.node(p).states
        for s in range(1, n_act + 1):
            out[r0 + s - 1] = row(doc["strength"][p][st[s]])
    return out


def n_cause_parameters(network: Network, name: str) -> int:
    """Free parameters of a noisy node: (rows) · (states − 1)."""
    R, K = cause_shape(network, name)
    return R * (K - 1)


def format_parameters(network: Network, name: str, doc: Mapping[str, Any], *, digits: int = 3) -> str:
    """One line with a structured node's parameters (the result layout), for the terminal."""
    form = network.cpd_form(network.tie_source(name))
    if _mono.is_monotone(network, name):
        fr = list((doc.get("fraction") or {}).values())
        on = sum(1 for x in fr if x is not None and (x >= 1.0 - _mono.BOUND_TOL or x <= _mono.BOUND_TOL))
        return (f"  monotone along {', '.join(network.node(network.tie_source(name)).increasing_with)}: "
                f"{on} of {len(fr)} fractions on a bound (binding constraints or cells at 0)")

    def num(x: Any) -> str:
        return f"{x:.{digits}f}" if not isinstance(x, (list, tuple)) else "(" + ", ".join(f"{v:.{digits}f}" for v in x) + ")"

    if form == "logistic":
        parts = [f"intercept {num(doc['intercept'])}"]
        for p, by in doc["coefficients"].items():
            parts += [f"{p}={st} {num(v)}" for st, v in list(by.items())[1:]]
        return f"  logistic coefficients (log-odds against {network.node(name).states[0]!r}): " + "; ".join(parts)
    parts = [f"leak {num(doc['leak'])}"]
    for p, by in doc["strength"].items():
        parts += [f"{p}={st} {num(v)}" for st, v in by.items()]
    return f"  {form} parameters: " + "; ".join(parts)


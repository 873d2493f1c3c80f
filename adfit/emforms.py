"""Structured CPTs in the EM reference: noisy-OR, noisy-MAX, logistic, tied tables, impossible cells.

Plain numpy, like :mod:`adfit.em`, and independent of the JAX core and of the gradient side's
parameterisation (:mod:`adfit.params`): the same forms are written down a second time here, from
their definitions (docs/method.md "The EM reference"), so that agreement is a real check.

Every estimated node belongs to one *group*: its tie source and the nodes tied to it. A group has
one set of parameters; by the data it sees only through the expected family counts ``N̂(x, u)``
of its members, and since the members share the parameters and the table layout the expected
complete-data log-likelihood of the group depends on the **sum** of its members' counts. So a tie
is handled by pooling the counts before the form's M-step, whatever the form.

* ``table``: ``θ(x|u) = (N̂ + c)/(N̂(u) + c(u))`` on the pooled counts, impossible cells (and their
  pseudo-counts) kept at 0, each row renormalised over its possible cells.
* ``noisy_or`` / ``noisy_max``: EM on the equivalent network with one hidden cause per parent
  (Meek & Heckerman 1997; Heckerman & Breese 1996): cause ``Z_i`` takes the child's states, with
  ``P(Z_i | U_i = s)`` = the strength distribution of state ``s`` (the first, inactive state gives
  ``Z_i = 0``), a leak cause ``Z_0`` with the leak distribution, and the child ``Y = max_i Z_i``
  deterministically. Given the family configuration ``(y, u)`` the causes are independent of
  the rest of the network, so the E-step of the augmented network is the family posterior
  ``N̂(y, u)`` times ``P(Z_i = z | y, u)``:
  ``P(Z_i = z, Y = y | u) = q_i(z) · ([z < y] (F_{-i}(y) − F_{-i}(y−1)) + [z = y] F_{-i}(y))``
  with ``F_{-i}`` the product of the other causes' cumulative distributions. The M-step is
  closed-form: each cause distribution is its expected counts normalised.
* ``logistic``: generalised EM. The E-step gives ``N̂(y, u)``; the M-step takes Newton steps on
  the weighted multinomial logit ``Σ N̂(y, u) log softmax(η(u))_y`` (``η(u, y)`` = intercept(y) +
  Σ coefficient(parent, u_parent, y), the first child state and each parent's first state the
  references), each step halved until that expected log-likelihood rises, so the marginal
  likelihood never falls (Dempster, Laird & Rubin 1977, §3: a GEM step).

Internal parameter layouts (per group source): ``table``: the CPT array; noisy forms: a dict
``{"leak": (K,), "causes": [(card_i, K) per parent]}`` whose row 0 of each cause is ``[1, 0, ...]``;
``logistic``: the coefficient matrix ``B`` of shape ``(D, K)`` (rows: intercept, then each parent's
non-first states in order; column 0 is 0). :func:`to_json`/:func:`from_json` convert to and from
the result file's ``"parameters"`` layout.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Mapping, Sequence

import numpy as np

from .errors import OptionError
from .network import Network

__all__ = ["SUPPORTED", "Group", "groups_of", "implied_table", "mstep", "residual", "uninformed_rows",
           "from_table", "random_params", "to_json", "from_json", "expected_cause_counts", "noisy_table",
           "logistic_table", "logistic_q", "pooled", "gradient_norm"]

#: what :meth:`Network.unsupported_structure` is told the EM reference can estimate
SUPPORTED = ("table", "noisy_or", "noisy_max", "logistic", "tied", "impossible")
#: largest difference between a given starting table and the table implied by the parameters read
#: off it, for the table to count as being of the node's form
FORM_TOL = 1e-6
#: Newton steps per logistic M-step, and the steps used to read a logistic table's coefficients
NEWTON_STEPS = 25
FROM_TABLE_STEPS = 200


@dataclass(frozen=True, eq=False)
class Group:
    """One set of parameters: a free node and the nodes tied to it."""

    source: str
    members: tuple[str, ...]          # the source first
    kind: str                         # "table", "noisy_or", "noisy_max", "logistic"
    shape: tuple[int, ...]            # CPT shape (*parent_cards, card)
    parents: tuple[str, ...]          # the source's parents (the members' have the same state lists)
    mask: np.ndarray | None           # impossible cells (CPT-shaped bool), None when there are none
    parent_states: np.ndarray         # (k, R): the state of each parent in each table row

    @property
    def card(self) -> int:
        return self.shape[-1]

    @property
    def n_rows(self) -> int:
        return int(math.prod(self.shape[:-1]))

    @property
    def plain(self) -> bool:
        """An ordinary full table: no tie, no impossible cell."""
        return self.kind == "table" and len(self.members) == 1 and self.mask is None

    @property
    def noisy(self) -> bool:
        return self.kind in ("noisy_or", "noisy_max")

    def design(self) -> np.ndarray:
        """Logistic design matrix ``(R, D)``: a 1, then one 0/1 column per non-first parent state."""
        pcards = self.shape[:-1]
        cols = [np.ones(self.n_rows)]
        for i, c in enumerate(pcards):
            for s in range(1, c):
                cols.append((self.parent_states[i] == s).astype(np.float64))
        return np.stack(cols, axis=1)


def groups_of(network: Network) -> list[Group]:
    """The parameter groups of the free nodes, in network order of their sources."""
    tied: dict[str, list[str]] = {}
    for n in network.nodes:
        if n.fixed is None and n.tied_to is not None:
            tied.setdefault(n.tied_to, []).append(n.name)
    out = []
    for n in network.nodes:
        if n.fixed is not None or n.tied_to is not None:
            continue
        shape = network.cpt_shape(n.name)
        mask = network.impossible_mask(n.name) if n.impossible else None
        pcards = shape[:-1]
        ps = np.indices(pcards).reshape(len(pcards), -1) if pcards else np.zeros((0, 1), dtype=np.int64)
        out.append(Group(n.name, (n.name, *tied.get(n.name, ())), network.cpd_form(n.name), shape, n.parents,
                         mask, ps))
    return out


def pooled(g: Group, arrays: Mapping[str, np.ndarray] | None) -> np.ndarray | None:
    """The sum over the group's members of CPT-shaped arrays (counts or pseudo-counts); None if none given."""
    if arrays is None:
        return None
    got = [np.asarray(arrays[m], dtype=np.float64) for m in g.members if m in arrays]
    if not got:
        return None
    return np.sum(got, axis=0)


# =============================================================================== implied tables
def noisy_table(leak: np.ndarray, causes: Sequence[np.ndarray]) -> np.ndarray:
    """The noisy-MAX (noisy-OR for two states) CPT, shape ``(*parent_cards, K)``.

    ``P(Y ≤ y | u) = L(≤ y) · Π_i Q_{i,u_i}(≤ y)`` (Díez 1993), ``P(y | u)`` its differences."""
    K = leak.shape[-1]
    F = np.cumsum(leak)
    k = len(causes)
    for i, c in enumerate(causes):
        shape = [1] * k + [K]
        shape[i] = c.shape[0]
        F = F * np.cumsum(c, axis=1).reshape(shape)
    F = np.array(F, dtype=np.float64)
    F[..., -1] = 1.0  # every cumulative distribution ends at 1 (exactly, not up to rounding)
    P = np.diff(F, axis=-1, prepend=0.0)
    return np.clip(P, 0.0, None)


def _masked_softmax(eta: np.ndarray, mask: np.ndarray | None) -> tuple[np.ndarray, np.ndarray]:
    """Row-wise log-softmax and softmax of ``eta`` (R, K), impossible cells -inf / 0."""
    if mask is not None:
        eta = np.where(mask, -np.inf, eta)
    mx = np.max(eta, axis=1, keepdims=True)
    z = np.exp(eta - mx)
    s = z.sum(axis=1, keepdims=True)
    logp = eta - mx - np.log(s)
    return logp, z / s


def logistic_table(g: Group, B: np.ndarray) -> np.ndarray:
    logp, p = _masked_softmax(g.design() @ B, _mask2(g))
    return p.reshape(g.shape)


def _mask2(g: Group) -> np.ndarray | None:
    return None if g.mask is None else g.mask.reshape(g.n_rows, g.card)


def implied_table(g: Group, par: Any) -> np.ndarray:
    """The CPT (shape ``g.shape``) given by the group's parameters."""
    if g.kind == "table":
        return np.asarray(par, dtype=np.float64)
    if g.noisy:
        return noisy_table(par["leak"], par["causes"])
    return logistic_table(g, par)


# =============================================================================== noisy forms: the hidden causes
def _cause_pmfs_and_cdfs(g: Group, par: Mapping[str, Any]) -> tuple[np.ndarray, np.ndarray]:
    """Per table row, each cause's distribution and cumulative distribution: (R, m, K) each, the
    leak cause first (m = 1 + number of parents)."""
    R, K = g.n_rows, g.card
    q = [np.broadcast_to(par["leak"], (R, K))]
    for i, c in enumerate(par["causes"]):
        q.append(c[g.parent_states[i]])
    q = np.stack(q, axis=1)
    G = np.cumsum(q, axis=2)
    G[..., -1] = 1.0
    return q, G


def expected_cause_counts(g: Group, counts: np.ndarray, par: Mapping[str, Any]) -> tuple[np.ndarray, list[np.ndarray]]:
    """E-step of the augmented network: expected counts of the leak cause (K,) and of each
    parent's cause per parent state (card_i, K), from the family counts ``counts`` (CPT-shaped).

    ``M[r, i, z] = Σ_y N̂(y, r) P(Z_i = z | y, r)
               = q_i(z) (Σ_{y > z} N̂(y, r) D_{-i}(y) / P(y|r) + N̂(z, r) F_{-i}(z) / P(z|r))``,
    ``F_{-i}`` the product of the other causes' cumulative distributions and ``D_{-i}`` its
    differences (the distribution of the largest other cause)."""
    R, K = g.n_rows, g.card
    q, G = _cause_pmfs_and_cdfs(g, par)
    m = G.shape[1]
    # products over the other causes, without division (prefix and suffix products)
    pre = np.ones_like(G)
    suf = np.ones_like(G)
    for j in range(1, m):
        pre[:, j] = pre[:, j - 1] * G[:, j - 1]
    for j in range(m - 2, -1, -1):
        suf[:, j] = suf[:, j + 1] * G[:, j + 1]
    Fm = pre * suf                                   # (R, m, K)
    Dm = np.diff(Fm, axis=2, prepend=0.0)            # P(max of the others = y)
    F = pre[:, -1] * G[:, -1]                        # (R, K): all causes
    P = np.diff(F, axis=1, prepend=0.0)
    N = np.asarray(counts, dtype=np.float64).reshape(R, K)
    w = np.where(P > 0, N / np.where(P > 0, P, 1.0), 0.0)  # (R, K)
    later = Dm * w[:, None, :]                       # y-indexed
    # Σ_{y > z}: reverse cumulative sum, shifted by one
    tail = np.cumsum(later[:, :, ::-1], axis=2)[:, :, ::-1]
    above = np.concatenate([tail[:, :, 1:], np.zeros((R, m, 1))], axis=2)
    M = q * (above + Fm * w[:, None, :])
    leak = M[:, 0].sum(axis=0)
    causes = []
    for i in range(m - 1):
        card_i = g.shape[i]
        acc = np.zeros((card_i, K))
        np.add.at(acc, g.parent_states[i], M[:, i + 1])
        causes.append(acc)
    return leak, causes


def _normalise(num: np.ndarray, keep: np.ndarray) -> np.ndarray:
    den = num.sum(axis=-1, keepdims=True)
    ok = den > 0
    return np.where(ok, num / np.where(ok, den, 1.0), keep)


# =============================================================================== logistic
def logistic_q(g: Group, B: np.ndarray, counts: np.ndarray, X: np.ndarray | None = None) -> float:
    """``Σ N̂(y, u) log P(y | u)`` (the M-step's objective; impossible cells carry no counts)."""
    X = g.design() if X is None else X
    logp, _ = _masked_softmax(X @ B, _mask2(g))
    N = np.asarray(counts, dtype=np.float64).reshape(g.n_rows, g.card)
    return float(_wsum(N, logp))


def _wsum(N: np.ndarray, logp: np.ndarray) -> float:
    """``Σ N log p`` with ``0 · log 0 = 0`` (impossible cells carry no counts)."""
    return float(np.sum(N * np.where(N > 0, logp, 0.0)))


def _logistic_grad_hess(X: np.ndarray, p: np.ndarray, N: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Gradient (D, K-1) and negative Hessian (D(K-1), D(K-1)) of Σ N log softmax(X B) in B[:, 1:]."""
    n = N.sum(axis=1)
    Gr = X.T @ (N - n[:, None] * p)
    pp = p[:, 1:]
    W = n[:, None, None] * (np.einsum("ra,ab->rab", pp, np.eye(pp.shape[1])) - pp[:, :, None] * pp[:, None, :])
    D = X.shape[1]
    H = np.einsum("rd,re,rab->daeb", X, X, W).reshape(D * pp.shape[1], D * pp.shape[1])
    return Gr[:, 1:], H


def _ridge(B: np.ndarray, prec: np.ndarray | None) -> float:
    """``−½ Σ prec · B²``: the log-density of independent normals N(0, 1/prec) on the
    coefficients, up to its constant (``prec`` (D, K), 0 where there is no prior)."""
    return 0.0 if prec is None else -0.5 * float(np.sum(prec * B * B))


def _newton(g: Group, B: np.ndarray, N: np.ndarray, steps: int, gtol: float,
            prec: np.ndarray | None = None) -> np.ndarray:
    """Newton steps on ``Σ N log softmax(X B) − ½ Σ prec·B²`` from ``B`` (``prec``: the
    precisions 1/sd² of a normal prior on the coefficients, or None), each halved until the
    objective rises (a GEM step on the MAP objective)."""
    X = g.design()
    mask = _mask2(g)
    N = np.asarray(N, dtype=np.float64).reshape(g.n_rows, g.card)
    B = np.array(B, dtype=np.float64)
    if prec is not None:
        prec = np.asarray(prec, dtype=np.float64).reshape(B.shape)
    logp, p = _masked_softmax(X @ B, mask)
    q = float(_wsum(N, logp)) + _ridge(B, prec)
    for _ in range(steps):
        grad, negH = _logistic_grad_hess(X, p, N)
        if prec is not None:  # the prior's gradient −prec·B and curvature diag(prec)
            grad = grad - prec[:, 1:] * B[:, 1:]
            negH = negH + np.diag(prec[:, 1:].ravel())
        if not np.max(np.abs(grad), initial=0.0) > gtol:
            break
        d = np.linalg.lstsq(negH, grad.ravel(), rcond=None)[0].reshape(grad.shape)
        if not np.all(np.isfinite(d)):
            break
        t, moved = 1.0, False
        for _ in range(40):
            Bn = B.copy()
            Bn[:, 1:] += t * d
            lpn, pn = _masked_softmax(X @ Bn, mask)
            qn = float(_wsum(N, lpn)) + _ridge(Bn, prec)
            if qn >= q:
                B, logp, p, moved = Bn, lpn, pn, qn > q
                q = qn
                break
            t *= 0.5
        if not moved:
            break
    return B


# =============================================================================== M-step, residual
def mstep(g: Group, counts: np.ndarray, par: Any, prior: np.ndarray | None = None) -> Any:
    """New parameters of group ``g`` from its pooled expected counts (and pooled pseudo-counts of
    a table or noisy form; for a logistic form ``prior`` holds the precisions 1/sd² of a normal
    prior on its coefficients, shaped like ``B``). A row, cause distribution or coefficient the
    counts do not reach keeps its value (without a prior)."""
    if g.kind == "table":
        num = counts + (prior if prior is not None else 0.0)
        if g.mask is not None:
            num = np.where(g.mask, 0.0, num)
        return _normalise(num, np.asarray(par))
    if g.noisy:
        leak_m, cause_m = expected_cause_counts(g, counts, par)
        leak_m, cause_m = _with_prior(g, leak_m, cause_m, prior)
        leak = _normalise(leak_m, par["leak"])
        causes = []
        for c_old, cm in zip(par["causes"], cause_m):
            c = _normalise(cm, c_old)
            c[0] = 0.0
            c[0, 0] = 1.0
            causes.append(c)
        return {"leak": leak, "causes": causes}
    return _newton(g, par, counts, NEWTON_STEPS, 1e-12 * max(1.0, float(np.sum(counts))),
                   None if prior is None or not np.any(prior) else prior)


def _with_prior(g: Group, leak_m: np.ndarray, cause_m: Sequence[np.ndarray], prior: np.ndarray | None):
    """Expected cause counts plus Dirichlet pseudo-counts on the cause distributions: ``prior``
    has one row per cause (the leak, then each parent's non-first states in order), the MAP
    M-step of the hidden-cause network (each cause distribution a Dirichlet row)."""
    if prior is None or not np.any(prior):
        return leak_m, list(cause_m)
    prior = np.asarray(prior, dtype=np.float64).reshape(-1, g.card)
    out, r = [], 1
    for cm in cause_m:
        add = np.zeros_like(cm)
        add[1:] = prior[r:r + cm.shape[0] - 1]
        out.append(cm + add)
        r += cm.shape[0] - 1
    return leak_m + prior[0], out


def log_prior_noisy(g: Group, par: Mapping[str, Any], prior: np.ndarray | None) -> float:
    """``Σ c log q`` over the cause distributions of a noisy group (−inf where c > 0 at q = 0)."""
    if prior is None or not np.any(prior):
        return 0.0
    prior = np.asarray(prior, dtype=np.float64).reshape(-1, g.card)
    rows = [par["leak"]] + [row for c in par["causes"] for row in c[1:]]
    q = np.asarray(rows, dtype=np.float64)
    pos = prior > 0
    if np.any(pos & (q <= 0)):
        return -math.inf
    return float(np.sum(prior[pos] * np.log(q[pos])))


def residual(g: Group, counts: np.ndarray, par: Any, prior: np.ndarray | None = None) -> np.ndarray:
    """The gradient of the log-likelihood (plus log-prior) in the group's own coordinates, records:
    per table row (or cause distribution) ``N + c − θ Σ(N + c)`` (the logit gradient; for the noisy
    forms that of the augmented network's cause CPTs, by Fisher's identity the gradient of the
    marginal likelihood); for the logistic form ``X'(N̂ − N̂(u) π) − prec·B`` in the
    non-reference coefficients (``prior``: the precisions of a normal prior, or None). Flat array."""
    if g.kind == "table":
        num = counts + (prior if prior is not None else 0.0)
        if g.mask is not None:
            num = np.where(g.mask, 0.0, num)
        return (num - np.asarray(par) * num.sum(axis=-1, keepdims=True)).ravel()
    if g.noisy:
        leak_m, cause_m = expected_cause_counts(g, counts, par)
        leak_m, cause_m = _with_prior(g, leak_m, cause_m, prior)
        parts = [leak_m - par["leak"] * leak_m.sum()]
        for c, cm in zip(par["causes"], cause_m):
            parts.append((cm[1:] - c[1:] * cm[1:].sum(axis=1, keepdims=True)).ravel())
        return np.concatenate([np.ravel(p) for p in parts])
    X = g.design()
    _, p = _masked_softmax(X @ par, _mask2(g))
    grad, _ = _logistic_grad_hess(X, p, np.asarray(counts, dtype=np.float64).reshape(g.n_rows, g.card))
    if prior is not None and np.any(prior):  # a normal prior on the coefficients: −prec·B
        prec = np.asarray(prior, dtype=np.float64).reshape(np.shape(par))
        grad = grad - prec[:, 1:] * np.asarray(par)[:, 1:]
    return grad.ravel()


def gradient_norm(network: Network, counts: Mapping[str, np.ndarray], params: Mapping[str, Any],
                  pseudo_counts: Mapping[str, np.ndarray] | None = None, *, norm: str = "l2") -> float:
    """Norm of :func:`residual` over every group (``norm`` = "l2" or "max")."""
    acc = 0.0
    for g in groups_of(network):
        r = residual(g, pooled(g, counts), params[g.source], _pooled_prior(g, pseudo_counts))
        if r.size:
            acc = max(acc, float(np.max(np.abs(r)))) if norm == "max" else acc + float(np.sum(r * r))
    return acc if norm == "max" else math.sqrt(acc)


def _pooled_prior(g: Group, pseudo_counts: Mapping[str, np.ndarray] | None) -> np.ndarray | None:
    if g.kind == "logistic":  # the precisions of its coefficients: on the source only (a tie shares them)
        return None if pseudo_counts is None or g.source not in pseudo_counts else \
            np.asarray(pseudo_counts[g.source], dtype=np.float64)
    return pooled(g, pseudo_counts)


def log_prior_logistic(g: Group, B: np.ndarray, prior: np.ndarray | None) -> float:
    """``−½ Σ prec · β²`` over a logistic group's coefficients ``B`` (``prior``: the precisions)."""
    return _ridge(np.asarray(B, dtype=np.float64), None if prior is None else np.asarray(prior, dtype=np.float64))


def uninformed_rows(g: Group, counts: np.ndarray) -> list[int]:
    """Table rows (0-based) that the data do not inform. A table row: its pooled count is 0. A
    noisy or logistic row: some parameter it uses (a parent state's strength or coefficient, or
    the leak/intercept) has no count at all, i.e. no record has that parent in that state."""
    n = np.asarray(counts, dtype=np.float64).reshape(g.n_rows, g.card).sum(axis=1)
    if g.kind == "table":
        return [int(i) for i in np.flatnonzero(n <= 0)]
    if not n.sum() > 0:
        return list(range(g.n_rows))
    bad = np.zeros(g.n_rows, dtype=bool)
    for i, c in enumerate(g.shape[:-1]):
        per_state = np.bincount(g.parent_states[i], weights=n, minlength=c)
        for s in np.flatnonzero(per_state <= 0):
            if s > 0 or g.kind == "logistic":
                bad |= g.parent_states[i] == s
    return [int(i) for i in np.flatnonzero(bad)]


# =============================================================================== starts
def random_params(g: Group, rng: np.random.Generator) -> Any:
    """A seeded random start of the group's parameters."""
    K = g.card
    if g.kind == "table":
        d = rng.dirichlet(np.ones(K), size=g.n_rows).reshape(g.shape)
        t = 0.5 * d + 0.5 / K
        if g.mask is not None:
            t = np.where(g.mask, 0.0, t)
            t = t / t.sum(axis=-1, keepdims=True)
        return t
    if g.noisy:
        leak = 0.5 * rng.dirichlet(np.ones(K)) + 0.5 * np.eye(K)[0]  # the leak mostly inactive
        causes = []
        for c in g.shape[:-1]:
            t = 0.5 * rng.dirichlet(np.ones(K), size=c) + 0.5 / K
            t[0] = np.eye(K)[0]
            causes.append(t)
        return {"leak": leak, "causes": causes}
    D = g.design().shape[1]
    B = np.zeros((D, K))
    B[:, 1:] = rng.normal(0.0, 0.5, size=(D, K - 1))
    return B


def from_table(g: Group, table: np.ndarray, *, node: str | None = None) -> Any:
    """The group's parameters read off a CPT of its form (a start given as tables).

    Noisy forms: ``L(≤ y) = F(y | every parent inactive)`` and ``Q_{i,s}(≤ y) = F(y | only parent i,
    at s) / L(≤ y)``; logistic: the coefficients maximising ``Σ θ log π`` (Newton), which are the
    table's own when it is logistic. Raises OptionError when the table is not of the form."""
    name = node or g.source
    t = np.asarray(table, dtype=np.float64)
    if g.kind == "table":
        if g.mask is not None:
            t = np.where(g.mask, 0.0, t)
            s = t.sum(axis=-1, keepdims=True)
            poss = (~g.mask).astype(np.float64)
            t = np.where(s > 0, t / np.where(s > 0, s, 1.0), poss / poss.sum(axis=-1, keepdims=True))
        return t
    if g.noisy:
        K = g.card
        F = np.cumsum(t, axis=-1)
        k = len(g.shape) - 1
        base = F[(0,) * k]
        leak = np.diff(np.concatenate([[0.0], base]))
        causes = []
        for i in range(k):
            c = np.zeros((g.shape[i], K))
            c[0, 0] = 1.0
            for s in range(1, g.shape[i]):
                idx = [0] * k
                idx[i] = s
                Fi = F[tuple(idx)]
                ratio = np.where(base > 0, Fi / np.where(base > 0, base, 1.0), np.nan)
                ratio[-1] = 1.0
                # levels where the leak is 0 do not determine the cause: take the next defined level
                for y in range(K - 2, -1, -1):
                    if not np.isfinite(ratio[y]):
                        ratio[y] = ratio[y + 1]
                ratio = np.maximum.accumulate(np.clip(ratio, 0.0, 1.0))
                c[s] = np.diff(np.concatenate([[0.0], ratio]))
            causes.append(c)
        par = {"leak": np.clip(leak, 0.0, None), "causes": causes}
    else:
        par = _newton(g, np.zeros((g.design().shape[1], g.card)), t.reshape(g.n_rows, g.card),
                      FROM_TABLE_STEPS, 1e-14)
    gap = float(np.max(np.abs(implied_table(g, par) - t)))
    if not gap <= FORM_TOL:
        raise OptionError(f"starting table of node {name!r} is not a {g.kind} table (the table implied by the "
                          f"parameters read off it differs by {gap:.3g}); give a table of that form or its parameters")
    return par


# =============================================================================== the result file's layout
def to_json(network: Network, g: Group, par: Any) -> dict[str, Any] | None:
    """The ``"parameters"`` section of a structured node (None for the table form)."""
    if g.kind == "table":
        return None
    node = network.node(g.source)
    if g.noisy:
        two = g.kind == "noisy_or"
        leak = float(par["leak"][1]) if two else [float(v) for v in par["leak"]]
        strength = {}
        for p, c in zip(node.parents, par["causes"]):
            st = network.node(p).states
            strength[p] = {st[s]: (float(c[s, 1]) if two else [float(v) for v in c[s]]) for s in range(1, len(st))}
        return {"leak": leak, "strength": strength}
    B = np.asarray(par)
    coef: dict[str, Any] = {}
    d = 1
    for p in node.parents:
        st = network.node(p).states
        coef[p] = {st[0]: [0.0] * g.card}
        for s in range(1, len(st)):
            coef[p][st[s]] = [float(v) for v in B[d]]
            d += 1
    return {"intercept": [float(v) for v in B[0]], "coefficients": coef}


def from_json(network: Network, g: Group, doc: Mapping[str, Any], *, what: str = "parameters") -> Any:
    """Internal parameters from the ``"parameters"`` layout (OptionError naming the key on a bad one)."""
    node = network.node(g.source)
    K = g.card
    where = f"{what} of node {g.source!r}"

    def vec(v: Any, key: str) -> np.ndarray:
        a = np.asarray(v, dtype=np.float64) if not isinstance(v, (str, bytes)) else np.array([np.nan])
        if a.shape != (K,) or not np.all(np.isfinite(a)):
            raise OptionError(f"{where}: {key} must be a list of {K} numbers (one per state of {g.source!r})")
        return a

    def prob(v: Any, key: str) -> float:
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not 0.0 <= float(v) <= 1.0:
            raise OptionError(f"{where}: {key} must be a probability between 0 and 1, got {v!r}")
        return float(v)

    if not isinstance(doc, Mapping):
        raise OptionError(f"{where} must be a table of keys")
    try:
        if g.noisy:
            two = g.kind == "noisy_or"
            leak = np.array([1.0 - prob(doc["leak"], "leak"), prob(doc["leak"], "leak")]) if two \
                else vec(doc["leak"], "leak")
            causes = []
            for p in node.parents:
                st = network.node(p).states
                c = np.zeros((len(st), K))
                c[0, 0] = 1.0
                for s in range(1, len(st)):
                    v = doc["strength"][p][st[s]]
                    key = f"strength.{p}.{st[s]}"
                    c[s] = [1.0 - prob(v, key), prob(v, key)] if two else vec(v, key)
                causes.append(c)
            for key, a in [("leak", leak)] + [(f"strength.{p}", c) for p, c in zip(node.parents, causes)]:
                if np.any(a < 0) or np.any(np.abs(a.sum(axis=-1) - 1.0) > 1e-6):
                    raise OptionError(f"{where}: {key} must hold distributions over the states of {g.source!r}")
            return {"leak": leak, "causes": causes}
        B = [vec(doc["intercept"], "intercept")]
        for p in node.parents:
            st = network.node(p).states
            for s in range(1, len(st)):
                B.append(vec(doc["coefficients"][p][st[s]], f"coefficients.{p}.{st[s]}"))
        B = np.stack(B)
        return B - B[:, :1]
    except (KeyError, TypeError) as e:
        raise OptionError(f"{where}: missing or malformed entry {e}; give every key of the {g.kind} layout") from None

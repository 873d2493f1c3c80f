"""Error bars on every CPT entry, and identifiability (docs/uncertainty.md).

The observed information is minus the Hessian of the fitted objective

    F = log L(θ) + Σ c·log θ − λ Σ (η − row mean η)²

(log-likelihood, Dirichlet log-prior, L2 penalty: exactly what the fit maximised) with respect
to a minimal parameterisation of the free CPTs. Each CPT row ``u`` keeps one **reference
state** ``r(u)`` (its most expected state) with logit pinned at 0; the coordinates are the
logits ``φ_uk = log θ_uk − log θ_ur`` of the other states. The softmax shift is then gone and a
zero eigenvalue of the information means a real flat direction of the objective.

Cells are set apart before the Hessian is formed:

* **no data**: rows whose expected count plus pseudo-count ``n_u = N̂(u) + c(u)`` is below
  :data:`UNINFORMED_COUNT` (no record reaches the parent configuration): interval [0, 1];
* **boundary**: cells whose expected count plus pseudo-count is below
  ``BOUNDARY_COUNT·min(1, n_u)`` (θ̂ → 0, logit → −∞). They stay at their estimate; their
  interval is one-sided, ``[0, U]`` with ``U`` the exact binomial (Clopper–Pearson) upper limit
  for zero events in ``n_u`` trials, ``1 − (α/2)^(1/n_u)``; a reference state whose other
  states are all on the boundary gets ``[1 − U, 1]``. No SE is given for them.

Standard errors of θ follow by the delta method from the covariance ``I⁻¹`` of the
coordinates; the intervals are Wald intervals on the logit scale of each θ, mapped back, so
they stay inside (0, 1).

Identifiability is read from the generalised eigenproblem ``I x = ρ M x`` where ``M`` is the
complete-data information at the estimate (block diagonal, per row
``n_u (diag θ − θθᵀ)`` restricted to the coordinates, plus the penalty's ``2λ(1 − 1/K)``
block): ``ρ`` is the share of the complete-data information that the observed data keep along
``x``, ``1 − ρ`` the fraction of missing information (Louis 1982: observed = complete −
missing), and the largest ``1 − ρ`` is EM's rate of convergence (Dempster, Laird & Rubin 1977,
§3). Directions with ``ρ ≤ FLAT_TOL`` are **flat**: every entry that loads on one gets no SE
and the interval [0, 1] ("not identified"); directions with ``ρ ≤ WEAK_TOL`` are named
(node and parent configuration) as weakly identified.

Where the switch is: with at most :data:`DENSE_MAX_PARAMETERS` coordinates the information is
formed densely, as Hessian-vector products on batches of :data:`HVP_BATCH` basis vectors
(forward-over-reverse; with at most that many coordinates the single batch is what
``jax.hessian`` computes), which bounds the memory by one batch of chunks whatever the number of rows.
Above it nothing of size P² is formed: the smallest ρ come from LOBPCG on the pencil (I, M)
and each requested column of ``I⁻¹`` from a preconditioned conjugate-gradient solve (deflated
by those eigenvectors) driven by the same batched products. The CLI computes error bars by
default only up to :data:`AUTO_MAX_PARAMETERS` free parameters and :data:`AUTO_MAX_SECONDS` estimated.
"""

from __future__ import annotations

import dataclasses

import math
import time
import warnings
from dataclasses import dataclass, field
from functools import partial
from typing import Any, Callable, Iterable, Mapping, Sequence

from ._jax import jax, jnp  # first: float64 on (adfit/_jax.py)
import numpy as np
import pandas as pd
import scipy.linalg
from scipy import stats

from .data import CodedData, load_data
from .errors import OptionError
from .likelihood import Likelihood, _loglik_logcpt, check_possible
from .network import Network
from . import forms as _forms
from . import monotone as _mono
from .params import block_shape, coefficient_log_prior, full_probs, mask_pseudo, pool_counts

#: default confidence level of the intervals
LEVEL = 0.95
#: coordinates up to which the information matrix is formed densely (P² floats, eigh in P³)
DENSE_MAX_PARAMETERS = 3000
#: the CLI computes error bars by default up to this many free parameters (--errors forces) ...
AUTO_MAX_PARAMETERS = 1000
#: ... and when the estimated time is at most this (seconds): P products × HVP_COST × one
#: gradient evaluation, timed on the data
AUTO_MAX_SECONDS = 120.0
#: one Hessian-vector product costs about this many gradient evaluations (measured 1.2–1.6)
HVP_COST = 1.5
#: basis vectors per batched Hessian-vector product
HVP_BATCH = 32
#: rows per chunk are divided by the batch, down to this
MIN_CHUNK = 64
#: a row with N̂(u) + c(u) below this (records) is "no data"
UNINFORMED_COUNT = 1e-6
#: a cell with N̂(x,u) + c(x,u) below BOUNDARY_COUNT · min(1, n_u) is "on the boundary"
BOUNDARY_COUNT = 0.01
#: ρ (observed / complete-data information along a direction) at or below this: flat
FLAT_TOL = 1e-8
#: ρ at or below this: weakly identified (named, with its rows)
WEAK_TOL = 1e-2
#: an entry whose variance direction has at least this share on flat directions is not identified
FLAT_SHARE_TOL = 1e-6
#: intervals wider than this are listed
WIDE_WIDTH = 0.5
#: at most this many weak directions are named
MAX_NAMED = 10
#: a row is named in a direction when it carries at least this share of it
NAME_SHARE = 0.05

STATUS = ("interior", "boundary", "not identified", "no data", "not computed", "constrained")
_INTERIOR, _BOUNDARY, _NOT_IDENTIFIED, _NO_DATA, _NOT_COMPUTED, _CONSTRAINED = range(6)
_FLOOR = 1e-300  # floor of θ before logs (boundary cells of an EM fit can be exact zeros)

LATENT_NOTE = ("the states of a latent node are identified only up to a relabelling (any permutation of "
               "its states fits equally well); its error bars describe this labelling, from the local "
               "curvature, and hold only if the fit is well separated from its relabelled copies")

CAUTION = ("Error bars rest on the network structure, on the missing-at-random (MAR) assumption and on a "
           "quadratic approximation of the objective at its maximum; they support, and do not replace, "
           "engineering or clinical judgement.")


# --------------------------------------------------------------------------- coordinates
@dataclass(frozen=True)
class Coordinates:
    """The minimal parameterisation at an estimate.

    Attributes:
        network: the network.
        coords: one ``(node, row, state)`` per coordinate φ (row = table row, state = index).
        sizes: coordinates per estimated node, in ``network.estimated_names`` order (a node tied
            to another has none: it shares its source's coordinates).
        reference: per free node, the reference state of every row (shape ``(rows,)``).
        status: per free node, ``(rows, card)`` int codes into :data:`STATUS` fixed before the
            Hessian (interior, boundary, no data).
        probs: per free node, the estimate ``(rows, card)``.
        n: per free node, ``N̂(x,u) + c(x,u)`` ``(rows, card)`` at the estimate.
        base: per free node, flat logits at the estimate (reference 0).
        index: per free node, flat cell index of each of its coordinates.
    """

    network: Network
    coords: tuple[tuple[str, int, int], ...]
    sizes: tuple[int, ...]
    reference: Mapping[str, np.ndarray]
    status: Mapping[str, np.ndarray]
    probs: Mapping[str, np.ndarray]
    n: Mapping[str, np.ndarray]
    base: Mapping[str, np.ndarray]
    index: Mapping[str, np.ndarray]
    # logistic nodes: (N(u) pooled over ties, CPT-shaped; the implied table) for the
    # complete-data information of their coefficient rows
    logistic: Mapping[str, tuple[np.ndarray, np.ndarray]] = field(default_factory=dict)
    # logistic nodes with a normal prior on their coefficients: the precisions 1/sd² (rows, card);
    # the prior's curvature is part of the information (the coordinates are the coefficients)
    precision: Mapping[str, np.ndarray] = field(default_factory=dict)
    # monotone nodes: (records served, room) per fraction row (adfit.monotone.served, .room) and
    # the family counts pooled over ties (CPT-shaped)
    monotone: Mapping[str, tuple] = field(default_factory=dict)

    @property
    def size(self) -> int:
        return len(self.coords)

    def logits_at(self, phi: np.ndarray) -> dict[str, np.ndarray]:
        """Logits (reference 0) of every free node at coordinates ``phi`` (the estimate at 0)."""
        phi = np.asarray(phi, dtype=np.float64)
        out, off = {}, 0
        for name, s in zip(self.network.estimated_names, self.sizes):
            eta = np.array(self.base[name])
            eta[self.index[name]] += phi[off:off + s]
            off += s
            out[name] = eta.reshape(block_shape(self.network, name))
        return out

    def probs_at(self, phi: np.ndarray) -> dict[str, np.ndarray]:
        """CPTs of every node (fixed ones included) at coordinates ``phi``."""
        out = {}
        for name, eta in self.logits_at(phi).items():
            e = np.exp(eta - eta.max(axis=-1, keepdims=True))
            out[name] = e / e.sum(axis=-1, keepdims=True)
        for name in self.network.free_names:
            if name not in out:
                out[name] = out[self.network.tie_source(name)]
        for name in self.network.fixed_names:
            out[name] = self.network.fixed_table(name)
        return out

    def offsets(self) -> dict[str, int]:
        out, off = {}, 0
        for name, s in zip(self.network.estimated_names, self.sizes):
            out[name] = off
            off += s
        return out

    def row_slices(self) -> dict[tuple[str, int], np.ndarray]:
        """Coordinate indices of every (node, row) that has coordinates."""
        out: dict[tuple[str, int], list[int]] = {}
        for j, (name, row, _) in enumerate(self.coords):
            out.setdefault((name, row), []).append(j)
        return {k: np.asarray(v) for k, v in out.items()}


def _cols(network: Network, name: str) -> int:
    """Cells per row of an estimated node's block of parameters: its states, or 2 for the
    fraction rows of a monotone node (:func:`adfit.params.block_shape`)."""
    return block_shape(network, network.tie_source(name))[-1]


def make_coordinates(network: Network, probs: Mapping[str, np.ndarray],
                     n_cells: Mapping[str, np.ndarray],
                     logistic: Mapping[str, tuple[np.ndarray, np.ndarray]] | None = None,
                     precision: Mapping[str, np.ndarray] | None = None,
                     monotone: Mapping[str, tuple[np.ndarray, np.ndarray]] | None = None) -> Coordinates:
    """Reference states, boundary and no-data cells, and the coordinates, at an estimate.

    ``n_cells``: per estimated node, expected counts plus pseudo-counts (CPT-shaped; pooled over
    tied nodes). Impossible cells (and the one state left in a row whose other cells are all
    impossible) are "constrained": fixed by the network, no coordinate, no error bar.
    """
    coords: list[tuple[str, int, int]] = []
    sizes, ref_d, st_d, pr_d, n_d, base_d, idx_d = [], {}, {}, {}, {}, {}, {}
    for name in network.estimated_names:
        K = _cols(network, name)
        th = np.asarray(probs[name], dtype=np.float64).reshape(-1, K)
        n = np.asarray(n_cells[name], dtype=np.float64).reshape(-1, K)
        nu = n.sum(axis=1)
        imp = (np.zeros(th.shape, bool) if _forms.has_rows(network, name)
               else network.impossible_mask(name).reshape(-1, K))
        ref = np.argmax(np.where(imp, -np.inf, n + 1e-12 * th), axis=1)  # most expected state; ties by the estimate
        status = np.full(th.shape, _INTERIOR, dtype=np.int64)
        status[n < BOUNDARY_COUNT * np.minimum(1.0, nu)[:, None]] = _BOUNDARY
        status[np.arange(len(ref)), ref] = _INTERIOR
        status[nu < UNINFORMED_COUNT] = _NO_DATA
        status[imp] = _CONSTRAINED
        status[(imp.sum(axis=1) == K - 1)[:, None] & ~imp] = _CONSTRAINED
        if logistic and name in logistic:
            # coefficient rows: the first child state is the reference (its coefficient is 0 by
            # definition), nothing is on a boundary; a row that serves no record has no data
            n_u, _table = logistic[name]
            served = _forms.row_sums(network, name, np.broadcast_to(n_u, _table.shape))[:, 0]
            ref = np.zeros(th.shape[0], dtype=np.int64)
            status = np.full(th.shape, _INTERIOR, dtype=np.int64)
            status[served < UNINFORMED_COUNT] = _NO_DATA
            status[:, 0] = _CONSTRAINED
        if monotone and name in monotone:
            # fraction rows (1 − σ, σ) of a monotone node (adfit.monotone): the larger cell is the
            # reference; a fraction on a bound (a binding dominance constraint, or a cell at 0) is
            # on the boundary (no coordinate: the error bars are conditional on it, no two-sided
            # interval through the bound); one whose room is empty does not move the table
            served, room = monotone[name][:2]
            ref = np.argmax(th, axis=1)
            status = np.full(th.shape, _INTERIOR, dtype=np.int64)
            other = 1 - ref
            at = th[np.arange(len(ref)), other] <= _mono.BOUND_TOL
            status[np.flatnonzero(at), other[at]] = _BOUNDARY
            status[np.asarray(served) < UNINFORMED_COUNT] = _NO_DATA
            status[np.asarray(room) <= 1e-12] = _CONSTRAINED
        lt = np.log(np.maximum(th, _FLOOR))
        base = lt - lt[np.arange(len(ref)), ref][:, None]
        free_cells = []
        for u in range(th.shape[0]):
            for k in range(K):
                if k != ref[u] and status[u, k] == _INTERIOR:
                    coords.append((name, u, k))
                    free_cells.append(u * K + k)
        sizes.append(len(free_cells))
        ref_d[name], st_d[name], pr_d[name], n_d[name] = ref, status, th, n
        base_d[name] = base.reshape(-1)
        idx_d[name] = np.asarray(free_cells, dtype=np.int32)
    return Coordinates(network, tuple(coords), tuple(sizes), ref_d, st_d, pr_d, n_d, base_d, idx_d,
                       dict(logistic or {}),
                       {k: np.asarray(v, dtype=np.float64) for k, v in (precision or {}).items() if np.any(v)},
                       dict(monotone or {}))


# --------------------------------------------------------------------------- the objective in JAX
def _objective(network: Network, groups, sizes: tuple[int, ...], phi, aux):
    base, index, pseudo, fixed_lc, l2, codes, weights = aux
    own, lp, pen = dict(fixed_lc), 0.0, 0.0
    off = k = 0
    for node in network.nodes:
        if node.fixed is not None or node.tied_to is not None:
            continue
        s = sizes[k]
        k += 1
        eta = base[node.name]
        if s:
            eta = eta.at[index[node.name]].add(phi[off:off + s])
        off += s
        if _forms.has_rows(network, node.name):  # parameter rows: their table is implied
            eta = eta.reshape(block_shape(network, node.name))
            rows = jax.nn.log_softmax(eta, axis=-1)
            own[node.name] = _forms.implied_log_table(network, node.name, rows)
            if _forms.is_logistic(network, node.name):  # a normal prior on the coefficients: −½ Σ prec β²
                lp = lp + coefficient_log_prior(eta, pseudo[node.name], jnp)
            else:
                lp = lp + jnp.sum(jnp.where(pseudo[node.name] > 0, pseudo[node.name] * rows, 0.0))
            pen = pen + jnp.sum((eta - jnp.mean(eta, axis=-1, keepdims=True)) ** 2)
            continue
        eta = eta.reshape(network.cpt_shape(node.name))
        lc = jax.nn.log_softmax(eta, axis=-1)
        own[node.name] = lc
        lp = lp + jnp.sum(pseudo[node.name] * lc)
        pen = pen + jnp.sum((eta - jnp.mean(eta, axis=-1, keepdims=True)) ** 2)
    # a tied node's log-CPT is its source's (the same parameters in both families)
    lcs = tuple(own[network.tie_source(n.name) if n.fixed is None else n.name] for n in network.nodes)
    ll = _loglik_logcpt(network, groups, lcs, codes, weights)
    return ll + lp - l2 * pen


@partial(jax.jit, static_argnums=(0, 1, 2))
def _value_and_grad(network: Network, groups, sizes, phi, aux):
    return jax.value_and_grad(lambda p: _objective(network, groups, sizes, p, aux))(phi)


@partial(jax.jit, static_argnums=(0, 1, 2))
def _hvp_batch(network: Network, groups, sizes, phi, vecs, aux):
    """Rows of ``vecs`` times the Hessian of F (forward-over-reverse)."""
    grad = jax.grad(lambda p: _objective(network, groups, sizes, p, aux))
    return jax.vmap(lambda v: jax.jvp(grad, (phi,), (v,))[1])(vecs)


class _Problem:
    """The objective at an estimate in the coordinates, with batched Hessian-vector products."""

    def __init__(self, network: Network, data: CodedData, coordinates: Coordinates,
                 pseudo: Mapping[str, np.ndarray], l2: float, batch: int, likelihood: Likelihood | None = None,
                 rechunk: bool = True):
        self.network = network
        self.co = coordinates
        self.batch = max(1, min(batch, coordinates.size))
        # smaller chunks when many tangents travel together: memory ~ batch × chunk rows
        lik = likelihood if likelihood is not None else Likelihood(network, data)
        chunks = [c for c in (getattr(g, "chunk", None) for g in lik.plan.groups)
                  if isinstance(c, int) and 0 < c < (1 << 30)]
        if rechunk and chunks and self.batch > 1 and max(MIN_CHUNK, min(chunks) // self.batch) < min(chunks):
            lik = Likelihood(network, data, chunk=max(MIN_CHUNK, min(chunks) // self.batch))
        self.lik = lik
        with np.errstate(divide="ignore"):
            fixed_lc = {n: jnp.asarray(np.log(network.fixed_table(n))) for n in network.fixed_names}
        self.aux = ({k: jnp.asarray(v) for k, v in coordinates.base.items()},
                    {k: jnp.asarray(v) for k, v in coordinates.index.items()},
                    {k: jnp.asarray(np.asarray(pseudo[k], dtype=np.float64)) for k in network.free_names},
                    fixed_lc, jnp.asarray(float(l2)), self.lik._codes, self.lik._weights)
        self.phi0 = jnp.zeros(coordinates.size)
        self.n_products = 0

    def value_and_grad(self, phi: np.ndarray | None = None) -> tuple[float, np.ndarray]:
        p = self.phi0 if phi is None else jnp.asarray(phi, dtype=jnp.float64)
        v, g = _value_and_grad(self.network, self.lik.plan.groups, self.co.sizes, p, self.aux)
        return float(v), np.asarray(g)

    def information_times(self, V: np.ndarray, *, full_batches: bool = True) -> np.ndarray:
        """``I @ V`` for a (P, m) array (I = −Hessian of F), in batches of ``self.batch``
        columns; a last, narrower batch is padded to the full batch (``full_batches``, one
        compiled program) or to the next power of two (at most log2(batch) more programs)."""
        V = np.asarray(V, dtype=np.float64)
        P, m = V.shape
        out = np.empty((P, m))
        for s in range(0, m, self.batch):
            cols = V[:, s:s + self.batch]
            w = cols.shape[1]
            B = self.batch if full_batches else min(self.batch, 1 << max(0, math.ceil(math.log2(w))))
            vecs = np.zeros((B, P))
            vecs[:w] = cols.T
            hv = np.asarray(_hvp_batch(self.network, self.lik.plan.groups, self.co.sizes, self.phi0,
                                       jnp.asarray(vecs), self.aux))
            out[:, s:s + w] = -hv[:w].T
            self.n_products += w
        return out

    def dense_information(self) -> np.ndarray:
        info = self.information_times(np.eye(self.co.size))
        return 0.5 * (info + info.T)


def observed_information(network: Network, data: Any, probs: Mapping[str, np.ndarray], *,
                         pseudo_counts: Mapping[str, np.ndarray] | None = None, l2: float = 0.0,
                         batch: int = HVP_BATCH) -> tuple[np.ndarray, Coordinates]:
    """The observed information (−Hessian of F) in the coordinates at ``probs`` (any point).

    Returns ``(I, coordinates)``; ``coordinates.coords[j]`` names coordinate ``j``. Dense: use
    it for small problems (P ≤ :data:`DENSE_MAX_PARAMETERS`).
    """
    coded = load_data(network, data)
    pseudo = _pseudo(network, pseudo_counts)
    lik = Likelihood(network, coded)
    full = _full_probs(network, probs)
    check_possible(lik, full, given="the fitted CPTs")
    _, counts = lik.expected_counts(full)
    counts = pool_counts(network, counts)
    co = make_coordinates(network, full, {k: counts[k] + pseudo[k] for k in network.estimated_names})
    pb = _Problem(network, coded, co, pseudo, l2, batch)
    return pb.dense_information(), co


def coordinate_gradient(co: Coordinates, l2: float = 0.0) -> np.ndarray:
    """∂F/∂φ at the estimate from the expected counts (Fisher's identity):
    ``n(x,u) − θ(x|u) n_u − 2λ (η − row mean η)`` for each coordinate (n: counts + pseudo-counts)."""
    g = np.empty(co.size)
    for j, (name, u, k) in enumerate(co.coords):
        n = co.n[name][u]
        g[j] = n[k] - co.probs[name][u, k] * n.sum()
        if name in co.precision:  # −prec·β, the coordinate being the coefficient β itself
            g[j] -= co.precision[name][u, k] * co.base[name].reshape(co.probs[name].shape)[u, k]
        if l2:
            eta = co.base[name].reshape(co.probs[name].shape)[u]
            g[j] -= 2.0 * l2 * (eta[k] - eta.mean())
    return g


def complete_information(co: Coordinates, l2: float = 0.0) -> dict[tuple[str, int], np.ndarray]:
    """Complete-data information per (node, row) block in the coordinates, at the estimate.

    ``n_u (diag θ_s − θ_s θ_sᵀ) + 2λ (1 − 11ᵀ/K)`` over the row's coordinate states ``s``
    (``n_u`` = expected count plus pseudo-counts of the parent configuration).
    """
    out = {}
    lblocks = {}
    for name, (n_u, table) in co.logistic.items():
        # Σ_u X_ud N(u) (diag π_u − π_u π_uᵀ): the complete-data information of coefficient row d
        cov = np.asarray(n_u)[..., None] * (np.einsum("...k,kl->...kl", table, np.eye(table.shape[-1]))
                                            - table[..., :, None] * table[..., None, :])
        lblocks[name] = _row_sums_matrix(co.network, name, cov)
    for (name, row), js in co.row_slices().items():
        K = _cols(co.network, name)
        states = [co.coords[j][2] for j in js]
        if name in lblocks:
            blk = lblocks[name][row][np.ix_(states, states)]
            if name in co.precision:  # the normal prior's curvature on the coefficients
                blk = blk + np.diag(co.precision[name][row, states])
            if l2:
                blk = blk + 2.0 * l2 * (np.eye(len(states)) - 1.0 / K)
            out[(name, row)] = blk
            continue
        th = co.probs[name][row, states]
        # a monotone fraction pair: the records of its configuration (virtual counts are no records)
        nu = co.monotone[name][0][row] if name in co.monotone else co.n[name][row].sum()
        blk = nu * (np.diag(th) - np.outer(th, th))
        if l2:
            blk = blk + 2.0 * l2 * (np.eye(len(states)) - 1.0 / K)
        out[(name, row)] = blk
    return out


def _row_sums_matrix(network: Network, name: str, m: np.ndarray) -> np.ndarray:
    """:func:`adfit.forms.row_sums` of a (*CPT rows, K, K) array: per coefficient row the sum
    over the parent configurations it applies to (rows, K, K)."""
    K = m.shape[-1]
    flat = m.reshape(*m.shape[:-2], K * K)
    R = _forms.cause_shape(network, name)[0]
    k = flat.ndim - 1
    out = np.empty((R, K * K))
    out[0] = flat.reshape(-1, K * K).sum(axis=0)
    r = 1
    for i, p in enumerate(network.node(name).parents):
        c = network.node(p).card
        per = flat.sum(axis=tuple(j for j in range(k) if j != i))
        out[r:r + c - 1] = per[1:]
        r += c - 1
    return out.reshape(R, K, K)


def _block_matrix(co: Coordinates, blocks: Mapping[tuple[str, int], np.ndarray]) -> np.ndarray:
    M = np.zeros((co.size, co.size))
    for key, js in co.row_slices().items():
        M[np.ix_(js, js)] = blocks[key]
    return M


# --------------------------------------------------------------------------- results
@dataclass(frozen=True)
class Uncertainty:
    """Error bars and identifiability of a fit (JSON form: :meth:`node_sections`, :meth:`summary`).

    Arrays are CPT-shaped per free node (``network.cpt_shape``): ``se`` (NaN where no SE is
    given), ``lower``/``upper`` (interval), ``status`` (codes into :data:`STATUS`).
    """

    network: Network
    level: float
    method: str
    se: Mapping[str, np.ndarray]
    lower: Mapping[str, np.ndarray]
    upper: Mapping[str, np.ndarray]
    status: Mapping[str, np.ndarray]
    coordinates: Coordinates
    relative_eigenvalues: np.ndarray          # ρ, ascending (all, or the smallest found)
    eigenvalues: np.ndarray | None            # of I itself, ascending (dense only)
    directions: tuple[dict[str, Any], ...]    # named flat / weak / negative directions
    missing: Mapping[str, dict[str, Any]]     # per node fraction of missing information
    em_rate: float | None                     # largest fraction of missing information
    gradient_norm: float                      # of F in the coordinates at the estimate
    information: np.ndarray | None = None     # dense I (coordinates order)
    covariance: np.ndarray | None = None      # dense I⁻¹ on the identified directions
    notes: tuple[str, ...] = ()
    wide: float = WIDE_WIDTH
    settings: Mapping[str, Any] = field(default_factory=dict)
    # noisy and logistic nodes: the CPT the parameter rows imply (``se`` etc. are on it, by the delta method) and
    # the parameter rows' own error bars {"se", "lower", "upper", "status"} (row-block shaped)
    tables: Mapping[str, np.ndarray] = field(default_factory=dict)
    parameters: Mapping[str, Mapping[str, np.ndarray]] = field(default_factory=dict)

    # -- lists ---------------------------------------------------------------------------
    def _label(self, name: str, row: int) -> dict[str, str]:
        node = self.network.node(name)
        return dict(zip(node.parents, self.network.parent_config_labels(name)[row]))

    def entries(self, code: int) -> list[dict[str, Any]]:
        out = []
        for name in self.network.free_names:
            st = self.status[name].reshape(-1, self.network.node(name).card)
            for u, k in zip(*np.nonzero(st == code)):
                out.append(self._entry(name, int(u), int(k)))
        return out

    def _entry(self, name: str, u: int, k: int) -> dict[str, Any]:
        K = self.network.node(name).card
        lo, hi = self.lower[name].reshape(-1, K)[u, k], self.upper[name].reshape(-1, K)[u, k]
        return {"node": name, "row": u, "parents": self._label(name, u), "state": self.network.node(name).states[k],
                "estimate": float(np.asarray(self.tables[name]).reshape(-1, K)[u, k] if name in self.tables
                                  else self.coordinates.probs[name][u, k]), "interval": [float(lo), float(hi)],
                "width": float(hi - lo), "status": STATUS[int(self.status[name].reshape(-1, K)[u, k])]}

    def wide_entries(self) -> list[dict[str, Any]]:
        out = []
        for name in self.network.free_names:
            K = self.network.node(name).card
            width = (self.upper[name] - self.lower[name]).reshape(-1, K)
            st = self.status[name].reshape(-1, K)
            for u, k in zip(*np.nonzero((width > self.wide) & (st != _NOT_COMPUTED))):
                out.append(self._entry(name, int(u), int(k)))
        return sorted(out, key=lambda e: -e["width"])

    def rows_with(self, code: int) -> list[dict[str, Any]]:
        out = []
        for name in self.network.free_names:
            st = self.status[name].reshape(-1, self.network.node(name).card)
            for u in np.flatnonzero((st == code).any(axis=1)):
                out.append({"node": name, "row": int(u), "parents": self._label(name, int(u))})
        return out

    def prior_only_rows(self) -> list[dict[str, Any]]:
        """Rows no record reaches that a prior alone informs (N̂(u) ≈ 0 < c(u))."""
        out = []
        pc = self.settings.get("_pseudo") or {}
        for name in self.network.free_names:
            c = np.asarray(pc.get(name, 0.0))
            if not np.any(c) or _forms.is_logistic(self.network, name):  # precisions of coefficients, not counts
                continue
            K = self.network.node(name).card
            n = self.coordinates.n[name]
            cu = np.broadcast_to(c, block_shape(self.network, name)).reshape(-1, K).sum(axis=1)  # CPT or cause rows
            rows = _forms.has_rows(self.network, name)  # then u is a cause row, not a table row
            for u in np.flatnonzero((n.sum(axis=1) - cu < UNINFORMED_COUNT) & (cu > 0)):
                out.append({"node": name, "row": int(u), "parents": self._label(name, int(u))} if not rows
                           else {"node": name, "row": int(u), **_cause_row(self.network, name, int(u))})
        return out

    # -- JSON ------------------------------------------------------------------------------
    def node_sections(self) -> dict[str, dict[str, Any]]:
        """Per free node: "se", "interval" (pair of tables), "se_status", "missing_information"."""
        net = self.network
        out = {}
        for name in net.free_names:
            K = net.node(name).card
            se = self.se[name].reshape(-1, K)
            out[name] = {
                "se": [[None if not np.isfinite(x) else float(x) for x in row] for row in se],
                "interval": [net.array_to_table(name, self.lower[name]), net.array_to_table(name, self.upper[name])],
                "se_status": [[STATUS[int(c)] for c in row] for row in self.status[name].reshape(-1, K)],
                "missing_information": self.missing.get(name),
            }
            src = net.tie_source(name)
            if src in self.parameters:
                par = self.parameters[src]
                st = par["status"]

                def layout(a, src=src, reference=0.0):
                    a = np.asarray(a, dtype=np.float64)
                    return _nan_to_none(_forms.parameters_layout(net, src, np.where(np.isfinite(a), a, np.nan),
                                                                 reference=reference))

                out[name]["parameters_se"] = layout(par["se"], reference=None)
                out[name]["parameters_interval"] = [layout(par["lower"]), layout(par["upper"])]
                out[name]["parameters_status"] = {lab: [STATUS[int(c)] for c in row]
                                                  for lab, row in zip(_forms.cause_row_labels(net, src), st)}
        return out

    def summary(self) -> dict[str, Any]:
        ev = self.eigenvalues
        return {
            "level": self.level,
            "method": self.method,
            "interval_kind": "Wald interval on the logit scale of each entry (delta method), mapped back to [0, 1]",
            "boundary_rule": (f"a cell with expected count plus pseudo-count below {BOUNDARY_COUNT:g} x min(1, n_u) is on "
                              f"the boundary: no SE; interval [0, U], U = 1 - (alpha/2)^(1/n_u) (exact binomial "
                              f"upper limit for zero events in n_u = N(u) + c(u) records; optimistic when the "
                              f"family is partly hidden); its reference state gets [1 - U, 1] if nothing else "
                              f"in the row is interior"),
            "n_free_parameters": int(self.network.n_free_parameters()),
            "n_coordinates": int(self.coordinates.size),
            "gradient_norm": self.gradient_norm,
            "eigenvalues": None if ev is None else {
                "smallest": [float(x) for x in ev[:10]], "largest": float(ev[-1]) if len(ev) else None,
                "meaning": "observed information in the coordinates (logits against each row's reference state)"},
            "relative_eigenvalues": {
                "smallest": [float(x) for x in self.relative_eigenvalues[:10]],
                "meaning": "observed over complete-data information along each direction (1 - fraction of missing information)"},
            "em_rate": self.em_rate,
            "em_rate_meaning": "largest fraction of missing information; EM converges linearly at this rate",
            "flat_tol": FLAT_TOL, "weak_tol": WEAK_TOL,
            "directions": list(self.directions),
            "not_identified": self.rows_with(_NOT_IDENTIFIED),
            "no_data_rows": self.rows_with(_NO_DATA),
            "prior_only_rows": self.prior_only_rows(),
            "boundary_entries": self.entries(_BOUNDARY),
            "wide_threshold": self.wide,
            "wide_entries": self.wide_entries(),
            "latent": {n: LATENT_NOTE for n in relabelable_latent(self.network)},
            "notes": list(self.notes),
            "caution": CAUTION,
        }

    def format_text(self, *, max_list: int = 10) -> str:
        return format_uncertainty(self.summary(), self.node_sections(), network=self.network, max_list=max_list)


# --------------------------------------------------------------------------- the computation
def compute_uncertainty(network: Network, data: Any, probs: Mapping[str, np.ndarray], *,
                        pseudo_counts: Mapping[str, np.ndarray] | None = None, l2: float = 0.0,
                        level: float = LEVEL, wide: float = WIDE_WIDTH, method: str = "auto",
                        nodes: Iterable[str] | None = None, batch: int = HVP_BATCH,
                        cg_tol: float = 1e-10, cg_max_iter: int = 500, n_eig: int = 8,
                        converged: bool | None = None, likelihood: Likelihood | None = None,
                        missing: Iterable[str] | None = None, count_column: str | None = None,
                        ignore_columns: Iterable[str] = ()) -> Uncertainty:
    """Error bars and identifiability at the estimate ``probs`` (module docstring).

    Args:
        pseudo_counts, l2: the prior and penalty of the fit (the Hessian is of that objective).
        level: confidence level of the intervals.
        wide: intervals wider than this are listed.
        method: ``"dense"``, ``"matrix-free"`` or ``"auto"`` (dense up to
            :data:`DENSE_MAX_PARAMETERS` coordinates).
        nodes: with the matrix-free method, the free nodes whose error bars are computed (all by
            default; each costs a solve per coordinate). The dense method computes all.
        batch: basis vectors per batched Hessian-vector product (memory ~ batch × chunk).
        cg_tol, cg_max_iter, n_eig: the matrix-free solves and the number of smallest ρ sought.
        converged: whether the fit's stopping rule held (a note is added when False).
        likelihood: a :class:`adfit.likelihood.Likelihood` of this network and data to reuse.
    """
    if (refusal := structure_refusal(network)) is not None:
        raise OptionError(refusal)
    if not (0 < level < 1):
        raise OptionError(f"level must be between 0 and 1 (e.g. 0.95), got {level}")
    if not (wide > 0):
        raise OptionError(f"the wide-interval threshold must be > 0, got {wide}")
    if method not in ("auto", "dense", "matrix-free"):
        raise OptionError(f"method must be 'auto', 'dense' or 'matrix-free', got {method!r}")
    if not (l2 >= 0) or not math.isfinite(l2):
        raise OptionError(f"l2 must be a finite number >= 0, got {l2}")
    if not network.free_names:
        raise OptionError("every CPT of the network is fixed; there is nothing to put error bars on")
    coded = load_data(network, data, missing=missing, count_column=count_column, ignore_columns=ignore_columns)
    pseudo = _pseudo(network, pseudo_counts)
    wanted = _wanted_nodes(network, nodes)
    full = _full_probs(network, probs)
    lik = likelihood if likelihood is not None else Likelihood(network, coded)
    check_possible(lik, full, given="the fitted CPTs")
    _, counts = lik.expected_counts(full)
    # noisy and logistic nodes: the coordinates are on their parameter rows, read off the (implied) table
    row_nodes = [n for n in network.estimated_names if _forms.has_rows(network, n)]
    rows_at = dict(full)
    for n in row_nodes:
        rows_at[n] = _forms.rows_from_table(network, n, full[n])
    logistic = {}
    for n in row_nodes:
        if _forms.is_logistic(network, n):
            fam = sum((np.asarray(counts[t]) for t in network.tied_names(n)), np.asarray(counts[n]))
            logistic[n] = (fam.sum(axis=-1, keepdims=True), np.asarray(full[n], dtype=np.float64))
    monotone = {}
    for n in row_nodes:
        if _forms.is_monotone(network, n):
            fam = sum((np.asarray(counts[t]) for t in network.tied_names(n)), np.asarray(counts[n]))
            monotone[n] = (_mono.served(network, n, fam), _mono.room(network, n, full[n]), fam)
    counts = pool_counts(network, counts, rows_at)
    # a logistic node's prior entries are the precisions of its coefficients, not pseudo-counts
    co = make_coordinates(network, rows_at, {k: counts[k] + (0.0 if k in logistic else pseudo[k])
                                             for k in network.estimated_names}, logistic,
                          precision={k: pseudo[k] for k in logistic}, monotone=monotone)
    P = co.size
    if method == "auto":
        method = "dense" if P <= DENSE_MAX_PARAMETERS else "matrix-free"
    notes: list[str] = []
    if converged is False:
        notes.append("the fit did not converge: the error bars assume a maximum and may be meaningless")
    z = float(stats.norm.ppf(0.5 + level / 2))
    blocks = complete_information(co, l2)
    if P == 0:
        sec = _assemble(co, level, z, _CovBlocks(co, {}), np.zeros((0, 0)), blocks, wanted)
        for n in row_nodes:
            parts, _ = _implied_table_errors(co, n, level, z, _CovBlocks(co, {}), sec[3][n], wanted)
            for d, a in zip(sec, parts):
                d[n] = a
        sec = _with_tied(network, *sec)
        return Uncertainty(network, level, method, *sec, co, np.zeros(0), np.zeros(0), (),
                           {n: _missing_none(co, network.tie_source(n)) for n in network.free_names}, None, 0.0,
                           notes=tuple(notes + ["no coordinate is left to estimate (every row is on the boundary or has no data)"]),
                           wide=wide, settings={"_pseudo": pseudo, "l2": l2})
    pb = _Problem(network, coded, co, pseudo, l2, batch, lik)
    gnorm = float(np.linalg.norm(coordinate_gradient(co, l2)))
    info = cov = ev = None
    face = _face_basis(co)
    if face is not None and method != "dense":
        raise OptionError(f"error bars: the estimate of the monotone node(s) {', '.join(face[1])} pools configurations "
                          f"through ties between predecessors, which the matrix-free method ({P} coordinates > "
                          f"{DENSE_MAX_PARAMETERS}) does not handle; compute them with the dense method or fit "
                          f"without error bars")
    if method == "dense":
        info = pb.dense_information()
        ev = np.linalg.eigvalsh(info)
        if face is not None:
            # the information restricted to the face of the binding constraints (Aitchison &
            # Silvey 1958, Ann. Math. Statist. 29(3): the covariance of a restricted maximum is
            # W (Wᵀ I W)⁻¹ Wᵀ with W a basis of the directions the constraints leave free)
            W = face[0]
            info = _lagrangian_information(info, pb.value_and_grad()[1], face[2])
            info_w = W.T @ info @ W
            rho, Xw = _generalised_eigh(info_w, W.T @ _block_matrix(co, blocks) @ W)
            X = W @ Xw
            ev = np.linalg.eigvalsh(info_w)
            notes.append(f"the estimate of the monotone node(s) {', '.join(face[1])} pools configurations through "
                         f"ties between predecessors (binding constraints on two or more listed parents); the error "
                         f"bars are conditional on those ties, as on the other binding constraints")
        else:
            rho, X = _generalised_eigh(info, _block_matrix(co, blocks))
        ok = rho > FLAT_TOL
        cov = (X[:, ok] / rho[ok]) @ X[:, ok].T
        flat_X = X[:, ~ok]
        offs = co.offsets()
        node_cov = _CovBlocks(co, {n: cov[offs[n]:offs[n] + sz, offs[n]:offs[n] + sz]
                                   for n, sz in zip(network.estimated_names, co.sizes)})
        all_rho, all_X = rho, X
    else:
        all_rho, all_X, node_cov, flat_X, cg_note = _matrix_free(pb, co, blocks, wanted, cg_tol, cg_max_iter, n_eig)
        notes.extend(cg_note)
        notes.append(f"matrix-free: {P} coordinates > {DENSE_MAX_PARAMETERS}; the relative eigenvalues listed are "
                     f"only the smallest {len(all_rho)} (LOBPCG), the error bars come from conjugate-gradient solves")
    if np.any(all_rho < -FLAT_TOL):
        notes.append("the observed information has negative curvature: the estimate is not a local maximum "
                     "(a saddle or an unconverged fit); the entries loading on those directions get no error bar")
    if gnorm > 1e-3 * max(1.0, math.sqrt(coded.n_rows)):
        notes.append(f"the gradient at the estimate is not small ({gnorm:.3g}); the error bars assume a maximum")
    se, lower, upper, status = _assemble(co, level, z, node_cov, flat_X, blocks, wanted)
    param_status = dict(status)
    tables, params_eb = {}, {}
    for n in row_nodes:
        params_eb[n] = {"se": se[n], "lower": lower[n], "upper": upper[n], "status": status[n]}
        (se[n], lower[n], upper[n], status[n]), tables[n] = _implied_table_errors(co, n, level, z, node_cov, status[n], wanted)
    se, lower, upper, status = _with_tied(network, se, lower, upper, status)
    tables = {m: tables[network.tie_source(m)] for m in network.free_names if network.tie_source(m) in tables}
    directions = _name_directions(co, all_rho, all_X, blocks, info)
    missing_info = {n: _missing_fraction(co, network.tie_source(n), param_status, node_cov, blocks) if n in wanted
                    else None for n in network.free_names}
    em_rate = (1.0 if np.any(all_rho <= FLAT_TOL) else float(np.clip(1.0 - all_rho.min(), 0.0, 1.0))) if len(all_rho) else None
    return Uncertainty(network, level, method, se, lower, upper, status, co, all_rho, ev, tuple(directions),
                       missing_info, em_rate, gnorm, info, cov, tuple(notes), wide,
                       {"_pseudo": pseudo, "l2": l2, "hessian_vector_products": pb.n_products}, tables, params_eb)


def relabelable_latent(network: Network) -> list[str]:
    """Latent nodes whose states could be permuted without changing the fit: free CPT, and no
    fixed CPT of the node's children mentions them (a fixed table pins the labelling)."""
    pinned = {p for n in network.nodes if n.fixed is not None for p in n.parents}
    return [n.name for n in network.nodes if n.latent and n.fixed is None and n.name not in pinned]


def _with_tied(network: Network, *tables: dict[str, np.ndarray]) -> tuple[dict[str, np.ndarray], ...]:
    """Per-node tables of the estimated nodes, with each tied node given its source's (the same
    parameters, so the same error bars)."""
    out = []
    for t in tables:
        t = dict(t)
        for name in network.free_names:
            if name not in t:
                t[name] = t[network.tie_source(name)]
        out.append(t)
    return tuple(out)


def _wanted_nodes(network: Network, nodes: Iterable[str] | None) -> set[str]:
    """The free nodes error bars are asked for, with the source of every tied node among them."""
    if nodes is None:
        return set(network.free_names)
    out = _wanted_nodes_given(network, nodes)
    return out | {network.tie_source(n) for n in out}


def _wanted_nodes_given(network: Network, nodes: Iterable[str]) -> set[str]:
    out = set()
    for n in nodes:
        network.index(n)
        if n not in network.free_names:
            raise OptionError(f"node {n!r} has a fixed CPT; error bars are for free nodes ({', '.join(network.free_names)})")
        out.add(n)
    return out


def _pseudo(network: Network, pseudo_counts: Mapping[str, np.ndarray] | None) -> dict[str, np.ndarray]:
    out = {}
    for name in network.free_names:
        c = None if pseudo_counts is None else pseudo_counts.get(name)
        shape = block_shape(network, network.tie_source(name))  # cause rows for a noisy node
        # no prior on the node: zeros in its own block's shape (a prior file with entries on other
        # nodes hands CPT-shaped zeros for it, which a monotone node's fraction rows do not take)
        c = (np.zeros(shape) if c is None or not np.any(c)
             else np.broadcast_to(np.asarray(c, dtype=np.float64), shape).copy())
        if not np.all(np.isfinite(c)) or np.any(c < 0):
            raise OptionError(f"node {name!r}: pseudo-counts must be finite and >= 0")
        out[name] = c
    return mask_pseudo(network, out)


def _full_probs(network: Network, probs: Mapping[str, np.ndarray]) -> dict[str, np.ndarray]:
    out = {}
    for n in network.nodes:
        if n.fixed is not None:
            out[n.name] = network.fixed_table(n.name)
            continue
        if n.name not in probs:
            raise OptionError(f"no CPT given for the free node {n.name!r}")
        a = np.asarray(probs[n.name], dtype=np.float64)
        if a.shape != network.cpt_shape(n.name):
            raise OptionError(f"node {n.name!r}: CPT has shape {a.shape}, expected {network.cpt_shape(n.name)}")
        out[n.name] = a
    return full_probs(network, out, cause_rows=False)


def _face_basis(co: Coordinates):
    """Where a monotone node along two or more parents has constraints binding at the estimate
    that its coordinates do not keep by themselves (ties between the predecessors of a
    configuration bound to both, met where the fractions' map takes its min: adfit.monotone),
    a basis W (coordinates × directions) of the coordinate directions that keep every binding
    constraint to first order — the null space of C·∂F/∂φ, C the binding constraints' normals
    on the cumulative probabilities F —, the nodes concerned and what
    :func:`_lagrangian_information` needs; None where there are none.
    Along such directions the ties hold, so the derivatives of the min are those of each branch."""
    net = co.network
    offs = co.offsets()
    rows, nodes, lagr = [], [], {}
    for name, s in zip(net.estimated_names, co.sizes):
        if not (s and _mono.needs_cone(net, name)):
            continue
        base = jnp.asarray(co.base[name])
        idx = jnp.asarray(co.index[name])
        cpt = net.cpt_shape(name)

        def cum(phi, base=base, idx=idx, name=name, cpt=cpt):
            eta = base.at[idx].add(phi).reshape(block_shape(net, name))
            t = jnp.exp(_forms.implied_log_table(net, name, jax.nn.log_softmax(eta, axis=-1))).reshape(-1, cpt[-1])
            return jnp.cumsum(t, axis=1)[:, :-1].reshape(-1)

        J = np.asarray(jax.jacfwd(cum)(jnp.zeros(s)))                       # (R·(K−1), s): ∂F/∂φ
        T = np.asarray(_forms.implied_table(net, name, co.probs[name]))
        fam = np.asarray(co.monotone[name][2], dtype=np.float64).reshape(T.shape)
        C = _mono.binding_normals(net, name, T, _mono.cell_derivatives(T, fam)[0], fam)
        if not C.shape[0]:
            continue
        CJ = C @ J
        big = np.abs(CJ).max(axis=1) > 1e-9 * max(1.0, float(np.abs(J).max()))
        if not big.any():
            continue
        full = np.zeros((int(big.sum()), co.size))
        full[:, offs[name]:offs[name] + s] = CJ[big]
        rows.append(full)
        nodes.append(name)
        lagr[name] = (offs[name], s, CJ[big], jnp.asarray(C[big]), cum)
    if not rows:
        return None
    W = scipy.linalg.null_space(np.vstack(rows), rcond=1e-9)
    return W, nodes, lagr


def _lagrangian_information(info: np.ndarray, grad: np.ndarray, lagr) -> np.ndarray:
    """The information of the Lagrangian for the ties of :func:`_face_basis`: those constraints
    are nonlinear in the coordinates (c(φ) = C F(φ) = 0), so a maximum on the face has
    ∇F = (∂c/∂φ)ᵀ μ with multipliers μ (least squares from the gradient ``grad``) and the
    curvature along the face is that of F − μᵀc (Nocedal & Wright 2006, §12.4, second-order
    conditions): I + ∇²(μᵀ c) on the node's block."""
    out = np.array(info, dtype=np.float64)
    for name, (off, s, CJ, C, cum) in lagr.items():
        mu, *_ = np.linalg.lstsq(CJ.T, grad[off:off + s], rcond=None)
        muj = jnp.asarray(mu)
        Hc = np.asarray(jax.hessian(lambda phi: muj @ (C @ cum(phi)))(jnp.zeros(s)))
        out[off:off + s, off:off + s] += 0.5 * (Hc + Hc.T)
    return out


def _generalised_eigh(info: np.ndarray, M: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """ρ ascending and X with Xᵀ M X = 1 for I X = M X diag ρ."""
    try:
        return scipy.linalg.eigh(info, M)
    except np.linalg.LinAlgError:  # pragma: no cover - M is positive definite by construction
        jitter = 1e-12 * np.trace(M) / len(M)
        return scipy.linalg.eigh(info, M + jitter * np.eye(len(M)))


class _CovBlocks:
    """The covariance (inverse information on the identified directions), one block per node."""

    def __init__(self, co: Coordinates, blocks: Mapping[str, np.ndarray]):
        self.off = co.offsets()
        self.blocks = blocks

    def get(self, name: str, js: Sequence[int]) -> np.ndarray:
        ix = np.asarray(js, dtype=np.int64) - self.off[name]
        b = self.blocks[name][np.ix_(ix, ix)]
        return 0.5 * (b + b.T)


def _boundary_upper(nu: float, level: float) -> float:
    """Exact binomial (Clopper–Pearson) upper limit for 0 events in ``nu`` trials."""
    alpha = 1.0 - level
    return 1.0 if nu <= 0 else float(1.0 - (alpha / 2) ** (1.0 / nu))


def _assemble(co: Coordinates, level: float, z: float, cov: _CovBlocks, flat_X: np.ndarray, blocks,
              wanted: set[str]):
    """SE, interval and status of every entry of every free node."""
    net = co.network
    offs = co.offsets()
    rows = co.row_slices()
    se_d, lo_d, hi_d, st_d = {}, {}, {}, {}
    for name in net.estimated_names:
        K = _cols(net, name)
        th = co.probs[name]
        Q = th.shape[0]
        se = np.full((Q, K), np.nan)
        lo = np.zeros((Q, K))
        hi = np.ones((Q, K))
        st = co.status[name].copy()
        if name not in wanted:
            st[:] = _NOT_COMPUTED
            lo[:] = np.nan
            hi[:] = np.nan
        else:
            for u in range(Q):
                if (st[u] == _NO_DATA).any():
                    continue
                nu = float(co.n[name][u].sum())
                bnd = st[u] == _BOUNDARY
                U = _boundary_upper(nu, level)
                for k in np.flatnonzero(bnd):
                    hi[u, k] = max(U, float(th[u, k]))
                js = rows.get((name, u))
                if js is None:  # only the reference is interior: it sits at (nearly) 1
                    r = co.reference[name][u]
                    lo[u, r] = min(1.0 - U, float(th[u, r])) if bnd.any() else 0.0
                    st[u, r] = _BOUNDARY if bnd.any() else st[u, r]
                    continue
                states = [co.coords[j][2] for j in js]
                Minv = np.linalg.inv(blocks[(name, u)])
                S = cov.get(name, js)
                if name in co.logistic:  # coefficients (log-odds): Wald on their own scale
                    b = co.base[name].reshape(Q, K)[u]
                    for i, k in enumerate(states):
                        if flat_X.shape[1]:
                            share = float(np.sum(flat_X[js[i]] ** 2)) / Minv[i, i] if Minv[i, i] > 0 else 1.0
                            if share >= FLAT_SHARE_TOL:
                                st[u, k] = _NOT_IDENTIFIED
                                continue
                        var = float(S[i, i])
                        if not var >= 0:
                            st[u, k] = _NOT_IDENTIFIED
                            continue
                        se[u, k] = math.sqrt(var)
                        lo[u, k], hi[u, k] = b[k] - z * se[u, k], b[k] + z * se[u, k]
                    continue
                G = th[u][:, None] * ((np.arange(K)[:, None] == np.asarray(states)[None, :]) - th[u, states][None, :])
                for k in range(K):
                    if bnd[k] or st[u, k] == _CONSTRAINED:
                        continue
                    g = G[k]
                    den = float(g @ Minv @ g)
                    if flat_X.shape[1]:
                        share = float(np.sum((flat_X[js].T @ g) ** 2)) / den if den > 0 else 1.0
                        if share >= FLAT_SHARE_TOL:
                            st[u, k] = _NOT_IDENTIFIED
                            continue
                    var = float(g @ S @ g)
                    t = float(th[u, k])
                    if not (var >= 0) or t <= 0 or t >= 1:
                        st[u, k] = _NOT_IDENTIFIED
                        continue
                    s = math.sqrt(var)
                    se[u, k] = s
                    lg = math.log(t) - math.log1p(-t)
                    half = z * s / (t * (1.0 - t))
                    lo[u, k] = _expit(lg - half)
                    hi[u, k] = _expit(lg + half)
            ni = st == _NOT_IDENTIFIED
            lo[ni], hi[ni] = (-np.inf, np.inf) if name in co.logistic else (0.0, 1.0)
            fixed = st == _CONSTRAINED  # fixed by the network's impossible cells: the point itself
            lo[fixed] = hi[fixed] = (co.base[name].reshape(Q, K)[fixed] if name in co.logistic else th[fixed])
            if name in co.logistic:
                nd = st == _NO_DATA
                lo[nd], hi[nd] = -np.inf, np.inf
        shape = block_shape(net, name)
        se_d[name], lo_d[name], hi_d[name], st_d[name] = (se.reshape(shape), lo.reshape(shape), hi.reshape(shape),
                                                          st.reshape(shape))
    return se_d, lo_d, hi_d, st_d


def _nan_to_none(doc: Any) -> Any:
    """The parameters layout with NaN (no SE, an unbounded interval) as None."""
    if isinstance(doc, dict):
        return {k: _nan_to_none(v) for k, v in doc.items()}
    if isinstance(doc, list):
        return [_nan_to_none(v) for v in doc]
    return None if isinstance(doc, float) and math.isnan(doc) else doc


def _implied_tables_of(network: Network, name: str):
    """The CPT (flat) as a function of the node's coordinates (JAX), for the delta method."""
    def f(eta_flat):
        rows = jax.nn.log_softmax(eta_flat.reshape(block_shape(network, name)), axis=-1)
        return jnp.exp(_forms.implied_log_table(network, name, rows)).reshape(-1)
    return f


def _implied_table_errors(co: Coordinates, name: str, level: float, z: float, cov: "_CovBlocks",
                  param_status: np.ndarray, wanted: set[str]):
    """SE, interval and status of every cell of a noisy or logistic node's implied CPT, by the delta method
    from the covariance of its cause rows' coordinates: ``var θ = J S Jᵀ``, ``J = ∂θ/∂φ``
    (exact, by forward-mode differentiation); the interval is Wald on the logit scale, as for
    tables. A cell that depends on a not identified cause cell is not identified; a cell
    whose every cause row has no data has none; cause cells on the boundary stay at their
    estimate (the SE is conditional on them)."""
    net = co.network
    shape = tuple(net.cpt_shape(name))
    K = shape[-1]
    eta = jnp.asarray(co.base[name])
    table = np.asarray(_implied_tables_of(net, name)(eta)).reshape(-1, K)
    Q = table.shape[0]
    se = np.full((Q, K), np.nan)
    lo, hi = np.zeros((Q, K)), np.ones((Q, K))
    st = np.full((Q, K), _INTERIOR, dtype=np.int64)
    if name not in wanted:
        st[:] = _NOT_COMPUTED
        return (se.reshape(shape), np.full(shape, np.nan), np.full(shape, np.nan), st.reshape(shape)), table.reshape(shape)
    J_all = np.asarray(jax.jacfwd(_implied_tables_of(net, name))(eta))  # (cells, block cells)
    idx = co.index[name]
    off = co.offsets()[name]
    js = np.arange(off, off + len(idx))
    J = J_all[:, idx] if len(idx) else np.zeros((Q * K, 0))
    S = cov.get(name, js) if len(idx) else np.zeros((0, 0))
    # which cause rows each CPT row uses: a cell depends on a cause cell where J_all is not 0
    dep = np.abs(J_all) > 0
    pst = param_status.reshape(-1)
    bad = dep[:, pst == _NOT_IDENTIFIED].any(axis=1) if (pst == _NOT_IDENTIFIED).any() else np.zeros(Q * K, bool)
    R = param_status.shape[0]
    used = dep.reshape(Q * K, R, param_status.shape[1]).any(axis=2)                     # cells × cause rows
    nodata = np.array([all((param_status[r] == _NO_DATA).any() for r in np.flatnonzero(used[c]))
                       if used[c].any() else False for c in range(Q * K)])
    var = np.einsum("ij,jk,ik->i", J, S, J) if J.shape[1] else np.zeros(Q * K)
    imp = net.impossible_mask(name).reshape(-1) if net.node(name).impossible else np.zeros(Q * K, bool)
    for c in range(Q * K):
        u, k = divmod(c, K)
        t = float(table[u, k])
        if imp[c]:  # fixed at 0 by the network: no error bar
            st[u, k] = _CONSTRAINED
            lo[u, k] = hi[u, k] = 0.0
            continue
        if nodata[c]:
            st[u, k] = _NO_DATA
            continue
        if bad[c] or not (var[c] >= 0) or t <= 0 or t >= 1:
            st[u, k] = _NOT_IDENTIFIED if (bad[c] or not var[c] >= 0) else _BOUNDARY
            if st[u, k] == _BOUNDARY:
                lo[u, k] = hi[u, k] = t
            continue
        s_ = math.sqrt(var[c])
        se[u, k] = s_
        lg = math.log(t) - math.log1p(-t)
        half = z * s_ / (t * (1.0 - t))
        lo[u, k], hi[u, k] = _expit(lg - half), _expit(lg + half)
    ni = st == _NOT_IDENTIFIED
    lo[ni], hi[ni] = 0.0, 1.0
    return (se.reshape(shape), lo.reshape(shape), hi.reshape(shape), st.reshape(shape)), table.reshape(shape)


def _expit(x: float) -> float:
    return 1.0 / (1.0 + math.exp(-x)) if x >= 0 else math.exp(x) / (1.0 + math.exp(x))


def _missing_none(co: Coordinates, name: str) -> dict[str, Any]:
    Q = co.probs[name].shape[0]
    return {"largest": None, "mean": None, "rows": [None] * Q}


def _fractions(cov_block: np.ndarray, com_block: np.ndarray) -> np.ndarray:
    """Fractions of missing information 1 − eig(I_com⁻¹ S), S = (cov block)⁻¹ the marginal information."""
    lam, U = np.linalg.eigh(cov_block)
    keep = lam > 1e-12 * max(float(lam.max(initial=0.0)), 1e-300)
    if not keep.all():
        # a covariance restricted to a face (ties of a monotone node): the directions it spans
        U, lam = U[:, keep], lam[keep]
        com_block = U.T @ com_block @ U
        cov_block = np.diag(lam)
    S = np.linalg.inv(cov_block)
    L = np.linalg.cholesky(com_block)
    Li = np.linalg.inv(L)
    mu = np.linalg.eigvalsh(Li @ S @ Li.T)
    return np.clip(1.0 - mu, 0.0, 1.0)


def _missing_fraction(co: Coordinates, name: str, status: Mapping[str, np.ndarray], cov: _CovBlocks,
                      blocks) -> dict[str, Any]:
    """Per row and per node: fraction of missing information (marginal over the other parameters)."""
    K = _cols(co.network, name)
    st = status[name].reshape(-1, K)
    rows = co.row_slices()
    per_row: list[float | None] = []
    ident_js: list[int] = []
    any_flat = False
    for u in range(st.shape[0]):
        js = rows.get((name, u))
        if (st[u] == _NOT_IDENTIFIED).any():
            per_row.append(1.0)
            any_flat = True
            continue
        if js is None:
            per_row.append(None)
            continue
        per_row.append(float(_fractions(cov.get(name, js), blocks[(name, u)]).max()))
        ident_js.extend(int(j) for j in js)
    largest = mean = None
    if ident_js:
        js = np.asarray(ident_js)
        com = np.zeros((len(js), len(js)))
        pos = {j: i for i, j in enumerate(ident_js)}
        for (nm, u), rj in rows.items():
            if nm == name and int(rj[0]) in pos:
                ix = [pos[int(j)] for j in rj]
                com[np.ix_(ix, ix)] = blocks[(nm, u)]
        fr = _fractions(cov.get(name, js), com)
        largest, mean = float(fr.max()), float(fr.mean())
    if any_flat:
        largest = 1.0
    return {"largest": largest, "mean": mean, "rows": per_row,
            "meaning": "1 - observed/complete-data information (Louis 1982), marginal over the other parameters; "
                       "largest over the node's directions, mean over its identified directions, largest per row"}


def _row_label(net: Network, name: str, u: int) -> dict[str, str]:
    """The parent configuration of CPT row ``u``, or ``{"cause": label}`` for a cause row."""
    if _forms.has_rows(net, name):
        return {"cause": _forms.cause_row_labels(net, name)[u]}
    return dict(zip(net.node(name).parents, net.parent_config_labels(name)[u]))


def _name_directions(co: Coordinates, rho: np.ndarray, X: np.ndarray, blocks, info: np.ndarray | None) -> list[dict[str, Any]]:
    net = co.network
    rows = co.row_slices()
    out = []
    for i in np.argsort(rho):
        if rho[i] > WEAK_TOL or len(out) >= MAX_NAMED:
            break
        x = X[:, i]
        shares = []
        for (name, u), js in rows.items():
            s = float(x[js] @ blocks[(name, u)] @ x[js])
            if s >= NAME_SHARE:
                shares.append({"node": name, "row": int(u), "parents": _row_label(net, name, int(u)), "share": s})
        shares.sort(key=lambda d: -d["share"])
        kind = "negative" if rho[i] < -FLAT_TOL else ("flat" if rho[i] <= FLAT_TOL else "weak")
        d = {"kind": kind, "relative_curvature": float(rho[i]), "fraction_missing": float(np.clip(1 - rho[i], 0, 1)),
             "rows": shares}
        if info is not None:
            xn = x / np.linalg.norm(x)
            d["curvature"] = float(xn @ info @ xn)
        out.append(d)
    return out


# --------------------------------------------------------------------------- matrix-free
def _matrix_free(pb: _Problem, co: Coordinates, blocks, wanted: set[str], tol: float, max_iter: int, n_eig: int):
    """Smallest ρ by LOBPCG on (I, M); columns of I⁻¹ for the wanted nodes by deflated PCG."""
    from scipy.sparse.linalg import LinearOperator, lobpcg

    P = co.size
    rows = co.row_slices()
    inv_blocks = {k: np.linalg.inv(b) for k, b in blocks.items()}

    def m_times(V):
        out = np.zeros_like(V)
        for key, js in rows.items():
            out[js] = blocks[key] @ V[js]
        return out

    def m_solve(V):
        out = np.zeros_like(V)
        for key, js in rows.items():
            out[js] = inv_blocks[key] @ V[js]
        return out

    def as2d(f):
        return lambda V: f(V.reshape(P, -1)) if V.ndim == 2 else f(V.reshape(P, 1)).ravel()

    def info_times(V):
        return pb.information_times(V, full_batches=False)

    A = LinearOperator((P, P), matvec=as2d(info_times), matmat=info_times, dtype=np.float64)
    B = LinearOperator((P, P), matvec=as2d(m_times), matmat=m_times, dtype=np.float64)
    T = LinearOperator((P, P), matvec=as2d(m_solve), matmat=m_solve, dtype=np.float64)
    rng = np.random.default_rng(0)
    k = max(1, min(n_eig, P // 5))
    while True:
        X0 = m_solve(rng.standard_normal((P, k)))
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # lobpcg warns when it stops at maxiter; the residual is checked below
            rho, X = lobpcg(A, X0, B=B, M=T, largest=False, tol=1e-9, maxiter=max(200, 4 * k))
        rho = np.asarray(rho)
        # all found directions weak: there may be more of them; look for twice as many
        if rho.max() > WEAK_TOL or 2 * k > P // 5:
            break
        k *= 2
    order = np.argsort(rho)
    rho, X = rho[order], np.asarray(X)[:, order]
    X = X / np.sqrt(np.einsum("ij,ij->j", X, m_times(X)))[None, :]  # M-normalise
    R = info_times(X) - m_times(X) * rho[None, :]
    eig_res = float(np.sqrt(np.max(np.einsum("ij,ij->j", R, m_solve(R)), initial=0.0)))
    flat = rho <= FLAT_TOL
    # columns of I⁻¹ for the wanted nodes' coordinates, kept as one block per node
    offs = co.offsets()
    sizes = dict(zip(co.network.estimated_names, co.sizes))
    node_cov = {n: np.zeros((sizes[n], sizes[n])) for n in wanted if n in sizes}
    cols = np.asarray([j for j, (name, _, _) in enumerate(co.coords) if name in wanted], dtype=np.int64)
    notes: list[str] = []
    if eig_res > 1e-6:
        notes.append(f"LOBPCG stopped with residual {eig_res:.2g} on the smallest relative eigenvalues; the flat and "
                     f"weak directions found may be incomplete")
    worst = 0.0
    for s in range(0, len(cols), pb.batch):
        c = cols[s:s + pb.batch]
        Bm = np.zeros((P, len(c)))
        Bm[c, np.arange(len(c))] = 1.0
        Xt_b = X.T @ Bm
        known = (X[:, ~flat] / rho[~flat]) @ Xt_b[~flat]
        rhs = Bm - m_times(X @ Xt_b)
        y, res = _pcg(info_times, m_solve, lambda V: V - X @ (X.T @ m_times(V)), rhs, tol, max_iter)
        worst = max(worst, res)
        sol = known + y
        for i, j in enumerate(c):
            name = co.coords[int(j)][0]
            o = offs[name]
            node_cov[name][:, int(j) - o] = sol[o:o + sizes[name], i]
    if worst > tol:
        notes.append(f"conjugate-gradient solves stopped at relative residual {worst:.2g} (> {tol:g}); "
                     f"raise cg_max_iter for tighter error bars")
    return rho, X, _CovBlocks(co, node_cov), X[:, flat], notes


def _pcg(apply_a: Callable, precond: Callable, project: Callable, rhs: np.ndarray, tol: float,
         max_iter: int) -> tuple[np.ndarray, float]:
    """Block (column-wise) preconditioned conjugate gradients for A Y = RHS in the projected space."""
    Y = np.zeros_like(rhs)
    R = rhs.copy()
    Z = project(precond(R))
    Pd = Z.copy()
    rz = np.einsum("ij,ij->j", R, Z)
    norm0 = np.sqrt(np.maximum(rz, 0.0))
    norm0[norm0 == 0] = 1.0
    rel = np.zeros(rhs.shape[1])
    for _ in range(max_iter):
        rel = np.sqrt(np.maximum(rz, 0.0)) / norm0
        active = rel > tol
        if not active.any():
            break
        AP = apply_a(Pd[:, active])
        pap = np.einsum("ij,ij->j", Pd[:, active], AP)
        alpha = np.where(pap > 0, rz[active] / np.where(pap > 0, pap, 1.0), 0.0)
        Y[:, active] += Pd[:, active] * alpha
        R[:, active] -= AP * alpha
        Zn = project(precond(R[:, active]))
        rz_new = np.einsum("ij,ij->j", R[:, active], Zn)
        beta = rz_new / np.where(rz[active] > 0, rz[active], 1.0)
        Pd[:, active] = Zn + Pd[:, active] * beta
        rz[active] = rz_new
    rel = np.sqrt(np.maximum(rz, 0.0)) / norm0
    return project(Y), float(rel.max(initial=0.0))


# --------------------------------------------------------------------------- the result
def _pseudo_for(result: Any, pseudo_counts: Mapping[str, np.ndarray] | None) -> dict[str, np.ndarray] | None:
    from .priors import result_pseudo_counts

    return result_pseudo_counts(result, pseudo_counts, what="error bars")


def attach_uncertainty(result: Any, data: Any, *, pseudo_counts: Mapping[str, np.ndarray] | None = None,
                       l2: float = 0.0, level: float = LEVEL, wide: float = WIDE_WIDTH, method: str = "auto",
                       nodes: Iterable[str] | None = None, **kwargs: Any) -> Any:
    """The result with error bars: ``"se"``, ``"interval"``, ``"se_status"`` and
    ``"missing_information"`` in each free node's section and an ``"uncertainty"`` summary.

    ``pseudo_counts`` and ``l2`` must be those of the fit (a MAP result that records its prior
    needs no ``pseudo_counts``); further keyword arguments go to :func:`compute_uncertainty`.
    """
    fit_l2 = float((result.settings or {}).get("l2", 0.0) or 0.0)
    if not math.isclose(fit_l2, float(l2), rel_tol=1e-12, abs_tol=0.0):
        raise OptionError(f"the fit used an L2 penalty of {fit_l2:g} but l2={l2:g} was given; "
                          f"pass l2={fit_l2:g} so that the Hessian is of the fitted objective")
    pc = _pseudo_for(result, pseudo_counts)
    unc = compute_uncertainty(result.network, data, result.probs, pseudo_counts=pc, l2=l2, level=level, wide=wide,
                              method=method, nodes=nodes, converged=bool(result.converged), **kwargs)
    return with_uncertainty(result, unc)


def with_uncertainty(result: Any, unc: Uncertainty) -> Any:
    """``result`` with the sections of ``unc`` merged into its extras (other node sections kept)."""
    nodes = {k: dict(v) for k, v in (result.extras or {}).get("nodes", {}).items()}
    for name, sec in unc.node_sections().items():
        nodes.setdefault(name, {}).update(sec)
    out = result.with_extras(nodes=nodes, uncertainty=unc.summary())
    rho = np.asarray(unc.relative_eigenvalues)
    if result.converged and rho.size and np.any(rho < -FLAT_TOL):
        # negative curvature of the objective at the estimate: a stationary point that is not a
        # maximum is not converged, whatever the stopping rule said
        out = dataclasses.replace(out, converged=False,
                                  stop_reason="the error-bar step found negative curvature: the estimate is not "
                                              "a local maximum (a saddle); refit with more --restarts")
    return out


# --------------------------------------------------------------------------- reading it back
def _node_section(result: Any, name: str) -> Mapping[str, Any]:
    sec = (result.extras or {}).get("nodes", {}).get(name)
    if not sec or "se" not in sec:
        raise OptionError(f"the result has no error bars for node {name!r}; run attach_uncertainty first "
                          f"(or fit without --no-errors)")
    return sec


def se_frame(result: Any, name: str) -> pd.DataFrame:
    """Standard errors of node ``name`` laid out like ``result.cpt(name)`` (NaN: no SE)."""
    sec = _node_section(result, name)
    frame = result.cpt(name)
    vals = np.array([[np.nan if x is None else float(x) for x in row] for row in sec["se"]])
    return pd.DataFrame(vals, index=frame.index, columns=frame.columns)


def interval_frames(result: Any, name: str) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Lower and upper interval limits of node ``name`` laid out like ``result.cpt(name)``."""
    sec = _node_section(result, name)
    frame = result.cpt(name)
    lo, hi = (np.array([[np.nan if x is None else float(x) for x in row] for row in t]) for t in sec["interval"])
    return (pd.DataFrame(lo, index=frame.index, columns=frame.columns),
            pd.DataFrame(hi, index=frame.index, columns=frame.columns))


# --------------------------------------------------------------------------- text
def _cause_row(network: Network, name: str, u: int) -> dict[str, Any]:
    """A noisy node's parameter row ``u``: its label (``leak``, ``parent=state``) and, as
    ``parents``, the configuration where that cause alone is active (every parent at its first,
    inactive state for the leak)."""
    parents = {p: network.node(p).states[0] for p in network.node(name).parents}
    active = [(p, st) for p in parents for st in network.node(p).states[1:]]  # cause_row_labels' order
    if u:
        p, st = active[u - 1]
        parents[p] = st
    return {"cause": _forms.cause_row_labels(network, name)[u], "parents": parents}


def _cfg(d: Mapping[str, str]) -> str:
    return ", ".join(f"{p}={s}" for p, s in d.items()) or "(no parents)"


def format_uncertainty(summary: Mapping[str, Any], nodes: Mapping[str, Mapping[str, Any]] | None = None, *,
                       network: Network | None = None, max_list: int = 10, digits: int = 3) -> str:
    """Plain lines for the terminal: method, EM rate, per-node missing information, the flags
    and (when ``network`` and ``nodes`` are given) the interval tables."""
    pct = f"{100 * summary['level']:g}%"
    lines = [f"error bars: {pct} intervals (Wald on the logit scale, from the observed information)"]
    if summary.get("em_rate") is not None:
        lines.append(f"largest fraction of missing information (EM rate) {summary['em_rate']:.4f}")
    if nodes:
        parts = []
        for name, sec in nodes.items():
            mi = sec.get("missing_information") or {}
            if mi.get("largest") is not None:
                parts.append(f"{name} {mi['largest']:.3f}" + (f" (mean {mi['mean']:.3f})" if mi.get("mean") is not None else ""))
        if parts:
            lines.append("missing information per node (largest): " + "; ".join(parts))
    for d in summary.get("directions", [])[:max_list]:
        where = "; ".join(f"{r['node']} given {_cfg(r['parents'])} ({r['share']:.0%})" for r in d["rows"][:4]) or "spread out"
        word = {"flat": "flat direction (not identified)", "weak": "weakly identified direction",
                "negative": "negative curvature (not a maximum)"}[d["kind"]]
        lines.append(f"{word}, observed/complete information {d['relative_curvature']:.2e}: {where}")
    for key, text in (("not_identified", "not identified (interval [0, 1])"),
                      ("no_data_rows", "no records reach this parent configuration (interval [0, 1])"),
                      ("prior_only_rows", "informed by the prior only")):
        rows = summary.get(key) or []
        if rows:
            shown = "; ".join(f"{r['node']} given {_cfg(r['parents'])}" for r in rows[:max_list])
            more = f" and {len(rows) - max_list} more" if len(rows) > max_list else ""
            lines.append(f"{text}: {shown}{more}")
    b = summary.get("boundary_entries") or []
    if b:
        shown = "; ".join(f"{e['node']}={e['state']} given {_cfg(e['parents'])} [{e['interval'][0]:.3g}, {e['interval'][1]:.3g}]"
                          for e in b[:max_list])
        lines.append(f"on the boundary (one-sided exact binomial limit, no SE): {shown}"
                     + (f" and {len(b) - max_list} more" if len(b) > max_list else ""))
    w = [e for e in summary.get("wide_entries") or [] if e["status"] in ("interior", "boundary")]
    if w:
        shown = "; ".join(f"{e['node']}={e['state']} given {_cfg(e['parents'])} width {e['width']:.2f}" for e in w[:max_list])
        lines.append(f"intervals wider than {summary['wide_threshold']:g}: {shown}"
                     + (f" and {len(w) - max_list} more" if len(w) > max_list else ""))
    for n in (summary.get("latent") or {}):
        lines.append(f"latent node {n}: states identified only up to a relabelling; the error bars are for this labelling")
    for note in summary.get("notes") or []:
        lines.append(f"note: {note}")
    if network is not None and nodes:
        mark = {"interior": "", "boundary": "*", "not identified": "?", "no data": "-", "not computed": "",
                "constrained": "="}
        for name, sec in nodes.items():
            if "interval" not in sec:
                continue
            node = network.node(name)
            lo, hi = sec["interval"]
            cells = [[("n/a" if a is None or (isinstance(a, float) and math.isnan(a)) else
                       f"[{a:.{digits}f}, {c:.{digits}f}]{mark[s]}") for a, c, s in zip(r1, r2, r3)]
                     for r1, r2, r3 in zip(lo, hi, sec["se_status"])]
            index = (pd.MultiIndex.from_tuples(network.parent_config_labels(name), names=list(node.parents))
                     if node.parents else pd.Index(["(none)"], name="parents"))
            df = pd.DataFrame(cells, index=index, columns=pd.Index(list(node.states), name=name))
            with pd.option_context("display.width", 200, "display.max_columns", 20):
                given = f" | {', '.join(node.parents)}" if node.parents else ""
                lines.append(f"\n{pct} intervals for P({name}{given})"
                             f" (* boundary, ? not identified, - no data, = fixed by the network)\n{df.to_string()}")
    return "\n".join(lines)


def gradient_seconds(lik: Likelihood, probs: Mapping[str, np.ndarray]) -> float:
    """Seconds of one gradient evaluation (expected counts), timed after a warm-up call."""
    full = _full_probs(lik.network, probs)
    lik.expected_counts(full)  # compiles unless the fit already did
    t0 = time.perf_counter()
    lik.expected_counts(full)
    return time.perf_counter() - t0


#: what :func:`structure_refusal` lets through (the forms whose coordinates are CPT rows)
SUPPORTED_STRUCTURE = ("table", "noisy_or", "noisy_max", "logistic", "tied", "impossible")


def structure_refusal(network: Network) -> str | None:
    """Why error bars cannot be computed for ``network`` (a logistic node: its coefficients
    have no rows of probabilities for the coordinates below), or None."""
    for n in network.nodes:
        if n.fixed is None and n.cpd not in SUPPORTED_STRUCTURE:
            return (f"error bars are not available yet for nodes.{n.name} (cpd = {n.cpd!r}); its estimates "
                    f"come without standard errors or intervals")
    return None


def cli_errors(result: Any, data: Any, *, pseudo_counts: Mapping[str, np.ndarray] | None, l2: float,
               errors: bool | None, quiet: bool, echo: Callable[..., None], show: bool = True,
               likelihood: Likelihood | None = None) -> Any:
    """For ``adfit fit``: attach error bars (by default when the free parameters are at most
    :data:`AUTO_MAX_PARAMETERS`; ``errors`` True forces, False skips) and print their summary
    (``show`` False: print nothing but the warnings; the caller prints them in its own place).
    ``likelihood``: the command's :class:`Likelihood` of this network and data (the same
    :class:`CodedData` object), reused instead of planning again."""
    if errors is False:
        return result
    if (refusal := structure_refusal(result.network)) is not None:
        if errors:
            raise OptionError(f"{refusal} (fit without --errors)")
        echo(f"error bars skipped: {refusal}")
        return result
    P = result.network.n_free_parameters()
    if errors is None and P > AUTO_MAX_PARAMETERS:
        echo(f"error bars skipped: {P} free parameters > {AUTO_MAX_PARAMETERS} (use --errors to compute them anyway)")
        return result
    from .likelihood import _prepared

    lik = _prepared(likelihood, result.network, load_data(result.network, data), "cli_errors")
    if errors is None:
        t = gradient_seconds(lik, result.probs)
        est = P * HVP_COST * t
        if est > AUTO_MAX_SECONDS:
            echo(f"error bars skipped: about {est:.0f} s estimated ({P} Hessian-vector products at about "
                 f"{HVP_COST:g} x {t:.2g} s per gradient) > {AUTO_MAX_SECONDS:g} s (use --errors to compute them anyway)")
            return result
    out = attach_uncertainty(result, data, pseudo_counts=pseudo_counts, l2=l2, likelihood=lik)
    summary = out.extras["uncertainty"]
    if result.converged and not out.converged:
        echo(f"adfit: warning: not converged: {out.stop_reason}", err=True)
    if not quiet and show:
        echo("")
        echo(format_uncertainty(summary, {n: out.extras["nodes"][n] for n in result.network.free_names},
                                network=result.network))
    elif quiet and (summary["not_identified"] or any(d["kind"] != "weak" for d in summary["directions"])):
        echo("adfit: warning: some CPT entries are not identified by the data (see \"uncertainty\" in the result)",
             err=True)
    return out

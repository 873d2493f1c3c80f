"""The free parameter vector and its map to log-CPTs (the parameterisation layer).

The optimiser (:mod:`adfit.fit`), the side-by-side starts (:mod:`adfit.restarts`) and the
minibatch loop (:mod:`adfit.minibatch`) work on one flat float64 vector of free parameters;
this module owns its layout (:class:`FreeLayout`) and the map from it to the log-CPTs of every
node in the likelihood's flat layout (:func:`head` in JAX, :func:`head_np` in numpy), with the
prior/penalty part of the objective and its gradient given the expected counts
(:func:`head_grad`, :func:`head_grad_np`), and the objective itself (:func:`objective_fg`).
The likelihood core (:mod:`adfit.likelihood`) only ever sees log-CPTs.

Today every free node has the table form: its CPT rows are ``softmax`` of free logits, scaled by
the fitter's preconditioner (``eta = z * scale``). Other forms (structured CPTs) map their own
parameters to log-CPTs here, so that nothing outside this module needs to know a node's form.

Constraints on tables (network keys ``tied_to`` and ``impossible``):

* A tied node has no block of its own: the vector holds the parameters of the nodes that own
  them (:attr:`Network.estimated_names`), and ``FreeLayout.full_index`` sends the tied node's
  entries of the likelihood layout to its source's positions. The log-likelihood then depends on
  the shared θ through both families, so ∂ log L/∂ log θ is the sum of both families' expected
  counts (:func:`pool_counts`; the transpose of the gather is that sum).
* Impossible cells keep a logit in the vector, but the head adds −∞ to it before the softmax
  (``FreeLayout.mask``): the cell is exactly 0, its row renormalises over the others, and its
  gradient is 0 (its expected count is 0 and so is its pseudo-count, :func:`mask_pseudo`).
  Outside the head, :func:`full_logits` applies the same mask and fills in the tied nodes.

Structured forms (network key ``cpd``, :mod:`adfit.forms`): a noisy_or / noisy_max node's block in
the vector holds the softmax logits of its *cause rows* (the leak and one row per active parent
state) instead of CPT rows; they join the other rows of their size in the softmax. Its CPT is
implied by those rows (:func:`adfit.forms.implied_log_table`): the head appends the implied
log-tables after the fixed nodes' log-tables, and ``full_index`` sends the node's (and its tied
copies') entries of the likelihood layout there. The gradient w.r.t. the cause rows' log
probabilities (their virtual counts) is the chain rule of the expected counts through the
implied table (reverse mode in :func:`head_grad`; :func:`adfit.forms.virtual_counts` in
:func:`head_grad_np`). Everything that works on rows of probabilities (the softmax, the prior
as pseudo-counts, the KKT ratios, EM steps) then works on cause rows unchanged.

Imports: this module depends on :mod:`adfit.likelihood` and :mod:`adfit.network` only; nothing
here imports :mod:`adfit.fit`, which removes the former circle fit → restarts → fit.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import partial
from typing import Any, Mapping

from ._jax import jax, jnp  # first: float64 on (adfit/_jax.py)
import numpy as np

from . import forms as _forms
from .likelihood import _value_and_flat_expected_counts
from .network import Network

__all__ = ["FreeLayout", "free_layout", "fixed_log_tables", "head", "head_grad", "head_np", "head_grad_np",
           "objective_fg", "pool_counts", "full_logits", "full_probs", "mask_pseudo", "block_shape",
           "estimated_starts"]


# --------------------------------------------------------------------------- the flat parameter vector
@dataclass(frozen=True, eq=False)
class FreeLayout:
    """The logits of the free nodes as one flat float64 vector: the free nodes in network order,
    each CPT raveled (C order), at ``offsets``. The optimiser works on such vectors only (its
    compiled pieces then take one array whatever the number of nodes, and compile once per
    vector length); CPT-shaped dicts appear at its boundary (:meth:`flatten`, :meth:`unflatten`).

    ``rows`` groups the CPT rows by their number of states: ``(k, idx)`` with ``idx`` the
    ``(rows, k)`` positions of every row of ``k`` states in the vector (``None`` when the vector
    is just those rows, in order); ``inverse`` puts the concatenated groups back in vector order
    (``None`` when they already are). ``full_index`` maps every entry of the likelihood's flat
    layout (all nodes, :func:`adfit.likelihood.layout_of`) to its position in the free vector
    followed by the fixed nodes' log-tables (``None`` when no node is fixed).
    """

    names: tuple[str, ...]
    shapes: tuple[tuple[int, ...], ...]
    offsets: tuple[int, ...]
    size: int
    n_flat: int
    rows: tuple[tuple[int, Any], ...]
    inverse: Any
    full_index: Any
    order: Any = None        # the row blocks' entries in vector positions (inverse of ``inverse``)
    free_index: Any = None   # the free entries' positions in the likelihood's layout (None: all entries)
    tied: bool = False       # some node is tied to another: counts are pooled (bincount over full_index)
    mask: Any = None         # 0 / −inf per vector entry (impossible cells), None when there are none
    implied: tuple = ()      # (name, vector offset, row-block shape, offset in the implied log-tables) per node
                             # whose table its parameter rows imply (noisy_or, noisy_max, logistic)
    n_fixed: int = 0         # entries of the fixed nodes' log-tables (the implied ones follow them)
    network: Any = None      # the network (the implied tables need it)
    struct_sel: Any = None   # entries of the likelihood's layout taken from the implied log-tables
    coef: tuple = ()         # (vector offset, row-block shape) per logistic node: its prior entries are
                             # the precisions 1/sd² of a normal prior on its coefficients, not pseudo-counts
    coef_mask: Any = None    # True at the vector entries of logistic nodes (None when there are none)

    def flatten(self, tree: Mapping[str, Any]) -> np.ndarray:
        """One float64 vector from CPT-shaped arrays of the free nodes (a new array)."""
        if not self.names:
            return np.zeros(0)
        return np.concatenate([np.ravel(np.asarray(tree[k], dtype=np.float64)) for k in self.names])

    def unflatten(self, vec: Any) -> dict[str, np.ndarray]:
        """CPT-shaped views of a flat vector, by free node."""
        v = np.asarray(vec)
        return {k: v[o:o + math.prod(sh)].reshape(sh) for k, sh, o in zip(self.names, self.shapes, self.offsets)}


_FREE_LAYOUTS: dict[int, tuple[Network, FreeLayout]] = {}


def free_layout(network: Network) -> FreeLayout:
    """The :class:`FreeLayout` of ``network`` (cached by identity, as the likelihood's layout)."""
    hit = _FREE_LAYOUTS.get(id(network))
    if hit is None or hit[0] is not network:
        hit = _FREE_LAYOUTS[id(network)] = (network, _make_free_layout(network))
    return hit[1]


def block_shape(network: Network, name: str) -> tuple[int, ...]:
    """Shape of an estimated node's block of parameters: its CPT, or its cause rows (noisy forms)."""
    if _forms.has_rows(network, name):
        return tuple(_forms.cause_shape(network, name))
    return tuple(network.cpt_shape(name))


def _make_free_layout(network: Network) -> FreeLayout:
    names = tuple(network.estimated_names)
    free = set(names)
    shapes, offsets, by_card = [], [], {}
    off = 0
    for name in names:
        sh = block_shape(network, name)
        size = math.prod(sh)
        shapes.append(sh)
        offsets.append(off)
        by_card.setdefault(sh[-1], []).append(np.arange(off, off + size, dtype=np.int32))
        off += size
    P = off
    rows, order = [], []
    for k in sorted(by_card):
        idx = np.concatenate(by_card[k])
        order.append(idx)
        rows.append((k, idx.reshape(-1, k)))
    perm = np.concatenate(order) if order else np.zeros(0, np.int32)
    in_order = bool(np.array_equal(perm, np.arange(P)))
    if in_order and len(rows) == 1:
        rows = [(rows[0][0], None)]
    inverse = None if in_order else np.argsort(perm).astype(np.int32)
    n_fixed = sum(math.prod(network.cpt_shape(n)) for n in network.fixed_names)
    noisy, s_off = [], 0
    for name, sh, o in zip(names, shapes, offsets):
        if _forms.has_rows(network, name):
            noisy.append((name, o, sh, s_off))
            s_off += math.prod(network.cpt_shape(name))
    noisy_at = {name: P + n_fixed + so for name, _, _, so in noisy}
    full, fixed_off, n_flat = [], 0, 0
    for node in network.nodes:
        size = math.prod(network.cpt_shape(node.name))
        n_flat += size
        src = network.tie_source(node.name) if node.fixed is None else node.name
        if src in noisy_at:
            full.append(np.arange(noisy_at[src], noisy_at[src] + size, dtype=np.int32))
        elif src in free:
            o = offsets[names.index(src)]
            full.append(np.arange(o, o + size, dtype=np.int32))
        else:
            full.append(np.arange(P + fixed_off, P + fixed_off + size, dtype=np.int32))
            fixed_off += size
    # a gather with a transpose by sums: tied families, or cause rows (not in the likelihood layout)
    tied = len(names) < len(network.free_names) or bool(noisy)
    full_index = None if fixed_off == 0 and not tied else np.concatenate(full)
    free_index = None if full_index is None else np.flatnonzero(full_index < P).astype(np.int32)
    mask = None
    if any(network.node(n).impossible for n in names):
        mask = np.concatenate([np.zeros(math.prod(sh)) if _forms.has_rows(network, n) else
                               np.where(network.impossible_mask(n).ravel(), -np.inf, 0.0)
                               for n, sh in zip(names, shapes)])
    coef = tuple((o, sh) for n, sh, o in zip(names, shapes, offsets) if _forms.is_logistic(network, n))
    coef_mask = None
    if coef:
        coef_mask = np.zeros(P, dtype=bool)
        for o, sh in coef:
            coef_mask[o:o + math.prod(sh)] = True
    return FreeLayout(names, tuple(shapes), tuple(offsets), P, n_flat, tuple(rows), inverse, full_index,
                      None if inverse is None else perm.astype(np.int32), free_index, tied, mask, tuple(noisy),
                      n_fixed, network,
                      None if not noisy else np.flatnonzero(full_index >= P + n_fixed).astype(np.int32),
                      coef, coef_mask)


def coefficient_log_prior(eta, precisions, xp=np):
    """``−½ Σ prec · β²`` of one logistic node from the logits ``eta`` of its parameter rows
    (rows, card): the coefficients are ``β = eta − eta[:, :1]`` (log-odds against the first child
    state; the logits are defined up to a shift per row, which cancels), ``precisions`` the
    prior's ``1/sd²`` per cell (0: no prior; the reference column is 0). Works on numpy (``xp=np``)
    and JAX (``xp=jnp``) arrays."""
    b = eta - eta[:, :1]
    return -0.5 * xp.sum(precisions * b * b)


def coefficient_log_prior_grad(eta: np.ndarray, precisions: np.ndarray) -> np.ndarray:
    """∂/∂eta of :func:`coefficient_log_prior`: ``−prec·β`` in the non-reference cells and
    ``+Σ_k prec_k β_k`` in the reference column (rows, card)."""
    g = -precisions * (eta - eta[:, :1])
    g[:, 0] = -g[:, 1:].sum(axis=1)
    return g


def pool_counts(network: Network, counts: Mapping[str, np.ndarray],
                probs: Mapping[str, np.ndarray] | None = None) -> dict[str, np.ndarray]:
    """Expected counts by estimated node (:attr:`Network.estimated_names`): each source's own
    plus those of the nodes tied to it (the derivative of log L w.r.t. the shared log θ); the
    tied nodes keep their own family's counts under their own names (for reports).

    A noisy node's entry becomes the virtual counts of its cause rows (∂ log L/∂ log v,
    :func:`adfit.forms.virtual_counts`), which needs ``probs`` (its cause rows, as the fitter
    holds them); its family counts stay available under the tied nodes' names only."""
    noisy = [n for n in network.estimated_names if _forms.has_rows(network, n)]
    if len(network.estimated_names) == len(network.free_names) and not noisy:
        return dict(counts)
    out = dict(counts)
    for name in network.estimated_names:
        for t in network.tied_names(name):
            out[name] = np.asarray(out[name], dtype=np.float64) + np.asarray(counts[t], dtype=np.float64)
    if noisy:
        if probs is None:
            raise ValueError("pool_counts needs the cause rows (probs) of the noisy nodes")
        for name in noisy:
            out[name] = _forms.virtual_counts(network, name, probs[name], out[name])
    return out


def full_logits(network: Network, logits: Mapping[str, Any]) -> dict[str, np.ndarray]:
    """Logits of every free node from those of the estimated ones: impossible cells at −∞, tied
    nodes given their source's logits (a noisy node's are those of its cause rows)."""
    out = {}
    for name in network.free_names:
        src = network.tie_source(name)
        e = np.asarray(logits[src], dtype=np.float64)
        if network.node(src).impossible and not _forms.has_rows(network, src):  # parameter rows: masked in their table
            e = np.where(network.impossible_mask(src), -np.inf, e)
        out[name] = e
    return out


def estimated_starts(network: Network, probs: Mapping[str, np.ndarray]) -> dict[str, np.ndarray]:
    """Probabilities in the fitter's own parameters for every free node (cause rows for noisy
    nodes, CPTs otherwise), the constraints applied: tied nodes take their source's, impossible
    cells are 0 and their rows renormalised. Fixed nodes pass through."""
    out = dict(probs)
    for name in network.free_names:
        src = network.tie_source(name)
        th = np.asarray(probs[src], dtype=np.float64)
        if network.node(src).impossible and th.shape == tuple(network.cpt_shape(src)) \
                and not (_forms.has_rows(network, src) and th.shape == block_shape(network, src)):
            th = np.where(network.impossible_mask(src), 0.0, th)
            th = th / th.sum(axis=-1, keepdims=True)
        out[name] = th
    return out


def full_probs(network: Network, probs: Mapping[str, np.ndarray], *, cause_rows: bool = True) -> dict[str, np.ndarray]:
    """CPTs of every node with the constraints applied: tied nodes take their source's table;
    impossible cells are set to 0 and their rows renormalised; a noisy node's entry is its
    cause rows (the fitter's parameters) and gets the table they imply
    (:func:`adfit.forms.implied_table`), or with ``cause_rows=False`` is taken as its table
    already. Fixed nodes pass through."""
    out = estimated_starts(network, probs)
    if cause_rows:
        for name in network.free_names:
            if _forms.has_rows(network, name):
                out[name] = _forms.implied_table(network, network.tie_source(name), out[name])
    return out


def mask_pseudo(network: Network, pseudo: Mapping[str, np.ndarray]) -> dict[str, np.ndarray]:
    """Pseudo-counts with 0 on impossible cells (a prior cannot put mass on a cell fixed at 0)."""
    out = dict(pseudo)
    for name in network.estimated_names:
        if name in out and network.node(name).impossible and not _forms.has_rows(network, name):
            out[name] = np.where(network.impossible_mask(name), 0.0, np.asarray(out[name], dtype=np.float64))
    return out


def fixed_log_tables(network: Network) -> np.ndarray:
    """log of the fixed nodes' tables, in network order, raveled (the tail of
    ``FreeLayout.full_index``'s source vector)."""
    parts = []
    with np.errstate(divide="ignore"):
        for name in network.fixed_names:
            parts.append(np.ravel(np.log(np.asarray(network.fixed_table(name), dtype=np.float64))))
    return np.concatenate(parts) if parts else np.zeros(0)


# --------------------------------------------------------------------------- the fast objective
_implied_log_table = _forms.implied_log_table_jit


@partial(jax.jit, static_argnums=(0,))
def head(network: Network, z, scale, pseudo, fixed_flat, l2):
    """Log-CPTs of all nodes (one flat vector in the likelihood's layout) and the prior/penalty
    part of F, from the scaled logits ``z`` (flat, :class:`FreeLayout`). The softmax runs once per
    number of states over all CPT rows of that size, so the program does not grow with the
    number of nodes."""
    lay = free_layout(network)
    eta = z * scale
    parts = []
    pen = jnp.zeros((), jnp.float64)
    for k, idx in lay.rows:
        e = eta.reshape(-1, k) if idx is None else eta[idx]
        if lay.mask is None:
            parts.append(jax.nn.log_softmax(e, axis=-1).reshape(-1))
            pen = pen + jnp.sum((e - jnp.mean(e, axis=-1, keepdims=True)) ** 2)
            continue
        m = jnp.asarray(lay.mask.reshape(-1, k) if idx is None else lay.mask[idx])
        ok = m == 0
        parts.append(jax.nn.log_softmax(e + m, axis=-1).reshape(-1))
        mean = jnp.sum(jnp.where(ok, e, 0.0), axis=-1, keepdims=True) / jnp.sum(ok, axis=-1, keepdims=True)
        pen = pen + jnp.sum(jnp.where(ok, e - mean, 0.0) ** 2)
    lc = parts[0] if len(parts) == 1 else jnp.concatenate(parts)
    if lay.inverse is not None:
        lc = lc[lay.inverse]
    if lay.coef:  # logistic nodes: a normal prior on the coefficients (their entries are precisions)
        lp_coef = sum(coefficient_log_prior(eta[o:o + math.prod(sh)].reshape(sh),
                                            pseudo[o:o + math.prod(sh)].reshape(sh), jnp) for o, sh in lay.coef)
        pseudo = jnp.where(jnp.asarray(lay.coef_mask), 0.0, pseudo)
    else:
        lp_coef = 0.0
    lp = jnp.sum(pseudo * lc) if lay.mask is None else jnp.sum(jnp.where(lay.mask == 0, pseudo * lc, 0.0))
    lp = lp + lp_coef
    if lay.full_index is None:
        return lc, lp - l2 * pen
    src = [lc, fixed_flat] + [_forms.implied_log_table(network, name, lc[o:o + math.prod(sh)].reshape(sh)).reshape(-1)
                              for name, o, sh, _ in lay.implied]
    return jnp.concatenate(src)[lay.full_index], lp - l2 * pen


@partial(jax.jit, static_argnums=(0,))
def head_grad(network: Network, z, scale, pseudo, fixed_flat, l2, counts, n_total):
    """Gradient of −F/N w.r.t. z, given ∂ log L/∂ log θ = the expected counts (flat, in the
    likelihood's layout; trailing entries beyond it are ignored)."""
    n_flat = free_layout(network).n_flat
    _, vjp = jax.vjp(lambda zz: head(network, zz, scale, pseudo, fixed_flat, l2), z)
    (g,) = vjp((counts[:n_flat], jnp.ones((), jnp.float64)))
    return -g / n_total


def head_np(lay: FreeLayout, z: np.ndarray, scale: np.ndarray, pseudo: np.ndarray, fixed_flat: np.ndarray,
             l2: float):
    """:func:`head` in numpy, for the single-start optimiser (no compile; a few vector operations
    per call): ``(log-CPTs in the likelihood's flat layout, prior/penalty part of F, (eta, theta,
    row blocks) for :func:`head_grad_np`)``. The same softmax as ``jax.nn.log_softmax`` (row max
    shifted out); equal to :func:`head` up to rounding."""
    eta = z * scale
    parts, blocks = [], []
    pen = 0.0
    for k, idx in lay.rows:
        e = eta.reshape(-1, k) if idx is None else eta[idx]
        if lay.mask is None:
            em, d = e, e - e.mean(axis=-1, keepdims=True)
        else:
            m = lay.mask.reshape(-1, k) if idx is None else lay.mask[idx]
            ok = m == 0
            em = e + m
            mean = np.sum(np.where(ok, e, 0.0), axis=-1, keepdims=True) / np.sum(ok, axis=-1, keepdims=True)
            d = np.where(ok, e - mean, 0.0)
        sh = em - em.max(axis=-1, keepdims=True)
        ls = sh - np.log(np.sum(np.exp(sh), axis=-1, keepdims=True))
        parts.append(ls.reshape(-1))
        blocks.append((e, ls, d))
        pen += float(np.sum(d * d))
    lc = parts[0] if len(parts) == 1 else (np.concatenate(parts) if parts else np.zeros(0))
    if lay.inverse is not None:
        lc = lc[lay.inverse]
    lp_coef = 0.0
    if lay.coef:  # logistic nodes: a normal prior on the coefficients (their entries are precisions)
        lp_coef = sum(float(coefficient_log_prior(eta[o:o + math.prod(sh)].reshape(sh),
                                                  pseudo[o:o + math.prod(sh)].reshape(sh))) for o, sh in lay.coef)
        pseudo = np.where(lay.coef_mask, 0.0, pseudo)
    with np.errstate(invalid="ignore"):
        lp = float(np.dot(pseudo, lc)) if lay.mask is None else float(np.dot(np.where(lay.mask == 0, pseudo, 0.0),
                                                                            np.where(lay.mask == 0, lc, 0.0)))
    lp += lp_coef
    if lay.full_index is None:
        return lc, lp - l2 * pen, (blocks, lc, eta)
    src = [lc, fixed_flat] + [np.asarray(_implied_log_table(lay.network, name, lc[o:o + math.prod(sh)].reshape(sh))).ravel()
                              for name, o, sh, _ in lay.implied]
    return np.concatenate(src)[lay.full_index], lp - l2 * pen, (blocks, lc, eta)


def head_grad_np(lay: FreeLayout, blocks, scale: np.ndarray, pseudo: np.ndarray, l2: float, counts: np.ndarray,
                  n_total: float) -> np.ndarray:
    """:func:`_head_grad` in closed form (numpy): with ``a = N(x,u) + c`` per CPT entry, the
    gradient of F w.r.t. the logits is ``a − θ Σ_x a − 2λ(η − mean η)`` per row (Fisher's
    identity, the prior, the penalty); a logistic node's rows take no pseudo-counts but the
    gradient of the normal prior on their coefficients (:func:`coefficient_log_prior_grad`);
    times ``scale`` and ``−1/N``."""
    blocks, lc, eta = blocks
    prec = None
    if lay.coef:
        prec, pseudo = pseudo, np.where(lay.coef_mask, 0.0, pseudo)
    if lay.tied:  # the transpose of the gather: tied families' counts added to their source's
        sel = lay.free_index
        c = np.bincount(lay.full_index[sel], weights=counts[sel], minlength=lay.size)
        if lay.implied:  # the implied tables' counts, by the chain rule onto the parameter rows
            s0 = lay.size + lay.n_fixed
            ss = lay.struct_sel
            sc = np.bincount(lay.full_index[ss] - s0, weights=counts[ss])
            for name, o, sh, so in lay.implied:
                csh = tuple(lay.network.cpt_shape(name))
                n = math.prod(sh)
                c[o:o + n] += np.asarray(_forms._virtual_counts(
                    lay.network, name, lc[o:o + n].reshape(sh), sc[so:so + math.prod(csh)].reshape(csh))).ravel()
    else:
        c = counts[:lay.n_flat] if lay.free_index is None else counts[lay.free_index]
    a = c + pseudo
    if lay.inverse is not None:
        a = a[lay.order]
    out, off = [], 0
    for (e, ls, d), (k, _) in zip(blocks, lay.rows):
        ab = a[off:off + e.size].reshape(e.shape)
        off += e.size
        g = ab - np.exp(ls) * ab.sum(axis=-1, keepdims=True)
        if l2:
            g = g - 2.0 * l2 * d
        out.append(g.reshape(-1))
    g = out[0] if len(out) == 1 else np.concatenate(out)
    if lay.inverse is not None:
        g = g[lay.inverse]
    if prec is not None:
        g = g.copy()
        for o, sh in lay.coef:
            n = math.prod(sh)
            g[o:o + n] += coefficient_log_prior_grad(eta[o:o + n].reshape(sh), prec[o:o + n].reshape(sh)).ravel()
    return -(g * scale) / n_total


def objective_fg(network: Network, groups, z, scale, pseudo, fixed_flat, l2, n_total, codes, weights):
    """−F/N and its gradient w.r.t. z (flat numpy vectors, :class:`FreeLayout`).

    The likelihood's expected-counts scan is the one compiled piece; it is the same compiled
    program that :meth:`Likelihood.expected_counts` uses, so one fit compiles the elimination
    once. (Tracing the objective inside an optimiser's own while-loop copies the whole
    elimination into one XLA computation several times and multiplies the compile time.) The
    softmax/prior head around it and its gradient are a few numpy vector operations
    (:func:`head_np`); :mod:`adfit.restarts` traces the JAX :func:`head` into its vmapped
    program instead.
    """
    lay = free_layout(network)
    z, scale = np.asarray(z, dtype=np.float64), np.asarray(scale, dtype=np.float64)
    pseudo, fixed_flat = np.asarray(pseudo, dtype=np.float64), np.asarray(fixed_flat, dtype=np.float64)
    l2, n_total = float(l2), float(n_total)
    lc, rest, blocks = head_np(lay, z, scale, pseudo, fixed_flat, l2)
    ll, counts = _value_and_flat_expected_counts(network, groups, lc, codes, weights)
    g = head_grad_np(lay, blocks, scale, pseudo, l2, np.asarray(counts), n_total)
    return -(float(ll) + rest) / n_total, g

"""Barren hidden leaves summed out of their components: which cells are coded SUMMED, the widened
network (an extra column per CPT row holding the log row sum) and the maps between the network's
flat layout and the plan's widened one (``_widen_flat``, ``_narrow_flat``).
"""

from __future__ import annotations

import math
from typing import Sequence

import numpy as np

from .._jax import jax, jnp  # float64 on before anything else (adfit/_jax.py)
from ..network import Network
from .blocks import GatheredBlock
from .layout import _LAYOUTS, _logsumexp_last, _st
from .settings import PLAN_BLOCK


# --------------------------------------------------------------------------- barren leaves
# A hidden leaf (a node without children) is barren: it sums out to 1. When none of its hidden
# parents is barren too, it is taken out of its component: its cell is coded SUMMED (an extra
# column of its CPT, the log of the row sum, log 1 for a CPT) and its family becomes a factor
# over the parents alone. The gradient reaching that column is the parents' posterior P(u | row)
# (times the weight), and the leaf's expected counts are theta(x | u) times it, which the chain
# rule through the log row sum gives (:func:`_widen_flat`); so do the second derivatives.
_CODE_CARDS: dict[int, tuple[Network, tuple[int, ...]]] = {}


class _SummedCodes:
    """The codes as the plan reads them once barren leaves are summed: the data's codes plus,
    per summed leaf ``v``, a mask of the rows where its hidden cell is summed (code
    ``cards[v]``, the extra column of its widened CPT). Reading a block of rows (a slice), some
    rows (an index array), a gather (``np.ix_``) or one column returns a new array with the
    summed cells in it; the whole matrix is never copied (on 10 M rows x 37 nodes that copy was
    370 MB of int8, docs/performance.md "Lean codes")."""

    def __init__(self, codes: np.ndarray, summed: dict[int, np.ndarray], cards: Sequence[int]):
        self.codes = codes
        self.summed = summed
        self.cards = cards
        self.shape = codes.shape
        self.dtype = codes.dtype

    def __len__(self) -> int:
        return int(self.codes.shape[0])

    def __getitem__(self, key):
        if isinstance(key, tuple) and len(key) == 2 and isinstance(key[1], (int, np.integer)):
            rows, v = key                                   # one column (of some rows)
            out = np.array(self.codes[rows, v])
            m = self.summed.get(int(v))
            if m is not None:
                out[m[rows]] = self.cards[int(v)]
            return out
        if isinstance(key, tuple) and len(key) == 2:        # np.ix_(rows, columns)
            r, c = (np.asarray(k) for k in key)
            out = self.codes[r, c]
            r1, c1 = r.reshape(-1), c.reshape(-1)
            for j, v in enumerate(c1.tolist()):
                m = self.summed.get(int(v))
                if m is not None:
                    out[m[r1], j] = self.cards[int(v)]
            return out
        if isinstance(key, slice) or (isinstance(key, np.ndarray) and key.ndim == 1):
            out = np.array(self.codes[key])                 # rows (always a copy)
            for v, m in self.summed.items():
                out[m[key], v] = self.cards[v]
            return out
        raise TypeError(f"_SummedCodes cannot be indexed by {type(key).__name__}")


def _summed_leaves(network: Network, codes: np.ndarray) -> tuple["np.ndarray | _SummedCodes", tuple[int, ...]]:
    """Codes with every removable barren leaf's cell set to its number of states (the extra
    column of its widened CPT; a :class:`_SummedCodes` view, not a copy), and the nodes
    widened (those removed in some row).

    A hidden leaf is removed in a row when each of its hidden parents has an observed descendant
    in that row (is not barren itself); otherwise it stays in its component."""
    n = len(network)
    pa, kids = _st(network).parents, _st(network).children
    cards = _st(network).cards
    R = codes.shape[0]
    some = codes.min(axis=0) < 0 if R else np.zeros(n, bool)
    leaves = [v for v in range(n) if not kids[v] and some[v]]
    if not leaves:
        return codes, ()
    summed: dict[int, np.ndarray] = {}  # leaf -> rows where its cell is summed
    step = max(1024, PLAN_BLOCK // max(1, n))
    sidx = np.flatnonzero(some)
    pos = {int(u): j for j, u in enumerate(sidx)}
    for s0 in range(0, R, step):
        blk = codes[s0:s0 + step]
        # only the columns hidden somewhere, transposed: one contiguous row per node
        hT = np.ascontiguousarray((blk[:, sidx] < 0).T)
        # observed or with an observed descendant, per node hidden somewhere (children first)
        od: dict[int, np.ndarray] = {}
        for u in reversed(range(n)):
            if not some[u]:
                continue
            hit = ~hT[pos[u]]
            for c in kids[u]:
                if some[c]:
                    hit = hit | od[c]
                else:
                    hit = np.ones(len(blk), bool)
                    break
            od[u] = hit
        for v in leaves:
            rm = hT[pos[v]].copy()
            for u in pa[v]:
                if some[u]:
                    rm &= od[u]
            if rm.any():
                if v not in summed:
                    summed[v] = np.zeros(R, bool)
                summed[v][s0:s0 + step] = rm
    if not summed:
        return codes, ()
    return _SummedCodes(codes, summed, cards), tuple(sorted(summed))


def _widened_network(network: Network, widened: Sequence[int]) -> Network:
    """A stand-in for ``network`` (an equal copy, another identity) whose flat layout gives each
    node of ``widened`` one more column per CPT row (the SUMMED code): the plan of rows with
    summed leaves is built on it, so that every index it computes lands in the widened vector."""
    import copy

    shadow = copy.copy(network)
    cards = list(_st(network).cards)
    pa = _st(network).parents
    wide = set(widened)
    offsets, strides = [], []
    off = 0
    for i in range(len(network)):
        fam = tuple(pa[i]) + (i,)
        st, s = {}, 1
        for u in reversed(fam):
            st[u] = s
            s *= cards[u] + (1 if u == i and i in wide else 0)
        offsets.append(off)
        strides.append(st)
        off += s
    _LAYOUTS[id(shadow)] = (shadow, (tuple(offsets), tuple(strides), off))
    _CODE_CARDS[id(shadow)] = (shadow, tuple(c + (1 if i in wide else 0) for i, c in enumerate(cards)))
    return shadow


def _code_cards(network: Network) -> tuple[int, ...]:
    """Values a code of each node can take in a plan's rows (a widened node: one more)."""
    hit = _CODE_CARDS.get(id(network))
    if hit is not None and hit[0] is network:
        return hit[1]
    return _st(network).cards


def _widen_segments(network: Network, widened: Sequence[int]) -> tuple[tuple[int, int, int], ...]:
    """Static description of the widening: per node ``(size, rows, card or 0 when not widened)``."""
    wide = set(widened)
    out = []
    for i, name in enumerate(network.names):
        shape = network.cpt_shape(name)
        size = math.prod(shape)
        out.append((size, size // shape[-1], shape[-1] if i in wide else 0))
    return tuple(out)


def _widen_flat(groups: tuple, lc_flat):
    """The log-CPTs in the plan's flat layout: a widened node's rows get the log of their sum
    (log 1 for CPTs) as an extra column; unchanged when the plan widened no node."""
    seg = groups[0].widen if groups and isinstance(groups[0], GatheredBlock) else ()
    if not seg:
        return lc_flat
    pieces, off, start = [], 0, 0
    for size, rows, card in seg:
        if card:
            if off > start:
                pieces.append(lc_flat[start:off])
            t = lc_flat[off:off + size].reshape(rows, card)
            pieces.append(jnp.concatenate([t, _logsumexp_last(t, axis=1)[:, None]], axis=1).reshape(-1))
            start = off + size
        off += size
    pieces.append(lc_flat[start:])
    return jnp.concatenate(pieces)


def _is_widened(groups: tuple) -> bool:
    return bool(groups) and isinstance(groups[0], GatheredBlock) and bool(groups[0].widen)


def _plan_flat(groups: tuple, logcpts: Sequence[jax.Array]) -> jax.Array:
    """:func:`_flat` in the plan's layout (widened for summed barren leaves)."""
    lc = jnp.concatenate([jnp.ravel(x) for x in logcpts])
    return jnp.concatenate([_widen_flat(groups, lc), jnp.array([0.0, -jnp.inf], jnp.float64)])


def _narrow_flat(groups: tuple, w: np.ndarray) -> np.ndarray:
    """A flat vector of the plan's layout back in the network's (extra columns dropped)."""
    if not _is_widened(groups):
        return w
    out, off = [], 0
    for size, rows, card in groups[0].widen:
        if card:
            out.append(w[off:off + rows * (card + 1)].reshape(rows, card + 1)[:, :card].reshape(-1))
            off += rows * (card + 1)
        else:
            out.append(w[off:off + size])
            off += size
    return np.concatenate(out)

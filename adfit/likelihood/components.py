"""Taking rows apart: hidden cells split into connected components per row, components grouped by
type (the CPT entries they read), and a type's distinct instances with summed weights.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import numpy as np

from ..network import Network
from .barren import _code_cards
from .layout import _st
from .settings import PLAN_BLOCK


# --------------------------------------------------------------------------- rows -> components
def _decompose(network: Network, codes: np.ndarray):
    """Barren pruning and hidden components of a block of rows.

    Returns ``(comp_row, comp_key, pruned_any, hidden_all, hidden_any)``: one entry per
    component, its row (in the block) and its key, ``(W words of the hidden-node bit set, W
    words of the family bit set)`` as uint64; ``pruned_any`` marks nodes pruned in at least one
    row, ``hidden_all`` / ``hidden_any`` nodes hidden in every / some row of the block.
    """
    n = len(network)
    pa, kids = _st(network).parents, _st(network).children
    R = codes.shape[0]
    # Only the nodes hidden somewhere in the block (``roots``) take part; their columns are
    # worked on transposed (one contiguous row per node): a column of the row-major block costs
    # a pass over the whole block.
    some = codes.min(axis=0) < 0 if R else np.zeros(n, bool)
    roots = np.flatnonzero(some)
    H = len(roots)
    posh = np.full(n + 1, -1, np.int64)
    posh[roots] = np.arange(H)
    hT = np.ascontiguousarray((codes[:, roots] < 0).T)          # (H, rows)
    always = np.full(n, R == 0)   # (vacuously hidden in every row of an empty block)
    always[roots] = hT.all(axis=1)
    # Barren nodes (hidden, no observed descendant) sum out to 1, but their expected counts are
    # not 0 (they are the CPT propagated from the posterior of their parents), so they stay in
    # their components; they are only counted here, for the description. A child never hidden
    # in the block is an observed descendant in every row.
    odT = ~hT
    for p in reversed(range(H)):
        i = int(roots[p])
        if not kids[i]:
            continue
        if any(not some[c] for c in kids[i]):
            odT[p] = True
        else:
            odT[p] |= odT[posh[list(kids[i])]].any(axis=0)
    pruned_any = np.zeros(n, bool)
    pruned_any[roots] = (hT & ~odT).any(axis=1)
    labT = np.where(hT, roots[:, None].astype(np.int32), np.int32(n))  # (H, rows)
    fam_h = [posh[[u for u in (*pa[v], v) if some[u]]] for v in range(n)]
    links = []
    for v in range(n):
        pm = fam_h[v]
        if len(pm) < 2:
            continue
        rows = np.flatnonzero(hT[pm].sum(axis=0) >= 2)
        if rows.size:
            links.append((pm, rows))
    changed = bool(links)
    while changed:  # propagate the smallest node index over shared families until stable
        changed = False
        for pm, rows in links:
            sub = labT[pm[:, None], rows[None, :]]
            new = np.where(sub < n, sub.min(axis=0, keepdims=True), np.int32(n))
            if not np.array_equal(new, sub):
                labT[pm[:, None], rows[None, :]] = new
                changed = True
    W = (n + 63) // 64
    hm = np.zeros((R, max(1, H), W), np.uint64)
    fm = np.zeros((R, max(1, H), W), np.uint64)
    for p, u in enumerate(roots):
        rr = np.flatnonzero(hT[p])
        hm[rr, posh[labT[p, rr]], u // 64] |= np.uint64(1 << (int(u) % 64))
    for v in range(n):
        pm = fam_h[v]
        if not len(pm):
            continue
        fl = labT[pm].min(axis=0)
        rr = np.flatnonzero(fl < n)
        fm[rr, posh[fl[rr]], v // 64] |= np.uint64(1 << (v % 64))
    r, root = np.nonzero(hm.any(axis=2))
    key = np.concatenate([hm[r, root], fm[r, root]], axis=1)
    return r, key, pruned_any, always, some


def _bits(words: np.ndarray) -> tuple[int, ...]:
    out = []
    for w, x in enumerate(words.tolist()):
        while x:
            low = x & -x
            out.append(w * 64 + low.bit_length() - 1)
            x ^= low
    return tuple(out)


@dataclass
class _Type:
    """A component type: hidden nodes, the families that touch them, and where it occurs."""

    hidden: tuple[int, ...]
    families: tuple[int, ...]
    rows: list                       # arrays of distinct-row indices, joined later
    A: int = 0
    boundary: tuple[int, ...] = ()

    @property
    def m(self) -> int:
        return len(self.families)


def _components(network: Network, codes: np.ndarray):
    """Component types of every row (blockwise, to bound memory).

    Returns ``(types, pruned, hidden_summary)``; ``hidden_summary`` is the (2, nodes) mask
    ``[hidden in every row, hidden in some row]``, which gives :func:`_group_plan` the same
    plan as the whole ``codes < 0`` (it only reads the columns' all and any)."""
    n = len(network)
    W = (n + 63) // 64
    R = codes.shape[0]
    step = max(1024, PLAN_BLOCK // max(1, n * W))
    types: dict[bytes, int] = {}
    tlist: list[_Type] = []
    pruned = np.zeros(n, bool)
    always, some = np.ones(n, bool), np.zeros(n, bool)
    comp_type_parts, comp_row_parts = [], []
    for s in range(0, R, step):
        block = codes[s:s + step]
        r, key, pr, blk_all, blk_any = _decompose(network, block)
        pruned |= pr
        always &= blk_all
        some |= blk_any
        if not len(r):
            continue
        uk, inv = _unique_keys(key)
        gid = np.empty(len(uk), np.int64)
        for j, k in enumerate(uk):
            b = k.tobytes()
            t = types.get(b)
            if t is None:
                words = np.frombuffer(b, dtype=np.uint64)
                hid, fam = _bits(words[:W]), _bits(words[W:])
                t = len(tlist)
                types[b] = t
                tlist.append(_Type(hid, fam, [], math.prod(_st(network).cards[u] for u in hid)))
            gid[j] = t
        comp_type_parts.append(gid[inv.reshape(-1)])
        comp_row_parts.append(r.astype(np.int64) + s)
    if comp_type_parts:
        ct = np.concatenate(comp_type_parts)
        cr = np.concatenate(comp_row_parts)
        order = np.argsort(ct.astype(np.uint16) if len(tlist) < (1 << 16) else ct, kind="stable")  # radix sort
        ct, cr = ct[order], cr[order]
        bounds = np.searchsorted(ct, np.arange(len(tlist) + 1))
        for t, typ in enumerate(tlist):
            typ.rows = cr[bounds[t]:bounds[t + 1]]
    pa = _st(network).parents
    for typ in tlist:
        hs = set(typ.hidden)
        typ.boundary = tuple(sorted({u for v in typ.families for u in (*pa[v], v)} - hs))
    return tlist, pruned, np.stack([always & some, some])


def _void_rows(a: np.ndarray) -> np.ndarray:
    a = np.ascontiguousarray(a)
    return a.view(np.dtype((np.void, a.dtype.itemsize * a.shape[1]))).ravel()


def _unique_keys(key: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``np.unique`` of the rows of a uint64 key matrix (as raw bytes, ``return_inverse``), by a
    hash table: the keys are many (one per component) and their distinct values few (component
    types), so sorting them all (``np.unique``) is the slow way. The distinct keys found are
    checked against every row (a hash collision falls back to ``np.unique``) and sorted as
    ``np.unique`` sorts them, so the result is the same."""
    import pandas as pd

    if len(key) == 0:
        uk, inv = np.unique(_void_rows(key), return_inverse=True)
        return uk, inv.reshape(-1)
    h = key[:, 0].copy()
    for j in range(1, key.shape[1]):
        h = h * np.uint64(0x9E3779B97F4A7C15) + key[:, j]  # wraps modulo 2^64
    codes, uniq = pd.factorize(h, sort=False)
    first = np.empty(len(uniq), np.int64)
    first[codes[::-1]] = np.arange(len(codes) - 1, -1, -1)
    distinct = key[first]
    if not np.array_equal(distinct[codes], key):  # a collision of the 64-bit hash
        uk, inv = np.unique(_void_rows(key), return_inverse=True)
        return uk, inv.reshape(-1)
    uk, rank = np.unique(_void_rows(distinct), return_inverse=True)
    return uk, rank.reshape(-1)[codes]


def _distinct_rows(sub: np.ndarray, cards: Sequence[int]) -> tuple[np.ndarray, np.ndarray]:
    """Distinct rows of a small non-negative code matrix: (first index of each, inverse)."""
    if sub.shape[1] == 0:
        return np.zeros(1, np.int64), np.zeros(len(sub), np.int64)
    if len(sub) == 1:  # (most component types of a large network occur in one row)
        return np.zeros(1, np.int64), np.zeros(1, np.int64)
    key = np.zeros(len(sub), np.int64)
    space = math.prod(int(c) for c in cards)
    if space < (1 << 62):
        for j in range(sub.shape[1]):
            key = key * int(cards[j]) + sub[:, j]
        # dense key space: no sort needed (for few rows, sorting them is cheaper than a pass over
        # the key space; both give the distinct keys in increasing order, first occurrences)
        if space <= 4 * len(key) or (space <= (1 << 16) and len(key) >= 2048):
            seen = np.zeros(space, np.int64)
            seen[key] = 1
            rank = np.cumsum(seen) - 1
            inv = rank[key]
            first = np.zeros(int(rank[-1]) + 1, np.int64)
            first[inv[::-1]] = np.arange(len(key) - 1, -1, -1)  # the first occurrence wins
            return first, inv
        _, first, inv = np.unique(key, return_index=True, return_inverse=True)
    else:
        _, first, inv = np.unique(sub, axis=0, return_index=True, return_inverse=True)
    return first, inv.reshape(-1)


def _type_instances(network: Network, typ: _Type, codes: np.ndarray, counts: np.ndarray, rows: np.ndarray):
    """Distinct instances of a component type among ``rows``: (boundary codes, weights, inverse)."""
    cached = getattr(typ, "_inst", None)
    if cached is not None and cached[0] is rows:
        return cached[1]
    out = _type_instances_uncached(network, typ, codes, counts, rows)
    typ._inst = (rows, out)
    return out


def _type_instances_uncached(network: Network, typ: _Type, codes: np.ndarray, counts: np.ndarray, rows: np.ndarray):
    bd = list(typ.boundary)
    sub = codes[np.ix_(rows, bd)] if bd else np.zeros((len(rows), 0), np.int32)
    cc = _code_cards(network)
    first, inv = _distinct_rows(sub, [cc[u] for u in bd])
    w = np.bincount(inv, weights=counts[rows], minlength=len(first))
    return sub[first], w, inv


def _n_instances(network: Network, typ: _Type, codes: np.ndarray, counts: np.ndarray) -> int:
    return len(_type_instances(network, typ, codes, counts, typ.rows)[1])

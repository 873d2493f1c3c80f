"""The elimination tape: an elimination order compiled into a flat program of log-sum-exp products
over a buffer of table entries, packed into fixed-width batches (``TapeBlock``), so that every
program of a shape class runs on one compiled loop.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Mapping, Sequence

import numpy as np

from ..network import Network
from .blocks import GroupPlan, TapeBlock
from .layout import layout_of, layout_size, _st
from .settings import COMPILE_TAPE, PLAN_EVALUATIONS, T_LOOP, T_TAPE, TAPE_BUDGET, TAPE_FACTORS, TAPE_SLOTS


# --------------------------------------------------------------------------- the elimination tape
# Abstract ids while a program is built: log-CPT leaves 0.., indicator leaves _IND + k, the
# constants log 1 and log 0, computed entries _ITEM + k. Buffer positions are assigned when the
# programs of a shape class are laid out together.
_IND = 1 << 40
_ONE = 1 << 45
_NEG = _ONE + 1
_ITEM = 1 << 50


@dataclass
class _Program:
    leaf_off: np.ndarray      # (n_leaf,) flat offset of each log-CPT leaf (plus the row's base)
    leaf_fac: np.ndarray      # (n_leaf,) which per-row base offset it adds
    n_fac: int
    ind_code: np.ndarray      # (n_ind,) which indicator code row it reads
    ind_state: np.ndarray     # (n_ind,) the state it indicates
    icode_nodes: tuple[int, ...]
    src: np.ndarray           # (n_items, slots, ops) abstract ids
    level: np.ndarray         # (n_items,)
    finals: np.ndarray        # abstract ids summed into the row's log-likelihood
    gp: GroupPlan
    batch: np.ndarray | None = None
    slot: np.ndarray | None = None
    n_batch: int = 0
    width: int = 0


def _bcast_ids(scope: Sequence[int], ids: np.ndarray, union: Sequence[int], cards: Mapping[int, int]) -> np.ndarray:
    """Ids of a table broadcast over ``union`` (every variable of ``scope`` is in ``union``)."""
    pos = [union.index(u) for u in scope]
    shape = [1] * len(union)
    for p, u in zip(pos, scope):
        shape[p] = cards[u]
    if len(scope) > 1:
        ids = ids.transpose(sorted(range(len(pos)), key=pos.__getitem__))  # (positions are distinct)
    out = np.empty(tuple(cards[u] for u in union), ids.dtype)
    out[...] = ids.reshape(shape)  # broadcast (a copy: every caller reshapes it)
    return out


class _TapeWriter:
    def __init__(self, slots: int, ops: int):
        self.slots, self.ops = slots, ops
        self.src: list[np.ndarray] = []
        self.lev: list[np.ndarray] = []
        self.level = np.zeros(1024, np.int64)
        self.n = 0

    def add(self, terms: np.ndarray) -> np.ndarray:
        """New entries, each ``log sum_s exp(sum_j terms[., s, j])``; terms (k, s<=slots, j<=ops)."""
        k, s, j = terms.shape
        src = np.full((k, self.slots, self.ops), _ONE, np.int64)
        src[:, :, 0] = _NEG
        src[:, :s, :j] = terms
        if s < self.slots:
            src[:, s:, 0] = _NEG
        it = src >= _ITEM
        lv = np.zeros(src.shape, np.int64)
        lv[it] = self.level[src[it] - _ITEM]
        lev = lv.reshape(k, -1).max(axis=1) + 1
        if self.n + k > len(self.level):
            self.level = np.concatenate([self.level, np.zeros(max(self.n + k, 2 * len(self.level)), np.int64)])
        self.level[self.n:self.n + k] = lev
        ids = _ITEM + self.n + np.arange(k, dtype=np.int64)
        self.n += k
        self.src.append(src)
        return ids

    def product(self, tables, cards):
        """Entry-wise product (sum of logs) of up to ``ops`` tables, over the union of scopes."""
        union: list[int] = []
        for sc, _ in tables:
            for u in sc:
                if u not in union:
                    union.append(u)
        terms = np.stack([_bcast_ids(sc, ids, union, cards).reshape(-1) for sc, ids in tables], axis=-1)
        ids = self.add(terms[:, None, :])
        return tuple(union), ids.reshape(tuple(cards[u] for u in union))

    def eliminate(self, tables, out_scope, var, cards):
        """``sum over var`` of the product of ``tables`` (each at most ``ops``)."""
        while len(tables) > self.ops:
            tables = sorted(tables, key=lambda t: t[1].size)
            tables = tables[self.ops:] + [self.product(tables[:self.ops], cards)]
        union = list(out_scope) + [var]
        arrs = [_bcast_ids(sc, ids, union, cards) for sc, ids in tables]
        K = math.prod(cards[u] for u in out_scope)
        V = cards[var]
        terms = np.stack([a.reshape(K, V) for a in arrs], axis=-1)      # (K, V, J)
        while V > self.slots:
            G = -(-V // self.slots)
            padded = np.full((K, G * self.slots, terms.shape[2]), _ONE, np.int64)
            padded[:, :, 0] = _NEG
            padded[:, :V] = terms
            ids = self.add(padded.reshape(K * G, self.slots, terms.shape[2]))
            terms = ids.reshape(K, G, 1)
            V = G
        ids = self.add(terms)
        return ids.reshape(tuple(cards[u] for u in out_scope))


def _compile_program(network: Network, gp: GroupPlan, layout, slots: int, ops: int) -> _Program:
    """Turn an elimination plan into tape entries (abstract ids) with their dependency levels."""
    offsets, strides, _ = layout
    cards = dict(enumerate(_st(network).cards))
    leaf_off, leaf_fac = [], []
    tables: dict[int, tuple[tuple[int, ...], np.ndarray]] = {}
    n_leaf = 0
    for fid, f in enumerate(gp.factors):
        shape = tuple(cards[u] for u in f.scope)
        grid = np.indices(shape).reshape(len(shape), -1)
        off = np.full(grid.shape[1], offsets[f.node], np.int64)
        for k, u in enumerate(f.scope):
            off += strides[f.node][u] * grid[k]
        leaf_off.append(off)
        leaf_fac.append(np.full(off.size, fid, np.int64))
        tables[fid] = (f.scope, (n_leaf + np.arange(off.size, dtype=np.int64)).reshape(shape))
        n_leaf += off.size
    finals = []
    n_fac = len(gp.factors) + len(gp.log_terms)
    for j, (node, _fam) in enumerate(gp.log_terms):
        leaf_off.append(np.array([offsets[node]], np.int64))
        leaf_fac.append(np.array([len(gp.factors) + j], np.int64))
        finals.append(n_leaf)
        n_leaf += 1
    ind_code, ind_state = [], []
    base = len(gp.factors)
    for k, v in enumerate(gp.indicators):
        ids = _IND + len(ind_code) + np.arange(cards[v], dtype=np.int64)
        ind_code += [k] * cards[v]
        ind_state += list(range(cards[v]))
        tables[base + k] = ((v,), ids)
    w = _TapeWriter(slots, ops)
    for st in gp.steps:
        ins = [tables.pop(f) for f in st.inputs]
        ids = w.eliminate(ins, st.out_scope, st.var, cards)
        tables[st.out_id] = (st.out_scope, ids)
    for f in gp.final:
        finals.append(int(tables[f][1].reshape(())))
    src = np.concatenate(w.src) if w.src else np.zeros((0, slots, ops), np.int64)
    cat = (lambda xs: np.concatenate(xs) if xs else np.zeros(0, np.int64))
    return _Program(cat(leaf_off), cat(leaf_fac), n_fac, np.asarray(ind_code, np.int64),
                    np.asarray(ind_state, np.int64), tuple(gp.indicators), src, w.level[:w.n].copy(),
                    np.asarray(finals, np.int64), gp)


def _pack(prog: _Program, width: int) -> None:
    """Assign every entry a batch (after the batches of its operands) and a slot, first fit."""
    if prog.batch is not None and prog.width == width:
        return
    n = len(prog.src)
    batch = np.zeros(n, np.int64)
    slot = np.zeros(n, np.int64)
    fill: list[int] = []
    nxt: list[int] = []  # first batch >= b that may have room (path compression)

    def find(b):
        path = []
        while b < len(fill) and fill[b] >= width:
            path.append(b)
            b = nxt[b]
        for p in path:
            nxt[p] = b
        return b

    order = np.argsort(prog.level, kind="stable")
    src = prog.src
    # earliest batch per entry, level by level (operands of a level are placed before it)
    levels = prog.level[order]
    cuts = np.flatnonzero(np.diff(levels)) + 1
    for group in np.split(order, cuts):
        s = src[group]
        it = s >= _ITEM
        eb = np.full(s.shape, -1, np.int64)
        eb[it] = batch[s[it] - _ITEM]
        earliest = eb.reshape(len(group), -1).max(axis=1) + 1
        for i, e in zip(group.tolist(), earliest.tolist()):
            b = find(e)
            while b >= len(fill):
                fill.append(0)
                nxt.append(len(fill))
            batch[i] = b
            slot[i] = fill[b]
            fill[b] += 1
    prog.batch, prog.slot, prog.n_batch, prog.width = batch, slot, len(fill), width


def _choose_width(progs: Sequence[_Program], rows: Sequence[int]) -> int:
    """Batch width of a class: every instance runs the class's largest batch count, so minimise
    (instances x batches x width) operands plus loop iterations (batches per level estimated)."""
    best = None
    total = sum(rows)
    for width in (2, 4, 8, 16, 32, 64, 128):
        nb = 1
        for p in progs:
            counts = np.bincount(p.level) if len(p.level) else np.zeros(1, np.int64)
            nb = max(nb, int(np.sum(-(-counts // width))))
        S, O = progs[0].src.shape[1:] if len(progs[0].src) else (TAPE_SLOTS, TAPE_FACTORS)
        t = total * nb * width * S * O * T_TAPE + nb * T_LOOP * max(1.0, total / 64)
        if best is None or t < best[0]:
            best = (t, width)
    return best[1]


def _split_classes(sizes: Sequence[float], n_inst: Sequence[int], max_classes: int = 3) -> list[list[int]]:
    """Partition programs (by padded size) into shape classes: padding against compile time."""
    order = sorted(range(len(sizes)), key=lambda i: sizes[i])
    cum = np.concatenate([[0], np.cumsum([n_inst[i] for i in order])])
    cand = sorted(set(np.linspace(0, len(order), min(len(order), 40) + 1).astype(int).tolist()))

    def group_cost(i, j):  # programs order[i:j]
        return (cum[j] - cum[i]) * sizes[order[j - 1]] * T_TAPE * PLAN_EVALUATIONS + COMPILE_TAPE

    best = {0: (0.0, [])}
    for _ in range(max_classes):
        nxt = dict(best)
        for i, (c, cuts) in best.items():
            for j in cand:
                if j <= i:
                    continue
                cc = c + group_cost(i, j)
                if j not in nxt or cc < nxt[j][0]:
                    nxt[j] = (cc, cuts + [j])
        best = nxt
    _, cuts = best[len(order)]
    out, i = [], 0
    for j in cuts:
        out.append(order[i:j])
        i = j
    return out


def _bases(network: Network, gp: GroupPlan, codes: np.ndarray, layout) -> np.ndarray:
    """Per-row base offsets (rows, n_fac): the observed family members' part of each index."""
    _, strides, _ = layout
    out = np.zeros((len(codes), len(gp.factors) + len(gp.log_terms)), np.int64)
    for fid, f in enumerate(gp.factors):
        for u in f.obs:
            out[:, fid] += np.multiply(codes[:, u], strides[f.node][u], dtype=np.int64)
    for j, (node, fam) in enumerate(gp.log_terms):
        for u in fam:
            out[:, len(gp.factors) + j] += np.multiply(codes[:, u], strides[node][u], dtype=np.int64)
    return out


def _tape_block(network: Network, kind: str, progs: Sequence[_Program], datas, width: int,
                chunk: int | None, slots: int, ops: int):
    """Lay out the programs of one class in a common padded shape, with their chunked data.

    ``datas[p] = (codes (instances, n), weights (instances,))`` for program ``p``. Instances of
    different programs share chunks: each carries its program id.
    Returns ``(block, arrays, weights, starts)``, ``starts[p]`` the first flat instance of ``p``.
    """
    for p in progs:
        _pack(p, width)
    n_leaf = max(1, max(len(p.leaf_off) for p in progs))
    n_fac = max(1, max(p.n_fac for p in progs))
    n_ind = max(1, max(len(p.ind_code) for p in progs))
    n_icodes = max(1, max(len(p.icode_nodes) for p in progs))
    n_batch = max(1, max(p.n_batch for p in progs))
    n_final = max(1, max(len(p.finals) for p in progs))
    start = n_leaf + n_ind + 2
    one, neg = n_leaf + n_ind, n_leaf + n_ind + 1
    M = start + n_batch * width
    n_inst = sum(len(d[1]) for d in datas)
    if chunk is None:
        chunk = _pow2_clip(TAPE_BUDGET / M, 8, 1024)
        chunk = min(chunk, max(8, 1 << math.ceil(math.log2(max(1, n_inst)))))
    P = len(progs)
    n_flat = layout_size(network)
    leaf_off = np.full((P, n_leaf), n_flat, np.int64)      # padding leaves read log 1
    leaf_fac = np.full((P, n_leaf), n_fac, np.int64)       # ... with a zero base
    ind_code = np.full((P, n_ind), n_icodes, np.int64)
    ind_state = np.zeros((P, n_ind), np.int64)
    items = np.empty((n_batch, P, width, slots, ops), np.int64)
    items[...] = one
    items[..., 0] = neg
    finals = np.full((P, n_final), one, np.int64)
    nch = max(1, -(-n_inst // chunk))
    pid = np.zeros(nch * chunk, np.int32)
    base = np.zeros((nch * chunk, n_fac + 1), np.int64)
    icodes = np.full((nch * chunk, n_icodes + 1), -1, np.int64)
    wts = np.zeros(nch * chunk)
    starts = []
    off = 0
    lay = layout_of(network)
    for p, (prog, (codes, w)) in enumerate(zip(progs, datas)):
        k = len(prog.leaf_off)
        leaf_off[p, :k] = prog.leaf_off
        leaf_fac[p, :k] = prog.leaf_fac
        ki = len(prog.ind_code)
        ind_code[p, :ki] = prog.ind_code
        ind_state[p, :ki] = prog.ind_state

        def pos(ids, prog=prog):
            ids = np.asarray(ids, np.int64)
            out = np.empty(ids.shape, np.int64)
            leaf = ids < _IND
            out[leaf] = ids[leaf]
            ind = (ids >= _IND) & (ids < _ONE)
            out[ind] = n_leaf + ids[ind] - _IND
            out[ids == _ONE] = one
            out[ids == _NEG] = neg
            it = ids >= _ITEM
            j = ids[it] - _ITEM
            out[it] = start + prog.batch[j] * width + prog.slot[j]
            return out

        if len(prog.src):
            items[prog.batch, p, prog.slot] = pos(prog.src)
        finals[p, :len(prog.finals)] = pos(prog.finals)
        R = len(w)
        starts.append(off)
        pid[off:off + R] = p
        bases = _bases(network, prog.gp, codes, lay)
        base[off:off + R, :bases.shape[1]] = bases
        if prog.icode_nodes:
            icodes[off:off + R, :len(prog.icode_nodes)] = codes[:, list(prog.icode_nodes)]
        wts[off:off + R] = w
        off += R
    tables = (leaf_off, leaf_fac, ind_code, ind_state, items, finals)
    tables = tuple(np.ascontiguousarray(t, dtype=np.int32) for t in tables)
    data = (pid.reshape(nch, chunk), base.astype(np.int32).reshape(nch, chunk, -1),
            icodes.astype(np.int32).reshape(nch, chunk, -1))
    cost = (n_leaf + n_batch * width * slots * ops) * nch * chunk / max(1, n_inst)
    blk = TapeBlock(kind, P, n_leaf, n_fac, n_ind, n_icodes, n_batch, width, slots, ops, n_final, chunk,
                    n_inst, cost, n_hidden=max(p.gp.n_hidden for p in progs),
                    n_partial=max(p.gp.n_partial for p in progs), n_pruned=min(p.gp.n_pruned for p in progs))
    return blk, (tables, data), wts.reshape(nch, chunk), starts


def _pow2_clip(x: float, lo: int, hi: int) -> int:
    return 1 << max(int(math.log2(lo)), min(int(math.log2(hi)), int(math.log2(max(1.0, x)))))


def _tape_seconds(blk: TapeBlock, wts: np.ndarray) -> float:
    n_chunks = wts.shape[0]
    per_row = blk.n_leaf + blk.n_batch * blk.width * blk.slots * blk.ops
    return n_chunks * (blk.chunk * per_row * T_TAPE + blk.n_batch * T_LOOP)

"""Plan-time side of enumerated components: the table of log-CPT entries each assignment gathers,
and the padded bucket shapes that every component type shares (compiled once each).
"""

from __future__ import annotations

import numpy as np

from ..network import Network
from .components import _Type
from .layout import _st
from .settings import COMPILE_ENUM, PLAN_EVALUATIONS, T_ENUM


def _enum_tables(network: Network, typ: _Type, bcodes: np.ndarray, layout) -> np.ndarray:
    """Flat indices (instances, A, m) of the log-CPT entries each assignment of ``typ`` reads."""
    offsets, strides, _ = layout
    cards = _st(network).cards
    pa = _st(network).parents
    H = typ.hidden
    shape = [cards[u] for u in H]
    digits = np.indices(shape).reshape(len(H), -1).T if H else np.zeros((1, 0), np.int64)
    bpos = {u: j for j, u in enumerate(typ.boundary)}
    hpos = {u: j for j, u in enumerate(H)}
    obs = np.zeros((len(bcodes), typ.m), np.int64)
    asg = np.zeros((digits.shape[0], typ.m), np.int64)
    for j, v in enumerate(typ.families):
        obs[:, j] = offsets[v]
        for u in (*pa[v], v):
            if u in hpos:
                asg[:, j] += strides[v][u] * digits[:, hpos[u]]
            else:
                obs[:, j] += np.multiply(bcodes[:, bpos[u]], strides[v][u], dtype=np.int64)
    return obs[:, None, :] + asg[None, :, :]


def _enum_bucket_menu(classes: dict[tuple[int, int], int]) -> dict[tuple[int, int], tuple[int, int]]:
    """Merge (A, m) shape classes into buckets when the padding costs less than a compile.

    Greedy: the pair whose merge saves the most is merged first, until no merge saves; among
    equal savings, the pair met first in the order of the buckets (oldest first), as a double
    loop over them would meet it. The cost of a pair depends on the two buckets alone, so it is
    computed once per pair, not once per round."""
    buckets = {k: [k] for k in classes}
    size = dict(classes)
    seq = {k: i for i, k in enumerate(buckets)}   # insertion order of the live buckets
    n_seq = len(seq)

    def merged_cost(a, b):
        A = max(a[0], b[0])
        m = max(a[1], b[1])
        extra = size[a] * (A * m - a[0] * a[1]) + size[b] * (A * m - b[0] * b[1])
        return extra * T_ENUM * PLAN_EVALUATIONS - COMPILE_ENUM, (A, m)

    pairs: dict[tuple, tuple] = {}                # (a, b), a older than b -> (cost, shape)
    keys = list(buckets)
    for i in range(len(keys)):
        for j in range(i + 1, len(keys)):
            pairs[keys[i], keys[j]] = merged_cost(keys[i], keys[j])
    while len(buckets) > 1:
        (a, b), (c, shape) = min(pairs.items(), key=lambda kv: (kv[1][0], seq[kv[0][0]], seq[kv[0][1]]))
        if c >= 0:
            break
        members = buckets.pop(a) + buckets.pop(b)
        n = size.pop(a) + size.pop(b)
        gone = {a, b}
        if shape in buckets:
            members += buckets.pop(shape)
            n += size.pop(shape)
            gone.add(shape)
        for k in gone:
            seq.pop(k, None)
        pairs = {kk: v for kk, v in pairs.items() if kk[0] not in gone and kk[1] not in gone}
        buckets[shape] = members
        size[shape] = n
        seq[shape] = n_seq
        n_seq += 1
        for k in buckets:
            if k != shape:
                pairs[k, shape] = merged_cost(k, shape)
    out = {}
    for shape, members in buckets.items():
        for k in members:
            out[k] = shape
    return out


def _round_shape(A: int, m: int) -> tuple[int, int]:
    """Candidate padded shape of an enumeration class (few distinct shapes, little padding)."""
    def up(x):
        if x <= 4:
            return x
        p = 1 << (x - 1).bit_length()
        return 3 * p // 4 if x <= 3 * p // 4 else p
    return up(A), up(m)

"""Elimination orders: greedy min-fill over one group's hidden variables, and the steps and
factors of that order (``GroupPlan``), refused with TooLargeError when a clique would be too large.
"""

from __future__ import annotations

import math
from typing import Sequence

import numpy as np

from ..errors import TooLargeError
from ..network import MAX_TABLE_ENTRIES, Network, table_too_large
from .blocks import FactorSpec, GroupPlan, Step
from .layout import _st
from .settings import CHUNK_BUDGET


def _min_fill_order(variables: Sequence[int], scopes: Sequence[Sequence[int]], cards: Sequence[int],
                    names: Sequence[str] | None = None) -> list[int]:
    """Greedy min-fill elimination order, ties broken by the size of the created clique.

    Raises TooLargeError as soon as the chosen step's clique (the table it creates, per row)
    exceeds :data:`adfit.network.MAX_TABLE_ENTRIES`: before the rest of the order is searched
    and before anything is compiled."""
    nb: dict[int, set[int]] = {v: set() for v in variables}
    for s in scopes:
        for a in s:
            for b in s:
                if a != b:
                    nb[a].add(b)

    def key_of(v):  # (fill-in edges, size of the created clique) of eliminating v now
        ns = nb[v]
        fill = 0
        nl = list(ns)
        for i in range(len(nl)):
            nbi = nb[nl[i]]
            for j in range(i + 1, len(nl)):
                if nl[j] not in nbi:
                    fill += 1
        return (fill, cards[v] * math.prod(cards[u] for u in ns))

    # A node's key depends on its neighbours and the edges among them, so eliminating v changes
    # the keys of v's neighbours and of their neighbours only: the others are kept. The node
    # chosen is the first in node order with the smallest key, as a scan of every node would.
    keys = {v: key_of(v) for v in variables}
    order: list[int] = []
    while keys:
        v = min(keys, key=lambda u: (keys[u], u))
        best_key = keys.pop(v)
        if best_key[1] > MAX_TABLE_ENTRIES:
            raise TooLargeError(table_too_large(best_key[1], names[v] if names else str(v), len(nb[v]) + 1))
        ns = list(nb[v])
        for a in ns:
            for b in ns:
                if a != b:
                    nb[a].add(b)
        for a in ns:
            nb[a].discard(v)
        del nb[v]
        order.append(v)
        touched = set(ns)
        for a in ns:
            touched |= nb[a]
        for u in touched:
            keys[u] = key_of(u)
    return order


def _group_plan(network: Network, hidden_mask: np.ndarray, *, kind: str, n_rows: int,
                keep_all: bool = False, indicator_nodes: Sequence[int] = (),
                families: Sequence[int] | None = None) -> GroupPlan:
    """Static elimination plan for a set of rows. ``hidden_mask`` is (rows, n_nodes) bool.

    A node is *observed* (in every row), *hidden* (in every row) or *partial*; partial nodes get
    evidence indicators. ``keep_all`` disables barren pruning and ``indicator_nodes`` forces
    indicator factors (posterior marginals). ``families`` restricts the plan to the families of
    those nodes (a component: the families that touch its hidden nodes).
    """
    n = len(network)
    st = _st(network)
    pa, kids = st.parents, st.children
    always = hidden_mask.all(axis=0)
    some = hidden_mask.any(axis=0)
    forced = set(indicator_nodes)
    if families is not None and not forced:
        # A component (the common call, once per component type): only its families' members
        # are looked at; the sets below are those of the general case restricted to them, the
        # counts are over every node, as there.
        fam_set = set(families)
        members = sorted({u for v in fam_set for u in (*pa[v], v)})
        flags = (some & ~always).tolist()
        hid = always.tolist()
        partial_set = {i for i in members if flags[i]}
        observed = {i for i in members if not flags[i] and not hid[i]}
        return _steps_plan(network, sorted(fam_set), observed, partial_set, n_rows=n_rows, kind=kind,
                           n_hidden=int(np.count_nonzero(always)), n_partial=int(np.count_nonzero(some & ~always)),
                           n_pruned=n - len(fam_set))
    partial_set = {i for i in range(n) if (some[i] and not always[i]) or i in forced}
    hidden_set = {i for i in range(n) if always[i] and i not in forced}
    observed = {i for i in range(n) if i not in partial_set and i not in hidden_set}

    if families is not None:
        fam_set = set(families)
        keep = [i in fam_set for i in range(n)]
    else:
        # Barren pruning: keep a node if it is not always hidden, or if a kept child depends on it.
        keep = [True] * n
        if not keep_all:
            for i in reversed(range(n)):  # children come after parents in topological order
                if i in hidden_set:
                    keep[i] = any(keep[c] for c in kids[i])
    return _steps_plan(network, [i for i in range(n) if keep[i]], observed, partial_set, n_rows=n_rows, kind=kind,
                       n_hidden=len(hidden_set), n_partial=len(partial_set), n_pruned=n - sum(keep))


def _steps_plan(network: Network, kept: Sequence[int], observed: set, partial_set: set, *, n_rows: int, kind: str,
                n_hidden: int, n_partial: int, n_pruned: int) -> GroupPlan:
    """The factors, indicators, min-fill order and steps of the families of ``kept`` (in node
    order); ``observed`` and ``partial_set`` hold at least every member of those families."""
    st = _st(network)
    cards, pa = st.cards, st.parents
    log_terms: list[tuple[int, tuple[int, ...]]] = []
    factors: list[FactorSpec] = []
    for i in kept:
        fam = tuple(pa[i]) + (i,)
        scope = tuple(v for v in fam if v not in observed)
        if not scope:
            log_terms.append((i, fam))
            continue
        obs = tuple(v for v in fam if v in observed)
        perm = tuple(fam.index(v) for v in scope + obs)
        strides = []
        s = 1
        for v in reversed(obs):
            strides.append(s)
            s *= cards[v]
        factors.append(FactorSpec(i, scope, obs, perm, tuple(reversed(strides))))
    in_plan = {v for f in factors for v in f.scope}
    indicators = tuple(sorted(v for v in partial_set if v in in_plan))

    scopes: list[tuple[int, ...]] = [f.scope for f in factors] + [(v,) for v in indicators]
    variables = sorted({v for s in scopes for v in s})
    order = _min_fill_order(variables, scopes, cards, st.names)
    live = list(range(len(scopes)))
    steps: list[Step] = []
    cost = 0.0
    for v in order:
        ins = tuple(f for f in live if v in scopes[f])
        union: list[int] = []
        for f in ins:
            for u in scopes[f]:
                if u not in union:
                    union.append(u)
        cost += math.prod(cards[u] for u in union) * max(1, len(ins))
        out_scope = tuple(u for u in union if u != v)
        out_id = len(scopes)
        scopes.append(out_scope)
        live = [f for f in live if f not in ins] + [out_id]
        steps.append(Step(v, ins, out_scope, out_id))
    final = tuple(f for f in live if not scopes[f])
    assert len(final) == len(live), "every variable is eliminated"

    # Chunk size (posterior marginals): keep the largest intermediate near CHUNK_BUDGET entries.
    biggest = max([1] + [math.prod(cards[u] for u in scopes[s.out_id]) * cards[s.var] for s in steps])
    chunk = 1 << max(6, min(15, int(math.log2(max(1, CHUNK_BUDGET // biggest)))))
    chunk = min(chunk, max(64, 1 << math.ceil(math.log2(max(1, n_rows)))))
    return GroupPlan(tuple(log_terms), tuple(factors), indicators, tuple(steps), final, tuple(scopes),
                     chunk, cost + len(log_terms), kind, n_hidden, n_partial, n_pruned)

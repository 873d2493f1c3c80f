"""Exact marginal log-likelihood of incomplete records, by variable elimination in JAX.

For a distinct coded row ``e`` (observed cells) the marginal likelihood is

    P(e) = sum over the hidden cells h of  prod_i theta_i(x_i | x_pa(i))   with x = (e, h),

a sum over every assignment of the row's hidden cells (missing cells and latent nodes). It is
never enumerated over all hidden cells at once: the sum factorises, and each factor is computed
by the cheapest exact method for its size.

How a row is taken apart (the *plan*, built once per network and data, in plain numpy):

* **Components.** The hidden nodes of the row fall into connected components (two hidden nodes
  are linked when they appear in one family). A family touches at most one component. With
  ``H`` a component and ``F`` the families that touch it,

      log P(e) = sum over families with every member observed of  log theta(e)
               + sum over components (H, F) of  log sum_{x_H} prod_{f in F} theta_f.

* **Observed families** contribute the data counts times ``log theta``: the counts are summed
  over the rows once, at plan time, so their cost per evaluation is the size of the CPTs, not the
  number of rows (their expected counts are the data counts themselves).
* **Small components** (the common case: one to a few hidden cells whose neighbours are
  observed) are enumerated: each of the ``prod |H|`` assignments gathers ``|F|`` log-CPT entries
  (observed values looked up directly), followed by one log-sum-exp. A component is identified by
  the CPT entries it reads, so equal components of different rows are computed once with summed
  weights. Components of every type share a few padded shapes (*buckets*), compiled once each.
* **Large components** (or, for the uniform route, whole rows) go to the *elimination tape*:
  variable elimination with a greedy min-fill order, compiled into a flat program of
  log-sum-exp products over a buffer of table entries (``sum_v prod_j input_j`` per output entry,
  in log space), packed into fixed-width batches and executed by one ``lax.scan``. The program
  is data, not code: every program of a shape class runs on one compiled loop, so compile time
  does not grow with the number of variables, steps or component types. Uniform evidence (the
  classical form: one-hot indicators for observed cells, all ones for missing ones) lets one
  program serve rows of different missingness patterns.
* **Barren nodes** (hidden, no observed descendant in the row) sum out to 1, so they do not
  change the value, but their expected counts are not 0 (the posterior of their parents times
  their CPT), and EM steps and the identifiability checks use those counts. A barren *leaf*
  whose hidden parents are not barren (the unasked items of a questionnaire) leaves its
  component: its cell is coded SUMMED, an extra column of its CPT in the plan's flat layout that
  holds the log of the row sum (log 1), so its family is a factor over the parents alone; the
  gradient reaching that column is the parents' posterior, and the chain rule through the log
  row sum turns it into theta(x | u) times that posterior (:func:`_widen_flat`; exact in both
  modes of differentiation). Other barren nodes stay in their components (a barren subtree
  under observed parents is a component of its own, with few distinct instances).
* The route per component (enumerate, its own elimination program, or the whole row in the
  uniform program) is chosen by an estimated cost that includes compile and plan time;
  ``Plan.route`` and ``Plan.describe()`` say what was chosen.
* XLA runs each of these loops on one core; when an evaluation is long enough, every block's
  chunks are cut into equal parts, one per core, run side by side from threads by the same
  compiled program (:class:`Shards`, ``$ADFIT_THREADS``).

Everything is computed in log space with max-shifted log-sum-exp, so a row whose likelihood is
far below 1e-308 is still finite in float64; a row of probability zero gives ``-inf``. Rows are
processed in fixed-size chunks by ``lax.scan`` that accumulates each chunk's value and gradient,
so memory is bounded by the chunk size, not by the number of rows.

The core functions take **log-CPTs** (``log theta``, all nodes). The gradient with respect to
``log theta_i(x|u)`` is the expected count ``N(x, u)`` of the family given the data (the
derivative of the network polynomial, Darwiche 2003, J. ACM 50(3)); composed with
``log_softmax`` it gives the gradient with respect to the logits, ``N(x,u) - theta(x|u) N(u)``
(Fisher's identity; Dempster, Laird & Rubin 1977, eq. 2.13).
"""

from __future__ import annotations

import dataclasses
import math
import os
from dataclasses import dataclass
from functools import partial
from typing import Any, Iterable, Mapping, Sequence

import numpy as np

from ._jax import jax, jnp  # float64 on before anything else (adfit/_jax.py)
from .data import HIDDEN, CodedData
from .errors import ImpossibleDataError, OptionError, TooLargeError
from .network import MAX_TABLE_ENTRIES, Network, table_too_large

# --------------------------------------------------------------------------- cost model
# Seconds on the 2-core reference machine for one value-and-gradient, fitted to the figures of
# benchmarks/bench_likelihood.py (docs/performance.md). They only rank the routes; a factor of
# two either way changes few decisions.
PLAN_EVALUATIONS = 60       # evaluations a fit is planned for (iterations x line-search steps)
T_ENUM = 3.7e-9               # per padded entry of an enumerated component (gather, exp, scatter)
T_TAPE = 9e-9               # per gathered operand of the elimination tape, per row
T_LOOP = 1.5e-5             # per iteration of a compiled loop (one chunk, or one tape batch)
COMPILE_ENUM = 0.3          # compile time of one enumeration bucket
COMPILE_TAPE = 1.2          # compile time of one elimination-tape class
T_PLAN_TYPE = 8e-4          # plan time of one elimination program (min-fill, tape, packing; Python)
TAPE_PAD = 4.0              # tape operands per min-fill cost unit (padding of batches and slots)
ENUM_ALWAYS = 256           # a component with at most this many entries is always enumerated
ENUM_MAX = 1 << 16          # ... and one with more is never enumerated
ENUM_BUDGET = 1 << 16       # padded entries per chunk of an enumeration bucket (~0.8 MB: cache)
TAPE_BUDGET = 1 << 14       # float64 entries of one tape chunk's buffer (128 KiB: stays in cache)
TAPE_SLOTS = 4              # summed terms per tape entry (states of the eliminated variable) ...
TAPE_FACTORS = 3            # ... and multiplied operands per term; larger steps are split
PLAN_BLOCK = 1 << 22        # cells (rows x nodes) decomposed at a time when building a plan
SHARD_MIN_S = 0.005         # evaluations estimated longer than this are split over the CPU cores

# Limits of the per-pattern route under route="auto" (the cost model decides within them): a
# component type gets an elimination program of its own only with at least MIN_PATTERN_ROWS
# distinct instances, and at most MAX_PATTERN_GROUPS such programs are made.
MIN_PATTERN_ROWS = 1
MAX_PATTERN_GROUPS = 1 << 16
# Barren hidden leaves summed out of their components (False: kept, the full elimination).
SUM_BARREN_LEAVES = True
# Target number of float64 entries in the largest intermediate of one posterior chunk (~4 MB).
CHUNK_BUDGET = 1 << 19


@dataclass(frozen=True)
class _Statics:
    cards: tuple[int, ...]
    parents: tuple[tuple[int, ...], ...]
    children: tuple[tuple[int, ...], ...]


_STATICS: dict[int, tuple[Network, _Statics]] = {}


def _st(network: Network) -> _Statics:
    """Cards, parents and children of a network (the Network properties rebuild them per call).

    Keyed by identity: hashing a Network hashes every node, which is slow for large networks."""
    hit = _STATICS.get(id(network))
    if hit is None or hit[0] is not network:
        hit = _STATICS[id(network)] = (network, _Statics(network.cards, network.parent_indices, network.children))
    return hit[1]


# --------------------------------------------------------------------------- elimination plans
@dataclass(frozen=True)
class FactorSpec:
    """A CPT factor of one node restricted to a group.

    ``scope`` are the non-observed family members (in the order of the axes of the factor),
    ``obs`` the observed family members used to index the CPT, ``perm`` the transpose that moves
    the CPT axes into ``scope + obs`` order.
    """

    node: int
    scope: tuple[int, ...]
    obs: tuple[int, ...]
    perm: tuple[int, ...]
    obs_strides: tuple[int, ...]


@dataclass(frozen=True)
class Step:
    """Eliminate ``var``: multiply the factors ``inputs`` (ids), sum over ``var``."""

    var: int
    inputs: tuple[int, ...]
    out_scope: tuple[int, ...]
    out_id: int


@dataclass(frozen=True)
class GroupPlan:
    """An elimination plan for a set of rows (hashable: a static jit argument)."""

    log_terms: tuple[tuple[int, tuple[int, ...]], ...]  # (node, family in CPT axis order)
    factors: tuple[FactorSpec, ...]                     # ids 0..len-1
    indicators: tuple[int, ...]                         # partial nodes; ids follow the factors
    steps: tuple[Step, ...]
    final: tuple[int, ...]                              # ids of scalar-per-row factors left at the end
    scopes: tuple[tuple[int, ...], ...]                 # scope of every factor id (inputs and messages)
    chunk: int
    cost: float                                         # table entries touched per row (estimate)
    kind: str                                           # "pattern" or "mixed"
    n_hidden: int
    n_partial: int
    n_pruned: int


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
    order: list[int] = []
    remaining = set(variables)
    while remaining:
        best, best_key = None, None
        for v in sorted(remaining):
            ns = nb[v]
            fill = 0
            nl = list(ns)
            for i in range(len(nl)):
                for j in range(i + 1, len(nl)):
                    if nl[j] not in nb[nl[i]]:
                        fill += 1
            weight = cards[v] * math.prod(cards[u] for u in ns)
            key = (fill, weight)
            if best_key is None or key < best_key:
                best, best_key = v, key
        v = best
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
        remaining.remove(v)
        order.append(v)
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
    cards = _st(network).cards
    pa = _st(network).parents
    kids = _st(network).children
    always = hidden_mask.all(axis=0)
    some = hidden_mask.any(axis=0)
    forced = set(indicator_nodes)
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
    n_pruned = n - sum(keep)

    log_terms: list[tuple[int, tuple[int, ...]]] = []
    factors: list[FactorSpec] = []
    for i in range(n):
        if not keep[i]:
            continue
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
    order = _min_fill_order(variables, scopes, cards, network.names)
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
                     chunk, cost + len(log_terms), kind, len(hidden_set), len(partial_set), n_pruned)


# --------------------------------------------------------------------------- flat log-CPTs
def _layout(network: Network) -> tuple[tuple[int, ...], tuple[dict[int, int], ...], int]:
    """Offsets of each CPT in the concatenated flat vector and each family member's stride."""
    offsets, strides = [], []
    off = 0
    for i, node in enumerate(network.nodes):
        fam = tuple(_st(network).parents[i]) + (i,)
        st, s = {}, 1
        for u in reversed(fam):
            st[u] = s
            s *= _st(network).cards[u]
        offsets.append(off)
        strides.append(st)
        off += s
    return tuple(offsets), tuple(strides), off


def _flat(logcpts: Sequence[jax.Array]) -> jax.Array:
    """All log-CPTs in one vector, followed by log 1 (slot ZERO) and log 0 (slot NEG)."""
    return jnp.concatenate([jnp.ravel(x) for x in logcpts] + [jnp.array([0.0, -jnp.inf], jnp.float64)])


def _unflat(network: Network, g) -> tuple:
    """CPT-shaped pieces of a flat vector in the layout of :func:`layout_of` (views of a numpy
    array, slices of a traced one); trailing entries beyond the CPTs are ignored."""
    out, off = [], 0
    for name in network.names:
        shape = network.cpt_shape(name)
        size = math.prod(shape)
        out.append(g[off:off + size].reshape(shape))
        off += size
    return tuple(out)


def _logsumexp_last(t: jax.Array, axis: int) -> jax.Array:
    """log sum exp along ``axis``; -inf (not NaN, with a finite gradient) where every term is -inf."""
    m = jax.lax.stop_gradient(jnp.max(t, axis=axis))
    m = jnp.where(jnp.isfinite(m), m, 0.0)
    s = jnp.sum(jnp.exp(t - jnp.expand_dims(m, axis)), axis=axis)
    ok = s > 0
    return jnp.where(ok, jnp.log(jnp.where(ok, s, 1.0)) + m, -jnp.inf)


# --------------------------------------------------------------------------- blocks
@dataclass(frozen=True)
class GatheredBlock:
    """Families with every member observed: data counts times log theta (no per-row work)."""

    n_rows: int          # rows of the per-pattern route (whose observed families are counted here)
    n_families: int      # (row, family) pairs with every member observed, over the distinct rows
    n_pruned: int        # nodes barren (hidden, no observed descendant) in at least one row
    n_components: int    # hidden components of those rows (handled by the other blocks)
    kind: str = "pattern"
    chunk: int = 1 << 30
    steps: tuple = ()
    cost: float = 0.0
    n_hidden: int = 0
    n_partial: int = 0
    widen: tuple = ()    # barren leaves summed out: :func:`_widen_segments` (the plan's flat layout)
    n_summed: int = 0    # (row, leaf) cells summed out that way


@dataclass(frozen=True)
class EnumBlock:
    """Small components enumerated: ``A`` assignments x ``m`` gathered log-CPT entries each."""

    A: int
    m: int
    chunk: int
    n_instances: int     # distinct components (after merging equal ones)
    n_components: int    # component occurrences in the rows
    n_types: int         # distinct (hidden nodes, families) types
    kind: str = "pattern"
    steps: tuple = ()
    n_pruned: int = 0
    n_hidden: int = 0
    n_partial: int = 0

    @property
    def cost(self) -> float:
        return float(self.A * self.m)


@dataclass(frozen=True)
class TapeBlock:
    """Elimination programs of one shape class, run by one compiled loop.

    Buffer rows: ``n_leaf`` log-CPT entries, ``n_ind`` evidence indicators, log 1, log 0, then
    ``n_batch x width`` computed entries; each computed entry is the log-sum-exp over ``slots``
    terms of sums of ``ops`` buffer entries.
    """

    kind: str            # "pattern" (components, own programs) or "mixed" (uniform evidence, whole rows)
    n_programs: int
    n_leaf: int
    n_fac: int
    n_ind: int
    n_icodes: int
    n_batch: int
    width: int
    slots: int
    ops: int
    n_final: int
    chunk: int           # rows per chunk
    n_rows: int          # distinct rows (or component instances) handled
    cost: float          # gathered operands per row (padded)
    n_hidden: int = 0
    n_partial: int = 0
    n_pruned: int = 0
    steps: tuple = ()

    @property
    def start(self) -> int:
        return self.n_leaf + self.n_ind + 2


Block = Any  # GatheredBlock | EnumBlock | TapeBlock


@dataclass(frozen=True)
class Plan:
    """The blocks of work for one network and data set, with their data arrays.

    ``groups`` are the static block descriptions (a static jit argument), ``codes`` and
    ``weights`` the matching arrays (pytrees). ``maps`` say, per block, which distinct row each
    computed instance belongs to (for per-row log-likelihoods).
    """

    network: Network
    groups: tuple[Block, ...]
    codes: tuple[Any, ...]
    weights: tuple[Any, ...]
    n_distinct: int
    maps: tuple[Any, ...] = ()
    observed_rows: Any = None       # bool mask of rows whose observed families are in the gathered block
    estimate: Mapping[str, float] | None = None
    rows: tuple[np.ndarray, ...] = ()
    n_shards: int = 1               # the chunks of every block split into this many equal parts

    def describe(self) -> str:
        parts = []
        for g in self.groups:
            if isinstance(g, GatheredBlock):
                parts.append(f"observed families gathered: {g.n_rows} rows, {g.n_families} row-families, "
                             f"{g.n_components} hidden components, {g.n_pruned} nodes barren in some rows"
                             + (f", {g.n_summed} barren leaf cells summed out" if g.n_summed else ""))
            elif isinstance(g, EnumBlock):
                parts.append(f"enumerated components {g.A}x{g.m}: {g.n_components} components -> "
                             f"{g.n_instances} distinct, {g.n_types} types")
            elif isinstance(g, GroupPlan):
                parts.append(f"{g.kind}: {g.n_hidden} hidden + {g.n_partial} partial nodes, ~{g.cost:.0f} entries/row")
            else:
                what = "component programs" if g.kind == "pattern" else "uniform evidence program"
                parts.append(f"{what}: {g.n_programs} program(s), {g.n_rows} rows, {g.n_batch} batches x "
                             f"{g.width} entries x {g.slots}x{g.ops} operands (~{g.cost:.0f} per row)")
        if self.estimate:
            e = self.estimate
            parts.append(f"estimated {e['evaluation_s'] * 1e3:.1f} ms per evaluation + {e['compile_s']:.1f} s compile")
        return "; ".join(parts)

    @property
    def route(self) -> str:
        kinds = {g.kind for g in self.groups}
        if "mixed" not in kinds:
            return "per-pattern"
        if kinds == {"mixed"}:
            return "uniform evidence"
        return "hybrid (per-pattern + uniform evidence)"


# --------------------------------------------------------------------------- barren leaves
# A hidden leaf (a node without children) is barren: it sums out to 1. When none of its hidden
# parents is barren too, it is taken out of its component: its cell is coded SUMMED (an extra
# column of its CPT, the log of the row sum, log 1 for a CPT) and its family becomes a factor
# over the parents alone. The gradient reaching that column is the parents' posterior P(u | row)
# (times the weight), and the leaf's expected counts are theta(x | u) times it, which the chain
# rule through the log row sum gives (:func:`_widen_flat`); so do the second derivatives.
_CODE_CARDS: dict[int, tuple[Network, tuple[int, ...]]] = {}


def _summed_leaves(network: Network, codes: np.ndarray) -> tuple[np.ndarray, tuple[int, ...]]:
    """Codes with every removable barren leaf's cell set to its number of states (the extra
    column of its widened CPT), and the nodes widened (those removed in some row).

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
    out = None
    widened = []
    step = max(1024, PLAN_BLOCK // max(1, n))
    for s0 in range(0, R, step):
        blk = codes[s0:s0 + step]
        hid = blk < 0
        # observed or with an observed descendant, per node hidden somewhere (children first)
        od: dict[int, np.ndarray] = {}
        for u in reversed(range(n)):
            if not some[u]:
                continue
            hit = ~hid[:, u]
            for c in kids[u]:
                if some[c]:
                    hit = hit | od[c]
                else:
                    hit = np.ones(len(blk), bool)
                    break
            od[u] = hit
        for v in leaves:
            rm = hid[:, v].copy()
            for u in pa[v]:
                if some[u]:
                    rm &= od[u]
            if rm.any():
                if out is None:
                    out = codes.copy()
                out[s0:s0 + step][rm, v] = cards[v]
                widened.append(v)
    if out is None:
        return codes, ()
    return out, tuple(sorted(set(widened)))


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
    key = np.zeros(len(sub), np.int64)
    space = math.prod(int(c) for c in cards)
    if space < (1 << 62):
        for j in range(sub.shape[1]):
            key = key * int(cards[j]) + sub[:, j]
        if space <= max(1 << 16, 4 * len(key)):  # dense key space: no sort needed
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
    first, inv = _distinct_rows(sub, [_code_cards(network)[u] for u in bd])
    w = np.bincount(inv, weights=counts[rows], minlength=len(first))
    return sub[first], w, inv


def _n_instances(network: Network, typ: _Type, codes: np.ndarray, counts: np.ndarray) -> int:
    return len(_type_instances(network, typ, codes, counts, typ.rows)[1])


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
                obs[:, j] += strides[v][u] * bcodes[:, bpos[u]]
    return obs[:, None, :] + asg[None, :, :]


def _enum_bucket_menu(classes: dict[tuple[int, int], int]) -> dict[tuple[int, int], tuple[int, int]]:
    """Merge (A, m) shape classes into buckets when the padding costs less than a compile."""
    buckets = {k: [k] for k in classes}
    size = dict(classes)

    def merged_cost(a, b):
        A = max(a[0], b[0])
        m = max(a[1], b[1])
        extra = size[a] * (A * m - a[0] * a[1]) + size[b] * (A * m - b[0] * b[1])
        return extra * T_ENUM * PLAN_EVALUATIONS - COMPILE_ENUM, (A, m)

    while len(buckets) > 1:
        keys = list(buckets)
        best = None
        for i in range(len(keys)):
            for j in range(i + 1, len(keys)):
                c, shape = merged_cost(keys[i], keys[j])
                if best is None or c < best[0]:
                    best = (c, keys[i], keys[j], shape)
        if best[0] >= 0:
            break
        _, a, b, shape = best
        members = buckets.pop(a) + buckets.pop(b)
        n = size.pop(a) + size.pop(b)
        if shape in buckets:
            members += buckets.pop(shape)
            n += size.pop(shape)
        buckets[shape] = members
        size[shape] = n
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
    order = np.argsort(pos)
    a = np.transpose(ids, order) if len(scope) > 1 else ids
    shape = [1] * len(union)
    for u in scope:
        shape[union.index(u)] = cards[u]
    return np.broadcast_to(a.reshape(shape), tuple(cards[u] for u in union))


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
            out[:, fid] += strides[f.node][u] * codes[:, u]
    for j, (node, fam) in enumerate(gp.log_terms):
        for u in fam:
            out[:, len(gp.factors) + j] += strides[node][u] * codes[:, u]
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


_LAYOUTS: dict[int, tuple[Network, Any]] = {}


def layout_of(network: Network):
    hit = _LAYOUTS.get(id(network))
    if hit is None or hit[0] is not network:
        hit = _LAYOUTS[id(network)] = (network, _layout(network))
    return hit[1]


def layout_size(network: Network) -> int:
    return layout_of(network)[2]


# --------------------------------------------------------------------------- choosing the route
def build_plan(network: Network, data: CodedData, *, route: str = "auto",
               min_pattern_rows: int | None = None, max_pattern_groups: int | None = None,
               chunk: int | None = None, for_posteriors: bool = False) -> Plan:
    """Take the rows apart (barren nodes, observed families, hidden components) and plan the work.

    Args:
        route: ``"auto"`` (each row and component by the cheapest estimated method, compile time
            included), ``"pattern"`` (per missingness pattern: observed families gathered, every
            hidden component computed on its own, never the uniform program) or ``"uniform"``
            (every row in one elimination program with evidence indicators).
        min_pattern_rows, max_pattern_groups: under ``"auto"``, at most ``max_pattern_groups``
            component types get an elimination program of their own (the most frequent first),
            each with at least ``min_pattern_rows`` distinct instances; the others are
            enumerated or their rows go to the uniform program, by the cost model.
        chunk: rows (instances) per chunk of every block (default: from the block's size).
        for_posteriors: one uniform plan with an indicator for every node and no pruning (used
            by :func:`posterior_marginals`).
    """
    if route not in ("auto", "uniform", "pattern"):
        raise OptionError(f"route must be 'auto', 'uniform' or 'pattern', got {route!r}")
    min_pattern_rows = MIN_PATTERN_ROWS if min_pattern_rows is None else int(min_pattern_rows)
    max_pattern_groups = MAX_PATTERN_GROUPS if max_pattern_groups is None else int(max_pattern_groups)
    codes = np.ascontiguousarray(data.codes, dtype=np.int32)
    counts = np.asarray(data.counts, dtype=np.float64)
    n = len(network)
    R = len(codes)
    if for_posteriors:
        return _posterior_plan(network, codes, counts, chunk)
    if route == "uniform" or R == 0:
        return _shard(_assemble(network, codes, counts, uniform=np.ones(R, bool), enum_types=[], prog_types=[],
                                pruned=np.zeros(n, bool), chunk=chunk))
    # barren leaves summed out (their cells coded SUMMED, their CPTs widened in the plan's layout)
    acodes, widened = _summed_leaves(network, codes) if SUM_BARREN_LEAVES else (codes, ())
    pnet = _widened_network(network, widened) if widened else network
    tlist, pruned, hidden_rows = _components(pnet, acodes)
    enum_types, prog_types, to_uniform = _choose_methods(pnet, acodes, counts, tlist, route,
                                                         min_pattern_rows, max_pattern_groups, hidden_rows)
    uniform = np.zeros(R, bool)
    for t in to_uniform:
        uniform[t.rows] = True
    plan = _assemble(pnet, acodes, counts, uniform=uniform, enum_types=enum_types, prog_types=prog_types,
                     pruned=pruned, chunk=chunk, uniform_codes=codes,
                     widen=_widen_segments(network, widened) if widened else ())
    if route == "auto" and plan.estimate is not None:
        # the whole data set as one uniform program, when that is cheaper (small data: compile)
        if widened:  # the uniform program sums every hidden cell: the summary of the original codes
            hidden_rows = np.stack([codes.max(axis=0) < 0, codes.min(axis=0) < 0])
        uni_gp = _group_plan(network, hidden_rows, kind="mixed", n_rows=R, keep_all=True)
        alt = COMPILE_TAPE + R * TAPE_PAD * uni_gp.cost * T_TAPE * PLAN_EVALUATIONS
        mine = plan.estimate["compile_s"] + plan.estimate["evaluation_s"] * PLAN_EVALUATIONS
        if alt < mine and route != "pattern":
            plan = _assemble(network, codes, counts, uniform=np.ones(R, bool), enum_types=[], prog_types=[],
                             pruned=np.zeros(n, bool), chunk=chunk)
    return _shard(plan)


def n_threads() -> int:
    """CPU cores the evaluation may use (``$ADFIT_THREADS`` overrides; at most 8)."""
    env = os.environ.get("ADFIT_THREADS")
    if env:
        try:
            return max(1, int(env))
        except ValueError:
            raise OptionError(f"ADFIT_THREADS must be a whole number of threads, got {env!r}") from None
    try:
        cores = len(os.sched_getaffinity(0))
    except (AttributeError, OSError):  # pragma: no cover - not Linux
        cores = os.cpu_count() or 1
    return max(1, min(8, cores))


def _shard(plan: Plan) -> Plan:
    """Split every block's chunks into equal parts, one per core, when an evaluation is long
    enough to pay for the threads: the parts have the same shapes, so one compiled program runs
    them all, side by side (XLA runs these loops on one core)."""
    S = n_threads()
    if S == 1 or plan.estimate is None or plan.estimate["evaluation_s"] < SHARD_MIN_S:
        return plan
    n_flat = layout_size(plan.network)
    groups, codes, weights = [], [], []
    for blk, arr, w in zip(plan.groups, plan.codes, plan.weights):
        if isinstance(blk, GatheredBlock):
            groups.append(blk)
            codes.append(arr)
            weights.append(w)
            continue
        nch, c = w.shape
        n = nch * c
        if nch < S:
            c = max(8, -(-n // S))
            c = -(-c // 8) * 8
        nch2 = S * -(-n // (S * c))
        pad = nch2 * c - n
        wf = np.concatenate([w.reshape(-1), np.zeros(pad)])
        if isinstance(blk, EnumBlock):
            fill = np.full((pad, blk.A, blk.m), n_flat, np.int32)
            fill[:, 1:, 0] = n_flat + 1
            new = np.concatenate([arr.reshape(n, blk.A, blk.m), fill]).reshape(nch2, c, blk.A, blk.m)
        else:
            tables, (pid, base, icodes) = arr
            pid2 = np.concatenate([pid.reshape(-1), np.zeros(pad, pid.dtype)]).reshape(nch2, c)
            base2 = np.concatenate([base.reshape(n, -1), np.zeros((pad, base.shape[-1]), base.dtype)]).reshape(nch2, c, -1)
            ic2 = np.concatenate([icodes.reshape(n, -1), np.full((pad, icodes.shape[-1]), -1, icodes.dtype)]).reshape(nch2, c, -1)
            new = (tables, (pid2, base2, ic2))
        groups.append(dataclasses.replace(blk, chunk=c))
        codes.append(new)
        weights.append(wf.reshape(nch2, c))
    return dataclasses.replace(plan, groups=tuple(groups), codes=tuple(codes), weights=tuple(weights), n_shards=S)


@jax.tree_util.register_pytree_node_class
class Shards:
    """The data arrays of a plan cut into equal parts along the chunk axis (a pytree).

    ``parts[s]`` is a tuple over the plan's blocks, laid out as the plan's own arrays; all parts
    have the same shapes. The core functions accept either a Shards or one part."""

    def __init__(self, parts):
        self.parts = tuple(parts)

    def tree_flatten(self):
        return self.parts, None

    @classmethod
    def tree_unflatten(cls, aux, children):
        return cls(children)


def _split(plan: Plan, arrays: tuple, *, weights: bool) -> Shards:
    S = plan.n_shards
    conv: dict[int, Any] = {}

    def dev(x):  # one device array per numpy array (tables are shared by the parts)
        key = id(x)
        if key not in conv:
            conv[key] = (x, jnp.asarray(x))
        return conv[key][1]

    parts = [[] for _ in range(S)]
    for blk, a in zip(plan.groups, arrays):
        for s in range(S):
            if isinstance(blk, GatheredBlock):
                parts[s].append(dev(a) if s == 0 or not weights else jnp.zeros_like(dev(a)))
                continue
            k = (a.shape[0] if weights or isinstance(blk, EnumBlock) else a[1][0].shape[0]) // S
            sl = slice(s * k, (s + 1) * k)
            if weights or isinstance(blk, EnumBlock):
                parts[s].append(jnp.asarray(a[sl]))
            else:
                tables, (pid, base, icodes) = a
                parts[s].append((tuple(dev(t) for t in tables), (jnp.asarray(pid[sl]), jnp.asarray(base[sl]),
                                                                  jnp.asarray(icodes[sl]))))
    return Shards(tuple(tuple(p) for p in parts))


def _choose_methods(network: Network, codes: np.ndarray, counts: np.ndarray, tlist: Sequence[_Type], route: str,
                    min_pattern_rows: int, max_pattern_groups: int, hidden_rows: np.ndarray | None = None):
    """Per component type: enumerate it, give it an elimination program of its own, or send its
    rows to the uniform program, whichever is cheapest in total (compile time included).
    ``hidden_rows``: ``codes < 0``, or its two-row summary from :func:`_components`."""
    n = len(network)
    E = PLAN_EVALUATIONS
    always, rest = [], []
    for t in tlist:
        e = t.A * t.m
        if e <= ENUM_ALWAYS:
            always.append(t)
            continue
        t.n_inst = _n_instances(network, t, codes, counts)
        # enumeration cheaper than planning an elimination program at all: no plan needed
        if route != "pattern" and e <= ENUM_MAX and t.n_inst * e * T_ENUM * E <= T_PLAN_TYPE:
            always.append(t)
            continue
        mask = np.zeros((1, n), bool)
        mask[0, list(t.hidden)] = True
        t.gp = _group_plan(network, mask, kind="pattern", n_rows=len(t.rows), families=t.families)
        rest.append(t)
    if not rest:
        return list(tlist), [], []
    uni_gp = _group_plan(network, codes < 0 if hidden_rows is None else hidden_rows, kind="mixed",
                         n_rows=len(codes), keep_all=True)
    per_row_uniform = TAPE_PAD * uni_gp.cost * T_TAPE
    costs = []
    for t in rest:
        enum = t.n_inst * t.A * t.m * T_ENUM if t.A * t.m <= ENUM_MAX else math.inf
        own = t.n_inst * TAPE_PAD * t.gp.cost * T_TAPE + T_PLAN_TYPE / E
        uni = len(t.rows) * per_row_uniform
        costs.append((enum, own, uni))
    best = None
    options = [("enum", "own", "uni"), ("enum", "own"), ("enum", "uni"), ("enum",)]
    if route == "pattern":
        options = [("enum", "own"), ("enum",)]
    for allowed in options:
        choice, total = [], 0.0
        for (enum, own, uni) in costs:
            c = {"enum": enum, "own": own, "uni": uni}
            k = min(allowed, key=lambda a: c[a])
            choice.append(k)
            total += c[k] * E
        if not math.isfinite(total):
            continue
        # programs of their own: at most max_pattern_groups (the most used) under "auto"
        if route == "auto" and "own" in choice:
            own_idx = sorted((i for i, k in enumerate(choice) if k == "own"), key=lambda i: -rest[i].n_inst)
            for j, i in enumerate(own_idx):
                if j >= max_pattern_groups or rest[i].n_inst < min_pattern_rows:
                    alt = min((a for a in allowed if a != "own"), key=lambda a: costs[i][("enum", "own", "uni").index(a)])
                    total += (costs[i][("enum", "own", "uni").index(alt)] - costs[i][1]) * E
                    choice[i] = alt
        total += COMPILE_TAPE * (("own" in choice) + ("uni" in choice))
        if best is None or total < best[0]:
            best = (total, choice)
    choice = best[1]
    # An enumeration bucket costs a compile of its own: move the types of a bucket to their
    # elimination programs when that is cheaper than compiling the bucket.
    if route != "uniform":
        tape_compiled = "own" in choice
        sizes: dict[tuple[int, int], int] = {}
        for t in always:
            k = _round_shape(t.A, t.m)
            sizes[k] = sizes.get(k, 0) + _n_instances(network, t, codes, counts)
        members: dict[tuple[int, int], list[int]] = {}
        for i, (t, k) in enumerate(zip(rest, choice)):
            if k == "enum":
                key = _round_shape(t.A, t.m)
                sizes[key] = sizes.get(key, 0) + t.n_inst
                members.setdefault(key, []).append(i)
        menu = _enum_bucket_menu(sizes)
        buckets: dict[tuple[int, int], list[tuple[int, int]]] = {}
        for key in sizes:
            buckets.setdefault(menu[key], []).append(key)
        for (A, m), keys in sorted(buckets.items(), key=lambda kv: -kv[0][0] * kv[0][1]):
            movable = [i for key in keys for i in members.get(key, [])]
            if len(movable) == 0 or len(movable) < sum(1 for key in keys for _ in members.get(key, [])):
                continue
            if any(sizes[key] > sum(rest[i].n_inst for i in members.get(key, [])) for key in keys):
                continue  # the bucket also holds small components: it is compiled anyway
            n = sum(rest[i].n_inst for i in movable)
            keep = n * A * m * T_ENUM * E + COMPILE_ENUM
            move = sum(costs[i][1] for i in movable) * E + (0.0 if tape_compiled else COMPILE_TAPE)
            if move < keep:
                for i in movable:
                    choice[i] = "own"
                tape_compiled = True
    enum_types = always + [t for t, k in zip(rest, choice) if k == "enum"]
    prog_types = [t for t, k in zip(rest, choice) if k == "own"]
    to_uniform = [t for t, k in zip(rest, choice) if k == "uni"]
    return enum_types, prog_types, to_uniform


def _pow2_clip(x: float, lo: int, hi: int) -> int:
    return 1 << max(int(math.log2(lo)), min(int(math.log2(hi)), int(math.log2(max(1.0, x)))))


def _assemble(network: Network, codes: np.ndarray, counts: np.ndarray, *, uniform: np.ndarray,
              enum_types: Sequence[_Type], prog_types: Sequence[_Type], pruned: np.ndarray,
              chunk: int | None, uniform_codes: np.ndarray | None = None, widen: tuple = ()) -> Plan:
    """The plan's blocks. ``codes`` may hold SUMMED leaf cells (``widen``, the layout of
    ``network`` widened for them); the rows of the uniform program take ``uniform_codes`` (the
    original codes: that program sums every hidden cell itself)."""
    n = len(network)
    R = len(codes)
    pa = _st(network).parents
    layout = layout_of(network)
    offsets, strides, n_flat = layout
    local = ~uniform
    blocks, arrays, weights, maps = [], [], [], []
    eval_s = compile_s = 0.0
    n_local = int(local.sum())
    if n_local or widen:  # (a widened plan keeps its first block: it carries the widening)
        N = np.zeros(n_flat + 2)
        n_fam = 0
        unit = bool(np.all(counts == 1.0))
        step = max(1024, PLAN_BLOCK // max(1, n))
        for s0 in range(0, R, step):
            cbT = np.ascontiguousarray(codes[s0:s0 + step].T)     # (n, rows): whole columns
            lb = local[s0:s0 + step]
            not_local = None if lb.all() else ~lb
            h_any = cbT.min(axis=1) < 0 if cbT.shape[1] else np.zeros(n, bool)
            hid: dict[int, np.ndarray] = {}                         # cbT[u] < 0, for nodes hidden here
            idx = np.empty((n, cbT.shape[1]), np.int64)
            for v in range(n):
                fam = (*pa[v], v)
                iv = idx[v]
                np.add(cbT[v], offsets[v], out=iv, dtype=np.int64)  # the node's own stride is 1
                for u in fam[:-1]:
                    iv += strides[v][u] * cbT[u]
                bad = not_local
                for u in fam:
                    if h_any[u]:
                        hu = hid.get(u)
                        if hu is None:
                            hu = hid[u] = cbT[u] < 0
                        bad = hu if bad is None else (bad | hu)
                if bad is not None:
                    iv[bad] = n_flat + 2                            # a bin of its own, dropped
            cb_w = counts[s0:s0 + step]
            if unit:
                bc = np.bincount(idx.ravel(), minlength=n_flat + 3)
                N += bc[:n_flat + 2]
                n_fam += int(bc[:n_flat + 1].sum())                # the entries <= n_flat: every member observed
            else:
                N += np.bincount(idx.ravel(), weights=np.tile(cb_w, n), minlength=n_flat + 3)[:n_flat + 2]
                n_fam += int(np.count_nonzero(idx <= n_flat))
        n_comp = sum(int(local[t.rows].sum()) for t in (*enum_types, *prog_types))
        n_summed = 0
        if widen:
            for v, (_, _, card) in enumerate(widen):
                if card:
                    n_summed += int(np.count_nonzero(local & (codes[:, v] == card)))
        blocks.append(GatheredBlock(n_local, n_fam, int(pruned.sum()), n_comp, widen=widen, n_summed=n_summed))
        arrays.append(np.zeros(0, np.int32))
        weights.append(N)
        maps.append(None)
    # enumerated components, in buckets of a common padded shape
    classes: dict[tuple[int, int], list] = {}
    for t in enum_types:
        sel = local[t.rows]
        rows = t.rows if sel.all() else t.rows[sel]
        if not len(rows):
            continue
        bc, w, inv = _type_instances(network, t, codes, counts, rows)
        classes.setdefault(_round_shape(t.A, t.m), []).append((t, bc, w, inv, rows))
    menu = _enum_bucket_menu({k: sum(len(x[2]) for x in v) for k, v in classes.items()})
    buckets: dict[tuple[int, int], list] = {}
    for k, v in classes.items():
        buckets.setdefault(menu[k], []).extend(v)
    for (A, m), members in sorted(buckets.items()):
        n_inst = sum(len(x[2]) for x in members)
        c = chunk or _pow2_clip(ENUM_BUDGET / (A * m), 64, 16384)
        c = min(c, max(8, 1 << math.ceil(math.log2(max(1, n_inst)))))
        nch = -(-n_inst // c)
        idx = np.full((nch * c, A, m), n_flat, np.int32)     # log 1 ...
        idx[:, 1:, 0] = n_flat + 1                            # ... and log 0: padding is 0 = log 1
        wts = np.zeros(nch * c)
        rows_l, inst_l = [], []
        off = 0
        for t, bc, w, inv, rows in members:
            k = len(w)
            idx[off:off + k, :t.A, :t.m] = _enum_tables(network, t, bc, layout)
            wts[off:off + k] = w
            rows_l.append(rows)
            inst_l.append(off + inv)
            off += k
        blocks.append(EnumBlock(A, m, c, n_inst, sum(len(x[4]) for x in members), len(members)))
        arrays.append(idx.reshape(nch, c, A, m))
        weights.append(wts.reshape(nch, c))
        maps.append((np.concatenate(rows_l), np.concatenate(inst_l)))
        eval_s += nch * c * A * m * T_ENUM + nch * T_LOOP
        compile_s += COMPILE_ENUM
    # large components with programs of their own
    if prog_types:
        progs, datas, occ = [], [], []
        for t in prog_types:
            sel = local[t.rows]
            rows = t.rows if sel.all() else t.rows[sel]
            if not len(rows):
                continue
            bc, w, inv = _type_instances(network, t, codes, counts, rows)
            full = np.zeros((len(w), n), np.int32)
            full[:, list(t.hidden)] = HIDDEN
            if t.boundary:
                full[:, list(t.boundary)] = bc
            progs.append(_compile_program(network, t.gp, layout, TAPE_SLOTS, TAPE_FACTORS))
            datas.append((full, w))
            occ.append((rows, inv))
        if progs:
            width = _choose_width(progs, [len(d[1]) for d in datas])
            sizes = []
            for pr in progs:
                _pack(pr, width)
                sizes.append(len(pr.leaf_off) + len(pr.ind_code) + pr.n_batch * width * TAPE_SLOTS * TAPE_FACTORS)
            for cls in _split_classes(sizes, [len(d[1]) for d in datas]):
                cp, cd, co = [progs[i] for i in cls], [datas[i] for i in cls], [occ[i] for i in cls]
                blk, arr, wts, starts = _tape_block(network, "pattern", cp, cd, width, chunk, TAPE_SLOTS, TAPE_FACTORS)
                blocks.append(blk)
                arrays.append(arr)
                weights.append(wts)
                maps.append((np.concatenate([r for r, _ in co]), np.concatenate([s0 + i for (_, i), s0 in zip(co, starts)])))
                eval_s += _tape_seconds(blk, wts)
                compile_s += COMPILE_TAPE
    # whole rows with uniform evidence
    urows = np.flatnonzero(uniform)
    if len(urows):
        ucodes = (codes if uniform_codes is None else uniform_codes)[urows]
        gp = _group_plan(network, ucodes < 0, kind="mixed", n_rows=len(urows), keep_all=True)
        prog = _compile_program(network, gp, layout, TAPE_SLOTS, TAPE_FACTORS)
        width = _choose_width([prog], [len(urows)])
        blk, arr, wts, starts = _tape_block(network, "mixed", [prog], [(ucodes, counts[urows])], width,
                                            chunk, TAPE_SLOTS, TAPE_FACTORS)
        blocks.append(blk)
        arrays.append(arr)
        weights.append(wts)
        maps.append((urows, np.arange(len(urows))))
        eval_s += _tape_seconds(blk, wts)
        compile_s += COMPILE_TAPE
    return Plan(network, tuple(blocks), tuple(arrays), tuple(weights), R, tuple(maps), local,
                {"evaluation_s": eval_s, "compile_s": compile_s})


def _tape_seconds(blk: TapeBlock, wts: np.ndarray) -> float:
    n_chunks = wts.shape[0]
    per_row = blk.n_leaf + blk.n_batch * blk.width * blk.slots * blk.ops
    return n_chunks * (blk.chunk * per_row * T_TAPE + blk.n_batch * T_LOOP)


def _posterior_plan(network: Network, codes: np.ndarray, counts: np.ndarray, chunk: int | None) -> Plan:
    n = len(network)
    gp = _group_plan(network, codes < 0, kind="mixed", n_rows=len(codes), keep_all=True, indicator_nodes=range(n))
    if chunk is not None:
        gp = dataclasses.replace(gp, chunk=int(chunk))
    c = gp.chunk
    rows = np.arange(len(codes))
    n_chunks = max(1, -(-len(rows) // c))
    pad = n_chunks * c - len(rows)
    idx = np.concatenate([rows, np.full(pad, rows[0] if len(rows) else 0, dtype=rows.dtype)])
    w = np.concatenate([counts, np.zeros(pad)])
    return Plan(network, (gp,), (codes[idx].reshape(n_chunks, c, n),), (w.reshape(n_chunks, c),), len(codes),
                rows=(rows,))


# --------------------------------------------------------------------------- the computation
def _safe_weighted(ll: jax.Array, w: jax.Array) -> jax.Array:
    return jnp.sum(jnp.where(w > 0, w * ll, 0.0))


def _enum_rows(flat: jax.Array, idx: jax.Array) -> jax.Array:
    """log sum over assignments of the product of gathered entries: (instances,)."""
    return _logsumexp_last(jnp.sum(flat[idx], axis=-1), axis=-1)


def _tape_rows(blk: TapeBlock, flat: jax.Array, progs, pid, base, icodes) -> jax.Array:
    """Run the elimination programs of one chunk of instances; returns their log-likelihoods.

    ``pid`` (rows,) program of each instance, ``base`` (rows, n_fac + 1) its observed part of each
    log-CPT index, ``icodes`` (rows, n_icodes + 1) its codes of the indicator nodes.
    """
    leaf_off, leaf_fac, ind_code, ind_state, items, finals = progs
    rows = base.shape[0]
    shared = blk.n_programs == 1
    pick = (lambda t: t[0][None]) if shared else (lambda t: jnp.take(t, pid, axis=0))
    leaves = flat[pick(leaf_off) + jnp.take_along_axis(base, jnp.broadcast_to(pick(leaf_fac), (rows, blk.n_leaf)), axis=1)]
    ic = jnp.take_along_axis(icodes, jnp.broadcast_to(pick(ind_code), (rows, blk.n_ind)), axis=1)
    ind = jnp.where((ic == pick(ind_state)) | (ic < 0), 0.0, -jnp.inf)
    buf = jnp.concatenate([leaves, ind, jnp.zeros((rows, 1)), jnp.full((rows, 1), -jnp.inf),
                           jnp.zeros((rows, blk.n_batch * blk.width))], axis=1)
    k = blk.width * blk.slots * blk.ops

    def body(buf, xs):
        ib, b = xs                                   # ib: (programs, width, slots, ops)
        if shared:
            g = jnp.take(buf, ib[0].reshape(-1), axis=1)
        else:
            g = jnp.take_along_axis(buf, jnp.take(ib.reshape(-1, k), pid, axis=0), axis=1)
        g = g.reshape(rows, blk.width, blk.slots, blk.ops)
        out = _logsumexp_last(jnp.sum(g, axis=3), axis=2)    # (rows, width)
        return jax.lax.dynamic_update_slice(buf, out, (0, blk.start + b * blk.width)), None

    buf, _ = jax.lax.scan(body, buf, (items, jnp.arange(blk.n_batch)))
    fin = jnp.broadcast_to(pick(finals), (rows, blk.n_final))
    return jnp.sum(jnp.take_along_axis(buf, fin, axis=1), axis=1)


def _enum_value_and_grad(flat: jax.Array, xs) -> tuple[jax.Array, jax.Array]:
    """Value and gradient (w.r.t. ``flat``) of one enumeration chunk, the gradient written out:
    the posterior of each assignment times the weight, added to every entry it read."""
    idx, w = xs
    t = jnp.sum(flat[idx], axis=-1)                          # (chunk, A)
    m = jnp.max(t, axis=-1, keepdims=True)
    m = jnp.where(jnp.isfinite(m), m, 0.0)
    e = jnp.exp(t - m)
    s = jnp.sum(e, axis=-1, keepdims=True)
    ok = s > 0
    safe = jnp.where(ok, s, 1.0)
    v = jnp.where(ok[:, 0], jnp.log(safe[:, 0]) + m[:, 0], -jnp.inf)
    p = jnp.where(ok, e / safe, 0.0) * jnp.where(w > 0, w, 0.0)[:, None]
    g = jnp.zeros_like(flat).at[idx.reshape(-1)].add(jnp.broadcast_to(p[..., None], idx.shape).reshape(-1))
    return _safe_weighted(v, w), g


def _block_chunks(blk, arrays, weights, network: Network | None = None):
    """(xs for lax.scan over the chunks, chunk function (flat, xs) -> weighted log-likelihood)."""
    if isinstance(blk, GroupPlan):
        # a plain elimination group over coded rows (the layout of adfit.minibatch): the
        # per-step contraction, with rows of codes (chunk, n_nodes) as data
        cards = _st(network).cards

        def f(flat, xs):
            cc, w = xs
            return _safe_weighted(_group_rows_loglik(blk, cards, _unflat(network, flat), cc), w)
        return (arrays, weights), f
    if isinstance(blk, EnumBlock):
        def f(flat, xs):
            idx, w = xs
            return _safe_weighted(_enum_rows(flat, idx), w)
        return (arrays, weights), f
    progs, (pid, base, icodes) = arrays

    def f(flat, xs):
        p, b, ic, w = xs
        return _safe_weighted(_tape_rows(blk, flat, progs, p, b, ic), w)
    return (pid, base, icodes, weights), f


def _gathered_value(flat: jax.Array, counts: jax.Array) -> jax.Array:
    return jnp.sum(jnp.where(counts > 0, counts * flat, 0.0))


def _parts(codes, weights) -> list:
    if isinstance(codes, Shards):
        return list(zip(codes.parts, weights.parts))
    return [(codes, weights)]


def _traced(tree) -> bool:
    return any(isinstance(x, jax.core.Tracer) for x in jax.tree_util.tree_leaves(tree))


_POOL = None
_WARM: set = set()


def _run_parts(fn, parts: list, key) -> list:
    """``fn(*part)`` for every part, side by side in threads (part 0 on the calling thread).

    XLA runs each of these compiled loops on one core; calls from several Python threads run in
    parallel. The first call of a program runs alone, so that it is compiled once."""
    global _POOL
    if len(parts) == 1:
        return [fn(*parts[0])]
    if _POOL is None:
        from concurrent.futures import ThreadPoolExecutor
        _POOL = ThreadPoolExecutor(max_workers=n_threads(), thread_name_prefix="adfit-shard")
    shapes = tuple(getattr(x, "shape", None) for x in jax.tree_util.tree_leaves(parts[0]))
    k = (key, shapes)
    if k not in _WARM:
        first = jax.block_until_ready(fn(*parts[0]))
        _WARM.add(k)
        futs = [_POOL.submit(lambda p=p: jax.block_until_ready(fn(*p))) for p in parts[1:]]
        return [first] + [f.result() for f in futs]
    futs = [_POOL.submit(lambda p=p: jax.block_until_ready(fn(*p))) for p in parts[1:]]
    first = jax.block_until_ready(fn(*parts[0]))
    return [first] + [f.result() for f in futs]


def _loglik_part(network: Network, groups: tuple, flat: jax.Array, codes: tuple, weights: tuple) -> jax.Array:
    total = jnp.zeros((), jnp.float64)
    for blk, arr, w in zip(groups, codes, weights):
        if isinstance(blk, GatheredBlock):
            total = total + _gathered_value(flat, w)
            continue
        xs, f = _block_chunks(blk, arr, w, network)
        fc = jax.checkpoint(f)

        def body(acc, x, fc=fc):
            return acc + fc(flat, x), None

        val, _ = jax.lax.scan(body, jnp.zeros((), jnp.float64), xs)
        total = total + val
    return total


@partial(jax.jit, static_argnums=(0, 1))
def _loglik_logcpt(network: Network, groups: tuple, logcpts: tuple[jax.Array, ...],
                   codes, weights) -> jax.Array:
    """Weighted total log-likelihood; differentiable in both modes (chunks are recomputed in the
    backward pass, so memory stays that of one chunk). ``codes``/``weights``: a :class:`Shards`
    (``Likelihood._codes``) or one part of it; the parts run one after the other here."""
    flat = _plan_flat(groups, logcpts)
    total = jnp.zeros((), jnp.float64)
    for cs, ws in _parts(codes, weights):
        total = total + _loglik_part(network, groups, flat, cs, ws)
    return total


def _flat_logcpts(logcpts: Sequence[Any]):
    """The log-CPTs of all nodes in one vector (network order, each CPT raveled), without the two
    constant slots :func:`_flat` appends: numpy when the inputs are concrete, traced otherwise."""
    if _traced(tuple(logcpts)):
        return jnp.concatenate([jnp.ravel(x) for x in logcpts])
    return np.concatenate([np.ravel(np.asarray(x, dtype=np.float64)) for x in logcpts])


def _value_and_expected_counts(network: Network, groups: tuple, logcpts: Sequence[jax.Array],
                               codes, weights):
    """Total log-likelihood and its gradient w.r.t. the log-CPTs (= expected family counts).

    Each chunk's value and gradient are computed and accumulated inside ``lax.scan``, so the
    memory is one chunk's, whatever the number of rows. The parts of a :class:`Shards` run in
    threads, one per core (one after the other when the call is traced, e.g. under ``vmap``).
    The compiled program returns the gradient as one flat vector; it is cut into CPT-shaped
    arrays here (numpy views when the call is not traced): XLA compiles every sliced output as a
    kernel of its own, which cost 0.5 s of compile time for 37 nodes.
    """
    val, g = _value_and_flat_expected_counts(network, groups, _flat_logcpts(logcpts), codes, weights)
    return val, _unflat(network, g)


def _value_and_flat_expected_counts(network: Network, groups: tuple, lc_flat, codes, weights):
    """:func:`_value_and_expected_counts` on the log-CPTs given as one flat vector (the layout of
    :func:`layout_of`, without the two constant slots); the expected counts come back flat too,
    with two trailing entries (those of the constant slots log 1 and log 0) to be ignored: a
    numpy array when the call is not traced."""
    parts = _parts(codes, weights)
    if len(parts) > 1 and not _traced((lc_flat, codes, weights)):
        res = _run_parts(lambda cs, ws: _value_and_flat_counts(network, groups, lc_flat, cs, ws), parts,
                         (id(network), groups, "vg"))
        val = jnp.asarray(sum(float(v) for v, _ in res))
        g = np.asarray(res[0][1]).copy()
        for _, gg in res[1:]:
            g += np.asarray(gg)
        return val, g
    val, g = _value_and_flat_counts(network, groups, lc_flat, codes, weights)
    if isinstance(g, jax.core.Tracer):
        return val, g
    return val, np.asarray(g)


@partial(jax.jit, static_argnums=(0, 1))
def _value_and_flat_counts(network: Network, groups: tuple, lc_flat: jax.Array, codes, weights):
    wide = _is_widened(groups)
    if wide:  # summed barren leaves: their columns of log row sums, and the chain rule back
        lc_w, back = jax.vjp(lambda x: _widen_flat(groups, x), lc_flat)
    else:
        lc_w = lc_flat
    flat = jnp.concatenate([lc_w, jnp.array([0.0, -jnp.inf], jnp.float64)])
    total = jnp.zeros((), jnp.float64)
    grad = jnp.zeros_like(flat)
    for cs, ws in _parts(codes, weights):
        for blk, arr, w in zip(groups, cs, ws):
            if isinstance(blk, GatheredBlock):
                total = total + _gathered_value(flat, w)
                grad = grad + w
                continue
            xs, f = _block_chunks(blk, arr, w, network)
            vg = _enum_value_and_grad if isinstance(blk, EnumBlock) else jax.value_and_grad(f)

            def body(carry, x, vg=vg):
                acc, g = carry
                v, gg = vg(flat, x)
                return (acc + v, g + gg), None

            (val, g), _ = jax.lax.scan(body, (jnp.zeros((), jnp.float64), jnp.zeros_like(flat)), xs)
            total = total + val
            grad = grad + g
    if wide:
        (g,) = back(grad[:-2])
        grad = jnp.concatenate([g, grad[-2:]])
    return total, grad


@partial(jax.jit, static_argnums=(0, 1))
def _rows_loglik(network: Network, groups: tuple, logcpts: tuple[jax.Array, ...], codes: tuple) -> tuple:
    """Per-instance log-likelihood of every block but the gathered one (flattened chunks; one
    part of a :class:`Shards`)."""
    flat = _plan_flat(groups, logcpts)
    out = []
    for blk, arr in zip(groups, codes):
        if isinstance(blk, GatheredBlock):
            out.append(jnp.zeros(0))
            continue
        if isinstance(blk, GroupPlan):
            lcs = _unflat(network, flat)
            _, ll = jax.lax.scan(lambda _, cc, blk=blk: (None, _group_rows_loglik(blk, _st(network).cards, lcs, cc)), None, arr)
        elif isinstance(blk, EnumBlock):
            _, ll = jax.lax.scan(lambda _, idx: (None, _enum_rows(flat, idx)), None, arr)
        else:
            progs, (pid, base, icodes) = arr

            def body(_, x, blk=blk, progs=progs):
                p, b, ic = x
                return None, _tape_rows(blk, flat, progs, p, b, ic)
            _, ll = jax.lax.scan(body, None, (pid, base, icodes))
        out.append(ll.reshape(-1))
    return tuple(out)


# --------------------------------------------------------------------------- per-step contraction (posteriors)
def _gather_factor(logcpt: jax.Array, f: FactorSpec, cards: Sequence[int], codes: jax.Array,
                   normalise: bool) -> tuple[jax.Array, jax.Array]:
    """CPT restricted to the observed family members of each row: shape (*scope_cards, rows)."""
    t = jnp.transpose(logcpt, f.perm)
    hid = math.prod(cards[v] for v in f.scope)
    obs_size = math.prod(cards[v] for v in f.obs)
    t = t.reshape(hid, obs_size)
    if f.obs:
        idx = sum(codes[:, v] * s for v, s in zip(f.obs, f.obs_strides))
        g = jnp.take(t, idx, axis=1)  # (hid, rows)
    else:
        g = jnp.broadcast_to(t, (hid, codes.shape[0]))
    if normalise:
        m = jax.lax.stop_gradient(jnp.max(g, axis=0))
        m = jnp.where(jnp.isfinite(m), m, 0.0)
        val = jnp.exp(g - m)
    else:
        m = jnp.zeros(codes.shape[0], g.dtype)
        val = jnp.exp(g)
    return val.reshape(tuple(cards[v] for v in f.scope) + (codes.shape[0],)), m


def _expand(arr: jax.Array, scope: Sequence[int], union: Sequence[int], cards: Sequence[int]) -> jax.Array:
    """Broadcastable view of a factor over ``union`` (rows stay last)."""
    pos = [union.index(v) for v in scope]
    order = np.argsort(pos)
    a = jnp.transpose(arr, tuple(order) + (len(scope),)) if len(scope) > 1 else arr
    shape = [1] * len(union) + [arr.shape[-1]]
    for v in scope:
        shape[union.index(v)] = cards[v]
    return a.reshape(shape)


def _group_rows_loglik(gp: GroupPlan, cards: tuple[int, ...], logcpts: Sequence[jax.Array],
                       codes: jax.Array, indicators: Mapping[int, jax.Array] | None = None) -> jax.Array:
    """Per-row log-likelihood of one chunk of one group: shape (rows,)."""
    rows = codes.shape[0]
    total = jnp.zeros(rows, dtype=jnp.float64)
    for node, fam in gp.log_terms:
        flat = logcpts[node].reshape(-1)
        idx = jnp.zeros(rows, dtype=codes.dtype)
        for v in fam:
            idx = idx * cards[v] + codes[:, v]
        total = total + jnp.take(flat, idx)
    arrays: dict[int, jax.Array] = {}
    for fid, f in enumerate(gp.factors):
        arr, m = _gather_factor(logcpts[f.node], f, cards, codes, normalise=True)
        arrays[fid] = arr
        total = total + m
    base = len(gp.factors)
    for k, v in enumerate(gp.indicators):
        if indicators is not None and v in indicators:
            lam = indicators[v]
        else:
            c = codes[:, v]
            lam = jnp.where(c[None, :] < 0, 1.0, (jnp.arange(cards[v])[:, None] == c[None, :]).astype(jnp.float64))
        arrays[base + k] = lam
    for st in gp.steps:
        union: list[int] = []
        for f in st.inputs:
            for u in gp.scopes[f]:
                if u not in union:
                    union.append(u)
        # One einsum per step, rows as a kept trailing index "Z" (batch axis last).
        letters = {u: chr(97 + k) for k, u in enumerate(union)}
        ops, subs = [], []
        for f in st.inputs:
            ops.append(arrays.pop(f))
            subs.append("".join(letters[u] for u in gp.scopes[f]) + "Z")
        out = "".join(letters[u] for u in union if u != st.var) + "Z"
        msg = jnp.einsum(",".join(subs) + "->" + out, *ops, optimize="greedy")
        out_scope = [u for u in union if u != st.var]
        # messages keep the union order minus the eliminated variable
        if tuple(out_scope) != st.out_scope:  # pragma: no cover - orders agree by construction
            msg = _expand(msg, out_scope, list(st.out_scope), cards)
        if st.out_scope:
            s = jax.lax.stop_gradient(jnp.max(msg.reshape(-1, rows), axis=0))
            s = jnp.where(s > 0, s, 1.0)
            msg = msg / s
            total = total + jnp.log(s)
        arrays[st.out_id] = msg
    for f in gp.final:
        total = total + jnp.log(arrays.pop(f))
    return total


def _logcpts_from_logits(network: Network, logits: Mapping[str, jax.Array]) -> list[jax.Array]:
    out = []
    for n in network.nodes:
        if n.fixed is None:
            out.append(jax.nn.log_softmax(logits[n.name], axis=-1))
        else:
            with np.errstate(divide="ignore"):
                out.append(jnp.asarray(np.log(network.fixed_table(n.name))))
    return out




def _assemble_rows(plan: Plan, codes: np.ndarray, lcs: Sequence[np.ndarray], parts: Sequence[np.ndarray]) -> np.ndarray:
    """Per distinct row: its observed families (numpy) plus its components' values."""
    network = plan.network
    codes = np.asarray(codes)
    out = np.zeros(plan.n_distinct)
    local = plan.observed_rows
    if local is not None and local.any():
        obs = codes >= 0
        pa = _st(network).parents
        for v in range(len(network)):
            fam = (*pa[v], v)
            ok = np.flatnonzero(local & obs[:, fam].all(axis=1))
            if ok.size:
                out[ok] += lcs[v][tuple(codes[ok, u] for u in fam)]
    for blk, mp, vals in zip(plan.groups, plan.maps, parts):
        if mp is None:
            continue
        rows, inst = mp
        np.add.at(out, rows, vals[inst])
    return out


# --------------------------------------------------------------------------- public API
class Likelihood:
    """The marginal log-likelihood of one data set under one network, ready to evaluate.

    >>> lik = Likelihood(network, data)          # doctest: +SKIP
    >>> lik.value(logits), lik.value_and_grad(logits)  # doctest: +SKIP

    ``logits`` is a dict of arrays for the free nodes, shaped ``network.cpt_shape(name)``.
    Compiled once per network and data layout; evaluations reuse the compiled program.
    """

    def __init__(self, network: Network, data: CodedData, *, route: str = "auto", chunk: int | None = None):
        self.network = network
        self.data = data
        plan = build_plan(network, data, route=route, chunk=chunk)
        self._codes = _split(plan, plan.codes, weights=False)
        self._weights = _split(plan, plan.weights, weights=True)
        # the device copies are the data from now on: release the plan's host arrays
        self.plan = dataclasses.replace(plan, codes=(), weights=())
        self.free = network.free_names

    # -- log-CPT level (all nodes) ---------------------------------------------------------
    def logcpts(self, logits: Mapping[str, jax.Array]) -> tuple[jax.Array, ...]:
        return tuple(_logcpts_from_logits(self.network, logits))

    def value_logcpt(self, logcpts: Sequence[jax.Array]) -> jax.Array:
        logcpts = tuple(logcpts)
        parts = _parts(self._codes, self._weights)
        if len(parts) > 1 and not _traced(logcpts):
            res = _run_parts(lambda cs, ws: _loglik_logcpt(self.network, self.plan.groups, logcpts, cs, ws), parts,
                             (id(self.network), self.plan.groups, "v"))
            return jnp.asarray(sum(float(v) for v in res))
        return _loglik_logcpt(self.network, self.plan.groups, logcpts, self._codes, self._weights)

    def expected_counts_logcpt(self, logcpts: Sequence[jax.Array]):
        """(log-likelihood, expected family counts N(x,u) per node, CPT-shaped)."""
        return _value_and_expected_counts(self.network, self.plan.groups, tuple(logcpts), self._codes, self._weights)

    def observed_family_counts(self):
        """The data counts of the families with every member observed, as the plan gathered them
        (no pass over the rows): ``(counts, rows)``, ``counts`` flat in the layout of
        :func:`layout_of` (for each node, the summed weights of the counted rows in which the node
        and all its parents are observed, by family configuration) and ``rows`` the bool mask of
        the distinct rows counted (those of the per-pattern route); ``None`` when the plan has no
        gathered block (every row in the uniform program)."""
        for i, blk in enumerate(self.plan.groups):
            if isinstance(blk, GatheredBlock):
                w = self._weights.parts[0][i] if isinstance(self._weights, Shards) else self._weights[i]
                return _narrow_flat(self.plan.groups, np.asarray(w))[:layout_size(self.network)], self.plan.observed_rows
        return None

    def expected_counts_flat(self, lc_flat):
        """(log-likelihood, expected family counts) with the log-CPTs of all nodes given as one
        flat vector (network order, each CPT raveled; :func:`layout_of`) and the counts returned
        the same way, plus two trailing entries to ignore (:func:`_value_and_flat_expected_counts`)."""
        return _value_and_flat_expected_counts(self.network, self.plan.groups, lc_flat, self._codes, self._weights)

    # -- logits level (free nodes) ---------------------------------------------------------
    def value(self, logits: Mapping[str, jax.Array]) -> jax.Array:
        return self.value_logcpt(self.logcpts(logits))

    def value_and_grad(self, logits: Mapping[str, jax.Array]):
        """(log-likelihood, dict of gradients w.r.t. the logits of the free nodes)."""
        return _value_and_grad_logits(self, logits)

    def expected_counts(self, probs: Mapping[str, np.ndarray]) -> tuple[float, dict[str, np.ndarray]]:
        """Log-likelihood and expected family counts for CPTs given as probabilities."""
        lc = logcpts_from_probs(self.network, probs)
        val, g = self.expected_counts_logcpt(lc)
        return float(val), {n: np.asarray(x) for n, x in zip(self.network.names, g)}

    def row_logliks(self, probs: Mapping[str, np.ndarray]) -> np.ndarray:
        """Log-likelihood of every distinct row (in the order of ``data.codes``)."""
        lc = tuple(logcpts_from_probs(self.network, probs))
        per = [_rows_loglik(self.network, self.plan.groups, lc, cs) for cs in self._codes.parts]
        parts = [np.concatenate([np.asarray(p[b]) for p in per]) for b in range(len(self.plan.groups))]
        return _assemble_rows(self.plan, self.data.codes, [np.asarray(x) for x in lc], parts)


def _value_and_grad_logits(lik: Likelihood, logits: Mapping[str, jax.Array]):
    logits = {k: jnp.asarray(logits[k]) for k in lik.free}
    lc, vjp = jax.vjp(lambda lg: lik.logcpts(lg), logits)
    val, counts = lik.expected_counts_logcpt(lc)
    (g,) = vjp(tuple(jnp.asarray(c) for c in counts))
    return val, g


def logcpts_from_probs(network: Network, probs: Mapping[str, np.ndarray]) -> tuple[jax.Array, ...]:
    out = []
    with np.errstate(divide="ignore"):
        for n in network.nodes:
            t = network.fixed_table(n.name) if n.fixed is not None else np.asarray(probs[n.name], dtype=np.float64)
            out.append(jnp.asarray(np.log(t)))
    return tuple(out)


def probs_from_logits(network: Network, logits: Mapping[str, jax.Array]) -> dict[str, np.ndarray]:
    """Probabilities of every node (fixed ones included) from the logits of the free nodes."""
    out = {}
    for n in network.nodes:
        if n.fixed is None:
            e = np.asarray(logits[n.name], dtype=np.float64)
            e = np.exp(e - e.max(axis=-1, keepdims=True))  # numpy: eager JAX compiles per shape
            out[n.name] = e / e.sum(axis=-1, keepdims=True)
        else:
            out[n.name] = network.fixed_table(n.name)
    return out


def logits_from_probs(network: Network, probs: Mapping[str, np.ndarray], floor: float = 1e-300, *,
                      names: Iterable[str] | None = None) -> dict[str, jax.Array]:
    """Logits (log-probabilities, row max shifted to 0) of the free nodes (or of ``names``)."""
    out = {}
    for name in (network.free_names if names is None else names):
        lp = np.log(np.maximum(np.asarray(probs[name], dtype=np.float64), floor))
        out[name] = lp - lp.max(axis=-1, keepdims=True)
    return out


def _prepared(likelihood: Likelihood | None, network: Network, data: CodedData, caller: str) -> Likelihood:
    """``likelihood`` when it was built for ``network`` and ``data``, else a new one (None)."""
    if likelihood is None:
        return Likelihood(network, data)
    other_net = likelihood.network is not network and likelihood.network != network
    if other_net or likelihood.data is not data:
        what = "network" if other_net else "data (not the same CodedData object)"
        raise OptionError(f"{caller}: the likelihood= given was built for another {what}; pass the "
                          f"Likelihood(network, data) of these arguments, or none")
    return likelihood


def zero_sources(network: Network, given: str | None) -> tuple[str, str]:
    """``(under what, what to check)`` for a message about rows of probability 0: the fixed CPTs
    only when the network has some, the impossible cells only when it declares some, and
    ``given`` (the CPTs the caller evaluates, e.g. "the CPTs of --params")."""
    under, check = [], []
    if network.fixed_names:
        under.append("the fixed CPTs")
        check.append("the fixed tables")
    if any(n.impossible for n in network.nodes if n.fixed is None):
        under.append("the impossible cells")
        check.append("the impossible cells")
    if given and network.free_names:
        under.append(given)
        check.append(given)
    if not under:
        under, check = ["the CPTs"], ["the CPTs"]
    return " and ".join(under), ", ".join(check)


def check_possible(lik: Likelihood, probs: Mapping[str, np.ndarray], *, given: str | None = "the CPTs given") -> None:
    """Raise ImpossibleDataError naming the rows with probability zero under ``probs``.

    ``given`` says where the free nodes' CPTs come from (the message names the fixed CPTs only
    when the network has some). The per-row pass (a separate compiled program) runs only when
    the total is not finite.
    """
    total, _ = lik.expected_counts(probs)
    if math.isfinite(total):
        return
    ll = lik.row_logliks(probs)
    bad = np.flatnonzero(~np.isfinite(ll))
    if bad.size:
        from .data import decode
        df = decode(lik.network, lik.data.codes[bad[:3]])
        shown = "; ".join(", ".join(f"{c}={v}" for c, v in r.items() if v is not None) for r in df.to_dict("records"))
        under, check = zero_sources(lik.network, given)
        raise ImpossibleDataError(
            f"{lik.data.source}: {bad.size} distinct row(s) have probability 0 under {under} "
            f"(log-likelihood -inf), e.g. [{shown}]; check {check} or the records")


def score(network: Network, data: CodedData, probs: Mapping[str, np.ndarray], *,
          pseudo_counts: Mapping[str, np.ndarray] | None = None,
          likelihood: Likelihood | None = None) -> dict[str, float]:
    """Marginal log-likelihood and gradient norm (w.r.t. the free logits) of given CPTs.

    The gradient norm is that of the objective (log-likelihood plus log-prior when
    ``pseudo_counts`` are given): per free node the logit gradient is
    ``N(x,u) + c(x,u) - theta(x|u) (N(u) + c(u))`` in units of records (for a set of tied nodes,
    one gradient with their counts added; impossible cells contribute 0). A noisy_or / noisy_max
    / logistic node's gradient is taken w.r.t. the logits of its parameter rows, read off its
    table (:func:`adfit.forms.rows_from_table`), with the prior on them: Dirichlet pseudo-counts on
    cause rows, and for a logistic node the normal prior on its coefficients (its entry of
    ``pseudo_counts`` holds the precisions 1/sd², :meth:`adfit.priors.Prior.pseudo_counts`).

    ``likelihood``: a :class:`Likelihood` already built for this ``network`` and this ``data``
    (the same object), to reuse its plan and compiled program (a command that also checks or
    evaluates builds one and passes it everywhere); by default one is built here.
    """
    lik = _prepared(likelihood, network, data, "score")
    ll, counts = lik.expected_counts(probs)
    gn2 = 0.0
    for name in network.estimated_names:  # a tied node's family counts add to its source's
        th = np.asarray(probs[name], dtype=np.float64)
        n_xu = sum((counts[t] for t in network.tied_names(name)), counts[name])
        if network.cpd_form(name) in ("noisy_or", "noisy_max", "logistic"):
            from . import forms

            rows = forms.rows_from_table(network, name, th)
            a = forms.virtual_counts(network, name, rows, n_xu)
            c = None if pseudo_counts is None or name not in pseudo_counts else np.asarray(pseudo_counts[name])
            if c is not None and network.cpd_form(name) != "logistic" and c.shape == a.shape:
                a = a + c  # Dirichlet pseudo-counts on the cause rows
            g = a - rows * a.sum(axis=-1, keepdims=True)
            if c is not None and network.cpd_form(name) == "logistic" and c.shape == a.shape:
                # a normal prior on the coefficients (c: its precisions 1/sd²): −prec·β, β = log-odds
                with np.errstate(divide="ignore"):
                    lr = np.log(rows)
                b = c * (lr - lr[:, :1])
                g = g - b
                g[:, 0] += b[:, 1:].sum(axis=1)
            gn2 += float(np.sum(g * g))
            continue
        n_xu = n_xu + (0.0 if pseudo_counts is None or name not in pseudo_counts else pseudo_counts[name])
        g = n_xu - th * n_xu.sum(axis=-1, keepdims=True)
        gn2 += float(np.sum(g * g))
    return {"log_likelihood": ll, "gradient_norm": math.sqrt(gn2)}


# --------------------------------------------------------------------------- compile cache
# Kept here under their old names; the setup lives in adfit/_compile_cache.py (it imports no JAX,
# so that the command line can ask for the cache before it knows whether a command computes).
from ._compile_cache import COMPILE_CACHE_MAX_BYTES, enable_compilation_cache  # noqa: E402,F401


# --------------------------------------------------------------------------- posteriors
@partial(jax.jit, static_argnums=(0, 1))
def _posteriors(network: Network, gp: GroupPlan, logcpts: tuple[jax.Array, ...], codes: jax.Array,
                weights: Mapping[int, jax.Array] | None = None):
    """Row log-likelihoods and posterior marginals of one uniform plan; ``weights`` (node index ->
    (chunks, chunk, card)) multiply those nodes' evidence indicators (likelihood evidence): the
    row value is then log sum_x w(x) P(x, e) and the posterior w(x) P(x, e) / that sum."""
    cards = _st(network).cards
    soft = {} if weights is None else weights

    def body(_, xs):
        cc, ww = xs
        lam = {}
        for v in gp.indicators:
            c = cc[:, v]
            lam[v] = jnp.where(c[None, :] < 0, 1.0, (jnp.arange(cards[v])[:, None] == c[None, :]).astype(jnp.float64))
            if v in ww:
                lam[v] = lam[v] * ww[v].T

        def f(lam):
            return jnp.sum(_group_rows_loglik(gp, cards, logcpts, cc, lam))
        ll = _group_rows_loglik(gp, cards, logcpts, cc, lam)
        g = jax.grad(f)(lam)
        # d log L / d lambda(x) = P(x, e) / (lambda(x) L): times lambda(x) it is the posterior
        return None, (ll, {v: (g[v] * lam[v]).T if v in ww else g[v].T for v in gp.indicators})

    _, (ll, g) = jax.lax.scan(body, None, (codes, soft))
    return ll.reshape(-1), {v: x.reshape(-1, cards[v]) for v, x in g.items()}


def posterior_marginals(network: Network, probs: Mapping[str, np.ndarray], codes: np.ndarray,
                        *, chunk: int | None = None, weights: Mapping[str, np.ndarray] | None = None
                        ) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """Posterior marginal of every node given each row's observed cells.

    Computed exactly as the gradient of the row log-likelihood with respect to evidence
    indicators (Darwiche 2003): for a hidden cell it is P(X = x | observed cells of the row).
    For observed cells the returned row is the one-hot of the observed value.

    Args:
        codes: int array ``(rows, n_nodes)`` with ``-1`` for hidden cells.
        weights: likelihood (soft, "virtual") evidence, ``{node: (rows, card)}`` of weights >= 0
            that multiply the node's evidence indicator (Pearl 1988, *Probabilistic Reasoning in
            Intelligent Systems*, virtual evidence): the row value is then
            ``log sum_x w(x) P(x, e)`` and the posteriors are those given the hard cells and the
            weights. A row of all ones changes nothing.

    Returns:
        ``(row_loglik (rows,), {node: array (rows, card)})``.
    """
    codes = np.asarray(codes, dtype=np.int32)
    data = CodedData(codes, np.ones(len(codes)), None, "<query>")
    plan = build_plan(network, data, for_posteriors=True, chunk=chunk)
    gp = plan.groups[0]
    lc = logcpts_from_probs(network, probs)
    wj = None
    if weights:
        n_chunks, c = plan.codes[0].shape[:2]
        wj = {}
        for name, w in weights.items():
            v = network.index(name)
            w = np.asarray(w, dtype=np.float64).reshape(len(codes), _st(network).cards[v])
            full = np.ones((n_chunks * c, w.shape[1]))
            full[:len(codes)] = w
            wj[v] = jnp.asarray(full.reshape(n_chunks, c, w.shape[1]))
    ll, g = _posteriors(network, gp, lc, jnp.asarray(plan.codes[0]), wj)
    n = len(codes)
    ll = np.asarray(ll)[:n]
    out = {}
    for v in range(len(network)):
        name = network.names[v]
        p = np.asarray(g[v])[:n]
        obs = codes[:, v] >= 0
        p = np.where(obs[:, None], np.eye(_st(network).cards[v])[np.clip(codes[:, v], 0, None)], p)
        out[name] = p
    return ll, out

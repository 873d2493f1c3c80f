"""Exact marginal log-likelihood of incomplete records, by variable elimination in JAX.

For a distinct coded row ``e`` (observed cells) the marginal likelihood is

    P(e) = sum over the hidden cells h of  prod_i theta_i(x_i | x_pa(i))   with x = (e, h),

a sum over every assignment of the row's hidden cells (missing cells and latent nodes). It is
never enumerated here: the products are organised by variable elimination with an order chosen
from the graph (greedy min-fill), so the cost grows with the treewidth of the part of the
network that is hidden, not with the number of hidden cells.

How the rows are organised (the *plan*, built once per network and data in plain numpy):

* Rows are split into **groups**. A frequent missingness pattern gets a group of its own; the
  long tail of rare patterns shares one group. Inside a group a node is *observed* (in every row
  of the group), *hidden* (in every row), or *partial* (observed in some rows).
* Observed nodes are never summed over: their values index the CPTs directly (a gather). A
  family whose members are all observed contributes ``log theta`` gathered in log space.
* Partial nodes get an evidence-indicator factor (one-hot where observed, all ones where
  missing), so one contraction serves every row of the group.
* Hidden nodes none of whose descendants is observed or partial in the group sum out to 1 and
  are pruned (barren nodes).
* Factors carry the rows on their **last** axis, so that each elimination step is an
  elementwise product and a sum over small leading axes, vectorised over rows.
* Each elimination step divides its message by its maximum per row and adds the log of that
  maximum back (stop-gradient is exact here: the scale cancels), so a row whose likelihood is
  far below 1e-308 is still finite in float64.
* Rows are processed in fixed-size chunks by ``lax.scan`` that accumulates each chunk's value
  and gradient, so memory is bounded by the chunk size, not by the number of rows.

The core function takes **log-CPTs** (``log theta``, all nodes). Its gradient with respect to
``log theta_i(x|u)`` is the expected count ``N(x, u)`` of the family given the data (the
derivative of the network polynomial, Darwiche 2003, J. ACM 50(3)); composed with
``log_softmax`` it gives the gradient with respect to the logits, ``N(x,u) - theta(x|u) N(u)``
(Fisher's identity; Dempster, Laird & Rubin 1977, eq. 2.13).
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from functools import partial
from typing import Mapping, Sequence

import jax
import jax.numpy as jnp
import numpy as np

from .data import HIDDEN, CodedData
from .errors import ImpossibleDataError
from .network import Network

# A group needs at least this many distinct rows to get code of its own (compile time is paid
# per group); at most MAX_PATTERN_GROUPS patterns are specialised.
MIN_PATTERN_ROWS = 512
MAX_PATTERN_GROUPS = 12
# Target number of float64 entries in the largest intermediate of one chunk (~4 MB): measured
# on the 37-node benchmark, smaller chunks pay per-iteration overhead, larger ones leave cache.
CHUNK_BUDGET = 1 << 19


# --------------------------------------------------------------------------- the static plan
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
    """Everything static about one group of rows (hashable: a static jit argument)."""

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


@dataclass(frozen=True)
class Plan:
    """Groups of distinct rows, each with its static plan and its padded data arrays."""

    network: Network
    groups: tuple[GroupPlan, ...]
    rows: tuple[np.ndarray, ...]      # indices into the distinct rows, per group
    codes: tuple[np.ndarray, ...]     # (n_chunks, chunk, n_nodes) int32, per group
    weights: tuple[np.ndarray, ...]   # (n_chunks, chunk) float64 (0 on padding), per group
    n_distinct: int

    def describe(self) -> str:
        parts = []
        for g, r in zip(self.groups, self.rows):
            parts.append(f"{g.kind}: {len(r)} rows, {g.n_hidden} hidden + {g.n_partial} partial nodes, "
                         f"{g.n_pruned} pruned, ~{g.cost:.0f} entries/row")
        return "; ".join(parts)

    @property
    def route(self) -> str:
        kinds = {g.kind for g in self.groups}
        if kinds == {"pattern"}:
            return "per-pattern"
        if kinds == {"mixed"}:
            return "uniform evidence"
        return "hybrid (per-pattern + uniform evidence)"


def _min_fill_order(variables: Sequence[int], scopes: Sequence[Sequence[int]], cards: Sequence[int]) -> list[int]:
    """Greedy min-fill elimination order, ties broken by the size of the created clique."""
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
                keep_all: bool = False, indicator_nodes: Sequence[int] = ()) -> GroupPlan:
    """Static plan for a group. ``hidden_mask`` is (rows, n_nodes) bool for the group's rows.

    ``keep_all`` disables barren pruning and ``indicator_nodes`` forces indicator factors (used
    for posterior marginals, where the gradient with respect to the indicators is wanted).
    """
    n = len(network)
    cards = network.cards
    pa = network.parent_indices
    kids = network.children
    always = hidden_mask.all(axis=0)
    some = hidden_mask.any(axis=0)
    forced = set(indicator_nodes)
    partial_set = {i for i in range(n) if (some[i] and not always[i]) or i in forced}
    hidden_set = {i for i in range(n) if always[i] and i not in forced}
    observed = {i for i in range(n) if i not in partial_set and i not in hidden_set}

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
    indicators = tuple(sorted(v for v in partial_set if keep[v]))

    scopes: list[tuple[int, ...]] = [f.scope for f in factors] + [(v,) for v in indicators]
    variables = sorted({v for s in scopes for v in s})
    order = _min_fill_order(variables, scopes, cards)
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

    # Chunk size: keep the largest intermediate near CHUNK_BUDGET entries.
    biggest = max([1] + [math.prod(cards[u] for u in scopes[s.out_id]) * cards[s.var] for s in steps])
    chunk = 1 << max(6, min(15, int(math.log2(max(1, CHUNK_BUDGET // biggest)))))
    chunk = min(chunk, max(64, 1 << math.ceil(math.log2(max(1, n_rows)))))
    return GroupPlan(tuple(log_terms), tuple(factors), indicators, tuple(steps), final, tuple(scopes),
                     chunk, cost + len(log_terms), kind, len(hidden_set), len(partial_set), n_pruned)


def build_plan(network: Network, data: CodedData, *, route: str = "auto",
               min_pattern_rows: int = MIN_PATTERN_ROWS, max_pattern_groups: int = MAX_PATTERN_GROUPS,
               chunk: int | None = None, for_posteriors: bool = False) -> Plan:
    """Split the distinct rows into groups and build each group's elimination plan.

    Args:
        route: ``"auto"`` (frequent patterns specialised, the rest uniform), ``"uniform"`` (one
            group, evidence indicators for every partially observed node) or ``"pattern"``
            (one group per missingness pattern; compile time grows with the patterns).
        chunk: rows per chunk (default: chosen from the largest intermediate of each group).
        for_posteriors: every node gets an indicator factor and nothing is pruned (for
            :func:`posterior_marginals`).
    """
    if route not in ("auto", "uniform", "pattern"):
        raise ValueError(f"route must be 'auto', 'uniform' or 'pattern', got {route!r}")
    codes = np.asarray(data.codes, dtype=np.int32)
    counts = np.asarray(data.counts, dtype=np.float64)
    hidden = codes == HIDDEN
    n = len(network)
    groups_rows: list[tuple[str, np.ndarray]] = []
    if for_posteriors or route == "uniform":
        groups_rows.append(("mixed", np.arange(len(codes))))
    else:
        if n <= 62:
            key = hidden.astype(np.int64) @ (np.int64(1) << np.arange(n, dtype=np.int64))
            _, pat_inv, pat_count = np.unique(key, return_inverse=True, return_counts=True)
        else:
            _, pat_inv, pat_count = np.unique(hidden, axis=0, return_inverse=True, return_counts=True)
        pat_inv = pat_inv.reshape(-1)
        order = np.argsort(-pat_count, kind="stable")
        tail: list[np.ndarray] = []
        for rank, p in enumerate(order):
            rows = np.flatnonzero(pat_inv == p)
            if route == "pattern" or (rank < max_pattern_groups and pat_count[p] >= min_pattern_rows):
                groups_rows.append(("pattern", rows))
            else:
                tail.append(rows)
        if tail:
            groups_rows.append(("mixed", np.sort(np.concatenate(tail))))

    plans, rows_l, codes_l, w_l = [], [], [], []
    for kind, rows in groups_rows:
        gp = _group_plan(network, hidden[rows], kind=kind, n_rows=len(rows),
                         keep_all=for_posteriors, indicator_nodes=range(n) if for_posteriors else ())
        if chunk is not None:
            gp = dataclasses.replace(gp, chunk=int(chunk))
        c = gp.chunk
        n_chunks = max(1, -(-len(rows) // c))
        pad = n_chunks * c - len(rows)
        idx = np.concatenate([rows, np.full(pad, rows[0], dtype=rows.dtype)])
        w = np.concatenate([counts[rows], np.zeros(pad)])
        plans.append(gp)
        rows_l.append(rows)
        codes_l.append(codes[idx].reshape(n_chunks, c, n))
        w_l.append(w.reshape(n_chunks, c))
    return Plan(network, tuple(plans), tuple(rows_l), tuple(codes_l), tuple(w_l), len(codes))


# --------------------------------------------------------------------------- the contraction
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


def _safe_weighted(ll: jax.Array, w: jax.Array) -> jax.Array:
    return jnp.sum(jnp.where(w > 0, w * ll, 0.0))


@partial(jax.jit, static_argnums=(0, 1))
def _loglik_logcpt(network: Network, groups: tuple[GroupPlan, ...], logcpts: tuple[jax.Array, ...],
                   codes: tuple[jax.Array, ...], weights: tuple[jax.Array, ...]) -> jax.Array:
    """Weighted total log-likelihood; differentiable (chunks recomputed in the backward pass)."""
    cards = network.cards
    total = jnp.zeros((), jnp.float64)
    for gp, c, w in zip(groups, codes, weights):
        @jax.checkpoint
        def chunk_val(lc, cc, ww, gp=gp):
            return _safe_weighted(_group_rows_loglik(gp, cards, lc, cc), ww)

        def body(acc, xs, gp=gp):
            cc, ww = xs
            return acc + chunk_val(logcpts, cc, ww), None

        val, _ = jax.lax.scan(body, jnp.zeros((), jnp.float64), (c, w))
        total = total + val
    return total


@partial(jax.jit, static_argnums=(0, 1))
def _value_and_expected_counts(network: Network, groups: tuple[GroupPlan, ...], logcpts: tuple[jax.Array, ...],
                               codes: tuple[jax.Array, ...], weights: tuple[jax.Array, ...]):
    """Total log-likelihood and its gradient w.r.t. the log-CPTs (= expected family counts).

    Each chunk's value and gradient are computed and accumulated inside ``lax.scan``, so the
    memory is one chunk's, whatever the number of rows.
    """
    cards = network.cards
    total = jnp.zeros((), jnp.float64)
    grads = tuple(jnp.zeros_like(x) for x in logcpts)
    for gp, c, w in zip(groups, codes, weights):
        def chunk_val(lc, cc, ww, gp=gp):
            return _safe_weighted(_group_rows_loglik(gp, cards, lc, cc), ww)

        vg = jax.value_and_grad(chunk_val)

        def body(carry, xs):
            acc, g = carry
            cc, ww = xs
            v, gg = vg(logcpts, cc, ww)
            return (acc + v, tuple(a + b for a, b in zip(g, gg))), None

        (val, g), _ = jax.lax.scan(body, (jnp.zeros((), jnp.float64), tuple(jnp.zeros_like(x) for x in logcpts)), (c, w))
        total = total + val
        grads = tuple(a + b for a, b in zip(grads, g))
    return total, grads


@partial(jax.jit, static_argnums=(0, 1))
def _rows_loglik(network: Network, groups: tuple[GroupPlan, ...], logcpts: tuple[jax.Array, ...],
                 codes: tuple[jax.Array, ...]) -> tuple[jax.Array, ...]:
    cards = network.cards
    out = []
    for gp, c in zip(groups, codes):
        def body(_, cc, gp=gp):
            return None, _group_rows_loglik(gp, cards, logcpts, cc)
        _, ll = jax.lax.scan(body, None, c)
        out.append(ll.reshape(-1))
    return tuple(out)


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
        self.plan = build_plan(network, data, route=route, chunk=chunk)
        self._codes = tuple(jnp.asarray(c) for c in self.plan.codes)
        self._weights = tuple(jnp.asarray(w) for w in self.plan.weights)
        self.free = network.free_names

    # -- log-CPT level (all nodes) ---------------------------------------------------------
    def logcpts(self, logits: Mapping[str, jax.Array]) -> tuple[jax.Array, ...]:
        return tuple(_logcpts_from_logits(self.network, logits))

    def value_logcpt(self, logcpts: Sequence[jax.Array]) -> jax.Array:
        return _loglik_logcpt(self.network, self.plan.groups, tuple(logcpts), self._codes, self._weights)

    def expected_counts_logcpt(self, logcpts: Sequence[jax.Array]):
        """(log-likelihood, expected family counts N(x,u) per node, CPT-shaped)."""
        return _value_and_expected_counts(self.network, self.plan.groups, tuple(logcpts), self._codes, self._weights)

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
        lc = logcpts_from_probs(self.network, probs)
        parts = _rows_loglik(self.network, self.plan.groups, tuple(lc), self._codes)
        out = np.empty(self.plan.n_distinct)
        for rows, ll in zip(self.plan.rows, parts):
            out[rows] = np.asarray(ll)[: len(rows)]
        return out


def _value_and_grad_logits(lik: Likelihood, logits: Mapping[str, jax.Array]):
    logits = {k: jnp.asarray(logits[k]) for k in lik.free}
    lc, vjp = jax.vjp(lambda lg: lik.logcpts(lg), logits)
    val, counts = lik.expected_counts_logcpt(lc)
    (g,) = vjp(tuple(counts))
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


def logits_from_probs(network: Network, probs: Mapping[str, np.ndarray], floor: float = 1e-300) -> dict[str, jax.Array]:
    """Logits (log-probabilities, row max shifted to 0) of the free nodes."""
    out = {}
    for name in network.free_names:
        lp = np.log(np.maximum(np.asarray(probs[name], dtype=np.float64), floor))
        out[name] = lp - lp.max(axis=-1, keepdims=True)
    return out


def check_possible(lik: Likelihood, probs: Mapping[str, np.ndarray]) -> None:
    """Raise ImpossibleDataError naming the rows with probability zero under ``probs``.

    The per-row pass (a separate compiled program) runs only when the total is not finite.
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
        raise ImpossibleDataError(
            f"{lik.data.source}: {bad.size} distinct row(s) have probability 0 under the fixed CPTs "
            f"(log-likelihood -inf), e.g. [{shown}]; check the fixed tables or the records")


def score(network: Network, data: CodedData, probs: Mapping[str, np.ndarray], *,
          pseudo_counts: Mapping[str, np.ndarray] | None = None) -> dict[str, float]:
    """Marginal log-likelihood and gradient norm (w.r.t. the free logits) of given CPTs.

    The gradient norm is that of the objective (log-likelihood plus log-prior when
    ``pseudo_counts`` are given): per free node the logit gradient is
    ``N(x,u) + c(x,u) - theta(x|u) (N(u) + c(u))`` in units of records.
    """
    lik = Likelihood(network, data)
    ll, counts = lik.expected_counts(probs)
    gn2 = 0.0
    for name in network.free_names:
        th = np.asarray(probs[name], dtype=np.float64)
        n_xu = counts[name] + (0.0 if pseudo_counts is None or name not in pseudo_counts else pseudo_counts[name])
        g = n_xu - th * n_xu.sum(axis=-1, keepdims=True)
        gn2 += float(np.sum(g * g))
    return {"log_likelihood": ll, "gradient_norm": math.sqrt(gn2)}


# --------------------------------------------------------------------------- posteriors
@partial(jax.jit, static_argnums=(0, 1))
def _posteriors(network: Network, gp: GroupPlan, logcpts: tuple[jax.Array, ...], codes: jax.Array):
    cards = network.cards

    def body(_, cc):
        lam = {}
        for v in gp.indicators:
            c = cc[:, v]
            lam[v] = jnp.where(c[None, :] < 0, 1.0, (jnp.arange(cards[v])[:, None] == c[None, :]).astype(jnp.float64))

        def f(lam):
            return jnp.sum(_group_rows_loglik(gp, cards, logcpts, cc, lam))
        ll = _group_rows_loglik(gp, cards, logcpts, cc, lam)
        g = jax.grad(f)(lam)
        return None, (ll, {v: g[v].T for v in gp.indicators})

    _, (ll, g) = jax.lax.scan(body, None, codes)
    return ll.reshape(-1), {v: x.reshape(-1, cards[v]) for v, x in g.items()}


def posterior_marginals(network: Network, probs: Mapping[str, np.ndarray], codes: np.ndarray,
                        *, chunk: int | None = None) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """Posterior marginal of every node given each row's observed cells.

    Computed exactly as the gradient of the row log-likelihood with respect to evidence
    indicators (Darwiche 2003): for a hidden cell it is P(X = x | observed cells of the row).
    For observed cells the returned row is the one-hot of the observed value.

    Args:
        codes: int array ``(rows, n_nodes)`` with ``-1`` for hidden cells.

    Returns:
        ``(row_loglik (rows,), {node: array (rows, card)})``.
    """
    codes = np.asarray(codes, dtype=np.int32)
    data = CodedData(codes, np.ones(len(codes)), None, "<query>")
    plan = build_plan(network, data, for_posteriors=True, chunk=chunk)
    gp = plan.groups[0]
    lc = logcpts_from_probs(network, probs)
    ll, g = _posteriors(network, gp, lc, jnp.asarray(plan.codes[0]))
    n = len(codes)
    ll = np.asarray(ll)[:n]
    out = {}
    for v in range(len(network)):
        name = network.names[v]
        p = np.asarray(g[v])[:n]
        obs = codes[:, v] >= 0
        p = np.where(obs[:, None], np.eye(network.cards[v])[np.clip(codes[:, v], 0, None)], p)
        out[name] = p
    return ll, out

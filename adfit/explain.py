"""Joint posteriors of several targets and the most probable explanation (``adfit query``).

* :func:`joint_posterior`: P(targets | evidence) over every combination of the targets' states,
  each combination scored exactly as one more row of evidence (variable elimination, through
  :func:`adfit.impute.row_posteriors`).
* :func:`most_probable`: the most probable joint assignment of every node not given (MPE), with
  P(assignment | evidence), by max-product variable elimination in numpy (log space, a min-fill
  order, argmax tables traced back; Dechter 1999, "Bucket elimination", *Artificial
  Intelligence* 113). Its cost is that of the largest table the order builds, refused above
  :data:`MAX_TABLE` entries with a one-line error. P(evidence) comes from the JAX core.

Both take soft (likelihood) evidence ``{node: {state: weight}}``: the weights multiply
P(node = state) (Pearl 1988, virtual evidence).
"""

from __future__ import annotations

import functools
import itertools
import math
from typing import Any, Mapping, Sequence

import numpy as np

from .errors import ImpossibleDataError, OptionError
from .network import Network

MAX_JOINT = 100_000      # target combinations scored for a joint table
MAX_TABLE = 1 << 24      # entries of the largest table of the max-product elimination
TIE_TOL = 1e-12          # relative: assignments this close to the best count as ties


def _codes(network: Network, given: Mapping[str, str]) -> np.ndarray:
    row = np.full(len(network), -1, dtype=np.int32)
    for node, state in given.items():
        row[network.index(node)] = network.node(node).states.index(state)
    return row


def _weights(network: Network, soft: Mapping[str, Mapping[str, float]] | None, rows: int) -> dict[str, np.ndarray] | None:
    from .impute import soft_arrays

    return soft_arrays(network, soft, rows) if soft else None


def joint_posterior(network: Network, probs: Mapping[str, np.ndarray], given: Mapping[str, str],
                    targets: Sequence[str], soft: Mapping[str, Mapping[str, float]] | None = None) -> dict[str, Any]:
    """``{"targets": [...], "rows": [{"states": {node: state}, "probability": p}, ...]}``, rows in table order.

    ``given``, ``soft`` and ``targets`` are assumed checked (as :func:`adfit.impute.query` does).
    """
    from .impute import row_posteriors

    cards = [network.node(t).card for t in targets]
    n = int(np.prod(cards))
    if n > MAX_JOINT:
        raise OptionError(f"--target: the joint of {', '.join(targets)} has {n} combinations (at most {MAX_JOINT}); "
                          f"name fewer targets")
    base = _codes(network, given)
    combos = list(itertools.product(*(range(c) for c in cards)))
    codes = np.tile(base, (n, 1))
    for j, t in enumerate(targets):
        codes[:, network.index(t)] = [c[j] for c in combos]
    ll, _ = row_posteriors(network, probs, codes, weights=_weights(network, soft, n))
    top = np.max(ll)
    if not math.isfinite(top):
        raise ImpossibleDataError("the evidence has probability 0 under the CPTs; no joint posterior exists")
    w = np.exp(ll - top)
    p = w / w.sum()
    rows = [{"states": {t: network.node(t).states[c[j]] for j, t in enumerate(targets)}, "probability": float(pj)}
            for c, pj in zip(combos, p)]
    return {"targets": list(targets), "rows": rows}


# ----------------------------------------------------------------------------- max-product
@functools.lru_cache(maxsize=256)
def _min_fill_order(hidden: tuple[int, ...], scopes: tuple[tuple[int, ...], ...], cards: tuple[int, ...]) -> tuple[int, ...]:
    """Greedy min-fill order of ``hidden`` (ties: the smaller table, then network order); cached,
    so rows of a batch with the same evidence nodes share one order."""
    nbr = {v: set() for v in hidden}
    for sc in scopes:
        for a in sc:
            nbr[a].update(b for b in sc if b != a)
    left = set(hidden)
    order = []
    while left:
        def key(v):
            ns = [u for u in nbr[v] if u in left]
            fill = sum(1 for a, b in itertools.combinations(ns, 2) if b not in nbr[a])
            return fill, math.prod(cards[u] for u in ns) * cards[v], v
        v = min(left, key=key)
        ns = [u for u in nbr[v] if u in left]
        for a, b in itertools.combinations(ns, 2):
            nbr[a].add(b)
            nbr[b].add(a)
        left.remove(v)
        order.append(v)
    return tuple(order)


def _aligned(scope: Sequence[int], arr: np.ndarray, union: Sequence[int], cards: Sequence[int]) -> np.ndarray:
    """``arr`` (axes in ``scope`` order) transposed and reshaped to broadcast over ``union``."""
    perm = sorted(range(len(scope)), key=lambda i: union.index(scope[i]))
    a = np.transpose(arr, perm) if perm else arr
    return a.reshape([cards[u] if u in scope else 1 for u in union])


def max_product(network: Network, probs: Mapping[str, np.ndarray], given: Mapping[str, str],
                soft: Mapping[str, Mapping[str, float]] | None = None) -> tuple[dict[str, int], float, float]:
    """Max-product variable elimination: ``(assignment {hidden node: state index}, log of the best
    value max_h P(h, hard evidence) x prod weights, number of assignments tied with it)``."""
    cards = network.cards
    gidx = {network.index(k): network.node(k).states.index(v) for k, v in given.items()}
    hidden = [i for i in range(len(network)) if i not in gidx]
    factors: list[tuple[tuple[int, ...], np.ndarray, np.ndarray]] = []  # (scope, log value, tie count)
    with np.errstate(divide="ignore"):
        for i, node in enumerate(network.nodes):
            scope = tuple(network.index(p) for p in node.parents) + (i,)
            table = np.log(np.asarray(probs[node.name], dtype=np.float64))
            sl = tuple(gidx[u] if u in gidx else slice(None) for u in scope)
            arr = np.asarray(table[sl], dtype=np.float64)
            factors.append((tuple(u for u in scope if u not in gidx), arr, np.ones_like(arr)))
        for name, ws in (soft or {}).items():
            i = network.index(name)
            w = np.log(np.array([float(ws.get(s, 0.0)) for s in network.node(name).states]))
            if i in gidx:  # a weight on a node also given hard: a constant factor
                factors.append(((), np.asarray(w[gidx[i]]), np.ones(())))
            else:
                factors.append(((i,), w, np.ones_like(w)))
    order = _min_fill_order(tuple(hidden), tuple(f[0] for f in factors), tuple(cards))
    trace = []
    tol = math.log1p(-TIE_TOL)
    for v in order:
        rel = [f for f in factors if v in f[0]]
        factors = [f for f in factors if v not in f[0]]
        union: list[int] = []
        for sc, _, _ in rel:
            union += [u for u in sc if u not in union]
        size = math.prod(cards[u] for u in union)
        if size > MAX_TABLE:
            raise OptionError(f"--explain: the search needs a table of {size:.3g} entries over "
                              f"{', '.join(network.names[u] for u in union)} (at most {MAX_TABLE}); give more evidence")
        total = sum(_aligned(sc, a, union, cards) for sc, a, _ in rel)
        count = math.prod(_aligned(sc, c, union, cards) for sc, _, c in rel) * np.ones(total.shape)
        ax = union.index(v)
        best = np.max(total, axis=ax, keepdims=True)
        with np.errstate(invalid="ignore"):
            tied = total >= best + tol
        cnt = np.sum(np.where(tied, count, 0.0), axis=ax)
        arg = np.argmax(total, axis=ax)
        rest = tuple(u for u in union if u != v)
        trace.append((v, rest, arg))
        factors.append((rest, np.squeeze(best, axis=ax), cnt))
    top = float(sum(np.asarray(a).reshape(()) for _, a, _ in factors)) if factors else 0.0
    ties = float(math.prod(float(np.asarray(c).reshape(())) for _, _, c in factors)) if factors else 1.0
    assign: dict[int, int] = {}
    for v, rest, arg in reversed(trace):
        assign[v] = int(arg[tuple(assign[u] for u in rest)])
    return {network.names[v]: assign[v] for v in hidden}, top, ties


def most_probable(network: Network, probs: Mapping[str, np.ndarray], given: Mapping[str, str],
                  soft: Mapping[str, Mapping[str, float]] | None = None) -> dict[str, Any]:
    """The most probable joint assignment of every node not in ``given``, with its probabilities.

    Returns ``{"assignment": {node: state}, "probability": P(assignment | evidence),
    "joint_probability": P(assignment, evidence), "p_evidence": P(evidence), "ties": k}`` where
    ``ties`` counts the assignments within 1e-12 (relative) of the best (one of them is
    returned). With soft evidence the joint probability and P(evidence) carry the weights
    (``sum/max of P(h, hard evidence) x weights``); the conditional probability does not depend
    on their scale.
    """
    from .impute import row_posteriors

    hidden = [v for v in network.names if v not in given]
    if not hidden:
        raise OptionError("--explain: every node is given; there is nothing to explain")
    assign, top, ties = max_product(network, probs, given, soft)
    if not math.isfinite(top):
        raise ImpossibleDataError("the evidence has probability 0 under the CPTs; there is no explanation")
    ll, _ = row_posteriors(network, probs, _codes(network, given)[None, :], weights=_weights(network, soft, 1))
    log_pe = float(ll[0])
    return {"assignment": {v: network.node(v).states[assign[v]] for v in hidden},
            "probability": min(1.0, math.exp(top - log_pe)), "joint_probability": math.exp(top),
            "p_evidence": math.exp(log_pe), "ties": int(round(ties))}


def format_joint(joint: Mapping[str, Any], given: Mapping[str, str], digits: int = 4,
                 soft: Mapping[str, Mapping[str, float]] | None = None) -> str:
    from .impute import evidence_text

    ev = evidence_text(given, soft)
    ts = joint["targets"]
    lines = [f"P({', '.join(ts)}" + (f" | {ev})" if ev else ")") + " jointly"]
    cells = [[r["states"][t] for t in ts] for r in joint["rows"]]
    widths = [max(len(t), *(len(c[j]) for c in cells)) for j, t in enumerate(ts)]
    lines.append("  " + "  ".join(t.ljust(w) for t, w in zip(ts, widths)) + "  probability")
    for c, r in zip(cells, joint["rows"]):
        lines.append("  " + "  ".join(s.ljust(w) for s, w in zip(c, widths)) + f"  {r['probability']:.{digits}f}")
    return "\n".join(lines)


def format_explanation(mpe: Mapping[str, Any], given: Mapping[str, str], digits: int = 4,
                       soft: Mapping[str, Mapping[str, float]] | None = None) -> str:
    from .impute import evidence_text

    ev = evidence_text(given, soft)
    lines = ["most probable state of every node not given" + (f" (given {ev})" if ev else "") + ":"]
    width = max(len(k) for k in mpe["assignment"])
    lines += [f"  {k:<{width}}  {v}" for k, v in mpe["assignment"].items()]
    lines.append(f"probability of this whole assignment: {mpe['probability']:.{digits}g}"
                 + (f" given the evidence (P(evidence) = {mpe['p_evidence']:.{digits}g})" if ev else ""))
    if mpe["ties"] > 1:
        lines.append(f"{mpe['ties']} assignments tie for the highest probability; one of them is shown")
    return "\n".join(lines)

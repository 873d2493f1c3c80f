"""Joint posteriors of several targets and the most probable explanation (``adfit query``).

* :func:`joint_posterior`: P(targets | evidence) over every combination of the targets' states,
  each combination scored exactly as one more row of evidence (variable elimination, through
  :func:`adfit.impute.row_posteriors`).
* :func:`most_probable`: the most probable joint assignment of every node not given (MPE), with
  P(assignment | evidence), by enumerating the hidden nodes' joint states in numpy (a joint
  probability is a product of CPT entries). Enumeration is exact but grows with the product of
  the hidden nodes' state counts, so it is refused above :data:`MAX_CONFIGS` with a one-line error.
"""

from __future__ import annotations

import itertools
import math
from typing import Any, Mapping, Sequence

import numpy as np

from .errors import ImpossibleDataError, OptionError
from .network import Network

MAX_JOINT = 100_000      # target combinations scored for a joint table
MAX_CONFIGS = 2_000_000  # hidden-node combinations enumerated for the MPE


def _codes(network: Network, given: Mapping[str, str]) -> np.ndarray:
    row = np.full(len(network), -1, dtype=np.int32)
    for node, state in given.items():
        row[network.index(node)] = network.node(node).states.index(state)
    return row


def joint_posterior(network: Network, probs: Mapping[str, np.ndarray], given: Mapping[str, str],
                    targets: Sequence[str]) -> dict[str, Any]:
    """``{"targets": [...], "rows": [{"states": {node: state}, "probability": p}, ...]}``, rows in table order.

    ``given`` and ``targets`` are assumed checked (as :func:`adfit.impute.query` does).
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
    ll, _ = row_posteriors(network, probs, codes)
    top = np.max(ll)
    if not math.isfinite(top):
        raise ImpossibleDataError("the evidence has probability 0 under the CPTs; no joint posterior exists")
    w = np.exp(ll - top)
    p = w / w.sum()
    rows = [{"states": {t: network.node(t).states[c[j]] for j, t in enumerate(targets)}, "probability": float(pj)}
            for c, pj in zip(combos, p)]
    return {"targets": list(targets), "rows": rows}


def most_probable(network: Network, probs: Mapping[str, np.ndarray], given: Mapping[str, str]) -> dict[str, Any]:
    """The most probable joint assignment of every node not in ``given``, with its probabilities.

    Returns ``{"assignment": {node: state}, "probability": P(assignment | evidence),
    "joint_probability": P(assignment, evidence), "p_evidence": P(evidence), "ties": k}`` where
    ``ties`` counts the assignments within 1e-12 (relative) of the best (the first in table order
    is returned).
    """
    hidden = [v for v in network.names if v not in given]
    if not hidden:
        raise OptionError("--explain: every node is given; there is nothing to explain")
    cards = [network.node(v).card for v in hidden]
    n = int(np.prod(cards, dtype=np.float64))
    if n > MAX_CONFIGS:
        raise OptionError(f"--explain: {n:.3g} joint states of the {len(hidden)} hidden nodes to search "
                          f"(at most {MAX_CONFIGS}); give more evidence")
    n = int(n)
    # codes of every node in every configuration: hidden ones enumerated, given ones fixed
    grids = np.indices(cards).reshape(len(hidden), -1) if hidden else np.zeros((0, 1), dtype=int)
    code = {}
    for v, s in given.items():
        code[v] = np.full(n, network.node(v).states.index(s))
    for j, v in enumerate(hidden):
        code[v] = grids[j]
    with np.errstate(divide="ignore"):
        logp = np.zeros(n)
        for node in network.nodes:
            table = np.log(np.asarray(probs[node.name], dtype=np.float64))
            idx = tuple(code[p] for p in node.parents) + (code[node.name],)
            logp += table[idx]
    top = float(np.max(logp))
    if not math.isfinite(top):
        raise ImpossibleDataError("the evidence has probability 0 under the CPTs; there is no explanation")
    log_pe = top + math.log(float(np.sum(np.exp(logp - top))))
    best = int(np.argmax(logp))
    ties = int(np.sum(logp >= top + math.log1p(-1e-12)))
    return {"assignment": {v: network.node(v).states[int(code[v][best])] for v in hidden},
            "probability": math.exp(top - log_pe), "joint_probability": math.exp(top),
            "p_evidence": math.exp(log_pe), "ties": ties}


def format_joint(joint: Mapping[str, Any], given: Mapping[str, str], digits: int = 4) -> str:
    ev = ", ".join(f"{k}={v}" for k, v in given.items())
    ts = joint["targets"]
    lines = [f"P({', '.join(ts)}" + (f" | {ev})" if ev else ")") + " jointly"]
    cells = [[r["states"][t] for t in ts] for r in joint["rows"]]
    widths = [max(len(t), *(len(c[j]) for c in cells)) for j, t in enumerate(ts)]
    lines.append("  " + "  ".join(t.ljust(w) for t, w in zip(ts, widths)) + "  probability")
    for c, r in zip(cells, joint["rows"]):
        lines.append("  " + "  ".join(s.ljust(w) for s, w in zip(c, widths)) + f"  {r['probability']:.{digits}f}")
    return "\n".join(lines)


def format_explanation(mpe: Mapping[str, Any], given: Mapping[str, str], digits: int = 4) -> str:
    ev = ", ".join(f"{k}={v}" for k, v in given.items())
    lines = ["most probable state of every node not given" + (f" (given {ev})" if ev else "") + ":"]
    width = max(len(k) for k in mpe["assignment"])
    lines += [f"  {k:<{width}}  {v}" for k, v in mpe["assignment"].items()]
    lines.append(f"probability of this whole assignment: {mpe['probability']:.{digits}g}"
                 + (f" given the evidence (P(evidence) = {mpe['p_evidence']:.{digits}g})" if ev else ""))
    if mpe["ties"] > 1:
        lines.append(f"{mpe['ties']} assignments tie for the highest probability; the first is shown")
    return "\n".join(lines)

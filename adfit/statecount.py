"""Choosing the number of states of a latent node (``adfit fit --latent-states NODE=2..6``).

For each candidate number of states K the network is rebuilt with the latent node given K
states (:func:`with_states`), fitted with its restarts, and scored by AIC and BIC
(:func:`adfit.gaps.information_criteria`, the same figures a plain fit stores); the candidate
with the lowest BIC is chosen. For each candidate the relative entropy of the posterior class
memberships is given as a class-separation figure (Ramaswamy, DeSarbo, Reibstein & Robinson
1993, *Marketing Science* 12(1)):

    E_K = 1 - sum_i sum_k -p_ik ln p_ik / (n ln K)

where p_ik is the posterior probability that record i is in state k of the node given its
observed cells (the fitted CPTs), and n the number of records (weighted by their counts). E is
1 when every record is assigned to one state with certainty and 0 when every posterior is
uniform. It is defined for latent class models (one latent root, observed items); for any
other network with a latent node it is computed the same way and says how sharply the records
pick a state of that node.

State names for candidate K: the node's declared names when K equals their number, otherwise
``c1 .. cK`` (:func:`state_names`).

The table is stored in the result under ``"latent_states"`` (:func:`section`).
"""

from __future__ import annotations

import dataclasses
import math
import re
from typing import Any, Callable, Mapping, Sequence

import numpy as np

from .errors import OptionError
from .network import Network

MAX_STATES = 50      # most states a candidate may have
MAX_CANDIDATES = 20  # most candidates in one sweep
CRITERION = "bic"

_RANGE = re.compile(r"^\s*(\d+)\s*\.\.\s*(\d+)\s*$")


def parse_spec(text: str, network: Network | None = None) -> tuple[str, tuple[int, ...]]:
    """``"NODE=2..6"`` (a range), ``"NODE=2,3,5"`` (a list) or ``"NODE=3"`` -> ``(node, (2, 3, ...))``.

    Raises:
        OptionError: malformed text, a count below 2 or above :data:`MAX_STATES`, too many
            candidates; with ``network``, a node that cannot be swept (:func:`check_node`).
    """
    opt = "--latent-states"
    if "=" not in text:
        raise OptionError(f"{opt} {text!r}: write NODE=FIRST..LAST (e.g. {opt} class=2..6) or NODE=2,3,5")
    node, spec = (s.strip() for s in text.split("=", 1))
    if not node or not spec:
        raise OptionError(f"{opt} {text!r}: write NODE=FIRST..LAST with both parts, e.g. {opt} class=2..6")
    m = _RANGE.match(spec)
    try:
        if m:
            lo, hi = int(m.group(1)), int(m.group(2))
            if lo > hi:
                raise OptionError(f"{opt} {text!r}: the range {lo}..{hi} is empty; write the smaller count first")
            ks = list(range(lo, hi + 1))
        else:
            ks = [int(x) for x in spec.split(",")]
    except ValueError:
        raise OptionError(f"{opt} {text!r}: the counts must be whole numbers, as in {node}=2..6 or {node}=2,3,5") from None
    ks = sorted(set(ks))
    if ks[0] < 2:
        raise OptionError(f"{opt} {text!r}: a node needs at least 2 states; start the counts at 2")
    if ks[-1] > MAX_STATES:
        raise OptionError(f"{opt} {text!r}: at most {MAX_STATES} states per candidate")
    if len(ks) > MAX_CANDIDATES:
        raise OptionError(f"{opt} {text!r}: {len(ks)} candidates; give at most {MAX_CANDIDATES}")
    if network is not None:
        check_node(network, node)
    return node, tuple(ks)


def check_node(network: Network, node: str) -> None:
    """Refuse a node whose number of states cannot be varied: not a node, not latent, a fixed or
    structured table, or a child whose table is fixed, structured or tied (its shape would change)."""
    opt = f"--latent-states {node}"
    if node not in network:
        raise OptionError(f"{opt}: {node!r} is not a node of the network; the latent nodes are: "
                          f"{', '.join(network.latent_names) or 'none'}")
    n = network.node(node)
    if not n.latent:
        raise OptionError(f"{opt}: {node!r} is observed (its states come from the records); only a latent node's "
                          f"number of states can be chosen (latent nodes: {', '.join(network.latent_names) or 'none'})")
    if n.fixed is not None:
        raise OptionError(f"{opt}: the node's CPT is fixed in the network file; remove 'fixed' to estimate it")
    if n.cpd != "table" or n.tied_to is not None or n.impossible or n.increasing_with:
        raise OptionError(f"{opt}: the node has a structured CPT (cpd, tied_to, impossible or increasing_with); "
                          f"only a plain table can change its number of states")
    for m in network.nodes:
        if m.tied_to == node:
            raise OptionError(f"{opt}: node {m.name!r} is tied to it; untie it to vary the number of states")
        if node in m.parents:
            if m.fixed is not None:
                raise OptionError(f"{opt}: its child {m.name!r} has a fixed CPT, whose shape depends on the "
                                  f"number of states; remove 'fixed' from {m.name!r}")
            if m.cpd != "table" or m.tied_to is not None or m.impossible or node in m.increasing_with:
                raise OptionError(f"{opt}: its child {m.name!r} has a structured CPT (cpd, tied_to, impossible or "
                                  f"increasing_with); only plain tables can change shape")


def state_names(declared: Sequence[str], k: int) -> tuple[str, ...]:
    """The declared names when there are ``k`` of them, otherwise ``c1 .. ck``."""
    return tuple(declared) if len(declared) == k else tuple(f"c{i}" for i in range(1, k + 1))


def with_states(network: Network, node: str, k: int) -> Network:
    """``network`` with ``node`` given ``k`` states (:func:`state_names`); nothing else changes."""
    n = network.node(node)
    new = dataclasses.replace(n, states=state_names(n.states, k))
    return Network(tuple(new if m.name == node else m for m in network.nodes))


def relative_entropy(posterior: np.ndarray, counts: np.ndarray) -> float:
    """E = 1 - sum_i w_i sum_k -p_ik ln p_ik / (n ln K), n = sum_i w_i (Ramaswamy et al. 1993).

    Args:
        posterior: ``(rows, K)`` posterior class probabilities, rows summing to 1.
        counts: ``(rows,)`` weight of each row (records per distinct row).
    """
    p = np.asarray(posterior, dtype=np.float64)
    w = np.asarray(counts, dtype=np.float64)
    k = p.shape[1]
    with np.errstate(divide="ignore", invalid="ignore"):
        plogp = np.where(p > 0, p * np.log(p), 0.0)
    h = -(w[:, None] * plogp).sum()
    return float(1.0 - h / (w.sum() * math.log(k)))


def class_separation(network: Network, probs: Mapping[str, np.ndarray], data: Any, node: str) -> float:
    """The relative entropy of the posterior of ``node`` over the records of ``data`` (CodedData)."""
    from .impute import row_posteriors

    _, post = row_posteriors(network, probs, np.asarray(data.codes))
    return relative_entropy(post[node], np.asarray(data.counts))


def sweep(network: Network, data: Any, node: str, ks: Sequence[int], *,
          fit_one: Callable[[Network, int], Any]) -> tuple[Any, dict[str, Any]]:
    """Fit every candidate and choose by BIC.

    Args:
        fit_one: ``(network with k states, k) -> FitResult`` (the caller's fit, with its restarts
            and settings).

    Returns:
        ``(the chosen candidate's FitResult, the section stored under "latent_states")``.
    """
    from .gaps import information_criteria

    check_node(network, node)
    rows, results = [], {}
    for k in ks:
        net_k = with_states(network, node, k)
        res = fit_one(net_k, k)
        ic = information_criteria(net_k, data, res)
        sep = class_separation(net_k, res.probs, data, node)
        starts = (res.extras.get("restarts") or {}).get("n_starts", 1) if isinstance(res.extras.get("restarts"), dict) else 1
        rows.append({"states": int(k), "state_names": list(net_k.node(node).states),
                     "log_likelihood": ic.log_likelihood, "n_parameters": ic.n_parameters,
                     "aic": ic.aic, "bic": ic.bic, "relative_entropy": sep,
                     "converged": bool(res.converged), "starts": int(starts)})
        results[k] = res
    finite = [r for r in rows if math.isfinite(r["bic"])]
    best = min(finite or rows, key=lambda r: (r["bic"], r["states"]))
    for r in rows:
        r["chosen"] = r is best
    n = information_criteria(with_states(network, node, ks[0]), data, results[ks[0]]).n_effective
    sec = section(node, rows, best["states"], n, results[best["states"]].objective)
    return results[best["states"]], sec


def section(node: str, rows: list[dict[str, Any]], chosen: int, n: float, objective: str) -> dict[str, Any]:
    """The ``"latent_states"`` section of a result file."""
    return {"node": node, "criterion": CRITERION, "chosen": int(chosen), "n_effective": float(n),
            "objective": objective, "candidates": rows,
            "definitions": ("AIC = -2 log L + 2k; BIC = -2 log L + k ln n (k free parameters, n records with at "
                            "least one observed cell); relative_entropy = 1 - sum_i sum_k -p_ik ln p_ik / (n ln K), "
                            "p_ik the posterior of state k for record i (Ramaswamy et al. 1993); the candidate with "
                            "the lowest BIC is chosen; state names: the declared ones when their number matches, "
                            "else c1..cK")}


def format_table(sec: Mapping[str, Any]) -> str:
    """The candidates as a plain text table, the chosen one marked."""
    head = ["states", "log-lik", "params", "AIC", "BIC", "entropy", ""]
    rows = []
    for r in sec["candidates"]:
        rows.append([str(r["states"]), f"{r['log_likelihood']:.3f}", str(r["n_parameters"]), f"{r['aic']:.3f}",
                     f"{r['bic']:.3f}", f"{r['relative_entropy']:.3f}",
                     ("<- lowest BIC" if r.get("chosen") else "") + ("" if r.get("converged", True) else " (not converged)")])
    widths = [max(len(h), *(len(x[i]) for x in rows)) for i, h in enumerate(head)]
    lines = [f"number of states of {sec['node']} (chosen by BIC: {sec['chosen']})",
             "  ".join(h.rjust(w) for h, w in zip(head, widths)).rstrip()]
    lines += ["  ".join(c.rjust(w) if i < 6 else c for i, (c, w) in enumerate(zip(r, widths))).rstrip() for r in rows]
    lines.append("entropy: relative entropy of the posterior states (1 = every record assigned with certainty, "
                 "0 = no separation); BIC decides, the entropy only describes")
    if sec.get("objective") == "map":
        lines.append("the fits are MAP: log L is taken at the posterior mode")
    return "\n".join(lines)

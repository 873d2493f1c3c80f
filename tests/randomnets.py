"""Seeded random networks, CPTs and incomplete records for the property tests (test data only).

The oracles they are checked against (brute-force enumeration of every completion) live in the
test modules.
"""

from __future__ import annotations

import numpy as np

from adfit.data import HIDDEN, CodedData, reduce_rows
from adfit.network import network_from_dict


def random_network(rng, n, max_parents=3, p_latent=0.25, p_edge=0.45):
    """``n`` nodes of 2-3 states; each earlier node is a parent with chance ``p_edge`` (the first
    ``max_parents`` kept); each node latent with chance ``p_latent``."""
    d = {}
    for i in range(n):
        k = int(rng.integers(2, 4))
        pa = [f"v{j}" for j in range(i) if rng.random() < p_edge][:max_parents]
        d[f"v{i}"] = {"states": [f"s{t}" for t in range(k)], "parents": pa,
                      "latent": bool(rng.random() < p_latent)}
    return network_from_dict(d)


def random_probs(net, rng):
    return {n.name: rng.dirichlet(np.ones(n.card), size=net.cpt_shape(n.name)[:-1]) for n in net.nodes}


def random_rows(net, rng, n_rows, p_missing):
    """``n_rows`` records, each cell missing with chance ``p_missing`` (latent nodes always),
    weights 1-3, reduced to distinct rows."""
    x = np.array([[int(rng.integers(0, c)) if not net.nodes[i].latent and rng.random() > p_missing else HIDDEN
                   for i, c in enumerate(net.cards)] for _ in range(n_rows)], dtype=np.int32)
    d, c, _ = reduce_rows(x, rng.integers(1, 4, n_rows).astype(float), net.cards)
    return CodedData(d, c)


def latent_case(seed: int, missing: tuple[float, float] = (0.05, 0.3)):
    """A random small network with at least one latent node and one observed node (3-5 nodes,
    2-3 states, random CPTs) and 60-160 records drawn from it: cells missing completely at random
    (even seeds) or at random given the first observed node, which is always recorded (odd seeds),
    with a chance drawn uniformly from ``missing`` (heavy gaps: e.g. ``(0.3, 0.6)``)."""
    rng = np.random.default_rng(seed)
    while True:
        net = random_network(rng, int(rng.integers(3, 6)), p_latent=0.3)
        if any(n.latent for n in net.nodes) and net.free_names and not all(n.latent for n in net.nodes):
            break
    n_rows = int(rng.integers(60, 160))
    p = float(rng.uniform(*missing))
    # records drawn from the network itself, with random CPTs (ancestral sampling)
    probs = random_probs(net, rng)
    x = np.zeros((n_rows, len(net.nodes)), dtype=np.int32)
    for i, node in enumerate(net.nodes):
        pa = [net.index(q) for q in node.parents]
        table = probs[node.name].reshape(-1, node.card)
        row = np.zeros(n_rows, dtype=np.int64)
        for j in pa:
            row = row * net.cards[j] + x[:, j]
        u = rng.random(n_rows)
        x[:, i] = np.minimum((u[:, None] > np.cumsum(table[row], axis=1)).sum(1), node.card - 1)
    obs = [i for i, n in enumerate(net.nodes) if not n.latent]
    first = obs[0]
    hidden = np.zeros_like(x, dtype=bool)
    for i, n in enumerate(net.nodes):
        if n.latent:
            hidden[:, i] = True
        elif seed % 2 == 0 or i == first:
            hidden[:, i] = rng.random(n_rows) < p                      # MCAR
        else:
            # MAR: the chance depends on the first observed node's (recorded) value
            pm = np.where(x[:, first] == 0, p / 2, min(0.9, 2 * p))
            hidden[:, i] = rng.random(n_rows) < pm
    if seed % 2 == 1:
        hidden[:, first] = False
    x[hidden] = HIDDEN
    d, c, _ = reduce_rows(x, rng.integers(1, 4, n_rows).astype(float), net.cards)
    return net, CodedData(d, c)

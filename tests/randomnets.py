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

"""Synthetic workloads shared by the benchmark scripts (seeded, so figures are reproducible).

These are random networks and random CPTs generated here: they measure speed, not accuracy.
"""

from __future__ import annotations

import numpy as np

from adfit.data import HIDDEN, CodedData, reduce_rows
from adfit.network import Network, network_from_dict


def local_network(n_nodes: int = 37, max_parents: int = 3, window: int = 4, states=(2, 4), seed: int = 0,
                  n_latent: int = 0) -> Network:
    """Random DAG: each node draws up to ``max_parents`` parents among the ``window`` previous
    nodes (a banded structure keeps the treewidth small, about ``window``)."""
    rng = np.random.default_rng(seed)
    d = {}
    for i in range(n_nodes):
        k = int(rng.integers(states[0], states[1] + 1))
        cand = list(range(max(0, i - window), i))
        m = int(rng.integers(0, min(max_parents, len(cand)) + 1)) if cand else 0
        pa = sorted(rng.choice(cand, size=m, replace=False).tolist()) if m else []
        d[f"x{i:03d}"] = {"states": [f"s{j}" for j in range(k)], "parents": [f"x{j:03d}" for j in pa]}
    for j in rng.choice(n_nodes, size=n_latent, replace=False) if n_latent else []:
        d[f"x{j:03d}"]["latent"] = True
    return network_from_dict(d)


def random_cpts(net: Network, seed: int = 1, conc: float = 1.0) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(seed)
    return {n.name: rng.dirichlet(np.full(n.card, conc), size=net.cpt_shape(n.name)[:-1]) for n in net.nodes}


def sample(net: Network, probs, n_rows: int, seed: int = 2) -> np.ndarray:
    """Forward sampling: int32 codes (n_rows, n_nodes), all observed."""
    rng = np.random.default_rng(seed)
    x = np.zeros((n_rows, len(net)), dtype=np.int32)
    for i, node in enumerate(net.nodes):
        pa = [net.index(p) for p in node.parents]
        t = probs[node.name].reshape(-1, node.card)
        if pa:
            idx = np.ravel_multi_index(tuple(x[:, j] for j in pa), net.cpt_shape(node.name)[:-1])
        else:
            idx = np.zeros(n_rows, dtype=np.int64)
        cum = np.cumsum(t[idx], axis=1)
        u = rng.random(n_rows)[:, None]
        x[:, i] = np.minimum((u > cum).sum(axis=1), node.card - 1)
    return x


def mask_mcar(net: Network, x: np.ndarray, rate: float, columns=None, seed: int = 3) -> np.ndarray:
    rng = np.random.default_rng(seed)
    x = x.copy()
    cols = range(x.shape[1]) if columns is None else columns
    for j in cols:
        x[rng.random(len(x)) < rate, j] = HIDDEN
    for j, node in enumerate(net.nodes):
        if node.latent:
            x[:, j] = HIDDEN
    return x


def coded(net: Network, x: np.ndarray) -> CodedData:
    d, c, inv = reduce_rows(x, None, net.cards)
    return CodedData(d, c, inv, "<synthetic>")


def latent_class_workload(n_rows: int = 100_000, n_classes: int = 4, n_items: int = 20, separation: float = 0.15,
                          seed: int = 7) -> tuple[Network, CodedData]:
    """Latent class model built to be hard for EM (much missing information), yet identified.

    A latent root ``cls`` (``n_classes`` states, equal sizes) and ``n_items`` binary items
    ``i00``, ``i01``, ... with parent ``cls``; P(item = 1 | class) = 0.5 ± ``separation``, the
    sign drawn at random per class and item, so the classes overlap. Responses are missing by a
    three-form planned-missingness design (common in survey practice): the first quarter of the
    items goes to everyone, the other items form three equal blocks, and each record gets one of
    three forms at random, each form leaving out one block (a quarter of the responses missing,
    completely at random). Seeded: the same call gives the same data.
    """
    if n_items % 4:
        raise ValueError("n_items must be a multiple of 4 (a common block and three form blocks)")
    nodes: dict = {"cls": {"states": [f"k{i}" for i in range(n_classes)], "latent": True}}
    nodes |= {f"i{j:02d}": {"states": ["0", "1"], "parents": ["cls"]} for j in range(n_items)}
    net = network_from_dict(nodes)
    rng = np.random.default_rng(seed)
    p1 = 0.5 + separation * rng.choice([-1.0, 1.0], size=(n_classes, n_items))
    truth = {"cls": np.full(n_classes, 1.0 / n_classes)}
    truth |= {f"i{j:02d}": np.stack([1.0 - p1[:, j], p1[:, j]], axis=1) for j in range(n_items)}
    x = sample(net, truth, n_rows, seed=seed + 1)
    block = n_items // 4
    form = np.random.default_rng(seed + 2).integers(0, 3, n_rows)
    for f in range(3):
        cols = 1 + block * (1 + f) + np.arange(block)  # column 0 is cls
        x[np.ix_(form == f, cols)] = HIDDEN
    x[:, 0] = HIDDEN
    return net, coded(net, x)

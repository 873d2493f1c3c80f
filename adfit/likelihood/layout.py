"""Per-network statics and the flat layout of the log-CPTs.

``layout_of`` gives each node's offset in the one flat vector the core takes and returns (all
CPTs raveled in node order); ``_flat``/``_unflat`` convert between it and per-node tables;
``_logsumexp_last`` is the max-shifted log-sum-exp every evaluation uses.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Sequence

from .._jax import jax, jnp  # float64 on before anything else (adfit/_jax.py)
from ..network import Network


@dataclass(frozen=True)
class _Statics:
    cards: tuple[int, ...]
    parents: tuple[tuple[int, ...], ...]
    children: tuple[tuple[int, ...], ...]
    names: tuple[str, ...] = ()


_STATICS: dict[int, tuple[Network, _Statics]] = {}


def _st(network: Network) -> _Statics:
    """Cards, parents, children and names of a network (the Network properties rebuild them per call).

    Keyed by identity: hashing a Network hashes every node, which is slow for large networks."""
    hit = _STATICS.get(id(network))
    if hit is None or hit[0] is not network:
        hit = _STATICS[id(network)] = (network, _Statics(network.cards, network.parent_indices, network.children,
                                                               network.names))
    return hit[1]


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


_LAYOUTS: dict[int, tuple[Network, Any]] = {}


def layout_of(network: Network):
    hit = _LAYOUTS.get(id(network))
    if hit is None or hit[0] is not network:
        hit = _LAYOUTS[id(network)] = (network, _layout(network))
    return hit[1]


def layout_size(network: Network) -> int:
    return layout_of(network)[2]

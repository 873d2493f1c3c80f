"""Posterior marginals of every node per row (``posterior_marginals``), with hard or soft evidence,
by the gradient of the uniform elimination.
"""

from __future__ import annotations

from functools import partial
from typing import Mapping

import numpy as np

from .._jax import jax, jnp  # float64 on before anything else (adfit/_jax.py)
from ..data import CodedData
from ..network import Network
from .api import logcpts_from_probs
from .blocks import GroupPlan
from .evaluation import _group_rows_loglik
from .layout import _st
from .plan import build_plan


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

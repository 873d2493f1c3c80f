"""Minibatch Adam for very large data: stochastic gradients from sampled distinct rows.

Each step draws ``batch_size`` distinct rows with probability proportional to their counts and
weights each by ``N / batch_size``, so the minibatch log-likelihood is an unbiased estimate of
the full one (and its gradient of the full gradient). All batches share one elimination plan in
which every non-latent node carries an evidence indicator, so any rows fit the same compiled
program (no recompilation per batch). After the last step the full-data value and gradient norm
are computed exactly and reported: a minibatch run is ``converged`` only if the full-data
stopping rule holds there.
"""

from __future__ import annotations

import math
from typing import Callable, Mapping

from ._jax import jnp  # first: float64 on before optax (adfit/_jax.py)
import numpy as np
import optax

from .data import HIDDEN, CodedData
from .errors import OptionError
from .likelihood import _group_plan
from .network import Network


def minibatch_plan(network: Network, batch_size: int):
    """One uniform group whose plan serves any batch of ``batch_size`` rows."""
    n = len(network)
    hidden = np.zeros((1, n), dtype=bool)
    for i, node in enumerate(network.nodes):
        hidden[0, i] = node.latent
    observed = [i for i, node in enumerate(network.nodes) if not node.latent]
    gp = _group_plan(network, hidden, kind="mixed", n_rows=batch_size, indicator_nodes=observed)
    chunk = min(gp.chunk, batch_size)
    n_chunks = -(-batch_size // chunk)
    return gp.__class__(**{**gp.__dict__, "chunk": chunk}), n_chunks


def run_minibatch(fitter, logits0: Mapping[str, np.ndarray], *, batch_size: int, max_iter: int,
                  learning_rate: float, seed: int,
                  progress: Callable[[int, float, float], None] | None = None):
    """Adam on minibatch gradients; returns (logits, history_objective, history_gradnorm).

    The objective history holds the minibatch estimates of F (noisy by construction); the last
    entry is replaced by the exact full-data value by the caller.
    """
    from .params import objective_fg as _objective_fg  # the same compiled pieces as the full-data fit

    if batch_size < 1:
        raise OptionError(f"--batch-size must be >= 1, got {batch_size}")
    from .limits import check_batch_size

    check_batch_size(batch_size, len(fitter.network))  # before the plan: a huge batch is refused at once
    network = fitter.network
    data: CodedData = fitter.data
    gp, n_chunks = minibatch_plan(network, batch_size)
    groups = (gp,)
    rng = np.random.default_rng(seed)
    p = data.counts / data.counts.sum()
    N = fitter.n_total
    B = n_chunks * gp.chunk
    lay = fitter.layout  # the optimiser works on one flat vector (adfit.params.FreeLayout)
    z = lay.flatten(logits0)
    ones = np.ones(lay.size)
    pseudo = jnp.asarray(fitter.pseudo_flat)
    # the step size decays (cosine, to 1 % of the start) so that the noise of the minibatch
    # gradients averages out towards the end of the run
    opt = optax.adam(optax.cosine_decay_schedule(learning_rate, max_iter, alpha=0.01))
    state = opt.init(z)
    hist_obj, hist_gn = [], []
    l2 = jnp.asarray(float(fitter.settings.l2))
    n_total = jnp.asarray(N)
    for it in range(1, max_iter + 1):
        idx = rng.choice(len(p), size=batch_size, p=p)
        codes = data.codes[idx]
        w = np.full(batch_size, N / batch_size)
        if B > batch_size:  # pad to whole chunks with weight 0
            codes = np.concatenate([codes, np.full((B - batch_size, codes.shape[1]), HIDDEN, codes.dtype)])
            w = np.concatenate([w, np.zeros(B - batch_size)])
        # int32 for the program, which computes flat indices from the codes (int8 would wrap)
        c = jnp.asarray(codes.reshape(n_chunks, gp.chunk, -1).astype(np.int32))
        ww = jnp.asarray(w.reshape(n_chunks, gp.chunk))
        f, g = _objective_fg(network, groups, z, ones, pseudo, fitter.fixed_flat, l2, n_total, (c,), (ww,))
        updates, state = opt.update(g, state, z)
        z = np.asarray(optax.apply_updates(z, updates))
        obj = -f * N
        gn = math.sqrt(float(np.dot(N * g, N * g)))
        hist_obj.append(obj)
        hist_gn.append(gn)
        if progress is not None:
            progress(it, obj, gn)
    return lay.unflatten(z), hist_obj, hist_gn

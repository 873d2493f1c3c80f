"""The compiled evaluations of a plan: log-likelihood, value and expected counts (the gradient with
respect to the log-CPTs) as one ``lax.scan`` over chunks per block, and per-row log-likelihoods.
"""

from __future__ import annotations

import math
from functools import partial
from typing import Any, Mapping, Sequence

import numpy as np

from .._jax import jax, jnp  # float64 on before anything else (adfit/_jax.py)
from ..network import Network
from .barren import _is_widened, _plan_flat, _widen_flat
from .blocks import EnumBlock, FactorSpec, GatheredBlock, GroupPlan, TapeBlock
from .layout import _logsumexp_last, _st, _unflat
from .sharding import _parts, _run_parts, _traced


# --------------------------------------------------------------------------- the computation
def _safe_weighted(ll: jax.Array, w: jax.Array) -> jax.Array:
    return jnp.sum(jnp.where(w > 0, w * ll, 0.0))


def _enum_rows(flat: jax.Array, idx: jax.Array) -> jax.Array:
    """log sum over assignments of the product of gathered entries: (instances,)."""
    return _logsumexp_last(jnp.sum(flat[idx], axis=-1), axis=-1)


def _tape_rows(blk: TapeBlock, flat: jax.Array, progs, pid, base, icodes) -> jax.Array:
    """Run the elimination programs of one chunk of instances; returns their log-likelihoods.

    ``pid`` (rows,) program of each instance, ``base`` (rows, n_fac + 1) its observed part of each
    log-CPT index, ``icodes`` (rows, n_icodes + 1) its codes of the indicator nodes.
    """
    leaf_off, leaf_fac, ind_code, ind_state, items, finals = progs
    rows = base.shape[0]
    shared = blk.n_programs == 1
    pick = (lambda t: t[0][None]) if shared else (lambda t: jnp.take(t, pid, axis=0))
    leaves = flat[pick(leaf_off) + jnp.take_along_axis(base, jnp.broadcast_to(pick(leaf_fac), (rows, blk.n_leaf)), axis=1)]
    ic = jnp.take_along_axis(icodes, jnp.broadcast_to(pick(ind_code), (rows, blk.n_ind)), axis=1)
    ind = jnp.where((ic == pick(ind_state)) | (ic < 0), 0.0, -jnp.inf)
    buf = jnp.concatenate([leaves, ind, jnp.zeros((rows, 1)), jnp.full((rows, 1), -jnp.inf),
                           jnp.zeros((rows, blk.n_batch * blk.width))], axis=1)
    k = blk.width * blk.slots * blk.ops

    def body(buf, xs):
        ib, b = xs                                   # ib: (programs, width, slots, ops)
        if shared:
            g = jnp.take(buf, ib[0].reshape(-1), axis=1)
        else:
            g = jnp.take_along_axis(buf, jnp.take(ib.reshape(-1, k), pid, axis=0), axis=1)
        g = g.reshape(rows, blk.width, blk.slots, blk.ops)
        out = _logsumexp_last(jnp.sum(g, axis=3), axis=2)    # (rows, width)
        return jax.lax.dynamic_update_slice(buf, out, (0, blk.start + b * blk.width)), None

    buf, _ = jax.lax.scan(body, buf, (items, jnp.arange(blk.n_batch)))
    fin = jnp.broadcast_to(pick(finals), (rows, blk.n_final))
    return jnp.sum(jnp.take_along_axis(buf, fin, axis=1), axis=1)


def _enum_value_and_grad(flat: jax.Array, xs) -> tuple[jax.Array, jax.Array]:
    """Value and gradient (w.r.t. ``flat``) of one enumeration chunk, the gradient written out:
    the posterior of each assignment times the weight, added to every entry it read."""
    idx, w = xs
    t = jnp.sum(flat[idx], axis=-1)                          # (chunk, A)
    m = jnp.max(t, axis=-1, keepdims=True)
    m = jnp.where(jnp.isfinite(m), m, 0.0)
    e = jnp.exp(t - m)
    s = jnp.sum(e, axis=-1, keepdims=True)
    ok = s > 0
    safe = jnp.where(ok, s, 1.0)
    v = jnp.where(ok[:, 0], jnp.log(safe[:, 0]) + m[:, 0], -jnp.inf)
    p = jnp.where(ok, e / safe, 0.0) * jnp.where(w > 0, w, 0.0)[:, None]
    g = jnp.zeros_like(flat).at[idx.reshape(-1)].add(jnp.broadcast_to(p[..., None], idx.shape).reshape(-1))
    return _safe_weighted(v, w), g


def _block_chunks(blk, arrays, weights, network: Network | None = None):
    """(xs for lax.scan over the chunks, chunk function (flat, xs) -> weighted log-likelihood)."""
    if isinstance(blk, GroupPlan):
        # a plain elimination group over coded rows (the layout of adfit.minibatch): the
        # per-step contraction, with rows of codes (chunk, n_nodes) as data
        cards = _st(network).cards

        def f(flat, xs):
            cc, w = xs
            return _safe_weighted(_group_rows_loglik(blk, cards, _unflat(network, flat), cc), w)
        return (arrays, weights), f
    if isinstance(blk, EnumBlock):
        def f(flat, xs):
            idx, w = xs
            return _safe_weighted(_enum_rows(flat, idx), w)
        return (arrays, weights), f
    progs, (pid, base, icodes) = arrays

    def f(flat, xs):
        p, b, ic, w = xs
        return _safe_weighted(_tape_rows(blk, flat, progs, p, b, ic), w)
    return (pid, base, icodes, weights), f


def _gathered_value(flat: jax.Array, counts: jax.Array) -> jax.Array:
    return jnp.sum(jnp.where(counts > 0, counts * flat, 0.0))


def _loglik_part(network: Network, groups: tuple, flat: jax.Array, codes: tuple, weights: tuple) -> jax.Array:
    total = jnp.zeros((), jnp.float64)
    for blk, arr, w in zip(groups, codes, weights):
        if isinstance(blk, GatheredBlock):
            total = total + _gathered_value(flat, w)
            continue
        xs, f = _block_chunks(blk, arr, w, network)
        fc = jax.checkpoint(f)

        def body(acc, x, fc=fc):
            return acc + fc(flat, x), None

        val, _ = jax.lax.scan(body, jnp.zeros((), jnp.float64), xs)
        total = total + val
    return total


@partial(jax.jit, static_argnums=(0, 1))
def _loglik_logcpt(network: Network, groups: tuple, logcpts: tuple[jax.Array, ...],
                   codes, weights) -> jax.Array:
    """Weighted total log-likelihood; differentiable in both modes (chunks are recomputed in the
    backward pass, so memory stays that of one chunk). ``codes``/``weights``: a :class:`Shards`
    (``Likelihood._codes``) or one part of it; the parts run one after the other here."""
    flat = _plan_flat(groups, logcpts)
    total = jnp.zeros((), jnp.float64)
    for cs, ws in _parts(codes, weights):
        total = total + _loglik_part(network, groups, flat, cs, ws)
    return total


def _flat_logcpts(logcpts: Sequence[Any]):
    """The log-CPTs of all nodes in one vector (network order, each CPT raveled), without the two
    constant slots :func:`_flat` appends: numpy when the inputs are concrete, traced otherwise."""
    if _traced(tuple(logcpts)):
        return jnp.concatenate([jnp.ravel(x) for x in logcpts])
    return np.concatenate([np.ravel(np.asarray(x, dtype=np.float64)) for x in logcpts])


def _value_and_expected_counts(network: Network, groups: tuple, logcpts: Sequence[jax.Array],
                               codes, weights):
    """Total log-likelihood and its gradient w.r.t. the log-CPTs (= expected family counts).

    Each chunk's value and gradient are computed and accumulated inside ``lax.scan``, so the
    memory is one chunk's, whatever the number of rows. The parts of a :class:`Shards` run in
    threads, one per core (one after the other when the call is traced, e.g. under ``vmap``).
    The compiled program returns the gradient as one flat vector; it is cut into CPT-shaped
    arrays here (numpy views when the call is not traced): XLA compiles every sliced output as a
    kernel of its own, which cost 0.5 s of compile time for 37 nodes.
    """
    val, g = _value_and_flat_expected_counts(network, groups, _flat_logcpts(logcpts), codes, weights)
    return val, _unflat(network, g)


def _value_and_flat_expected_counts(network: Network, groups: tuple, lc_flat, codes, weights):
    """:func:`_value_and_expected_counts` on the log-CPTs given as one flat vector (the layout of
    :func:`layout_of`, without the two constant slots); the expected counts come back flat too,
    with two trailing entries (those of the constant slots log 1 and log 0) to be ignored: a
    numpy array when the call is not traced."""
    parts = _parts(codes, weights)
    if len(parts) > 1 and not _traced((lc_flat, codes, weights)):
        res = _run_parts(lambda cs, ws: _value_and_flat_counts(network, groups, lc_flat, cs, ws), parts,
                         (id(network), groups, "vg"))
        val = jnp.asarray(sum(float(v) for v, _ in res))
        g = np.asarray(res[0][1]).copy()
        for _, gg in res[1:]:
            g += np.asarray(gg)
        return val, g
    val, g = _value_and_flat_counts(network, groups, lc_flat, codes, weights)
    if isinstance(g, jax.core.Tracer):
        return val, g
    return val, np.asarray(g)


@partial(jax.jit, static_argnums=(0, 1))
def _value_and_flat_counts(network: Network, groups: tuple, lc_flat: jax.Array, codes, weights):
    wide = _is_widened(groups)
    if wide:  # summed barren leaves: their columns of log row sums, and the chain rule back
        lc_w, back = jax.vjp(lambda x: _widen_flat(groups, x), lc_flat)
    else:
        lc_w = lc_flat
    flat = jnp.concatenate([lc_w, jnp.array([0.0, -jnp.inf], jnp.float64)])
    total = jnp.zeros((), jnp.float64)
    grad = jnp.zeros_like(flat)
    for cs, ws in _parts(codes, weights):
        for blk, arr, w in zip(groups, cs, ws):
            if isinstance(blk, GatheredBlock):
                total = total + _gathered_value(flat, w)
                grad = grad + w
                continue
            xs, f = _block_chunks(blk, arr, w, network)
            vg = _enum_value_and_grad if isinstance(blk, EnumBlock) else jax.value_and_grad(f)

            def body(carry, x, vg=vg):
                acc, g = carry
                v, gg = vg(flat, x)
                return (acc + v, g + gg), None

            (val, g), _ = jax.lax.scan(body, (jnp.zeros((), jnp.float64), jnp.zeros_like(flat)), xs)
            total = total + val
            grad = grad + g
    if wide:
        (g,) = back(grad[:-2])
        grad = jnp.concatenate([g, grad[-2:]])
    return total, grad


@partial(jax.jit, static_argnums=(0, 1))
def _rows_loglik(network: Network, groups: tuple, logcpts: tuple[jax.Array, ...], codes: tuple) -> tuple:
    """Per-instance log-likelihood of every block but the gathered one (flattened chunks; one
    part of a :class:`Shards`)."""
    flat = _plan_flat(groups, logcpts)
    out = []
    for blk, arr in zip(groups, codes):
        if isinstance(blk, GatheredBlock):
            out.append(jnp.zeros(0))
            continue
        if isinstance(blk, GroupPlan):
            lcs = _unflat(network, flat)
            _, ll = jax.lax.scan(lambda _, cc, blk=blk: (None, _group_rows_loglik(blk, _st(network).cards, lcs, cc)), None, arr)
        elif isinstance(blk, EnumBlock):
            _, ll = jax.lax.scan(lambda _, idx: (None, _enum_rows(flat, idx)), None, arr)
        else:
            progs, (pid, base, icodes) = arr

            def body(_, x, blk=blk, progs=progs):
                p, b, ic = x
                return None, _tape_rows(blk, flat, progs, p, b, ic)
            _, ll = jax.lax.scan(body, None, (pid, base, icodes))
        out.append(ll.reshape(-1))
    return tuple(out)


# --------------------------------------------------------------------------- per-step contraction (posteriors)
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
    if codes.dtype.itemsize < 4:  # flat indices from int8/int16 codes would wrap (JAX keeps their type)
        codes = codes.astype(jnp.int32)
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

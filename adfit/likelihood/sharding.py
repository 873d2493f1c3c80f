"""Evaluations split over the CPU cores: every block's chunks cut into equal parts (``Shards``),
run side by side from threads by the same compiled program (``$ADFIT_THREADS``).
"""

from __future__ import annotations

import dataclasses
import os
from typing import Any

import numpy as np

from .._jax import jax, jnp  # float64 on before anything else (adfit/_jax.py)
from ..errors import OptionError
from .blocks import EnumBlock, GatheredBlock, Plan
from .layout import layout_size
from .settings import SHARD_MIN_S


def n_threads() -> int:
    """CPU cores the evaluation may use (``$ADFIT_THREADS`` overrides; at most 8)."""
    env = os.environ.get("ADFIT_THREADS")
    if env:
        try:
            return max(1, int(env))
        except ValueError:
            raise OptionError(f"ADFIT_THREADS must be a whole number of threads, got {env!r}") from None
    try:
        cores = len(os.sched_getaffinity(0))
    except (AttributeError, OSError):  # pragma: no cover - not Linux
        cores = os.cpu_count() or 1
    return max(1, min(8, cores))


def _shard(plan: Plan) -> Plan:
    """Split every block's chunks into equal parts, one per core, when an evaluation is long
    enough to pay for the threads: the parts have the same shapes, so one compiled program runs
    them all, side by side (XLA runs these loops on one core)."""
    S = n_threads()
    if S == 1 or plan.estimate is None or plan.estimate["evaluation_s"] < SHARD_MIN_S:
        return plan
    n_flat = layout_size(plan.network)
    groups, codes, weights = [], [], []
    for blk, arr, w in zip(plan.groups, plan.codes, plan.weights):
        if isinstance(blk, GatheredBlock):
            groups.append(blk)
            codes.append(arr)
            weights.append(w)
            continue
        nch, c = w.shape
        n = nch * c
        if nch < S:
            c = max(8, -(-n // S))
            c = -(-c // 8) * 8
        nch2 = S * -(-n // (S * c))
        pad = nch2 * c - n
        wf = np.concatenate([w.reshape(-1), np.zeros(pad)])
        if isinstance(blk, EnumBlock):
            fill = np.full((pad, blk.A, blk.m), n_flat, np.int32)
            fill[:, 1:, 0] = n_flat + 1
            new = np.concatenate([arr.reshape(n, blk.A, blk.m), fill]).reshape(nch2, c, blk.A, blk.m)
        else:
            tables, (pid, base, icodes) = arr
            pid2 = np.concatenate([pid.reshape(-1), np.zeros(pad, pid.dtype)]).reshape(nch2, c)
            base2 = np.concatenate([base.reshape(n, -1), np.zeros((pad, base.shape[-1]), base.dtype)]).reshape(nch2, c, -1)
            ic2 = np.concatenate([icodes.reshape(n, -1), np.full((pad, icodes.shape[-1]), -1, icodes.dtype)]).reshape(nch2, c, -1)
            new = (tables, (pid2, base2, ic2))
        groups.append(dataclasses.replace(blk, chunk=c))
        codes.append(new)
        weights.append(wf.reshape(nch2, c))
    return dataclasses.replace(plan, groups=tuple(groups), codes=tuple(codes), weights=tuple(weights), n_shards=S)


@jax.tree_util.register_pytree_node_class
class Shards:
    """The data arrays of a plan cut into equal parts along the chunk axis (a pytree).

    ``parts[s]`` is a tuple over the plan's blocks, laid out as the plan's own arrays; all parts
    have the same shapes. The core functions accept either a Shards or one part."""

    def __init__(self, parts):
        self.parts = tuple(parts)

    def tree_flatten(self):
        return self.parts, None

    @classmethod
    def tree_unflatten(cls, aux, children):
        return cls(children)


def _split(plan: Plan, arrays: tuple, *, weights: bool) -> Shards:
    S = plan.n_shards
    conv: dict[int, Any] = {}

    def dev(x):  # one device array per numpy array (tables are shared by the parts)
        key = id(x)
        if key not in conv:
            conv[key] = (x, jnp.asarray(x))
        return conv[key][1]

    parts = [[] for _ in range(S)]
    for blk, a in zip(plan.groups, arrays):
        for s in range(S):
            if isinstance(blk, GatheredBlock):
                parts[s].append(dev(a) if s == 0 or not weights else jnp.zeros_like(dev(a)))
                continue
            k = (a.shape[0] if weights or isinstance(blk, EnumBlock) else a[1][0].shape[0]) // S
            sl = slice(s * k, (s + 1) * k)
            if weights or isinstance(blk, EnumBlock):
                parts[s].append(jnp.asarray(a[sl]))
            else:
                tables, (pid, base, icodes) = a
                parts[s].append((tuple(dev(t) for t in tables), (jnp.asarray(pid[sl]), jnp.asarray(base[sl]),
                                                                  jnp.asarray(icodes[sl]))))
    return Shards(tuple(tuple(p) for p in parts))


def _parts(codes, weights) -> list:
    if isinstance(codes, Shards):
        return list(zip(codes.parts, weights.parts))
    return [(codes, weights)]


def _traced(tree) -> bool:
    return any(isinstance(x, jax.core.Tracer) for x in jax.tree_util.tree_leaves(tree))


_POOL = None
_WARM: set = set()


def _run_parts(fn, parts: list, key) -> list:
    """``fn(*part)`` for every part, side by side in threads (part 0 on the calling thread).

    XLA runs each of these compiled loops on one core; calls from several Python threads run in
    parallel. The first call of a program runs alone, so that it is compiled once."""
    global _POOL
    if len(parts) == 1:
        return [fn(*parts[0])]
    if _POOL is None:
        from concurrent.futures import ThreadPoolExecutor
        _POOL = ThreadPoolExecutor(max_workers=n_threads(), thread_name_prefix="adfit-shard")
    shapes = tuple(getattr(x, "shape", None) for x in jax.tree_util.tree_leaves(parts[0]))
    k = (key, shapes)
    if k not in _WARM:
        first = jax.block_until_ready(fn(*parts[0]))
        _WARM.add(k)
        futs = [_POOL.submit(lambda p=p: jax.block_until_ready(fn(*p))) for p in parts[1:]]
        return [first] + [f.result() for f in futs]
    futs = [_POOL.submit(lambda p=p: jax.block_until_ready(fn(*p))) for p in parts[1:]]
    first = jax.block_until_ready(fn(*parts[0]))
    return [first] + [f.result() for f in futs]

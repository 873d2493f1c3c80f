"""Building a plan (``build_plan``): rows grouped, each component's route chosen by the cost model
(enumerate, its own elimination program, or the uniform program), blocks assembled and padded
into chunks, and the plan sharded over the cores; also the plan of the posterior marginals.
"""

from __future__ import annotations

import dataclasses
import math
from typing import Sequence

import numpy as np

from ..data import CodedData, HIDDEN, codes_dtype
from ..errors import OptionError
from ..network import Network
from .barren import _summed_leaves, _widen_segments, _widened_network
from .blocks import EnumBlock, GatheredBlock, Plan
from .components import _components, _n_instances, _Type, _type_instances
from .enumeration import _enum_bucket_menu, _enum_tables, _round_shape
from .layout import layout_of, _st
from .order import _group_plan
from .settings import (COMPILE_ENUM, COMPILE_TAPE, ENUM_ALWAYS, ENUM_BUDGET, ENUM_MAX, MAX_PATTERN_GROUPS,
                       MIN_PATTERN_ROWS, PLAN_BLOCK, PLAN_EVALUATIONS, SUM_BARREN_LEAVES, T_ENUM, T_LOOP,
                       T_PLAN_TYPE, T_TAPE, TAPE_FACTORS, TAPE_PAD, TAPE_SLOTS)
from .sharding import _shard
from .tape import (_choose_width, _compile_program, _pack, _pow2_clip, _split_classes, _tape_block,
                   _tape_seconds)


# --------------------------------------------------------------------------- choosing the route
def _plan_codes(network: Network, codes) -> np.ndarray:
    """The data's codes as the plan reads them: in their own signed type when it holds every
    code of ``network`` and the SUMMED code (``card``) of a barren leaf (no copy of a large
    matrix: read data are int8 up to 127 states), else in the network's code type or wider.
    Every index computed from them (strides, flat offsets) is widened to int64 first."""
    codes = np.asarray(codes)
    need = codes_dtype(network)
    dtype = np.promote_types(codes.dtype, need) if codes.dtype.kind == "i" else np.dtype(np.int32)
    return np.ascontiguousarray(codes, dtype=dtype)


def build_plan(network: Network, data: CodedData, *, route: str = "auto",
               min_pattern_rows: int | None = None, max_pattern_groups: int | None = None,
               chunk: int | None = None, for_posteriors: bool = False) -> Plan:
    """Take the rows apart (barren nodes, observed families, hidden components) and plan the work.

    Args:
        route: ``"auto"`` (each row and component by the cheapest estimated method, compile time
            included), ``"pattern"`` (per missingness pattern: observed families gathered, every
            hidden component computed on its own, never the uniform program) or ``"uniform"``
            (every row in one elimination program with evidence indicators).
        min_pattern_rows, max_pattern_groups: under ``"auto"``, at most ``max_pattern_groups``
            component types get an elimination program of their own (the most frequent first),
            each with at least ``min_pattern_rows`` distinct instances; the others are
            enumerated or their rows go to the uniform program, by the cost model.
        chunk: rows (instances) per chunk of every block (default: from the block's size).
        for_posteriors: one uniform plan with an indicator for every node and no pruning (used
            by :func:`posterior_marginals`).
    """
    if route not in ("auto", "uniform", "pattern"):
        raise OptionError(f"route must be 'auto', 'uniform' or 'pattern', got {route!r}")
    min_pattern_rows = MIN_PATTERN_ROWS if min_pattern_rows is None else int(min_pattern_rows)
    max_pattern_groups = MAX_PATTERN_GROUPS if max_pattern_groups is None else int(max_pattern_groups)
    codes = _plan_codes(network, data.codes)
    counts = np.asarray(data.counts, dtype=np.float64)
    n = len(network)
    R = len(codes)
    if for_posteriors:
        return _posterior_plan(network, codes, counts, chunk)
    if route == "uniform" or R == 0:
        return _shard(_assemble(network, codes, counts, uniform=np.ones(R, bool), enum_types=[], prog_types=[],
                                pruned=np.zeros(n, bool), chunk=chunk))
    # barren leaves summed out (their cells coded SUMMED, their CPTs widened in the plan's layout)
    acodes, widened = _summed_leaves(network, codes) if SUM_BARREN_LEAVES else (codes, ())
    pnet = _widened_network(network, widened) if widened else network
    tlist, pruned, hidden_rows = _components(pnet, acodes)
    enum_types, prog_types, to_uniform = _choose_methods(pnet, acodes, counts, tlist, route,
                                                         min_pattern_rows, max_pattern_groups, hidden_rows)
    uniform = np.zeros(R, bool)
    for t in to_uniform:
        uniform[t.rows] = True
    plan = _assemble(pnet, acodes, counts, uniform=uniform, enum_types=enum_types, prog_types=prog_types,
                     pruned=pruned, chunk=chunk, uniform_codes=codes,
                     widen=_widen_segments(network, widened) if widened else ())
    if route == "auto" and plan.estimate is not None:
        # the whole data set as one uniform program, when that is cheaper (small data: compile)
        if widened:  # the uniform program sums every hidden cell: the summary of the original codes
            hidden_rows = np.stack([codes.max(axis=0) < 0, codes.min(axis=0) < 0])
        uni_gp = _group_plan(network, hidden_rows, kind="mixed", n_rows=R, keep_all=True)
        alt = COMPILE_TAPE + R * TAPE_PAD * uni_gp.cost * T_TAPE * PLAN_EVALUATIONS
        mine = plan.estimate["compile_s"] + plan.estimate["evaluation_s"] * PLAN_EVALUATIONS
        if alt < mine and route != "pattern":
            plan = _assemble(network, codes, counts, uniform=np.ones(R, bool), enum_types=[], prog_types=[],
                             pruned=np.zeros(n, bool), chunk=chunk)
    return _shard(plan)


def _choose_methods(network: Network, codes: np.ndarray, counts: np.ndarray, tlist: Sequence[_Type], route: str,
                    min_pattern_rows: int, max_pattern_groups: int, hidden_rows: np.ndarray | None = None):
    """Per component type: enumerate it, give it an elimination program of its own, or send its
    rows to the uniform program, whichever is cheapest in total (compile time included).
    ``hidden_rows``: ``codes < 0``, or its two-row summary from :func:`_components`."""
    n = len(network)
    E = PLAN_EVALUATIONS
    always, rest = [], []
    for t in tlist:
        e = t.A * t.m
        if e <= ENUM_ALWAYS:
            always.append(t)
            continue
        t.n_inst = _n_instances(network, t, codes, counts)
        # enumeration cheaper than planning an elimination program at all: no plan needed
        if route != "pattern" and e <= ENUM_MAX and t.n_inst * e * T_ENUM * E <= T_PLAN_TYPE:
            always.append(t)
            continue
        mask = np.zeros((1, n), bool)
        mask[0, list(t.hidden)] = True
        t.gp = _group_plan(network, mask, kind="pattern", n_rows=len(t.rows), families=t.families)
        rest.append(t)
    if not rest:
        return list(tlist), [], []
    uni_gp = _group_plan(network, codes < 0 if hidden_rows is None else hidden_rows, kind="mixed",
                         n_rows=len(codes), keep_all=True)
    per_row_uniform = TAPE_PAD * uni_gp.cost * T_TAPE
    costs = []
    for t in rest:
        enum = t.n_inst * t.A * t.m * T_ENUM if t.A * t.m <= ENUM_MAX else math.inf
        own = t.n_inst * TAPE_PAD * t.gp.cost * T_TAPE + T_PLAN_TYPE / E
        uni = len(t.rows) * per_row_uniform
        costs.append((enum, own, uni))
    best = None
    options = [("enum", "own", "uni"), ("enum", "own"), ("enum", "uni"), ("enum",)]
    if route == "pattern":
        options = [("enum", "own"), ("enum",)]
    for allowed in options:
        choice, total = [], 0.0
        for (enum, own, uni) in costs:
            c = {"enum": enum, "own": own, "uni": uni}
            k = min(allowed, key=lambda a: c[a])
            choice.append(k)
            total += c[k] * E
        if not math.isfinite(total):
            continue
        # programs of their own: at most max_pattern_groups (the most used) under "auto"
        if route == "auto" and "own" in choice:
            own_idx = sorted((i for i, k in enumerate(choice) if k == "own"), key=lambda i: -rest[i].n_inst)
            for j, i in enumerate(own_idx):
                if j >= max_pattern_groups or rest[i].n_inst < min_pattern_rows:
                    alt = min((a for a in allowed if a != "own"), key=lambda a: costs[i][("enum", "own", "uni").index(a)])
                    total += (costs[i][("enum", "own", "uni").index(alt)] - costs[i][1]) * E
                    choice[i] = alt
        total += COMPILE_TAPE * (("own" in choice) + ("uni" in choice))
        if best is None or total < best[0]:
            best = (total, choice)
    choice = best[1]
    # An enumeration bucket costs a compile of its own: move the types of a bucket to their
    # elimination programs when that is cheaper than compiling the bucket.
    if route != "uniform":
        tape_compiled = "own" in choice
        sizes: dict[tuple[int, int], int] = {}
        for t in always:
            k = _round_shape(t.A, t.m)
            sizes[k] = sizes.get(k, 0) + _n_instances(network, t, codes, counts)
        members: dict[tuple[int, int], list[int]] = {}
        for i, (t, k) in enumerate(zip(rest, choice)):
            if k == "enum":
                key = _round_shape(t.A, t.m)
                sizes[key] = sizes.get(key, 0) + t.n_inst
                members.setdefault(key, []).append(i)
        menu = _enum_bucket_menu(sizes)
        buckets: dict[tuple[int, int], list[tuple[int, int]]] = {}
        for key in sizes:
            buckets.setdefault(menu[key], []).append(key)
        for (A, m), keys in sorted(buckets.items(), key=lambda kv: -kv[0][0] * kv[0][1]):
            movable = [i for key in keys for i in members.get(key, [])]
            if len(movable) == 0 or len(movable) < sum(1 for key in keys for _ in members.get(key, [])):
                continue
            if any(sizes[key] > sum(rest[i].n_inst for i in members.get(key, [])) for key in keys):
                continue  # the bucket also holds small components: it is compiled anyway
            n = sum(rest[i].n_inst for i in movable)
            keep = n * A * m * T_ENUM * E + COMPILE_ENUM
            move = sum(costs[i][1] for i in movable) * E + (0.0 if tape_compiled else COMPILE_TAPE)
            if move < keep:
                for i in movable:
                    choice[i] = "own"
                tape_compiled = True
    enum_types = always + [t for t, k in zip(rest, choice) if k == "enum"]
    prog_types = [t for t, k in zip(rest, choice) if k == "own"]
    to_uniform = [t for t, k in zip(rest, choice) if k == "uni"]
    return enum_types, prog_types, to_uniform


def _assemble(network: Network, codes: np.ndarray, counts: np.ndarray, *, uniform: np.ndarray,
              enum_types: Sequence[_Type], prog_types: Sequence[_Type], pruned: np.ndarray,
              chunk: int | None, uniform_codes: np.ndarray | None = None, widen: tuple = ()) -> Plan:
    """The plan's blocks. ``codes`` may hold SUMMED leaf cells (``widen``, the layout of
    ``network`` widened for them); the rows of the uniform program take ``uniform_codes`` (the
    original codes: that program sums every hidden cell itself)."""
    n = len(network)
    R = len(codes)
    pa = _st(network).parents
    layout = layout_of(network)
    offsets, strides, n_flat = layout
    local = ~uniform
    blocks, arrays, weights, maps = [], [], [], []
    eval_s = compile_s = 0.0
    n_local = int(local.sum())
    if n_local or widen:  # (a widened plan keeps its first block: it carries the widening)
        N = np.zeros(n_flat + 2)
        n_fam = 0
        unit = bool(np.all(counts == 1.0))
        step = max(1024, PLAN_BLOCK // max(1, n))
        for s0 in range(0, R, step):
            cbT = np.ascontiguousarray(codes[s0:s0 + step].T)     # (n, rows): whole columns
            lb = local[s0:s0 + step]
            not_local = None if lb.all() else ~lb
            h_any = cbT.min(axis=1) < 0 if cbT.shape[1] else np.zeros(n, bool)
            hid: dict[int, np.ndarray] = {}                         # cbT[u] < 0, for nodes hidden here
            idx = np.empty((n, cbT.shape[1]), np.int64)
            for v in range(n):
                fam = (*pa[v], v)
                iv = idx[v]
                np.add(cbT[v], offsets[v], out=iv, dtype=np.int64)  # the node's own stride is 1
                for u in fam[:-1]:
                    iv += np.multiply(cbT[u], strides[v][u], dtype=np.int64)  # widened: int8 codes
                bad = not_local
                for u in fam:
                    if h_any[u]:
                        hu = hid.get(u)
                        if hu is None:
                            hu = hid[u] = cbT[u] < 0
                        bad = hu if bad is None else (bad | hu)
                if bad is not None:
                    iv[bad] = n_flat + 2                            # a bin of its own, dropped
            cb_w = counts[s0:s0 + step]
            if unit:
                bc = np.bincount(idx.ravel(), minlength=n_flat + 3)
                N += bc[:n_flat + 2]
                n_fam += int(bc[:n_flat + 1].sum())                # the entries <= n_flat: every member observed
            else:
                N += np.bincount(idx.ravel(), weights=np.tile(cb_w, n), minlength=n_flat + 3)[:n_flat + 2]
                n_fam += int(np.count_nonzero(idx <= n_flat))
        n_comp = sum(int(local[t.rows].sum()) for t in (*enum_types, *prog_types))
        n_summed = 0
        if widen:
            for v, (_, _, card) in enumerate(widen):
                if card:
                    n_summed += int(np.count_nonzero(local & (codes[:, v] == card)))
        blocks.append(GatheredBlock(n_local, n_fam, int(pruned.sum()), n_comp, widen=widen, n_summed=n_summed))
        arrays.append(np.zeros(0, np.int32))
        weights.append(N)
        maps.append(None)
    # enumerated components, in buckets of a common padded shape
    def local_instances(t):
        """The type's rows in this part of the data, and their distinct instances (None: no row)."""
        sel = local[t.rows]
        rows = t.rows if sel.all() else t.rows[sel]
        return (*_type_instances(network, t, codes, counts, rows), rows) if len(rows) else None

    classes: dict[tuple[int, int], list] = {}
    for t in enum_types:
        if (found := local_instances(t)) is None:
            continue
        bc, w, inv, rows = found
        classes.setdefault(_round_shape(t.A, t.m), []).append((t, bc, w, inv, rows))
    menu = _enum_bucket_menu({k: sum(len(x[2]) for x in v) for k, v in classes.items()})
    buckets: dict[tuple[int, int], list] = {}
    for k, v in classes.items():
        buckets.setdefault(menu[k], []).extend(v)
    for (A, m), members in sorted(buckets.items()):
        n_inst = sum(len(x[2]) for x in members)
        c = chunk or _pow2_clip(ENUM_BUDGET / (A * m), 64, 16384)
        c = min(c, max(8, 1 << math.ceil(math.log2(max(1, n_inst)))))
        nch = -(-n_inst // c)
        idx = np.full((nch * c, A, m), n_flat, np.int32)     # log 1 ...
        idx[:, 1:, 0] = n_flat + 1                            # ... and log 0: padding is 0 = log 1
        wts = np.zeros(nch * c)
        rows_l, inst_l = [], []
        off = 0
        for t, bc, w, inv, rows in members:
            k = len(w)
            idx[off:off + k, :t.A, :t.m] = _enum_tables(network, t, bc, layout)
            wts[off:off + k] = w
            rows_l.append(rows)
            inst_l.append(off + inv)
            off += k
        blocks.append(EnumBlock(A, m, c, n_inst, sum(len(x[4]) for x in members), len(members)))
        arrays.append(idx.reshape(nch, c, A, m))
        weights.append(wts.reshape(nch, c))
        maps.append((np.concatenate(rows_l), np.concatenate(inst_l)))
        eval_s += nch * c * A * m * T_ENUM + nch * T_LOOP
        compile_s += COMPILE_ENUM
    # large components with programs of their own
    if prog_types:
        progs, datas, occ = [], [], []
        for t in prog_types:
            if (found := local_instances(t)) is None:
                continue
            bc, w, inv, rows = found
            full = np.zeros((len(w), n), np.int32)
            full[:, list(t.hidden)] = HIDDEN
            if t.boundary:
                full[:, list(t.boundary)] = bc
            progs.append(_compile_program(network, t.gp, layout, TAPE_SLOTS, TAPE_FACTORS))
            datas.append((full, w))
            occ.append((rows, inv))
        if progs:
            width = _choose_width(progs, [len(d[1]) for d in datas])
            sizes = []
            for pr in progs:
                _pack(pr, width)
                sizes.append(len(pr.leaf_off) + len(pr.ind_code) + pr.n_batch * width * TAPE_SLOTS * TAPE_FACTORS)
            for cls in _split_classes(sizes, [len(d[1]) for d in datas]):
                cp, cd, co = [progs[i] for i in cls], [datas[i] for i in cls], [occ[i] for i in cls]
                blk, arr, wts, starts = _tape_block(network, "pattern", cp, cd, width, chunk, TAPE_SLOTS, TAPE_FACTORS)
                blocks.append(blk)
                arrays.append(arr)
                weights.append(wts)
                maps.append((np.concatenate([r for r, _ in co]), np.concatenate([s0 + i for (_, i), s0 in zip(co, starts)])))
                eval_s += _tape_seconds(blk, wts)
                compile_s += COMPILE_TAPE
    # whole rows with uniform evidence
    urows = np.flatnonzero(uniform)
    if len(urows):
        ucodes = (codes if uniform_codes is None else uniform_codes)[urows]
        gp = _group_plan(network, ucodes < 0, kind="mixed", n_rows=len(urows), keep_all=True)
        prog = _compile_program(network, gp, layout, TAPE_SLOTS, TAPE_FACTORS)
        width = _choose_width([prog], [len(urows)])
        blk, arr, wts, starts = _tape_block(network, "mixed", [prog], [(ucodes, counts[urows])], width,
                                            chunk, TAPE_SLOTS, TAPE_FACTORS)
        blocks.append(blk)
        arrays.append(arr)
        weights.append(wts)
        maps.append((urows, np.arange(len(urows))))
        eval_s += _tape_seconds(blk, wts)
        compile_s += COMPILE_TAPE
    return Plan(network, tuple(blocks), tuple(arrays), tuple(weights), R, tuple(maps), local,
                {"evaluation_s": eval_s, "compile_s": compile_s})


def _posterior_plan(network: Network, codes: np.ndarray, counts: np.ndarray, chunk: int | None) -> Plan:
    n = len(network)
    gp = _group_plan(network, codes < 0, kind="mixed", n_rows=len(codes), keep_all=True, indicator_nodes=range(n))
    if chunk is not None:
        gp = dataclasses.replace(gp, chunk=int(chunk))
    c = gp.chunk
    rows = np.arange(len(codes))
    n_chunks = max(1, -(-len(rows) // c))
    pad = n_chunks * c - len(rows)
    idx = np.concatenate([rows, np.full(pad, rows[0] if len(rows) else 0, dtype=rows.dtype)])
    w = np.concatenate([counts, np.zeros(pad)])
    return Plan(network, (gp,), (codes[idx].astype(np.int32).reshape(n_chunks, c, n),), (w.reshape(n_chunks, c),), len(codes),
                rows=(rows,))

"""The plan's greedy choices against their plain definitions (numpy and Python only; no JAX work).

The plan builder computes its greedy choices incrementally (keys kept between steps, pair costs
kept between rounds) for speed; the orders and menus must be those of the plain definitions, so
that the plan, and every number computed from it, is the same.

* Min-fill (Kjaerulff 1990, "Triangulation of graphs: algorithms giving small total state
  space", Aalborg R-90-09; the greedy rule as in Koller & Friedman 2009, "Probabilistic
  Graphical Models", section 9.4.3.2, from memory): eliminate next the variable whose
  elimination adds the fewest edges between its neighbours; ties by the size of the table it
  creates, then by the lowest index. The reference below rescans every variable at every step.
* Bucket menu: merge the pair of shape classes whose merge saves the most, first pair in bucket
  order among equals, until no merge saves (rescanning every pair every round).
* Distinct rows: the same as ``np.unique(..., axis=0, return_index=True, return_inverse=True)``.
"""

from __future__ import annotations

import math
import random

import numpy as np
import pytest

from adfit.errors import TooLargeError
from adfit.likelihood import _distinct_rows, _enum_bucket_menu, _min_fill_order
from adfit.likelihood.settings import COMPILE_ENUM, PLAN_EVALUATIONS, T_ENUM


def reference_min_fill(variables, scopes, cards):
    nb = {v: set() for v in variables}
    for s in scopes:
        for a in s:
            nb[a] |= set(s) - {a}
    order, remaining = [], set(variables)
    while remaining:
        def key(v):
            ns = sorted(nb[v])
            fill = sum(1 for i, a in enumerate(ns) for b in ns[i + 1:] if b not in nb[a])
            return (fill, cards[v] * math.prod(cards[u] for u in ns), v)
        v = min(remaining, key=key)
        for a in nb[v]:
            nb[a] |= nb[v] - {a}
            nb[a].discard(v)
        del nb[v]
        remaining.remove(v)
        order.append(v)
    return order


def test_min_fill_on_small_graphs_by_hand():
    # a chain a - b - c (0 - 1 - 2): an end adds no edge; both ends tie on fill, the smaller
    # created table (cards 3 x 2 against 2 x 2) decides
    assert _min_fill_order([0, 1, 2], [(0, 1), (1, 2)], [3, 2, 2]) == [2, 0, 1]
    assert _min_fill_order([0, 1, 2], [(0, 1), (1, 2)], [2, 2, 3]) == [0, 1, 2]
    # a 4-cycle 0-1-2-3-0: every node adds one edge; after that, a triangle
    order = _min_fill_order([0, 1, 2, 3], [(0, 1), (1, 2), (2, 3), (3, 0)], [2, 2, 2, 2])
    assert order == reference_min_fill([0, 1, 2, 3], [(0, 1), (1, 2), (2, 3), (3, 0)], [2, 2, 2, 2])
    assert order[0] == 0
    # a hub 0 with leaves 1..4: leaves first (no fill, 2 x 2 tables), the hub (2**5) only when
    # one leaf is left, where hub and leaf tie and the lower index goes first
    assert _min_fill_order(list(range(5)), [(0, k) for k in range(1, 5)], [2] * 5) == [1, 2, 3, 0, 4]


def test_min_fill_equals_the_plain_greedy_rule_on_random_graphs():
    rng = random.Random(7)
    for _ in range(300):
        variables = sorted(rng.sample(range(40), rng.randint(1, 18)))
        scopes = [tuple(rng.sample(variables, rng.randint(1, min(4, len(variables)))))
                  for _ in range(rng.randint(1, 25))]
        cards = [rng.choice([2, 2, 3, 4]) for _ in range(40)]
        assert _min_fill_order(variables, scopes, cards) == reference_min_fill(variables, scopes, cards)


def test_min_fill_refuses_a_clique_too_large_before_ordering_the_rest():
    # 30 binary variables all in one family: the first step creates a 2**30 table
    with pytest.raises(TooLargeError):
        _min_fill_order(list(range(30)), [tuple(range(30))], [2] * 30)


def reference_menu(classes):
    buckets = {k: [k] for k in classes}
    size = dict(classes)
    while len(buckets) > 1:
        keys = list(buckets)
        best = None
        for i in range(len(keys)):
            for j in range(i + 1, len(keys)):
                a, b = keys[i], keys[j]
                A, m = max(a[0], b[0]), max(a[1], b[1])
                extra = size[a] * (A * m - a[0] * a[1]) + size[b] * (A * m - b[0] * b[1])
                c = extra * T_ENUM * PLAN_EVALUATIONS - COMPILE_ENUM
                if best is None or c < best[0]:
                    best = (c, a, b, (A, m))
        if best[0] >= 0:
            break
        _, a, b, shape = best
        members, n = buckets.pop(a) + buckets.pop(b), size.pop(a) + size.pop(b)
        if shape in buckets:
            members += buckets.pop(shape)
            n += size.pop(shape)
        buckets[shape], size[shape] = members, n
    return {k: shape for shape, ms in buckets.items() for k in ms}


def test_bucket_menu_equals_the_plain_greedy_merge():
    rng = random.Random(3)
    shapes = [1, 2, 3, 4, 6, 8, 12, 16, 24, 32, 48, 64, 96, 128, 256]
    for _ in range(300):
        classes = {}
        for _ in range(rng.randint(1, 30)):
            # equal sizes on purpose: equal savings, where the order of the pairs decides
            classes[(rng.choice(shapes), rng.randint(1, 24))] = rng.choice([1, 2, 10, 1000, rng.randint(1, 10 ** 5)])
        assert _enum_bucket_menu(classes) == reference_menu(classes)
    # nothing saved by merging two large classes: kept apart (a check that can fail)
    assert _enum_bucket_menu({(4, 4): 10 ** 7, (256, 24): 10 ** 7}) == {(4, 4): (4, 4), (256, 24): (256, 24)}


@pytest.mark.parametrize("rows", [1, 2, 7, 300, 5000])
def test_distinct_rows_equal_numpy_unique(rows):
    rng = np.random.default_rng(rows)
    for cards in ([3], [2, 4], [4, 4, 4, 4, 4, 4, 4, 4, 4]):
        sub = np.stack([rng.integers(0, c, rows) for c in cards], axis=1).astype(np.int32)
        first, inv = _distinct_rows(sub, cards)
        _, want_first, want_inv = np.unique(sub, axis=0, return_index=True, return_inverse=True)
        np.testing.assert_array_equal(first, want_first)
        np.testing.assert_array_equal(inv, want_inv.reshape(-1))
        np.testing.assert_array_equal(sub[first][inv], sub)

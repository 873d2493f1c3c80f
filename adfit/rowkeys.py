"""Coded rows as tuples of int64 words, and their reduction to distinct rows with counts.

A coded row (codes ``-1 .. card - 1`` per column) is packed into ``k`` non-negative int64
*words*. The columns are split, in order, into groups whose product of ``(card + 1)`` stays below
2**63; each group is one word, the mixed-radix number ``sum_j (code_j + 1) * prod_{k>j} (card_k + 1)``
over the group's columns (last column fastest). Comparing the word tuples lexicographically
compares the code rows lexicographically, so distinct rows sorted by their words are sorted by
their codes (first column most significant), whatever the number of words. A network whose
product of ``(card + 1)`` is below 2**63 has one word (the single packed key of earlier
versions); the 37-node benchmark network (about 74 bits) has two.

Reduction (:func:`reduce_words`) folds the words from the most significant one: the dense rank
of word 0 among its distinct values (order-preserving) is combined with word 1 into one int64,
``rank * span_1 + word_1`` (or with the dense rank of word 1 when that would overflow), which is
ranked again, and so on; the final dense rank is the index of each row's distinct row. When most
rows differ (a sample of word 0 decides) the fold works in sorted order: word 0 is sorted
(``np.sort`` with the row index packed into the low bits when key and index fit in 63 bits,
else ``np.argsort``; a stable sort, which merges already sorted runs in linear time, when the
input is known to be sorted pieces), the next combined key, taken in that order, is sorted
except inside runs of equal word 0, so a stable sort orders it in about linear time, and the
distinct rows are the words of the first row of each final run. When a sample shows many
repeats, each combined key is ranked by hashing (``pandas.factorize``, then sorting only the
distinct values), or by counting (``np.bincount``) when its range is small. Every path gives the
same result; counts are summed in row order.
"""

from __future__ import annotations

import math
from typing import Any, NamedTuple, Sequence

import numpy as np
import pandas as pd

LIMIT = 2 ** 63          # a word, a combined key, key * n + index must stay below this
_BLOCK = 1 << 14         # rows per block when packing / unpacking (cache-sized pieces)
_TABLE = 1 << 14         # largest digit table used by unpacking
_UNPACK_BLOCK = 1 << 12  # rows per block when unpacking
_SAMPLE = 4096           # rows sampled to choose between hashing and sorting


def code_dtype(cards: Sequence[int]) -> np.dtype:
    """The smallest signed integer type that holds the codes of nodes of ``cards``: ``-1`` (hidden),
    ``-2`` (a foreign label, while coding), the states ``0 .. card - 1`` and ``card`` itself (the
    likelihood plan's code of a summed barren leaf). int8 up to 127 states, int16 up to 32 767,
    else int32. Arithmetic on codes (strides, packed keys, flat indices) must widen them first."""
    top = max((int(c) for c in cards), default=1)
    if top <= np.iinfo(np.int8).max:
        return np.dtype(np.int8)
    if top <= np.iinfo(np.int16).max:
        return np.dtype(np.int16)
    return np.dtype(np.int32)


class PackedRows(NamedTuple):
    """Coded rows packed into words: ``words`` is int64 ``(k, n)`` (one contiguous row per word)."""

    words: np.ndarray

    @property
    def n(self) -> int:
        return int(self.words.shape[1])


class KeyLayout:
    """How coded rows over nodes of ``cards`` are packed into int64 words (see the module docstring)."""

    def __init__(self, cards: Sequence[int]):
        self.bases = tuple(int(c) + 1 for c in cards)
        groups: list[tuple[int, int]] = []
        start, prod = 0, 1
        for j, b in enumerate(self.bases):
            if prod * b >= LIMIT and j > start:
                groups.append((start, j))
                start, prod = j, 1
            prod *= b
        groups.append((start, len(self.bases)))
        self.groups = tuple(groups)
        self.spans = tuple(math.prod(self.bases[a:b]) for a, b in groups)
        if any(s >= LIMIT for s in self.spans):
            raise ValueError("a node has too many states to pack its codes into an int64 word")
        self.mult = np.ones(len(self.bases), dtype=np.int64)
        self.word = np.zeros(len(self.bases), dtype=np.int64)
        for w, (a, b) in enumerate(groups):
            self.word[a:b] = w
            for j in range(b - 2, a - 1, -1):
                self.mult[j] = self.mult[j + 1] * self.bases[j + 1]
        self.code_dtype = code_dtype(cards)
        self._tables: list[tuple[int, int, int, int, np.ndarray]] | None = None

    @property
    def k(self) -> int:
        return len(self.groups)

    def empty(self) -> PackedRows:
        return PackedRows(np.zeros((self.k, 0), dtype=np.int64))

    def zeros(self, n: int) -> np.ndarray:
        """Words of ``n`` rows whose cells are all hidden (code -1 adds nothing)."""
        return np.zeros((self.k, n), dtype=np.int64)

    def add_column(self, words: np.ndarray, j: int, codes: np.ndarray) -> None:
        """Add column ``j``'s codes (``-1`` = hidden) into ``words`` in place."""
        w = words[self.word[j]]
        m = self.mult[j]
        tmp = np.empty(min(_BLOCK, w.shape[0]), dtype=np.int64)
        for s in range(0, w.shape[0], _BLOCK):
            e = min(s + _BLOCK, w.shape[0])
            t = tmp[:e - s]
            np.add(codes[s:e], 1, out=t, dtype=np.int64)
            t *= m
            w[s:e] += t

    def pack_columns(self, columns: Sequence[np.ndarray | None], n: int) -> PackedRows:
        """Words of ``n`` rows from one code array per column (None: every cell hidden).

        Works block by block over the rows so that each block of words stays in cache while
        every column is added to it.
        """
        words = self.zeros(n)
        cols = [(j, c) for j, c in enumerate(columns) if c is not None]
        tmp = np.empty(min(_BLOCK, max(n, 1)), dtype=np.int64)
        for s in range(0, n, _BLOCK):
            e = min(s + _BLOCK, n)
            t = tmp[:e - s]
            for j, c in cols:
                np.add(c[s:e], 1, out=t, dtype=np.int64)
                t *= self.mult[j]
                words[self.word[j], s:e] += t
        return PackedRows(words)

    def pack_prepared(self, columns: Sequence[Any], n: int, out: np.ndarray | None = None) -> PackedRows:
        """Words of ``n`` rows from one :class:`~adfit.data.PreparedColumn` per column (None: hidden).

        Each column's table of codes becomes a table of its terms ``(code + 1) * multiplier``, so
        a block of a word is the sum of one gather per column; no code array is materialised.
        ``out``: an int64 ``(k, n)`` array (or view) to write the words into.
        """
        if out is None:
            words = self.zeros(n)
        else:
            words = out
            words[...] = 0
        cols = []
        for j, c in enumerate(columns):
            if c is not None:
                terms = (c.table.astype(np.int64) + 1) * self.mult[j]
                cols.append((int(self.word[j]), terms, c.index, c.nulls))
        tmp = np.empty(min(_BLOCK, max(n, 1)), dtype=np.int64)
        for s in range(0, n, _BLOCK):
            e = min(s + _BLOCK, n)
            t = tmp[:e - s]
            for w, terms, index, nulls in cols:
                np.take(terms, index[s:e], out=t)
                if nulls is not None:
                    np.putmask(t, nulls[s:e], 0)
                words[w, s:e] += t
        return PackedRows(words)

    def pack(self, codes: np.ndarray) -> PackedRows:
        """Words of a code matrix ``(n, n_nodes)``."""
        codes = np.asarray(codes)
        return self.pack_columns([codes[:, j] for j in range(codes.shape[1])], codes.shape[0])

    def _digit_tables(self) -> list[tuple[int, int, int, int, np.ndarray]]:
        """Per group of consecutive columns of one word, ``(first col, stop, divisor, radix, table)``:
        the group's digit is ``(word // divisor) % radix`` and ``table[digit]`` holds its codes
        (:attr:`code_dtype`) as one fixed-size record, so one gather fills a row's cells of the group."""
        if self._tables is None:
            tables = []
            for (a, b) in self.groups:
                stop = b
                while stop > a:  # groups of columns from the fast end of the word
                    start, prod = stop - 1, self.bases[stop - 1]
                    while start > a and prod * self.bases[start - 1] <= _TABLE:
                        start -= 1
                        prod *= self.bases[start]
                    digits = np.indices([self.bases[j] for j in range(start, stop)]).reshape(stop - start, -1).T
                    tab = np.ascontiguousarray(digits - 1, dtype=self.code_dtype)
                    tables.append((start, stop, int(self.mult[stop - 1]), prod,
                                   tab.view(np.dtype((np.void, tab.itemsize * (stop - start)))).reshape(-1)))
                    stop = start
            self._tables = tables
        return self._tables

    def unpack(self, words: np.ndarray) -> np.ndarray:
        """Codes ``(n, n_nodes)`` of words ``(k, n)`` (inverse of :meth:`pack`), of dtype
        :attr:`code_dtype` (:func:`code_dtype`: int8 up to 127 states).

        Block by block: each group's digit picks its cells from a small table into a block of
        codes, and the block is copied into the result.
        """
        words = np.asarray(words, dtype=np.int64)
        n = words.shape[1]
        out = np.empty((n, len(self.bases)), dtype=self.code_dtype)
        if n == 0 or not self.bases:
            return out
        tables = self._digit_tables()
        size = min(_UNPACK_BLOCK, n)
        digit = np.empty(size, dtype=np.int64)
        block = np.empty((size, len(self.bases)), dtype=self.code_dtype)
        for s in range(0, n, size):
            e = min(s + size, n)
            d = digit[:e - s]
            blk = block[:e - s]
            for a, b, div, radix, tab in tables:
                w = words[self.word[a], s:e]
                if div == 1:
                    np.remainder(w, radix, out=d)
                else:
                    np.floor_divide(w, div, out=d)
                    np.remainder(d, radix, out=d)
                blk[:, a:b].view(tab.dtype)[:, 0] = np.take(tab, d)
            out[s:e] = blk
        return out


# ------------------------------------------------------------------ ranks
def _few_distinct(key: np.ndarray) -> bool:
    """Whether a sample of ``key`` repeats enough values that hashing beats sorting."""
    n = key.shape[0]
    if n <= 4 * _SAMPLE:
        return False
    idx = np.random.default_rng(0).integers(0, n, _SAMPLE)
    return np.unique(key[idx]).shape[0] < _SAMPLE // 2


def _sorted(key: np.ndarray, span: int, runs: bool) -> tuple[np.ndarray, np.ndarray]:
    """``(order, key[order])`` with the key in ascending order."""
    n = key.shape[0]
    if runs:
        order = np.argsort(key, kind="stable")  # timsort: linear on a few sorted runs
        return order, np.take(key, order)
    if span * n < LIMIT:  # sort (key, row) packed in one int64: a plain sort instead of an argsort
        s = np.multiply(key, np.int64(n))
        for a in range(0, n, _BLOCK):
            e = min(a + _BLOCK, n)
            s[a:e] += np.arange(a, e, dtype=np.int64)
        s.sort()
        order = np.remainder(s, np.int64(n))
        np.floor_divide(s, np.int64(n), out=s)
        return order, s
    order = np.argsort(key)
    return order, np.take(key, order)


def _starts(sk: np.ndarray) -> np.ndarray:
    """Flags of the first element of each run of equal values of a sorted array."""
    new = np.empty(sk.shape[0], dtype=bool)
    new[:1] = True
    np.not_equal(sk[1:], sk[:-1], out=new[1:])
    return new


class _Rank(NamedTuple):
    rank: np.ndarray | None   # dense rank of each row (may be None when not asked for)
    uniq: np.ndarray          # the distinct values, ascending
    sizes: np.ndarray | None  # rows per distinct value (only when the rank was not asked for)


def _dense_rank(key: np.ndarray, span: int, *, need_rank: bool = True) -> _Rank:
    """Order-preserving dense rank of a non-negative int64 ``key`` below ``span``, by counting
    (small span) or hashing (see the module docstring)."""
    n = key.shape[0]
    if span <= max(4 * n, 1 << 16):  # counting
        sizes = np.bincount(key, minlength=span)
        present = sizes.astype(bool)
        uniq = np.flatnonzero(present)
        if not need_rank:
            return _Rank(None, uniq, sizes[uniq])
        lut = np.cumsum(present, dtype=np.int64)
        lut -= 1
        return _Rank(np.take(lut, key), uniq, None)
    first, u = pd.factorize(key, sort=False)
    u = np.asarray(u, dtype=np.int64)
    order = np.argsort(u)
    pos = np.empty(order.shape[0], dtype=np.int64)
    pos[order] = np.arange(order.shape[0], dtype=np.int64)
    return _Rank(np.take(pos, first), np.take(u, order), None)


def reduce_words(words: np.ndarray, spans: Sequence[int], weights: np.ndarray | None = None, *,
                 inverse: bool = True, runs: bool = False) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    """Distinct word tuples in lexicographic order, their summed weights, and each row's index.

    Args:
        words: int64 ``(k, n)``, word ``i`` non-negative and below ``spans[i]``.
        weights: per row (float64), or None for a count of 1 each.
        inverse: whether to return the index of each row's distinct row (else None).
        runs: the rows are a few pieces each sorted lexicographically (a stable sort then merges
            them in linear time); any input gives the right answer, this only chooses the sort.

    Returns ``(distinct words (k, m), counts float64 (m,), inverse int64 (n,) or None)``. Counts
    are summed in row order (``np.bincount``), whichever path ranks the rows.
    """
    words = np.asarray(words, dtype=np.int64)
    k, n = words.shape
    if n == 0:
        return np.zeros((k, 0), np.int64), np.zeros(0), (np.zeros(0, np.int64) if inverse else None)
    w = None if weights is None else np.asarray(weights, dtype=np.float64)
    span0 = int(spans[0])
    if k == 1 and span0 <= max(4 * n, 1 << 16) or not runs and _few_distinct(words[0]):
        return _reduce_hashed(words, spans, w, inverse)
    return _reduce_sorted(words, spans, w, inverse, runs)


def _decode(last: np.ndarray, steps: list[tuple[np.ndarray, int, np.ndarray | None]], k: int) -> np.ndarray:
    """Distinct word tuples from the distinct values of the last combined key."""
    out = np.empty((k, last.shape[0]), dtype=np.int64)
    vals = last
    for i in range(k - 1, 0, -1):
        uniq, radix, table = steps[i - 1]
        low = np.remainder(vals, np.int64(radix))
        out[i] = low if table is None else np.take(table, low)
        vals = np.take(uniq, np.floor_divide(vals, np.int64(radix)))
    out[0] = vals
    return out


def _reduce_hashed(words: np.ndarray, spans: Sequence[int], w: np.ndarray | None,
                   inverse: bool) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    """Fold in row order: the dense rank of each combined key by hashing (or counting)."""
    k = words.shape[0]
    key, span = words[0], int(spans[0])
    steps: list[tuple[np.ndarray, int, np.ndarray | None]] = []  # (distinct values, radix, word table)
    for i in range(1, k):
        r = _dense_rank(key, span)
        m = r.uniq.shape[0]
        si = int(spans[i])
        if m * si < LIMIT:
            key = r.rank
            key *= np.int64(si)
            key += words[i]
            steps.append((r.uniq, si, None))
            span = m * si
        else:  # rank word i too (its distinct values are at most n, and m * n < 2**63)
            r2 = _dense_rank(words[i], si)
            m2 = r2.uniq.shape[0]
            key = r.rank
            key *= np.int64(m2)
            key += r2.rank
            steps.append((r.uniq, m2, r2.uniq))
            span = m * m2
    need_rank = inverse or w is not None
    last = _dense_rank(key, span, need_rank=need_rank)
    m = last.uniq.shape[0]
    if last.rank is not None:
        counts = np.bincount(last.rank, weights=w, minlength=m).astype(np.float64)
    else:
        counts = last.sizes.astype(np.float64)
    return _decode(last.uniq, steps, k), counts, (last.rank if inverse else None)


def _reduce_sorted(words: np.ndarray, spans: Sequence[int], w: np.ndarray | None, inverse: bool,
                   runs: bool) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    """Fold in sorted order: sort word 0; the next combined key, taken in that order, is sorted
    except inside runs of equal earlier words, so a stable sort (timsort) orders it in about
    linear time when most rows differ; the last order gives every row's distinct row, and the
    distinct rows are the words of the first row of each run."""
    k, n = words.shape
    order, sk = _sorted(words[0], int(spans[0]), runs)
    for i in range(1, k):
        new = _starts(sk)
        m = int(np.count_nonzero(new))
        rs = np.cumsum(new, out=sk)  # the dense rank, in sorted order (sk is not needed any more)
        rs -= 1
        del new
        si = int(spans[i])
        if m * si < LIMIT:
            rs *= np.int64(si)
            rs += np.take(words[i], order)
        else:  # rank word i too (its distinct values are at most n, and m * n < 2**63)
            r2 = _dense_rank(words[i], si) if _few_distinct(words[i]) else _rank_by_sort(words[i], si)
            rs *= np.int64(r2.uniq.shape[0])
            rs += np.take(r2.rank, order)
            del r2
        o2 = np.argsort(rs, kind="stable")
        order = np.take(order, o2)
        sk = np.take(rs, o2)
        del rs, o2
    new = _starts(sk)
    first = order[new]
    distinct = np.take(words, first, axis=1)
    m = first.shape[0]
    del first
    if inverse or w is not None:
        rs = np.cumsum(new, out=sk)
        rs -= 1
        rank = np.empty(n, dtype=np.int64)
        rank[order] = rs
        del rs, sk, order
        counts = np.bincount(rank, weights=w, minlength=m).astype(np.float64)
    else:
        rank = None
        counts = np.diff(np.flatnonzero(new), append=n).astype(np.float64)
    return distinct, counts, (rank if inverse else None)


def _rank_by_sort(key: np.ndarray, span: int) -> _Rank:
    """Dense rank of each row of ``key`` (row order) by sorting."""
    order, sk = _sorted(key, span, False)
    new = _starts(sk)
    uniq = sk[new]
    rs = np.cumsum(new, out=sk)
    rs -= 1
    rank = np.empty(key.shape[0], dtype=np.int64)
    rank[order] = rs
    return _Rank(rank, uniq, None)

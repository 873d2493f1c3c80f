"""Data at the boundary: read tables, code labels as integers, reduce to distinct rows.

Nothing in here touches JAX. The likelihood depends on the data only through the distinct
coded rows and their counts, so every later step works on a :class:`CodedData`.

Coding: column ``j`` of ``codes`` is node ``j`` of the network (network order); a value is the
index of the state label in the node's declared ``states``; ``-1`` (:data:`HIDDEN`) marks a cell
that is missing, and every cell of a latent node.

Reading rules (the same for every engine, see :mod:`adfit.engines`):

* CSV: comma-separated UTF-8 text (a byte-order mark is allowed), a header row with the column
  names, double quotes around values that hold commas or line breaks. Every record must have
  exactly one value per column; empty lines are skipped. Cells are matched as text after
  trimming surrounding spaces (``"01"`` is not ``"1"``).
* Parquet: typed columns; numbers are matched through their plain text (``2``, ``2.0`` -> ``"2"``,
  ``0.5`` -> ``"0.5"``), booleans as ``true``/``false`` (or ``True``/``False``).
* Missing cells: an empty cell (always), a null, a floating NaN, and the markers ``NA``, ``NaN``,
  ``?`` (:data:`DEFAULT_MISSING`); ``missing=[...]`` (``--missing``) replaces the markers.
* Positions in messages: for CSV ``line L (data row R)`` where ``L`` is the line of the file on
  which the record starts (the header is line 1) and ``R`` counts records from 1 after the
  header; for Parquet and DataFrames ``data row R`` (1-based, header not counted).
"""

from __future__ import annotations

from collections import Counter as _Counter

import csv
import functools
import glob as _glob
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Iterable, Iterator, Sequence

import numpy as np
import pandas as pd

from .errors import DataError, did_you_mean, option
from .network import Network
from .rowkeys import KeyLayout, PackedRows, code_dtype, reduce_words

HIDDEN = -1
#: Most records a data set may count in all (its weights added up): 2**53, beyond which float64
#: no longer counts whole records exactly (IEEE 754 binary64: 53-bit significand); a total near
#: 1e308 would overflow to inf in the log-likelihood and the expected counts.
MAX_TOTAL_COUNT = 2.0 ** 53
UNKNOWN = -2  # transient code of a label that is not a state (never left in a CodedData)
DEFAULT_MISSING: tuple[str, ...] = ("", "NA", "NaN", "?")
PARQUET_SUFFIXES = (".parquet", ".pq")
CSV_SUFFIXES = (".csv",)

Locate = Callable[[int], str]  # 0-based data row -> "file: line 7 (data row 6)"


@dataclass(frozen=True, eq=False)
class CodedData:
    """Distinct coded rows with their counts.

    Attributes:
        codes: integer array ``(n_distinct, n_nodes)``, network node order, ``-1`` = hidden. Read
            and validated data hold the network's :func:`codes_dtype` (int8 up to 127 states,
            int16 beyond); any signed integer type is accepted, so widen before arithmetic.
        counts: float64 array ``(n_distinct,)`` of positive (possibly fractional) weights.
        inverse: for each input row, the index of its distinct row (None when the input was
            streamed or pre-aggregated without keeping row order).
        source: where the data came from (for messages).
    """

    codes: np.ndarray
    counts: np.ndarray
    inverse: np.ndarray | None = None
    source: str = "<data>"

    @property
    def n_distinct(self) -> int:
        return int(self.codes.shape[0])

    @property
    def n_rows(self) -> float:
        """Total weight (the number of records for unweighted data)."""
        return float(self.counts.sum())

    def subset(self, mask: np.ndarray) -> "CodedData":
        """Distinct rows where ``mask`` is true (inverse mapping dropped)."""
        mask = np.asarray(mask, dtype=bool)
        return CodedData(self.codes[mask], self.counts[mask], None, self.source)

    def complete_cases(self, network: Network) -> "CodedData":
        """Rows with every non-latent cell observed."""
        obs = [network.index(n) for n in network.observed_names]
        return self.subset(np.all(self.codes[:, obs] != HIDDEN, axis=1))


def codes_dtype(network: Network) -> np.dtype:
    """The integer type of ``network``'s coded data (:func:`adfit.rowkeys.code_dtype` of its
    numbers of states): int8 up to 127 states per node, int16 up to 32 767, else int32."""
    return code_dtype(network.cards)


# ------------------------------------------------------------------ reduction
@functools.lru_cache(maxsize=64)
def key_layout(cards: tuple[int, ...]) -> KeyLayout:
    """The :class:`~adfit.rowkeys.KeyLayout` (int64 words) of coded rows over nodes of ``cards``."""
    return KeyLayout(cards)


def reduce_rows(codes: np.ndarray, weights: np.ndarray | None, cards: Sequence[int]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Reduce coded rows to distinct rows.

    Returns ``(distinct_codes, counts, inverse)``; distinct rows come in the lexicographic order
    of the coded rows (first column most significant), so the order is the same whichever way
    the rows were read. Each row is packed into int64 words (one word when the product of
    ``(card + 1)`` is below 2**63, see :mod:`adfit.rowkeys`) and the word tuples are ranked.
    """
    layout = key_layout(tuple(int(c) for c in cards))
    codes = np.asarray(codes).reshape(-1, len(layout.bases))
    return reduce_packed(layout.pack(codes), weights, cards)


def reduce_packed(rows: PackedRows, weights: np.ndarray | None, cards: Sequence[int], *,
                  inverse: bool = True) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    """:func:`reduce_rows` for rows already packed into words (see :func:`code_columns`)."""
    layout = key_layout(tuple(int(c) for c in cards))
    words, counts, inv = reduce_words(rows.words, layout.spans, weights, inverse=inverse)
    return layout.unpack(words), counts, inv


# --------------------------------------------------------------------- coding
def missing_markers(missing: Iterable[str] | None = None) -> frozenset[str]:
    """The set of texts that mean "not recorded"; the empty cell is always one of them."""
    if isinstance(missing, str):
        missing = [missing]
    marks = DEFAULT_MISSING if missing is None else tuple(str(m).strip() for m in missing)
    return frozenset(marks) | {""}


def _missing_set(missing: Iterable[str] | None) -> frozenset[str]:  # kept for old callers
    return missing_markers(missing)


def _candidates(v: Any) -> tuple[str, ...] | None:
    """Texts under which a cell value may match a state label; None for a missing value."""
    if v is None or v is pd.NA or v is pd.NaT:
        return None
    if isinstance(v, (bool, np.bool_)):
        return ("true", "True") if v else ("false", "False")
    if isinstance(v, (float, np.floating)):
        f = float(v)
        if math.isnan(f):
            return None
        if f.is_integer() and abs(f) < 2 ** 63:
            return (str(int(f)), repr(f))
        return (repr(f),)
    if isinstance(v, (int, np.integer)):
        return (str(int(v)),)
    if isinstance(v, bytes):
        v = v.decode("utf-8", errors="replace")
    s = str(v)
    t = s.strip()
    return (s, t) if t != s else (s,)


def _factorize(values: Any) -> tuple[np.ndarray, list[Any]]:
    """``(codes, uniques)`` with code -1 for nulls; accepts pandas, numpy and pyarrow columns."""
    try:
        import pyarrow as pa
        import pyarrow.compute as pc
    except ImportError:  # pragma: no cover - pyarrow is a dependency
        pa = None
    if pa is not None and isinstance(values, (pa.Array, pa.ChunkedArray)):
        arr = values.combine_chunks() if isinstance(values, pa.ChunkedArray) else values
        if pa.types.is_dictionary(arr.type):
            arr = arr.dictionary_decode()
        enc = arr.dictionary_encode()
        codes = pc.fill_null(enc.indices, -1).to_numpy(zero_copy_only=False)
        return codes, enc.dictionary.to_pylist()
    codes, uniques = pd.factorize(pd.Series(values) if not isinstance(values, (pd.Series, pd.Index)) else values,
                                  use_na_sentinel=True)
    return np.asarray(codes), list(uniques)


def _int_column(values: Any) -> tuple[np.ndarray, int, np.ndarray, np.ndarray | None] | None:
    """A pyarrow integer column as ``(index, base, present, nulls)``: cell value = ``base + index``.

    ``present`` lists the distinct indices that occur, ``nulls`` flags the null cells (their
    index is that of the smallest value), or is None when there are none. None unless ``values``
    is a pyarrow integer array whose values span fewer than 65 536 integers: then
    :meth:`LabelCoder.code` indexes a small table instead of hashing the cells.
    """
    try:
        import pyarrow as pa
        import pyarrow.compute as pc
    except ImportError:  # pragma: no cover - pyarrow is a dependency
        return None
    if not isinstance(values, (pa.Array, pa.ChunkedArray)) or not pa.types.is_integer(values.type):
        return None
    arr = values.combine_chunks() if isinstance(values, pa.ChunkedArray) else values
    n = len(arr)
    if arr.null_count == n:
        return np.zeros(n, dtype=np.intp), 0, np.zeros(0, dtype=np.intp), np.ones(n, dtype=bool)
    mm = pc.min_max(arr)
    low, high = int(mm["min"].as_py()), int(mm["max"].as_py())
    if high - low >= 1 << 16:
        return None
    nulls = None
    if arr.null_count:
        nulls = arr.is_null().to_numpy(zero_copy_only=False)
        arr = pc.fill_null(arr, low)
    vals = arr.to_numpy()
    if low >= 0 and high < 1 << 16 and vals.dtype.itemsize <= 2:
        base, index = 0, vals.view(np.dtype(f"u{vals.dtype.itemsize}"))  # the values themselves, no copy
    else:
        base, index = low, (vals.astype(np.int64) - low)
    if high - base < 1 << 12:  # a short range: code every value in it (those absent are never looked up)
        present = np.arange(high - base + 1)
    else:
        present = np.flatnonzero(np.bincount(index, minlength=1))
    return index, int(base), present, nulls


def _value_at(values: Any, i: int) -> Any:
    if hasattr(values, "iloc"):
        return values.iloc[i]
    v = values[i]
    return v.as_py() if hasattr(v, "as_py") else v


def _show(label: Any) -> str:
    s = label if isinstance(label, str) else str(label)
    return repr(s if len(s) <= 60 else s[:57] + "...")


@dataclass(frozen=True, eq=False)
class PreparedColumn:
    """A coded column not yet materialised: cell ``i`` has code ``table[index[i]]``, or HIDDEN
    where ``nulls[i]`` (``index`` may be -1: the table's last slot). ``foreign``: the table holds
    UNKNOWN for a value that may occur (only then is the column scanned for a foreign label)."""

    index: np.ndarray
    table: np.ndarray
    nulls: np.ndarray | None
    foreign: bool

    def codes(self) -> np.ndarray:
        codes = np.take(self.table, self.index)
        if self.nulls is not None:
            np.putmask(codes, self.nulls, HIDDEN)
        return codes

    def first_foreign(self, codes: np.ndarray | None = None) -> int | None:
        """Index of the first cell with a foreign label, or None."""
        if not self.foreign:
            return None
        bad = np.flatnonzero((self.codes() if codes is None else codes) == UNKNOWN)
        return int(bad[0]) if bad.size else None


class LabelCoder:
    """Maps the cells of a data column to state codes (see the module docstring for the rules).

    Raises DataError at construction when a state label is also a missing marker.
    """

    def __init__(self, network: Network, missing: Iterable[str] | None = None):
        self.network = network
        self.missing = missing_markers(missing)
        self._lookup: dict[str, dict[str, int]] = {}
        for name in network.observed_names:
            node = network.node(name)
            clash = [s for s in node.states if s in self.missing]
            if clash:
                raise DataError(
                    f"node {name!r} has the state {clash[0]!r}, which is also a missing-value marker; "
                    f"choose the markers with {option('missing')} (for example {option('missing', '?', many=True)}) so that it is read as a state")
            self._lookup[name] = {s: i for i, s in enumerate(node.states)}
        # dtype of the codes that code() returns (UNKNOWN, -2, .. the largest state index): the
        # network's code dtype, so that coded columns go into the code matrix without a cast
        self.dtype = codes_dtype(network)

    def code(self, name: str, values: Any) -> np.ndarray:
        """Codes of one column: state index, HIDDEN for a gap, UNKNOWN for a foreign label.

        The dtype is :attr:`dtype` (:func:`codes_dtype`: int8 unless a node has more than 127 states).
        """
        return self.prepare(name, values).codes()

    def code_checked(self, name: str, values: Any) -> tuple[np.ndarray, int | None]:
        """``(codes, index of the first UNKNOWN code or None)``; scans only when a label is foreign."""
        col = self.prepare(name, values)
        codes = col.codes()
        return codes, col.first_foreign(codes)

    def prepare(self, name: str, values: Any) -> "PreparedColumn":
        """The cells of a column as indices into a table of codes (see :class:`PreparedColumn`)."""
        fast = _int_column(values)
        if fast is not None:  # typed integer column: index a table by value, no hashing
            index, base, present, nulls = fast
            table = np.full(int(present[-1]) + 1 if present.size else 1, UNKNOWN, dtype=self.dtype)
            for k in present.tolist():  # the values that may occur
                table[k] = self._code_of(name, base + k)
            return PreparedColumn(index, table, nulls, bool(np.any(table[present] == UNKNOWN)))
        fcodes, uniques = _factorize(values)
        table = np.full(len(uniques) + 1, HIDDEN, dtype=self.dtype)  # last slot: the null sentinel (-1)
        for k, v in enumerate(uniques):
            table[k] = self._code_of(name, v)
        return PreparedColumn(fcodes, table, None, bool(np.any(table == UNKNOWN)))

    def _code_of(self, name: str, v: Any) -> int:
        cands = _candidates(v)
        if cands is None or any(c in self.missing for c in cands):
            return HIDDEN
        lookup = self._lookup[name]
        for c in cands:
            if c in lookup:
                return lookup[c]
        return UNKNOWN

    def label_error(self, name: str, label: Any, where: str) -> DataError:
        states = self.network.node(name).states
        text = label if isinstance(label, str) else (_candidates(label) or ("",))[0]
        near = similar_label(text.strip(), states)
        mean = f"did you mean {near!r}? " if near is not None else ""
        hint = (f", or pass {option('missing', text.strip(), many=True)} if it marks a gap"
                if text.strip() and text.isprintable() else "")
        return DataError(f"{where}, column {name!r}: label {_show(text)} is not a state of {name!r} "
                         f"(states: {', '.join(states)}); {mean}fix the value{hint}")

    def check(self, name: str, codes: np.ndarray, values: Any, locate: Locate, row_offset: int = 0) -> None:
        """Raise the label error of the first UNKNOWN code of a column (rows counted from ``row_offset``)."""
        bad = np.flatnonzero(codes == UNKNOWN)
        if bad.size:
            i = int(bad[0])
            raise self.label_error(name, _value_at(values, i), locate(row_offset + i))


def similar_label(text: str, states: Sequence[str]) -> str | None:
    """The one state that ``text`` resembles (:func:`adfit.errors.similar_label`: the same but
    for case, or one character added, removed or changed); None when there is none or several."""
    from .errors import similar_label as _similar

    return _similar(text, states)


def _count_problem(values: Any) -> tuple[np.ndarray, int | None, str]:
    """``(weights, first bad index or None, what is wrong with it)`` of a count column."""
    if hasattr(values, "to_pandas"):
        values = values.to_pandas()
    s = pd.Series(values).reset_index(drop=True)
    is_bool = (np.ones(len(s), dtype=bool) if pd.api.types.is_bool_dtype(s.dtype) else
               s.map(lambda v: isinstance(v, (bool, np.bool_))).to_numpy(dtype=bool) if s.dtype == object else None)
    vals = pd.to_numeric(s.where(~is_bool, None) if is_bool is not None and is_bool.any() and s.dtype == object
                         else s, errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan)
    with np.errstate(invalid="ignore"):
        bad_mask = ~np.isfinite(vals) | (vals < 0) | (vals > MAX_TOTAL_COUNT)
    if is_bool is not None:
        bad_mask |= is_bool
    bad = np.flatnonzero(bad_mask)
    if not bad.size:
        return vals, None, ""
    i = int(bad[0])
    v = s.iloc[i]
    if is_bool is not None and is_bool[i]:
        return vals, i, f"count {_show(bool(v))} is not a number; counts must be numbers >= 0"
    if np.isfinite(vals[i]) and vals[i] > MAX_TOTAL_COUNT:
        return vals, i, (f"count {_show(v)} is more than 2**53 = {MAX_TOTAL_COUNT:.4g} records, beyond which float64 "
                         f"no longer counts them exactly; rescale the count column")
    return vals, i, (f"count {_show(v)} is not a non-negative number; counts must be numbers >= 0 "
                     f"(no gaps in the count column)")


def count_values(values: Any, name: str, locate: Locate, row_offset: int = 0) -> np.ndarray:
    """The weights of a count column as float64; raises DataError at the first invalid one."""
    vals, i, what = _count_problem(values)
    if i is not None:
        raise DataError(f"{locate(row_offset + i)}, column {name!r}: {what}")
    return vals


class _FirstError:
    """The error of the earliest row offered (on a tie, the one offered first)."""

    def __init__(self) -> None:
        self.row: int | None = None
        self.make: Callable[[], DataError] | None = None

    def offer(self, row: int, make: Callable[[], DataError]) -> None:
        if self.row is None or row < self.row:
            self.row, self.make = row, make

    def raise_if_any(self) -> None:
        if self.make is not None:
            raise self.make()


def first_error(coder: "LabelCoder", get: Callable[[str], Any], names: Sequence[str], count_column: str | None,
                locate: Locate, row_offset: int = 0) -> DataError | None:
    """The error of the earliest bad cell among the columns ``names`` (and the count column), or None.

    Within one row, a label error comes before a count error and columns go in the order given.
    """
    first = _FirstError()
    for name in names:
        col = get(name)
        i = coder.prepare(name, col).first_foreign()
        if i is not None:
            first.offer(i, lambda name=name, col=col, i=i: coder.label_error(name, _value_at(col, i),
                                                                            locate(row_offset + i)))
    if count_column is not None:
        _, i, what = _count_problem(get(count_column))
        if i is not None:
            first.offer(i, lambda: DataError(f"{locate(row_offset + i)}, column {count_column!r}: {what}"))
    return first.make() if first.make is not None else None


def check_columns(network: Network, columns: Sequence[str], *, count_column: str | None = None,
                  ignore_columns: Iterable[str] = (), source: str = "<data>") -> list[str]:
    """Check the column names against the network; return the columns to read.

    The columns to read are the non-latent nodes (network order) and then the count column.
    """
    cols = [str(c) for c in columns]
    ignore = list(dict.fromkeys(str(c) for c in ignore_columns))
    blank = [i + 1 for i, c in enumerate(cols) if c.strip() == ""]
    if blank:
        raise DataError(f"{source}: column {blank[0]} has an empty name in the header; name it or delete the column")
    dup = sorted(c for c, k in _Counter(cols).items() if k > 1)
    if dup:
        raise DataError(f"{source}: column(s) {dup} appear more than once; rename or remove the duplicates")
    for c in ignore:
        if c not in cols:
            raise DataError(f"{source}: {option('ignore_columns')} names {c!r}, which is not a column of the data; "
                            f"{did_you_mean(c, cols)}columns: {', '.join(cols)}")
        if c in network and not network.node(c).latent:
            raise DataError(f"{source}: {option('ignore_columns')} names {c!r}, which is an observed node of the network; "
                            f"an observed node needs its column (declare it latent = true to leave it out)")
        if c == count_column:
            raise DataError(f"{source}: {c!r} is both the count column and in {option('ignore_columns')}; choose one")
    if count_column is not None:
        if count_column in network:
            raise DataError(f"{source}: count column {count_column!r} is also a node of the network; "
                            f"rename the count column")
        if count_column not in cols:
            raise DataError(f"{source}: count column {count_column!r} not found; "
                            f"{did_you_mean(count_column, cols)}columns are: {', '.join(cols)}")
    for c in network.latent_names:
        if c in cols and c not in ignore:
            raise DataError(f"{source}: column {c!r} is a latent node, which is never observed; "
                            f"drop the column, list it in {option('ignore_columns')}, or declare the node latent = false")
    expected = set(network.observed_names)
    extra = [c for c in cols if c not in expected and c not in ignore and c != count_column
             and c not in network.latent_names]
    absent = [c for c in network.observed_names if c not in cols]
    if absent:
        lower = {c.lower(): c for c in extra}
        near = [f"{lower[a.lower()]!r} for {a!r}" for a in absent if a.lower() in lower]
        hint = f" (names are case-sensitive: {', '.join(near)}?)" if near else ""
        if not near:  # one character apart (Levenshtein distance 1)
            close = [(similar_label(a, [str(c) for c in extra]), a) for a in absent]
            near = [f"{c!r} for {a!r}" for c, a in close if c is not None]
            hint = f" (did you mean {', '.join(near)}?)" if near else ""
        raise DataError(f"{source}: column(s) {absent} are missing{hint}; every non-latent node needs a column "
                        f"(declare a node latent = true if it is never observed)")
    if extra:
        raise DataError(f"{source}: column(s) {extra} are not nodes of the network; "
                        f"remove them or pass {option('ignore_columns', ','.join(extra), many=True)}")
    return list(network.observed_names) + ([count_column] if count_column is not None else [])


def code_columns(network: Network, coder: LabelCoder, get: Callable[[str], Any], n: int, *,
                 count_column: str | None, locate: Locate, row_offset: int = 0,
                 packed: bool = False, out: np.ndarray | None = None) -> tuple[np.ndarray | PackedRows, np.ndarray | None]:
    """Code the columns of one table (or chunk) of ``n`` rows; ``get(name)`` returns a column.

    Returns ``(rows, weights)`` with one entry per record (weights None without a count column):
    ``rows`` is the code matrix ``(n, n_nodes)`` (:func:`codes_dtype`), or with ``packed=True`` the rows packed
    into int64 words (:class:`~adfit.rowkeys.PackedRows`; no code matrix is built: less memory),
    written into ``out`` (an int64 ``(k, n)`` array or view) when given.
    Raises DataError for the earliest row holding an unknown label or an invalid count (within a
    row: labels in network order, then the count), naming the row through ``locate(row_offset + i)``.
    """
    columns: list[PreparedColumn | None] = [None] * len(network)  # latent nodes: every cell hidden
    first = _FirstError()
    for name in network.observed_names:
        col = get(name)
        c = coder.prepare(name, col)
        i = c.first_foreign()
        if i is not None:
            first.offer(i, lambda name=name, col=col, i=i: coder.label_error(name, _value_at(col, i),
                                                                            locate(row_offset + i)))
            continue
        columns[network.index(name)] = c
    weights = None
    if count_column is not None:
        weights, i, what = _count_problem(get(count_column))
        if i is not None:
            first.offer(i, lambda: DataError(f"{locate(row_offset + i)}, column {count_column!r}: {what}"))
    first.raise_if_any()
    if packed:
        return key_layout(tuple(network.cards)).pack_prepared(columns, n, out=out), weights
    rows = np.full((n, len(network)), HIDDEN, dtype=codes_dtype(network))
    for j, c in enumerate(columns):
        if c is not None:
            rows[:, j] = c.codes()
    return rows, weights


def reduce_any(rows: np.ndarray | PackedRows, weights: np.ndarray | None, cards: Sequence[int], *,
               inverse: bool = True) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    """:func:`reduce_rows` for what :func:`code_columns` returns: a code matrix or packed rows."""
    if isinstance(rows, PackedRows):
        return reduce_packed(rows, weights, cards, inverse=inverse)
    return reduce_rows(rows, weights, cards)


def select_rows(rows: np.ndarray | PackedRows, keep: np.ndarray) -> np.ndarray | PackedRows:
    """The records of ``rows`` (code matrix or packed rows) where ``keep`` is true."""
    return PackedRows(rows.words[:, keep]) if isinstance(rows, PackedRows) else rows[keep]


def concat_rows(parts: Sequence[np.ndarray | PackedRows]) -> np.ndarray | PackedRows:
    """The records of several code matrices, or of several packed rows, one after the other."""
    if len(parts) == 1:
        return parts[0]
    if isinstance(parts[0], PackedRows):
        return PackedRows(np.concatenate([p.words for p in parts], axis=1))
    return np.concatenate(parts)


def check_total_count(counts: np.ndarray, source: str) -> None:
    """Refuse weights that add up to more than :data:`MAX_TOTAL_COUNT` (or overflow)."""
    with np.errstate(over="ignore"):
        total = float(np.sum(counts, dtype=np.float64))
    if not total <= MAX_TOTAL_COUNT:
        shown = "more than 1.8e308 (float64 overflows)" if not math.isfinite(total) else f"{total:.4g}"
        raise DataError(f"{source}: the record counts add up to {shown}, more than 2**53 = {MAX_TOTAL_COUNT:.4g} "
                        f"records, beyond which float64 no longer counts them exactly; rescale the count column")


def coded_from_rows(network: Network, codes: np.ndarray | PackedRows, weights: np.ndarray | None, source: str, *,
                    keep_inverse: bool = True) -> CodedData:
    """Reduce per-record codes (a code matrix or packed rows), with optional weights, to a :class:`CodedData`.

    Records of weight 0 are dropped (and then no ``inverse`` is kept).
    """
    if weights is not None:
        keep = weights > 0
        if not keep.all():
            codes, weights = select_rows(codes, keep), weights[keep]
            keep_inverse = False
    keep_inverse = keep_inverse and weights is None
    distinct, counts, inverse = reduce_any(codes, weights, network.cards, inverse=keep_inverse)
    if distinct.shape[0] == 0:
        raise DataError(f"{source}: no records (the table is empty or all counts are 0)")
    check_total_count(counts, source)
    return CodedData(distinct, counts, inverse if keep_inverse else None, source)


def frame_rows(source: str) -> Locate:
    return lambda i: f"{source}: data row {i + 1}"


def encode_frame(network: Network, df: pd.DataFrame, *, missing: Iterable[str] | None = None,
                 count_column: str | None = None, ignore_columns: Iterable[str] = (),
                 source: str = "<DataFrame>", row_offset: int = 0, locate: Locate | None = None) -> CodedData:
    """Code a DataFrame against the network and reduce it to distinct rows.

    Args:
        network: the network; columns must be its non-latent nodes.
        df: one row per record (or per cell of a table, with ``count_column``).
        missing: labels that mean "not recorded" (default: NA, NaN, ``?``; an empty cell, a
            null and a floating NaN are always missing).
        count_column: name of a column of non-negative record counts (pre-aggregated data).
        ignore_columns: extra columns to drop silently.
        source: name used in error messages.
        row_offset: number added to row numbers in messages (for chunked reading).
        locate: maps a 0-based data row to its description in messages (default
            ``"<source>: data row N"``, 1-based).

    Raises:
        DataError: missing column, unexpected column, unknown label (naming column, row and
            label), invalid counts.
    """
    cols = [str(c) for c in df.columns]
    check_columns(network, cols, count_column=count_column, ignore_columns=ignore_columns, source=source)
    coder = LabelCoder(network, missing)
    pos = {c: i for i, c in enumerate(cols)}
    codes, weights = code_columns(network, coder, lambda c: df.iloc[:, pos[c]], len(df), count_column=count_column,
                                  locate=locate or frame_rows(source), row_offset=row_offset, packed=True)
    return coded_from_rows(network, codes, weights, source)


# ----------------------------------------------------------------- files
def resolve_inputs(path: str | Path | Sequence[str | Path]) -> tuple[list[Path], str]:
    """The data files behind ``path`` and their format (``"csv"`` or ``"parquet"``).

    ``path`` is a file, a folder (every ``.csv`` / ``.parquet`` / ``.pq`` file below it, names
    starting with ``.`` or ``_`` skipped), a glob pattern, or a list of files. Files are sorted
    by name; all must have the same format.
    """
    if isinstance(path, (list, tuple)):
        files = [Path(p) for p in path]
        label = f"{len(files)} files"
    else:
        p = Path(path)
        label = str(p)
        if p.is_dir():
            files = sorted(f for f in p.rglob("*") if f.is_file() and f.suffix.lower() in PARQUET_SUFFIXES + CSV_SUFFIXES
                           and not any(part.startswith((".", "_")) for part in f.relative_to(p).parts))
            if not files:
                raise DataError(f"{p}: the folder holds no .csv or .parquet files")
        elif not p.exists() and any(ch in str(p) for ch in "*?["):
            files = sorted(Path(f) for f in _glob.glob(str(p), recursive=True) if Path(f).is_file())
            if not files:
                raise DataError(f"{p}: no file matches this pattern")
        else:
            files = [p]
    if not files:
        raise DataError(f"{label}: no data files given")
    for f in files:
        if not f.exists():
            raise DataError(f"{f}: data file not found (check the path)")
        if f.is_dir():
            raise DataError(f"{f}: is a folder; give a CSV or Parquet file, or the folder alone")
    fmts = {("parquet" if f.suffix.lower() in PARQUET_SUFFIXES else "csv") for f in files}
    if len(fmts) > 1:
        raise DataError(f"{label}: mixes CSV and Parquet files; use one format")
    return files, fmts.pop()


def _csv_open(path: Path):
    return open(path, newline="", encoding="utf-8-sig")


def csv_header(path: str | Path) -> list[str]:
    """The column names in the header row of a CSV file (as written, spaces kept)."""
    p = Path(path)
    try:
        with _csv_open(p) as fh:
            for rec in csv.reader(fh):
                if rec:
                    return rec
    except FileNotFoundError:
        raise DataError(f"{p}: data file not found (check the path)") from None
    except UnicodeDecodeError:
        raise DataError(f"{p}: not UTF-8 text; save the CSV as UTF-8") from None
    except csv.Error as e:
        raise DataError(f"{p}: the header row is not valid CSV ({e})") from None
    except OSError as e:
        raise DataError(f"{p}: cannot read the data file ({e.strerror})") from None
    raise DataError(f"{p}: the file is empty; a header row with the node names is needed")


def _csv_records(path: Path) -> Iterator[tuple[int, list[str]]]:
    """``(start_line, fields)`` of every data record after the header.

    Empty lines are skipped, except after the header of a one-column file: there an empty line
    is a record whose only cell is empty (RFC 4180 makes every line a record), read as a gap
    like an empty cell of a wider file (:func:`one_column_empty_lines_are_records`)."""
    with open(path, newline="", encoding="utf-8-sig", errors="replace") as fh:
        reader = csv.reader(fh)
        start = 1
        header: list[str] | None = None
        for rec in reader:
            if header is None:
                if rec:
                    header = rec
            elif rec:
                yield start, rec
            elif len(header) == 1:
                yield start, [""]
            start = reader.line_num + 1


def csv_leading_empty_lines(path: str | Path) -> int:
    """Number of empty lines before the header row of a CSV file."""
    n = 0
    with open(path, newline="", encoding="utf-8-sig", errors="replace") as fh:
        for line in fh:
            if line.strip("\r\n") != "":
                return n
            n += 1
    return n


def one_column_empty_lines_are_records(header: Sequence[str]) -> bool:
    """In a file with one column, an empty line after the header is a record with an empty cell.

    Skipping it as a blank line would drop records without a word (six records read as three);
    an empty cell is a gap under the default missing labels, or an unknown label otherwise, as in
    any other file. Empty lines before the header, and in wider files, are not records (a record
    of a wider file has its commas)."""
    return len(header) == 1


def csv_line_of(path: str | Path, row: int) -> int | None:
    """File line (1-based, header = line 1 when it opens the file) on which data row ``row`` (0-based) starts."""
    try:
        for k, (line, _) in enumerate(_csv_records(Path(path))):
            if k == row:
                return line
    except (csv.Error, OSError):
        return None
    return None


def csv_rows(path: str | Path) -> Locate:
    p = str(path)

    def locate(i: int) -> str:
        line = csv_line_of(p, i)
        return f"{p}: line {line} (data row {i + 1})" if line is not None else f"{p}: data row {i + 1}"
    return locate


def parquet_rows(path: str | Path) -> Locate:
    return frame_rows(str(path))


def _csv_error(path: Path, exc: Exception) -> DataError:
    """Turn a CSV parser failure into one line naming the first malformed record."""
    msg = str(exc)
    low = msg.lower()
    if "utf8" in low or "utf-8" in low or "unicode" in low or isinstance(exc, UnicodeDecodeError):
        return DataError(f"{path}: not UTF-8 text; save the CSV as UTF-8")
    try:
        n = len(csv_header(path))
        for line, rec in _csv_records(path):
            if len(rec) != n:
                return DataError(f"{path}: line {line} has {len(rec)} field(s), the header has {n}; "
                                 f"every record needs one value per column (leave a cell empty for a gap)")
    except (csv.Error, OSError, DataError):
        pass
    first = msg.splitlines()[0] if msg else type(exc).__name__
    return DataError(f"{path}: not a valid CSV table ({first})")


def _csv_arrow_options(path: Path, header: Sequence[str], columns: Sequence[str], block_size: int | None = None):
    import pyarrow as pa
    import pyarrow.csv as pcsv
    keep_empty = one_column_empty_lines_are_records(header)
    ro = pcsv.ReadOptions(use_threads=True, skip_rows=csv_leading_empty_lines(path) if keep_empty else 0,
                          **({"block_size": int(block_size)} if block_size else {}))
    po = pcsv.ParseOptions(delimiter=",", quote_char='"', double_quote=True, escape_char=False,
                           newlines_in_values=True, ignore_empty_lines=not keep_empty)
    co = pcsv.ConvertOptions(column_types={c: pa.string() for c in header}, include_columns=list(columns),
                             strings_can_be_null=False, quoted_strings_can_be_null=False, null_values=[],
                             check_utf8=True)
    return ro, po, co


def _raw_names(header: Sequence[str], wanted: Sequence[str]) -> list[str]:
    stripped = {h.strip(): h for h in header}
    return [stripped[w] for w in wanted]


def read_csv_arrow(path: str | Path, columns: Sequence[str] | None = None):
    """A CSV file as a pyarrow Table of strings, only ``columns`` (stripped names) if given."""
    import pyarrow.csv as pcsv
    p = Path(path)
    header = csv_header(p)
    names = [h.strip() for h in header]
    raw = _raw_names(header, columns if columns is not None else names)
    try:
        t = pcsv.read_csv(p, *_csv_arrow_options(p, header, raw))
    except Exception as e:  # pyarrow raises ArrowInvalid and friends, no common public base
        raise _csv_error(p, e) from None
    return t.rename_columns([c.strip() for c in t.column_names])


def iter_csv_batches(path: str | Path, columns: Sequence[str], chunk_rows: int) -> Iterator[Any]:
    """Stream a CSV file as pyarrow RecordBatches of about ``chunk_rows`` rows (stripped names)."""
    import pyarrow.csv as pcsv
    p = Path(path)
    header = csv_header(p)
    raw = _raw_names(header, columns)
    row_bytes = max(8, 4 * len(header))
    try:
        with open(p, "rb") as fh:  # estimate the bytes per row from the first kilobytes
            head = fh.read(1 << 16)
        if head.count(b"\n") > 1:
            row_bytes = max(1, len(head) // head.count(b"\n"))
    except OSError:
        pass
    block = int(min(max(chunk_rows * row_bytes, 1 << 12), 1 << 28))
    try:
        reader = pcsv.open_csv(p, *_csv_arrow_options(p, header, raw, block))
        for batch in reader:
            yield batch.rename_columns([c.strip() for c in batch.schema.names])
    except DataError:
        raise
    except Exception as e:
        raise _csv_error(p, e) from None


def parquet_names(path: str | Path) -> list[str]:
    import pyarrow.parquet as pq
    p = Path(path)
    try:
        return list(pq.read_schema(p).names)
    except FileNotFoundError:
        raise DataError(f"{p}: data file not found (check the path)") from None
    except Exception as e:
        raise DataError(f"{p}: not a readable Parquet file ({type(e).__name__}: {_first_line(e)})") from None


SUPPORTED_PARQUET_TYPES = "text, integer, floating-point, boolean or dictionary (categorical)"


def check_parquet_types(files: Sequence[Path], columns: Sequence[str]) -> None:
    """Refuse Parquet columns that hold more than one value per cell; warn about null-typed ones.

    A list, struct, map or union column (pyarrow's nested types) has no label per cell: one line
    naming the file, the column, its type and the types that are read. A column of null type
    (pandas writes one for a column of None only) holds no value in any row: it is read as all
    gaps, like an empty CSV column, with a :class:`DataWarning` (the CLI prints it as one line),
    since it often means a column that was not filled in at all.
    """
    import warnings

    import pyarrow as pa
    import pyarrow.parquet as pq

    from .errors import DataWarning

    for f in files:
        try:
            schema = pq.read_schema(f)
        except Exception as e:
            raise DataError(f"{f}: not a readable Parquet file ({type(e).__name__}: {_first_line(e)})") from None
        by_trim = {n.strip(): n for n in schema.names}
        for c in columns:
            if c not in by_trim:
                continue
            t = schema.field(by_trim[c]).type
            if pa.types.is_nested(t):
                shown = str(t) if len(str(t)) <= 60 else str(t)[:57] + "..."
                raise DataError(f"{f}: column {c!r} has Parquet type {shown}, several values per cell; "
                                f"adfit reads {SUPPORTED_PARQUET_TYPES} columns, one label per cell: store it as one of those")
            if pa.types.is_null(t):
                warnings.warn(f"{f}: column {c!r} has Parquet type null (no value in any row): every cell "
                              f"is read as missing; check that the column was filled in", DataWarning, stacklevel=2)


def _first_line(e: Exception) -> str:
    s = str(e)
    return s.splitlines()[0] if s else ""


def read_parquet_arrow(path: str | Path, columns: Sequence[str] | None = None):
    import pyarrow.parquet as pq
    p = Path(path)
    names = parquet_names(p)
    raw = _raw_names(names, columns) if columns is not None else names
    try:
        t = pq.read_table(p, columns=raw)
    except Exception as e:
        raise DataError(f"{p}: cannot read the Parquet file ({type(e).__name__}: {_first_line(e)})") from None
    return t.rename_columns([c.strip() for c in t.column_names])


def iter_parquet_batches(path: str | Path, columns: Sequence[str], chunk_rows: int,
                         row_groups: Sequence[int] | None = None) -> Iterator[Any]:
    """Stream a Parquet file (or some of its row groups) as RecordBatches (stripped names)."""
    import pyarrow.parquet as pq
    p = Path(path)
    raw = _raw_names(parquet_names(p), columns)
    try:
        pf = pq.ParquetFile(p)
        for batch in pf.iter_batches(batch_size=int(chunk_rows), columns=raw, row_groups=row_groups):
            yield batch.rename_columns([c.strip() for c in batch.schema.names])
    except DataError:
        raise
    except Exception as e:
        raise DataError(f"{p}: cannot read the Parquet file ({type(e).__name__}: {_first_line(e)})") from None


def file_columns(path: Path, fmt: str) -> list[str]:
    """Column names of a data file, spaces around them trimmed."""
    names = csv_header(path) if fmt == "csv" else parquet_names(path)
    return [n.strip() for n in names]


def common_columns(files: Sequence[Path], fmt: str) -> list[str]:
    """The column names shared by every file; DataError naming the first file that differs."""
    first = file_columns(files[0], fmt)
    for f in files[1:]:
        cols = file_columns(f, fmt)
        if sorted(cols) != sorted(first) or (fmt == "csv" and cols != first):
            raise DataError(f"{f}: its columns ({', '.join(cols)}) differ from those of {files[0]} "
                            f"({', '.join(first)}); every file needs the same header")
    return first


def locator(path: Path, fmt: str) -> Locate:
    return csv_rows(path) if fmt == "csv" else parquet_rows(path)


def read_table(path: str | Path) -> pd.DataFrame:
    """Read a CSV or Parquet file (CSV: every cell as text; Parquet: typed), column names trimmed."""
    files, fmt = resolve_inputs(path)
    if len(files) != 1:
        raise DataError(f"{path}: holds {len(files)} files; read_table takes one file")
    f = files[0]
    table = read_csv_arrow(f) if fmt == "csv" else read_parquet_arrow(f)
    df = table.to_pandas()
    df.columns = [str(c).strip() for c in df.columns]
    return df


def _encode_file(network: Network, f: Path, fmt: str, coder: LabelCoder, read: Sequence[str],
                 count_column: str | None) -> tuple[PackedRows, np.ndarray | None]:
    table = read_csv_arrow(f, read) if fmt == "csv" else read_parquet_arrow(f, read)
    return encode_table(network, coder, table, count_column=count_column, locate=locator(f, fmt))


def encode_table(network: Network, coder: LabelCoder, table: Any, *, count_column: str | None, locate: Locate,
                 batch_rows: int = 1 << 20) -> tuple[PackedRows, np.ndarray | None]:
    """Code a pyarrow Table of records into packed rows (and weights), piece by piece.

    The table is taken in zero-copy slices of at most ``batch_rows`` rows, each coded straight
    into its part of one array of words, so no column is copied whole; errors name the earliest
    bad row of the table, as when coding it at once.
    """
    n = table.num_rows
    layout = key_layout(tuple(network.cards))
    words = np.empty((layout.k, n), dtype=np.int64)
    weights = [] if count_column is not None else None
    offset = 0
    for batch in table.to_batches(max_chunksize=int(batch_rows)):
        m = batch.num_rows
        _, w = code_columns(network, coder, batch.column, m, count_column=count_column, locate=locate,
                            row_offset=offset, packed=True, out=words[:, offset:offset + m])
        if weights is not None:
            weights.append(w)
        offset += m
    if offset != n:  # pragma: no cover - to_batches covers every row
        raise AssertionError("table batches do not cover the table")
    if weights is not None:
        weights = np.concatenate(weights) if weights else np.zeros(0)
    return PackedRows(words), weights


def _release_arrow_memory() -> None:
    """Hand the memory pyarrow keeps for reuse back to the system (the tables read are gone)."""
    try:
        import pyarrow as pa
        pa.default_memory_pool().release_unused()
    except (ImportError, AttributeError):  # pragma: no cover
        pass


def load_files(network: Network, path: str | Path | Sequence[str | Path], *, missing: Iterable[str] | None = None,
               count_column: str | None = None, ignore_columns: Iterable[str] = ()) -> CodedData:
    """Read whole files into memory (the ``pandas`` engine); keeps the per-record ``inverse``.

    Several files are read in name order and their records concatenated.
    """
    files, fmt = resolve_inputs(path)
    source = str(path) if not isinstance(path, (list, tuple)) else str(files[0].parent)
    cols = common_columns(files, fmt)
    read = check_columns(network, cols, count_column=count_column, ignore_columns=ignore_columns,
                         source=str(files[0]) if len(files) == 1 else source)
    if fmt == "parquet":
        check_parquet_types(files, read)
    coder = LabelCoder(network, missing)
    parts = [_encode_file(network, f, fmt, coder, read, count_column) for f in files]
    _release_arrow_memory()
    codes = concat_rows([c for c, _ in parts])
    weights = None
    if count_column is not None:
        weights = np.concatenate([w for _, w in parts])
    return coded_from_rows(network, codes, weights, source)


def validate_coded(network: Network, data: CodedData) -> CodedData:
    """Check a ready-made :class:`CodedData` against the network (shape, code ranges, counts)."""
    codes = np.asarray(data.codes)
    counts = np.asarray(data.counts)
    src = data.source
    if codes.ndim != 2 or codes.shape[1] != len(network):
        raise DataError(f"{src}: coded data has shape {list(codes.shape)}, expected (rows, {len(network)}) for "
                        f"the nodes {', '.join(network.names)}")
    if codes.dtype.kind not in "iu":
        raise DataError(f"{src}: codes must be integers, got dtype {codes.dtype}")
    if counts.shape != (codes.shape[0],):
        raise DataError(f"{src}: counts has shape {list(counts.shape)}, expected ({codes.shape[0]},)")
    if not np.all(np.isfinite(counts)) or np.any(counts <= 0):
        raise DataError(f"{src}: counts must be finite and > 0")
    check_total_count(counts, src)
    if not _codes_in_range(network, codes):
        _raise_first_bad_code(network, codes, src)  # a column-by-column search, to name the first bad cell
    dtype = codes_dtype(network)  # the codes are in range, so the cast to the narrower type is exact
    if codes.dtype != dtype or counts.dtype != np.float64:
        return CodedData(codes.astype(dtype), counts.astype(np.float64), data.inverse, data.source)
    return data


#: cells of the code matrix checked at a time by :func:`_codes_in_range`
VALIDATE_BLOCK = 1 << 22


def _codes_in_range(network: Network, codes: np.ndarray) -> bool:
    """Whether every code is in ``HIDDEN..card-1`` and every latent column is all ``HIDDEN``:
    the per-column minima and maxima of blocks of whole rows (a reduction along the rows of a
    row-major block reads it once; a column of a row-major matrix costs a pass over all of it)."""
    n = codes.shape[1]
    if codes.shape[0] == 0 or n == 0:
        return True
    hi = np.array([HIDDEN if nd.latent else nd.card - 1 for nd in network.nodes])
    step = max(1, VALIDATE_BLOCK // n)
    for s0 in range(0, codes.shape[0], step):
        blk = codes[s0:s0 + step]
        if np.any(blk.min(axis=0) < HIDDEN) or np.any(blk.max(axis=0) > hi):
            return False
    return True


def _raise_first_bad_code(network: Network, codes: np.ndarray, src: str) -> None:
    for j, n in enumerate(network.nodes):
        col = codes[:, j]
        if n.latent and np.any(col != HIDDEN):
            raise DataError(f"{src}: column {j} ({n.name!r}) is a latent node; its codes must all be {HIDDEN}")
        bad = np.flatnonzero((col < HIDDEN) | (col >= n.card))
        if bad.size:
            raise DataError(f"{src}: row {int(bad[0]) + 1}, node {n.name!r}: code {int(col[bad[0]])} is outside "
                            f"{HIDDEN}..{n.card - 1}")
    raise AssertionError("a code out of range was found but not named")  # pragma: no cover


def load_data(network: Network, data: "str | Path | pd.DataFrame | CodedData", *,
              missing: Iterable[str] | None = None, count_column: str | None = None,
              ignore_columns: Iterable[str] = ()) -> CodedData:
    """Accept a path (CSV/Parquet file, folder or glob), a DataFrame or a :class:`CodedData`."""
    if isinstance(data, CodedData):
        return validate_coded(network, data)
    if isinstance(data, pd.DataFrame):
        return encode_frame(network, data, missing=missing, count_column=count_column,
                            ignore_columns=ignore_columns)
    return load_files(network, data, missing=missing, count_column=count_column, ignore_columns=ignore_columns)


def decode(network: Network, codes: np.ndarray) -> pd.DataFrame:
    """Turn coded rows back into a DataFrame of labels (hidden cells become None)."""
    out = {}
    for name in network.observed_names:
        j = network.index(name)
        states = np.array(network.node(name).states, dtype=object)
        c = codes[:, j]
        col = np.where(c >= 0, states[np.clip(c, 0, None)], None)
        out[name] = pd.Series(col, dtype=object)
    return pd.DataFrame(out)

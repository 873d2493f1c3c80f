"""Data at the boundary: read tables, code labels as integers, reduce to distinct rows.

Nothing in here touches JAX. The likelihood depends on the data only through the distinct
coded rows and their counts, so every later step works on a :class:`CodedData`.

Coding: column ``j`` of ``codes`` is node ``j`` of the network (network order); a value is the
index of the state label in the node's declared ``states``; ``-1`` (:data:`HIDDEN`) marks a cell
that is missing, and every cell of a latent node.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from typing import Iterable, Sequence

import numpy as np
import pandas as pd

from .errors import DataError
from .network import Network

HIDDEN = -1
DEFAULT_MISSING: tuple[str, ...] = ("", "NA", "NaN", "?")


@dataclass(frozen=True, eq=False)
class CodedData:
    """Distinct coded rows with their counts.

    Attributes:
        codes: int32 array ``(n_distinct, n_nodes)``, network node order, ``-1`` = hidden.
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


def reduce_rows(codes: np.ndarray, weights: np.ndarray | None, cards: Sequence[int]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Reduce coded rows to distinct rows.

    Returns ``(distinct_codes, counts, inverse)``; distinct rows come in ascending order of a
    packed integer key (a deterministic order). Uses one packed int64 key per row when the
    product of ``(card + 1)`` fits below 2**63, else ``np.unique(axis=0)``.
    """
    codes = np.asarray(codes, dtype=np.int32)
    n = codes.shape[0]
    w = np.ones(n) if weights is None else np.asarray(weights, dtype=np.float64)
    if n == 0:
        return codes.reshape(0, len(cards)), np.zeros(0), np.zeros(0, dtype=np.int64)
    bases = [c + 1 for c in cards]
    if math.prod(bases) < 2 ** 62:
        mult = np.ones(len(bases), dtype=np.int64)
        for j in range(len(bases) - 2, -1, -1):
            mult[j] = mult[j + 1] * bases[j + 1]
        key = (codes.astype(np.int64) + 1) @ mult
        uniq, first, inverse = np.unique(key, return_index=True, return_inverse=True)
        distinct = codes[first]
    else:
        distinct, inverse = np.unique(codes, axis=0, return_inverse=True)
    inverse = inverse.reshape(-1)
    counts = np.bincount(inverse, weights=w, minlength=distinct.shape[0]).astype(np.float64)
    return distinct.astype(np.int32), counts, inverse.astype(np.int64)


def _missing_set(missing: Iterable[str] | None) -> frozenset[str]:
    return frozenset(DEFAULT_MISSING if missing is None else (str(m) for m in missing))


def encode_frame(network: Network, df: pd.DataFrame, *, missing: Iterable[str] | None = None,
                 count_column: str | None = None, ignore_columns: Iterable[str] = (),
                 source: str = "<DataFrame>", row_offset: int = 0) -> CodedData:
    """Code a DataFrame against the network and reduce it to distinct rows.

    Args:
        network: the network; columns must be its non-latent nodes.
        df: one row per record (or per cell of a table, with ``count_column``).
        missing: labels that mean "not recorded" (default: empty, NA, NaN, ``?``); actual
            NaN/None values are always missing.
        count_column: name of a column of non-negative record counts (pre-aggregated data).
        ignore_columns: extra columns to drop silently.
        source: name used in error messages.
        row_offset: number added to row numbers in messages (for chunked reading).

    Raises:
        DataError: missing column, unexpected column, unknown label (naming column, row and
            label), invalid counts.
    """
    miss = _missing_set(missing)
    ignore = set(ignore_columns)
    cols = [str(c) for c in df.columns]
    dup = sorted({c for c in cols if cols.count(c) > 1})
    if dup:
        raise DataError(f"{source}: column(s) {dup} appear more than once; rename or remove the duplicates")
    for c in ignore:
        if c not in cols:
            raise DataError(f"{source}: --ignore-columns names {c!r}, which is not a column of the data")
    for c in network.latent_names:
        if c in cols and c not in ignore:
            raise DataError(f"{source}: column {c!r} is a latent node, which is never observed; "
                            f"drop the column, list it in --ignore-columns, or declare the node latent = false")
    if count_column is not None and count_column not in cols:
        raise DataError(f"{source}: count column {count_column!r} not found; columns are: {', '.join(cols)}")
    expected = set(network.observed_names)
    extra = [c for c in cols if c not in expected and c not in ignore and c != count_column
             and c not in network.latent_names]
    if extra:
        raise DataError(f"{source}: column(s) {extra} are not nodes of the network; "
                        f"remove them or pass --ignore-columns {','.join(extra)}")
    absent = [c for c in network.observed_names if c not in cols]
    if absent:
        raise DataError(f"{source}: column(s) {absent} are missing; every non-latent node needs a column "
                        f"(declare a node latent = true if it is never observed)")

    n = len(df)
    codes = np.full((n, len(network)), HIDDEN, dtype=np.int32)
    for name in network.observed_names:
        j = network.index(name)
        codes[:, j] = _code_column(df[name], network.node(name).states, miss, name, source, row_offset)

    weights = None
    if count_column is not None:
        weights = _count_values(df[count_column], count_column, source, row_offset)
        keep = weights > 0
        if not keep.all():
            codes, weights = codes[keep], weights[keep]
    distinct, counts, inverse = reduce_rows(codes, weights, network.cards)
    if count_column is not None:
        inverse = None  # rows were aggregated: no per-record order to keep
    if distinct.shape[0] == 0:
        raise DataError(f"{source}: no records (the table is empty or all counts are 0)")
    return CodedData(distinct, counts, inverse, source)


def _code_column(col: pd.Series, states: Sequence[str], miss: frozenset[str], name: str,
                 source: str, row_offset: int) -> np.ndarray:
    # Factorize first so that labels are looked up once per distinct value, not once per cell.
    fcodes, uniques = pd.factorize(col, use_na_sentinel=True)
    lookup = {s: i for i, s in enumerate(states)}
    table = np.full(len(uniques) + 1, HIDDEN, dtype=np.int32)  # last slot: NA sentinel (-1)
    for k, v in enumerate(uniques):
        lab = _label(v)
        if lab in miss or lab.strip() in miss:
            continue
        code = lookup.get(lab, lookup.get(lab.strip()))
        if code is None:
            i = int(np.flatnonzero(fcodes == k)[0])
            raise DataError(
                f"{source}: row {row_offset + i + 1}, column {name!r}: label {lab!r} is not a state of {name!r} "
                f"(states: {', '.join(states)}); fix the value or add --missing {lab!r} if it means not recorded")
        table[k] = code
    return table[np.where(fcodes < 0, len(uniques), fcodes)]


def _label(v: object) -> str:
    """Canonical text of a cell: integral floats from numeric columns lose their '.0'."""
    if isinstance(v, (float, np.floating)) and float(v).is_integer():
        return str(int(v))
    if isinstance(v, (bool, np.bool_)):
        return str(bool(v)).lower()
    return str(v)


def _count_values(col: pd.Series, name: str, source: str, row_offset: int) -> np.ndarray:
    vals = pd.to_numeric(col, errors="coerce").to_numpy(dtype=np.float64)
    bad = np.flatnonzero(~np.isfinite(vals) | (vals < 0))
    if bad.size:
        i = bad[0]
        raise DataError(f"{source}: row {row_offset + i + 1}, column {name!r}: count {col.iloc[i]!r} is not a "
                        f"non-negative number; counts must be numbers >= 0")
    return vals


def read_table(path: str | Path) -> pd.DataFrame:
    """Read a CSV or Parquet file with every cell as text (labels are matched as text)."""
    p = Path(path)
    if not p.exists():
        raise DataError(f"{p}: data file not found")
    suffix = p.suffix.lower()
    try:
        if suffix in (".parquet", ".pq"):
            df = pd.read_parquet(p)
        else:
            df = pd.read_csv(p, dtype=str, keep_default_na=False, na_filter=False, skipinitialspace=True)
    except ImportError as e:
        raise DataError(f"{p}: reading Parquet needs pyarrow ({e}); pip install pyarrow") from None
    except pd.errors.EmptyDataError:
        raise DataError(f"{p}: the file is empty; a header row with the node names is needed") from None
    except pd.errors.ParserError as e:
        raise DataError(f"{p}: not a valid CSV table ({str(e).splitlines()[0]})") from None
    except UnicodeDecodeError:
        raise DataError(f"{p}: not UTF-8 text; save the CSV as UTF-8") from None
    except Exception as e:  # pyarrow errors have no common public base class
        raise DataError(f"{p}: cannot read the data file ({type(e).__name__}: {str(e).splitlines()[0] if str(e) else ''})") from None
    df.columns = [str(c).strip() for c in df.columns]
    return df


def load_data(network: Network, data: "str | Path | pd.DataFrame | CodedData", *,
              missing: Iterable[str] | None = None, count_column: str | None = None,
              ignore_columns: Iterable[str] = ()) -> CodedData:
    """Accept a path (CSV/Parquet), a DataFrame or an already coded :class:`CodedData`."""
    if isinstance(data, CodedData):
        if data.codes.ndim != 2 or data.codes.shape[1] != len(network):
            raise DataError(f"{data.source}: coded data has {data.codes.shape[1]} columns, the network has {len(network)} nodes")
        return data
    if isinstance(data, pd.DataFrame):
        return encode_frame(network, data, missing=missing, count_column=count_column,
                            ignore_columns=ignore_columns)
    df = read_table(data)
    return encode_frame(network, df, missing=missing, count_column=count_column,
                        ignore_columns=ignore_columns, source=str(data))


def decode(network: Network, codes: np.ndarray) -> pd.DataFrame:
    """Turn coded rows back into a DataFrame of labels (hidden cells become <NA>)."""
    out = {}
    for name in network.observed_names:
        j = network.index(name)
        states = np.array(network.node(name).states, dtype=object)
        c = codes[:, j]
        col = np.where(c >= 0, states[np.clip(c, 0, None)], None)
        out[name] = pd.Series(col, dtype=object)
    return pd.DataFrame(out)

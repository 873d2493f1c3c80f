"""Reduction of large data files to distinct coded rows with counts, by several engines.

Every engine returns the same :class:`~adfit.data.CodedData`: the same codes (the rules of
:mod:`adfit.data`), the same counts, distinct rows in the lexicographic order of the coded
rows (first node most significant; rows are packed into int64 words, :mod:`adfit.rowkeys`),
and ``source`` the path as given. Only the ``pandas`` engine keeps the per-record ``inverse``;
the others set it to None.

Engines (``--engine``):

``pandas``  (default) reads the whole file(s) into memory; for small and medium data.
``stream``  reads in chunks of about ``chunk_rows`` rows with pyarrow, codes each chunk and adds
            its distinct rows to a running table: memory grows with the number of distinct
            rows, not with the file.
``duckdb``  lets DuckDB group the raw values (out of core, in parallel, spilling to disk under a
            memory limit), then codes the distinct raw rows.
``dask``    runs the ``stream`` reduction of each file (CSV) or group of row groups (Parquet) as a
            task on a Dask cluster (``--scheduler ADDRESS``, or a local cluster) and adds up the
            partial counts where the client runs.

Counts add up across chunks, files and partitions, so each engine counts its pieces and sums
the partial counts. A label that is not a state is an error in every engine, naming the file,
line (CSV) or data row (Parquet), column and label, and every engine reports the same (earliest)
bad row; DuckDB checks the distinct values first and then scans only the offending columns.
"""

from __future__ import annotations

import os
import re
import shutil
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterable, Sequence

import numpy as np
import pandas as pd

from .data import (HIDDEN, UNKNOWN, CodedData, LabelCoder, _count_problem, _csv_error, _release_arrow_memory, check_columns, check_total_count, code_columns,
                   check_parquet_types, common_columns, csv_header, csv_leading_empty_lines, encode_frame, first_error, iter_csv_batches, iter_parquet_batches,
                   key_layout, load_files, locator, parquet_names, resolve_inputs)
from .rowkeys import PackedRows, reduce_words
from .errors import DataError, OptionError
from .network import Network

ENGINES: tuple[str, ...] = ("pandas", "stream", "duckdb", "dask")
CONNECT_TIMEOUT = "20s"  # how long to wait for a Dask scheduler
DEFAULT_CHUNK_ROWS = 1_000_000
ENGINE_HELP = ("How to read and reduce the data: pandas (default; whole file in memory), stream "
               "(chunks, memory bounded by the distinct rows), duckdb (out of core), dask (a cluster, "
               "see --scheduler).")
SCHEDULER_HELP = ("With --engine dask: address of the Dask scheduler (tcp://host:8786) or its scheduler "
                  "JSON file; default: start a local cluster. Workers must see the data files at the same path.")


# ----------------------------------------------------------------- plan
@dataclass(frozen=True)
class ReadPlan:
    """What to read and how to code it; small and picklable (it travels to Dask workers)."""

    network: Network
    files: tuple[str, ...]
    fmt: str                      # "csv" or "parquet"
    columns: tuple[str, ...]      # all columns of the files, trimmed, file order
    read: tuple[str, ...]         # columns to read: observed nodes, then the count column
    coder: LabelCoder
    count_column: str | None
    source: str
    chunk_rows: int


def make_plan(network: Network, path: Any, *, missing: Iterable[str] | None = None, count_column: str | None = None,
              ignore_columns: Iterable[str] = (), chunk_rows: int = DEFAULT_CHUNK_ROWS) -> ReadPlan:
    """Resolve the files, check their headers against the network, and prepare the coder."""
    if int(chunk_rows) < 1:
        raise OptionError(f"--chunk-rows must be at least 1, got {chunk_rows}")
    files, fmt = resolve_inputs(path)
    source = str(path) if not isinstance(path, (list, tuple)) else str(files[0].parent)
    cols = common_columns(files, fmt)
    read = check_columns(network, cols, count_column=count_column, ignore_columns=ignore_columns,
                         source=str(files[0]) if len(files) == 1 else source)
    if fmt == "parquet":
        check_parquet_types(files, read)
    return ReadPlan(network, tuple(str(f) for f in files), fmt, tuple(cols), tuple(read),
                    LabelCoder(network, missing), count_column, source, int(chunk_rows))


def _batches(plan: ReadPlan, file: str, columns: Sequence[str], row_groups: Sequence[int] | None = None):
    if plan.fmt == "csv":
        return iter_csv_batches(file, columns, plan.chunk_rows)
    return iter_parquet_batches(file, columns, plan.chunk_rows, row_groups=row_groups)


# ---------------------------------------------------------- accumulation
class Accumulator:
    """Running table of distinct coded rows and summed counts (memory ~ distinct rows).

    Rows are kept packed into int64 words (:mod:`adfit.rowkeys`: 16 bytes a row for two words),
    sorted. Reduced pieces wait in a list until they hold as many rows as the table (at least
    ``merge_rows``), then are merged at once (a stable sort of the sorted pieces: linear time),
    so the table is not rebuilt for every small piece.
    """

    merge_rows = 1 << 16

    def __init__(self, cards: Sequence[int]):
        self.cards = tuple(int(c) for c in cards)
        self.layout = key_layout(self.cards)
        self.words = self.layout.empty().words
        self.counts = np.zeros(0)
        self._pending: list[tuple[np.ndarray, np.ndarray]] = []
        self._pending_rows = 0

    def add(self, rows: "np.ndarray | PackedRows", weights: np.ndarray | None = None) -> None:
        """Add records: a code matrix ``(n, n_nodes)`` or :class:`PackedRows`, optionally weighted."""
        if not isinstance(rows, PackedRows):
            rows = self.layout.pack(np.asarray(rows))
        words = rows.words
        if weights is not None:
            weights = np.asarray(weights, dtype=np.float64)
            keep = weights > 0
            if not keep.all():
                words, weights = words[:, keep], weights[keep]
        if words.shape[1] == 0:
            return
        d, c, _ = reduce_words(words, self.layout.spans, weights, inverse=False)
        self._push(d, c)

    def add_partial(self, rows: PackedRows, counts: np.ndarray) -> None:
        """Add what another Accumulator's :meth:`partial` returned (distinct, sorted, counts > 0)."""
        if rows.n:
            self._push(rows.words, np.asarray(counts, dtype=np.float64))

    def _push(self, words: np.ndarray, counts: np.ndarray) -> None:
        self._pending.append((words, counts))
        self._pending_rows += words.shape[1]
        if self._pending_rows >= max(self.words.shape[1], self.merge_rows):
            self._merge()

    def _merge(self) -> None:
        if not self._pending:
            return
        if self.words.shape[1] == 0 and len(self._pending) == 1:  # one reduced piece: it is the table
            (self.words, self.counts), self._pending, self._pending_rows = self._pending[0], [], 0
            return
        words = np.concatenate([self.words] + [w for w, _ in self._pending], axis=1)
        counts = np.concatenate([self.counts] + [c for _, c in self._pending])
        self._pending, self._pending_rows = [], 0
        self.words = self.counts = None  # let the old table go before the merge allocates
        self.words, self.counts, _ = reduce_words(words, self.layout.spans, counts, inverse=False, runs=True)

    def result(self) -> tuple[np.ndarray, np.ndarray]:
        """``(distinct code rows, counts)`` in lexicographic order (codes of the layout's
        :attr:`~adfit.rowkeys.KeyLayout.code_dtype`)."""
        self._merge()
        return self.layout.unpack(self.words), self.counts

    def partial(self) -> tuple[PackedRows, np.ndarray]:
        """``(distinct rows as words, counts)``: what another Accumulator's :meth:`add_partial` takes."""
        self._merge()
        return PackedRows(self.words), self.counts


def _finish(plan: ReadPlan, acc: "Accumulator") -> CodedData:
    codes, counts = acc.result()  # distinct, merged, in lexicographic order
    if codes.shape[0] == 0:
        raise DataError(f"{plan.source}: no records (the table is empty or all counts are 0)")
    check_total_count(counts, plan.source)
    return CodedData(codes, counts, None, plan.source)


def reduce_piece(plan: ReadPlan, file: str, row_groups: Sequence[int] | None = None,
                 row_offset: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Stream one file (or some row groups of a Parquet file) into distinct rows and counts.

    Returns :meth:`Accumulator.partial` (distinct rows packed into words, and their counts).

    ``row_offset`` is the number of data rows of the file before the first row group given
    (for messages). Raises DataError naming file, line/row, column and label.
    """
    if not os.path.exists(file):
        raise DataError(f"{file}: data file not found on {_host()}; every Dask worker must see the data "
                        f"at the same path (a shared folder)")
    acc = Accumulator(plan.network.cards)
    locate = locator(Path(file), plan.fmt)
    offset = row_offset
    for batch in _batches(plan, file, plan.read, row_groups):
        rows, weights = code_columns(plan.network, plan.coder, batch.column, batch.num_rows,
                                     count_column=plan.count_column, locate=locate, row_offset=offset, packed=True)
        acc.add(rows, weights)
        offset += batch.num_rows
    return acc.partial()


def _host() -> str:
    import socket
    return socket.gethostname()


# --------------------------------------------------------------- engines
def reduce_stream(plan: ReadPlan) -> CodedData:
    acc = Accumulator(plan.network.cards)
    for f in plan.files:
        acc.add_partial(*reduce_piece(plan, f))
    return _finish(plan, acc)


def _first_bad(plan: ReadPlan, columns: Sequence[str]) -> None:
    """Scan ``columns`` of every file in order; raise the error of the earliest bad cell."""
    names = [c for c in columns if c != plan.count_column]
    count = plan.count_column if plan.count_column in columns else None
    for f in plan.files:
        locate = locator(Path(f), plan.fmt)
        offset = 0
        for batch in _batches(plan, f, list(columns)):
            err = first_error(plan.coder, batch.column, names, count, locate, offset)
            if err is not None:
                raise err
            offset += batch.num_rows


def _sql_ident(name: str) -> str:
    return '"' + name.replace('"', '""') + '"'


def _sql_str(s: str) -> str:
    return "'" + s.replace("'", "''") + "'"


def _duckdb_source(plan: ReadPlan) -> tuple[str, str]:
    files = "[" + ", ".join(_sql_str(os.path.abspath(f)) for f in plan.files) + "]"
    if plan.fmt == "parquet":
        return f"read_parquet({files})", ""
    raw = csv_header(plan.files[0])
    cols = "{" + ", ".join(f"{_sql_str(c)}: 'VARCHAR'" for c in raw) + "}"
    skips = {csv_leading_empty_lines(f) for f in plan.files}
    skip = f", skip={skips.pop()}" if len(skips) == 1 and 0 not in skips else ""
    src = (f"read_csv({files}, auto_detect=false, header=true, columns={cols}, delim=',', quote='\"', "
           f"escape='\"', strict_mode=true, null_padding=false, allow_quoted_nulls=false, "
           f"encoding='utf-8'{skip})")
    # In a one-column file an empty line is read as a null row: an empty cell, as in the other
    # readers (adfit.data.one_column_empty_lines_are_records).
    return src, ""


def _duckdb_error(plan: ReadPlan, e: Exception) -> DataError:
    msg = str(e)
    if plan.fmt == "csv":
        m = re.search(r"file\s*=\s*(.+)", msg)
        cands = [f for f in plan.files if m and os.path.abspath(f) == m.group(1).strip()] or list(plan.files)
        for f in cands:
            err = _csv_error(Path(f), e)
            if "field(s)" in str(err) or "UTF-8" in str(err):
                return err
    first = msg.splitlines()[0] if msg else type(e).__name__
    return DataError(f"{plan.source}: DuckDB could not read the data ({first})")


_INT_TYPES = {"TINYINT", "SMALLINT", "INTEGER", "BIGINT", "HUGEINT", "UTINYINT", "USMALLINT", "UINTEGER",
              "UBIGINT", "UHUGEINT"}
_SQL_KIND = {"VARCHAR": "text", "BOOLEAN": "bool", "FLOAT": "float", "DOUBLE": "float",
             **{t: "int" for t in _INT_TYPES}}
_RANGE_MAX = 1 << 12
DUCKDB_ORDER = True  # DuckDB sorts the groups (in parallel); adfit then merges them in linear time  # an integer column whose values span at most this many is mapped value by value


def _sql_literal(kind: str, v: Any) -> str:
    if kind == "text":
        return _sql_str(str(v))
    if kind == "int":
        return str(int(v))
    if kind == "bool":
        return "true" if v else "false"
    return f"CAST({_sql_str(repr(float(v)))} AS DOUBLE)"


@dataclass
class _ColumnMap:
    """The SQL mapping of one data column to the term ``(code + 1) * multiplier`` of its word.

    ``values`` maps raw values (as Python values) to codes (HIDDEN included); a value that is not
    listed, other than a null (or a floating NaN), gives NULL, which marks the row's word as not
    coded. ``complete``: every value the column can hold is listed (an integer range, booleans,
    or the distinct values found in the data).
    """

    name: str
    kind: str
    values: dict
    complete: bool

    def unknown(self) -> bool:
        return any(c == UNKNOWN for c in self.values.values())

    def sql(self, column: str, mult: int) -> str:
        by_code: dict[int, list[str]] = {}
        for v, c in self.values.items():
            if c != UNKNOWN:
                by_code.setdefault(int(c), []).append(_sql_literal(self.kind, v))
        null = f"{column} IS NULL" + (f" OR isnan({column})" if self.kind == "float" else "")
        low, high = (min(self.values), max(self.values)) if self.kind == "int" and self.values else (0, _RANGE_MAX)
        shift = int(self.values[low]) - low if high - low < _RANGE_MAX else None
        if shift is not None and shift + low >= HIDDEN and all(self.values.get(v) == v + shift
                                                                for v in range(low, high + 1)):
            # integers that are the codes themselves (up to a shift): arithmetic, the cheapest form
            term = f"(CAST({column} AS BIGINT) + ({shift + 1})) * CAST({mult} AS BIGINT)"
            guard = "" if self.complete else f" WHEN {column} BETWEEN {low} AND {high} THEN {term} ELSE NULL"
            return (f"(CASE WHEN {null} THEN CAST(0 AS BIGINT){guard} ELSE {term} END)" if self.complete
                    else f"(CASE WHEN {null} THEN CAST(0 AS BIGINT){guard} END)")
        if high - low < _RANGE_MAX:  # integers: a list indexed by the value (NULL: foreign or absent)
            codes = [self.values.get(v, UNKNOWN) for v in range(low, high + 1)]
            terms = ", ".join("NULL" if c == UNKNOWN else str((int(c) + 1) * mult) for c in codes)
            return (f"(CASE WHEN {null} THEN CAST(0 AS BIGINT) WHEN {column} BETWEEN {low} AND {high} "
                    f"THEN CAST([{terms}] AS BIGINT[])[{column} - ({low}) + 1] END)")
        whens = " ".join(f"WHEN {lit} THEN CAST({(c + 1) * mult} AS BIGINT)"
                         for c in sorted(by_code) for lit in by_code[c])
        # a value not listed gives NULL (the row's word is then NULL); a null cell gives 0
        tail = f"ELSE CASE WHEN {null} THEN CAST(0 AS BIGINT) END"
        return f"(CASE {column} {whens} {tail} END)" if whens else f"(CASE WHEN {null} THEN CAST(0 AS BIGINT) END)"


def _expected_map(plan: ReadPlan, name: str, kind: str, low: Any, high: Any) -> _ColumnMap:
    """The mapping known before reading the cells: every value of a small integer range or of a
    boolean column, else the spellings that plainly mean a state or a gap (the state labels, the
    missing markers; for floating columns the numbers the labels spell)."""
    coder = plan.coder
    if kind == "bool":
        return _ColumnMap(name, kind, {True: coder._code_of(name, True), False: coder._code_of(name, False)}, True)
    if kind == "int" and low is not None and int(high) - int(low) < _RANGE_MAX:
        return _ColumnMap(name, kind, {v: coder._code_of(name, v) for v in range(int(low), int(high) + 1)}, True)
    if kind == "int" and low is None:  # every cell is null
        return _ColumnMap(name, kind, {}, True)
    values: dict = {}
    labels = list(plan.network.node(name).states)
    if kind == "text":
        for v in labels + sorted(coder.missing):
            values[v] = coder._code_of(name, v)
    else:
        for lab in labels:
            try:
                v = int(lab) if kind == "int" else float(lab)
            except ValueError:
                continue
            if kind == "float" and not np.isfinite(v):
                continue
            c = coder._code_of(name, v)
            if c >= 0:
                values[v] = c
    return _ColumnMap(name, kind, {v: c for v, c in values.items() if c != UNKNOWN}, False)


def reduce_duckdb(plan: ReadPlan, *, memory_limit: str | None = None, threads: int | None = None) -> CodedData:
    """DuckDB codes the cells in SQL and groups the packed words of the rows.

    Each column's cells are mapped to its term of the row's words by a ``CASE`` over the values
    known beforehand (:func:`_expected_map`); DuckDB groups the rows by their words (in parallel,
    spilling under its memory limit) and adfit only ranks the distinct rows. When a cell is not
    among the known values (spaces around a label, a foreign label, a typed value spelled
    differently), the distinct values of the columns concerned are read first and coded by the
    same rules as every engine, and the grouping is run again with the complete mapping (or the
    earliest bad cell is reported). Columns of other types (dates, decimals, ...) are grouped by
    their raw values and coded afterwards.
    """
    try:
        import duckdb
    except ImportError:
        raise OptionError("--engine duckdb needs the duckdb package: pip install 'adfit[scale]'") from None
    raw_names = csv_header(plan.files[0]) if plan.fmt == "csv" else parquet_names(plan.files[0])
    by_trim = {c.strip(): c for c in raw_names}  # trimmed name -> name as written in the file
    tmp = tempfile.mkdtemp(prefix="adfit-duckdb-")
    config: dict[str, Any] = {"temp_directory": tmp, "preserve_insertion_order": False}
    if memory_limit:
        config["memory_limit"] = str(memory_limit)
    if threads:
        config["threads"] = int(threads)
    try:
        try:
            con = duckdb.connect(":memory:", config=config)
        except duckdb.Error as e:
            raise OptionError(f"DuckDB settings rejected ({str(e).splitlines()[0]}); give the memory limit as, for example, 2GB") from None

        def sql(q: str):
            try:
                return con.sql(q).to_arrow_table()
            except duckdb.Error as e:
                raise _duckdb_error(plan, e) from None
        try:
            src, where = _duckdb_source(plan)
            cols = {c: _sql_ident(by_trim[c]) for c in plan.read}
            names = [c for c in plan.read if c != plan.count_column]
            try:
                types = [str(t) for t in con.sql(f"SELECT {', '.join(cols[c] for c in names)} FROM {src}{where} LIMIT 0").types]
            except duckdb.Error as e:
                raise _duckdb_error(plan, e) from None
            kinds = {c: _SQL_KIND.get(t) for c, t in zip(names, types)}
            if any(k is None for k in kinds.values()):
                return _reduce_duckdb_raw(plan, sql, src, where, cols)
            words, weights = _duckdb_groups(plan, sql, src, where, cols, kinds, release=con.close)
        finally:
            con.close()  # DuckDB's memory goes before adfit sorts the groups
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    layout = key_layout(tuple(plan.network.cards))
    keep = weights > 0
    if not keep.all():
        words, weights = words[:, keep], weights[keep]
    words, counts, _ = reduce_words(words, layout.spans, weights, inverse=False, runs=DUCKDB_ORDER)
    if words.shape[1] == 0:
        raise DataError(f"{plan.source}: no records (the table is empty or all counts are 0)")
    check_total_count(counts, plan.source)
    return CodedData(layout.unpack(words), counts, None, plan.source)


def _duckdb_groups(plan: ReadPlan, sql, src: str, where: str, cols: dict[str, str],
                   kinds: dict[str, str], release=lambda: None) -> tuple[np.ndarray, np.ndarray]:
    """The groups of rows by their words: ``(words (k, m), weights (m,))`` (sorted when
    :data:`DUCKDB_ORDER`); raises DataError naming the earliest bad cell.

    ``release`` (closing the connection) is called once the groups are fetched and checked:
    DuckDB's memory (its hash tables and sorted runs, about half a GB on 10 M distinct rows) is
    gone before the groups are copied out of the Arrow table, and each word's column is dropped
    from the table once copied (measured in docs/performance.md, "Lean codes")."""
    net = plan.network
    layout = key_layout(tuple(net.cards))
    names = list(kinds)
    ints = [c for c in names if kinds[c] == "int"]
    bounds: dict[str, tuple[Any, Any]] = {c: (None, None) for c in names}
    if ints:  # Parquet keeps min and max in its metadata: no scan
        t = sql("SELECT " + ", ".join(f"min({cols[c]}), max({cols[c]})" for c in ints) + f" FROM {src}{where}")
        for k, c in enumerate(ints):
            bounds[c] = (t.column(2 * k)[0].as_py(), t.column(2 * k + 1)[0].as_py())
    maps = {c: _expected_map(plan, c, kinds[c], *bounds[c]) for c in names}
    suspects: list[str] = []
    for attempt in range(2):
        table, nulls = _group_words(plan, sql, src, where, cols, maps, layout)
        if not nulls.any():
            break
        if attempt:
            raise DataError(f"{plan.source}: some cells could not be coded; check the columns "
                            f"{', '.join(c for c in names if maps[c].complete is False)}")
        # which columns may hold a value outside their mapping: read their distinct values
        words_hit = set(np.flatnonzero(nulls).tolist())
        todo = [c for c in names if int(layout.word[net.index(c)]) in words_hit
                and (not maps[c].complete or maps[c].unknown())]
        t = sql("SELECT " + ", ".join(f"list(DISTINCT {cols[c]})" for c in todo) + f" FROM {src}{where}")
        for k, c in enumerate(todo):
            values = t.column(k)[0].values
            codes = plan.coder.code(c, values)
            if np.any(codes == UNKNOWN):
                suspects.append(c)
            maps[c] = _ColumnMap(c, kinds[c], {v: int(x) for v, x in zip(values.to_pylist(), codes.tolist())
                                               if v is not None}, True)
        if suspects:
            break
    w = None
    if plan.count_column is not None:
        w, bad, _ = _count_problem(table.column("k"))
        if bad is not None:
            suspects.append(plan.count_column)
    if suspects:
        _first_bad(plan, [c for c in plan.read if c in suspects])  # raises with the earliest bad cell
        raise DataError(f"{plan.source}: column(s) {suspects} hold values that cannot be read; check them")
    release()
    weights = table.column("n").to_numpy().astype(np.float64)
    if w is not None:
        weights = weights * w
    table = table.drop_columns([c for c in ("n", "k") if c in table.column_names])
    words = np.empty((layout.k, table.num_rows), dtype=np.int64)
    for i in range(layout.k):
        offset = 0
        for chunk in table.column(f"w{i}").chunks:  # one copy, chunk by chunk
            words[i, offset:offset + len(chunk)] = chunk.to_numpy()
            offset += len(chunk)
        table = table.drop_columns([f"w{i}"])  # its buffers go as soon as they are copied
    _release_arrow_memory()
    return words, weights


def _group_words(plan: ReadPlan, sql, src: str, where: str, cols: dict[str, str], maps: dict[str, "_ColumnMap"],
                 layout) -> tuple[Any, np.ndarray]:
    """DuckDB groups the rows by their words (sorted); returns the table and, per word, whether
    some row's word is NULL (a cell outside its column's mapping)."""
    net = plan.network
    terms: list[list[str]] = [[] for _ in range(layout.k)]
    for c, m in maps.items():
        j = net.index(c)
        terms[int(layout.word[j])].append(m.sql(cols[c], int(layout.mult[j])))
    words = [(" + ".join(t) if t else "CAST(0 AS BIGINT)") + f" AS w{i}" for i, t in enumerate(terms)]
    count = f", {cols[plan.count_column]} AS k" if plan.count_column is not None else ""
    order = " ORDER BY " + ", ".join(f"w{i}" for i in range(layout.k)) if DUCKDB_ORDER else ""
    q = f"SELECT {', '.join(words)}{count}, count(*) AS n FROM {src}{where} GROUP BY ALL{order}"
    table = sql(q)
    nulls = np.array([table.column(f"w{i}").null_count > 0 for i in range(layout.k)])
    return table, nulls


def _reduce_duckdb_raw(plan: ReadPlan, sql, src: str, where: str, cols: dict[str, str]) -> CodedData:
    """Group the raw values of every column read, then code the distinct raw rows."""
    sel = ", ".join(f"{cols[c]} AS {_sql_ident('c' + str(i))}" for i, c in enumerate(plan.read))
    grp = ", ".join(_sql_ident("c" + str(i)) for i in range(len(plan.read)))
    return _code_grouped(plan, sql(f"SELECT {sel}, count(*) AS __adfit_n FROM {src}{where} GROUP BY {grp}"))


def _code_grouped(plan: ReadPlan, table: Any) -> CodedData:
    """Code a table of distinct raw rows (columns c0.. in ``plan.read`` order, then __adfit_n)."""
    net = plan.network
    n = table.num_rows
    columns: list[np.ndarray | None] = [None] * len(net)
    suspects: list[str] = []  # columns holding a bad value somewhere
    for i, name in enumerate(plan.read):
        if name == plan.count_column:
            continue
        c = plan.coder.code(name, table.column(i))
        if np.any(c == UNKNOWN):
            suspects.append(name)
            continue
        columns[net.index(name)] = c
    weights = table.column(len(plan.read)).to_numpy().astype(np.float64)
    if plan.count_column is not None:
        w, bad, _ = _count_problem(table.column(len(plan.read) - 1))
        if bad is not None:
            suspects.append(plan.count_column)
        weights = weights * w
    if suspects:
        _first_bad(plan, suspects)  # raises with the file and line of the earliest bad cell
        raise DataError(f"{plan.source}: column(s) {suspects} hold values that cannot be read; check them")
    acc = Accumulator(net.cards)
    acc.add(key_layout(tuple(net.cards)).pack_columns(columns, n), weights)
    return _finish(plan, acc)


def _pieces(plan: ReadPlan, rows_per_piece: int) -> list[tuple[str, list[int] | None, int]]:
    """Tasks ``(file, row_groups, row_offset)``: one per CSV file, Parquet row groups bundled."""
    if plan.fmt == "csv":
        return [(f, None, 0) for f in plan.files]
    import pyarrow.parquet as pq
    out: list[tuple[str, list[int] | None, int]] = []
    for f in plan.files:
        md = pq.ParquetFile(f).metadata
        groups: list[int] = []
        start = offset = 0
        for g in range(md.num_row_groups):
            if groups and sum(md.row_group(k).num_rows for k in groups) >= rows_per_piece:
                out.append((f, groups, start))
                groups, start = [], offset
            groups.append(g)
            offset += md.row_group(g).num_rows
        if groups or not out:
            out.append((f, groups or None, start))
    return out


def _client(scheduler: str | None):
    """A distributed Client (and the LocalCluster it owns, or None)."""
    try:
        from distributed import Client, LocalCluster
    except ImportError:
        raise OptionError("--engine dask needs dask and distributed: pip install 'adfit[scale]'") from None
    if scheduler is None:
        import logging
        # Threads, not processes: starts in a fraction of a second and the readers (pyarrow) release
        # the GIL; a worker process would first import adfit and JAX (seconds, ~200 MB each).
        cluster = LocalCluster(processes=False, n_workers=max(1, min(os.cpu_count() or 1, 8)), threads_per_worker=1,
                               dashboard_address=":0", silence_logs=logging.ERROR)
        return Client(cluster), cluster
    try:
        if scheduler.endswith(".json") and os.path.exists(scheduler):
            return Client(scheduler_file=scheduler, timeout=CONNECT_TIMEOUT), None
        return Client(scheduler, timeout=CONNECT_TIMEOUT), None
    except (OSError, TimeoutError, ValueError) as e:
        raise OptionError(f"--scheduler {scheduler}: cannot reach a Dask scheduler ({type(e).__name__}: "
                          f"{str(e).splitlines()[0] if str(e) else ''}); check the address and that it is running") from None


def reduce_dask(plan: ReadPlan, scheduler: str | None = None) -> CodedData:
    client, cluster = _client(scheduler)
    try:
        from distributed import as_completed
        pieces = _pieces(plan, rows_per_piece=max(plan.chunk_rows, 1))
        futures = [client.submit(reduce_piece, plan, f, g, off, pure=False) for f, g, off in pieces]
        order = {fut.key: k for k, fut in enumerate(futures)}
        acc = Accumulator(plan.network.cards)
        errors: dict[int, DataError] = {}
        for fut in as_completed(futures):
            k = order[fut.key]
            if errors and k > min(errors):
                continue  # a piece after one that failed: its result no longer matters
            try:
                acc.add_partial(*fut.result())
            except DataError as e:
                errors[k] = e
                client.cancel([f for f in futures[k + 1:] if not f.done()])
            except Exception as e:  # a worker died, lost the connection, ...
                client.cancel(futures)
                raise DataError(f"{plan.source}: a Dask task failed ({type(e).__name__}: "
                                f"{str(e).splitlines()[0] if str(e) else ''})") from None
        if errors:
            raise errors[min(errors)]  # the earliest piece's error, whichever task finished first
        return _finish(plan, acc)
    finally:
        client.close()
        if cluster is not None:
            cluster.close()


# ------------------------------------------------------------- front door
def load_coded(network: Network, path: "str | Path | Sequence[str | Path] | pd.DataFrame", *, engine: str = "pandas",
               scheduler: str | None = None, missing: Iterable[str] | None = None, count_column: str | None = None,
               ignore_columns: Iterable[str] = (), chunk_rows: int = DEFAULT_CHUNK_ROWS,
               memory_limit: str | None = None) -> CodedData:
    """Read, code and reduce data with the chosen engine (what the CLI commands call).

    Args:
        network: the network.
        path: a CSV/Parquet file, a folder of such files, a glob pattern, a list of files, or (with
            the pandas engine) a DataFrame.
        engine: one of :data:`ENGINES`.
        scheduler: with ``engine="dask"``, the scheduler address or scheduler JSON file; None
            starts a local cluster for the call.
        missing, count_column, ignore_columns: as in :func:`adfit.data.encode_frame`.
        chunk_rows: rows per chunk (``stream`` and ``dask``; for ``dask`` also the rows per
            Parquet task).
        memory_limit: with ``engine="duckdb"``, a DuckDB memory limit such as ``"2GB"``
            (DuckDB spills to a temporary folder beyond it).

    Returns:
        The same :class:`CodedData` for every engine; ``inverse`` only with ``pandas``.
    """
    if engine not in ENGINES:
        raise OptionError(f"--engine {engine!r} is not known; choose one of {', '.join(ENGINES)}")
    if scheduler is not None and engine != "dask":
        raise OptionError("--scheduler is only used with --engine dask")
    if memory_limit is not None and engine != "duckdb":
        raise OptionError("--memory-limit is only used with --engine duckdb")
    if isinstance(path, pd.DataFrame):
        if engine != "pandas":
            raise OptionError(f"engine {engine!r} reads files; pass a path, or use engine='pandas' for a DataFrame")
        return encode_frame(network, path, missing=missing, count_column=count_column, ignore_columns=ignore_columns)
    if engine == "pandas":
        return load_files(network, path, missing=missing, count_column=count_column, ignore_columns=ignore_columns)
    plan = make_plan(network, path, missing=missing, count_column=count_column, ignore_columns=ignore_columns,
                     chunk_rows=chunk_rows)
    if engine == "stream":
        return reduce_stream(plan)
    if engine == "duckdb":
        return reduce_duckdb(plan, memory_limit=memory_limit)
    return reduce_dask(plan, scheduler)

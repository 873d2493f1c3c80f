"""Reduction of large data files to distinct coded rows with counts, by several engines.

Every engine returns the same :class:`~adfit.data.CodedData`: the same codes (the rules of
:mod:`adfit.data`), the same counts, distinct rows sorted by the packed key (lexicographic
order of the coded rows), and ``source`` the path as given. Only the ``pandas`` engine keeps the
per-record ``inverse``; the others set it to None.

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

from .data import (UNKNOWN, CodedData, LabelCoder, _count_problem, _csv_error, check_columns, code_columns,
                   common_columns, csv_header, encode_frame, first_error, iter_csv_batches, iter_parquet_batches,
                   key_layout, load_files, locator, packed_keys, parquet_names, reduce_rows, resolve_inputs,
                   sum_by_key, unpack_keys)
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
    return ReadPlan(network, tuple(str(f) for f in files), fmt, tuple(cols), tuple(read),
                    LabelCoder(network, missing), count_column, source, int(chunk_rows))


def _batches(plan: ReadPlan, file: str, columns: Sequence[str], row_groups: Sequence[int] | None = None):
    if plan.fmt == "csv":
        return iter_csv_batches(file, columns, plan.chunk_rows)
    return iter_parquet_batches(file, columns, plan.chunk_rows, row_groups=row_groups)


# ---------------------------------------------------------- accumulation
class Accumulator:
    """Running table of distinct coded rows and summed counts (memory ~ distinct rows).

    Rows are kept as packed int64 keys when the key fits (else as code rows). Reduced pieces wait
    in a list until they hold as many rows as the table (at least ``merge_rows``), then are merged
    at once, so the table is not rebuilt for every small piece.
    """

    merge_rows = 1 << 16

    def __init__(self, cards: Sequence[int]):
        self.cards = tuple(cards)
        self.mult, self.bases = key_layout(self.cards)
        self.rows = np.zeros(0, np.int64) if self.mult is not None else np.zeros((0, len(self.cards)), np.int32)
        self.counts = np.zeros(0)
        self._pending: list[tuple[np.ndarray, np.ndarray]] = []
        self._pending_rows = 0

    def _reduce(self, rows: np.ndarray, weights: np.ndarray | None) -> tuple[np.ndarray, np.ndarray]:
        if self.mult is not None:
            keys, counts, _ = sum_by_key(rows, weights)
            return keys, counts
        d, c, _ = reduce_rows(rows, weights, self.cards)
        return d, c

    def add(self, rows: np.ndarray, weights: np.ndarray | None = None) -> None:
        """Add records: a code matrix ``(n, n_nodes)`` or packed keys ``(n,)``, optionally weighted."""
        rows = np.asarray(rows)
        if rows.ndim == 2 and self.mult is not None:
            rows = packed_keys(rows, self.mult)
        if weights is not None:
            keep = weights > 0
            if not keep.all():
                rows, weights = rows[keep], weights[keep]
        if rows.shape[0] == 0:
            return
        piece = self._reduce(rows, weights)
        self._pending.append(piece)
        self._pending_rows += piece[0].shape[0]
        if self._pending_rows >= max(self.rows.shape[0], self.merge_rows):
            self._merge()

    def _merge(self) -> None:
        if not self._pending:
            return
        rows = np.concatenate([self.rows] + [r for r, _ in self._pending])
        counts = np.concatenate([self.counts] + [c for _, c in self._pending])
        self.rows, self.counts = self._reduce(rows, counts)
        self._pending, self._pending_rows = [], 0

    def result(self) -> tuple[np.ndarray, np.ndarray]:
        """``(distinct code rows, counts)`` in packed-key (lexicographic) order."""
        self._merge()
        if self.mult is not None:
            return unpack_keys(self.rows, self.mult, self.bases), self.counts
        return self.rows, self.counts

    def partial(self) -> tuple[np.ndarray, np.ndarray]:
        """``(distinct keys or code rows, counts)``: what another Accumulator's :meth:`add` takes."""
        self._merge()
        return self.rows, self.counts


def _finish(plan: ReadPlan, acc: "Accumulator") -> CodedData:
    codes, counts = acc.result()  # distinct, merged, sorted by the packed key
    if codes.shape[0] == 0:
        raise DataError(f"{plan.source}: no records (the table is empty or all counts are 0)")
    return CodedData(codes, counts, None, plan.source)


def reduce_piece(plan: ReadPlan, file: str, row_groups: Sequence[int] | None = None,
                 row_offset: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Stream one file (or some row groups of a Parquet file) into distinct rows and counts.

    Returns :meth:`Accumulator.partial` (packed keys when they fit, else code rows).

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
        acc.add(*reduce_piece(plan, f))
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


def _header_skip(path: str) -> int:
    """Number of empty lines before the header row of a CSV file."""
    n = 0
    with open(path, newline="", encoding="utf-8-sig", errors="replace") as fh:
        for line in fh:
            if line.strip("\r\n") != "":
                return n
            n += 1
    return n


def _duckdb_source(plan: ReadPlan) -> tuple[str, str]:
    files = "[" + ", ".join(_sql_str(os.path.abspath(f)) for f in plan.files) + "]"
    if plan.fmt == "parquet":
        return f"read_parquet({files})", ""
    raw = csv_header(plan.files[0])
    cols = "{" + ", ".join(f"{_sql_str(c)}: 'VARCHAR'" for c in raw) + "}"
    skips = {_header_skip(f) for f in plan.files}
    skip = f", skip={skips.pop()}" if len(skips) == 1 and 0 not in skips else ""
    src = (f"read_csv({files}, auto_detect=false, header=true, columns={cols}, delim=',', quote='\"', "
           f"escape='\"', strict_mode=true, null_padding=false, allow_quoted_nulls=false, "
           f"encoding='utf-8'{skip})")
    # In a one-column file an empty line is read as a null row; the other readers skip it.
    where = f" WHERE {_sql_ident(raw[0])} IS NOT NULL" if len(raw) == 1 else ""
    return src, where


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


def reduce_duckdb(plan: ReadPlan, *, memory_limit: str | None = None, threads: int | None = None) -> CodedData:
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
        try:
            src, where = _duckdb_source(plan)
            sel = ", ".join(f"{_sql_ident(by_trim[c])} AS {_sql_ident('c' + str(i))}" for i, c in enumerate(plan.read))
            grp = ", ".join(_sql_ident("c" + str(i)) for i in range(len(plan.read)))
            q = f"SELECT {sel}, count(*) AS __adfit_n FROM {src}{where} GROUP BY {grp}"
            try:
                table = con.sql(q).to_arrow_table()
            except duckdb.Error as e:
                raise _duckdb_error(plan, e) from None
        finally:
            con.close()
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    return _code_grouped(plan, table)


def _code_grouped(plan: ReadPlan, table: Any) -> CodedData:
    """Code a table of distinct raw rows (columns c0.. in ``plan.read`` order, then __adfit_n)."""
    net = plan.network
    n = table.num_rows
    acc = Accumulator(net.cards)
    # packed keys when they fit (no code matrix of all raw groups), else code rows
    rows = np.zeros(n, np.int64) if acc.mult is not None else np.full((n, len(net)), -1, dtype=np.int32)
    suspects: list[str] = []  # columns holding a bad value somewhere
    for i, name in enumerate(plan.read):
        if name == plan.count_column:
            continue
        c = plan.coder.code(name, table.column(i))
        if np.any(c == UNKNOWN):
            suspects.append(name)
            continue
        j = net.index(name)
        if acc.mult is not None:
            rows += (c.astype(np.int64) + 1) * acc.mult[j]
        else:
            rows[:, j] = c
    weights = table.column(len(plan.read)).to_numpy().astype(np.float64)
    if plan.count_column is not None:
        w, bad, _ = _count_problem(table.column(len(plan.read) - 1))
        if bad is not None:
            suspects.append(plan.count_column)
        weights = weights * w
    if suspects:
        _first_bad(plan, suspects)  # raises with the file and line of the earliest bad cell
        raise DataError(f"{plan.source}: column(s) {suspects} hold values that cannot be read; check them")
    acc.add(rows, weights)
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
                acc.add(*fut.result())
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

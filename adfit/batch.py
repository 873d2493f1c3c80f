"""Many queries at once (``adfit query --batch FILE.csv --out ANSWERS.csv``).

One query per row of a table of evidence: a column per node given (any subset of the nodes),
each cell a state (hard evidence), ``STATE:WEIGHT,STATE:WEIGHT`` (soft evidence, as on
``--given``) or empty (not given). Columns named in ``ignore_columns`` (an id, a date) are
carried to the output untouched. Every row is answered exactly by the same core as
:func:`adfit.impute.query` (one posterior pass for all rows, soft evidence as weights on the
evidence indicators); the most probable explanation, when asked for, by
:func:`adfit.explain.max_product` row by row.

Output (:func:`answer_batch`): the input columns as they were read, then per target ``T``:
``T__p_STATE`` (posterior of each state; 1/0 where the row gives ``T`` a state) and ``T__mode``;
with two or more named targets ``joint__p_A=a;B=b`` (their joint posterior); with ``explain``
``NODE__explain`` for every node (the most probable joint assignment; the given state where
given) and ``row__p_explanation``; last ``row__log_p_evidence``. :func:`query_file` writes it
atomically, text cells that a spreadsheet would run as formulas defused.
"""

from __future__ import annotations

import itertools
import math
from pathlib import Path
from typing import Any, Iterable, Mapping, Sequence

import numpy as np
import pandas as pd

from .data import HIDDEN
from .errors import DataError, ImpossibleDataError, OptionError, did_you_mean
from .network import Network

SEP = "__"
LOGP_COLUMN = "row__log_p_evidence"
EXPLAIN_P_COLUMN = "row__p_explanation"
MAX_BATCH_JOINT = 5_000_000  # rows x target combinations scored for the joint columns


def joint_column(targets: Sequence[str], states: Sequence[str]) -> str:
    return "joint" + SEP + "p_" + ";".join(f"{t}={s}" for t, s in zip(targets, states))


def read_batch(network: Network, path: str | Path, *, ignore_columns: Iterable[str] = ()
               ) -> tuple[pd.DataFrame, np.ndarray, dict[str, np.ndarray], list[dict[str, dict[str, float]]], Any]:
    """Read a batch file: ``(table as read, codes (rows, n_nodes), weights {node: (rows, card)},
    soft evidence per row, locate)``. Weights are ones where a row has no soft evidence on the node.

    Raises:
        DataError: a column that is neither a node nor ignored, a cell that is neither a state
            nor soft evidence (one line naming the file line and column), an empty file.
    """
    from .data import csv_rows, read_table, resolve_inputs
    from .impute import parse_evidence

    files, fmt = resolve_inputs(path)
    if len(files) != 1:
        raise DataError(f"{path}: --batch takes one CSV or Parquet file, this names {len(files)}")
    frame = read_table(files[0])
    locate = csv_rows(files[0]) if fmt == "csv" else (lambda i: f"{path}: data row {i + 1}")
    ignore = set(ignore_columns)
    for c in ignore:
        if c not in frame.columns:
            raise OptionError(f"--ignore-columns names {c!r}, which is not a column of {path}; "
                              f"{did_you_mean(c, list(map(str, frame.columns)))}its columns are: {', '.join(map(str, frame.columns))}")
    cols = [c for c in frame.columns if c not in ignore]
    for c in cols:
        if c not in network:
            raise DataError(f"{path}: column {c!r} is not a node of the network; {did_you_mean(str(c), network.names)}"
                            f"name it in --ignore-columns "
                            f"to carry it along, or rename it (the nodes are: {', '.join(network.names)})")
    if len(frame) == 0:
        raise DataError(f"{path}: no rows under the header; give one row of evidence per query")
    n = len(frame)
    codes = np.full((n, len(network)), HIDDEN, dtype=np.int32)
    weights = {c: np.ones((n, network.node(c).card)) for c in cols}
    soft_rows: list[dict[str, dict[str, float]]] = [dict() for _ in range(n)]
    used = set()
    for c in cols:
        j = network.index(c)
        states = network.node(c).states
        values = frame[c].tolist()
        for i, v in enumerate(values):
            if v is None or (isinstance(v, float) and math.isnan(v)):
                continue
            text = str(v).strip()
            if not text:
                continue
            try:
                hard, soft = parse_evidence(network, [f"{c}={text}"], option="cell")
            except OptionError as e:
                raise DataError(f"{locate(i)}, column {c!r}: {e}") from None
            if c in hard:
                if hard[c] not in states:
                    raise DataError(f"{locate(i)}, column {c!r}: {text!r} is not a state of {c!r} (its states are: "
                                    f"{', '.join(states)}); {did_you_mean(hard[c], states)}write a state, STATE:WEIGHT,STATE:WEIGHT, or leave it empty")
                codes[i, j] = states.index(hard[c])
            else:
                weights[c][i] = [soft[c][s] for s in states]
                soft_rows[i][c] = soft[c]
                used.add(c)
    weights = {c: w for c, w in weights.items() if c in used}
    return frame, codes, weights, soft_rows, locate


def answer_batch(network: Network, probs: Mapping[str, np.ndarray], frame: pd.DataFrame, codes: np.ndarray,
                 weights: Mapping[str, np.ndarray], soft_rows: Sequence[Mapping[str, Mapping[str, float]]], *,
                 targets: Sequence[str] | None = None, explain: bool = False, locate=None) -> pd.DataFrame:
    """The answers to every row's query, appended to ``frame`` (see the module docstring)."""
    from .explain import max_product
    from .impute import _check_nodes, row_posteriors

    named = list(dict.fromkeys(targets or []))
    tg = list(_check_nodes(network, named, "--target")) if named else list(network.names)
    if named:
        tg = named  # the order asked for
    n = len(codes)
    ll, post = row_posteriors(network, probs, codes, weights=dict(weights) or None)
    bad = np.flatnonzero(~np.isfinite(ll))
    if bad.size:
        i = int(bad[0])
        where = locate(i) if locate is not None else f"batch row {i + 1}"
        raise ImpossibleDataError(f"{where}: the evidence of this row has probability 0 under the CPTs "
                                  f"({bad.size} row(s) in all); no posterior exists; check the row and the tables")
    cols: dict[str, Any] = {}
    for t in tg:
        states = network.node(t).states
        p = post[t]
        for k, s in enumerate(states):
            cols[f"{t}{SEP}p_{s}"] = p[:, k]
        cols[f"{t}{SEP}mode"] = np.array(states, dtype=object)[np.argmax(p, axis=1)]
    if len(named) > 1:
        cards = [network.node(t).card for t in named]
        combos = list(itertools.product(*(range(c) for c in cards)))
        if n * len(combos) > MAX_BATCH_JOINT:
            raise OptionError(f"--target: {n} rows x {len(combos)} combinations of {', '.join(named)} is more than "
                              f"{MAX_BATCH_JOINT}; name fewer targets or split the batch file")
        idx = [network.index(t) for t in named]
        rep = np.repeat(codes, len(combos), axis=0)
        combo = np.tile(np.array(combos, dtype=np.int32), (n, 1))
        clash = np.zeros(len(rep), dtype=bool)
        for j, v in enumerate(idx):
            clash |= (rep[:, v] >= 0) & (rep[:, v] != combo[:, j])  # a given target fixed at another state
            rep[:, v] = combo[:, j]
        w = {k: np.repeat(a, len(combos), axis=0) for k, a in weights.items()}
        jl, _ = row_posteriors(network, probs, rep, weights=w or None)
        jl = np.where(clash, -np.inf, jl).reshape(n, len(combos))
        with np.errstate(invalid="ignore"):
            jp = np.exp(jl - ll[:, None])
        for c, col in zip(combos, jp.T):
            cols[joint_column(named, [network.node(t).states[k] for t, k in zip(named, c)])] = col
    if explain:
        picks = {v: np.empty(n, dtype=object) for v in network.names}
        p_best = np.empty(n)
        for i in range(n):
            given = {v: network.node(v).states[c] for v, c in zip(network.names, codes[i]) if c >= 0}
            if len(given) == len(network):
                assign, top = {}, float(ll[i])
            else:
                assign, top, _ = max_product(network, probs, given, soft_rows[i])
            for v in network.names:
                picks[v][i] = given[v] if v in given else network.node(v).states[assign[v]]
            p_best[i] = min(1.0, math.exp(top - ll[i]))
        for v in network.names:
            cols[f"{v}{SEP}explain"] = picks[v]
        cols[EXPLAIN_P_COLUMN] = p_best
    cols[LOGP_COLUMN] = ll
    added = pd.DataFrame(cols, index=frame.index)
    clash_cols = [c for c in added.columns if c in set(map(str, frame.columns))]
    if clash_cols:
        raise DataError(f"the batch file already has a column {clash_cols[0]!r}, a name the answers use; rename it")
    return pd.concat([frame, added], axis=1)


def query_file(network: Network, probs: Mapping[str, np.ndarray], batch: str | Path, out: str | Path, *,
               targets: Sequence[str] | None = None, explain: bool = False, ignore_columns: Iterable[str] = (),
               defuse: bool = True) -> pd.DataFrame:
    """Read ``batch``, answer every row, write ``out`` (CSV, atomically); returns the table written."""
    from .impute import defuse_frame
    from .io import atomic_write, check_output_paths

    check_output_paths({"out": out}, {"batch file": batch})
    frame, codes, weights, soft_rows, locate = read_batch(network, batch, ignore_columns=ignore_columns)
    table = answer_batch(network, probs, frame, codes, weights, soft_rows, targets=targets, explain=explain,
                         locate=locate)
    if defuse:
        table, _ = defuse_frame(table)
    with atomic_write(out) as fh:
        table.to_csv(fh, index=False, lineterminator="\n", na_rep="", float_format="%.17g")
    return table

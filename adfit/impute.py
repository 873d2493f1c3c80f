"""Posterior of missing cells, multiple imputation, and queries.

Everything here conditions on given CPTs (a fit result): for a record with observed cells ``e``
the posterior of a hidden cell ``X`` is ``P(X = x | e)``, exact, computed by variable elimination
as the gradient of ``log P(e)`` with respect to evidence indicators
(:func:`adfit.likelihood.posterior_marginals`; Darwiche 2003, J. ACM 50(3)).

* :func:`row_posteriors` -- posterior marginals of every node, for many coded rows, in blocks of
  a fixed size (one compiled program per network and block size).
* :func:`draw_hidden` -- draws from the *joint* posterior of each row's hidden cells, by exact
  sequential sampling: the hidden cells are drawn one node at a time, each from its posterior
  given the observed cells and the values drawn so far (the chain rule
  ``P(h1, h2, ... | e) = P(h1 | e) P(h2 | e, h1) ...``), vectorised over rows x draws.
* :func:`impute` -- the two above for the records of a data set: posteriors are computed once per
  distinct row and mapped back to the records (``CodedData.inverse``); draws are made per
  record, so two identical records get independent draws.
* :func:`impute_file` -- read a data file, impute, write a CSV with the input columns as they
  were and the added columns described in :data:`COLUMNS_DOC`.
* :func:`query` -- the posterior of chosen nodes given evidence, and ``P(evidence)``.

The draws condition on the given CPTs: they carry the uncertainty about the missing values
given the parameters, not the uncertainty about the parameters themselves (not "proper"
multiple imputations in Rubin's sense; analyses pooled over them understate the variance).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable, Mapping, Sequence

import numpy as np
import pandas as pd

from .data import HIDDEN, CodedData
from .errors import DataError, ImpossibleDataError, OptionError, did_you_mean, spelled
from .network import Network

#: Separator between a node name and the suffix of an added column.
SEP = "__"
#: Name of the added column holding log P(observed cells of the record).
LOGP_COLUMN = "row__log_p_observed"
#: Most rows sent to one posterior pass (the block size; shorter inputs use a power of two >= 64).
BLOCK_ROWS = 1 << 14

COLUMNS_DOC = """\
NODE__mode      most probable state given the record's observed cells (ties: the first state
                in declared order); the observed value where the cell was observed
NODE__p_STATE   posterior probability of STATE; 1/0 where the cell was observed
NODE__drawK     the K-th draw (K = 1..draws) from the joint posterior of the record's hidden
                cells; the observed value where the cell was observed; draw K of every node
                comes from the same joint draw
row__log_p_observed   natural log of the probability of the record's observed cells"""


# ----------------------------------------------------------------------------- names
def mode_column(node: str) -> str:
    return f"{node}{SEP}mode"


def prob_column(node: str, state: str) -> str:
    return f"{node}{SEP}p_{state}"


def draw_column(node: str, k: int) -> str:
    """Column of the ``k``-th draw, ``k`` counted from 1."""
    return f"{node}{SEP}draw{k}"


# ----------------------------------------------------------------------------- posteriors
def _block_size(n_rows: int) -> int:
    return int(min(BLOCK_ROWS, max(64, 1 << max(0, math.ceil(math.log2(max(1, n_rows)))))))


def _blocks(codes: np.ndarray, block: int):
    """Yield ``(start, padded block of codes, n_real)``; padding rows are all hidden (P = 1). The
    blocks are int32 (the posterior program computes flat table indices from the codes); the
    whole matrix stays in its own (small) type."""
    n, m = codes.shape
    for start in range(0, n, block):
        part = np.ascontiguousarray(codes[start:start + block], dtype=np.int32)
        k = part.shape[0]
        if k < block:
            part = np.concatenate([part, np.full((block - k, m), HIDDEN, dtype=np.int32)])
        yield start, part, k


def _as_codes(codes: np.ndarray) -> np.ndarray:
    """A code matrix as it is when its type is a signed integer (no copy of a large matrix),
    else as int32 (lists, unsigned or other integer input)."""
    codes = np.asarray(codes)
    return codes if codes.dtype.kind == "i" else codes.astype(np.int32)


def row_posteriors(network: Network, probs: Mapping[str, np.ndarray], codes: np.ndarray, *,
                   block: int | None = None, weights: Mapping[str, np.ndarray] | None = None
                   ) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """Exact posterior marginal of every node for each coded row.

    Args:
        codes: int array ``(rows, n_nodes)`` in network order, ``-1`` for a hidden cell.
        block: rows per posterior pass (default: from the number of rows, at most
            :data:`BLOCK_ROWS`); every pass has the same shape, so one compiled program serves.
        weights: likelihood (soft) evidence ``{node: (rows, card)}``, weights >= 0 multiplying
            the node's evidence indicator (:func:`adfit.likelihood.posterior_marginals`); the
            log-probability is then ``log sum_x w(x) P(x, observed cells)``.

    Returns:
        ``(log P(observed cells) per row, {node: (rows, card)})``. An observed cell's row is the
        one-hot of its value. A row of probability 0 has log-probability ``-inf`` and NaN
        posteriors (:func:`impute` and :func:`query` turn that into an error).
    """
    from .likelihood import posterior_marginals

    codes = _as_codes(codes)
    n = codes.shape[0]
    block = _block_size(n) if block is None else int(block)
    ll = np.empty(n)
    post = {name: np.empty((n, card)) for name, card in zip(network.names, network.cards)}
    with np.errstate(invalid="ignore", divide="ignore"):
        for start, part, k in _blocks(codes, block):
            wpart = None
            if weights:
                wpart = {}
                for name, w in weights.items():
                    w = np.asarray(w, dtype=np.float64)[start:start + k]
                    wpart[name] = np.concatenate([w, np.ones((block - k, w.shape[1]))]) if k < block else w
            l, p = posterior_marginals(network, probs, part, weights=wpart)
            ll[start:start + k] = l[:k]
            for name in network.names:
                post[name][start:start + k] = p[name][:k]
    bad = ~np.isfinite(ll)
    if bad.any():
        for name in network.names:
            post[name][bad] = np.nan
    return ll, post


def _choose(p: np.ndarray, u: np.ndarray) -> np.ndarray:
    """Inverse-CDF choice per row: state k with probability p[k] (rows of p sum to ~1).

    The CDF is divided by its last entry, so it ends at exactly 1 and ``u < 1`` never selects a
    trailing state of probability 0; an inner state of probability 0 has an empty interval.
    """
    cdf = np.cumsum(p, axis=1)
    cdf = cdf / cdf[:, -1:]
    return (cdf <= u[:, None]).sum(axis=1).astype(np.int32)


def draw_hidden(network: Network, probs: Mapping[str, np.ndarray], codes: np.ndarray, draws: int, *,
                seed: int | np.random.Generator | None = 0, nodes: Sequence[str] | None = None,
                block: int | None = None) -> dict[str, np.ndarray]:
    """``draws`` joint draws of the hidden cells of every row, from their exact posterior.

    The nodes in ``nodes`` (default: all) are drawn one at a time in network order: for each,
    the posterior given the observed cells and the cells drawn so far is computed exactly and a
    value is drawn from it (exact sequential sampling from the joint posterior of those nodes;
    the other hidden cells are summed out). Vectorised over rows x draws, in blocks of a fixed
    number of rows.

    Args:
        codes: int array ``(rows, n_nodes)``, ``-1`` = hidden; every row must have probability > 0.
        seed: seed of a numpy Generator (or a Generator); the same seed gives the same draws.

    Returns:
        ``{node: int array (rows, draws)}`` of state codes; an observed cell repeats its value.
    """
    if draws < 1:
        raise OptionError(f"the number of draws must be at least 1, got {draws}")
    codes = _as_codes(codes)
    names = list(network.names if nodes is None else nodes)
    idx = sorted(network.index(v) for v in names)
    rng = seed if isinstance(seed, np.random.Generator) else np.random.default_rng(seed)
    n = codes.shape[0]
    out = {network.names[j]: np.empty((n, draws), dtype=np.int32) for j in idx}
    total = n * draws
    block = _block_size(total) if block is None else int(block)
    per = max(1, block // draws)  # records per block
    for start in range(0, n, per):
        work = np.repeat(codes[start:start + per], draws, axis=0).astype(np.int32)
        for j in idx:
            hid = work[:, j] == HIDDEN
            if hid.any():
                _, post = row_posteriors(network, probs, work[hid], block=block)
                p = post[network.names[j]]
                if not np.all(np.isfinite(p)):
                    raise ImpossibleDataError(
                        "draw_hidden: a row has probability 0 under the CPTs; check the records and the CPTs")
                work[hid, j] = _choose(p, rng.random(p.shape[0]))
        k = work.shape[0] // draws
        for j in idx:
            out[network.names[j]][start:start + k] = work[:, j].reshape(k, draws)
    return out


# ----------------------------------------------------------------------------- imputation
@dataclass(frozen=True, eq=False)
class Imputation:
    """Posteriors, modes and draws of the cells of some nodes, one row per input record.

    Attributes:
        network: the network.
        nodes: the nodes that get output columns (network order).
        log_p_observed: ``(records,)`` natural log of P(observed cells of the record).
        posterior: ``{node: (records, card)}``; one-hot where the cell was observed.
        hidden: ``{node: (records,) bool}``, True where the cell was missing (always for latent).
        mode: ``{node: (records,) int}`` most probable state (the observed one where observed).
        draws: ``{node: (records, K) int}`` joint posterior draws (empty dict when K = 0).
        n_draws: K.
        seed: the seed of the draws.
    """

    network: Network
    nodes: tuple[str, ...]
    log_p_observed: np.ndarray
    posterior: Mapping[str, np.ndarray]
    hidden: Mapping[str, np.ndarray]
    mode: Mapping[str, np.ndarray]
    draws: Mapping[str, np.ndarray] = field(default_factory=dict)
    n_draws: int = 0
    seed: int | None = None

    @property
    def n_records(self) -> int:
        return int(self.log_p_observed.shape[0])

    def n_imputed(self) -> dict[str, int]:
        """Hidden cells per node."""
        return {v: int(self.hidden[v].sum()) for v in self.nodes}

    def columns(self) -> pd.DataFrame:
        """The added columns, labels as text, in the order: per node mode, probabilities, draws;
        then :data:`LOGP_COLUMN`."""
        cols: dict[str, Any] = {}
        for v in self.nodes:
            states = np.array(self.network.node(v).states, dtype=object)
            cols[mode_column(v)] = states[self.mode[v]]
            for k, s in enumerate(self.network.node(v).states):
                cols[prob_column(v, s)] = self.posterior[v][:, k]
            if self.n_draws:
                d = self.draws[v]
                for k in range(self.n_draws):
                    cols[draw_column(v, k + 1)] = states[d[:, k]]
        cols[LOGP_COLUMN] = self.log_p_observed
        return pd.DataFrame(cols)


def default_nodes(network: Network, data: CodedData) -> tuple[str, ...]:
    """The nodes with at least one hidden cell in ``data`` (latent nodes always), network order."""
    hid = (np.asarray(data.codes) == HIDDEN).any(axis=0)
    return tuple(name for name, h in zip(network.names, hid) if h)


def _check_nodes(network: Network, nodes: Iterable[str], what: str = "--nodes") -> tuple[str, ...]:
    names = list(dict.fromkeys(nodes))
    for v in names:
        if v not in network:
            raise OptionError(f"{what} names {v!r}, which is not a node of the network; "
                              f"{did_you_mean(v, network.names)}the nodes are: {', '.join(network.names)}")
    return tuple(v for v in network.names if v in names)


def impute(network: Network, probs: Mapping[str, np.ndarray], data: CodedData, *, draws: int = 0,
           seed: int = 0, nodes: Sequence[str] | None = None, locate=None) -> Imputation:
    """Posterior, most probable value and ``draws`` joint draws of the hidden cells of every record.

    Args:
        data: coded records with ``inverse`` (one entry per input record, e.g. from
            :func:`adfit.data.load_data` on a file or DataFrame without a count column).
        draws: K joint posterior draws per record (0: none).
        seed: seed of the draws (numpy Generator).
        nodes: the nodes that get results (default :func:`default_nodes`).
        locate: maps a 0-based record index to its place for messages (default "data row N").

    Raises:
        DataError: ``data`` has no per-record mapping.
        ImpossibleDataError: a record has probability 0 under the CPTs (names the first).
    """
    if data.inverse is None:
        raise DataError(f"{data.source}: the data keep no per-record order (CodedData.inverse is None: read "
                        f"with a streaming/out-of-core engine, or pre-aggregated with a count column); "
                        f"imputation writes one row per record, so read the records with the pandas engine "
                        f"(adfit.data.load_data) and without a count column")
    if draws < 0:
        raise OptionError(f"--draws must be 0 or more, got {draws}")
    sel = default_nodes(network, data) if nodes is None else _check_nodes(network, nodes)
    inv = np.asarray(data.inverse, dtype=np.int64)
    codes = _as_codes(data.codes)
    rec_codes = codes[inv]  # one row per record, in the codes' own (small) type
    need = np.zeros(0, dtype=np.int64)
    if draws:
        cols = [network.index(v) for v in sel]
        need = np.flatnonzero((rec_codes[:, cols] == HIDDEN).any(axis=1))
    # one block size for the posteriors and the draws: one compiled program
    block = _block_size(max(len(codes), need.size * draws))
    ll_d, post_d = row_posteriors(network, probs, codes, block=block)
    bad = np.flatnonzero(~np.isfinite(ll_d))
    if bad.size:
        badset = np.zeros(len(codes), dtype=bool)
        badset[bad] = True
        first = int(np.flatnonzero(badset[inv])[0])
        where = locate(first) if locate is not None else f"{data.source}: data row {first + 1}"
        shown = ", ".join(f"{network.names[j]}={network.nodes[j].states[c]}"
                          for j, c in enumerate(codes[inv[first]]) if c >= 0)
        n_bad = int(badset[inv].sum())
        raise ImpossibleDataError(
            f"{where}: the record [{shown}] has probability 0 under the CPTs ({n_bad} record(s) in all); "
            f"no posterior exists; check the record and the fixed or fitted tables")
    ll = ll_d[inv]
    posterior = {v: post_d[v][inv] for v in sel}
    hidden = {v: rec_codes[:, network.index(v)] == HIDDEN for v in sel}
    mode = {}
    for v in sel:
        c = rec_codes[:, network.index(v)]
        mode[v] = np.where(c >= 0, c, np.argmax(posterior[v], axis=1)).astype(np.int32)
    drawn: dict[str, np.ndarray] = {}
    if draws:
        for v in sel:
            drawn[v] = np.repeat(rec_codes[:, network.index(v)][:, None].astype(np.int32), draws, axis=1)
        if need.size:
            d = draw_hidden(network, probs, rec_codes[need], draws, seed=seed, nodes=sel, block=block)
            for v in sel:
                drawn[v][need] = d[v]
    return Imputation(network, sel, ll, posterior, hidden, mode, drawn, int(draws), seed if draws else None)


def imputed_frame(frame: pd.DataFrame, imputation: Imputation) -> pd.DataFrame:
    """The input records with the added columns of ``imputation`` appended (input columns kept as they are)."""
    if len(frame) != imputation.n_records:
        raise DataError(f"the table has {len(frame)} rows but the imputation {imputation.n_records}; "
                        f"impute the same records")
    added = imputation.columns()
    clash = [c for c in added.columns if c in set(map(str, frame.columns))]
    if clash:
        raise DataError(f"the data already have a column {clash[0]!r}, a name the imputation output uses; "
                        f"rename that column (added columns end in {SEP}mode, {SEP}p_STATE, {SEP}drawK)")
    added.index = frame.index
    return pd.concat([frame, added], axis=1)


def _plain_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return text.strip() == text  # "-1.5" is a number to a spreadsheet; " -1" or "-1\t" is not left alone


def defuse_frame(table: pd.DataFrame) -> tuple[pd.DataFrame, int]:
    """Text cells a spreadsheet would run as formulas (first character ``=``, ``+``, ``-``, ``@``,
    tab or carriage return) get a leading apostrophe; plain numbers such as ``-1.5`` are left as
    they are. Column names too. Returns the table and how many cells were changed."""
    from .show import defuse_cell

    def fix(v: object) -> object:
        return v if isinstance(v, str) and _plain_number(v) else defuse_cell(v)

    out = table.copy()
    changed = 0
    for col in out.columns:
        s = out[col]
        if not (s.dtype == object or pd.api.types.is_string_dtype(s)):
            continue
        # each distinct value once (a column of labels has a handful), then the cells that change
        mapping = {}
        for v in pd.unique(s.to_numpy(dtype=object)):
            if isinstance(v, str):
                w = fix(v)
                if w is not v:
                    mapping[v] = w
        if mapping:
            mask = s.isin(list(mapping)).to_numpy(dtype=bool)
            col_values = s.to_numpy(dtype=object).copy()
            col_values[mask] = [mapping[v] for v in col_values[mask]]
            out[col] = col_values
            changed += int(mask.sum())
    out.columns = [fix(c) if isinstance(c, str) else c for c in out.columns]
    return out, changed


def impute_file(network: Network, probs: Mapping[str, np.ndarray], data: str | Path, out: str | Path, *,
                draws: int = 0, seed: int = 0, nodes: Sequence[str] | None = None,
                missing: Iterable[str] | None = None, count_column: str | None = None,
                ignore_columns: Iterable[str] = (), defuse: bool = True) -> tuple[Imputation, pd.DataFrame]:
    """Read ``data`` (CSV/Parquet file, folder or glob), impute, write ``out`` (CSV, atomically).

    Every input record gives one output row, in the input order, with every input column as it
    was read (CSV: the text of the cell) and the added columns (:data:`COLUMNS_DOC`). A count
    column, if named, is carried along unchanged: posteriors do not depend on record weights.

    With ``defuse`` (the default) text cells that a spreadsheet would run as formulas are written
    with a leading apostrophe (:func:`defuse_frame`; OWASP, "CSV Injection"); ``defuse=False``
    writes every cell as it was. The returned table is the one written.

    Returns:
        ``(imputation, the written table)``.
    """
    from .data import load_files, read_table, resolve_inputs
    from .io import atomic_write, check_output_paths

    check_output_paths({"out": out}, {"data file": data})
    files, fmt = resolve_inputs(data)
    ignore = list(ignore_columns)
    if count_column is not None:
        if count_column in network:
            raise DataError(f"{data}: count column {count_column!r} is also a node of the network; "
                            f"rename the count column")
        ignore.append(count_column)
    coded = load_files(network, data, missing=missing, ignore_columns=list(dict.fromkeys(ignore)))
    from .data import csv_header, parquet_names
    from .limits import check_impute

    # the imputation holds every record at once: refuse, before the records are read as text and
    # the posteriors spread over them, what could not fit in memory
    n_columns = len(csv_header(files[0]) if fmt == "csv" else parquet_names(files[0]))
    chosen = default_nodes(network, coded) if nodes is None else _check_nodes(network, nodes)
    check_impute(float(len(coded.inverse)) if coded.inverse is not None else float(coded.counts.sum()),
                 n_columns, network, chosen)
    frames = [read_table(f) for f in files]
    frame = pd.concat(frames, ignore_index=True) if len(frames) > 1 else frames[0]
    locate = None
    if len(files) == 1 and files[0].suffix.lower() == ".csv":
        from .data import csv_rows

        locate = csv_rows(files[0])
    from .limits import check_draws

    check_draws(draws, len(frame), len(nodes) if nodes else len(network))  # before the posterior is computed
    imp = impute(network, probs, coded, draws=draws, seed=seed, nodes=nodes, locate=locate)
    table = imputed_frame(frame, imp)
    if defuse:
        table, _ = defuse_frame(table)
    with atomic_write(out) as fh:
        table.to_csv(fh, index=False, lineterminator="\n", na_rep="")
    return imp, table


def format_summary(imp: Imputation) -> str:
    """A few lines for the terminal: cells imputed per node, records, draws."""
    counts = imp.n_imputed()
    latent = set(imp.network.latent_names)
    parts = [f"{v} {counts[v]}" + (" (latent)" if v in latent else "") for v in imp.nodes]
    n_rec = imp.n_records
    rows_with = int(np.any(np.stack([imp.hidden[v] for v in imp.nodes], axis=1), axis=1).sum()) if imp.nodes else 0
    lines = [f"{n_rec} records, {rows_with} with hidden cells; hidden cells per node: " + (", ".join(parts) or "none")]
    if imp.n_draws:
        lines.append(f"{imp.n_draws} joint posterior draw(s) per record (seed {imp.seed})")
    return "\n".join(lines)


# ----------------------------------------------------------------------------- queries
@dataclass(frozen=True)
class QueryResult:
    """Posterior of some nodes given evidence.

    Attributes:
        given: ``{node: state}`` the evidence.
        log_p_evidence: natural log of P(evidence) under the CPTs (0 with no evidence).
        posteriors: ``{node: {state: probability}}`` for every target.
    """

    given: Mapping[str, str]
    log_p_evidence: float
    posteriors: Mapping[str, Mapping[str, float]]
    soft: Mapping[str, Mapping[str, float]] = field(default_factory=dict)

    @property
    def p_evidence(self) -> float:
        return math.exp(self.log_p_evidence)

    def to_dict(self) -> dict[str, Any]:
        doc = {"format": "adfit-query/1", "given": dict(self.given), "p_evidence": self.p_evidence,
               "log_p_evidence": self.log_p_evidence,
               "posteriors": {k: dict(v) for k, v in self.posteriors.items()}}
        if self.soft:
            doc["soft_evidence"] = {k: dict(v) for k, v in self.soft.items()}
        return doc

    def format_text(self, digits: int = 4) -> str:
        ev = evidence_text(self.given, self.soft)
        if self.soft:
            head = (f"likelihood of the evidence {ev}: {self.p_evidence:.{digits}g}  (log {self.log_p_evidence:.6f}; "
                    f"sum of P(states, hard evidence) x weights, so it scales with the weights)")
        else:
            head = f"P({ev}) = {self.p_evidence:.{digits}g}  (log {self.log_p_evidence:.6f})"
        lines = [head if ev else "no evidence: prior marginals"]
        for node, dist in self.posteriors.items():
            lines.append("")
            lines.append(f"P({node}" + (f" | {ev})" if ev else ")"))
            width = max(len(s) for s in dist)
            for s, p in dist.items():
                lines.append(f"  {s:<{width}}  {p:.{digits}f}")
        return "\n".join(lines)


def evidence_text(given: Mapping[str, str], soft: Mapping[str, Mapping[str, float]] | None = None) -> str:
    """``wear=heavy, load=high:2,low:1`` (hard evidence, then soft evidence with its weights)."""
    parts = [f"{k}={v}" for k, v in given.items()]
    parts += [f"{k}=" + ",".join(f"{s}:{w:g}" for s, w in ws.items() if w > 0) for k, ws in (soft or {}).items()]
    return ", ".join(parts)


def soft_weights(network: Network, node: str, text: str, *, option: str = "--given") -> dict[str, float]:
    """Parse soft (likelihood) evidence ``STATE:WEIGHT,STATE:WEIGHT`` on ``node``.

    Returns ``{state: weight}`` over every state of the node in declared order; a state not
    listed gets weight 0. Each weight is a finite number >= 0, not all 0; a state listed twice,
    an unknown state or a malformed item is an :class:`OptionError` (one line)."""
    states = network.node(node).states
    out = {s: 0.0 for s in states}
    seen: set[str] = set()
    for item in text.split(","):
        item = item.strip()
        if ":" not in item:
            raise OptionError(f"{option} {node}={text}: soft evidence is STATE:WEIGHT,STATE:WEIGHT "
                              f"(e.g. {node}={states[0]}:0.8,{states[-1]}:0.2); {item!r} has no ':WEIGHT'")
        state, w = (x.strip() for x in item.rsplit(":", 1))
        if state not in out:
            raise OptionError(f"{option} {node}={text}: node {node!r} has no state {state!r}; "
                              f"{did_you_mean(state, states)}its states are: {', '.join(states)}")
        if state in seen:
            raise OptionError(f"{option} {node}={text}: state {state!r} is listed twice; give it once")
        seen.add(state)
        try:
            x = float(w)
        except ValueError:
            x = float("nan")
        if not (math.isfinite(x) and x >= 0):
            raise OptionError(f"{option} {node}={text}: the weight of {state!r} is {w!r}; "
                              f"give a finite number >= 0")
        out[state] = x
    if not any(v > 0 for v in out.values()):
        raise OptionError(f"{option} {node}={text}: every weight is 0 (evidence of probability 0); "
                          f"give at least one state a weight above 0")
    return out


def parse_evidence(network: Network, items: Sequence[str], *, option: str = "--given"
                   ) -> tuple[dict[str, str], dict[str, dict[str, float]]]:
    """``--given`` items as ``(hard, soft)``: ``NODE=STATE`` is hard evidence; ``NODE=STATE:W,STATE:W``
    is soft (likelihood) evidence, weights >= 0 that multiply P(NODE = STATE) (Pearl's virtual
    evidence; states not listed get weight 0). A value that is a state of the node is always
    read as that state (a state may contain ':' or ',')."""
    hard: dict[str, str] = {}
    soft: dict[str, dict[str, float]] = {}
    for item in items:
        if "=" not in item:
            raise OptionError(f"{option} {item!r}: write NODE=STATE (or NODE=STATE:WEIGHT,STATE:WEIGHT), "
                              f"e.g. {option} wear=heavy")
        node, value = (s.strip() for s in item.split("=", 1))
        if not node or not value:
            raise OptionError(f"{option} {item!r}: write NODE=STATE with both parts, e.g. {option} wear=heavy")
        if node not in network:
            raise OptionError(f"{option} {node}={value}: {node!r} is not a node of the network; "
                              f"{did_you_mean(node, network.names)}the nodes are: {', '.join(network.names)}")
        if node in hard and hard[node] == value:
            continue
        if node in hard or node in soft:
            raise OptionError(f"{option} gives node {node!r} twice ({item!r} and an earlier one); give it once")
        if value in network.node(node).states or ":" not in value:
            hard[node] = value  # an unknown state is named by query()
        else:
            soft[node] = soft_weights(network, node, value, option=option)
    return hard, soft


def soft_arrays(network: Network, soft: Mapping[str, Mapping[str, float]], rows: int = 1) -> dict[str, np.ndarray]:
    """Soft evidence as weight arrays ``{node: (rows, card)}`` (weights as given, in declared state order)."""
    out = {}
    for node, ws in soft.items():
        w = np.array([float(ws.get(s, 0.0)) for s in network.node(node).states])
        out[node] = np.tile(w, (rows, 1))
    return out


def parse_assignments(items: Sequence[str], *, option: str = "--given") -> dict[str, str]:
    """Turn ``["wear=heavy", "load=high"]`` into ``{"wear": "heavy", "load": "high"}`` (spaces trimmed)."""
    out: dict[str, str] = {}
    for item in items:
        if "=" not in item:
            raise OptionError(f"{option} {item!r}: write NODE=STATE, e.g. {option} wear=heavy")
        node, state = (s.strip() for s in item.split("=", 1))
        if not node or not state:
            raise OptionError(f"{option} {item!r}: write NODE=STATE with both parts, e.g. {option} wear=heavy")
        if node in out and out[node] != state:
            raise OptionError(f"{option} gives node {node!r} twice ({out[node]!r} and {state!r}); give it once")
        out[node] = state
    return out


def check_node_state(network: Network, node: str, state: str, where: str) -> None:
    """One ``NODE=STATE`` pair of an option (``where``, e.g. ``"--given wear=heavy"``): the node is
    in the network and has that state; otherwise a one-line OptionError with a did-you-mean
    suggestion and the choices (the check every NODE=STATE option shares)."""
    if node not in network:
        raise OptionError(f"{where}: {node!r} is not a node of the network; "
                          f"{did_you_mean(node, network.names)}the nodes are: {', '.join(network.names)}")
    states = network.node(node).states
    if state not in states:
        raise OptionError(f"{where}: node {node!r} has no state {state!r}; "
                          f"{did_you_mean(state, states)}its states are: {', '.join(states)}")


def query(network: Network, probs: Mapping[str, np.ndarray], given: Mapping[str, str] | None = None,
          targets: Sequence[str] | None = None, *, soft: Mapping[str, Mapping[str, float]] | None = None
          ) -> QueryResult:
    """Exact posterior of ``targets`` (default: every node not given) given the evidence ``given``.

    ``soft``: likelihood evidence ``{node: {state: weight}}`` (weights >= 0, not all 0; a state
    left out has weight 0), multiplied into P(node = state) (Pearl 1988, virtual evidence). A
    node with soft evidence may be a target (its posterior given all the evidence); with soft
    evidence ``log_p_evidence`` is ``log sum w(x) P(x, hard evidence)``, which scales with the
    weights.

    Raises:
        OptionError: an unknown node or state, or a target that is also given (one line naming it).
        ImpossibleDataError: the evidence has probability 0 under the CPTs.
    """
    given = dict(given or {})
    soft = {k: dict(v) for k, v in (soft or {}).items()}
    check_soft(network, given, soft)
    codes = np.full((1, len(network)), HIDDEN, dtype=np.int32)
    for node, state in given.items():
        check_node_state(network, node, state, spelled(f"--given {node}={state}", f"given={{{node!r}: {state!r}}}"))
        codes[0, network.index(node)] = network.node(node).states.index(state)
    if targets is None or len(targets) == 0:
        tg = [v for v in network.names if v not in given and v not in soft]
        if not tg:
            raise OptionError("every node is given as evidence; leave at least one out or name a --target")
    else:
        tg = list(dict.fromkeys(targets))
        for v in tg:
            if v not in network:
                raise OptionError(f"{spelled(f'--target {v}', f'targets=[{v!r}]')}: {v!r} is not a node of the "
                                  f"network; {did_you_mean(v, network.names)}the nodes are: {', '.join(network.names)}")
            if v in given:
                raise OptionError(f"--target {v}: the node is also given (--given {v}={given[v]}); "
                                  f"its posterior is that state; drop one of the two")
    ll, post = row_posteriors(network, probs, codes, weights=soft_arrays(network, soft) or None)
    if not math.isfinite(ll[0]):
        ev = evidence_text(given, soft)
        raise ImpossibleDataError(f"the evidence {ev} has probability 0 under the CPTs; no posterior exists; "
                                  f"check the evidence and the fixed or fitted tables")
    posteriors = {v: {s: float(p) for s, p in zip(network.node(v).states, post[v][0])} for v in tg}
    return QueryResult(given, float(ll[0]), posteriors, soft)


def check_soft(network: Network, given: Mapping[str, str], soft: Mapping[str, Mapping[str, float]],
               option: str = "--given") -> None:
    """Soft evidence on known nodes and states, weights finite >= 0 and not all 0, no node both hard and soft."""
    for node, ws in soft.items():
        if node not in network:
            raise OptionError(f"{option} {node}=...: {node!r} is not a node of the network; "
                              f"{did_you_mean(node, network.names)}the nodes are: {', '.join(network.names)}")
        if node in given:
            raise OptionError(f"{option} gives node {node!r} twice (a state and weights); give it once")
        states = network.node(node).states
        for s_, w in ws.items():
            if s_ not in states:
                raise OptionError(f"{option} {node}=...: node {node!r} has no state {s_!r}; "
                                  f"{did_you_mean(s_, states)}its states are: {', '.join(states)}")
            if not (math.isfinite(float(w)) and float(w) >= 0):
                raise OptionError(f"{option} {node}=...: the weight of {s_!r} is {w!r}; give a finite number >= 0")
        if not any(float(w) > 0 for w in ws.values()):
            raise OptionError(f"{option} {node}=...: every weight is 0; give at least one state a weight above 0")

"""Sizes the user controls, estimated before the work: refuse what cannot fit in memory.

An estimate is a plain count of the bytes of the arrays a step allocates; it is compared with
half the memory the machine has available now (``os.sysconf``), and a refusal names the option,
the estimate and what to change. Estimates err on the low side: a run that passes may still use
more, but one that is refused could never have finished.
"""

from __future__ import annotations

import os

from .errors import TooLargeError


def memory_available() -> int | None:
    """Bytes of physical memory available now, or None where the system does not say."""
    try:
        return int(os.sysconf("SC_AVPHYS_PAGES")) * int(os.sysconf("SC_PAGE_SIZE"))
    except (ValueError, OSError, AttributeError):
        return None


def _gib(nbytes: float) -> str:
    return f"{nbytes / 2 ** 30:.3g} GiB"


def check_memory(what: str, nbytes: float, fix: str, *, available: int | None = None) -> None:
    """Refuse (TooLargeError, one line) when ``nbytes`` exceeds half the available memory."""
    avail = memory_available() if available is None else available
    if avail is not None and nbytes > avail / 2:
        raise TooLargeError(f"{what} would need about {_gib(nbytes)} of memory, more than half of the "
                            f"{_gib(avail)} available; {fix}")


def minibatch_bytes(batch_size: int, n_nodes: int) -> float:
    """One minibatch: the sampled indices (int64), the gathered codes (8 bytes per node: the
    data's int8 gathered and padded, then int32 for the program) and the weights (float64,
    twice)."""
    return float(batch_size) * (8 + 8 * n_nodes + 16)


def check_batch_size(batch_size: int | None, n_nodes: int) -> None:
    if batch_size is None:
        return
    check_memory(f"--batch-size {batch_size}", minibatch_bytes(batch_size, n_nodes),
                 "give a smaller --batch-size (a few thousand rows is common practice)")


def draws_bytes(n_records: float, draws: int, n_nodes: int) -> float:
    """The draws of an imputation: one int32 code per record, draw and node, and at least one
    byte of text per cell of the CSV row that is built from them."""
    return float(n_records) * draws * n_nodes * (4 + 2)


def check_draws(draws: int, n_records: float, n_nodes: int) -> None:
    if draws:
        check_memory(f"--draws {draws} for {n_records:,.0f} records", draws_bytes(n_records, draws, n_nodes),
                     "give fewer --draws (5 to 20 is common practice for multiple imputation)")


def restarts_bytes(restarts: int, n_params: int) -> float:
    """Starts held side by side: per start its logits, gradient, direction and the L-BFGS memory
    (10 pairs of vectors), float64, with a few more vectors for the line search: 32 vectors."""
    return float(restarts) * n_params * 8 * 32


def check_restarts(restarts: int | None, n_params: int) -> None:
    if restarts is not None and restarts > 1:
        check_memory(f"--restarts {restarts} ({n_params} parameters each)", restarts_bytes(restarts, n_params),
                     "give fewer --restarts (5 to 50 is common practice)")


def check_folds(folds: int, n_records: float, n_distinct: int) -> None:
    """A fold needs a record to hold out; the split is a (folds, distinct rows) float64 table."""
    if folds and folds > n_records:
        raise TooLargeError(f"--folds {folds} is more than the {n_records:,.0f} records: every fold needs "
                            f"records to hold out; give at most {int(n_records)} (5 or 10 is common practice)")
    if folds:
        check_memory(f"--folds {folds} over {n_distinct:,} distinct rows", float(folds) * n_distinct * 8 * 2,
                     "give fewer --folds (5 or 10 is common practice)")


def impute_bytes(n_records: float, n_columns: int, network, nodes=None) -> float:
    """The per-record arrays of an imputation held at once (adfit/impute.py): the records'
    codes (the network's code type per node: int8 up to 127 states) and their index (int64);
    per chosen node its posterior (float64 per
    state), mode and hidden flag; the added columns (float64 per state, a pointer per mode, the
    log-probability), twice (the added table and the output table they are joined into); the
    input columns, a pointer or an offset per cell, twice (read, and in the output table).
    ``nodes``: the chosen nodes (default: every node)."""
    from .rowkeys import code_dtype

    cards = [network.node(v).card for v in (nodes or network.names)]
    per_record = (code_dtype(network.cards).itemsize * len(network) + 8 + 8
                  + sum(8 * c + 4 + 1 for c in cards)
                  + 2 * (sum(8 * c + 8 for c in cards) + 8)
                  + 2 * 8 * n_columns)
    return float(n_records) * per_record


def check_impute(n_records: float, n_columns: int, network, nodes=None) -> None:
    check_memory(f"imputing {n_records:,.0f} records", impute_bytes(n_records, n_columns, network, nodes),
                 "impute the records in parts (split the file) or name fewer --nodes")

"""All error and warning types raised by adfit.

Every user-facing problem is an :class:`AdfitError` whose message is one line that says what is
wrong, where (file, row, column, node) and how to fix it. The CLI prints that line and exits 1.
"""

from __future__ import annotations


class AdfitError(Exception):
    """Base class of every error adfit raises on purpose."""


class NetworkError(AdfitError):
    """The network description is invalid (schema, cycle, states, fixed tables)."""


class DataError(AdfitError):
    """The data table does not fit the network (columns, labels, counts, file format)."""


class PriorError(AdfitError):
    """The prior or regularisation settings are invalid."""


class ResultError(AdfitError):
    """A result file cannot be read or does not match the network."""


class ImpossibleDataError(AdfitError):
    """Some rows have probability zero under the fixed CPTs (log-likelihood is -inf)."""


class OptionError(AdfitError):
    """An option value is out of range or inconsistent with another option."""


class ConvergenceWarning(UserWarning):
    """The optimiser stopped before its stopping rule held; the estimate may not be a maximum."""


class IdentifiabilityWarning(UserWarning):
    """Some parameters are not pinned down by the data (flat directions, prior-only rows)."""


class LocalOptimaWarning(UserWarning):
    """Of several starts, only one reached the best objective: a higher optimum may exist."""

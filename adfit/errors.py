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


class OutputError(OptionError):
    """An output path cannot be written safely: it is an input, lies inside a data folder that is
    read, is a folder, link, device or pipe, or its folder is missing or not writable."""


class InputFileNotFound(OptionError):
    """A file named on the command line does not exist, is a folder, or cannot be read."""


class TooLargeError(OptionError):
    """A computation would need more memory than adfit allows (the elimination's largest table,
    a minibatch, the draws of an imputation): refused before it starts, with the estimate."""


class DataWarning(UserWarning):
    """The records are read, but not quite as written (a Parquet column of null type: all gaps)."""


class ConvergenceWarning(UserWarning):
    """The optimiser stopped before its stopping rule held; the estimate may not be a maximum."""


class IdentifiabilityWarning(UserWarning):
    """Some parameters are not pinned down by the data (flat directions, prior-only rows)."""


class LocalOptimaWarning(UserWarning):
    """Of several starts, only one reached the best objective: a higher optimum may exist."""


# ------------------------------------------------------------------ how a message names an option
# One mechanism for both audiences: messages name an option through :func:`option`, which spells
# it as the command line does (``--ignore-columns id``) inside a CLI command and as the Python
# keyword does (``ignore_columns=['id']``) everywhere else. The CLI turns the first on with
# :func:`cli_terms` around each command body.
import contextlib as _contextlib
import contextvars as _contextvars
import shlex as _shlex

_CLI_TERMS: _contextvars.ContextVar[bool] = _contextvars.ContextVar("adfit_cli_terms", default=False)


@_contextlib.contextmanager
def cli_terms():
    """Within this block, :func:`option` spells options as the command line does."""
    token = _CLI_TERMS.set(True)
    try:
        yield
    finally:
        _CLI_TERMS.reset(token)


def option(keyword: str, value: str | None = None, *, many: bool = False) -> str:
    """``option("ignore_columns", "id", many=True)``: ``--ignore-columns id`` (CLI) or ``ignore_columns=['id']`` (Python).

    ``many``: the Python keyword takes a list (values given comma-separated on the command line
    become list items).
    """
    if _CLI_TERMS.get():
        flag = "--" + keyword.replace("_", "-")
        return flag if value is None else f"{flag} {_shlex.quote(value)}"
    if value is None:
        return f"{keyword}="
    return f"{keyword}={[v for v in value.split(',')] if many else value!r}"


def spelled(cli: str, python: str) -> str:
    """``cli`` inside a CLI command (:func:`cli_terms`), ``python`` everywhere else: for a value
    whose two spellings differ by more than the option's name (``--given wear=heavy`` against
    ``given={'wear': 'heavy'}``)."""
    return cli if _CLI_TERMS.get() else python


def similar_label(text: str, choices) -> str | None:
    """The one choice that ``text`` resembles: the same but for case, or one character added,
    removed or changed (Levenshtein distance 1, case ignored); None when there is no such choice
    or more than one."""
    if not text:
        return None
    same_case = [s for s in choices if s.lower() == text.lower() and s != text]
    if len(same_case) == 1:
        return same_case[0]

    def one_edit(a: str, b: str) -> bool:
        if abs(len(a) - len(b)) > 1 or a == b:
            return False
        if len(a) == len(b):
            return sum(x != y for x, y in zip(a, b)) == 1
        if len(a) > len(b):
            a, b = b, a
        return any(b[:i] + b[i + 1:] == a for i in range(len(b)))

    near = [s for s in choices if one_edit(text.lower(), s.lower())]
    return near[0] if len(near) == 1 else None


def did_you_mean(text: str, choices) -> str:
    """``"did you mean 'heavy'? "`` when ``text`` resembles one of ``choices`` (:func:`similar_label`), else ``""``."""
    near = similar_label(str(text), [str(c) for c in choices])
    return f"did you mean {near!r}? " if near is not None else ""

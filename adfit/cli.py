"""The ``adfit`` command line (typer).

Each command is a plain annotated function. User errors (:class:`adfit.errors.AdfitError`) end
as one line on stderr and exit code 1, never a traceback.
"""

from __future__ import annotations

import sys
from contextlib import contextmanager
from pathlib import Path
from typing import Annotated, Optional

import typer

from .errors import AdfitError

CAUTION = ("Estimates rest on the network structure and on the missing-at-random (MAR) assumption; "
           "they support, and do not replace, engineering or clinical judgement. Local codes, "
           "regulations and licensed practice come first.")

app = typer.Typer(
    name="adfit",
    help=("Fit the CPTs of a discrete Bayesian network from records with gaps and latent nodes "
          "(exact marginal likelihood, MAP priors, EM cross-check, error bars).\n\n" + CAUTION),
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)

# Shared option declarations (reuse these in every command that reads data).
NetworkArg = Annotated[Path, typer.Argument(help="Network file (TOML): [nodes.NAME] tables with states, parents, latent, fixed.",
                                            exists=True, dir_okay=False, readable=True)]
DataArg = Annotated[Path, typer.Argument(help="Records: CSV or Parquet, one column per non-latent node.",
                                         exists=True, dir_okay=False, readable=True)]
MissingOpt = Annotated[Optional[list[str]], typer.Option(
    "--missing", help="A label that means 'not recorded' (repeat for several). Default: empty, NA, NaN, ?.")]
CountOpt = Annotated[Optional[str], typer.Option(
    "--count-column", help="Column holding the number of records each row stands for (pre-aggregated tables).")]
IgnoreOpt = Annotated[Optional[str], typer.Option(
    "--ignore-columns", help="Comma-separated data columns to ignore.")]


def split_list(value: Optional[str]) -> tuple[str, ...]:
    return tuple(v.strip() for v in value.split(",") if v.strip()) if value else ()


def fail(message: str) -> None:
    """Print one error line and exit 1."""
    typer.echo(f"adfit: error: {message}", err=True)
    raise typer.Exit(code=1)


@contextmanager
def user_errors():
    """Wrap a command body: an AdfitError becomes one line on stderr and exit code 1."""
    try:
        yield
    except AdfitError as e:
        fail(str(e))


def main() -> None:
    """Console-script entry point: run the app, turning AdfitError into one line and exit 1."""
    try:
        app(standalone_mode=False)
    except AdfitError as e:
        typer.echo(f"adfit: error: {e}", err=True)
        sys.exit(1)
    except typer.Exit as e:
        sys.exit(e.exit_code)
    except typer.Abort:
        typer.echo("adfit: aborted", err=True)
        sys.exit(1)
    except Exception as e:  # click usage errors and the like
        import click
        if isinstance(e, click.exceptions.ClickException):
            e.show()
            sys.exit(1 if e.exit_code == 2 else e.exit_code)
        raise

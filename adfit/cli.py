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
    rich_markup_mode="markdown",
)

DATA_PANEL = "Reading the records"
OPT_PANEL = "Optimiser"
CHECK_PANEL = "Checks and error bars"


def Flag(*names: str, **kw):  # noqa: N802 (a declaration, like typer.Option)
    """An on/off option: shown in --help as a flag (no value column), used as --name / --no-name."""
    return typer.Option(*names, metavar="", **kw)


class InputFile:
    """An input file that must exist and be readable (``dir_okay``: a folder is accepted too).

    Checked when the command line is read, before any work; a problem is one line naming the
    file's role, the path and what to do (``adfit: error: ...``, exit 1) instead of click's
    usage block (exit 2). The line is printed here and the run ends with ``typer.Exit(1)``:
    typer would draw a raised click error in a box."""

    def __init__(self, role: str, *, dir_okay: bool = False):
        self.role = role
        self.dir_okay = dir_okay

    def __call__(self, value):
        import os

        from .errors import InputFileNotFound

        path = Path(value)
        where = f"{self.role} {value}"
        if not path.exists():
            problem = f"{where}: file not found (check the path)"
        elif path.is_dir() and not self.dir_okay:
            problem = f"{where}: is a folder, not a file (give the file's path)"
        elif not os.access(path, os.R_OK):
            problem = f"{where}: cannot be read (check its permissions)"
        else:
            return path
        typer.echo(f"adfit: error: {InputFileNotFound(problem)}", err=True)
        raise typer.Exit(code=1)


# Shared option declarations (reuse these in every command that reads data).
NetworkArg = Annotated[Path, typer.Argument(help=("Network file (TOML): one [nodes.NAME] table per node with states and parents; optional keys "
                                                  "latent, fixed, cpd, tied_to, impossible, increasing_with (docs/user-guide.md)."),
                                            parser=InputFile("network file"))]
DataArg = Annotated[Path, typer.Argument(help="Records: a CSV or Parquet file (or a folder or glob pattern of such files), one column per non-latent node.")]
MissingOpt = Annotated[Optional[list[str]], typer.Option(
    "--missing", rich_help_panel=DATA_PANEL, help="A label that means 'not recorded' (repeat for several). Default: empty, NA, NaN, ?.")]
CountOpt = Annotated[Optional[str], typer.Option(
    "--count-column", rich_help_panel=DATA_PANEL, help="Column holding the number of records each row stands for (pre-aggregated tables).")]
IgnoreOpt = Annotated[Optional[str], typer.Option(
    "--ignore-columns", rich_help_panel=DATA_PANEL, help="Comma-separated data columns to ignore.")]


def split_list(value: Optional[str]) -> tuple[str, ...]:
    return tuple(v.strip() for v in value.split(",") if v.strip()) if value else ()


SEED_MAX = 2 ** 32 - 1  # numpy's seeds are 32-bit words


def check_seed(seed: int) -> None:
    """Refuse a --seed outside 0..2**32-1 (one line, before any work)."""
    from .errors import OptionError

    if not 0 <= seed <= SEED_MAX:
        raise OptionError(f"--seed {seed} is out of range; give a whole number from 0 to {SEED_MAX}")


def fail(message: str) -> None:
    """Print one error line and exit 1."""
    typer.echo(f"adfit: error: {message}", err=True)
    raise typer.Exit(code=1)


@contextmanager
def user_errors():
    """Wrap a command body: an AdfitError becomes one line on stderr and exit code 1."""
    import warnings

    from .errors import DataWarning, cli_terms

    caught: list = []
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", DataWarning)
            with cli_terms():  # messages name options as --ignore-columns, not ignore_columns=
                yield
    except AdfitError as e:
        _replay([w for w in caught if not issubclass(w.category, DataWarning)])  # the error is the one line
        fail(str(e))
    _replay(caught)


def _replay(caught) -> None:
    """Warnings recorded in a command: a DataWarning as one line; any other as Python shows it."""
    import warnings

    from .errors import DataWarning

    for w in caught:
        if issubclass(w.category, DataWarning):
            typer.echo(f"adfit: warning: {w.message}", err=True)
        else:
            warnings.showwarning(w.message, w.category, w.filename, w.lineno)


def exit_on_sigterm() -> None:
    """SIGTERM ends the process as SystemExit(143): finally blocks run, temporary files are removed."""
    import signal

    def _terminate(signum, frame):
        raise SystemExit(128 + signum)

    try:
        signal.signal(signal.SIGTERM, _terminate)
    except ValueError:  # not the main thread
        pass


def main() -> None:
    """Console-script entry point: run the app, turning AdfitError into one line and exit 1."""
    exit_on_sigterm()
    from ._compile_cache import request_compilation_cache
    # compiled programs kept on disk between runs (ADFIT_COMPILE_CACHE=0: off); switched on when
    # a command imports JAX (adfit/_jax.py), so that --help does not pay for importing it
    request_compilation_cache()
    try:
        from .errors import cli_terms
        with cli_terms():
            rc = app(standalone_mode=False, prog_name="adfit")
        if isinstance(rc, int) and rc:  # without standalone mode, click returns a typer.Exit's code
            sys.exit(rc)
    except AdfitError as e:
        typer.echo(f"adfit: error: {e}", err=True)
        sys.exit(1)
    except typer.Exit as e:
        sys.exit(e.exit_code)
    except (typer.Abort, KeyboardInterrupt):  # click turns Ctrl-C into Abort
        typer.echo("adfit: interrupted; a file being written was left as it was", err=True)
        sys.exit(130)
    except Exception as e:  # usage errors of the click layer (typer may ship its own copy)
        if hasattr(e, "format_message") and hasattr(e, "exit_code"):
            # one line, as for every other error: what was wrong, and where the options are listed
            ctx = getattr(e, "ctx", None)
            where = f"{ctx.command_path} --help" if ctx is not None else "adfit --help"
            typer.echo(f"adfit: error: {e.format_message().rstrip('.')} (see {where})", err=True)
            sys.exit(1)
        raise


# ------------------------------------------------------------------ gaps (missing-data overview)
@app.command("gaps")
def gaps_command(
    network: NetworkArg,
    data: DataArg,
    missing: MissingOpt = None,
    count_column: CountOpt = None,
    ignore_columns: IgnoreOpt = None,
    as_json: Annotated[bool, Flag(
        "--json", help="Print the overview as JSON (format adfit-gaps/1) instead of text.")] = False,
    top: Annotated[int, typer.Option(
        "--top", help="How many of the most frequent missingness patterns to list.")] = 10,
    level: Annotated[float, typer.Option(
        "--level", help="Significance level of the MCAR tests, after Holm's adjustment.")] = 0.05,
) -> None:
    """Overview of the missing cells: per column, patterns, complete rows, and an MCAR test.

    For each column with gaps, G² likelihood-ratio tests check whether its missingness depends on the other observed columns (pairwise, and jointly given which of them are missing; Holm-adjusted). Latent nodes are listed apart: they are never observed by design.

    Caution: a rejection shows that the gaps are not MCAR; not rejecting does not prove MCAR. Whether the gaps depend on the missing values themselves (MAR versus MNAR) cannot be tested from the data, and the fit assumes MAR.

    Example: adfit gaps gearbox.toml inspections.csv --top 5 --missing n/a
    """

    import json

    from .data import load_data
    from .gaps import overview
    from .network import load_network

    with user_errors():
        net = load_network(network)
        coded = load_data(net, data, missing=missing, count_column=count_column,
                          ignore_columns=split_list(ignore_columns))
        report = overview(net, coded, top=top, level=level)
        typer.echo(json.dumps(report.to_dict(), indent=2) if as_json else report.format_text())


# ------------------------------------------------------------------ em (the EM reference fit)
def em_check_options(l2: float, network=None) -> None:
    """For ``fit --em-check``: refuse, before fitting, what the EM cross-check cannot cover
    (monotone nodes: :func:`adfit.crosscheck.check_em_coverage`; the L2 penalty)."""
    from .errors import OptionError

    from .fit import _em_refusal

    if network is not None:
        from .crosscheck import check_em_coverage

        check_em_coverage(network)
    refusal = None if network is None else _em_refusal(network)
    if refusal is not None:
        raise OptionError(f"{refusal} (or fit without --em-check)")
    if l2 > 0:
        raise OptionError(f"--em-check covers the likelihood and Dirichlet priors, not the L2 penalty "
                          f"(--l2 {l2:g}); drop --em-check or use --l2 0")


def with_em_check(result, coded, *, pseudo_counts=None, seed: int = 0, max_iter: Optional[int] = None,
                  show: bool = True, likelihood=None):
    """For ``fit --em-check``: run the EM cross-check (each EM run capped at ``max_iter``
    iterations, default :data:`adfit.crosscheck.EM_MAX_ITER`), print its summary, return the
    result with the ``"em_check"`` section added (one call in the fit command, before writing
    the result)."""
    from .crosscheck import EM_MAX_ITER, attach_em_check, format_em_check

    checked = attach_em_check(result, coded, pseudo_counts=pseudo_counts, seed=seed,
                              max_iter=EM_MAX_ITER if max_iter is None else max_iter, likelihood=likelihood)
    if show:
        typer.echo(format_em_check(checked.extras["em_check"]))
    return checked


@app.command("em")
def em_command(
    network: NetworkArg,
    data: DataArg,
    out: Annotated[Path, typer.Option("--out", help="Result file to write (JSON, format adfit-result/1, method em).")],
    missing: MissingOpt = None,
    count_column: CountOpt = None,
    ignore_columns: IgnoreOpt = None,
    prior: Annotated[Optional[Path], typer.Option(
        "--prior", help="Prior file (TOML: Dirichlet pseudo-counts; coefficient_sd on logistic nodes): EM then finds the MAP estimate.",
        parser=InputFile("prior file"))] = None,
    init: Annotated[Optional[Path], typer.Option(
        "--init", help="Start from the CPTs of a result file (default: a seeded random start).",
        parser=InputFile("start file (--init)"))] = None,
    seed: Annotated[int, typer.Option("--seed", help="Seed of the random start.")] = 0,
    tol: Annotated[float, typer.Option(
        "--tol", help="Stop when the projected relative rise of the objective is below this ...")] = 1e-10,
    gtol: Annotated[float, typer.Option(
        "--gtol", help="... and the largest stationarity residual, per record, is below this.")] = 1e-9,
    max_iter: Annotated[int, typer.Option("--max-iter", help="Most EM iterations.")] = 5000,
) -> None:
    """Fit the free CPTs by EM, the plain-numpy reference (its own exact inference).

    Writes the same result format as `fit`, with "method": "em", plus an "em" section: the rate of
    convergence (ratio of successive parameter changes: the largest fraction of missing
    information), the stationarity residual, the rows not informed by the data, the trace.

    Caution: estimates rest on the network structure and on MAR; they support, and do not
    replace, engineering or clinical judgement.

    Example: adfit em gearbox.toml inspections.csv --out em.json --seed 3
    """
    from .data import load_data
    from .em import fit_em
    from .network import load_network
    from .result import load_result, write_result

    with user_errors():
        from .io import check_output_paths

        check_seed(seed)
        check_output_paths({"out": out}, {"network file": network, "data file": data, "prior file": prior,
                                          "init file": init})
        net = load_network(network)
        coded = load_data(net, data, missing=missing, count_column=count_column,
                          ignore_columns=split_list(ignore_columns))
        pri = None
        if prior is not None:
            from .priors import load_prior

            pri = load_prior(prior, net)
        start = load_result(init, net).probs if init is not None else None
        res = fit_em(net, coded, init=start, prior=pri, tol=tol, gtol=gtol, max_iter=max_iter, seed=seed)
        write_result(out, res)
        sec = res.extras["em"]
        typer.echo(res.summary())
        rate = sec["rate"]
        typer.echo("EM rate of convergence " + ("n/a (stopped too early to tell)" if rate is None else f"{rate:.4f}")
                   + " (largest fraction of missing information)")
        for name, rows in sec["uninformed_rows"].items():
            cfgs = "; ".join(", ".join(f"{p}={s}" for p, s in r["parents"].items()) or "(no parents)" for r in rows)
            typer.echo(f"not informed by the data (kept at the start{' / prior mode' if pri else ''}): {name} given {cfgs}")
        typer.echo(f"wrote {out}")
        typer.echo(CAUTION)


# ------------------------------------------------------------------ fit / score (the core job)
EngineOpt = Annotated[str, typer.Option(
    "--engine", rich_help_panel=DATA_PANEL, help="How the records are read and reduced to distinct rows: pandas (default), stream "
                     "(chunked, memory bounded by the distinct rows), duckdb (out of core), dask (a cluster).")]
SchedulerOpt = Annotated[Optional[str], typer.Option(
    "--scheduler", rich_help_panel=DATA_PANEL, help="With --engine dask: address of the Dask scheduler (default: a local cluster).")]


def read_inputs(network: Path, data: Path, *, missing, count_column, ignore_columns, engine: str = "pandas",
                scheduler: Optional[str] = None):
    """Network and coded data, as every data-reading command needs them (``network``: a path, or
    a :class:`~adfit.network.Network` already read, e.g. the one embedded in a result file)."""
    from .engines import load_coded
    from .network import Network, load_network

    net = network if isinstance(network, Network) else load_network(network)
    coded = load_coded(net, data, engine=engine, scheduler=scheduler, missing=missing,
                       count_column=count_column, ignore_columns=split_list(ignore_columns))
    return net, coded


@app.command("fit")
def fit_command(
    network: NetworkArg,
    data: DataArg,
    out: Annotated[Path, typer.Option("--out", help="Result file to write (JSON, format adfit-result/1).")],
    method: Annotated[str, typer.Option("--method", rich_help_panel=OPT_PANEL, help="Optimiser: lbfgs (default) or adam.")] = "lbfgs",
    seed: Annotated[int, typer.Option("--seed", rich_help_panel=OPT_PANEL, help="Seed of the random starts (results are reproducible).")] = 0,
    restarts: Annotated[Optional[int], typer.Option("--restarts", rich_help_panel=OPT_PANEL, help="Number of starts; the best is kept. Default: 1, or 4 when the network has latent nodes (see the user guide).")] = None,
    tol: Annotated[float, typer.Option("--tol", rich_help_panel=OPT_PANEL, help="Relative change of the objective that counts as flat (with a residual below sqrt(tol)).")] = 1e-10,
    gtol: Annotated[float, typer.Option("--gtol", rich_help_panel=OPT_PANEL, help="Stop when the gradient norm (records) is below gtol x number of records.")] = 1e-9,
    max_iter: Annotated[int, typer.Option("--max-iter", rich_help_panel=OPT_PANEL, help="Most iterations per start.")] = 1000,
    kkt_tol: Annotated[float, typer.Option("--kkt-tol", rich_help_panel=OPT_PANEL, help="KKT check: at a maximum every cell's ratio is at most 1 + this (see the user guide).")] = 1e-3,
    learning_rate: Annotated[float, typer.Option("--learning-rate", rich_help_panel=OPT_PANEL, help="Step size of Adam (with --method adam).")] = 0.05,
    batch_size: Annotated[Optional[int], typer.Option(
        "--batch-size", rich_help_panel=OPT_PANEL, help="With --method adam: distinct rows sampled per step (very large data).")] = None,
    prior: Annotated[Optional[Path], typer.Option(
        "--prior", help="Prior file (TOML): Dirichlet pseudo-counts, BDeu equivalent sample size or expert tables; a normal prior (coefficient_sd) on logistic coefficients; gives MAP estimates.",
        parser=InputFile("prior file"))] = None,
    l2: Annotated[float, typer.Option("--l2", help="L2 penalty lambda on the logits (row mean removed).")] = 0.0,
    missing: MissingOpt = None,
    count_column: CountOpt = None,
    ignore_columns: IgnoreOpt = None,
    engine: EngineOpt = "pandas",
    scheduler: SchedulerOpt = None,
    em_check: Annotated[bool, Flag("--em-check/--no-em-check", rich_help_panel=CHECK_PANEL, help="Cross-check the fit with the independent EM reference.")] = False,
    em_max_iter: Annotated[int, typer.Option("--em-max-iter", rich_help_panel=CHECK_PANEL, help="With --em-check: most E-steps of each EM run (from the fit's answer, from its own start).")] = 5000,
    compare_complete_case: Annotated[bool, Flag(
        "--compare-complete-case", rich_help_panel=CHECK_PANEL, help="Also fit on the complete rows only and compare every CPT entry.")] = False,
    folds: Annotated[int, typer.Option("--folds", rich_help_panel=CHECK_PANEL, help="K-fold cross-validation of the held-out marginal log-likelihood (0: off).")] = 0,
    errors: Annotated[Optional[bool], Flag(
        "--errors/--no-errors", rich_help_panel=CHECK_PANEL, help="Error bars and identifiability flags for every CPT entry "
                                     "(default: on when small: up to 1000 free parameters, about 2 minutes).")] = None,
    quiet: Annotated[bool, Flag("--quiet", "-q", help="Print only the file written and warnings.")] = False,
    verbose: Annotated[bool, Flag("--verbose", "-v", help="Print everything: each start, the intervals of every cell, "
                                                          "the EM runs side by side.")] = False,
    latent_states: Annotated[Optional[str], typer.Option(
        "--latent-states", rich_help_panel=CHECK_PANEL,
        help="Choose the number of states of a latent node: NODE=2..6 (or NODE=2,3,5) fits each count with its "
             "restarts, prints and stores an AIC/BIC table with class separation, keeps the lowest BIC.")] = None,
) -> None:
    """Fit the free CPTs by maximising the exact marginal likelihood of the observed cells.

    Missing cells and latent nodes are summed out exactly (variable elimination). With --prior the
    estimate is the MAP (posterior mode). The result file holds the CPTs, the log-likelihood, the
    gradient norm per iteration and whether the stopping rule held; `adfit score`, `adfit impute`
    and `adfit report` read it.

    Caution: estimates rest on the network structure and on the gaps being missing at random
    (MAR); they support, and do not replace, engineering or clinical judgement. Local codes,
    regulations and licensed practice come first.

    Example: adfit fit gearbox.toml records.csv --out fit.json --restarts 5 --em-check
    """
    import warnings

    from .errors import ConvergenceWarning, OptionError
    from .fit import fit
    from .result import write_result

    with user_errors():
        from .io import check_output_paths

        check_seed(seed)
        check_output_paths({"out": out}, {"network file": network, "data file": data, "prior file": prior})
        import math

        from .limits import check_batch_size, check_folds, check_restarts
        from .network import load_network as _load

        _net = _load(network)  # sizes that cannot fit are refused before the records are read
        sweep_node, sweep_ks = None, ()
        if latent_states is not None:
            from .statecount import parse_spec, with_states

            sweep_node, sweep_ks = parse_spec(latent_states, _net)
            _big = with_states(_net, sweep_node, max(sweep_ks))
        else:
            _big = _net
        if batch_size is not None and batch_size >= 1:
            check_batch_size(batch_size, len(_net))
        check_restarts(restarts, sum(math.prod(_big.cpt_shape(v)) for v in _big.free_names))
        net, coded = read_inputs(network, data, missing=missing, count_column=count_column,
                                 ignore_columns=ignore_columns, engine=engine, scheduler=scheduler)
        check_folds(folds, float(coded.counts.sum()), len(coded.counts))
        pri = None
        if prior is not None:
            from .priors import load_prior

            pri = load_prior(prior, net)
        if em_check:
            em_check_options(l2, _net)
        if errors:
            from .uncertainty import structure_refusal

            if (refusal := structure_refusal(_net)) is not None:
                raise OptionError(f"{refusal} (fit without --errors)")
        from .crosscheck import check_em_max_iter

        check_em_max_iter(em_max_iter)
        fit_kwargs = dict(method=method, tol=tol, gtol=gtol, max_iter=max_iter, prior=pri, l2=l2,
                          learning_rate=learning_rate, batch_size=batch_size, kkt_tol=kkt_tol)
        pseudo = None if pri is None else pri.pseudo_counts(net)
        # refuse bad options and an impossible output path before any work is done
        from .fit import FitSettings

        FitSettings(method=method, tol=tol, gtol=gtol, max_iter=max_iter, learning_rate=learning_rate,
                    l2=l2, batch_size=batch_size, kkt_tol=kkt_tol).validate()
        from .likelihood import Likelihood

        sweep_section = None
        # one plan and one compiled program for the fit, the error bars and the EM check (a
        # sweep fits other networks: each fit, and the error bars after it, plan their own)
        lik = Likelihood(net, coded) if sweep_node is None else None
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            with _progress(quiet, restarts) as (callback, reporter):
                if sweep_node is None:
                    result = fit(net, coded, restarts=restarts, seed=seed, progress=callback, likelihood=lik,
                                 **fit_kwargs)
                else:
                    from .statecount import sweep

                    def fit_one(net_k, k):
                        kw = dict(fit_kwargs)
                        if prior is not None:
                            from .priors import load_prior

                            kw["prior"] = load_prior(prior, net_k)
                        return fit(net_k, coded, restarts=restarts, seed=seed, progress=callback, **kw)

                    result, sweep_section = sweep(net, coded, sweep_node, sweep_ks, fit_one=fit_one)
        for w in caught:
            if issubclass(w.category, UserWarning):
                typer.echo(f"adfit: warning: {w.message}", err=True)
        if sweep_section is not None:
            # everything after the fit works on the chosen candidate's network
            net = result.network
            if prior is not None:
                from .priors import load_prior

                pri = load_prior(prior, net)
                fit_kwargs["prior"] = pri
                pseudo = pri.pseudo_counts(net)
            result = result.with_extras(latent_states=sweep_section)
            if not quiet:
                from .statecount import format_table

                typer.echo(format_table(sweep_section))
                typer.echo("")
        # error bars first: the complete-case comparison reports differences in their units
        from .uncertainty import cli_errors

        skipped: list[str] = []  # why error bars were skipped, printed with the summary
        if errors is not False:
            with _phase(quiet, "error bars"):
                result = cli_errors(result, coded, pseudo_counts=pseudo, l2=l2, errors=errors, quiet=quiet,
                                    echo=lambda text, **kw: (typer.echo(text, **kw) if kw.get("err") or quiet
                                                             else skipped.append(text)), show=False,
                                    likelihood=lik)
        if em_check:
            with _phase(quiet, "EM check (from the fit's answer and from its own start)"):
                result = with_em_check(result, coded, pseudo_counts=pseudo, seed=seed, max_iter=em_max_iter,
                                       show=False, likelihood=lik)
        later: list[str] = []  # what the requested comparisons print, after the summary
        if compare_complete_case:
            from .gaps import compare_complete_case as ccc

            with _phase(quiet, "complete-case fit"):
                cmp = ccc(net, coded, full=result, seed=seed, **fit_kwargs)
            result = result.with_extras(complete_case=cmp.to_dict())
            later.append(cmp.format_text())
        from .gaps import information_criteria

        ic = information_criteria(net, coded, result)
        result = result.with_extras(information_criteria=ic.to_dict())
        if folds:
            from .assess import cross_validate

            with _phase(quiet, f"cross-validation ({folds} folds)"):
                cv = cross_validate(net, coded, folds=folds, seed=seed, **fit_kwargs)
            result = result.with_extras(cross_validation=cv.to_dict())
            later.append(cv.format_text())
        if not quiet:
            print_fit_summary(result, out=out, verbose=verbose, skipped=skipped, later=later)
        write_result(out, result)
        typer.echo(f"wrote {out}")
        if not quiet:
            typer.echo(CAUTION)


def print_fit_summary(result, *, out: Path, verbose: bool, skipped=(), later=()) -> None:
    """The terminal summary of ``adfit fit``: a few lines and the estimates by default; with
    ``verbose`` also each start, the EM runs side by side, and the intervals of every cell
    (after the estimates)."""
    from .summary import detail_lines, format_estimates, short_summary

    typer.echo(short_summary(result))
    for line in skipped:
        typer.echo(line)
    if verbose:
        typer.echo("")
        typer.echo("\n".join(detail_lines(result)))
        section = result.extras.get("restarts")
        if isinstance(section, dict) and section.get("n_starts", 1) > 1:  # however many fit() ran
            from .restarts import format_optima

            typer.echo(format_optima(section))
        if isinstance(result.extras.get("em_check"), dict):
            from .crosscheck import format_em_check

            typer.echo(format_em_check(result.extras["em_check"]))
    for text in later:
        typer.echo("")
        typer.echo(text)
    typer.echo("")
    typer.echo(format_estimates(result, result.network.free_names))
    unc = result.extras.get("uncertainty")
    if verbose and isinstance(unc, dict):
        from .uncertainty import format_uncertainty

        typer.echo("")
        typer.echo(format_uncertainty(unc, {n: result.extras["nodes"][n] for n in result.network.free_names},
                                      network=result.network))
    elif isinstance(unc, dict):
        typer.echo("")
        typer.echo(f"Standard errors and intervals of every cell: adfit show {out} (or fit --verbose).")


def _reporter(quiet: bool):
    """Where the progress of a command goes: nothing with -q; live bars on stderr when it is a
    terminal; otherwise plain lines on stderr (a log file, a pipe), one per start and phase."""
    from .demo import LineReporter, Reporter, RichReporter

    if quiet:
        return Reporter()
    from rich.console import Console

    if Console(stderr=True).is_terminal:
        return RichReporter()
    return LineReporter(lambda line: typer.echo(line, err=True))


@contextmanager
def _running(reporter):
    """``reporter.running()``; a plain-line reporter falls silent when the body fails (the error
    is then the one line on stderr)."""
    try:
        with reporter.running():
            yield reporter
    except BaseException:
        reporter.silent = True
        raise


@contextmanager
def _progress(quiet: bool, restarts: Optional[int] = None):
    """Progress on stderr for the starts and iterations of a fit (none with -q): one line per
    start, named by the start's own index out of ``restarts``."""
    from .demo import fit_progress

    reporter = _reporter(quiet)
    if quiet:
        yield None, reporter
        return
    with _running(reporter):
        callback, close = fit_progress(reporter, "fit", restarts)
        try:
            yield callback, reporter
        finally:
            close()


@contextmanager
def _phase(quiet: bool, description: str):
    """A later phase of a command (error bars, EM check, complete-case fit, cross-validation) as
    one progress line on stderr (none with -q)."""
    reporter = _reporter(quiet)
    with _running(reporter), reporter.stage(description):
        yield


# ------------------------------------------------------------------ the network argument, optional with a result
NetworkDataArg = Annotated[list[Path], typer.Argument(
    metavar="[network] data", show_default=False,
    help="The network file (TOML) and the records (CSV or Parquet file, folder or glob pattern). With --params "
         "the network file may be left out: the network embedded in the result file is used.")]


def network_and_data(inputs: list[Path], params: Optional[Path], command: str) -> tuple[Optional[Path], Path]:
    """``[NETWORK] DATA`` of ``score`` and ``impute``: ``(network path or None, data path)``.

    Two paths are the network and the data, as always. One path is the data file when a result
    file (``--params``) is given, whose embedded network is then used; without ``--params``, or
    when the one path is a ``.toml`` file (a network, not records), it is refused in one line."""
    from .errors import OptionError

    if len(inputs) == 2:
        return InputFile("network file")(inputs[0]), inputs[1]
    if len(inputs) > 2:
        raise OptionError(f"adfit {command} takes at most two paths, [NETWORK] DATA, got {len(inputs)} "
                          f"({', '.join(map(str, inputs))}); quote a glob pattern so that the shell does not expand it")
    only = inputs[0] if inputs else None
    if params is None:
        raise OptionError(f"adfit {command}: give the network file and the data file, or the data file with "
                          f"--params RESULT.json (its embedded network is used)")
    if only is not None and only.suffix.lower() == ".toml":
        raise OptionError(f"adfit {command}: {only} looks like a network file and no data file is given; "
                          f"give the records after it (with --params the network file may be left out)")
    return None, only


def network_of(network: Optional[Path], params: Optional[Path]):
    """``(network, result or None)``: the network file when given (a result must match it, as
    ever), else the network embedded in ``--params``."""
    from .network import load_network
    from .result import load_result

    if network is not None:
        net = load_network(network)
        return net, (load_result(params, net) if params is not None else None)
    res = load_result(params)
    return res.network, res


@app.command("score")
def score_command(
    inputs: NetworkDataArg,
    params: Annotated[Optional[Path], typer.Option(
        "--params", help="Result file whose CPTs are scored (from fit or em; its embedded network is used when no network file is given); not needed when every CPT of the network is fixed.",
        parser=InputFile("result file (--params)"))] = None,
    missing: MissingOpt = None,
    count_column: CountOpt = None,
    ignore_columns: IgnoreOpt = None,
    engine: EngineOpt = "pandas",
    scheduler: SchedulerOpt = None,
    as_json: Annotated[bool, Flag("--json", help="Print the figures as JSON.")] = False,
) -> None:
    """Marginal log-likelihood and gradient norm of given CPTs on a data set.

    The gradient norm is that of the log-likelihood with respect to the free logits, in records
    (it is the stationarity residual of the expected counts): near 0 at a maximum for this data.

    Caution: a log-likelihood compares CPTs on the same records and network; it does not by itself
    say that the CPTs are right.

    Example: adfit score gearbox.toml new_records.csv --params fit.json

    Example: adfit score new_records.csv --params fit.json   (the network embedded in fit.json)
    """
    import json
    import math

    from .likelihood import Likelihood, check_possible, score

    with user_errors():
        network, data = network_and_data(inputs, params, "score")
        net, res = network_of(network, params)
        net, coded = read_inputs(net, data, missing=missing, count_column=count_column,
                                 ignore_columns=ignore_columns, engine=engine, scheduler=scheduler)
        probs = res.probs if res is not None else cpts_of(net, None)
        lik = Likelihood(net, coded)  # one plan and one compiled program for the score and the check
        s = score(net, coded, probs, likelihood=lik)
        if not math.isfinite(s["log_likelihood"]):
            check_possible(lik, probs, given="the CPTs of --params")  # names the records of probability 0 (exit 1)
        out = {"log_likelihood": s["log_likelihood"], "gradient_norm": s["gradient_norm"],
               "n_rows": coded.n_rows, "n_distinct": coded.n_distinct,
               "log_likelihood_per_record": s["log_likelihood"] / coded.n_rows}
        if as_json:
            typer.echo(json.dumps(out, indent=2))
        else:
            typer.echo(f"marginal log-likelihood {out['log_likelihood']:.6f} over {coded.n_rows:g} records "
                       f"({out['log_likelihood_per_record']:.6f} per record)")
            if net.free_names:
                typer.echo(f"gradient norm {out['gradient_norm']:.3e} (records, w.r.t. the free logits)")
            else:
                typer.echo("every CPT is fixed: no gradient to report")


# ------------------------------------------------------------------ show (print / export the CPTs)
@app.command("show")
def show_command(
    result: Annotated[Path, typer.Argument(help="Result file (JSON, format adfit-result/1) from fit or em.",
                                           parser=InputFile("result file"))],
    node: Annotated[Optional[list[str]], typer.Option("--node", help="Node to show (repeat; default: all).")] = None,
    fmt: Annotated[str, typer.Option("--format", help="text, csv, markdown or toml (a network file with every CPT fixed at the estimates).")] = "text",
    out: Annotated[Optional[Path], typer.Option("--out", help="File to write (default: print).")] = None,
    digits: Annotated[int, typer.Option("--digits", help="Decimals of text and markdown (csv and toml are exact).", min=1, max=17)] = 3,
) -> None:
    """The fitted CPTs: estimate, standard error and interval of every cell.

    The toml format writes a network file whose CPTs are fixed at the estimates; every command
    reads it (for example `adfit query` without --params).

    Caution: the estimates rest on the network and on MAR; a fixed network hands them on without
    their uncertainty.

    Example: adfit show fit.json --node failure --format csv --out failure.csv
    """
    from .io import atomic_write
    from .result import load_result
    from .show import render

    with user_errors():
        from .io import check_output_paths

        check_output_paths({"out": out}, {"result file": result})
        res = load_result(result)
        text = render(res, fmt, node or None, digits=digits, title=f"CPTs fixed at the estimates of {result.name}")
        if out is None:
            typer.echo(text.rstrip("\n"))
        else:
            with atomic_write(out) as fh:
                fh.write(text)
            typer.echo(f"wrote {out}")


# ------------------------------------------------------------------ impute / query (posteriors)
ParamsOpt = Annotated[Path, typer.Option("--params", help="Result file whose CPTs are used (from fit or em).",
                                         parser=InputFile("result file (--params)"))]


@app.command("impute")
def impute_command(
    inputs: NetworkDataArg,
    params: ParamsOpt,
    out: Annotated[Path, typer.Option("--out", help="CSV file to write: the input records, in order, with added columns.")],
    draws: Annotated[int, typer.Option("--draws", help="Joint posterior draws per record (multiple imputation; 0: none).")] = 0,
    seed: Annotated[int, typer.Option("--seed", help="Seed of the draws (the same seed gives the same draws).")] = 0,
    nodes: Annotated[Optional[str], typer.Option(
        "--nodes", help="Comma-separated nodes that get added columns (default: every node with a missing cell, and the latent nodes).")] = None,
    missing: MissingOpt = None,
    count_column: CountOpt = None,
    ignore_columns: IgnoreOpt = None,
    defuse: Annotated[bool, Flag(
        "--defuse/--raw-cells", help="Text cells that start like a spreadsheet formula (=, +, -, @) get a leading "
                                     "apostrophe (default); --raw-cells writes every cell as it is.")] = True,
) -> None:
    """Posterior of every missing cell given the record's observed cells, its most probable value, and draws.

    Exact (variable elimination) under the CPTs of --params. Output: every input record in its
    order, the input columns as they were, and for each chosen node NODE: NODE__mode (most
    probable state; the observed value where observed), NODE__p_STATE (posterior probability of
    each state; 1/0 where observed), NODE__draw1..K (joint draws from the posterior of the
    record's hidden cells; the observed value where observed), and row__log_p_observed. Latent
    nodes are always hidden, so they always get these columns. A count column is carried along.
    Text cells that a spreadsheet would run as formulas get a leading apostrophe (--raw-cells: as they are).

    Caution: the draws condition on the fitted CPTs (parameter uncertainty is not propagated) and
    rest on the network and on MAR; imputed values are not observations.

    Example: adfit impute gearbox.toml inspections.csv --params fit.json --out imputed.csv --draws 5

    Example: adfit impute inspections.csv --params fit.json --out imputed.csv   (the network embedded in fit.json)
    """
    from .impute import format_summary, impute_file

    with user_errors():
        from .io import check_output_paths

        network, data = network_and_data(inputs, params, "impute")
        check_seed(seed)
        check_output_paths({"out": out}, {"network file": network, "data file": data, "params file": params})
        net, res = network_of(network, params)
        imp, _ = impute_file(net, res.probs, data, out, draws=draws, seed=seed,
                             nodes=split_list(nodes) or None, missing=missing, count_column=count_column,
                             ignore_columns=split_list(ignore_columns), defuse=defuse)
        typer.echo(format_summary(imp))
        typer.echo(f"wrote {out}")
        typer.echo(CAUTION)


OptParamsOpt = Annotated[Optional[Path], typer.Option(
    "--params", help="Result file whose CPTs are used (from fit or em); not needed when every CPT of the network is fixed.",
    parser=InputFile("result file (--params)"))]


def cpts_of(net, params):
    """The CPTs of --params, or those of a network whose CPTs are all fixed."""
    from .errors import OptionError
    from .result import load_result

    if params is not None:
        return load_result(params, net).probs
    free = net.free_names
    if free:
        raise OptionError(f"the network has CPTs to estimate ({', '.join(free[:5])}{', ...' if len(free) > 5 else ''}); "
                          f"give --params FIT.json (from adfit fit or em), or fix every CPT in the network file")
    return {n: net.fixed_table(n) for n in net.names}


@app.command("query")
def query_command(
    network: Annotated[Optional[Path], typer.Argument(
        help="Network file (TOML); may be left out with --params (the result's embedded network is used).",
        parser=InputFile("network file"), show_default=False)] = None,
    params: OptParamsOpt = None,
    given: Annotated[Optional[list[str]], typer.Option(
        "--given", help="Evidence NODE=STATE (repeat for several); soft evidence NODE=STATE:WEIGHT,STATE:WEIGHT (likelihood weights >= 0, unlisted states 0).")] = None,
    target: Annotated[Optional[list[str]], typer.Option(
        "--target", help="Node whose posterior is wanted (repeat; default: every node not given).")] = None,
    explain: Annotated[bool, Flag(
        "--explain", help="Also give the most probable joint state of every node not given, with its probability.")] = False,
    as_json: Annotated[bool, Flag("--json", help="Print the result as JSON (format adfit-query/1).")] = False,
    batch: Annotated[Optional[Path], typer.Option(
        "--batch", help="CSV (or Parquet) file of evidence, one query per row: a column per node given, cells "
                        "STATE, STATE:WEIGHT,... or empty; answers written to --out.",
        parser=InputFile("batch file (--batch)"))] = None,
    out: Annotated[Optional[Path], typer.Option("--out", help="With --batch: the CSV file of answers to write.")] = None,
    ignore_columns: Annotated[Optional[str], typer.Option(
        "--ignore-columns", help="With --batch: comma-separated columns that are not evidence (ids...), carried to --out as they are.")] = None,
    defuse: Annotated[bool, Flag(
        "--defuse/--raw-cells", help="With --batch: text cells that start like a spreadsheet formula (=, +, -, @) get a "
                                     "leading apostrophe (default); --raw-cells writes them as they are.")] = True,
) -> None:
    """Posterior of chosen nodes given evidence, and the probability of the evidence.

    Several --target nodes also give their joint distribution. --explain adds the most probable
    explanation: the single most probable joint state of every node not given, with its
    probability (max-product elimination; refused when its largest table is too large).

    Soft evidence, --given NODE=STATE:WEIGHT,STATE:WEIGHT, multiplies P(NODE = STATE) by the
    weight (likelihood evidence: e.g. a sensor that reads "alarm" 4 times as often in state
    worn as in good: --given wear=worn:4,good:1); states not listed get weight 0.

    Exact (variable elimination) under the CPTs of --params, or under the network's own CPTs
    when every one is fixed (an expert model, or one written by `adfit show --format toml`).

    Caution: the answer is only as good as the CPTs and the network; it supports, and does not
    replace, engineering or clinical judgement.

    --batch FILE.csv answers one query per row (the row's cells are its evidence) and writes a CSV
    to --out: the input columns, then NODE__p_STATE and NODE__mode per target, the joint of
    several --targets (joint__p_A=a;B=b), with --explain NODE__explain and row__p_explanation,
    and row__log_p_evidence.

    Example: adfit query gearbox.toml --params fit.json --given wear=heavy --given load=high --target failure

    Example: adfit query --params fit.json --batch cases.csv --out answers.csv --target failure
    """
    import json

    from .impute import parse_evidence, query

    with user_errors():
        from .errors import OptionError

        if network is None and params is None:
            raise OptionError("adfit query: give the network file (every CPT fixed), or --params RESULT.json "
                              "(its embedded network is used), or both")
        if batch is None:
            for name, value in (("--out", out), ("--ignore-columns", ignore_columns)):
                if value is not None:
                    raise OptionError(f"{name} goes with --batch FILE.csv (many queries); a single query prints its answer")
        else:
            if given:
                raise OptionError("--batch reads the evidence from the file's columns; leave out --given "
                                  "(add a column for a node given in every row)")
            if as_json:
                raise OptionError("--batch writes its answers as CSV to --out; leave out --json")
            if out is None:
                raise OptionError("--batch needs --out ANSWERS.csv, the file of answers to write")
            from .io import check_output_paths

            check_output_paths({"out": out}, {"batch file": batch, "network file": network, "params file": params})
        net, res = network_of(network, params)
        from .explain import format_explanation, format_joint, joint_posterior, most_probable

        probs = res.probs if res is not None else cpts_of(net, None)
        if batch is not None:
            from .batch import query_file

            table = query_file(net, probs, batch, out, targets=target or None, explain=explain,
                               ignore_columns=split_list(ignore_columns), defuse=defuse)
            typer.echo(f"answered {len(table)} queries from {batch}")
            typer.echo(f"wrote {out}")
            typer.echo(CAUTION)
            return
        ev, soft = parse_evidence(net, given or [])
        q = query(net, probs, ev, target or None, soft=soft)
        doc = q.to_dict()
        texts = [q.format_text()]
        if target and len(q.posteriors) > 1:
            doc["joint"] = joint_posterior(net, probs, ev, list(q.posteriors), soft)
            texts.append(format_joint(doc["joint"], ev, soft=soft))
        if explain:
            doc["explanation"] = most_probable(net, probs, ev, soft)
            texts.append(format_explanation(doc["explanation"], ev, soft=soft))
        if as_json:
            typer.echo(json.dumps(doc, indent=2))
        else:
            typer.echo("\n\n".join(texts))
            typer.echo("")
            typer.echo(CAUTION)


# ------------------------------------------------------------------ sensitivity (missing not at random)
@app.command("sensitivity")
def sensitivity_command(
    network: NetworkArg,
    data: DataArg,
    out: Annotated[Path, typer.Option("--out", help="File to write (JSON, format adfit-sensitivity/1).")],
    node: Annotated[list[str], typer.Option(
        "--node", help="Node whose gaps may depend on its own unrecorded value (repeat for several, each with its --state).")],
    state: Annotated[list[str], typer.Option(
        "--state", help="The state of --node whose odds of being missing are multiplied (one per --node, in order).")],
    odds: Annotated[str, typer.Option(
        "--odds", help="Odds ratios to try, comma-separated: a cell of --node is missing with odds r times higher when its true value is --state (1 = MAR, always included).")] = "0.25,0.5,1,2,4",
    target: Annotated[Optional[list[str]], typer.Option(
        "--target", help="Marginal probability NODE=STATE to report at every odds (repeat; default: every state of each --node).")] = None,
    predictor: Annotated[Optional[list[str]], typer.Option(
        "--predictor", help="A recorded node the gaps may also depend on (repeat): one free missingness intercept per configuration of the predictors (default: one intercept).")] = None,
    threshold: Annotated[Optional[float], typer.Option(
        "--threshold", help="With one --target: find the odds at which it crosses this probability (the tipping point).")] = None,
    prior: Annotated[Optional[Path], typer.Option(
        "--prior", help="Prior file (TOML), as for adfit fit: every refit is then a MAP fit.",
        parser=InputFile("prior file"))] = None,
    missing: MissingOpt = None,
    count_column: CountOpt = None,
    ignore_columns: IgnoreOpt = None,
    engine: EngineOpt = "pandas",
    scheduler: SchedulerOpt = None,
    seed: Annotated[int, typer.Option("--seed", rich_help_panel=OPT_PANEL, help="Seed of the MAR fit's random starts.")] = 0,
    restarts: Annotated[Optional[int], typer.Option("--restarts", rich_help_panel=OPT_PANEL, help="Starts of the MAR fit (as adfit fit).")] = None,
    errors: Annotated[bool, Flag(
        "--errors/--no-errors", rich_help_panel=CHECK_PANEL, help="Error bars of the targets (observed information, delta method; up to 1000 parameters).")] = True,
    quiet: Annotated[bool, Flag("--quiet", "-q", help="Print only the file written and warnings.")] = False,
) -> None:
    """How far would the answer move if the gaps were missing NOT at random? (selection model)

    For each odds value r, the network is refitted assuming that, given the --predictor nodes,
    the odds that a cell of --node is missing are r times higher when its true value is --state
    than when it is any other state (r = 1 is MAR and reproduces adfit fit). Each --target is
    reported at every r with its error bar; --threshold finds the tipping point. The file feeds
    `adfit report FIT.json --sensitivity FILE`.

    Caution: the odds are assumptions, not estimates; the data carry no information about them
    (the log-likelihood column is nearly the same for every r); the plausible range must come from
    subject knowledge. The analysis supports, and does not replace, engineering or clinical
    judgement; local codes, regulations and licensed practice come first.

    Example: adfit sensitivity gearbox.toml records.csv --node bearing_wear --state heavy --odds 0.25,0.5,1,2,4 --predictor vibration_alarm --out sens.json
    """
    with user_errors():
        from .errors import OptionError
        from .io import check_output_paths

        check_seed(seed)
        check_output_paths({"out": out}, {"network file": network, "data file": data, "prior file": prior})
        if len(node) != len(state):
            raise OptionError(f"--node is given {len(node)} time(s) and --state {len(state)}: give one --state "
                              f"for each --node, in the same order")
        from .network import load_network as _load
        from .sensitivity import Shift, check_shifts, parse_odds, parse_targets

        _net = _load(network)  # options checked before the records are read
        shifts = tuple(Shift(n, s) for n, s in zip(node, state))
        preds = tuple(predictor or ())
        parse_odds(odds)
        check_shifts(_net, None, shifts, preds)
        tg = parse_targets(_net, target, shifts)
        if threshold is not None and len(tg) != 1:
            raise OptionError(f"--threshold needs exactly one --target NODE=STATE (got {len(tg)}); name the "
                              f"probability whose tipping point you want")
        if restarts is not None and restarts < 1:
            raise OptionError(f"--restarts must be >= 1, got {restarts}")
        net, coded = read_inputs(network, data, missing=missing, count_column=count_column,
                                 ignore_columns=ignore_columns, engine=engine, scheduler=scheduler)
        pri = None
        if prior is not None:
            from .priors import load_prior

            pri = load_prior(prior, net)
        from .sensitivity import sensitivity_analysis, write_sensitivity

        say = (lambda line: None) if quiet else (lambda line: typer.echo(line, err=True))
        res = sensitivity_analysis(net, coded, shifts, odds, targets=target, predictors=preds, prior=pri,
                                   threshold=threshold, errors=errors, seed=seed, restarts=restarts, progress=say)
        write_sensitivity(out, res)
        if not quiet:
            typer.echo(res.format_text())
        typer.echo(f"wrote {out}")


# ------------------------------------------------------------------ demo (the embedded scenario)
@app.command("demo")
def demo_command(
    out: Annotated[Path, typer.Option("--out", help="Folder to write the demo's files into (created if needed).")] = Path("adfit-demo"),
    restarts: Annotated[int, typer.Option("--restarts", help="Starts of the fit (the best is kept).")] = 4,
    seed: Annotated[int, typer.Option("--seed", help="Seed of the random starts and of EM's own start.")] = 0,
    quiet: Annotated[bool, Flag("--quiet", "-q", help="No progress bars; print only the files written and warnings.")] = False,
    as_json: Annotated[bool, Flag("--json", help="Print the summary as JSON (format adfit-demo/1) instead of text.")] = False,
) -> None:
    """Run the whole job on the embedded wind-turbine gearbox scenario (simulated records).

    Writes into --out: the network, the prior and the records, then looks at the gaps, fits the CPTs (MAP, expert prior on oil_debris, several starts), cross-checks the fit with EM, adds error bars, compares with dropping incomplete records, asks how far the answer moves if the gaps in bearing_wear were not at random (sensitivity.json), imputes the gaps, and writes fit.json and report.html. The summary says where each file went and what the numbers mean.

    Caution: the records are simulated; estimates rest on the network, the prior and MAR.

    Example: adfit demo --out adfit-demo
    """
    import json

    from .demo import Reporter, RichReporter, run_demo

    with user_errors():
        from .demo import DATA_FILE, FIT_FILE, IMPUTED_FILE, NETWORK_FILE, PRIOR_FILE, REPORT_FILE, SENSITIVITY_FILE
        from .io import check_output_folder

        check_seed(seed)
        check_output_folder("out", out, [NETWORK_FILE, PRIOR_FILE, DATA_FILE, FIT_FILE, IMPUTED_FILE,
                                         SENSITIVITY_FILE, REPORT_FILE])
        reporter = Reporter() if (quiet or as_json) else RichReporter()
        outcome = run_demo(out, restarts=restarts, seed=seed, reporter=reporter)
        for w in outcome.warnings:
            typer.echo(f"adfit: warning: {w}", err=True)
        if as_json:
            typer.echo(json.dumps(outcome.to_dict(), indent=2))
        elif quiet:
            typer.echo(outcome.format_quiet())
        else:
            typer.echo(outcome.format_text())


# ------------------------------------------------------------------ report (the HTML page)
@app.command("report")
def report_command(
    result: Annotated[Path, typer.Argument(help="Result file (JSON, format adfit-result/1) from fit or em.",
                                           parser=InputFile("result file"))],
    out: Annotated[Path, typer.Option("--out", help="HTML file to write (one self-contained page).")],
    data: Annotated[Optional[Path], typer.Option(
        "--data", help="The records that were fitted (CSV or Parquet): adds the gaps overview.",
        parser=InputFile("data file", dir_okay=True))] = None,
    missing: MissingOpt = None,
    count_column: CountOpt = None,
    ignore_columns: IgnoreOpt = None,
    engine: EngineOpt = "pandas",
    scheduler: SchedulerOpt = None,
    title: Annotated[Optional[str], typer.Option("--title", help="Title of the page (default: from the file name).")] = None,
    sensitivity: Annotated[Optional[Path], typer.Option(
        "--sensitivity", help="A file from adfit sensitivity: adds the missing-not-at-random section (plot and table).",
        parser=InputFile("sensitivity file"))] = None,
) -> None:
    """Write the fit as one self-contained HTML page (plots inside; opens offline, prints).

    Sections: what was fitted (the network drawn, records, gaps, objective, prior), convergence
    per start, the CPTs with intervals and identifiability flags, the EM cross-check, the gaps
    overview and the complete-case comparison, AIC/BIC and cross-validation, cautions. A section
    the result lacks says so and names the option that produces it.

    Caution: the page restates the fit; its estimates rest on the network and on MAR, and support,
    not replace, engineering or clinical judgement.

    Example: adfit report fit.json --data inspections.csv --out report.html
    """
    from .report import write_report

    with user_errors():
        from .io import check_output_paths

        check_output_paths({"out": out}, {"result file": result, "data file": data, "sensitivity file": sensitivity})
        write_report(out, result, data=data, missing=missing, count_column=count_column,
                     ignore_columns=split_list(ignore_columns), engine=engine, scheduler=scheduler, title=title,
                     sensitivity=sensitivity)
        typer.echo(f"wrote {out}")


if __name__ == "__main__":  # python -m adfit.cli
    main()

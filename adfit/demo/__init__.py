"""The embedded demo: a fleet of wind-turbine gearboxes, and the whole job run on it.

The scenario is invented and its records are simulated (:mod:`adfit.demo.generate` made them
with a fixed seed). Every quarter a turbine reports its ``season``, mean ``load``, ``lube_age``
(time since the last oil change), its ``vibration_alarm``, ``oil_debris`` and ``temp_alarm``
channels, and whether the gearbox ``failure``-d within 90 days. ``bearing_wear`` is recorded only
when a technician inspected the gearbox, and inspections follow vibration alarms far more often
than not: its gaps depend on an observed column (MAR, not MCAR), so dropping incomplete records
over-represents alarmed turbines and over-states heavy wear. ``contamination`` of the oil is
never observed (a latent node); a few other cells are lost to sensor outages.

:func:`run_demo` (the ``adfit demo`` command) writes the network, prior and records into a
folder, looks at the gaps, fits the CPTs with an expert prior on ``oil_debris`` and several
starts, cross-checks the fit with EM, adds error bars, compares with the complete-case fit,
asks how far the answer would move if the gaps in ``bearing_wear`` were missing not at random
(:mod:`adfit.sensitivity`), imputes the missing cells, and writes ``fit.json`` and the HTML report. Steps whose module is
not part of this installation are skipped with a one-line note.

Python API for the examples: :func:`load_demo` returns ``(network, prior, coded data)``;
:func:`marginal` gives the marginal distribution of a node under a set of CPTs.
"""

from __future__ import annotations

import importlib
import inspect
import math
import string
import time
import warnings
from contextlib import contextmanager
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from typing import Any, Callable, Iterator, Mapping

import numpy as np

from ..errors import AdfitError, OptionError
from ..network import Network

FORMAT = "adfit-demo/1"
DEFAULT_OUT = Path("adfit-demo")
DEFAULT_RESTARTS = 4

#: the embedded files (package data of adfit.demo)
NETWORK_FILE = "gearbox.toml"
PRIOR_FILE = "gearbox_prior.toml"
DATA_FILE = "gearbox_records.csv"
#: the files the demo writes besides those
FIT_FILE = "fit.json"
IMPUTED_FILE = "gearbox_imputed.csv"
SENSITIVITY_FILE = "sensitivity.json"
REPORT_FILE = "report.html"

#: the quantity the summary talks about: the chance of heavy bearing wear in a quarter
FOCUS_NODE, FOCUS_STATE = "bearing_wear", "heavy"
#: the node that carries the expert table of the demo prior
EXPERT_NODE = "oil_debris"
#: the missing-not-at-random sensitivity analysis: the odds that an inspection record of heavy wear
#: is missing, relative to the other states, given the vibration alarm (inspections follow alarms)
SENSITIVITY_ODDS = (0.25, 0.5, 1.0, 2.0, 4.0)
SENSITIVITY_PREDICTOR = "vibration_alarm"
#: posterior draws per record in the imputed file (five imputations: common practice)
IMPUTE_DRAWS = 5
REPORT_TITLE = "adfit demo: wind-turbine gearbox fleet (simulated records)"

CAUTION = ("The records are simulated for this demo. Estimates rest on the network structure, on the prior "
           "and on the missing-at-random (MAR) assumption; they support, and do not replace, engineering "
           "judgement. Maintenance decisions follow the manufacturer's instructions, local codes and "
           "regulations first.")

DESCRIPTIONS = {
    "network": "the network: nodes, states, parents (contamination is latent)",
    "prior": f"the prior: one pseudo-count per cell, and an expert table on {EXPERT_NODE}",
    "data": "the records (simulated): empty cells are gaps",
    "fit": "the fitted CPTs with their checks (format adfit-result/1)",
    "imputed": "the records with each gap's most probable value, posterior probabilities and draws",
    "sensitivity": "what if the gaps in bearing_wear were not at random: refits under assumed odds (adfit-sensitivity/1)",
    "report": "the report, one self-contained HTML page",
}


# ================================================================== the embedded files
def resource_bytes(name: str) -> bytes:
    """The bytes of an embedded demo file (``gearbox.toml``, ``gearbox_prior.toml``, ``gearbox_records.csv``)."""
    try:
        return resources.files(__name__).joinpath(name).read_bytes()
    except (FileNotFoundError, OSError):
        raise AdfitError(f"the demo file {name} is missing from this installation of adfit; "
                         f"reinstall the package (pip install .) so that its data files are included") from None


def demo_network() -> Network:
    """The demo network (parsed from the embedded ``gearbox.toml``)."""
    import tomllib

    from ..network import parse_network

    return parse_network(tomllib.loads(resource_bytes(NETWORK_FILE).decode("utf-8")), source=NETWORK_FILE)


def demo_prior(network: Network | None = None):
    """The demo prior (an :class:`adfit.priors.Prior`, validated against the network)."""
    import tomllib

    from ..priors import prior_from_dict

    net = network if network is not None else demo_network()
    return prior_from_dict(tomllib.loads(resource_bytes(PRIOR_FILE).decode("utf-8")), net, source=PRIOR_FILE)


def demo_frame():
    """The embedded records as a DataFrame of text cells (``""`` for a gap)."""
    import io

    import pandas as pd

    return pd.read_csv(io.BytesIO(resource_bytes(DATA_FILE)), dtype=str, keep_default_na=False)


def load_demo():
    """``(network, prior, coded data)`` of the embedded scenario, for the Python API."""
    from ..data import encode_frame

    net = demo_network()
    return net, demo_prior(net), encode_frame(net, demo_frame(), source=DATA_FILE)


def write_demo_files(out_dir: str | Path) -> dict[str, Path]:
    """Copy the embedded network, prior and records into ``out_dir`` (atomically); their paths."""
    from ..io import atomic_write

    out = Path(out_dir)
    paths = {}
    for key, name in (("network", NETWORK_FILE), ("prior", PRIOR_FILE), ("data", DATA_FILE)):
        with atomic_write(out / name, "wb") as fh:
            fh.write(resource_bytes(name))
        paths[key] = out / name
    return paths


# ================================================================== a marginal, by enumeration
def marginal(network: Network, probs: Mapping[str, Any], name: str) -> np.ndarray:
    """The marginal distribution of ``name`` (no evidence) under the CPTs ``probs``.

    Enumerates the full joint distribution (product of every CPT), so it is meant for small
    networks such as the demo's (3,456 joint states); raises OptionError above 10**6 states.
    """
    size = math.prod(network.cards)
    if size > 10 ** 6:
        raise OptionError(f"marginal(): the joint distribution has {size} states; enumeration is for small networks")
    letters = string.ascii_letters
    if len(network) > len(letters):
        raise OptionError("marginal(): too many nodes for enumeration")
    sym = {n: letters[i] for i, n in enumerate(network.names)}
    operands, subs = [], []
    for node in network.nodes:
        table = network.fixed_table(node.name) if node.fixed is not None else np.asarray(probs[node.name], dtype=np.float64)
        operands.append(table)
        subs.append("".join(sym[p] for p in node.parents) + sym[node.name])
    out = np.einsum(",".join(subs) + "->" + sym[name], *operands)
    return out / out.sum()


# ================================================================== progress
class Reporter:
    """Receives the demo's progress; the base class shows nothing (``-q``, ``--json``, tests)."""

    def begin(self, description: str, total: float | None = None) -> int:
        return 0

    def update(self, task: int, *, advance: float | None = None, completed: float | None = None,
               total: float | None = None, description: str | None = None) -> None:
        pass

    def end(self, task: int) -> None:
        pass

    @contextmanager
    def running(self) -> Iterator["Reporter"]:
        yield self

    @contextmanager
    def stage(self, description: str) -> Iterator[int]:
        task = self.begin(description)
        try:
            yield task
        finally:
            self.end(task)


class RichReporter(Reporter):
    """Progress bars on stderr (rich): one line per stage, starts and iterations of the fit."""

    def __init__(self, console: Any = None):
        from rich.console import Console
        from rich.progress import (BarColumn, MofNCompleteColumn, Progress, SpinnerColumn, TextColumn,
                                   TimeElapsedColumn)

        self._progress = Progress(SpinnerColumn(), TextColumn("{task.description}"), BarColumn(),
                                  MofNCompleteColumn(), TimeElapsedColumn(),
                                  console=console or Console(stderr=True), transient=True)

    @contextmanager
    def running(self) -> Iterator["Reporter"]:
        with self._progress:
            yield self

    def begin(self, description: str, total: float | None = None) -> int:
        return self._progress.add_task(description, total=total)

    def update(self, task: int, *, advance: float | None = None, completed: float | None = None,
               total: float | None = None, description: str | None = None) -> None:
        kw: dict[str, Any] = {}
        if advance is not None:
            kw["advance"] = advance
        if completed is not None:
            kw["completed"] = completed
        if total is not None:
            kw["total"] = total
        if description is not None:
            kw["description"] = description
        self._progress.update(task, **kw)

    def end(self, task: int) -> None:
        self._progress.remove_task(task)


class LineReporter(Reporter):
    """Progress as plain lines (stderr that is not a terminal: a log file, a pipe, a test).

    A line is written when a task that received updates ends (a start of the fit: its last
    description and its iterations) and when a stage ends (its description and its duration);
    nothing is written for a task that never moved, nor, once :attr:`silent` is set (a command
    that fails), at all, so that an error stays a single line.
    """

    def __init__(self, write: Callable[[str], None]):
        self._write = write
        self._tasks: dict[int, dict[str, Any]] = {}
        self._next = 0
        self.silent = False

    def begin(self, description: str, total: float | None = None) -> int:
        self._next += 1
        self._tasks[self._next] = {"description": description, "completed": None, "updated": False}
        return self._next

    def update(self, task: int, *, advance: float | None = None, completed: float | None = None,
               total: float | None = None, description: str | None = None) -> None:
        t = self._tasks.get(task)
        if t is None:
            return
        t["updated"] = True
        if description is not None:
            t["description"] = description
        if completed is not None:
            t["completed"] = completed
        elif advance is not None:
            t["completed"] = (t["completed"] or 0) + advance

    def end(self, task: int) -> None:
        t = self._tasks.pop(task, None)
        if t is None or not t["updated"] or self.silent:
            return
        n = t["completed"]
        self._write(t["description"] + ("" if n is None else f", {n:g} iteration{'' if n == 1 else 's'}"))

    @contextmanager
    def stage(self, description: str) -> Iterator[int]:
        import time

        t0 = time.perf_counter()
        task = self.begin(description)
        try:
            yield task
        finally:
            self._tasks.pop(task, None)
        if not self.silent:
            self._write(f"{description} ({time.perf_counter() - t0:.1f} s)")


def fit_progress(reporter: Reporter, label: str, restarts: int | None) -> tuple[Callable, Callable]:
    """``(callback for fit(progress=...), close)``: one line per start with its iterations.

    The starts may run side by side (the callback is then called from several threads, in any
    order), so each start gets its own line, made at its first iteration and named by the
    start's own index (``start 3 of 4``); ``close`` ends the lines in the order of the starts.
    ``restarts`` is the number of starts (None when not known in advance: the lines then say
    ``start 3``); a start index beyond it is shown without the total rather than as
    ``start 5 of 4``.
    """
    import threading

    lock = threading.Lock()
    lines: dict[int, int] = {}
    n = f"{restarts} start{'s' if restarts != 1 else ''}" if restarts else "the starts"
    waiting = reporter.begin(f"{label}: preparing {n}", total=None)

    def name(start: int) -> str:
        return f"{label}: start {start + 1}" + (f" of {restarts}" if restarts and start < restarts else "")

    def callback(start: int, iteration: int, objective: float, gradient_norm: float) -> None:
        with lock:
            if start not in lines:
                lines[start] = reporter.begin(name(start), total=None)
                if len(lines) == 1:
                    reporter.end(waiting)
            reporter.update(lines[start], completed=iteration,
                            description=f"{name(start)}, objective {objective:,.2f}")

    def close() -> None:
        with lock:
            if not lines:
                reporter.end(waiting)
            for start in sorted(lines):
                reporter.end(lines[start])
            lines.clear()

    return callback, close


# ================================================================== outcome
@dataclass
class Step:
    """One step of the demo: ``done`` or ``skipped``, with a line of text."""

    name: str
    status: str
    note: str
    seconds: float = 0.0


@dataclass
class DemoOutcome:
    """What :func:`run_demo` did: the steps, the files written, the numbers of the summary."""

    out_dir: Path
    files: dict[str, Path] = field(default_factory=dict)
    steps: list[Step] = field(default_factory=list)
    numbers: dict[str, Any] = field(default_factory=dict)
    warnings: list[str] = field(default_factory=list)
    result: Any = None

    def step(self, name: str) -> Step | None:
        return next((s for s in self.steps if s.name == name), None)

    @property
    def headline(self) -> str:
        """The complete-case sentence, e.g. "dropping incomplete rows would over-state ..."."""
        return self.numbers.get("focus", {}).get("headline", "")

    def to_dict(self) -> dict[str, Any]:
        from ..result import _jsonable

        return {
            "format": FORMAT,
            "scenario": "wind-turbine gearbox fleet (simulated records)",
            "out_dir": str(self.out_dir),
            "files": {k: {"path": str(p), "what": DESCRIPTIONS.get(k, "")} for k, p in self.files.items()},
            "steps": [{"step": s.name, "status": s.status, "note": s.note, "seconds": round(s.seconds, 3)}
                      for s in self.steps],
            "numbers": _jsonable(self.numbers),
            "warnings": list(self.warnings),
            "caution": CAUTION,
        }

    def format_text(self) -> str:
        n = self.numbers
        lines = ["adfit demo: maintenance records of a fleet of wind-turbine gearboxes (simulated)", ""]
        d = n.get("data", {})
        if d:
            lines.append(f"Records: {d['n_records']:,} turbine-quarters, {d['n_columns']} columns; the node "
                         f"'{d['latent']}' is latent (never measured). {FOCUS_NODE} was recorded in "
                         f"{d['focus_recorded']:,} records ({_pct(d['focus_recorded_share'])}), only after an inspection.")
        g = n.get("gaps", {})
        if g:
            dep = ", ".join(g["depends_on"]) or "the other columns"
            if g["rejected"]:
                lines.append(f"Gaps: the gaps in {FOCUS_NODE} depend on {dep} (MCAR rejected, Holm-adjusted "
                             f"p {g['p_text']}): inspections follow alarms. The fit assumes they depend on "
                             f"observed columns only (MAR).")
            else:
                lines.append(f"Gaps: no evidence that the gaps in {FOCUS_NODE} depend on the other columns.")
        for s in self.steps:
            if s.name in ("fit", "em_check", "uncertainty", "sensitivity", "imputation", "report") or s.status != "done":
                if s.name in ("files", "write"):
                    continue
                lines.append(f"{_STEP_TITLES.get(s.name, s.name)}: {s.note}")
        f = n.get("focus")
        if f:
            lines.append("")
            lines.append(f"Chance of {FOCUS_STATE} {FOCUS_NODE} in a quarter:")
            se = f" (SE {100 * f['se_full']:.1f} points)" if f.get("se_full") is not None else ""
            lines.append(f"  all records, gaps summed out (full likelihood)   {_pct(f['full'])}{se}")
            lines.append(f"  complete records only                            {_pct(f['complete_case'])}")
            lines.append(f"  share among the inspected gearboxes (raw)        {_pct(f['inspected_share'])}")
            lines.append(f"  the simulation's truth (known only in a demo)    {_pct(f['truth'])}")
            lines.append(f"  => {f['headline'][0].upper() + f['headline'][1:]}")
            lines.append(f"     ({f['n_discarded']:,} of {f['n_records']:,} records would be dropped; the inspected "
                         f"ones over-represent alarmed turbines.)")
        if self.files:
            lines.append("")
            lines.append(f"Files in {self.out_dir}/:")
            w = max(len(p.name) for p in self.files.values())
            for k, p in self.files.items():
                lines.append(f"  {p.name:<{w}}  {DESCRIPTIONS.get(k, '')}")
            if "report" in self.files:
                lines.append(f"Open {self.files['report']} in a browser for the tables, error bars and plots.")
            if {"network", "prior", "data"} <= set(self.files):
                lines.append(f"Fit it yourself: adfit fit {self.files['network']} {self.files['data']} "
                             f"--prior {self.files['prior']} --out my_fit.json --restarts 4 --em-check")
        lines.append("")
        lines.append("Caution: " + CAUTION)
        return "\n".join(lines)

    def format_quiet(self) -> str:
        return "\n".join(f"wrote {p}" for p in self.files.values())


_STEP_TITLES = {"fit": "Fit", "em_check": "EM cross-check", "uncertainty": "Error bars",
                "sensitivity": "Not at random?",
                "complete_case": "Complete-case comparison", "imputation": "Imputation", "report": "Report",
                "gaps": "Gaps", "files": "Files", "write": "Result"}


def _pct(x: float) -> str:
    return f"{100.0 * x:.1f}%"


# ================================================================== optional pieces
def optional(module: str, attr: str) -> Callable | None:
    """``adfit.<module>.<attr>`` when this installation has it, else None (checked at call time)."""
    try:
        mod = importlib.import_module(f"adfit.{module}")
    except ModuleNotFoundError as e:
        if e.name in (f"adfit.{module}", "adfit"):
            return None
        raise
    fn = getattr(mod, attr, None)
    return fn if callable(fn) else None


# ================================================================== the job
def run_demo(out_dir: str | Path = DEFAULT_OUT, *, restarts: int = DEFAULT_RESTARTS, seed: int = 0,
             reporter: Reporter | None = None, max_iter: int = 1000) -> DemoOutcome:
    """Run the whole job on the embedded scenario and write its files into ``out_dir``.

    Args:
        out_dir: the folder to write into (created if needed; the demo's files are replaced).
        restarts: starts of the fit (the first from complete-family counts, then random).
        seed: seed of the random starts and of EM's own start.
        reporter: progress display (default: none).
        max_iter: most iterations per start.

    Returns:
        A :class:`DemoOutcome` (steps, files, numbers; ``format_text()`` for the terminal).
    """
    from ..data import HIDDEN, load_data
    from ..fit import fit
    from ..gaps import compare_complete_case, information_criteria, overview
    from ..network import load_network
    from ..priors import load_prior
    from ..result import write_result

    if restarts < 1:
        raise OptionError(f"--restarts must be >= 1, got {restarts}")
    rep = reporter or Reporter()
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise OptionError(f"{out}: exists and is not a folder; give --out a folder for the demo's files")
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise OptionError(f"{out}: cannot create the output folder ({e.strerror})") from None
    outcome = DemoOutcome(out_dir=out)

    def timed(name: str, status: str, note: str, t0: float) -> None:
        outcome.steps.append(Step(name, status, note, time.perf_counter() - t0))

    with rep.running():
        # 1. the files -----------------------------------------------------------------
        t0 = time.perf_counter()
        outcome.files.update(write_demo_files(out))
        net = load_network(outcome.files["network"])
        pri = load_prior(outcome.files["prior"], net)
        coded = load_data(net, outcome.files["data"])
        pseudo = pri.pseudo_counts(net)
        j = net.index(FOCUS_NODE)
        k = net.node(FOCUS_NODE).states.index(FOCUS_STATE)
        recorded = coded.codes[:, j] != HIDDEN
        n_rec = float(coded.counts[recorded].sum())
        outcome.numbers["data"] = {
            "n_records": int(coded.n_rows), "n_distinct": coded.n_distinct,
            "n_columns": len(net.observed_names), "latent": ", ".join(net.latent_names),
            "focus_recorded": int(n_rec), "focus_recorded_share": n_rec / coded.n_rows}
        timed("files", "done", f"wrote {NETWORK_FILE}, {PRIOR_FILE}, {DATA_FILE}", t0)

        # 2. the gaps ------------------------------------------------------------------
        t0 = time.perf_counter()
        with rep.stage("looking at the gaps (MCAR tests)"):
            gaps = overview(net, coded)
        reading = next((r for r in gaps.readings if r.column == FOCUS_NODE), None)
        share = next((c.share_missing for c in gaps.columns if c.name == FOCUS_NODE), 0.0)
        p = reading.smallest_p_holm if reading is not None else None
        outcome.numbers["gaps"] = {
            "focus_missing_share": share, "rejected": bool(reading and reading.rejected),
            "depends_on": list(reading.depends_on) if reading else [], "p_holm": p,
            "p_text": ("< 1e-300" if p is not None and p < 1e-300 else (f"= {p:.2g}" if p is not None else "n/a")),
            "share_complete": gaps.share_complete, "mcar_rejected": gaps.mcar_rejected}
        timed("gaps", "done", f"{_pct(share)} of {FOCUS_NODE} missing; {_pct(gaps.share_complete)} of records complete", t0)

        # 3. the fit -------------------------------------------------------------------
        t0 = time.perf_counter()
        cb, close = fit_progress(rep, "fit", restarts)
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", UserWarning)
            try:
                result = fit(net, coded, prior=pri, restarts=restarts, seed=seed, max_iter=max_iter, progress=cb)
            finally:
                close()
        outcome.warnings.extend(str(w.message) for w in caught if w.category.__module__ == "adfit.errors")
        rows = result.extras.get("restarts", [])
        if isinstance(rows, Mapping):  # the restarts section: {"starts": [...], "optima": [...], ...}
            rows = rows.get("starts", [])
        best = result.objective_value
        # converged starts only: one that stopped short is not an optimum (adfit.restarts)
        conv_rows = [r for r in rows if r.get("objective") is not None and r.get("converged", True)]
        same = sum(1 for r in conv_rows if abs(r["objective"] - best) <= 1e-6 * max(1.0, abs(best)))
        others = sorted({round(r["objective"], 2) for r in conv_rows
                         if abs(r["objective"] - best) > 1e-6 * max(1.0, abs(best))}, reverse=True)
        n_unconv = len(rows) - len(conv_rows)
        note = (f"MAP with the expert table on {EXPERT_NODE}; {len(rows)} starts"
                + (f" ({n_unconv} did not converge)" if n_unconv else "") + f", {same} of them reached the best "
                f"objective {best:,.2f}" + (f" (the others stopped at {', '.join(f'{o:,.2f}' for o in others)}: "
                                            f"local optima, which is why several starts are made)" if others else "")
                + ("; converged" if result.converged else f"; NOT converged ({result.stop_reason})"))
        outcome.numbers["fit"] = {"objective": result.objective_value, "log_likelihood": result.log_likelihood,
                                  "converged": result.converged, "starts": len(rows), "starts_at_best": same,
                                  "gradient_norm": result.gradient_norm}
        timed("fit", "done", note, t0)

        # 4. EM cross-check ------------------------------------------------------------
        t0 = time.perf_counter()
        from ..crosscheck import attach_em_check

        with rep.stage("EM cross-check (independent numpy EM)"):
            result = attach_em_check(result, coded, pseudo_counts=pseudo, seed=seed)
        chk = result.extras["em_check"]
        from ..crosscheck import VERDICT_MEANING

        meaning = VERDICT_MEANING[chk["verdict"]]
        outcome.numbers["em_check"] = {"verdict": chk["verdict"], "max_abs_delta_theta": chk["max_abs_delta_theta"]}
        timed("em_check", "done", f"{chk['verdict']}: {meaning} (largest CPT difference {chk['max_abs_delta_theta']:.1e})", t0)

        # 5. error bars ----------------------------------------------------------------
        t0 = time.perf_counter()
        se_focus = None
        if optional("uncertainty", "attach_uncertainty") is None:
            timed("uncertainty", "skipped", "skipped (adfit.uncertainty is not part of this installation)", t0)
        else:
            with rep.stage("error bars (observed information)"):
                result, se_focus = _error_bars(result, coded, net, pseudo, pri, k)
            timed("uncertainty", "done", _uncertainty_note(result), t0)

        # 6. complete-case comparison -------------------------------------------------
        t0 = time.perf_counter()
        captured: list[Any] = []

        def cc_fit(network, data, **kw):
            cb2, close2 = fit_progress(rep, "complete-case fit", restarts)
            try:
                with warnings.catch_warnings():  # the complete-case fit is only a comparison
                    warnings.simplefilter("ignore", UserWarning)
                    r = fit(network, data, progress=cb2, **kw)
            finally:
                close2()
            captured.append(r)
            return r

        cmp = compare_complete_case(net, coded, full=result, fit_fn=cc_fit, prior=pri, restarts=restarts,
                                    seed=seed, max_iter=max_iter)
        result = result.with_extras(complete_case=cmp.to_dict())
        result = result.with_extras(information_criteria=information_criteria(net, coded, result).to_dict())
        full_m = marginal(net, result.probs, FOCUS_NODE)[k]
        cc_m = marginal(net, captured[0].probs, FOCUS_NODE)[k] if captured else full_m
        insp = float(coded.counts[recorded & (coded.codes[:, j] == k)].sum()) / n_rec if n_rec else float("nan")
        from .generate import true_tables

        truth = marginal(net, true_tables(), FOCUS_NODE)[k]
        diff = cc_m - full_m
        word = "over-state" if diff > 0 else "under-state"
        se_full = se_focus
        in_se = f"; {abs(diff) / se_full:.0f} times the standard error of the full-likelihood estimate" if se_full else ""
        headline = (f"dropping incomplete rows would {word} the chance of {FOCUS_STATE} wear by "
                    f"{100 * abs(diff):.1f} percentage points ({_pct(cc_m)} instead of {_pct(full_m)}{in_se})")
        outcome.numbers["focus"] = {
            "node": FOCUS_NODE, "state": FOCUS_STATE, "full": full_m, "complete_case": cc_m,
            "difference": diff, "se_full": se_full, "inspected_share": insp, "truth": truth,
            "n_records": int(cmp.n_rows), "n_discarded": int(cmp.n_discarded), "headline": headline,
            "largest_entry_change": cmp.max_abs_difference, "largest_entry_z": cmp.max_abs_z}
        timed("complete_case", "done", headline, t0)

        # 7. missing-not-at-random sensitivity -------------------------------------------
        t0 = time.perf_counter()
        status, note = _sensitivity(result, coded, net, pseudo, cc_m, out / SENSITIVITY_FILE, rep, outcome)
        if status == "done":
            outcome.files["sensitivity"] = out / SENSITIVITY_FILE
        timed("sensitivity", status, note, t0)

        # 8. imputation ----------------------------------------------------------------
        t0 = time.perf_counter()
        status, note = _impute(result, coded, net, out / IMPUTED_FILE, outcome.files["data"], rep, seed)
        if status == "done":
            outcome.files["imputed"] = out / IMPUTED_FILE
        timed("imputation", status, note, t0)

        # 9. the result file -------------------------------------------------------------
        t0 = time.perf_counter()
        write_result(out / FIT_FILE, result)
        outcome.files["fit"] = out / FIT_FILE
        outcome.result = result
        timed("write", "done", f"wrote {FIT_FILE}", t0)

        # 10. the report ----------------------------------------------------------------
        t0 = time.perf_counter()
        status, note = _report(out / FIT_FILE, coded, out / REPORT_FILE, rep, outcome.files.get("sensitivity"))
        if status == "done":
            outcome.files["report"] = out / REPORT_FILE
        timed("report", status, note, t0)
    return outcome


def _prior_kwargs(fn: Callable, pseudo: Mapping[str, np.ndarray], prior: Any) -> dict[str, Any]:
    """How to hand the prior to ``fn``: ``pseudo_counts=`` if it takes them, else ``prior=``, else nothing."""
    try:
        params = inspect.signature(fn).parameters
    except (TypeError, ValueError):
        return {}
    if "pseudo_counts" in params:
        return {"pseudo_counts": pseudo}
    if "prior" in params:
        return {"prior": prior}
    return {}


def _uncertainty_note(result: Any) -> str:
    nodes = result.extras.get("nodes", {}) if hasattr(result, "extras") else {}
    ses = [np.asarray(sec["se"], dtype=np.float64) for sec in nodes.values() if isinstance(sec, Mapping) and "se" in sec]
    if not ses:
        return "added to the result"
    allv = np.concatenate([s.ravel() for s in ses])
    allv = allv[np.isfinite(allv)]
    if not allv.size:
        return "added to the result (no finite standard error)"
    return (f"standard errors for {len(ses)} CPTs, median {np.median(allv):.3f}, largest {allv.max():.3f} "
            f"(probability units)")


def _error_bars(result: Any, coded: Any, network: Network, pseudo: Mapping[str, np.ndarray], prior: Any,
                state: int) -> tuple[Any, float | None]:
    """The result with error bars, and the SE of the marginal P(focus) when the covariance is at hand.

    The SE of the marginal is by the delta method: ``sqrt(g' C g)`` with ``C`` the inverse observed
    information in the uncertainty module's coordinates and ``g`` the gradient of the marginal
    with respect to them (central differences; the marginal is a smooth polynomial in θ).
    """
    compute = optional("uncertainty", "compute_uncertainty")
    merge = optional("uncertainty", "with_uncertainty")
    if compute is None or merge is None:
        attach = optional("uncertainty", "attach_uncertainty")
        return attach(result, coded, **_prior_kwargs(attach, pseudo, prior)), None
    unc = compute(network, coded, result.probs, **_prior_kwargs(compute, pseudo, prior),
                  converged=bool(result.converged))
    result = merge(result, unc)
    return result, marginal_se(unc, FOCUS_NODE, state)


def marginal_se(uncertainty: Any, node: str, state: int, *, step: float = 1e-5) -> float | None:
    """Standard error of the marginal probability ``P(node = state)`` at the estimate.

    Delta method: ``sqrt(g' C g)`` with ``C`` the covariance (inverse observed information) of
    an :class:`adfit.uncertainty.Uncertainty` in its coordinates and ``g`` the gradient of the
    marginal with respect to them, by central differences of step ``step`` (the marginal is a
    polynomial in the CPT entries). None when the covariance is not available (matrix-free).
    """
    cov, co = getattr(uncertainty, "covariance", None), getattr(uncertainty, "coordinates", None)
    if cov is None or co is None or not hasattr(co, "probs_at") or co.size == 0 or cov.shape != (co.size, co.size):
        return None
    net = co.network
    g = np.empty(co.size)
    for i in range(co.size):
        e = np.zeros(co.size)
        e[i] = step
        g[i] = (marginal(net, co.probs_at(e), node)[state] - marginal(net, co.probs_at(-e), node)[state]) / (2 * step)
    var = float(g @ cov @ g)
    return math.sqrt(var) if var > 0 and math.isfinite(var) else None


def _impute(result: Any, coded: Any, network: Network, path: Path, data_path: Path, rep: Reporter,
            seed: int) -> tuple[str, str]:
    """Write the imputed records when adfit.impute is part of this installation."""
    fn = optional("impute", "impute_file")
    if fn is None:
        return "skipped", "skipped (adfit.impute is not part of this installation)"
    with rep.stage("imputing the missing cells"):
        imp, _ = fn(network, result.probs, data_path, path, draws=IMPUTE_DRAWS, seed=seed)
    counts = imp.n_imputed() if hasattr(imp, "n_imputed") else {}
    n_cells = sum(v for k, v in counts.items() if k not in network.latent_names)
    return "done", (f"wrote {path.name}: {n_cells:,} missing cells filled with their most probable value, with "
                    f"posterior probabilities and {IMPUTE_DRAWS} draws per record (multiple imputation); "
                    f"the latent {', '.join(network.latent_names)} gets the same columns")


def _sensitivity(result: Any, coded: Any, network: Network, pseudo: Mapping[str, np.ndarray], threshold: float,
                 path: Path, rep: Reporter, outcome: "DemoOutcome") -> tuple[str, str]:
    """The sensitivity analysis on the demo's own question: how far would the chance of heavy wear
    move if heavy wear were more (or less) often left uninspected than the alarm explains, and how
    strong would that have to be for the full-likelihood estimate to reach the complete-case one?
    Starts from the demo's fit (no new MAR fit)."""
    fn = optional("sensitivity", "sensitivity_analysis")
    if fn is None:
        return "skipped", "skipped (adfit.sensitivity is not part of this installation)"
    from ..sensitivity import Shift, write_sensitivity

    target = f"{FOCUS_NODE}={FOCUS_STATE}"
    with rep.stage("sensitivity to gaps missing not at random (refits under assumed odds)"):
        sens = fn(network, coded, Shift(FOCUS_NODE, FOCUS_STATE), SENSITIVITY_ODDS, targets=[target],
                  predictors=[SENSITIVITY_PREDICTOR], pseudo_counts=pseudo, start=result.probs, threshold=threshold)
    write_sensitivity(path, sens)
    vals = {r["odds"]: r["targets"][target] for r in sens.rows}
    tip = sens.tipping_point or {}
    outcome.numbers["sensitivity"] = {
        "target": target, "odds": list(SENSITIVITY_ODDS), "values": [vals[o]["value"] for o in SENSITIVITY_ODDS],
        "se": [vals[o]["se"] for o in SENSITIVITY_ODDS], "threshold": threshold,
        "tipping_odds": tip.get("odds"), "tipping_note": tip.get("note"),
        "converged": all(r["converged"] for r in sens.rows)}
    lo, hi = min(SENSITIVITY_ODDS), max(SENSITIVITY_ODDS)
    return "done", (f"wrote {path.name}: if heavy wear were {lo:g} to {hi:g} times as likely to go uninspected "
                    f"(given the alarm), the chance of heavy wear would be {_pct(vals[lo]['value'])} to "
                    f"{_pct(vals[hi]['value'])} instead of {_pct(vals[1.0]['value'])}; "
                    + (f"it reaches the complete-case {_pct(threshold)} at odds {tip['odds']:.2g}"
                       if tip.get("crossed") else f"it does not reach the complete-case {_pct(threshold)} within the grid")
                    + "; the odds are assumptions, not estimates")


def _report(result_path: Path, coded: Any, path: Path, rep: Reporter, sensitivity: Path | None = None) -> tuple[str, str]:
    """Write the HTML report when adfit.report is part of this installation."""
    fn = optional("report", "write_report")
    if fn is None:
        return "skipped", "skipped (adfit.report is not part of this installation)"
    with rep.stage("writing the report"):
        if sensitivity is not None:
            fn(path, result_path, data=coded, title=REPORT_TITLE, sensitivity=sensitivity)
        else:
            fn(path, result_path, data=coded, title=REPORT_TITLE)
    return "done", (f"wrote {path.name}: the network, convergence, CPTs with error bars, EM check, gaps and "
                    f"complete-case plots, " + ("the not-at-random sensitivity, " if sensitivity is not None else "")
                    + "cautions")


__all__ = ["run_demo", "load_demo", "demo_network", "demo_prior", "demo_frame", "marginal", "write_demo_files",
           "resource_bytes", "marginal_se", "DemoOutcome", "Step", "Reporter", "RichReporter", "CAUTION", "FOCUS_NODE",
           "FOCUS_STATE"]

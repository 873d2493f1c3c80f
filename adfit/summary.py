"""The terminal summary of a fit (``adfit fit``): short by default, the rest with ``--verbose``.

Plain functions from a :class:`~adfit.result.FitResult` (and the JSON-ready sections it carries)
to lines of text. One rule per kind of number, so that the same kind always reads the same:
log-likelihoods, objectives and AIC/BIC to 2 decimals with thousands separators; probabilities,
standard errors and interval ends to 3 decimals; gradient norms and tolerances in e-notation to 3
significant digits. Estimates come first, intervals after them.
"""

from __future__ import annotations

import math
from typing import Any, Mapping, Sequence

#: decimals of probabilities in the terminal (estimates, standard errors, interval ends)
PROB_DIGITS = 3

_METHOD = {"lbfgs": "L-BFGS", "adam": "Adam", "em": "EM"}
_OBJECTIVE = {"mle": "maximum-likelihood", "map": "MAP"}


def fmt_ll(x: Any) -> str:
    """A log-likelihood, objective or information criterion: 2 decimals, thousands separated."""
    try:
        v = float(x)
    except (TypeError, ValueError):
        return "n/a"
    return f"{v:,.2f}" if math.isfinite(v) else str(v)


def fmt_records(x: Any) -> str:
    """A number of records: whole (thousands separated), or to 2 decimals when weighted."""
    v = float(x)
    return f"{v:,.0f}" if float(v).is_integer() else f"{v:,.2f}"


def _plural(n: int, one: str, many: str | None = None) -> str:
    return f"{n} {one if n == 1 else (many or one + 's')}"


def fit_lines(result: Any) -> list[str]:
    """What was fitted and whether the stopping rule held; the objective and its parts."""
    method = _METHOD.get(result.method, result.method)
    what = _OBJECTIVE.get(result.objective, result.objective)
    state = (f"converged in {_plural(int(result.iterations), 'iteration')}" if result.converged
             else f"did NOT converge ({result.stop_reason or 'stopping rule not met'}): the estimate may not be a maximum")
    lines = [f"Fit: {what} estimate by {method} from {fmt_records(result.n_rows)} records "
             f"({result.n_distinct:,} distinct rows); {state}"]
    parts = [f"log-likelihood {fmt_ll(result.log_likelihood)}"]
    if result.objective == "map":
        parts.append(f"log-prior {fmt_ll(result.log_prior)}")
    if result.penalty:
        parts.append(f"L2 penalty {fmt_ll(result.penalty)}")
    if len(parts) > 1:
        parts.append(f"objective {fmt_ll(result.objective_value)}")
    lines.append("  " + ", ".join(parts))
    return lines


def starts_line(section: Any) -> str | None:
    """One line on the starts (None for a single start)."""
    if not isinstance(section, Mapping) or section.get("n_starts", 1) <= 1:
        return None
    k = int(section["n_starts"])
    opt = section.get("optima") or []
    n_conv = int(section.get("n_converged", k))
    if not opt:
        return f"Starts: {k}; none converged, so no optimum was confirmed (raise --max-iter)"
    at_best = int(section.get("starts_at_best_objective", 0))
    text = f"Starts: {k}; "
    text += (f"all reached the best objective {fmt_ll(opt[0]['objective'])}" if at_best == k else
             f"{at_best} reached the best objective {fmt_ll(opt[0]['objective'])}")
    lower = [o for o in opt[1:] if not o.get("same_objective_as_best")]
    if lower:
        shown = ", ".join(fmt_ll(o["objective"]) for o in lower[:3]) + (", ..." if len(lower) > 3 else "")
        text += f"; others stopped lower ({shown}): local optima, which is why several starts are made"
    if any(o.get("same_objective_as_best") for o in opt[1:]):
        text += "; some reached the best objective with different CPTs (parameters not pinned down by the data)"
    if n_conv < k:
        text += f"; {k - n_conv} did not converge"
    return text


def _median_largest_se(result: Any) -> tuple[float, float] | None:
    import numpy as np

    vals: list[float] = []
    for name in result.network.free_names:
        t = result.table(name)
        se = t["se"].to_numpy(dtype=float)
        vals.extend(se[np.isfinite(se)].tolist())
    if not vals:
        return None
    return float(np.median(vals)), float(np.max(vals))


def error_bar_lines(result: Any) -> list[str]:
    """The error bars in a few lines: their level, their size, and every flag counted."""
    summary = result.extras.get("uncertainty")
    if not isinstance(summary, Mapping):
        return []
    pct = f"{100 * float(summary.get('level', 0.95)):g}%"
    se = _median_largest_se(result)
    lines = [f"Error bars: {pct} intervals for {_plural(int(result.network.n_free_parameters()), 'free parameter')}"
             + (f"; standard errors median {se[0]:.{PROB_DIGITS}f}, largest {se[1]:.{PROB_DIGITS}f}" if se else "")]
    flags: list[str] = []
    kinds = [d.get("kind") for d in summary.get("directions") or []]
    if kinds.count("negative"):
        flags.append(_plural(kinds.count("negative"), "direction") + " of negative curvature (not a maximum)")
    if kinds.count("flat"):
        flags.append(_plural(kinds.count("flat"), "flat direction") + " (not identified)")
    if kinds.count("weak"):
        flags.append(_plural(kinds.count("weak"), "weakly identified direction"))
    for key, word in (("not_identified", "CPT row not identified"), ("no_data_rows", "CPT row without records"),
                      ("prior_only_rows", "CPT row informed by the prior only")):
        n = len(summary.get(key) or [])
        if n:
            flags.append(_plural(n, word, word.replace("CPT row", "CPT rows")))
    nb = len(summary.get("boundary_entries") or [])
    if nb:
        flags.append(_plural(nb, "cell") + " on the boundary (one-sided interval)")
    wide = [e for e in summary.get("wide_entries") or [] if e.get("status") in ("interior", "boundary")]
    if wide:
        flags.append(_plural(len(wide), "interval") + f" wider than {summary.get('wide_threshold', 0.5):g}")
    if flags:
        lines.append("  to read with care: " + "; ".join(flags) + " (the cells: fit --verbose)")
    else:
        lines.append("  every free CPT entry is identified by the data; no weak direction, no wide interval")
    for n in summary.get("latent") or {}:
        lines.append(f"  latent node {n}: its states are labels, identified only up to a relabelling; "
                     f"the error bars are for this labelling")
    return lines


def em_check_line(check: Any) -> str | None:
    """The EM cross-check's verdict and its meaning (the detail too when they do not agree)."""
    if not isinstance(check, Mapping):
        return None
    from .crosscheck import LEGACY_VERDICTS, VERDICT_MEANING

    verdict = check.get("verdict")
    meaning = check.get("meaning") or VERDICT_MEANING.get(verdict) or LEGACY_VERDICTS.get(verdict, "")
    text = f"EM cross-check: {verdict}: {meaning}"
    if verdict == "agree" and check.get("max_abs_delta_theta") is not None:
        text += f" (largest CPT difference {float(check['max_abs_delta_theta']):.1e})"
    elif verdict != "agree" and check.get("detail"):
        text += f"\n  {check['detail']}"
    return text


def criteria_line(ic: Any) -> str | None:
    """AIC and BIC, with what k and n are."""
    if not isinstance(ic, Mapping):
        return None
    bound = ic.get("n_parameters_removed_by_binding_constraints")
    text = (f"AIC {fmt_ll(ic.get('aic'))}, BIC {fmt_ll(ic.get('bic'))} (k = {ic.get('n_parameters')} free parameters"
            + (f", {bound} removed by binding monotone constraints" if bound else "")
            + f", n = {fmt_records(ic.get('n_effective', 0))} records)")
    if ic.get("objective") == "map":
        text += "; MAP fit: log-likelihood taken at the posterior mode"
    return text


def format_estimates(result: Any, names: Sequence[str] | None = None, *, digits: int = PROB_DIGITS) -> str:
    """The CPTs as plain-text tables (rows: parent configurations, columns: states), every
    probability to ``digits`` decimals."""
    import pandas as pd

    blocks = []
    for name in names or result.network.names:
        node = result.network.node(name)
        tag = " (fixed)" if node.fixed is not None else (" (latent)" if node.latent else "")
        head = f"P({name} | {', '.join(node.parents)}){tag}" if node.parents else f"P({name}){tag}"
        extra = ""
        sec = (result.extras.get("nodes") or {}).get(name) or {}
        if isinstance(sec.get("parameters"), dict):  # a structured form: its own parameters too
            from .forms import format_parameters

            try:
                form = (f"table, increasing with {', '.join(node.increasing_with)}" if node.increasing_with
                        else sec.get("cpd"))  # a monotone node's cpd is "table": say the constraint
                head += f" ({form})" + (f", tied to {node.tied_to}" if node.tied_to else "")
                extra = "\n" + format_parameters(result.network, name, sec["parameters"], digits=digits)
            except (KeyError, TypeError, ValueError):
                extra = ""
        df = result.cpt(name)
        with pd.option_context("display.width", 200, "display.max_columns", 40):
            body = df.to_string(float_format=lambda x: f"{x:.{digits}f}")
        blocks.append(f"{head}\n{body}{extra}")
    return "\n\n".join(blocks)


def detail_lines(result: Any) -> list[str]:
    """For ``--verbose``: the gradient norm at the answer and the largest KKT ratio."""
    lines = [f"gradient norm at the answer {result.gradient_norm:.3e} (records, with respect to the free logits)"]
    st = result.extras.get("stationarity") or {}
    if st.get("kkt_ratio") is not None:
        moves = [f"{st[k]} move(s) off a {what}" for k, what in (("boundary_escapes", "false boundary"),
                                                                ("saddle_escapes", "saddle")) if st.get(k)]
        lines.append(f"largest KKT ratio {st['kkt_ratio']:.6f} (a maximum needs at most 1 + {st.get('kkt_tol', 0):g} "
                     f"on every cell; worst: {st.get('kkt_worst_cell')})" + (f"; {', '.join(moves)}" if moves else ""))
    return lines


def short_summary(result: Any) -> str:
    """The default summary of ``adfit fit``: the fit, the starts, the error bars, the EM check,
    AIC/BIC (each a line or two)."""
    lines = fit_lines(result)
    for extra in (starts_line(result.extras.get("restarts")),):
        if extra:
            lines.append(extra)
    lines += error_bar_lines(result)
    for extra in (em_check_line(result.extras.get("em_check")),
                  criteria_line(result.extras.get("information_criteria"))):
        if extra:
            lines.extend(extra.split("\n"))
    return "\n".join(wrap(line) for line in lines)


def wrap(line: str, width: int = 80) -> str:
    """A summary line folded at ``width`` columns, continuation lines indented under it."""
    import textwrap

    lead = len(line) - len(line.lstrip(" "))
    return textwrap.fill(line, width=width, subsequent_indent=" " * (lead + 4), break_on_hyphens=False,
                         break_long_words=False)


__all__ = ["fmt_ll", "fmt_records", "fit_lines", "detail_lines", "starts_line", "error_bar_lines", "em_check_line",
           "criteria_line", "format_estimates", "short_summary", "wrap", "PROB_DIGITS"]

"""Missing data: where the gaps are, and whether they depend on what was observed.

:func:`overview` summarises the gaps of a :class:`~adfit.data.CodedData` against its
:class:`~adfit.network.Network`:

* per observed column, the weight and share of missing cells;
* the missingness patterns (which columns are missing together) with their weights, the share
  of complete rows and whether the pattern is *monotone* (the sets of missing columns are nested,
  so the columns can be ordered such that a gap in one column implies gaps in all later ones);
* a likelihood-ratio test of MCAR (missing completely at random) against MAR for each column
  with gaps.

Latent nodes are never observed by design; they are listed apart and are not gaps.

The MCAR test
-------------
For a column ``c`` with gaps let ``R_c`` be its missingness indicator. Under MCAR the whole
missingness pattern is independent of the data, so ``R_c`` is independent of the observed
values of every other column. Two kinds of G² (likelihood-ratio) test are made, all on the
weighted distinct rows (weights are treated as record counts):

``pairwise``
    for each other observed column ``d``: ``R_c`` against the value of ``d``, on the rows where
    ``d`` is observed (the 2 × card(d) contingency table). This is the LR test of a logistic
    model of ``R_c`` on ``d`` against the intercept-only model.
``joint``
    (when there are at least two other observed columns) ``R_c`` against the joint configuration
    of the observed values of all other columns, *conditionally* on which of them are missing:
    the sum over the missingness patterns ``s`` of the other columns of the G² of the
    ``R_c`` × configuration table within ``s``. This is the LR test of the saturated logistic
    model of ``R_c`` on the other columns against the model that depends on their missingness
    only. Conditioning matters: gaps that occur together (a dependence among indicators) are
    allowed by MCAR and must not count as evidence against it. The joint test also sees
    interactions, but its tables are usually sparse, so its chi-square approximation is rough
    (the share of cells with expected weight below 5 is reported, common practice).

Degrees of freedom count non-empty rows and columns only: ``(r - 1)(k - 1)`` per table, with
``r`` and ``k`` the numbers of non-empty rows and columns; a table with ``df = 0`` tests
nothing and is left out. The p-values come from the chi-square distribution; all tests of one
report form one family and are adjusted with Holm's step-down method (Holm 1979), so the
chance of any false rejection under MCAR stays below the level. A column is read as "not MCAR"
when one of its adjusted p-values is at or below the level.

What no test can do: rejecting MCAR shows that the gaps depend on observed values (which is
consistent with MAR, under which the full-likelihood fit stays valid while dropping incomplete
rows can bias estimates). Not rejecting is no proof of MCAR (the tests may lack power). Whether
the gaps depend on the missing values themselves (MNAR) cannot be tested from the data at all.

Complete-case versus full likelihood
------------------------------------
:func:`compare_complete_case` fits the network twice: on all rows (the full marginal likelihood,
valid under MAR) and on the complete rows only (every observed column recorded; what dropping
incomplete rows gives). Per CPT entry it reports both estimates, their difference
(complete-case minus full) and the difference in units of the full-likelihood standard error
when one is available; the log-likelihood of *all* rows under each set of estimates; and how
many rows were discarded. Under MCAR both estimates are consistent (the complete-case one is
merely less precise); under MAR the complete-case estimates of some CPTs are biased, typically
those of a node whose own gaps, or whose parents' gaps, depend on its children. Entries whose
parent configuration occurs in no complete row are flagged as not supported (their
complete-case value is only the fit's starting value) and are left out of the maxima.

Information criteria
--------------------
:func:`information_criteria` gives ``AIC = -2 log L + 2k`` and ``BIC = -2 log L + k log n``
with ``k`` the free parameters of the estimated CPTs (``(card - 1)`` per parent configuration;
fixed CPTs excluded) and ``n`` the effective sample size: the weight of the records with at least
one observed cell (records with nothing observed add nothing to the likelihood). With latent
nodes ``k`` is the nominal count; parameters that the data do not identify still count.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Callable, Mapping, Sequence

import numpy as np
from scipy import stats

from .data import HIDDEN, CodedData
from .errors import DataError, OptionError
from .network import Network

FORMAT = "adfit-gaps/1"
SPARSE_EXPECTED = 5.0  # expected cell weight below which a chi-square cell is "sparse" (common practice)

MCAR_CAUTION = (
    "These tests can show that gaps depend on observed values (not MCAR). Not rejecting MCAR does not "
    "prove it. Whether gaps depend on the missing values themselves (MAR versus MNAR) cannot be tested "
    "from the data; the full-likelihood fit assumes MAR.")


# ----------------------------------------------------------------------- results
@dataclass(frozen=True)
class ColumnGaps:
    """Gaps of one observed column: weight and share of missing cells."""

    name: str
    n_missing: float
    share_missing: float


@dataclass(frozen=True)
class Pattern:
    """One missingness pattern: the columns missing together, and the weight of such rows."""

    missing: tuple[str, ...]
    count: float
    share: float


@dataclass(frozen=True)
class IndependenceTest:
    """One G² test of a missingness indicator against observed values.

    Attributes:
        column: the column whose missingness indicator is tested.
        against: the other column (``pairwise``) or columns (``joint``).
        kind: ``"pairwise"`` or ``"joint"``.
        g2: the likelihood-ratio statistic.
        df: its degrees of freedom.
        p_value: chi-square p-value, unadjusted.
        p_holm: Holm-adjusted p-value over all tests of the report.
        n_used: weight of the rows the test used.
        sparse_share: share of non-empty-margin cells with expected weight below 5.
    """

    column: str
    against: tuple[str, ...]
    kind: str
    g2: float
    df: int
    p_value: float
    p_holm: float
    n_used: float
    sparse_share: float


@dataclass(frozen=True)
class ColumnReading:
    """The plain-language verdict for one column with gaps."""

    column: str
    testable: bool
    rejected: bool
    smallest_p_holm: float | None
    depends_on: tuple[str, ...]
    text: str


@dataclass(frozen=True)
class GapsReport:
    """The missingness overview of a data set (see the module docstring for the method)."""

    source: str
    n_rows: float
    n_distinct: int
    columns: tuple[ColumnGaps, ...]
    latent: tuple[str, ...]
    patterns: tuple[Pattern, ...]
    n_patterns: int
    monotone: bool
    monotone_order: tuple[str, ...] | None
    n_complete: float
    share_complete: float
    tests: tuple[IndependenceTest, ...]
    readings: tuple[ColumnReading, ...]
    level: float
    mcar_rejected: bool | None
    notes: tuple[str, ...] = field(default=())

    def to_dict(self) -> dict[str, Any]:
        """A JSON-ready dict (plain Python numbers, no NaN)."""
        return {
            "format": FORMAT,
            "source": self.source,
            "n_rows": _num(self.n_rows),
            "n_distinct": self.n_distinct,
            "columns": [{"name": c.name, "n_missing": _num(c.n_missing), "share_missing": c.share_missing}
                        for c in self.columns],
            "latent": list(self.latent),
            "complete_rows": {"count": _num(self.n_complete), "share": self.share_complete},
            "patterns": {"total": self.n_patterns,
                         "top": [{"missing": list(p.missing), "count": _num(p.count), "share": p.share}
                                 for p in self.patterns]},
            "monotone": {"monotone": self.monotone,
                         "order": list(self.monotone_order) if self.monotone_order is not None else None},
            "mcar_test": {
                "method": "G2 likelihood-ratio tests of each missingness indicator against the other observed "
                          "columns (pairwise, and joint conditional on the others' missingness); Holm-adjusted",
                "level": self.level,
                "mcar_rejected": self.mcar_rejected,
                "tests": [{"column": t.column, "against": list(t.against), "kind": t.kind, "g2": t.g2,
                           "df": t.df, "p_value": t.p_value, "p_holm": t.p_holm, "n_used": _num(t.n_used),
                           "sparse_share": t.sparse_share} for t in self.tests],
                "readings": [{"column": r.column, "testable": r.testable, "rejected": r.rejected,
                              "smallest_p_holm": r.smallest_p_holm, "depends_on": list(r.depends_on),
                              "text": r.text} for r in self.readings],
                "caution": MCAR_CAUTION,
            },
            "notes": list(self.notes),
        }

    def format_text(self) -> str:
        """A plain-text summary for the terminal."""
        out: list[str] = []
        out.append(f"Missing data in {self.source}: {_fmt_n(self.n_rows)} records "
                   f"({self.n_distinct} distinct rows), {len(self.columns)} observed column(s)")
        if self.latent:
            out.append(f"Latent nodes (never observed by design, not counted as gaps): {', '.join(self.latent)}")
        out.append("")
        w = max([len("column")] + [len(c.name) for c in self.columns])
        out.append(f"  {'column':<{w}}  {'missing':>10}  {'share':>7}")
        for c in self.columns:
            out.append(f"  {c.name:<{w}}  {_fmt_n(c.n_missing):>10}  {_pct(c.share_missing):>7}")
        out.append("")
        out.append(f"Complete rows: {_fmt_n(self.n_complete)} ({_pct(self.share_complete)})")
        shown = len(self.patterns)
        out.append(f"Missingness patterns: {self.n_patterns} in all"
                   + (f", the {shown} most frequent:" if shown < self.n_patterns else ":"))
        for p in self.patterns:
            what = "complete" if not p.missing else "missing " + ", ".join(p.missing)
            out.append(f"  {_fmt_n(p.count):>10}  {_pct(p.share):>7}  {what}")
        if self.monotone:
            order = f" (columns in order of gaps: {', '.join(self.monotone_order or ())})" if self.n_patterns > 1 else ""
            out.append(f"Monotone pattern: yes{order}")
        else:
            out.append("Monotone pattern: no (the sets of missing columns are not nested)")
        out.append("")
        if not self.readings:
            out.append("MCAR test: no column has gaps, nothing to test.")
        else:
            out.append(f"MCAR test (G² likelihood ratio of each missingness indicator against the other observed "
                       f"columns; Holm-adjusted over {len(self.tests)} test(s); level {self.level:g}):")
            if self.tests:
                cw = max(len("gaps in"), *(len(t.column) for t in self.tests))
                aw = max(len("against"), *(len(_against(t)) for t in self.tests))
                out.append(f"  {'gaps in':<{cw}}  {'against':<{aw}}  {'G²':>9}  {'df':>4}  {'p':>9}  {'Holm p':>9}")
                for t in self.tests:
                    flag = "  *" if t.p_holm <= self.level else ""
                    out.append(f"  {t.column:<{cw}}  {_against(t):<{aw}}  {t.g2:>9.3f}  {t.df:>4d}  "
                               f"{_p(t.p_value):>9}  {_p(t.p_holm):>9}{flag}")
            out.append("Reading:")
            for r in self.readings:
                out.append(f"  - {r.text}")
        for n in self.notes:
            out.append(f"Note: {n}")
        out.append("")
        out.append("Caution: " + MCAR_CAUTION)
        return "\n".join(out)


def _against(t: IndependenceTest) -> str:
    return t.against[0] if t.kind == "pairwise" else "all others (joint)"


def _num(x: float) -> float | int:
    x = float(x)
    return int(x) if x.is_integer() else x


def _fmt_n(x: float) -> str:
    x = float(x)
    return f"{int(x):,}" if x.is_integer() else f"{x:,.2f}"


def _pct(x: float) -> str:
    return f"{100.0 * x:.1f}%"


def _p(p: float) -> str:
    return "<1e-300" if p < 1e-300 else (f"{p:.2e}" if p < 1e-3 else f"{p:.4f}")


# ------------------------------------------------------------------ statistics
def g2_test(table: np.ndarray) -> tuple[float, int, float, float]:
    """G² test of independence on a two-way table of (weighted) counts.

    Empty rows and columns are dropped; ``df = (r - 1)(k - 1)`` over the non-empty ones.

    Returns:
        ``(g2, df, p_value, sparse_share)``; for ``df == 0`` the statistic is 0 and the p-value 1.
    """
    t = np.asarray(table, dtype=np.float64)
    t = t[t.sum(axis=1) > 0][:, t.sum(axis=0) > 0]
    if t.size == 0:
        return 0.0, 0, 1.0, 0.0
    r, k = t.shape
    df = (r - 1) * (k - 1)
    n = t.sum()
    expected = np.outer(t.sum(axis=1), t.sum(axis=0)) / n
    pos = t > 0
    g2 = float(2.0 * np.sum(t[pos] * np.log(t[pos] / expected[pos])))
    g2 = max(g2, 0.0)  # rounding can give a tiny negative value for an exactly independent table
    p = float(stats.chi2.sf(g2, df)) if df > 0 else 1.0
    return g2, df, p, float(np.mean(expected < SPARSE_EXPECTED))


def holm(p_values: Sequence[float]) -> np.ndarray:
    """Holm's step-down adjusted p-values (Holm 1979), in the order given."""
    p = np.asarray(p_values, dtype=np.float64)
    m = p.size
    if m == 0:
        return p.copy()
    order = np.argsort(p, kind="stable")
    adj_sorted = np.minimum(1.0, np.maximum.accumulate((m - np.arange(m)) * p[order]))
    out = np.empty(m)
    out[order] = adj_sorted
    return out


def _table(row_codes: np.ndarray, col_codes: np.ndarray, weights: np.ndarray, n_rows: int, n_cols: int) -> np.ndarray:
    t = np.zeros((n_rows, n_cols))
    np.add.at(t, (row_codes, col_codes), weights)
    return t


def _stratified_g2(indicator: np.ndarray, strata: np.ndarray, configs: np.ndarray,
                   weights: np.ndarray) -> tuple[float, int, float]:
    """Sum over strata of the G² of indicator × configuration; returns (g2, df, sparse_share)."""
    g2_sum, df_sum, sparse, cells = 0.0, 0, 0.0, 0
    for s in np.unique(strata):
        m = strata == s
        _, cfg = np.unique(configs[m], return_inverse=True)
        t = _table(indicator[m], cfg.reshape(-1), weights[m], 2, int(cfg.max()) + 1)
        g2, df, _, sp = g2_test(t)
        if df > 0:
            g2_sum += g2
            df_sum += df
            nonempty = int((t.sum(axis=1) > 0).sum() * (t.sum(axis=0) > 0).sum())
            sparse += sp * nonempty
            cells += nonempty
    return g2_sum, df_sum, (sparse / cells if cells else 0.0)


# --------------------------------------------------------------------- overview
def overview(network: Network, data: CodedData, *, top: int = 10, level: float = 0.05) -> GapsReport:
    """Summarise the gaps of ``data`` and test MCAR for each column with gaps.

    Args:
        network: the network the data were coded against.
        data: distinct coded rows with their counts (weights matter throughout).
        top: how many of the most frequent missingness patterns to keep (>= 1).
        level: the significance level of the MCAR tests (after Holm's adjustment), in (0, 1).

    Raises:
        OptionError: ``top`` or ``level`` out of range.
    """
    if not isinstance(top, (int, np.integer)) or isinstance(top, bool) or top < 1:
        raise OptionError(f"--top must be a whole number >= 1 (got {top!r})")
    if not (isinstance(level, (int, float)) and 0.0 < float(level) < 1.0):
        raise OptionError(f"--level must be a number strictly between 0 and 1 (got {level!r})")
    level = float(level)

    obs_names = network.observed_names
    obs_idx = [network.index(n) for n in obs_names]
    codes = np.asarray(data.codes)[:, obs_idx]
    w = np.asarray(data.counts, dtype=np.float64)
    total = float(w.sum())
    miss = codes == HIDDEN

    # per column
    n_miss = w @ miss if miss.size else np.zeros(len(obs_names))
    columns = tuple(ColumnGaps(name, float(n_miss[j]), float(n_miss[j] / total) if total else 0.0)
                    for j, name in enumerate(obs_names))

    # patterns (weighted), most frequent first; ties broken by fewer missing columns, then column order
    pats, pinv = np.unique(miss, axis=0, return_inverse=True)
    pinv = pinv.reshape(-1)
    pw = np.bincount(pinv, weights=w, minlength=pats.shape[0])
    keep = pw > 0
    pats, pw = pats[keep], pw[keep]
    order = sorted(range(len(pw)), key=lambda i: (-pw[i], int(pats[i].sum()), tuple(~pats[i])))
    patterns = tuple(Pattern(tuple(obs_names[j] for j in np.flatnonzero(pats[i])), float(pw[i]),
                             float(pw[i] / total) if total else 0.0) for i in order[:top])
    complete_mask = ~miss.any(axis=1)
    n_complete = float(w[complete_mask].sum())

    monotone = is_monotone(pats)
    monotone_order = None
    if monotone:
        monotone_order = tuple(obs_names[j] for j in sorted(range(len(obs_names)), key=lambda j: (n_miss[j], j)))

    # MCAR tests
    gap_cols = [j for j in range(len(obs_names)) if n_miss[j] > 0]
    raw: list[tuple[str, tuple[str, ...], str, float, int, float, float, float]] = []
    untestable: dict[str, str] = {}
    for j in gap_cols:
        name = obs_names[j]
        if n_miss[j] >= total:
            untestable[name] = f"{name}: never observed in these data, so its gaps cannot be tested (the fit treats it like a latent node)"
            continue
        ind = miss[:, j].astype(np.int64)
        others = [k for k in range(len(obs_names)) if k != j]
        for k in others:
            seen = ~miss[:, k]
            card = network.node(obs_names[k]).card
            t = _table(ind[seen], codes[seen, k], w[seen], 2, card)
            g2, df, p, sp = g2_test(t)
            if df > 0:
                raw.append((name, (obs_names[k],), "pairwise", g2, df, p, float(w[seen].sum()), sp))
        if len(others) >= 2:
            sub = codes[:, others]
            strata = _row_keys(miss[:, others].astype(np.int64))
            configs = _row_keys(sub.astype(np.int64) + 1)
            g2, df, sp = _stratified_g2(ind, strata, configs, w)
            if df > 0:
                raw.append((name, tuple(obs_names[k] for k in others), "joint", g2, df,
                            float(stats.chi2.sf(g2, df)), total, sp))
        if not any(r[0] == name for r in raw):
            untestable[name] = (f"{name}: no test possible (the other observed columns take a single value "
                                f"where {name} is both missing and observed, or there are no other columns)")
    adj = holm([r[5] for r in raw])
    tests = tuple(IndependenceTest(r[0], r[1], r[2], float(r[3]), int(r[4]), float(r[5]), float(a), float(r[6]), float(r[7]))
                  for r, a in zip(raw, adj))

    readings = []
    for j in gap_cols:
        name = obs_names[j]
        if name in untestable:
            readings.append(ColumnReading(name, False, False, None, (), untestable[name]))
            continue
        mine = [t for t in tests if t.column == name]
        smallest = min(t.p_holm for t in mine)
        rej = [t for t in mine if t.p_holm <= level]
        dep = tuple(t.against[0] for t in rej if t.kind == "pairwise")
        if rej:
            via = (f"depend on {', '.join(dep)}" if dep else "depend on the other columns jointly")
            text = (f"{name}: its gaps {via} (Holm p = {_p(smallest)} <= {level:g}), so they are not MCAR. "
                    f"Dropping incomplete rows can bias estimates; the full-likelihood fit stays valid if the gaps are MAR.")
        else:
            text = (f"{name}: no evidence that its gaps depend on the other observed columns "
                    f"(smallest Holm p = {_p(smallest)} > {level:g}); consistent with MCAR, which this does not prove.")
        readings.append(ColumnReading(name, True, bool(rej), float(smallest), dep, text))

    mcar_rejected = None if not tests else bool(any(t.p_holm <= level for t in tests))
    notes: list[str] = []
    if any(t.kind == "joint" and t.sparse_share > 0.2 for t in tests):
        notes.append("some joint tests have many cells with expected weight below 5 (common practice: at most 20%); "
                     "their chi-square p-values are rough, prefer the pairwise ones")
    if not np.allclose(w, np.round(w)):
        notes.append("the data carry fractional weights; the tests treat them as record counts")
    return GapsReport(
        source=data.source, n_rows=total, n_distinct=data.n_distinct, columns=columns,
        latent=network.latent_names, patterns=patterns, n_patterns=int(len(pw)), monotone=monotone,
        monotone_order=monotone_order, n_complete=n_complete,
        share_complete=float(n_complete / total) if total else 0.0, tests=tests, readings=tuple(readings),
        level=level, mcar_rejected=mcar_rejected, notes=tuple(notes))


def is_monotone(patterns: np.ndarray) -> bool:
    """True when the sets of missing columns (rows of a boolean array) are nested (a chain)."""
    p = np.asarray(patterns, dtype=bool)
    if p.shape[0] <= 1:
        return True
    p = p[np.argsort(p.sum(axis=1), kind="stable")]
    return bool(np.all(~p[:-1] | p[1:]))


def _row_keys(a: np.ndarray) -> np.ndarray:
    """One integer label per distinct row of a 2-D int array."""
    if a.shape[1] == 0:
        return np.zeros(a.shape[0], dtype=np.int64)
    _, inv = np.unique(a, axis=0, return_inverse=True)
    return inv.reshape(-1)




# ============================================================ complete case versus full likelihood
CC_FORMAT = "adfit-complete-case/1"
SUPPORT_MIN = 1e-9  # expected parent-configuration weight (complete rows) below which an entry is "not supported"

CC_CAUTION = ("Both fits rest on the network structure; the full-likelihood fit also assumes the gaps are MAR. "
              "A large difference means dropping incomplete rows changes the answer, not which answer is right "
              "when the gaps may be MNAR.")


@dataclass(frozen=True)
class EntryComparison:
    """One CPT entry estimated from all rows (full) and from the complete rows only."""

    node: str
    parents: tuple[tuple[str, str], ...]   # (parent, state) pairs of the row
    state: str
    full: float
    complete_case: float
    difference: float                      # complete_case - full
    se: float | None                       # full-likelihood standard error, when available
    z: float | None                        # difference / se
    supported: bool                        # the parent configuration occurs in complete rows


@dataclass(frozen=True)
class CompleteCaseComparison:
    """Full-likelihood versus complete-case estimates (see the module docstring)."""

    source: str
    entries: tuple[EntryComparison, ...]
    n_rows: float
    n_complete: float
    n_discarded: float
    share_discarded: float
    loglik_full: float            # all rows, at the full-likelihood estimates
    loglik_complete_case: float   # all rows, at the complete-case estimates (-inf possible)
    n_impossible: float           # weight of rows with probability 0 under the complete-case estimates
    se_source: str | None
    converged_full: bool
    converged_complete_case: bool
    method: str

    @property
    def supported(self) -> tuple[EntryComparison, ...]:
        return tuple(e for e in self.entries if e.supported)

    @property
    def max_abs_difference(self) -> float:
        return max((abs(e.difference) for e in self.supported), default=0.0)

    @property
    def max_abs_z(self) -> float | None:
        zs = [abs(e.z) for e in self.supported if e.z is not None]
        return max(zs) if zs else None

    @property
    def loglik_loss(self) -> float:
        """How much lower the log-likelihood of all rows is at the complete-case estimates (>= 0)."""
        return self.loglik_full - self.loglik_complete_case

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready (``-inf`` becomes None with ``n_impossible`` > 0); for ``result.extras["complete_case"]``."""
        return {
            "format": CC_FORMAT,
            "source": self.source,
            "method": self.method,
            "n_rows": _num(self.n_rows),
            "n_complete": _num(self.n_complete),
            "n_discarded": _num(self.n_discarded),
            "share_discarded": self.share_discarded,
            "log_likelihood_all_rows": {
                "full": _finite(self.loglik_full),
                "complete_case": _finite(self.loglik_complete_case),
                "records_impossible_under_complete_case": _num(self.n_impossible),
            },
            "max_abs_difference": self.max_abs_difference,
            "max_abs_z": self.max_abs_z,
            "se_source": self.se_source,
            "converged": {"full": self.converged_full, "complete_case": self.converged_complete_case},
            "entries": [{"node": e.node, "parents": dict(e.parents), "state": e.state, "full": e.full,
                         "complete_case": e.complete_case, "difference": e.difference, "se": e.se, "z": e.z,
                         "supported": e.supported} for e in self.entries],
            "caution": CC_CAUTION,
        }

    def format_text(self, top: int = 15) -> str:
        """A plain-text summary: the entries that moved most, and the log-likelihoods."""
        out = [f"Complete-case versus full likelihood ({self.source}, {self.method}):",
               f"  complete-case fit used {_fmt_n(self.n_complete)} of {_fmt_n(self.n_rows)} records; "
               f"{_fmt_n(self.n_discarded)} ({_pct(self.share_discarded)}) discarded"]
        llc = ("-inf" if not math.isfinite(self.loglik_complete_case) else f"{self.loglik_complete_case:.4f}")
        out.append(f"  log-likelihood of all records: full estimates {self.loglik_full:.4f}, "
                   f"complete-case estimates {llc}")
        if self.n_impossible > 0:
            out.append(f"  {_fmt_n(self.n_impossible)} record(s) have probability 0 under the complete-case estimates "
                       f"(values never seen in complete rows)")
        if self.n_discarded == 0:
            out.append("  no row has a gap: both fits are the same")
        else:
            if self.se_source is None:
                out.append("  (no standard errors available: the difference is not expressed in SE units)")
            if self.se_source is not None:  # by |diff/SE|; entries without an SE after those with one
                shown = sorted(self.supported, key=lambda e: (e.z is None, -abs(e.z or 0.0), -abs(e.difference)))
            else:
                shown = sorted(self.supported, key=lambda e: -abs(e.difference))
            shown = shown[:top]
            if shown:
                out.append(f"  {'entry':<40} {'full':>8} {'compl.':>8} {'diff':>8} {'SE':>8} {'diff/SE':>8}")
                for e in shown:
                    par = ", ".join(f"{p}={v}" for p, v in e.parents)
                    label = f"P({e.node}={e.state}" + (f" | {par})" if par else ")")
                    se = "" if e.se is None else f"{e.se:.4f}"
                    z = "" if e.z is None else f"{e.z:+.2f}"
                    out.append(f"  {label:<40} {e.full:>8.4f} {e.complete_case:>8.4f} {e.difference:>+8.4f} {se:>8} {z:>8}")
                if len(self.supported) > len(shown):
                    out.append(f"  ... {len(self.supported) - len(shown)} more entries (all in the JSON)")
            unsup = len(self.entries) - len(self.supported)
            if unsup:
                out.append(f"  {unsup} entries have parent configurations found in no complete row (not compared)")
            big = f", {self.max_abs_z:.1f} SE" if self.max_abs_z is not None else ""
            out.append(f"  largest change from dropping incomplete rows: {self.max_abs_difference:.4f}{big}")
        out.append("  Caution: " + CC_CAUTION)
        return "\n".join(out)


def _finite(x: float) -> float | None:
    return float(x) if math.isfinite(x) else None


def _default_fit(network: Network, data: CodedData, **kwargs: Any):
    from .fit import fit
    return fit(network, data, **kwargs)


def _se_from(network: Network, result: Any, se: Mapping[str, Any] | None) -> tuple[dict[str, np.ndarray], str | None]:
    """Standard errors per free node, from ``se`` or from the result's per-node ``"se"`` tables."""
    if se is not None:
        out = {}
        for name in network.free_names:
            if name in se:
                a = np.asarray(se[name], dtype=np.float64)
                try:
                    out[name] = a.reshape(network.cpt_shape(name))
                except ValueError:
                    raise OptionError(f"standard errors for node {name!r} have {a.size} entries, "
                                      f"expected shape {network.cpt_shape(name)}") from None
        return out, "given"
    nodes = getattr(result, "extras", {}).get("nodes", {}) if result is not None else {}
    out = {}
    for name in network.free_names:
        t = nodes.get(name, {}).get("se") if isinstance(nodes.get(name), Mapping) else None
        if t is not None:
            try:
                out[name] = np.asarray(t, dtype=np.float64).reshape(network.cpt_shape(name))
            except (TypeError, ValueError):
                continue
    return out, ("full-likelihood fit (observed information)" if out else None)


def compare_complete_case(network: Network, data: CodedData, *, full: Any = None,
                          se: Mapping[str, Any] | None = None,
                          fit_fn: Callable[..., Any] | None = None, **fit_kwargs: Any) -> CompleteCaseComparison:
    """Fit on all rows and on the complete rows only, and compare entry by entry.

    Args:
        network: the network.
        data: the coded data (all rows).
        full: an existing fit of ``data`` (a :class:`adfit.result.FitResult`); fitted when None.
        se: standard errors of the full-likelihood estimates per free node (CPT-shaped); when
            None they are read from ``full.extras["nodes"][name]["se"]`` if present.
        fit_fn: the fitting function, called as ``fit_fn(network, coded, **fit_kwargs)`` and
            returning a FitResult; default :func:`adfit.fit.fit`. (``adfit.em.fit_em`` also fits.)
        fit_kwargs: passed to both fits (seed, prior, tolerances ...).

    Raises:
        DataError: no complete row (every record has a gap in some observed column).
    """
    from .em import EStep

    fit_fn = fit_fn or _default_fit
    if full is None:
        full = fit_fn(network, data, **fit_kwargs)
    cc = data.complete_cases(network)
    total = float(data.n_rows)
    if cc.n_distinct == 0 or cc.n_rows <= 0:
        raise DataError(f"{data.source}: no complete row (every record has a gap in some observed column); "
                        f"the complete-case comparison needs at least one complete row")
    n_complete = float(cc.n_rows)
    if n_complete >= total:
        ccfit = full
    else:
        ccfit = fit_fn(network, cc, **fit_kwargs)
    full_p = {k: np.asarray(v, dtype=np.float64) for k, v in full.probs.items()}
    cc_p = {k: np.asarray(v, dtype=np.float64) for k, v in ccfit.probs.items()}
    if network.latent_names and ccfit is not full:
        from .crosscheck import align_latent_states, relabel
        cc_p = relabel(network, cc_p, align_latent_states(network, cc_p, full_p))
    se_map, se_source = _se_from(network, full, se)

    cc_counts, _ = EStep(network, cc)(cc_p)
    _, row_ll = EStep(network, data)(cc_p)
    w = np.asarray(data.counts, dtype=np.float64)
    bad = np.isneginf(row_ll) & (w > 0)
    ll_cc = -math.inf if bad.any() else float(np.sum(np.where(w > 0, row_ll, 0.0) * w))

    entries: list[EntryComparison] = []
    for name in network.free_names:
        node = network.node(name)
        f2 = full_p[name].reshape(-1, node.card)
        c2 = cc_p[name].reshape(-1, node.card)
        nu = np.asarray(cc_counts[name]).reshape(-1, node.card).sum(axis=1)
        s2 = se_map[name].reshape(-1, node.card) if name in se_map else None
        for i, labels in enumerate(network.parent_config_labels(name)):
            for j, st in enumerate(node.states):
                d = float(c2[i, j] - f2[i, j])
                sev = None if s2 is None or not np.isfinite(s2[i, j]) else float(s2[i, j])
                z = d / sev if sev is not None and sev > 0 else None
                entries.append(EntryComparison(name, tuple(zip(node.parents, labels)), st, float(f2[i, j]),
                                               float(c2[i, j]), d, sev, z,
                                               bool(nu[i] > SUPPORT_MIN * max(1.0, n_complete))))
    return CompleteCaseComparison(
        source=data.source, entries=tuple(entries), n_rows=total, n_complete=n_complete,
        n_discarded=total - n_complete, share_discarded=(total - n_complete) / total if total else 0.0,
        loglik_full=float(full.log_likelihood), loglik_complete_case=ll_cc, n_impossible=float(w[bad].sum()),
        se_source=se_source, converged_full=bool(full.converged), converged_complete_case=bool(ccfit.converged),
        method=str(getattr(full, "method", "")))


# ================================================================================ AIC / BIC
@dataclass(frozen=True)
class InformationCriteria:
    """AIC and BIC of a fit, with what they were computed from."""

    log_likelihood: float
    n_parameters: int
    n_effective: float
    aic: float
    bic: float
    objective: str
    #: parameters of monotone tables not counted because binding constraints remove them
    n_bound: int = 0

    def to_dict(self) -> dict[str, Any]:
        out = {"log_likelihood": _finite(self.log_likelihood), "n_parameters": self.n_parameters,
               "n_effective": _num(self.n_effective), "aic": _finite(self.aic), "bic": _finite(self.bic),
               "objective": self.objective,
               "definitions": "AIC = -2 log L + 2k; BIC = -2 log L + k ln n; k = free parameters of the estimated "
                              "CPTs (fixed CPTs excluded; a monotone table counts the dimension of the face of "
                              "its constraints that the estimate lies on); n = records with at least one "
                              "observed cell"}
        if self.n_bound:
            out["n_parameters_removed_by_binding_constraints"] = self.n_bound
        return out

    def format_text(self) -> str:
        txt = (f"AIC {self.aic:.3f}, BIC {self.bic:.3f} (log-likelihood {self.log_likelihood:.4f}; "
               f"k = {self.n_parameters} free parameters, fixed CPTs excluded"
               + (f", {self.n_bound} of monotone tables removed by binding constraints" if self.n_bound else "")
               + f"; n = {_fmt_n(self.n_effective)} records with at least one observed cell)")
        if self.objective == "map":
            txt += ("; the fit is MAP, so log L is taken at the posterior mode, not at the maximum (and k counts "
                    "every free parameter, those a prior shrinks too)")
        return txt


def information_criteria(network: Network, data: CodedData, fit: Any) -> InformationCriteria:
    """AIC and BIC for a fit (a FitResult, or a log-likelihood value) of ``data``.

    ``n`` is the weight of the records with at least one observed cell; ``k`` is
    :meth:`Network.n_free_parameters` (fixed CPTs excluded).
    """
    if isinstance(fit, (int, float, np.floating)):
        ll, objective = float(fit), "mle"
    else:
        ll, objective = float(fit.log_likelihood), str(getattr(fit, "objective", "mle"))
    k = int(network.n_free_parameters())
    k_bound = 0
    probs = getattr(fit, "probs", None)
    if probs is not None:
        # a monotone table counts the dimension of the face its estimate lies on (binding
        # constraints pool configurations; adfit.monotone.face_dimension)
        from . import monotone as _mono

        for m in network.estimated_names:
            if _mono.is_monotone(network, m) and m in probs:
                n_fractions = _mono.fraction_shape(network, m)[0]  # R·(K − 1): the table's parameters
                k_bound += n_fractions - _mono.face_dimension(network, m, np.asarray(probs[m]))
    k -= k_bound
    obs = [network.index(nm) for nm in network.observed_names]
    seen = np.any(np.asarray(data.codes)[:, obs] != HIDDEN, axis=1) if obs else np.zeros(data.n_distinct, bool)
    n = float(np.asarray(data.counts)[seen].sum())
    if n <= 0:
        raise DataError(f"{data.source}: no record has an observed cell; AIC/BIC need observed data")
    return InformationCriteria(ll, k, n, -2.0 * ll + 2.0 * k, -2.0 * ll + k * math.log(n), objective, k_bound)


__all__ = ["ColumnGaps", "Pattern", "IndependenceTest", "ColumnReading", "GapsReport", "overview",
           "g2_test", "holm", "is_monotone", "MCAR_CAUTION",
           "EntryComparison", "CompleteCaseComparison", "compare_complete_case", "CC_CAUTION",
           "InformationCriteria", "information_criteria"]

"""Model assessment: held-out marginal log-likelihood by k-fold cross-validation over rows.

:func:`cross_validate` splits the records into ``K`` folds, fits the network on ``K - 1`` of
them and scores the held-out fold by its exact marginal log-likelihood (missing cells and latent
nodes summed out, as in the fit), for each fold in turn. The sum over the folds is the held-out
log-likelihood of every record; divided by the number of records it is comparable between
networks fitted to the same data (higher is better).

How records are split. With whole-number weights (one row per record, or a count column) the
*records* are split: the distinct rows are expanded to records, shuffled with ``seed`` and dealt
round-robin, so the folds differ in size by at most one record. With fractional weights a
distinct row is one unit that goes whole to one fold (its weight with it).

A held-out record can have probability 0 under the training estimates (a state or combination
never seen in training, with a maximum-likelihood fit); the held-out log-likelihood is then
``-inf`` and the number of such records is reported. A prior (MAP) avoids this.

The information criteria (AIC/BIC) live in :mod:`adfit.gaps` and are re-exported here.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Callable

import numpy as np

from .data import CodedData
from .errors import OptionError
from .gaps import InformationCriteria, information_criteria
from .network import Network

CV_FORMAT = "adfit-cv/1"
#: above this many records the split is drawn per distinct row (multinomial) instead of by
#: expanding the records, to bound memory
EXPAND_LIMIT = 20_000_000


@dataclass(frozen=True)
class FoldResult:
    fold: int
    n_train: float
    n_test: float
    heldout_loglik: float
    n_impossible: float
    converged: bool


@dataclass(frozen=True)
class CrossValidation:
    """Outcome of :func:`cross_validate`."""

    source: str
    folds: int
    seed: int
    split: str                     # "records" or "distinct rows"
    fold_results: tuple[FoldResult, ...]
    n_rows: float
    method: str

    @property
    def heldout_loglik(self) -> float:
        return float(sum(f.heldout_loglik for f in self.fold_results))

    @property
    def per_record(self) -> float:
        return self.heldout_loglik / self.n_rows if self.n_rows else math.nan

    @property
    def n_impossible(self) -> float:
        return float(sum(f.n_impossible for f in self.fold_results))

    def to_dict(self) -> dict[str, Any]:
        fin = lambda x: float(x) if math.isfinite(x) else None  # noqa: E731
        return {
            "format": CV_FORMAT, "source": self.source, "method": self.method, "folds": self.folds,
            "seed": self.seed, "split": self.split, "n_rows": _num(self.n_rows),
            "heldout_log_likelihood": fin(self.heldout_loglik), "per_record": fin(self.per_record),
            "records_impossible": _num(self.n_impossible),
            "fold_results": [{"fold": f.fold, "n_train": _num(f.n_train), "n_test": _num(f.n_test),
                              "heldout_log_likelihood": fin(f.heldout_loglik),
                              "records_impossible": _num(f.n_impossible), "converged": f.converged}
                             for f in self.fold_results],
        }

    def format_text(self) -> str:
        ll = f"{self.heldout_loglik:.4f}" if math.isfinite(self.heldout_loglik) else "-inf"
        pr = f"{self.per_record:.5f}" if math.isfinite(self.per_record) else "-inf"
        out = [f"Cross-validation ({self.folds} folds over {self.split}, seed {self.seed}, {self.method}): "
               f"held-out log-likelihood {ll} over {_fmt(self.n_rows)} records, {pr} per record"]
        if self.n_impossible > 0:
            out.append(f"  {_fmt(self.n_impossible)} held-out record(s) have probability 0 under their fold's "
                       f"estimates (values unseen in training); a prior (MAP) avoids this")
        bad = [f.fold for f in self.fold_results if not f.converged]
        if bad:
            out.append(f"  the fit of fold(s) {', '.join(map(str, bad))} did not converge")
        return "\n".join(out)


def _num(x: float) -> float | int:
    x = float(x)
    return int(x) if x.is_integer() else x


def _fmt(x: float) -> str:
    x = float(x)
    return f"{int(x):,}" if x.is_integer() else f"{x:,.2f}"


def fold_counts(data: CodedData, folds: int, seed: int = 0) -> tuple[np.ndarray, str]:
    """Held-out weight of every distinct row in every fold: ``(K, n_distinct)``, and the split kind.

    The rows of the result sum to ``data.counts`` (every record is held out exactly once).
    """
    if isinstance(folds, bool) or not isinstance(folds, (int, np.integer)) or folds < 2:
        raise OptionError(f"--folds must be a whole number >= 2 (got {folds!r})")
    w = np.asarray(data.counts, dtype=np.float64)
    rng = np.random.default_rng(seed)
    k = int(folds)
    from .limits import check_memory

    check_memory(f"--folds {k} over {len(w):,} distinct rows", float(k) * len(w) * 8 * 2,
                 "give fewer --folds (5 or 10 is common practice)")
    out = np.zeros((k, len(w)))
    if np.all(w == np.round(w)):
        wi = np.round(w).astype(np.int64)
        n = int(wi.sum())
        if n < k:
            raise OptionError(f"--folds {k} is more than the {n} records; use at most {n} folds")
        if n <= EXPAND_LIMIT:
            rec = np.repeat(np.arange(len(w)), wi)
            rng.shuffle(rec)
            fold = np.arange(n) % k
            for f in range(k):
                out[f] = np.bincount(rec[fold == f], minlength=len(w))
        else:
            out[:] = rng.multinomial(wi, np.full(k, 1.0 / k)).T
        return out, "records"
    if len(w) < k:
        raise OptionError(f"--folds {k} is more than the {len(w)} distinct weighted rows; use at most {len(w)} folds")
    perm = rng.permutation(len(w))
    out[np.arange(len(w)) % k, perm] = w[perm]
    return out, "distinct rows"


def _default_fit(network: Network, data: CodedData, **kwargs: Any):
    from .fit import fit
    return fit(network, data, **kwargs)


def cross_validate(network: Network, data: CodedData, *, folds: int = 5, seed: int = 0,
                   fit_fn: Callable[..., Any] | None = None, **fit_kwargs: Any) -> CrossValidation:
    """K-fold cross-validated marginal log-likelihood (module docstring).

    Args:
        network, data: the network and all coded rows.
        folds: K >= 2.
        seed: seed of the split (the fits get their own ``seed`` through ``fit_kwargs``).
        fit_fn: called as ``fit_fn(network, training_data, **fit_kwargs)``, returns a FitResult;
            default :func:`adfit.fit.fit` (``adfit.em.fit_em`` also fits).
        fit_kwargs: passed to every fit (prior, tolerances, restarts ...).

    Raises:
        OptionError: ``folds`` out of range.
    """
    from .em import EStep

    fit_fn = fit_fn or _default_fit
    held, split = fold_counts(data, folds, seed)
    w = np.asarray(data.counts, dtype=np.float64)
    estep = EStep(network, data)   # one evaluator of every distinct row, reused by all folds
    results = []
    method = ""
    for f in range(held.shape[0]):
        train_w = w - held[f]
        train_w[np.abs(train_w) < 1e-9 * max(1.0, w.max())] = 0.0
        keep = train_w > 0
        train = CodedData(data.codes[keep], train_w[keep], None, f"{data.source} (fold {f + 1} training rows)")
        res = fit_fn(network, train, **fit_kwargs)
        method = str(getattr(res, "method", ""))
        _, row_ll = estep({k: np.asarray(v, dtype=np.float64) for k, v in res.probs.items()})
        test = held[f]
        bad = np.isneginf(row_ll) & (test > 0)
        ll = -math.inf if bad.any() else float(np.sum(np.where(test > 0, row_ll, 0.0) * test))
        results.append(FoldResult(f + 1, float(train_w.sum()), float(test.sum()), ll, float(test[bad].sum()),
                                  bool(getattr(res, "converged", True))))
    return CrossValidation(data.source, int(folds), int(seed), split, tuple(results), float(w.sum()), method)


__all__ = ["FoldResult", "CrossValidation", "fold_counts", "cross_validate", "InformationCriteria",
           "information_criteria", "EXPAND_LIMIT"]

"""The ``Likelihood`` class (a plan built once, evaluated many times) and the public functions
around it: CPT/logit conversions, ``check_possible``, ``score``.
"""

from __future__ import annotations

import dataclasses
import math
from typing import Iterable, Mapping, Sequence

import numpy as np

from .._jax import jax, jnp  # float64 on before anything else (adfit/_jax.py)
from ..data import CodedData
from ..errors import ImpossibleDataError, OptionError
from ..network import Network
from .barren import _narrow_flat
from .blocks import GatheredBlock, Plan
from .evaluation import (_loglik_logcpt, _rows_loglik, _value_and_expected_counts,
                         _value_and_flat_expected_counts)
from .layout import layout_size, _st
from .plan import build_plan
from .sharding import _parts, _run_parts, Shards, _split, _traced


def _logcpts_from_logits(network: Network, logits: Mapping[str, jax.Array]) -> list[jax.Array]:
    out = []
    for n in network.nodes:
        if n.fixed is None:
            out.append(jax.nn.log_softmax(logits[n.name], axis=-1))
        else:
            with np.errstate(divide="ignore"):
                out.append(jnp.asarray(np.log(network.fixed_table(n.name))))
    return out




def _assemble_rows(plan: Plan, codes: np.ndarray, lcs: Sequence[np.ndarray], parts: Sequence[np.ndarray]) -> np.ndarray:
    """Per distinct row: its observed families (numpy) plus its components' values."""
    network = plan.network
    codes = np.asarray(codes)
    out = np.zeros(plan.n_distinct)
    local = plan.observed_rows
    if local is not None and local.any():
        obs = codes >= 0
        pa = _st(network).parents
        for v in range(len(network)):
            fam = (*pa[v], v)
            ok = np.flatnonzero(local & obs[:, fam].all(axis=1))
            if ok.size:
                out[ok] += lcs[v][tuple(codes[ok, u] for u in fam)]
    for blk, mp, vals in zip(plan.groups, plan.maps, parts):
        if mp is None:
            continue
        rows, inst = mp
        np.add.at(out, rows, vals[inst])
    return out


# --------------------------------------------------------------------------- public API
class Likelihood:
    """The marginal log-likelihood of one data set under one network, ready to evaluate.

    >>> lik = Likelihood(network, data)          # doctest: +SKIP
    >>> lik.value(logits), lik.value_and_grad(logits)  # doctest: +SKIP

    ``logits`` is a dict of arrays for the free nodes, shaped ``network.cpt_shape(name)``.
    Compiled once per network and data layout; evaluations reuse the compiled program.
    """

    def __init__(self, network: Network, data: CodedData, *, route: str = "auto", chunk: int | None = None):
        self.network = network
        self.data = data
        plan = build_plan(network, data, route=route, chunk=chunk)
        self._codes = _split(plan, plan.codes, weights=False)
        self._weights = _split(plan, plan.weights, weights=True)
        # the device copies are the data from now on: release the plan's host arrays
        self.plan = dataclasses.replace(plan, codes=(), weights=())
        self.free = network.free_names

    # -- log-CPT level (all nodes) ---------------------------------------------------------
    def logcpts(self, logits: Mapping[str, jax.Array]) -> tuple[jax.Array, ...]:
        return tuple(_logcpts_from_logits(self.network, logits))

    def value_logcpt(self, logcpts: Sequence[jax.Array]) -> jax.Array:
        logcpts = tuple(logcpts)
        parts = _parts(self._codes, self._weights)
        if len(parts) > 1 and not _traced(logcpts):
            res = _run_parts(lambda cs, ws: _loglik_logcpt(self.network, self.plan.groups, logcpts, cs, ws), parts,
                             (id(self.network), self.plan.groups, "v"))
            return jnp.asarray(sum(float(v) for v in res))
        return _loglik_logcpt(self.network, self.plan.groups, logcpts, self._codes, self._weights)

    def expected_counts_logcpt(self, logcpts: Sequence[jax.Array]):
        """(log-likelihood, expected family counts N(x,u) per node, CPT-shaped)."""
        return _value_and_expected_counts(self.network, self.plan.groups, tuple(logcpts), self._codes, self._weights)

    def observed_family_counts(self):
        """The data counts of the families with every member observed, as the plan gathered them
        (no pass over the rows): ``(counts, rows)``, ``counts`` flat in the layout of
        :func:`layout_of` (for each node, the summed weights of the counted rows in which the node
        and all its parents are observed, by family configuration) and ``rows`` the bool mask of
        the distinct rows counted (those of the per-pattern route); ``None`` when the plan has no
        gathered block (every row in the uniform program)."""
        for i, blk in enumerate(self.plan.groups):
            if isinstance(blk, GatheredBlock):
                w = self._weights.parts[0][i] if isinstance(self._weights, Shards) else self._weights[i]
                return _narrow_flat(self.plan.groups, np.asarray(w))[:layout_size(self.network)], self.plan.observed_rows
        return None

    def expected_counts_flat(self, lc_flat):
        """(log-likelihood, expected family counts) with the log-CPTs of all nodes given as one
        flat vector (network order, each CPT raveled; :func:`layout_of`) and the counts returned
        the same way, plus two trailing entries to ignore (:func:`_value_and_flat_expected_counts`)."""
        return _value_and_flat_expected_counts(self.network, self.plan.groups, lc_flat, self._codes, self._weights)

    # -- logits level (free nodes) ---------------------------------------------------------
    def value(self, logits: Mapping[str, jax.Array]) -> jax.Array:
        return self.value_logcpt(self.logcpts(logits))

    def value_and_grad(self, logits: Mapping[str, jax.Array]):
        """(log-likelihood, dict of gradients w.r.t. the logits of the free nodes)."""
        return _value_and_grad_logits(self, logits)

    def expected_counts(self, probs: Mapping[str, np.ndarray]) -> tuple[float, dict[str, np.ndarray]]:
        """Log-likelihood and expected family counts for CPTs given as probabilities."""
        lc = logcpts_from_probs(self.network, probs)
        val, g = self.expected_counts_logcpt(lc)
        return float(val), {n: np.asarray(x) for n, x in zip(self.network.names, g)}

    def row_logliks(self, probs: Mapping[str, np.ndarray]) -> np.ndarray:
        """Log-likelihood of every distinct row (in the order of ``data.codes``)."""
        lc = tuple(logcpts_from_probs(self.network, probs))
        per = [_rows_loglik(self.network, self.plan.groups, lc, cs) for cs in self._codes.parts]
        parts = [np.concatenate([np.asarray(p[b]) for p in per]) for b in range(len(self.plan.groups))]
        return _assemble_rows(self.plan, self.data.codes, [np.asarray(x) for x in lc], parts)


def _value_and_grad_logits(lik: Likelihood, logits: Mapping[str, jax.Array]):
    logits = {k: jnp.asarray(logits[k]) for k in lik.free}
    lc, vjp = jax.vjp(lambda lg: lik.logcpts(lg), logits)
    val, counts = lik.expected_counts_logcpt(lc)
    (g,) = vjp(tuple(jnp.asarray(c) for c in counts))
    return val, g


def logcpts_from_probs(network: Network, probs: Mapping[str, np.ndarray]) -> tuple[jax.Array, ...]:
    out = []
    with np.errstate(divide="ignore"):
        for n in network.nodes:
            t = network.fixed_table(n.name) if n.fixed is not None else np.asarray(probs[n.name], dtype=np.float64)
            out.append(jnp.asarray(np.log(t)))
    return tuple(out)


def probs_from_logits(network: Network, logits: Mapping[str, jax.Array]) -> dict[str, np.ndarray]:
    """Probabilities of every node (fixed ones included) from the logits of the free nodes."""
    out = {}
    for n in network.nodes:
        if n.fixed is None:
            e = np.asarray(logits[n.name], dtype=np.float64)
            e = np.exp(e - e.max(axis=-1, keepdims=True))  # numpy: eager JAX compiles per shape
            out[n.name] = e / e.sum(axis=-1, keepdims=True)
        else:
            out[n.name] = network.fixed_table(n.name)
    return out


def logits_from_probs(network: Network, probs: Mapping[str, np.ndarray], floor: float = 1e-300, *,
                      names: Iterable[str] | None = None) -> dict[str, jax.Array]:
    """Logits (log-probabilities, row max shifted to 0) of the free nodes (or of ``names``)."""
    out = {}
    for name in (network.free_names if names is None else names):
        lp = np.log(np.maximum(np.asarray(probs[name], dtype=np.float64), floor))
        out[name] = lp - lp.max(axis=-1, keepdims=True)
    return out


def _prepared(likelihood: Likelihood | None, network: Network, data: CodedData, caller: str) -> Likelihood:
    """``likelihood`` when it was built for ``network`` and ``data``, else a new one (None)."""
    if likelihood is None:
        return Likelihood(network, data)
    other_net = likelihood.network is not network and likelihood.network != network
    if other_net or likelihood.data is not data:
        what = "network" if other_net else "data (not the same CodedData object)"
        raise OptionError(f"{caller}: the likelihood= given was built for another {what}; pass the "
                          f"Likelihood(network, data) of these arguments, or none")
    return likelihood


def zero_sources(network: Network, given: str | None) -> tuple[str, str]:
    """``(under what, what to check)`` for a message about rows of probability 0: the fixed CPTs
    only when the network has some, the impossible cells only when it declares some, and
    ``given`` (the CPTs the caller evaluates, e.g. "the CPTs of --params")."""
    under, check = [], []
    if network.fixed_names:
        under.append("the fixed CPTs")
        check.append("the fixed tables")
    if any(n.impossible for n in network.nodes if n.fixed is None):
        under.append("the impossible cells")
        check.append("the impossible cells")
    if given and network.free_names:
        under.append(given)
        check.append(given)
    if not under:
        under, check = ["the CPTs"], ["the CPTs"]
    return " and ".join(under), ", ".join(check)


def check_possible(lik: Likelihood, probs: Mapping[str, np.ndarray], *, given: str | None = "the CPTs given") -> None:
    """Raise ImpossibleDataError naming the rows with probability zero under ``probs``.

    ``given`` says where the free nodes' CPTs come from (the message names the fixed CPTs only
    when the network has some). The per-row pass (a separate compiled program) runs only when
    the total is not finite.
    """
    total, _ = lik.expected_counts(probs)
    if math.isfinite(total):
        return
    ll = lik.row_logliks(probs)
    bad = np.flatnonzero(~np.isfinite(ll))
    if bad.size:
        from ..data import decode
        df = decode(lik.network, lik.data.codes[bad[:3]])
        shown = "; ".join(", ".join(f"{c}={v}" for c, v in r.items() if v is not None) for r in df.to_dict("records"))
        under, check = zero_sources(lik.network, given)
        raise ImpossibleDataError(
            f"{lik.data.source}: {bad.size} distinct row(s) have probability 0 under {under} "
            f"(log-likelihood -inf), e.g. [{shown}]; check {check} or the records")


def score(network: Network, data: CodedData, probs: Mapping[str, np.ndarray], *,
          pseudo_counts: Mapping[str, np.ndarray] | None = None,
          likelihood: Likelihood | None = None) -> dict[str, float]:
    """Marginal log-likelihood and gradient norm (w.r.t. the free logits) of given CPTs.

    The gradient norm is that of the objective (log-likelihood plus log-prior when
    ``pseudo_counts`` are given): per free node the logit gradient is
    ``N(x,u) + c(x,u) - theta(x|u) (N(u) + c(u))`` in units of records (for a set of tied nodes,
    one gradient with their counts added; impossible cells contribute 0). A noisy_or / noisy_max
    / logistic node's gradient is taken w.r.t. the logits of its parameter rows, read off its
    table (:func:`adfit.forms.rows_from_table`), with the prior on them: Dirichlet pseudo-counts on
    cause rows, and for a logistic node the normal prior on its coefficients (its entry of
    ``pseudo_counts`` holds the precisions 1/sd², :meth:`adfit.priors.Prior.pseudo_counts`).

    ``likelihood``: a :class:`Likelihood` already built for this ``network`` and this ``data``
    (the same object), to reuse its plan and compiled program (a command that also checks or
    evaluates builds one and passes it everywhere); by default one is built here.
    """
    lik = _prepared(likelihood, network, data, "score")
    ll, counts = lik.expected_counts(probs)
    gn2 = 0.0
    for name in network.estimated_names:  # a tied node's family counts add to its source's
        th = np.asarray(probs[name], dtype=np.float64)
        n_xu = sum((counts[t] for t in network.tied_names(name)), counts[name])
        from .. import forms

        if forms.has_rows(network, name):  # parameter rows (noisy, logistic, monotone fractions)
            rows = forms.rows_from_table(network, name, th)
            a = forms.virtual_counts(network, name, rows, n_xu)
            c = None if pseudo_counts is None or name not in pseudo_counts else np.asarray(pseudo_counts[name])
            if c is not None and network.cpd_form(name) != "logistic" and c.shape == a.shape:
                a = a + c  # Dirichlet pseudo-counts on the cause rows
            g = a - rows * a.sum(axis=-1, keepdims=True)
            if c is not None and network.cpd_form(name) == "logistic" and c.shape == a.shape:
                # a normal prior on the coefficients (c: its precisions 1/sd²): −prec·β, β = log-odds
                with np.errstate(divide="ignore"):
                    lr = np.log(rows)
                b = c * (lr - lr[:, :1])
                g = g - b
                g[:, 0] += b[:, 1:].sum(axis=1)
            gn2 += float(np.sum(g * g))
            continue
        n_xu = n_xu + (0.0 if pseudo_counts is None or name not in pseudo_counts else pseudo_counts[name])
        g = n_xu - th * n_xu.sum(axis=-1, keepdims=True)
        gn2 += float(np.sum(g * g))
    return {"log_likelihood": ll, "gradient_norm": math.sqrt(gn2)}

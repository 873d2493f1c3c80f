"""Missing-not-at-random sensitivity analysis by a selection model (``adfit sensitivity``).

Every fit assumes MAR: whether a cell is missing may depend on the observed cells, not on its own
unrecorded value. MAR cannot be tested from the data. This module asks how far the answer moves
if it does not hold: for each *shifted* node ``X`` with a chosen state ``S`` and each odds value
``r`` of a grid, the network is refitted under the assumption that, given the chosen observed
predictors ``Z`` of the missingness, the odds that a cell of ``X`` is missing are ``r`` times
higher when ``X``'s true value is ``S`` than when it is any other state.

The model (docs/method.md, "Missing-not-at-random sensitivity"): a missingness indicator ``R_X``
(observed in every record: 1 where ``X``'s cell is missing) is added to the network as a child of
``X`` and of the predictors ``Z``, with

    P(R_X = 1 | x, z) = sigmoid(alpha(z) + log r · [x = S]),

``alpha(z)`` free (one intercept per configuration of ``Z``; one intercept when ``Z`` is empty)
and ``log r`` fixed. The other nodes keep their full tables. The exact log-likelihood of the
observed cells and of the missingness pattern is evaluated by the JAX core on this augmented
network (:mod:`adfit.likelihood`): its gradient with respect to the log-CPTs are the expected
family counts, chained here by hand to the logits of the tables (:func:`adfit.params.head_np`,
:func:`adfit.params.head_grad_np`) and to the intercepts. At ``r = 1`` the indicator factorises
out (MAR) and the tables are those of ``adfit fit``.

Each refit is warm-started from its neighbour along the odds grid, starting from the MAR fit at
``r = 1``. Targets are marginal probabilities ``P(NODE = STATE)`` under the fitted network, with
error bars from the observed information of the selection model's log-likelihood (dense, up to
:data:`MAX_ERROR_PARAMETERS` coordinates) and the delta method. With a threshold and one target,
the tipping point (the odds at which the target crosses it) is found by Brent's method on
``log r`` between the grid points where it crosses, each evaluation a warm-started refit.

Caution (printed with every result): the odds are assumptions, not estimates; the data carry no
information about them; a plausible range must come from subject knowledge.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterable, Mapping, Sequence

from ._jax import jnp  # first: float64 on (adfit/_jax.py)
import numpy as np

from .data import HIDDEN, CodedData, load_data
from .errors import OptionError, ResultError
from .likelihood import Likelihood, check_possible
from .network import Network, Node
from .params import fixed_log_tables, free_layout, head_grad_np, head_np, mask_pseudo

__all__ = ["FORMAT", "Shift", "SensitivityResult", "sensitivity_analysis", "augment_network", "augment_data",
           "parse_odds", "parse_targets", "write_sensitivity", "load_sensitivity", "validate_sensitivity_doc",
           "format_sensitivity", "CAUTIONS", "MAX_ERROR_PARAMETERS"]

FORMAT = "adfit-sensitivity/1"
#: states of a missingness indicator (index 1: the cell is missing)
INDICATOR_STATES = ("observed", "missing")
#: error bars are computed up to this many coordinates (a dense observed information: P² floats)
MAX_ERROR_PARAMETERS = 1000
#: confidence level of the intervals (Wald on the logit scale)
LEVEL = 0.95
#: a refit is converged when the gradient norm of the objective (records) is at most this × records
GTOL = 1e-8
#: most L-BFGS iterations of one refit
MAX_ITER = 3000
#: the tipping point is found to this accuracy on log r
TIP_XTOL = 1e-7
_SCALE_EPS = 0.1  # as the fit's preconditioner (adfit.fit.SCALE_EPS)

CAUTIONS = (
    "The odds are assumptions, not estimates: each row is the answer IF the odds that a cell is missing "
    "were that many times higher when its true value is the shifted state.",
    "The data carry no information about the odds: the selection model fits the records about equally well "
    "for every odds value (exactly equally in the simplest case: compare the log-likelihood column).",
    "The plausible range of odds must come from subject knowledge (how records come to be missing), not from "
    "this analysis.",
    "The analysis supports, and does not replace, engineering or clinical judgement; local codes, regulations "
    "and licensed practice come first.",
)


@dataclass(frozen=True)
class Shift:
    """One shifted node: the odds of its cell being missing are multiplied by r when it is ``state``."""

    node: str
    state: str


# --------------------------------------------------------------------------- parsing options
def parse_odds(value: str | Sequence[float]) -> tuple[float, ...]:
    """``"0.25,0.5,1,2,4"`` (or numbers) → sorted distinct positive odds, 1 added when absent."""
    items = [v.strip() for v in value.split(",")] if isinstance(value, str) else list(value)
    out = []
    for v in items:
        if isinstance(v, str) and not v:
            continue
        try:
            x = float(v)
        except (TypeError, ValueError):
            raise OptionError(f"--odds {v!r}: not a number; give positive odds ratios separated by commas, "
                              f"e.g. --odds 0.25,0.5,1,2,4") from None
        if not math.isfinite(x) or x <= 0:
            raise OptionError(f"--odds {v}: odds must be finite and > 0 (1 is MAR); give e.g. --odds 0.25,0.5,1,2,4")
        out.append(x)
    if not out:
        raise OptionError("--odds: no value given; give positive odds ratios, e.g. --odds 0.25,0.5,1,2,4")
    return tuple(sorted(set(out) | {1.0}))


def parse_targets(network: Network, items: Iterable[str] | None, shifts: Sequence[Shift]) -> tuple[tuple[str, str], ...]:
    """``["wear=heavy"]`` → ``(("wear", "heavy"),)``; default: every state of every shifted node."""
    items = list(items or [])
    if not items:
        return tuple((s.node, st) for s in shifts for st in network.node(s.node).states)
    out = []
    for item in items:
        if "=" not in item:
            raise OptionError(f"--target {item!r}: write NODE=STATE, e.g. --target {shifts[0].node}="
                              f"{shifts[0].state}")
        node, state = (s.strip() for s in item.split("=", 1))
        if not node or not state:
            raise OptionError(f"--target {item!r}: write NODE=STATE with both parts, e.g. --target "
                              f"{shifts[0].node}={shifts[0].state}")
        from .impute import check_node_state  # the check (with did-you-mean) that --given uses

        check_node_state(network, node, state, f"--target {item}")
        if (node, state) not in out:
            out.append((node, state))
    return tuple(out)


def check_shifts(network: Network, coded: CodedData | None, shifts: Sequence[Shift],
                 predictors: Sequence[str]) -> None:
    """One-line refusals of shifted nodes, states and predictors that cannot be used."""
    if not shifts:
        raise OptionError("--node: give the node whose gaps may depend on its own value, e.g. --node wear --state heavy")
    seen = set()
    for s in shifts:
        if s.node not in network:
            raise OptionError(f"--node {s.node}: not a node of the network; the nodes are: {', '.join(network.names)}")
        node = network.node(s.node)
        if node.latent:
            raise OptionError(f"--node {s.node}: is latent (never recorded), so it has no gaps to shift; "
                              f"choose a recorded node")
        if s.state not in node.states:
            raise OptionError(f"--state {s.state}: not a state of {s.node!r}; its states are: {', '.join(node.states)}")
        if s.node in seen:
            raise OptionError(f"--node {s.node}: given twice; give each shifted node once")
        seen.add(s.node)
        if coded is not None and not np.any(coded.codes[:, network.index(s.node)] == HIDDEN):
            raise OptionError(f"--node {s.node}: has no missing cells in {coded.source}, so there is nothing to "
                              f"shift; choose a node with gaps")
    for z in predictors:
        if z not in network:
            raise OptionError(f"--predictor {z}: not a node of the network; the nodes are: {', '.join(network.names)}")
        if network.node(z).latent:
            raise OptionError(f"--predictor {z}: is latent; the missingness may depend on recorded nodes only")
        if z in seen:
            raise OptionError(f"--predictor {z}: is a shifted node; its own value already enters through the odds")
    if len(set(predictors)) != len(predictors):
        raise OptionError("--predictor: a node is given twice; give each predictor once")
    refusal = network.unsupported_structure(("table",), what="adfit sensitivity")
    if refusal is not None:
        raise OptionError(refusal)


# --------------------------------------------------------------------------- the augmented network
def indicator_name(network: Network, node: str) -> str:
    name = f"{node}_missing"
    while name in network:
        name += "_"
    return name


def augment_network(network: Network, shifts: Sequence[Shift], predictors: Sequence[str] = ()) -> Network:
    """The network with one missingness indicator per shifted node (parents: the node, then the
    predictors), appended after every node (free tables here; their form is imposed by the head)."""
    nodes = list(network.nodes)
    taken = Network(tuple(nodes))
    for s in shifts:
        name = indicator_name(taken, s.node)
        nodes.append(Node(name=name, states=INDICATOR_STATES, parents=(s.node, *predictors)))
        taken = Network(tuple(nodes))
    return taken


def augment_data(network: Network, coded: CodedData, shifts: Sequence[Shift]) -> CodedData:
    """The records with the indicators' columns (always observed: 1 where the node's cell is missing)."""
    dtype = coded.codes.dtype if coded.codes.dtype.kind == "i" else np.dtype(np.int32)  # the data's own (small) type
    cols = [(coded.codes[:, network.index(s.node)] == HIDDEN).astype(dtype) for s in shifts]
    codes = np.concatenate([coded.codes.astype(dtype, copy=False), np.stack(cols, axis=1)], axis=1)
    return CodedData(codes, coded.counts, None, coded.source)


# --------------------------------------------------------------------------- the selection model
class _Model:
    """The selection model's objective on one flat vector ``[scaled table logits, intercepts]``."""

    def __init__(self, network: Network, coded: CodedData, shifts: Sequence[Shift], predictors: Sequence[str],
                 pseudo_counts: Mapping[str, np.ndarray] | None):
        self.net = network
        self.shifts = tuple(shifts)
        self.predictors = tuple(predictors)
        self.aug = augment_network(network, shifts, predictors)
        self.data = augment_data(network, coded, shifts)
        self.lik = Likelihood(self.aug, self.data)
        self.lay = free_layout(network)
        self.fixed_flat = fixed_log_tables(network)
        pseudo = {}
        for name in network.estimated_names:
            c = None if pseudo_counts is None else pseudo_counts.get(name)
            pseudo[name] = np.zeros(network.cpt_shape(name)) if c is None else np.asarray(c, dtype=np.float64)
        self.pseudo_tree = mask_pseudo(network, pseudo)
        self.pseudo = self.lay.flatten(self.pseudo_tree)
        self.indicators = tuple(n.name for n in self.aug.nodes[len(network):])
        self.n_z = int(math.prod(network.node(z).card for z in predictors))
        self.cards_x = tuple(network.node(s.node).card for s in shifts)
        self.s_index = tuple(network.node(s.node).states.index(s.state) for s in shifts)
        self.seg = []  # (start, cx) of each indicator's CPT in the augmented flat layout
        off = self.lay.n_flat
        for cx in self.cards_x:
            self.seg.append((off, cx))
            off += cx * self.n_z * 2
        self.n_total = float(coded.counts.sum())
        self.P = self.lay.size
        self.size = self.P + len(shifts) * self.n_z
        self.scale = np.ones(self.size)
        self.log_r = 0.0
        self.evaluations = 0

    # -- pieces
    def offsets(self, log_r: float) -> list[np.ndarray]:
        out = []
        for cx, k in zip(self.cards_x, self.s_index):
            o = np.zeros(cx)
            o[k] = log_r
            out.append(o)
        return out

    def split(self, v: np.ndarray) -> tuple[np.ndarray, list[np.ndarray]]:
        """(table logits η, intercepts per shift) from a scaled vector."""
        u = v * self.scale
        a = u[self.P:].reshape(len(self.shifts), self.n_z)
        return u[:self.P], [a[i] for i in range(len(self.shifts))]

    def join(self, eta: np.ndarray, alphas: Sequence[np.ndarray]) -> np.ndarray:
        u = np.concatenate([eta] + [np.asarray(a, dtype=np.float64).ravel() for a in alphas])
        return u / self.scale

    def indicator_logcpts(self, alphas: Sequence[np.ndarray], log_r: float) -> list[np.ndarray]:
        parts = []
        for a, o in zip(alphas, self.offsets(log_r)):
            e = o[:, None] + a[None, :]  # (cx, n_z): the log-odds of 'missing'
            parts.append(np.stack([-np.logaddexp(0.0, e), -np.logaddexp(0.0, -e)], axis=-1).reshape(-1))
        return parts

    def fg(self, v: np.ndarray) -> tuple[float, np.ndarray]:
        """−F/N and its gradient w.r.t. the scaled vector (F = selection-model log-likelihood + log-prior)."""
        eta, alphas = self.split(v)
        lc, rest, blocks = head_np(self.lay, eta, np.ones(self.P), self.pseudo, self.fixed_flat, 0.0)
        lc_full = np.concatenate([lc] + self.indicator_logcpts(alphas, self.log_r))
        ll, counts = self.lik.expected_counts_flat(lc_full)
        counts = np.asarray(counts)
        self.evaluations += 1
        g_eta = head_grad_np(self.lay, blocks, np.ones(self.P), self.pseudo, 0.0, counts, self.n_total)
        g_a = []
        for (start, cx), a, o in zip(self.seg, alphas, self.offsets(self.log_r)):
            c = counts[start:start + cx * self.n_z * 2].reshape(cx, self.n_z, 2)
            p1 = 1.0 / (1.0 + np.exp(-(o[:, None] + a[None, :])))
            g_a.append(-(c[..., 1] - p1 * c.sum(axis=-1)).sum(axis=0) / self.n_total)
        g = np.concatenate([g_eta] + g_a) * self.scale
        f = -(float(ll) + rest) / self.n_total
        if not math.isfinite(f):
            return float("inf"), np.zeros_like(g)
        return f, g

    def probs(self, v: np.ndarray) -> dict[str, np.ndarray]:
        """CPTs of every node of the original network at ``v``."""
        eta, _ = self.split(v)
        out = {}
        for name, e in self.lay.unflatten(eta).items():
            e = np.where(self.net.impossible_mask(name), -np.inf, e) if self.net.node(name).impossible else e
            t = np.exp(e - e.max(axis=-1, keepdims=True))
            out[name] = t / t.sum(axis=-1, keepdims=True)
        for name in self.net.free_names:
            out.setdefault(name, out.get(self.net.tie_source(name)))
        for name in self.net.fixed_names:
            out[name] = self.net.fixed_table(name)
        return out

    def aug_probs(self, v: np.ndarray, log_r: float) -> dict[str, np.ndarray]:
        out = self.probs(v)
        _, alphas = self.split(v)
        for name, lc in zip(self.indicators, self.indicator_logcpts(alphas, log_r)):
            out[name] = np.exp(lc).reshape(self.aug.cpt_shape(name))
        return out

    def start_vector(self, probs: Mapping[str, np.ndarray]) -> np.ndarray:
        """The MAR start: the tables given, the intercepts from the share missing in each
        configuration of the predictors among the records where the predictors are observed."""
        eta = []
        for name in self.lay.names:
            lp = np.log(np.maximum(np.asarray(probs[name], dtype=np.float64), 1e-300))
            eta.append((lp - lp.max(axis=-1, keepdims=True)).ravel())
        eta = np.concatenate(eta) if eta else np.zeros(0)
        codes, w = self.data.codes, self.data.counts
        zi = [self.net.index(z) for z in self.predictors]
        zc = np.zeros(len(w), dtype=np.int64)
        ok = np.ones(len(w), dtype=bool)
        for j in zi:
            ok &= codes[:, j] != HIDDEN
            zc = zc * self.net.cards[j] + np.maximum(codes[:, j], 0)
        alphas = []
        for i in range(len(self.shifts)):
            miss = codes[:, len(self.net) + i] == 1
            m = np.bincount(zc[ok], weights=(w * miss)[ok], minlength=self.n_z) + 0.5
            n = np.bincount(zc[ok], weights=w[ok], minlength=self.n_z) + 1.0
            alphas.append(np.log(m / (n - m)))
        self.scale = np.ones(self.size)
        return self.join(eta, alphas)

    def set_scale(self, v: np.ndarray) -> np.ndarray:
        """Diagonal preconditioner at ``v`` (1/sqrt of the complete-data curvature per coordinate,
        as the fit's); returns ``v`` re-expressed in the new scaling."""
        eta, alphas = self.split(v)
        probs = self.aug_probs(v, self.log_r)
        _, counts = self.lik.expected_counts(probs)
        s = []
        for name in self.lay.names:
            c = counts[name] + sum(counts[t] for t in self.net.tied_names(name))
            nu = c.sum(axis=-1, keepdims=True) + self.pseudo_tree[name].sum(axis=-1, keepdims=True)
            s.append((1.0 / np.sqrt(nu * probs[name] + _SCALE_EPS)).ravel())
        for name in self.indicators:
            c = counts[name].reshape(-1, self.n_z, 2).sum(axis=0)
            n = c.sum(axis=-1)
            p = c[:, 1] / np.maximum(n, 1e-300)
            s.append(1.0 / np.sqrt(n * p * (1.0 - p) + _SCALE_EPS))
        self.scale = np.concatenate(s) if s else np.ones(0)
        return self.join(eta, alphas)


@dataclass
class _Solution:
    odds: float
    v: np.ndarray  # unscaled: [η, α]
    log_likelihood: float
    converged: bool
    gradient_norm: float
    iterations: int


def _refit(model: _Model, log_r: float, u0: np.ndarray, odds: float | None = None) -> _Solution:
    """Maximise the selection model at fixed log r from the unscaled start ``u0``."""
    from scipy.optimize import minimize

    model.log_r = float(log_r)
    model.scale = np.ones(model.size)
    v0 = model.set_scale(np.asarray(u0, dtype=np.float64))
    it = 0
    for _ in range(3):  # a fresh preconditioner at the point reached, if the first run stopped short
        res = minimize(model.fg, v0, jac=True, method="L-BFGS-B",
                       options={"maxiter": MAX_ITER, "maxcor": 30, "ftol": 1e-16, "gtol": 1e-13, "maxls": 40})
        it += int(res.nit)
        v0 = np.asarray(res.x)
        f, g = model.fg(v0)
        gnorm = float(np.linalg.norm(g / model.scale)) * model.n_total  # records, in (η, α)
        if gnorm <= GTOL * model.n_total:
            break
        v0 = model.set_scale(v0 * model.scale)
    u = v0 * model.scale
    model.scale = np.ones(model.size)
    f, _ = model.fg(u)
    lp = _log_prior(model, u)
    return _Solution(math.exp(log_r) if odds is None else float(odds), u, -f * model.n_total - lp, gnorm <= GTOL * model.n_total, gnorm, it)


def _log_prior(model: _Model, u: np.ndarray) -> float:
    """Σ c·log θ over the estimated nodes at ``u`` (0·log 0 = 0)."""
    probs = model.probs(u)
    total = 0.0
    for name, c in model.pseudo_tree.items():
        c = np.asarray(c, dtype=np.float64)
        with np.errstate(divide="ignore"):
            total += float(np.sum(np.where(c > 0, c * np.log(probs[name]), 0.0)))
    return total


# --------------------------------------------------------------------------- targets and error bars
class _Targets:
    """Marginals P(NODE = STATE) and their gradient w.r.t. the log-CPTs of the original network."""

    def __init__(self, network: Network, targets: Sequence[tuple[str, str]]):
        self.net = network
        self.targets = tuple(targets)
        self.liks: dict[tuple[str, str], Likelihood] = {}

    def _lik(self, node: str, state: str) -> Likelihood:
        key = (node, state)
        if key not in self.liks:
            row = np.full((1, len(self.net)), HIDDEN, dtype=np.int32)
            row[0, self.net.index(node)] = self.net.node(node).states.index(state)
            self.liks[key] = Likelihood(self.net, CodedData(row, np.ones(1), None, "<target>"))
        return self.liks[key]

    def evaluate(self, probs: Mapping[str, np.ndarray]) -> list[tuple[float, dict[str, np.ndarray]]]:
        """[(P(target), expected family counts given the target = ∂ log P/∂ log θ)] per target."""
        out = []
        for node, state in self.targets:
            ll, counts = self._lik(node, state).expected_counts(probs)
            out.append((math.exp(ll), counts))
        return out


def _error_bars(model: _Model, sol: _Solution, tvals, level: float) -> tuple[list[dict[str, Any]], str | None]:
    """SE and Wald interval (logit scale) of every target at ``sol``, from the observed information
    of the selection model in (table coordinates, intercepts), by the delta method."""
    from scipy import stats

    from .uncertainty import _INTERIOR, _Problem, make_coordinates

    empty = [{"se": None, "interval": None} for _ in tvals]
    aug = model.aug
    probs = model.aug_probs(sol.v, math.log(sol.odds))
    _, counts = model.lik.expected_counts(probs)
    n_cells = {}
    for name in aug.estimated_names:
        c = counts[name] + sum(counts[t] for t in aug.tied_names(name))
        n_cells[name] = c + (model.pseudo_tree[name] if name in model.pseudo_tree else 0.0)
    co = make_coordinates(aug, probs, n_cells)
    ind = set(model.indicators)
    n_table = sum(1 for c in co.coords if c[0] not in ind)
    n_alpha = len(model.shifts) * model.n_z
    if n_table + n_alpha > MAX_ERROR_PARAMETERS:
        return empty, (f"error bars not computed: {n_table + n_alpha} parameters, above the limit of "
                       f"{MAX_ERROR_PARAMETERS} for a dense observed information")
    # J: coordinates -> (table coordinates, intercepts). An indicator coordinate is ±(alpha(z) + offset).
    cols_alpha = {}
    keep_alpha = []
    for i, name in enumerate(model.indicators):
        st = co.status[name].reshape(-1, model.n_z, 2)
        for z in range(model.n_z):
            ok = bool(np.all(st[:, z, :] == _INTERIOR))
            if ok:
                cols_alpha[(name, z)] = len(keep_alpha)
                keep_alpha.append((i, z))
    J = np.zeros((co.size, n_table + len(keep_alpha)))
    t_col = 0
    for j, (name, row, k) in enumerate(co.coords):
        if name in ind:
            z = row % model.n_z
            col = cols_alpha.get((name, z))
            if col is not None:
                J[j, n_table + col] = 1.0 if k == 1 else -1.0
        else:
            J[j, t_col] = 1.0
            t_col += 1
    pseudo_aug = {n: (model.pseudo_tree[n] if n in model.pseudo_tree else np.zeros(aug.cpt_shape(n)))
                  for n in aug.free_names}
    pb = _Problem(aug, model.data, co, pseudo_aug, 0.0, 32, likelihood=model.lik)
    info = J.T @ pb.dense_information() @ J
    info = 0.5 * (info + info.T)
    w, V = np.linalg.eigh(info)
    tol = max(1e-9 * max(float(np.max(np.abs(w))), 1.0), 1e-12)
    note = None
    if np.any(w <= tol):
        note = (f"the observed information has {int(np.sum(w <= tol))} flat direction(s) (not identified); "
                f"error bars use its pseudo-inverse and hold only along the identified directions")
    inv = np.where(w > tol, 1.0 / np.where(w > tol, w, 1.0), 0.0)
    cov = (V * inv) @ V.T
    z = float(stats.norm.ppf(0.5 + level / 2))
    out = []
    table_coords = [c for c in co.coords if c[0] not in ind]
    for value, tcounts in tvals:
        g = np.zeros(J.shape[1])
        for j, (name, row, k) in enumerate(table_coords):
            e = tcounts[name] + sum(tcounts[t] for t in model.net.tied_names(name))
            e = e.reshape(-1, e.shape[-1])[row]
            th = co.probs[name][row]
            g[j] = e[k] - th[k] * e.sum()  # ∂ log P(target)/∂φ
        g *= value
        var = float(g @ cov @ g)
        if not (var >= 0 and math.isfinite(var)) or not 0 < value < 1:
            out.append({"se": None, "interval": None})
            continue
        se = math.sqrt(var)
        lg = math.log(value / (1 - value))
        half = z * se / (value * (1 - value))
        out.append({"se": se, "interval": [1 / (1 + math.exp(-(lg - half))), 1 / (1 + math.exp(-(lg + half)))]})
    return out, note


# --------------------------------------------------------------------------- the analysis
@dataclass
class SensitivityResult:
    """The rows of a sensitivity analysis (one per odds value) and its tipping point."""

    network: Network
    shifts: tuple[Shift, ...]
    predictors: tuple[str, ...]
    targets: tuple[tuple[str, str], ...]
    rows: list[dict[str, Any]]
    tipping_point: dict[str, Any] | None
    objective: str = "mle"
    n_rows: float = 0.0
    level: float = LEVEL
    notes: list[str] = field(default_factory=list)

    @property
    def odds(self) -> tuple[float, ...]:
        return tuple(r["odds"] for r in self.rows)

    def target_values(self, target: str) -> np.ndarray:
        return np.array([r["targets"][target]["value"] for r in self.rows])

    def probs_at(self, odds: float) -> dict[str, np.ndarray]:
        row = next(r for r in self.rows if r["odds"] == odds)
        return {n: np.asarray(sec["table"], dtype=np.float64).reshape(self.network.cpt_shape(n))
                for n, sec in row["nodes"].items()}

    def to_dict(self) -> dict[str, Any]:
        from .result import _jsonable

        one = len(self.shifts) == 1
        return _jsonable({
            "format": FORMAT,
            "node": self.shifts[0].node if one else [s.node for s in self.shifts],
            "state": self.shifts[0].state if one else [s.state for s in self.shifts],
            "shifts": [{"node": s.node, "state": s.state} for s in self.shifts],
            "predictors": list(self.predictors),
            "model": ("P(R_X = missing | X = x, predictors = z) = sigmoid(alpha(z) + log(odds) * [x = state]); "
                      "alpha(z) free, odds fixed per row; the other CPTs free tables"),
            "objective": self.objective,
            "n_rows": self.n_rows,
            "level": self.level,
            "targets": [f"{n}={s}" for n, s in self.targets],
            "rows": self.rows,
            "tipping_point": self.tipping_point,
            "notes": list(self.notes),
            "cautions": list(CAUTIONS),
            "network": self.network.to_dict(),
        })

    def format_text(self) -> str:
        return format_sensitivity(self.to_dict())


def _row(model: _Model, sol: _Solution, targets, tv, errs) -> dict[str, Any]:
    probs = model.probs(sol.v)
    ll_cells, _ = model.lik_cells.expected_counts(probs)
    _, alphas = model.split(sol.v)
    miss = {}
    for s, name, a, o in zip(model.shifts, model.indicators, alphas, model.offsets(math.log(sol.odds))):
        p1 = 1.0 / (1.0 + np.exp(-(o[:, None] + a[None, :])))
        miss[s.node] = {"indicator": name, "given": [s.node, *model.predictors],
                        "intercepts": a.tolist(), "probability_missing": p1.tolist()}
    return {
        "odds": sol.odds,
        "log_odds": math.log(sol.odds),
        "log_likelihood": sol.log_likelihood,
        "log_likelihood_cells": float(ll_cells),
        "converged": bool(sol.converged),
        "gradient_norm": sol.gradient_norm,
        "iterations": sol.iterations,
        "targets": {f"{n}={s}": {"value": v, **e} for (n, s), (v, _), e in zip(targets, tv, errs)},
        "nodes": {n: {"table": model.net.array_to_table(n, probs[n])} for n in model.net.names},
        "missingness": miss,
    }


def sensitivity_analysis(network: Network, data: Any, shifts: Sequence[Shift] | Shift, odds: Sequence[float] | str, *,
                         targets: Iterable[str] | None = None, predictors: Sequence[str] = (),
                         prior: Any = None, pseudo_counts: Mapping[str, np.ndarray] | None = None,
                         start: Mapping[str, np.ndarray] | None = None, threshold: float | None = None,
                         errors: bool = True, level: float = LEVEL, seed: int = 0, restarts: int | None = None,
                         progress: Callable[[str], None] | None = None) -> SensitivityResult:
    """Refit ``network`` under the selection model for every odds value (module docstring).

    Args:
        network, data: as for :func:`adfit.fit.fit` (data: a path, a DataFrame or CodedData).
        shifts: the shifted node(s) and state(s); the same odds apply to each.
        odds: the grid (numbers or ``"0.25,0.5,1,2,4"``); 1 (MAR) is always included.
        targets: ``NODE=STATE`` marginals to report (default: every state of each shifted node).
        predictors: recorded nodes the missingness may depend on besides the node's own value
            (one free intercept per configuration; default: one intercept).
        prior, pseudo_counts: a prior (MAP), as for :func:`adfit.fit.fit`.
        start: CPTs to start the MAR refit from (default: ``adfit fit``'s answer, computed here).
        threshold: with one target, find the odds at which it crosses this value.
        errors: compute error bars (up to :data:`MAX_ERROR_PARAMETERS` parameters).
        seed, restarts: of the MAR fit when ``start`` is not given.
        progress: called with a line of text after each refit.
    """
    if isinstance(shifts, Shift):
        shifts = (shifts,)
    shifts = tuple(shifts)
    predictors = tuple(predictors)
    grid = parse_odds(odds)
    check_shifts(network, None, shifts, predictors)
    tg = parse_targets(network, targets, shifts)
    if threshold is not None:
        if len(tg) != 1:
            raise OptionError(f"--threshold needs exactly one --target NODE=STATE (got {len(tg)}); "
                              f"name the probability whose tipping point you want")
        if not (math.isfinite(threshold) and 0 < threshold < 1):
            raise OptionError(f"--threshold {threshold}: a probability strictly between 0 and 1 is needed")
    if not 0 < level < 1:
        raise OptionError(f"level {level}: give a confidence level between 0 and 1, e.g. 0.95")
    coded = load_data(network, data)
    check_shifts(network, coded, shifts, predictors)
    if prior is not None and pseudo_counts is None:
        pseudo_counts = prior.pseudo_counts(network)
    say = progress or (lambda line: None)
    mar_note = None
    model = _Model(network, coded, shifts, predictors, pseudo_counts)
    model.lik_cells = Likelihood(network, coded)
    if start is None:
        from .fit import fit

        res = fit(network, coded, pseudo_counts=pseudo_counts, seed=seed, restarts=restarts, warn=False)
        start = res.probs
        if not res.converged:
            mar_note = f"the MAR fit did not meet its stopping rule ({res.stop_reason}); the grid starts from it"
        say(f"MAR fit: log-likelihood {res.log_likelihood:.4f}" + ("" if res.converged else " (NOT converged)"))
    check_possible(model.lik_cells, {**start, **{n: network.fixed_table(n) for n in network.fixed_names}})
    u0 = model.start_vector(start)
    sols: dict[float, _Solution] = {}
    sols[1.0] = _refit(model, 0.0, u0, 1.0)
    say(f"odds 1 (MAR): log-likelihood {sols[1.0].log_likelihood:.4f}")
    up = [r for r in grid if r > 1.0]
    down = [r for r in reversed(grid) if r < 1.0]
    for chain in (up, down):
        prev = sols[1.0]
        for r in chain:
            prev = sols[r] = _refit(model, math.log(r), prev.v, r)
            say(f"odds {r:g}: log-likelihood {prev.log_likelihood:.4f}" + ("" if prev.converged else " (NOT converged)"))
    tcalc = _Targets(network, tg)
    rows, notes = [], [mar_note] if mar_note else []
    for r in grid:
        sol = sols[r]
        tv = tcalc.evaluate(model.probs(sol.v))
        errs = [{"se": None, "interval": None} for _ in tg]
        if errors:
            errs, note = _error_bars(model, sol, tv, level)
            if note and note not in notes:
                notes.append(note)
        rows.append(_row(model, sol, tg, tv, errs))
    if not errors:
        notes.append("error bars not computed (errors=False / --no-errors)")
    tip = None
    if threshold is not None:
        tip = _tipping_point(model, tcalc, sols, grid, threshold, say)
    objective = "map" if pseudo_counts is not None and any(np.any(np.asarray(v) > 0) for v in pseudo_counts.values()) else "mle"
    return SensitivityResult(network, shifts, predictors, tg, rows, tip, objective, coded.n_rows, level, notes)


def _tipping_point(model: _Model, tcalc: _Targets, sols: dict[float, _Solution], grid: Sequence[float],
                   threshold: float, say: Callable[[str], None]) -> dict[str, Any]:
    """The odds at which the one target crosses ``threshold``: the crossing nearest to MAR (in
    log odds), refined by Brent's method on log r between the grid points that bracket it."""
    from scipy.optimize import brentq

    name = f"{tcalc.targets[0][0]}={tcalc.targets[0][1]}"
    vals = {r: tcalc.evaluate(model.probs(sols[r].v))[0][0] - threshold for r in grid}
    brackets = [(a, b) for a, b in zip(grid[:-1], grid[1:]) if vals[a] == 0 or vals[a] * vals[b] < 0]
    if vals[grid[-1]] == 0:
        brackets.append((grid[-1], grid[-1]))
    base = {"target": name, "threshold": threshold, "grid": [min(grid), max(grid)]}
    if not brackets:
        return {**base, "crossed": False, "odds": None, "log_odds": None,
                "note": f"{name} does not cross {threshold:g} within the grid of odds {min(grid):g} to {max(grid):g}"}
    a, b = min(brackets, key=lambda ab: min(abs(math.log(ab[0])), abs(math.log(ab[1]))))
    if vals[a] == 0 or a == b:
        lr, sol = math.log(a), sols[a]
    else:
        cache: dict[float, _Solution] = {}

        def h(lr: float) -> float:
            near = min(list(sols.values()) + list(cache.values()), key=lambda s: abs(math.log(s.odds) - lr))
            s = cache[lr] = _refit(model, lr, near.v)
            return tcalc.evaluate(model.probs(s.v))[0][0] - threshold

        lr = brentq(h, math.log(a), math.log(b), xtol=TIP_XTOL, rtol=1e-12, maxiter=100)
        sol = cache.get(lr) or _refit(model, lr, sols[a].v)
    value = tcalc.evaluate(model.probs(sol.v))[0][0]
    say(f"tipping point: {name} = {threshold:g} at odds {math.exp(lr):.6g}")
    return {**base, "crossed": True, "odds": math.exp(lr), "log_odds": lr, "between": [a, b],
            "value": value, "converged": bool(sol.converged),
            "note": f"{name} crosses {threshold:g} at odds {math.exp(lr):.4g} (between the grid points {a:g} and {b:g})"}


# --------------------------------------------------------------------------- files and text
def write_sensitivity(path: str | Path, result: SensitivityResult | Mapping[str, Any]) -> None:
    """Write the ``adfit-sensitivity/1`` JSON atomically."""
    from .io import write_json

    write_json(path, result.to_dict() if isinstance(result, SensitivityResult) else result)


def validate_sensitivity_doc(doc: Any, source: str = "<sensitivity>") -> None:
    """Raise ResultError (one line) unless ``doc`` is a readable ``adfit-sensitivity/1`` document."""
    def bad(msg: str) -> ResultError:
        return ResultError(f"{source}: {msg}; give the file written by adfit sensitivity --out")

    if not isinstance(doc, Mapping) or doc.get("format") != FORMAT:
        raise bad(f"not a sensitivity file (expected \"format\": \"{FORMAT}\")")
    rows = doc.get("rows")
    if not isinstance(rows, list) or not rows:
        raise bad("\"rows\" must be a non-empty list")
    targets = doc.get("targets")
    if not isinstance(targets, list) or not all(isinstance(t, str) for t in targets):
        raise bad("\"targets\" must be a list of NODE=STATE names")
    for i, r in enumerate(rows):
        if not isinstance(r, Mapping):
            raise bad(f"rows[{i}] is not an object")
        o = r.get("odds")
        if not isinstance(o, (int, float)) or isinstance(o, bool) or not (o > 0 and math.isfinite(o)):
            raise bad(f"rows[{i}].odds must be a positive number")
        tg = r.get("targets")
        if not isinstance(tg, Mapping):
            raise bad(f"rows[{i}].targets must be an object")
        for t in targets:
            v = tg.get(t, {}).get("value") if isinstance(tg.get(t), Mapping) else None
            if not isinstance(v, (int, float)) or isinstance(v, bool):
                raise bad(f"rows[{i}].targets[{t!r}].value must be a number")


def load_sensitivity(path: str | Path) -> dict[str, Any]:
    """Read and check a sensitivity JSON (one-line ResultError on any problem)."""
    import json

    p = Path(path)
    try:
        doc = json.loads(p.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise ResultError(f"{p}: sensitivity file not found (check the path)") from None
    except IsADirectoryError:
        raise ResultError(f"{p}: is a folder; give the JSON file written by adfit sensitivity --out") from None
    except (json.JSONDecodeError, UnicodeDecodeError) as e:
        raise ResultError(f"{p}: not a valid JSON file ({e}); give the file written by adfit sensitivity --out") from None
    validate_sensitivity_doc(doc, str(p))
    return doc


def _shift_text(doc: Mapping[str, Any]) -> str:
    shifts = doc.get("shifts") or [{"node": doc.get("node"), "state": doc.get("state")}]
    return " and ".join(f"{s['node']} = {s['state']}" for s in shifts)


def format_sensitivity(doc: Mapping[str, Any]) -> str:
    """The terminal table: one line per odds value, then the tipping point and the cautions."""
    targets = list(doc["targets"])
    pred = doc.get("predictors") or []
    lines = [f"Missing-not-at-random sensitivity: odds that a cell is missing when {_shift_text(doc)}, "
             f"relative to any other value, given " + (", ".join(pred) if pred else "nothing else (one intercept)")
             + " (odds 1 = MAR)"]
    head = ["odds", "log-lik (selection)", "log-lik (cells)", "conv"] + targets
    body = []
    for r in doc["rows"]:
        cells = [f"{r['odds']:g}" + (" MAR" if r["odds"] == 1 else ""), f"{r['log_likelihood']:.4f}",
                 f"{r['log_likelihood_cells']:.4f}", "yes" if r.get("converged") else "NO"]
        for t in targets:
            e = r["targets"][t]
            cells.append(f"{e['value']:.4f}" + (f" ± {e['se']:.4f}" if e.get("se") is not None else ""))
        body.append(cells)
    w = [max(len(h), *(len(b[i]) for b in body)) for i, h in enumerate(head)]
    lines.append("  ".join(h.rjust(w[i]) for i, h in enumerate(head)))
    for b in body:
        lines.append("  ".join(c.rjust(w[i]) for i, c in enumerate(b)))
    lls = [r["log_likelihood"] for r in doc["rows"]]
    lines.append(f"(± one standard error. The selection-model log-likelihood varies by {max(lls) - min(lls):.3g} "
                 f"across the grid: what little it varies comes from the network's own assumptions, not from "
                 f"evidence about why cells are missing; do not read it as an estimate of the odds.)")
    tip = doc.get("tipping_point")
    if tip:
        lines.append(f"Tipping point: {tip['note']}")
    for n in doc.get("notes") or []:
        lines.append(f"Note: {n}")
    lines.append("Cautions:")
    lines.extend(f"  - {c}" for c in doc.get("cautions") or CAUTIONS)
    return "\n".join(lines)

"""Several starts of one fit, run side by side, and the optima they reach.

**Running the starts together.** Each start is the ordinary single-start optimiser
(:meth:`adfit.fit.Fitter.run`: its own L-BFGS memory, its own diagonal preconditioner, its own
strong-Wolfe line search and the same stopping rule), run in a thread of its own. Every
objective evaluation a start asks for (a trial point of its line search, or the exact
expected counts when a stopping test fires) is handed to a driver that waits until every
unfinished start has asked, then evaluates all K points in **one** compiled call: the
expected-counts pass of :mod:`adfit.likelihood` and the softmax/prior head of :mod:`adfit.fit`
under ``jax.vmap`` over the K parameter sets, the data arrays shared (not batched). The L-BFGS
directions go the same way: the driver keeps the K memories stacked and updates those of the
starts that ask in one vmapped ``optax.scale_by_lbfgs`` update (the others keep theirs; a start
that begins a new phase gets a fresh memory); a round of directions is served before the
round of evaluations that follows it, so that the evaluation round carries every live start.
A start that has finished keeps a placeholder point in its slot and its result is ignored;
the compiled programs are the same every round (one compile per network, plan and K). When a
single start is left, its evaluations go to the single-start programs instead (compiled for
the fitter anyway), so a long last start does not pay for K slots. The threads only run the
optimiser's small numpy bookkeeping; their answers depend on their own evaluations alone, so
the result does not depend on how the threads are scheduled, and every start follows the path
it would follow alone (up to rounding in the last bits, since the batched programs may sum in
another order). Adam's updates stay per start; minibatch Adam (``batch_size``) samples rows
per step and runs its starts one after the other.

With K starts the intermediates of one chunk are K times those of a single start; the
likelihood's chunks are small (sized for the cache), so this adds little: on the 37-node
workload with 100 000 distinct rows the peak resident memory of a fit is 0.89 GB with one
start, 1.01 GB with 4 and 1.10 GB with 8 side by side (docs/performance.md, "Restarts").

**The optima.** After the starts stop, the end points of the starts that *converged* (their
stopping rule held, ``converged`` in the per-start rows) are grouped; a start that did not
converge is not an optimum: it is listed apart (``"not_converged"``: its objective, gradient norm
and residual, and whether it ended above the best converged objective) and counts in neither
the distinct optima nor the starts at the best objective. Two converged starts reached the
*same optimum* when their objectives agree within ``objective_rtol · max(1, |objective|)``
(``objective_rtol`` = 1e-6, :data:`adfit.crosscheck.LL_RTOL`: far above the rounding of a
converged objective, whose relative change is below ``tol`` = 1e-10, and far below the gaps
between the local maxima of latent models, which are whole log-likelihood units) and, after the
latent states are relabelled to match (:func:`adfit.crosscheck.align_latent_states`), every CPT
entry agrees within ``theta_atol``. CPT rows whose parent configuration has an expected count
below ``count_floor`` records at both points (not informed by the data) are left out of that
comparison. Each optimum is reported with its objective, log-likelihood, the starts that reached
it, the largest |Δθ| to the best optimum (relabelled), and whether it is *stationary*: the
gradient norm (records) is at most ``gtol`` × records, or the largest per-row residual in
probability units is at most ``ptol`` (the two thresholds of the stopping rule,
:mod:`adfit.fit`). Optima of the same objective as the best but different CPTs point to
parameters that the data do not identify (a flat ridge, e.g. three latent classes on four
binary items) or to equally high optima.

``"starts_at_best_objective"`` counts the converged starts whose objective is within
``objective_rtol · max(1, |best|)`` of the best converged objective (``"best_objective"``; the
absolute tolerance is ``"best_objective_tolerance"``), whatever their CPTs.

A :class:`adfit.errors.LocalOptimaWarning` is due when, of two or more starts, at most one
converged start reached the best objective: a higher optimum may then have been missed (or, with
none, no optimum was confirmed at all).
"""

from __future__ import annotations

import copy
import math
import threading
import types
from functools import partial
from typing import Any, Callable, Mapping, Sequence

from ._jax import jax, jnp  # first: float64 on before optax or anything else (adfit/_jax.py)
import numpy as np
import optax

from .crosscheck import LL_RTOL, THETA_ATOL, align_latent_states, relabel
from .params import free_layout, head as _head, head_grad as _head_grad
from .likelihood import _value_and_flat_expected_counts
from .network import Network

__all__ = ["run_starts", "BatchedObjective", "BatchedDirections", "summarise_optima", "restarts_report", "local_optima_message",
           "format_optima", "COUNT_FLOOR"]

#: CPT rows with an expected parent count below this many records (at both points compared)
#: are not informed by the data and are left out of |Δθ|
COUNT_FLOOR = 1e-6


# --------------------------------------------------------------------------- the batched objective
@partial(jax.jit, static_argnums=(0, 1))
def _batched_objective(network: Network, groups, z, scale, lc_given, use_given, pseudo, fixed_flat, l2, n_total,
                       codes, weights):
    """For K points at once: log-likelihood, −F/N, expected counts and ∂(−F/N)/∂z.

    Every parameter array is flat (:class:`adfit.params.FreeLayout`), stacked on axis 0. Slot ``i``
    is evaluated at the log-CPTs of the free nodes given in ``lc_given`` where ``use_given[i]``
    (the exact evaluation of :meth:`Fitter.evaluate`), else at ``softmax(z·scale)`` (a point of
    the optimiser, :func:`adfit.params.objective_fg`). The expected counts come back flat, in the
    likelihood's layout (two trailing entries to ignore).
    """
    lay = free_layout(network)

    def one(zi, si, lci, use):
        lc, rest = _head(network, zi, si, pseudo, fixed_flat, l2)
        given = lci if lay.full_index is None else jnp.concatenate([lci, fixed_flat])[lay.full_index]
        lc = jnp.where(use, given, lc)
        ll, counts = _value_and_flat_expected_counts(network, groups, lc, codes, weights)
        g = _head_grad(network, zi, si, pseudo, fixed_flat, l2, counts, n_total)
        return ll, -(ll + rest) / n_total, counts, g

    return jax.vmap(one)(z, scale, lc_given, use_given)


@partial(jax.jit, static_argnums=(0,))
def _batched_lbfgs(memory: int, grads, params, states, active, reset):
    """optax's L-BFGS direction and memory update for K starts (stacked on axis 0).

    A slot with ``reset`` starts from a fresh memory (a new phase); a slot that is not
    ``active`` keeps its memory (its direction is ignored).
    """
    opt = optax.scale_by_lbfgs(memory_size=memory)

    def one(g, p, st, act, rst):
        fresh = opt.init(p)
        st0 = jax.tree.map(lambda a, b: jnp.where(rst, a, b), fresh, st)
        d, new = opt.update(g, st0, p)
        return d, jax.tree.map(lambda a, b: jnp.where(act, a, b), new, st0)

    return jax.vmap(one)(grads, params, states, active, reset)


class _Memory:
    """Stands for a start's L-BFGS memory, which the driver keeps stacked with the others'.

    :meth:`Fitter.run` only hands the state back to the next :meth:`Fitter.lbfgs_direction`
    call; a state that is not a ``_Memory`` is a fresh one from ``init`` (a new phase).
    """

    __slots__ = ("slot",)

    def __init__(self, slot: int):
        self.slot = slot


class BatchedDirections:
    """L-BFGS directions of up to ``width`` starts in one vmapped call, each start with its own
    memory (kept here, stacked; the starts hold a :class:`_Memory` handle). Parameters,
    gradients and directions are flat vectors of the length of ``template``
    (:class:`adfit.params.FreeLayout`)."""

    def __init__(self, width: int, memory: int, template: np.ndarray):
        self.width = int(width)
        self.memory = int(memory)
        self.size = int(np.size(template))
        self.states = jax.vmap(optax.scale_by_lbfgs(memory_size=self.memory).init)(np.zeros((self.width, self.size)))
        self.calls = 0

    def __call__(self, requests: Mapping[int, tuple]) -> dict[int, tuple]:
        """``{slot: ("dir", memory, grad, state, params)}`` -> ``{slot: (direction, handle)}``."""
        K = self.width
        g = np.zeros((K, self.size))
        z = np.zeros((K, self.size))
        active = np.zeros(K, dtype=bool)
        reset = np.zeros(K, dtype=bool)
        for i, req in requests.items():
            _, memory, gi, st, zi = req
            if memory != self.memory:  # pragma: no cover - one fitter, one memory size
                raise ValueError(f"L-BFGS memory {memory} != {self.memory}")
            active[i] = True
            reset[i] = not isinstance(st, _Memory)
            g[i], z[i] = gi, zi
        d, self.states = _batched_lbfgs(self.memory, g, z, self.states, active, reset)
        self.calls += 1
        d = np.asarray(d)
        return {i: (d[i], _Memory(i)) for i in requests}


class BatchedObjective:
    """Evaluates the objective of one fitter at up to ``width`` points in one compiled call.

    Requests are ``("fg", z, scale)`` (a point of the optimiser: scaled logits, flat vectors of
    :attr:`Fitter.layout`) answered with ``(−F/N, ∂(−F/N)/∂z)`` as :meth:`Fitter.objective_fg`
    does, or ``("counts", log_theta)``
    (log-CPTs of the free nodes, by name) answered with ``(log-likelihood, expected counts per
    node)`` as :meth:`Likelihood.expected_counts` does.
    """

    def __init__(self, fitter: Any, width: int, *, single_tail: bool = True):
        if width < 1:
            raise ValueError(f"width must be >= 1, got {width}")
        self.width = int(width)
        self.fitter = fitter
        self.single_tail = single_tail
        self.network = fitter.network
        self.free = tuple(fitter.free)
        lik = fitter.lik
        # the likelihood's own cache-sized chunks, K points at a time
        self.groups, self.codes, self.weights = lik.plan.groups, lik._codes, lik._weights
        self.layout = fitter.layout
        self.pseudo = jnp.asarray(fitter.pseudo_flat)
        self.fixed_flat = fitter.fixed_flat
        self.l2 = jnp.asarray(float(fitter.settings.l2))
        self.n_total = jnp.asarray(float(fitter.n_total))
        self.calls = 0
        self.slots_used = 0
        self.single_calls = 0

    def _single(self, slot: int, req: tuple) -> dict[int, tuple]:
        """One request by the single-start programs (compiled for the fitter anyway)."""
        f = self.fitter
        self.single_calls += 1
        if req[0] == "counts":
            lcs = tuple(jnp.asarray(req[1][n.name]) if n.fixed is None else f.fixed_lc[n.name] for n in self.network.nodes)
            ll, counts = f.lik.expected_counts_logcpt(lcs)
            return {slot: (float(ll), {n: np.asarray(c) for n, c in zip(self.network.names, counts)})}
        return {slot: f.objective_fg(req[1], req[2], self.pseudo, self.l2, self.n_total)}

    def __call__(self, requests: Mapping[int, tuple]) -> dict[int, tuple]:
        """Evaluate ``{slot: request}`` (slots in ``range(width)``); returns ``{slot: answer}``.

        With ``single_tail`` a round with one request left (the last start still running) is
        evaluated by the single-start programs instead of the K-wide one."""
        K = self.width
        if self.single_tail and len(requests) == 1 and K > 1:
            (slot, req), = requests.items()
            return self._single(slot, req)
        P = self.layout.size
        z = np.zeros((K, P))
        scale = np.ones((K, P))
        lcg = np.zeros((K, P))
        use = np.zeros(K, dtype=bool)
        for i, req in requests.items():
            if req[0] == "counts":
                use[i] = True
                lcg[i] = self.layout.flatten(req[1])
            else:
                z[i], scale[i] = req[1], req[2]
        ll, f, counts, g = _batched_objective(self.network, self.groups, z, scale, lcg, use, self.pseudo,
                                              self.fixed_flat, self.l2, self.n_total, self.codes, self.weights)
        self.calls += 1
        self.slots_used += len(requests)
        ll, f = np.asarray(ll), np.asarray(f)
        out: dict[int, tuple] = {}
        if use.any():
            counts = np.asarray(counts)
            shapes = [self.network.cpt_shape(n) for n in self.network.names]
            bounds = np.cumsum([0] + [math.prod(sh) for sh in shapes])
        if not use.all():
            g = np.asarray(g)
        for i, req in requests.items():
            if req[0] == "counts":
                out[i] = (float(ll[i]), {n: counts[i, bounds[j]:bounds[j + 1]].reshape(sh)
                                         for j, (n, sh) in enumerate(zip(self.network.names, shapes))})
            else:
                out[i] = (float(f[i]), g[i])
        return out


# --------------------------------------------------------------------------- lock-step exchange
class _Aborted(Exception):
    pass


class _Exchange:
    """Start threads post one request each and wait; the driver answers a full round at once.

    The driver waits on one condition (a request posted, a start finished); each start waits
    on an event of its own, so a round wakes every thread once.
    """

    def __init__(self, width: int):
        self.cond = threading.Condition()
        self.ready = [threading.Event() for _ in range(width)]
        self.requests: dict[int, tuple] = {}
        self.answers: dict[int, tuple] = {}
        self.live = set(range(width))
        self.aborted = False

    def ask(self, slot: int, request: tuple) -> tuple:
        with self.cond:
            if self.aborted:
                raise _Aborted()
            self.requests[slot] = request
            if len(self.requests) >= len(self.live):
                self.cond.notify()
        ev = self.ready[slot]
        while not ev.wait(0.5):
            pass
        ev.clear()
        with self.cond:
            if self.aborted:
                raise _Aborted()
            return self.answers.pop(slot)

    def finish(self, slot: int) -> None:
        with self.cond:
            self.live.discard(slot)
            self.cond.notify()

    def abort(self) -> None:
        with self.cond:
            self.aborted = True
            self.cond.notify()
        for ev in self.ready:
            ev.set()

    def next_round(self) -> dict[int, tuple] | None:
        """Block until every live start has posted; the round's requests, or None when all are done."""
        with self.cond:
            while True:
                if self.aborted or not self.live:
                    return None
                if all(s in self.requests for s in self.live):
                    batch, self.requests = self.requests, {}
                    return batch
                self.cond.wait(0.5)

    def hold(self, requests: Mapping[int, tuple]) -> None:
        """Put requests of a round back, to be served in the next one."""
        with self.cond:
            self.requests.update(requests)

    def answer(self, answers: Mapping[int, tuple]) -> None:
        with self.cond:
            self.answers.update(answers)
        for s in answers:
            self.ready[s].set()


class _SlotLikelihood:
    """The fitter's Likelihood, with ``expected_counts`` answered by the batched driver."""

    def __init__(self, lik: Any, exchange: _Exchange, slot: int):
        self._lik, self._exchange, self._slot = lik, exchange, slot

    def expected_counts(self, probs: Mapping[str, np.ndarray]) -> tuple[float, dict[str, np.ndarray]]:
        # the log-CPTs of adfit.likelihood.logcpts_from_probs (fixed nodes come from the fitter)
        with np.errstate(divide="ignore"):
            lc = {k: np.log(np.asarray(probs[k], dtype=np.float64)) for k in self._lik.network.free_names}
        return self._exchange.ask(self._slot, ("counts", lc))

    def __getattr__(self, name: str) -> Any:
        return getattr(self._lik, name)


def _slot_fitter(fitter: Any, exchange: _Exchange, slot: int) -> Any:
    """A copy of ``fitter`` whose evaluations are posted to ``exchange`` (all else shared)."""
    f = copy.copy(fitter)
    f.lik = _SlotLikelihood(fitter.lik, exchange, slot)

    def objective_fg(self, z, scale, pseudo, l2, n_total):
        return exchange.ask(slot, ("fg", z, scale))

    def lbfgs_direction(self, memory, grad, state, params):
        return exchange.ask(slot, ("dir", memory, grad, state, params))

    f.objective_fg = types.MethodType(objective_fg, f)
    f.lbfgs_direction = types.MethodType(lbfgs_direction, f)
    if hasattr(f, "em_polish_steps"):
        f.em_polish_steps = 0
    if hasattr(f, "boundary_escapes"):
        f.boundary_escapes = f.saddle_escapes = 0
    return f


# --------------------------------------------------------------------------- running K starts
def run_starts(fitter: Any, starts: Sequence[Mapping[str, Any]], *,
               progress: Callable[[int, int, float, float], None] | None = None,
               batched: bool = True, stats: dict | None = None) -> tuple[list[Any], list[dict[str, Any]]]:
    """Run every start of ``starts`` (logits of the free nodes) with ``fitter``.

    Args:
        fitter: an :class:`adfit.fit.Fitter`.
        starts: one logits dict per start.
        progress: called as ``progress(start, iteration, objective, gradient_norm)`` (from the
            start's thread when batched).
        batched: evaluate the K starts' points together (module docstring); ``False`` runs
            them one after the other with the fitter itself (the reference).
        stats: if given, filled with ``"rounds"`` (K-wide calls), ``"slot_use"`` (fraction of
            their slots that carried a live request), ``"single_rounds"`` (rounds with one start
            left, evaluated by the single-start programs), ``"direction_rounds"`` (vmapped L-BFGS
            updates) and ``"width"``.

    Returns:
        ``(runs, finals)``: per start the optimiser's run (``logits``, ``value``, ``iterations``,
        ``converged``, ``stop_reason``, histories) and :meth:`Fitter.evaluate` at its end point.
    """
    K = len(starts)
    if K == 0:
        return [], []
    sequential = (not batched or K == 1 or getattr(fitter.settings, "batch_size", None) is not None)
    if sequential:
        # minibatch Adam samples rows per step: its evaluations do not batch over starts
        runs, finals = [], []
        for k, s0 in enumerate(starts):
            cb = None if progress is None else (lambda it, o, g, k=k: progress(k, it, o, g))
            r = fitter.run(s0, progress=cb)
            runs.append(r)
            finals.append(fitter.evaluate(r.logits))
        if stats is not None:
            stats.update(rounds=None, slot_use=None, single_rounds=None, direction_rounds=None, width=1)
        return runs, finals

    objective = BatchedObjective(fitter, K)
    directions = BatchedDirections(K, fitter.settings.memory, fitter.layout.flatten(starts[0]))
    exchange = _Exchange(K)
    workers = [_slot_fitter(fitter, exchange, k) for k in range(K)]
    out: list[Any] = [None] * K
    errors: list[BaseException | None] = [None] * K

    def work(k: int) -> None:
        try:
            cb = None if progress is None else (lambda it, o, g: progress(k, it, o, g))
            r = workers[k].run(starts[k], progress=cb)
            out[k] = (r, workers[k].evaluate(r.logits))
        except _Aborted:
            pass
        except BaseException as e:  # re-raised in the caller's thread below
            errors[k] = e
            exchange.abort()
        finally:
            exchange.finish(k)

    threads = [threading.Thread(target=work, args=(k,), name=f"adfit-start-{k}", daemon=True) for k in range(K)]
    for t in threads:
        t.start()
    try:
        while True:
            batch = exchange.next_round()
            if batch is None:
                break
            dirs = {s: r for s, r in batch.items() if r[0] == "dir"}
            if dirs:
                # directions first; the evaluation requests wait for the line searches that
                # follow, so that the evaluation round carries every live start
                exchange.hold({s: r for s, r in batch.items() if r[0] != "dir"})
                exchange.answer(directions(dirs))
            else:
                exchange.answer(objective(batch))
    except BaseException:
        exchange.abort()
        raise
    finally:
        for t in threads:
            t.join()
    for e in errors:
        if e is not None:
            raise e
    if hasattr(fitter, "em_polish_steps"):
        fitter.em_polish_steps += sum(w.em_polish_steps for w in workers)
    if hasattr(fitter, "boundary_escapes"):
        fitter.boundary_escapes += sum(w.boundary_escapes for w in workers)
        fitter.saddle_escapes += sum(w.saddle_escapes for w in workers)
    if stats is not None:
        stats.update(rounds=objective.calls, width=K, single_rounds=objective.single_calls,
                     direction_rounds=directions.calls,
                     slot_use=objective.slots_used / max(1, objective.calls * K))
    return [o[0] for o in out], [o[1] for o in out]


# --------------------------------------------------------------------------- the optima
def _max_delta(network: Network, a: Mapping[str, np.ndarray], b: Mapping[str, np.ndarray],
               ca: Mapping[str, np.ndarray], cb: Mapping[str, np.ndarray], floor: float) -> tuple[float, dict | None]:
    """Largest |θa − θb| over the free CPT entries, rows uninformed at both points left out."""
    worst, where = 0.0, None
    for name in network.free_names:
        node = network.node(name)
        d = np.abs(np.asarray(a[name]) - np.asarray(b[name])).reshape(-1, node.card)
        na = np.asarray(ca[name]).reshape(-1, node.card).sum(axis=1)
        nb = np.asarray(cb[name]).reshape(-1, node.card).sum(axis=1)
        d[(na < floor) & (nb < floor)] = 0.0
        if d.size and d.max() > worst:
            i, j = np.unravel_index(int(np.argmax(d)), d.shape)
            worst = float(d[i, j])
            where = {"node": name, "parents": dict(zip(node.parents, network.parent_config_labels(name)[i])),
                     "state": node.states[j]}
    return worst, where


def summarise_optima(network: Network, finals: Sequence[Mapping[str, Any]], *, gtol_abs: float, ptol: float,
                     converged: Sequence[bool] | None = None, best: int | None = None,
                     objective_rtol: float = LL_RTOL, theta_atol: float = THETA_ATOL,
                     count_floor: float = COUNT_FLOOR) -> dict[str, Any]:
    """Group the end points of several starts into distinct optima (module docstring).

    Args:
        finals: per start, :meth:`Fitter.evaluate` at its end point (``objective``,
            ``log_likelihood``, ``probs``, ``counts``, ``gradient_norm``, ``residual``).
        gtol_abs, ptol: the stationarity thresholds (gradient norm in records; residual in
            probability units).
        converged: per start, whether its stopping rule held (reported per optimum).
        best: the start that was kept (default: the highest objective); it represents the
            first optimum, the one the others are measured against.

    Returns:
        JSON-ready: ``"optima"`` (best first), ``"start_optimum"`` (the optimum of each start,
        ``None`` when its objective is not finite), ``"starts_at_best_objective"`` and the
        tolerances.
    """
    K = len(finals)
    conv = [True] * K if converged is None else [bool(c) for c in converged]
    obj = np.array([float(f["objective"]) for f in finals])
    finite = np.isfinite(obj)
    # only converged starts with a finite objective are optima (module docstring)
    order = [int(k) for k in np.argsort(-np.where(finite, obj, -np.inf), kind="stable") if finite[k] and conv[k]]
    if best is not None and best in order:
        order.remove(best)
        order.insert(0, best)
    reps: list[int] = []
    members: list[list[int]] = []
    start_opt: list[int | None] = [None] * K

    def tol_of(x: float) -> float:
        return objective_rtol * max(1.0, abs(x))

    for k in order:
        placed = False
        for j, r in enumerate(reps):
            if abs(obj[k] - obj[r]) > tol_of(obj[r]):
                continue
            perms = align_latent_states(network, finals[k]["probs"], finals[r]["probs"])
            pk, ck = relabel(network, finals[k]["probs"], perms), relabel(network, finals[k]["counts"], perms)
            d, _ = _max_delta(network, pk, finals[r]["probs"], ck, finals[r]["counts"], count_floor)
            if d <= theta_atol:
                members[j].append(k)
                start_opt[k] = j
                placed = True
                break
        if not placed:
            reps.append(k)
            members.append([k])
            start_opt[k] = len(reps) - 1

    optima = []
    top = reps[0] if reps else None
    best_obj = float(obj[top]) if top is not None else None
    best_tol = tol_of(best_obj) if best_obj is not None else None
    for j, (r, ms) in enumerate(zip(reps, members)):
        fr = finals[r]
        if j == 0:
            d, where = 0.0, None
        else:
            perms = align_latent_states(network, fr["probs"], finals[top]["probs"])
            d, where = _max_delta(network, relabel(network, fr["probs"], perms), finals[top]["probs"],
                                  relabel(network, fr["counts"], perms), finals[top]["counts"], count_floor)
        gn, res = float(fr["gradient_norm"]), float(fr["residual"])
        optima.append({
            "optimum": j,
            "objective": float(fr["objective"]),
            "log_likelihood": float(fr["log_likelihood"]),
            "count": len(ms),
            "starts": [int(m) for m in ms],
            "best_start": int(r),
            "max_abs_delta_theta": d,
            "largest_delta_at": where,
            "same_objective_as_best": bool(abs(fr["objective"] - best_obj) <= best_tol),
            "stationary": bool(gn <= gtol_abs or res <= ptol),
            "gradient_norm": gn,
            "residual": res,
            "converged": [bool(conv[m]) for m in ms] if converged is not None else None,
        })
    not_conv = []
    for k in range(K):
        if conv[k] or not finite[k]:
            continue
        fk = finals[k]
        not_conv.append({"start": k, "objective": float(obj[k]), "log_likelihood": float(fk["log_likelihood"]),
                         "gradient_norm": float(fk["gradient_norm"]), "residual": float(fk["residual"]),
                         "above_best": bool(best_obj is not None and obj[k] > best_obj + best_tol)})
    at_best = sum(o["count"] for o in optima if o["same_objective_as_best"])
    return {
        "optima": optima,
        "start_optimum": start_opt,
        "starts_at_best_objective": int(at_best),
        "best_objective": best_obj,
        "best_objective_tolerance": best_tol,
        "n_starts": K,
        "n_converged": int(sum(1 for k in range(K) if conv[k] and finite[k])),
        "not_converged": not_conv,
        "n_failed": int(K - int(finite.sum())),
        "kept_start": None if best is None else int(best),
        "kept_start_is_optimum": bool(best is not None and start_opt[best] is not None) if best is not None else None,
        "tolerances": {"objective_rtol": objective_rtol, "theta_atol": theta_atol, "count_floor": count_floor,
                       "stationary_gradient_norm": gtol_abs, "stationary_residual": ptol},
    }


def restarts_report(network: Network, rows: list[dict[str, Any]], finals: Sequence[Mapping[str, Any]], *,
                    best: int, gtol_abs: float, ptol: float, batch_width: int = 1) -> dict[str, Any]:
    """The ``"restarts"`` section of a fit result: the per-start ``rows`` (each given the index
    of its optimum, ``"optimum"``) and the optima of :func:`summarise_optima`."""
    converged = [bool(r.get("converged")) for r in rows]
    summary = summarise_optima(network, finals, gtol_abs=gtol_abs, ptol=ptol, converged=converged, best=best)
    for r, j in zip(rows, summary.pop("start_optimum")):
        r["optimum"] = j
    return {"starts": rows, **summary, "batch_width": int(batch_width)}


def local_optima_message(summary: Mapping[str, Any]) -> str | None:
    """The text of the LocalOptimaWarning, or None when it is not due (module docstring)."""
    K = summary["n_starts"]
    at_best = summary["starts_at_best_objective"]
    if K < 2 or at_best > 1:
        return None
    n_conv = summary.get("n_converged", K - summary.get("n_failed", 0))
    unconv = summary.get("not_converged") or []
    tail = []
    if unconv:
        above = sum(1 for u in unconv if u.get("above_best"))
        tail.append(f"{len(unconv)} did not converge" + (f", {above} of them stopped above it" if above else ""))
    if summary.get("n_failed"):
        tail.append(f"{summary['n_failed']} failed")
    if not summary["optima"] or at_best == 0:
        return (f"none of the {K} starts converged, so no optimum was confirmed"
                + (f" ({'; '.join(tail)})" if tail else "")
                + ": raise --max-iter or run more starts (--restarts)")
    best = summary["optima"][0]
    others = len(summary["optima"]) - 1
    parts = [f"the others reached {others} other optim{'um' if others == 1 else 'a'}"] if others else []
    return (f"the best objective {best['objective']:.6f} was reached by only 1 of {K} starts "
            f"({n_conv} converged"
            + "".join(f"; {p}" for p in parts + tail)
            + "); a higher optimum may exist: run more starts (--restarts)")


def format_optima(section: Mapping[str, Any]) -> str:
    """A short plain-text table of the optima (for ``adfit fit --restarts K``)."""
    opt = section["optima"]
    tol = section["tolerances"]
    K = section["n_starts"]
    n_conv = section.get("n_converged", K)
    lines = [f"starts: {K}"
             + (f" ({section['batch_width']} evaluated together)" if section.get("batch_width", 1) > 1 else "")
             + f"; {n_conv} converged; {len(opt)} distinct optim{'um' if len(opt) == 1 else 'a'} among them (two starts "
             f"count as one optimum when their objectives agree to {tol['objective_rtol']:g} x max(1, |objective|) "
             f"and their CPT entries to {tol['theta_atol']:g}, latent states relabelled)"]
    if opt:
        lines.append(f"  {section['starts_at_best_objective']} of the {n_conv} converged starts reached the best "
                     f"objective {opt[0]['objective']:,.2f}"
                     + (f" (to a tolerance of {section['best_objective_tolerance']:.3g})"
                        if section.get("best_objective_tolerance") is not None else ""))
        lines.append(f"  {'optimum':>7s} {'objective':>14s} {'log-likelihood':>14s} {'starts':>6s} {'max |dtheta|':>12s} "
                     f"{'stationary':>10s} {'gradient norm':>13s}")
    for o in opt:
        dt = "best" if o["optimum"] == 0 else f"{o['max_abs_delta_theta']:.3g}"
        lines.append(f"  {o['optimum'] + 1:>7d} {o['objective']:14,.2f} {o['log_likelihood']:14,.2f} {o['count']:>6d} "
                     f"{dt:>12s} {'yes' if o['stationary'] else 'no':>10s} {o['gradient_norm']:13.3e}")
    ties = [o for o in opt[1:] if o["same_objective_as_best"]]
    if ties:
        lines.append(f"  {len(ties)} other optim{'um has' if len(ties) == 1 else 'a have'} the best objective with "
                     f"different CPTs: parameters not identified by the data (a flat ridge) or equally high optima")
    for u in section.get("not_converged") or []:
        lines.append(f"  start {u['start'] + 1} did not converge (not an optimum): objective {u['objective']:,.2f}, "
                     f"gradient norm {u['gradient_norm']:.3e}" + ("; above the best converged objective" if u.get("above_best") else ""))
    if section.get("n_failed"):
        lines.append(f"  {section['n_failed']} start(s) ended with a non-finite objective")
    return "\n".join(lines)

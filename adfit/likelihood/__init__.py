"""Exact marginal log-likelihood of incomplete records, by variable elimination in JAX.

For a distinct coded row ``e`` (observed cells) the marginal likelihood is

    P(e) = sum over the hidden cells h of  prod_i theta_i(x_i | x_pa(i))   with x = (e, h),

a sum over every assignment of the row's hidden cells (missing cells and latent nodes). It is
never enumerated over all hidden cells at once: the sum factorises, and each factor is computed
by the cheapest exact method for its size.

How a row is taken apart (the *plan*, built once per network and data, in plain numpy):

* **Components.** The hidden nodes of the row fall into connected components (two hidden nodes
  are linked when they appear in one family). A family touches at most one component. With
  ``H`` a component and ``F`` the families that touch it,

      log P(e) = sum over families with every member observed of  log theta(e)
               + sum over components (H, F) of  log sum_{x_H} prod_{f in F} theta_f.

* **Observed families** contribute the data counts times ``log theta``: the counts are summed
  over the rows once, at plan time, so their cost per evaluation is the size of the CPTs, not the
  number of rows (their expected counts are the data counts themselves).
* **Small components** (the common case: one to a few hidden cells whose neighbours are
  observed) are enumerated: each of the ``prod |H|`` assignments gathers ``|F|`` log-CPT entries
  (observed values looked up directly), followed by one log-sum-exp. A component is identified by
  the CPT entries it reads, so equal components of different rows are computed once with summed
  weights. Components of every type share a few padded shapes (*buckets*), compiled once each.
* **Large components** (or, for the uniform route, whole rows) go to the *elimination tape*:
  variable elimination with a greedy min-fill order, compiled into a flat program of
  log-sum-exp products over a buffer of table entries (``sum_v prod_j input_j`` per output entry,
  in log space), packed into fixed-width batches and executed by one ``lax.scan``. The program
  is data, not code: every program of a shape class runs on one compiled loop, so compile time
  does not grow with the number of variables, steps or component types. Uniform evidence (the
  classical form: one-hot indicators for observed cells, all ones for missing ones) lets one
  program serve rows of different missingness patterns.
* **Barren nodes** (hidden, no observed descendant in the row) sum out to 1, so they do not
  change the value, but their expected counts are not 0 (the posterior of their parents times
  their CPT), and EM steps and the identifiability checks use those counts. A barren *leaf*
  whose hidden parents are not barren (the unasked items of a questionnaire) leaves its
  component: its cell is coded SUMMED, an extra column of its CPT in the plan's flat layout that
  holds the log of the row sum (log 1), so its family is a factor over the parents alone; the
  gradient reaching that column is the parents' posterior, and the chain rule through the log
  row sum turns it into theta(x | u) times that posterior (:func:`_widen_flat`; exact in both
  modes of differentiation). Other barren nodes stay in their components (a barren subtree
  under observed parents is a component of its own, with few distinct instances).
* The route per component (enumerate, its own elimination program, or the whole row in the
  uniform program) is chosen by an estimated cost that includes compile and plan time;
  ``Plan.route`` and ``Plan.describe()`` say what was chosen.
* XLA runs each of these loops on one core; when an evaluation is long enough, every block's
  chunks are cut into equal parts, one per core, run side by side from threads by the same
  compiled program (:class:`Shards`, ``$ADFIT_THREADS``).

Everything is computed in log space with max-shifted log-sum-exp, so a row whose likelihood is
far below 1e-308 is still finite in float64; a row of probability zero gives ``-inf``. Rows are
processed in fixed-size chunks by ``lax.scan`` that accumulates each chunk's value and gradient,
so memory is bounded by the chunk size, not by the number of rows.

The core functions take **log-CPTs** (``log theta``, all nodes). The gradient with respect to
``log theta_i(x|u)`` is the expected count ``N(x, u)`` of the family given the data (the
derivative of the network polynomial, Darwiche 2003, J. ACM 50(3)); composed with
``log_softmax`` it gives the gradient with respect to the logits, ``N(x,u) - theta(x|u) N(u)``
(Fisher's identity; Dempster, Laird & Rubin 1977, eq. 2.13).

Where things are (``adfit/likelihood/``)::

    settings.py     the cost model's constants, budgets and limits
    layout.py       per-network statics; the flat vector of log-CPTs (layout_of)
    blocks.py       what a plan is made of (GroupPlan, GatheredBlock, EnumBlock, TapeBlock, Plan)
    order.py        min-fill elimination orders and a group's steps (_group_plan)
    barren.py       barren hidden leaves summed out; the widened flat layout
    components.py   rows taken apart into hidden components, their types and instances
    enumeration.py  enumerated components: gathered tables, bucket shapes
    tape.py         the elimination tape: programs, packing, tape blocks
    plan.py         build_plan: routes chosen by cost, blocks assembled
    sharding.py     evaluations split over the cores (Shards, threads)
    evaluation.py   the compiled evaluations: value, expected counts, per-row values
    api.py          Likelihood, score, check_possible, CPT/logit conversions
    posteriors.py   posterior marginals per row (posterior_marginals)

Every name of the former single module is importable from ``adfit.likelihood``. Setting one
of them on the package (``adfit.likelihood.SUM_BARREN_LEAVES = False``, or a test's
``monkeypatch.setattr(adfit.likelihood, "build_plan", ...)``) rebinds it in every module of
the core that holds it, as it did when the core was one module.
"""

from __future__ import annotations

import sys as _sys
import types as _types

import numpy as np  # noqa: F401  (attributes of the former single module)

from .._jax import jax, jnp  # noqa: F401  float64 on before anything else (adfit/_jax.py)
from ..data import HIDDEN, CodedData  # noqa: F401
from ..errors import ImpossibleDataError, OptionError, TooLargeError  # noqa: F401
from ..network import MAX_TABLE_ENTRIES, Network, table_too_large  # noqa: F401
from .settings import (PLAN_EVALUATIONS, T_ENUM, T_TAPE, T_LOOP, COMPILE_ENUM, COMPILE_TAPE, T_PLAN_TYPE,
                       TAPE_PAD, ENUM_ALWAYS, ENUM_MAX, ENUM_BUDGET, TAPE_BUDGET, TAPE_SLOTS, TAPE_FACTORS,
                       PLAN_BLOCK, SHARD_MIN_S, MIN_PATTERN_ROWS, MAX_PATTERN_GROUPS, SUM_BARREN_LEAVES,
                       CHUNK_BUDGET)  # noqa: F401
from .layout import (_Statics, _STATICS, _st, _layout, _flat, _unflat, _logsumexp_last, _LAYOUTS, layout_of,
                     layout_size)  # noqa: F401
from .blocks import FactorSpec, Step, GroupPlan, GatheredBlock, EnumBlock, TapeBlock, Block, Plan  # noqa: F401
from .order import _min_fill_order, _group_plan  # noqa: F401
from .barren import (_CODE_CARDS, _summed_leaves, _widened_network, _code_cards, _widen_segments,
                     _widen_flat, _is_widened, _plan_flat, _narrow_flat)  # noqa: F401
from .components import (_decompose, _bits, _Type, _components, _void_rows, _unique_keys, _distinct_rows,
                         _type_instances, _type_instances_uncached, _n_instances)  # noqa: F401
from .enumeration import _enum_tables, _enum_bucket_menu, _round_shape  # noqa: F401
from .tape import (_IND, _ONE, _NEG, _ITEM, _Program, _bcast_ids, _TapeWriter, _compile_program, _pack,
                   _choose_width, _split_classes, _bases, _tape_block, _pow2_clip, _tape_seconds)  # noqa: F401
from .plan import build_plan, _choose_methods, _assemble, _posterior_plan  # noqa: F401
from .sharding import n_threads, _shard, Shards, _split, _parts, _traced, _WARM, _run_parts  # noqa: F401
from .evaluation import (_safe_weighted, _enum_rows, _tape_rows, _enum_value_and_grad, _block_chunks,
                         _gathered_value, _loglik_part, _loglik_logcpt, _flat_logcpts,
                         _value_and_expected_counts, _value_and_flat_expected_counts, _value_and_flat_counts,
                         _rows_loglik, _gather_factor, _expand, _group_rows_loglik)  # noqa: F401
from .api import (_logcpts_from_logits, _assemble_rows, Likelihood, _value_and_grad_logits,
                  logcpts_from_probs, probs_from_logits, logits_from_probs, _prepared, zero_sources,
                  check_possible, score)  # noqa: F401
from .posteriors import _posteriors, posterior_marginals  # noqa: F401
# the compilation cache, kept here under its old names; the setup lives in adfit/_compile_cache.py
# (it imports no JAX, so that the command line can ask for the cache before it knows whether a
# command computes)
from .._compile_cache import COMPILE_CACHE_MAX_BYTES, enable_compilation_cache  # noqa: F401

_SUBMODULES = tuple(f"{__name__}.{m}" for m in ("settings", "layout", "blocks", "order", "barren", "components",
                                                 "enumeration", "tape", "plan", "sharding", "evaluation",
                                                 "api", "posteriors"))


class _Package(_types.ModuleType):
    """The package module: a name set on it is set in every module of the core that holds the
    same object under that name (its definition and every ``from .x import name``)."""

    def __setattr__(self, name, value):
        old = self.__dict__.get(name, _MISSING)
        if old is not _MISSING and not isinstance(old, _types.ModuleType):
            for mod in _SUBMODULES:
                sub = _sys.modules.get(mod)
                if sub is not None and sub.__dict__.get(name, _MISSING) is old:
                    setattr(sub, name, value)
        super().__setattr__(name, value)


_MISSING = object()
_sys.modules[__name__].__class__ = _Package

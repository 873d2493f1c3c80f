"""What a plan is made of (frozen dataclasses, no computation): a group's elimination steps and
factors (``FactorSpec``, ``Step``, ``GroupPlan``), the three kinds of blocks a plan's rows are
evaluated by (``GatheredBlock``: observed families as counts; ``EnumBlock``: enumerated
components; ``TapeBlock``: the elimination tape) and the ``Plan`` that holds them.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Mapping

import numpy as np

from ..network import Network


# --------------------------------------------------------------------------- elimination plans
@dataclass(frozen=True)
class FactorSpec:
    """A CPT factor of one node restricted to a group.

    ``scope`` are the non-observed family members (in the order of the axes of the factor),
    ``obs`` the observed family members used to index the CPT, ``perm`` the transpose that moves
    the CPT axes into ``scope + obs`` order.
    """

    node: int
    scope: tuple[int, ...]
    obs: tuple[int, ...]
    perm: tuple[int, ...]
    obs_strides: tuple[int, ...]


@dataclass(frozen=True)
class Step:
    """Eliminate ``var``: multiply the factors ``inputs`` (ids), sum over ``var``."""

    var: int
    inputs: tuple[int, ...]
    out_scope: tuple[int, ...]
    out_id: int


@dataclass(frozen=True)
class GroupPlan:
    """An elimination plan for a set of rows (hashable: a static jit argument)."""

    log_terms: tuple[tuple[int, tuple[int, ...]], ...]  # (node, family in CPT axis order)
    factors: tuple[FactorSpec, ...]                     # ids 0..len-1
    indicators: tuple[int, ...]                         # partial nodes; ids follow the factors
    steps: tuple[Step, ...]
    final: tuple[int, ...]                              # ids of scalar-per-row factors left at the end
    scopes: tuple[tuple[int, ...], ...]                 # scope of every factor id (inputs and messages)
    chunk: int
    cost: float                                         # table entries touched per row (estimate)
    kind: str                                           # "pattern" or "mixed"
    n_hidden: int
    n_partial: int
    n_pruned: int


# --------------------------------------------------------------------------- blocks
@dataclass(frozen=True)
class GatheredBlock:
    """Families with every member observed: data counts times log theta (no per-row work)."""

    n_rows: int          # rows of the per-pattern route (whose observed families are counted here)
    n_families: int      # (row, family) pairs with every member observed, over the distinct rows
    n_pruned: int        # nodes barren (hidden, no observed descendant) in at least one row
    n_components: int    # hidden components of those rows (handled by the other blocks)
    kind: str = "pattern"
    chunk: int = 1 << 30
    steps: tuple = ()
    cost: float = 0.0
    n_hidden: int = 0
    n_partial: int = 0
    widen: tuple = ()    # barren leaves summed out: :func:`_widen_segments` (the plan's flat layout)
    n_summed: int = 0    # (row, leaf) cells summed out that way


@dataclass(frozen=True)
class EnumBlock:
    """Small components enumerated: ``A`` assignments x ``m`` gathered log-CPT entries each."""

    A: int
    m: int
    chunk: int
    n_instances: int     # distinct components (after merging equal ones)
    n_components: int    # component occurrences in the rows
    n_types: int         # distinct (hidden nodes, families) types
    kind: str = "pattern"
    steps: tuple = ()
    n_pruned: int = 0
    n_hidden: int = 0
    n_partial: int = 0

    @property
    def cost(self) -> float:
        return float(self.A * self.m)


@dataclass(frozen=True)
class TapeBlock:
    """Elimination programs of one shape class, run by one compiled loop.

    Buffer rows: ``n_leaf`` log-CPT entries, ``n_ind`` evidence indicators, log 1, log 0, then
    ``n_batch x width`` computed entries; each computed entry is the log-sum-exp over ``slots``
    terms of sums of ``ops`` buffer entries.
    """

    kind: str            # "pattern" (components, own programs) or "mixed" (uniform evidence, whole rows)
    n_programs: int
    n_leaf: int
    n_fac: int
    n_ind: int
    n_icodes: int
    n_batch: int
    width: int
    slots: int
    ops: int
    n_final: int
    chunk: int           # rows per chunk
    n_rows: int          # distinct rows (or component instances) handled
    cost: float          # gathered operands per row (padded)
    n_hidden: int = 0
    n_partial: int = 0
    n_pruned: int = 0
    steps: tuple = ()

    @property
    def start(self) -> int:
        return self.n_leaf + self.n_ind + 2


Block = Any  # GatheredBlock | EnumBlock | TapeBlock


@dataclass(frozen=True)
class Plan:
    """The blocks of work for one network and data set, with their data arrays.

    ``groups`` are the static block descriptions (a static jit argument), ``codes`` and
    ``weights`` the matching arrays (pytrees). ``maps`` say, per block, which distinct row each
    computed instance belongs to (for per-row log-likelihoods).
    """

    network: Network
    groups: tuple[Block, ...]
    codes: tuple[Any, ...]
    weights: tuple[Any, ...]
    n_distinct: int
    maps: tuple[Any, ...] = ()
    observed_rows: Any = None       # bool mask of rows whose observed families are in the gathered block
    estimate: Mapping[str, float] | None = None
    rows: tuple[np.ndarray, ...] = ()
    n_shards: int = 1               # the chunks of every block split into this many equal parts

    def describe(self) -> str:
        parts = []
        for g in self.groups:
            if isinstance(g, GatheredBlock):
                parts.append(f"observed families gathered: {g.n_rows} rows, {g.n_families} row-families, "
                             f"{g.n_components} hidden components, {g.n_pruned} nodes barren in some rows"
                             + (f", {g.n_summed} barren leaf cells summed out" if g.n_summed else ""))
            elif isinstance(g, EnumBlock):
                parts.append(f"enumerated components {g.A}x{g.m}: {g.n_components} components -> "
                             f"{g.n_instances} distinct, {g.n_types} types")
            elif isinstance(g, GroupPlan):
                parts.append(f"{g.kind}: {g.n_hidden} hidden + {g.n_partial} partial nodes, ~{g.cost:.0f} entries/row")
            else:
                what = "component programs" if g.kind == "pattern" else "uniform evidence program"
                parts.append(f"{what}: {g.n_programs} program(s), {g.n_rows} rows, {g.n_batch} batches x "
                             f"{g.width} entries x {g.slots}x{g.ops} operands (~{g.cost:.0f} per row)")
        if self.estimate:
            e = self.estimate
            parts.append(f"estimated {e['evaluation_s'] * 1e3:.1f} ms per evaluation + {e['compile_s']:.1f} s compile")
        return "; ".join(parts)

    @property
    def route(self) -> str:
        kinds = {g.kind for g in self.groups}
        if "mixed" not in kinds:
            return "per-pattern"
        if kinds == {"mixed"}:
            return "uniform evidence"
        return "hybrid (per-pattern + uniform evidence)"

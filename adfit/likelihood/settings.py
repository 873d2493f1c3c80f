"""Tunable constants of the likelihood core: the cost model that ranks the routes (seconds on the
2-core reference machine), chunk and tape budgets, and the limits of the per-pattern route.

Setting one on the package (``adfit.likelihood.ENUM_ALWAYS = 1``, as tests and benchmarks do)
sets it in every module of the core that reads it (adfit/likelihood/__init__.py).
"""

from __future__ import annotations


# --------------------------------------------------------------------------- cost model
# Seconds on the 2-core reference machine for one value-and-gradient, fitted to the figures of
# benchmarks/bench_likelihood.py (docs/performance.md). They only rank the routes; a factor of
# two either way changes few decisions.
PLAN_EVALUATIONS = 60       # evaluations a fit is planned for (iterations x line-search steps)
T_ENUM = 3.7e-9               # per padded entry of an enumerated component (gather, exp, scatter)
T_TAPE = 9e-9               # per gathered operand of the elimination tape, per row
T_LOOP = 1.5e-5             # per iteration of a compiled loop (one chunk, or one tape batch)
COMPILE_ENUM = 0.3          # compile time of one enumeration bucket
COMPILE_TAPE = 1.2          # compile time of one elimination-tape class
T_PLAN_TYPE = 8e-4          # plan time of one elimination program (min-fill, tape, packing; Python)
TAPE_PAD = 4.0              # tape operands per min-fill cost unit (padding of batches and slots)
ENUM_ALWAYS = 256           # a component with at most this many entries is always enumerated
ENUM_MAX = 1 << 16          # ... and one with more is never enumerated
ENUM_BUDGET = 1 << 16       # padded entries per chunk of an enumeration bucket (~0.8 MB: cache)
TAPE_BUDGET = 1 << 14       # float64 entries of one tape chunk's buffer (128 KiB: stays in cache)
TAPE_SLOTS = 4              # summed terms per tape entry (states of the eliminated variable) ...
TAPE_FACTORS = 3            # ... and multiplied operands per term; larger steps are split
PLAN_BLOCK = 1 << 22        # cells (rows x nodes) decomposed at a time when building a plan
SHARD_MIN_S = 0.005         # evaluations estimated longer than this are split over the CPU cores

# Limits of the per-pattern route under route="auto" (the cost model decides within them): a
# component type gets an elimination program of its own only with at least MIN_PATTERN_ROWS
# distinct instances, and at most MAX_PATTERN_GROUPS such programs are made.
MIN_PATTERN_ROWS = 1
MAX_PATTERN_GROUPS = 1 << 16
# Barren hidden leaves summed out of their components (False: kept, the full elimination).
SUM_BARREN_LEAVES = True
# Target number of float64 entries in the largest intermediate of one posterior chunk (~4 MB).
CHUNK_BUDGET = 1 << 19

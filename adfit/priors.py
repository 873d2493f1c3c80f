"""Dirichlet priors on the CPT rows (pseudo-counts, BDeu, expert tables) and the L2 penalty.

A prior is given as a TOML file (``--prior FILE``) or as a :class:`Prior` object. Whatever its
form, it comes down to one array of pseudo-counts ``c >= 0`` per free node, shaped like the CPT
(``network.cpt_shape(name)``). The fitted objective is::

    log L(θ) + Σ c·log θ − λ·Σ (logit − row mean)²

i.e. a Dirichlet prior with ``α = c + 1`` on every CPT row, and the estimate is its posterior
mode **in probability space**: with complete data ``θ̂ = (N + c) / (N_u + Σc)`` per row. No
Jacobian of the softmax enters the prior (adding one would move the mode to
``(N + c + 1) / (N_u + Σc + K)``).

File schema (every key is optional; unknown keys are errors)::

    [default]                      # every free node without its own entry
    pseudo_counts = 1.0            # c added to every cell
    # or: equivalent_sample_size = 10   BDeu: c = ESS / (q_i · r_i) per cell
    # or: alpha = 2.0                   Dirichlet α directly (α >= 1; c = α − 1)

    [nodes.vibration]              # a free node; replaces [default] for that node
    table = [[0.9, 0.1], [0.2, 0.8]]  # expert CPT, network table layout
    strength = 30                  # pseudo-observations per parent configuration
    # or: pseudo_counts = 2.0 | [[...]]   per node, scalar or per cell
    # or: equivalent_sample_size = 10
    # or: alpha = 2.0 | [[...]]

Tables use the network layout: one row per parent configuration, the last parent varying
fastest; a parentless node may give a flat list.
"""

from __future__ import annotations

import math
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping

import numpy as np

from .errors import PriorError
from .network import SUM_TOL, Network

#: the kinds of prior entry, by their file key
#: Most pseudo-counts one node's prior may add up to: 2**53, as for the records
#: (adfit.data.MAX_TOTAL_COUNT; IEEE 754 binary64 counts whole numbers exactly up to there).
MAX_TOTAL_PSEUDO_COUNT = 2.0 ** 53
KINDS = ("pseudo_counts", "equivalent_sample_size", "alpha", "table")
#: the keys of a normal prior on the coefficients of a ``cpd = "logistic"`` node (standard deviations
#: on the log-odds scale; see :class:`NormalSpec`)
NORMAL_KEYS = ("coefficient_sd", "intercept_sd")
_DEFAULT_KEYS = {"pseudo_counts", "equivalent_sample_size", "alpha", *NORMAL_KEYS}
_NODE_KEYS = {"pseudo_counts", "equivalent_sample_size", "alpha", "table", "strength", *NORMAL_KEYS}
_TOP_KEYS = {"default", "nodes"}

OBJECTIVE_TEXT = ("log L(theta) + sum c*log(theta) - l2*sum (logit - row mean)^2; Dirichlet alpha = c + 1 "
                  "on every CPT row; the estimate is the posterior mode in probability space")
#: the same with a normal prior on logistic coefficients
OBJECTIVE_TEXT_NORMAL = ("log L(theta) + sum c*log(theta) - 1/2*sum (beta/sd)^2 - l2*sum (logit - row mean)^2; "
                         "Dirichlet alpha = c + 1 on every CPT row (or cause row), a normal N(0, sd^2) on every "
                         "non-reference coefficient beta of a logistic node; the estimate is the posterior mode "
                         "(in probability space for the Dirichlet rows, in log-odds for the coefficients)")

_ALPHA_WHY = ("adfit reports the posterior mode, and a Dirichlet with alpha < 1 has an unbounded density "
              "at the boundary, so its mode sits at theta = 0; use alpha >= 1 (pseudo_counts = alpha - 1 >= 0)")

Cells = tuple[tuple[float, ...], ...]


# --------------------------------------------------------------------- specs
@dataclass(frozen=True)
class PriorSpec:
    """One prior entry (the ``[default]`` table or one ``[nodes.NAME]`` table).

    Attributes:
        kind: one of :data:`KINDS`.
        value: the scalar of ``pseudo_counts``, ``equivalent_sample_size`` or ``alpha`` (None when
            ``cells`` is given or kind is ``table``).
        cells: a 2-D table (rows = parent configurations, network layout) of per-cell
            pseudo-counts (kind ``pseudo_counts``), Dirichlet α (kind ``alpha``) or the expert
            CPT (kind ``table``).
        strength: for kind ``table``: pseudo-observations per parent configuration, spread as
            the table (``c = strength · table``).
    """

    kind: str
    value: float | None = None
    cells: Cells | None = None
    strength: float | None = None

    def __post_init__(self) -> None:
        if self.kind not in KINDS:
            raise PriorError(f"prior entry kind {self.kind!r} is unknown; use one of {', '.join(KINDS)}")
        if self.kind == "table":
            if self.cells is None or self.strength is None:
                raise PriorError("a 'table' prior entry needs both table = [[...]] and strength = S")
        elif self.kind == "equivalent_sample_size":
            if self.value is None or self.cells is not None:
                raise PriorError("equivalent_sample_size must be one number (the total pseudo-count of the node)")
        elif (self.value is None) == (self.cells is None):
            raise PriorError(f"a {self.kind!r} prior entry needs exactly one of a number or a table of numbers")

    def to_dict(self) -> dict[str, Any]:
        """The entry in the file schema (JSON/TOML-ready)."""
        out: dict[str, Any] = {}
        if self.kind == "table":
            out["table"] = [list(r) for r in self.cells]  # type: ignore[union-attr]
            out["strength"] = self.strength
        elif self.cells is not None:
            out[self.kind] = [list(r) for r in self.cells]
        else:
            out[self.kind] = self.value
        return out


@dataclass(frozen=True)
class NormalSpec:
    """A normal prior on the coefficients of a ``cpd = "logistic"`` node (log-odds against the
    child's first state): every non-reference coefficient ``β`` of a parent's state gets
    ``N(0, coefficient_sd²)`` and every non-reference intercept ``N(0, intercept_sd²)``; None: no
    prior on that kind (the default for intercepts). The log-prior is ``−½ Σ (β/sd)²`` (its
    normalising constant left out, as for the Dirichlet)."""

    coefficient_sd: float | None = None
    intercept_sd: float | None = None

    def __post_init__(self) -> None:
        for key in NORMAL_KEYS:
            v = getattr(self, key)
            if v is not None:
                _check_sd(v, key, "<prior>")

    def to_dict(self) -> dict[str, Any]:
        return {k: getattr(self, k) for k in NORMAL_KEYS if getattr(self, k) is not None}

    def precisions(self, network: Network, name: str) -> np.ndarray:
        """``1/sd²`` per coefficient cell of the node's parameter rows (intercept row, then each
        parent's non-first states; the first child state's column, the reference, is 0)."""
        R, K = _logistic_shape(network, name)
        out = np.zeros((R, K))
        if self.intercept_sd is not None:
            out[0, 1:] = 1.0 / self.intercept_sd ** 2
        if self.coefficient_sd is not None:
            out[1:, 1:] = 1.0 / self.coefficient_sd ** 2
        return out


def _check_sd(v: Any, key: str, where: str) -> float:
    if not _is_number(v):
        raise PriorError(f"{where}: {key} must be a number > 0 (a standard deviation on the log-odds scale, "
                         f"e.g. {key} = 2.5), got {v!r}")
    x = float(v)
    if not math.isfinite(x) or x <= 0:
        raise PriorError(f"{where}: {key} = {x:g}; it must be a finite number > 0 (a standard deviation on the "
                         f"log-odds scale; leave the key out for no prior on these coefficients)")
    return x


def normal_spec(coefficient_sd: float | None = None, intercept_sd: float | None = None) -> NormalSpec:
    """A normal prior on a logistic node's coefficients (standard deviations; None: none)."""
    return NormalSpec(None if coefficient_sd is None else _check_sd(coefficient_sd, "coefficient_sd", "<prior>"),
                      None if intercept_sd is None else _check_sd(intercept_sd, "intercept_sd", "<prior>"))


def pseudo_counts_spec(value: float | Any) -> PriorSpec:
    """``pseudo_counts = value``: a number for every cell, or a 2-D table of per-cell counts."""
    if _is_number(value):
        return PriorSpec("pseudo_counts", value=float(value))
    return PriorSpec("pseudo_counts", cells=_as_cells(value, "pseudo_counts", "<prior>"))


def ess_spec(ess: float) -> PriorSpec:
    """``equivalent_sample_size = ess`` (BDeu, c = ESS / (q_i · r_i) per cell)."""
    if not _is_number(ess):
        raise PriorError(f"equivalent_sample_size must be a number >= 0, got {ess!r}")
    return PriorSpec("equivalent_sample_size", value=float(ess))


def alpha_spec(alpha: float | Any) -> PriorSpec:
    """``alpha = value``: Dirichlet α directly (a number or a table); must be >= 1 everywhere."""
    if _is_number(alpha):
        return PriorSpec("alpha", value=float(alpha))
    return PriorSpec("alpha", cells=_as_cells(alpha, "alpha", "<prior>"))


def expert_spec(table: Any, strength: float) -> PriorSpec:
    """An expert CPT (rows summing to 1) worth ``strength`` pseudo-observations per row."""
    if not _is_number(strength):
        raise PriorError(f"strength must be a number >= 0, got {strength!r}")
    return PriorSpec("table", cells=_as_cells(table, "table", "<prior>"), strength=float(strength))


# --------------------------------------------------------------------- prior
@dataclass(frozen=True)
class Prior:
    """A Dirichlet prior on the free CPTs: a default entry and per-node entries.

    Frozen and hashable. Build it with :func:`load_prior` / :func:`prior_from_dict` (validated
    against a network at once), or directly, e.g.
    ``Prior(default=pseudo_counts_spec(1.0), nodes=(("vibration", expert_spec(t, 30)),))``,
    in which case :meth:`pseudo_counts` validates it.

    Attributes:
        default: the entry for every free table / noisy node without its own entry (None: no
            prior there); it does not apply to logistic nodes (a Dirichlet is not a prior on
            coefficients).
        nodes: ``(name, entry)`` pairs; a node's entry replaces the default for that node. A
            logistic node's entry is a :class:`NormalSpec`.
        source: where the prior came from (for messages and the result file).
        normal: the default :class:`NormalSpec` of every logistic node without its own entry.
    """

    default: PriorSpec | None = None
    nodes: tuple[tuple[str, "PriorSpec | NormalSpec"], ...] = ()
    source: str = "<prior>"
    normal: NormalSpec | None = None   # the [default] entry's coefficient_sd / intercept_sd (logistic nodes)

    def __post_init__(self) -> None:
        names = [n for n, _ in self.nodes]
        dup = sorted({n for n in names if names.count(n) > 1})
        if dup:
            raise PriorError(f"{self.source}: node(s) {dup} have more than one prior entry; give one per node")

    # constructors for the Python API
    @classmethod
    def flat(cls, pseudo_counts: float = 1.0) -> "Prior":
        """The same pseudo-count on every cell of every free CPT."""
        return cls(default=pseudo_counts_spec(pseudo_counts), source=f"<pseudo_counts={pseudo_counts:g}>")

    @classmethod
    def bdeu(cls, equivalent_sample_size: float) -> "Prior":
        """BDeu pseudo-counts ESS / (q_i · r_i) on every free node."""
        return cls(default=ess_spec(equivalent_sample_size),
                   source=f"<equivalent_sample_size={equivalent_sample_size:g}>")

    def with_node(self, name: str, spec: PriorSpec) -> "Prior":
        """A copy with ``spec`` as the entry of ``name`` (replacing any entry it had)."""
        rest = tuple((n, s) for n, s in self.nodes if n != name)
        return Prior(self.default, rest + ((name, spec),), self.source, self.normal)

    @property
    def node_specs(self) -> dict[str, PriorSpec]:
        return dict(self.nodes)

    def spec_for(self, name: str) -> "PriorSpec | NormalSpec | None":
        """The entry that applies to ``name`` (its own, else the default)."""
        return self.node_specs.get(name, self.default)

    @property
    def has_normal(self) -> bool:
        """Whether some entry is a normal prior on logistic coefficients."""
        return self.normal is not None or any(isinstance(s, NormalSpec) for _, s in self.nodes)

    def pseudo_counts(self, network: Network) -> dict[str, np.ndarray]:
        """The prior's array for every FREE node: Dirichlet pseudo-counts shaped like its CPT
        (``network.cpt_shape(name)``; a noisy node: its cause rows), or for a ``cpd = "logistic"``
        node the **precisions** ``1/sd²`` of its coefficients, shaped like its parameter rows
        (intercept, then each parent's non-first states; :meth:`NormalSpec.precisions`), the
        form in which the fit, the error bars and the EM reference take the prior.

        Zeros where no prior applies. Raises :class:`PriorError` for entries naming an unknown or
        a fixed node, wrong shapes, negative counts, rows of an expert table not summing to 1,
        negative strength or ESS, α < 1, a standard deviation on a node that is not logistic, and
        a Dirichlet entry on a logistic node.
        """
        own = self.node_specs
        for name in own:
            if name not in network:
                free = ", ".join(network.free_names) or "(none)"
                raise PriorError(f"{self.source}: [nodes.{name}]: unknown node {name!r}; "
                                 f"the free nodes of the network are: {free}")
            if network.node(name).fixed is not None:
                raise PriorError(f"{self.source}: [nodes.{name}]: node {name!r} has a fixed CPT; a prior does not "
                                 f"apply (remove this entry, or remove 'fixed' from the network file)")
            if network.node(name).tied_to is not None:
                src = network.node(name).tied_to
                raise PriorError(f"{self.source}: [nodes.{name}]: node {name!r} is tied to {src!r} and shares its "
                                 f"parameters; give the prior as [nodes.{src}] (it applies to both)")
            if isinstance(own[name], NormalSpec) and network.cpd_form(name) != "logistic":
                keys = " and ".join(own[name].to_dict()) or "coefficient_sd"
                raise PriorError(f"{self.source}: [nodes.{name}]: {keys} apply to nodes with cpd = 'logistic' only; "
                                 f"node {name!r} has cpd = {network.cpd_form(name)!r} (give it pseudo_counts, "
                                 f"equivalent_sample_size, alpha or table + strength instead)")
        out: dict[str, np.ndarray] = {}
        for name in network.free_names:
            if network.node(name).tied_to is not None:
                out[name] = np.zeros(_shape(network, network.tie_source(name)))  # a tie takes its source's prior, once
            elif network.cpd_form(name) == "logistic":
                spec = own.get(name, self.normal)
                if isinstance(spec, NormalSpec):
                    out[name] = spec.precisions(network, name)
                elif spec is not None:  # a Dirichlet entry of its own: refused (or pseudo_counts = 0: none)
                    out[name] = _resolve(spec, network, name, f"{self.source}: [nodes.{name}]")
                else:
                    out[name] = np.zeros(_shape(network, name))
                continue
            elif name in own:
                out[name] = _resolve(own[name], network, name, f"{self.source}: [nodes.{name}]")
            elif self.default is not None:
                out[name] = _resolve(self.default, network, name, f"{self.source}: [default] (node {name!r})")
            else:
                out[name] = np.zeros(_shape(network, name))
            with np.errstate(over="ignore"):
                total = float(out[name].sum())
            if not total <= MAX_TOTAL_PSEUDO_COUNT:
                where = f"[nodes.{name}]" if name in own else f"[default] (node {name!r})"
                shown = "more than 1.8e308 (float64 overflows)" if not math.isfinite(total) else f"{total:.4g}"
                raise PriorError(f"{self.source}: {where}: the pseudo-counts add up to {shown}, more than 2**53 = "
                                 f"{MAX_TOTAL_PSEUDO_COUNT:.4g} imagined records, beyond which float64 no longer counts "
                                 f"them exactly; give smaller pseudo-counts (a few per cell is common practice)")
        return out

    def to_dict(self) -> dict[str, Any]:
        """The prior in the file schema (``prior_from_dict(p.to_dict(), net) == p`` up to ``source``)."""
        doc: dict[str, Any] = {}
        if self.default is not None or self.normal is not None:
            doc["default"] = {**(self.default.to_dict() if self.default is not None else {}),
                              **(self.normal.to_dict() if self.normal is not None else {})}
        if self.nodes:
            doc["nodes"] = {n: s.to_dict() for n, s in self.nodes}
        return doc

    def describe(self, network: Network | None = None) -> dict[str, Any]:
        """JSON-ready description for the result file.

        Keys: ``source``, ``objective`` (the formula in words), ``spec`` (the file schema) and,
        when ``network`` is given, ``total_pseudo_counts`` per free node.
        """
        d: dict[str, Any] = {"source": self.source,
                             "objective": OBJECTIVE_TEXT_NORMAL if self.has_normal else OBJECTIVE_TEXT,
                             "spec": self.to_dict()}
        if network is not None:
            arrays = self.pseudo_counts(network)
            d["total_pseudo_counts"] = {n: float(c.sum()) for n, c in arrays.items()
                                        if network.cpd_form(network.tie_source(n)) != "logistic"}
            sds = {}
            for n in network.free_names:
                if network.cpd_form(n) == "logistic" and network.node(n).tied_to is None:
                    spec = self.node_specs.get(n, self.normal)
                    if isinstance(spec, NormalSpec) and spec.to_dict():
                        sds[n] = spec.to_dict()
            if sds:
                d["coefficient_prior_sd"] = sds
        return d


# --------------------------------------------------------------------- parsing
def load_prior(path: str | Path, network: Network) -> Prior:
    """Read a prior TOML file and validate it against ``network``."""
    p = Path(path)
    try:
        raw = p.read_bytes()
    except FileNotFoundError:
        raise PriorError(f"{p}: prior file not found") from None
    except IsADirectoryError:
        raise PriorError(f"{p}: is a folder; give the prior TOML file") from None
    except OSError as e:
        raise PriorError(f"{p}: cannot read prior file ({e.strerror})") from None
    try:
        doc = tomllib.loads(raw.decode("utf-8"))
    except UnicodeDecodeError:
        raise PriorError(f"{p}: prior file is not UTF-8 text") from None
    except tomllib.TOMLDecodeError as e:
        raise PriorError(f"{p}: not valid TOML ({e})") from None
    except RecursionError:
        from .io import depth_message

        raise PriorError(depth_message(p, None, "prior")) from None
    from .io import depth_message, too_deep

    where = too_deep(doc)
    if where is not None:
        raise PriorError(depth_message(p, where, "prior"))
    return prior_from_dict(doc, network, source=str(p))


def prior_from_dict(doc: Mapping[str, Any], network: Network, *, source: str = "<prior>") -> Prior:
    """Build a :class:`Prior` from the parsed document and validate it against ``network``."""
    if not isinstance(doc, Mapping):
        raise PriorError(f"{source}: a prior must be a table with [default] and/or [nodes.NAME] entries")
    extra = sorted(set(doc) - _TOP_KEYS)
    if extra:
        raise PriorError(f"{source}: unknown top-level key(s) {extra}; allowed: [default] and [nodes.NAME] tables")
    default = normal = None
    if "default" in doc:
        entry = doc["default"]
        if isinstance(entry, Mapping) and set(entry) & set(NORMAL_KEYS):
            normal = _parse_normal(entry, f"{source}: [default]")
            entry = {k: v for k, v in entry.items() if k not in NORMAL_KEYS}
        if not (normal is not None and not entry):
            default = _parse_entry(entry, f"{source}: [default]", _DEFAULT_KEYS, is_default=True)
    nodes: list[tuple[str, PriorSpec | NormalSpec]] = []
    nodes_doc = doc.get("nodes", {})
    if not isinstance(nodes_doc, Mapping):
        raise PriorError(f"{source}: 'nodes' must hold [nodes.NAME] tables")
    for name, entry in nodes_doc.items():
        where = f"{source}: [nodes.{name}]"
        if isinstance(entry, Mapping) and set(entry) & set(NORMAL_KEYS):
            other = sorted(set(entry) - set(NORMAL_KEYS))
            if other:
                raise PriorError(f"{where}: gives {', '.join(sorted(set(entry) & set(NORMAL_KEYS)))} with "
                                 f"{', '.join(other)}; a logistic node takes coefficient_sd / intercept_sd only, "
                                 f"the other nodes the Dirichlet keys only")
            nodes.append((str(name), _parse_normal(entry, where)))
        else:
            nodes.append((str(name), _parse_entry(entry, where, _NODE_KEYS - set(NORMAL_KEYS), is_default=False)))
    prior = Prior(default, tuple(nodes), source, normal)
    prior.pseudo_counts(network)  # validate now: shapes, signs, sums, fixed/unknown nodes
    return prior


def _parse_normal(entry: Mapping[str, Any], where: str) -> NormalSpec:
    """The coefficient_sd / intercept_sd keys of an entry, checked (each a finite number > 0)."""
    return NormalSpec(*(None if k not in entry else _check_sd(entry[k], k, where) for k in NORMAL_KEYS))


def _parse_entry(entry: Any, where: str, allowed: set[str], *, is_default: bool) -> PriorSpec:
    if not isinstance(entry, Mapping):
        raise PriorError(f"{where}: must be a table of keys (e.g. pseudo_counts = 1.0)")
    keys = set(entry)
    unknown = sorted(keys - allowed)
    if unknown:
        if is_default and set(unknown) & {"table", "strength"}:
            raise PriorError(f"{where}: 'table'/'strength' belong in a [nodes.NAME] entry (table shapes differ "
                             f"per node); [default] takes pseudo_counts, equivalent_sample_size or alpha")
        raise PriorError(f"{where}: unknown key(s) {unknown}; allowed: {', '.join(sorted(allowed))}")
    if "strength" in keys and "table" not in keys:
        raise PriorError(f"{where}: strength is given without table; add table = [[...]] (the expert CPT)")
    if "table" in keys and "strength" not in keys:
        raise PriorError(f"{where}: table is given without strength; add strength = S "
                         f"(pseudo-observations per parent configuration)")
    kinds = sorted(k for k in keys if k in KINDS)
    if len(kinds) != 1:
        choices = "pseudo_counts, equivalent_sample_size, alpha" + ("" if is_default else ", or table + strength")
        if not kinds:
            raise PriorError(f"{where}: empty entry; give one of {choices}")
        raise PriorError(f"{where}: gives {' and '.join(kinds)}; give only one of {choices}")
    kind = kinds[0]
    v = entry[kind]
    if kind == "table":
        s = entry["strength"]
        if not _is_number(s):
            raise PriorError(f"{where}: strength must be a number >= 0, got {s!r}")
        return PriorSpec("table", cells=_as_cells(v, "table", where), strength=float(s))
    if kind == "equivalent_sample_size":
        if not _is_number(v):
            raise PriorError(f"{where}: equivalent_sample_size must be one number >= 0, got {v!r}")
        return PriorSpec(kind, value=float(v))
    if _is_number(v):
        return PriorSpec(kind, value=float(v))
    if is_default:
        raise PriorError(f"{where}: {kind} must be one number here (per-cell tables go in [nodes.NAME])")
    return PriorSpec(kind, cells=_as_cells(v, kind, where))


def _is_number(x: Any) -> bool:
    return isinstance(x, (int, float, np.integer, np.floating)) and not isinstance(x, (bool, np.bool_))


def _as_cells(x: Any, what: str, where: str) -> Cells:
    """A flat list or a list of lists of numbers, as a tuple of float tuples (shape unchecked)."""
    if isinstance(x, np.ndarray):
        x = x.tolist()
    if not isinstance(x, (list, tuple)) or not x:
        raise PriorError(f"{where}: {what} must be a number or a non-empty list of rows of numbers")
    rows = [x] if all(_is_number(v) for v in x) else x
    out = []
    for i, row in enumerate(rows):
        if isinstance(row, np.ndarray):
            row = row.tolist()
        if not isinstance(row, (list, tuple)) or not all(_is_number(v) for v in row):
            raise PriorError(f"{where}: {what} row {i + 1} is not a list of numbers")
        out.append(tuple(float(v) for v in row))
    return tuple(out)


# --------------------------------------------------------------------- resolution
def _is_noisy(network: Network, name: str) -> bool:
    return network.cpd_form(name) in ("noisy_or", "noisy_max")


def _logistic_shape(network: Network, name: str) -> tuple[int, int]:
    """The parameter rows of a logistic node: (1 + Σ (parent states − 1), states)."""
    node = network.node(name)
    return (1 + sum(network.node(p).card - 1 for p in node.parents), node.card)


def _shape(network: Network, name: str) -> tuple[int, ...]:
    """What a prior of ``name`` is shaped like: its CPT, or for a noisy_or / noisy_max node its
    cause rows (the leak, then each parent's non-first states in order; docs/priors.md), or for a
    logistic node its coefficient rows (the intercept, then the same)."""
    if _is_noisy(network, name) or network.cpd_form(name) == "logistic":
        node = network.node(name)
        return (1 + sum(network.node(p).card - 1 for p in node.parents), node.card)
    return tuple(network.cpt_shape(name))


def _n_rows(network: Network, name: str) -> int:
    return _shape(network, name)[0] if _is_noisy(network, name) else network.n_parent_configs(name)


def _resolve(spec: PriorSpec, network: Network, name: str, where: str) -> np.ndarray:
    if network.cpd_form(name) == "logistic":
        if spec.kind == "pseudo_counts" and spec.value == 0.0:
            return np.zeros(_shape(network, name))
        raise PriorError(f"{where}: node {name!r} has cpd = 'logistic': Dirichlet priors do not apply to its "
                         f"coefficients; give coefficient_sd = SD (and intercept_sd = SD if wanted), a normal prior "
                         f"on the log-odds, or leave it out of the prior file")
    shape = _shape(network, name)
    q, r = _n_rows(network, name), shape[-1]
    if spec.kind == "pseudo_counts":
        c = _scalar_or_cells(spec, network, name, where, "pseudo_counts")
        _check_min(c, 0.0, network, name, where, "pseudo_counts",
                   "pseudo-counts must be >= 0 (they add imagined observations)")
        return c.reshape(shape)
    if spec.kind == "equivalent_sample_size":
        ess = float(spec.value)  # type: ignore[arg-type]
        if not math.isfinite(ess) or ess < 0:
            raise PriorError(f"{where}: equivalent_sample_size = {ess:g}; it must be a finite number >= 0")
        # BDeu (Heckerman, Geiger & Chickering 1995): alpha_ijk = ESS / (q_i r_i) per cell.
        return np.full(shape, ess / (q * r))
    if spec.kind == "alpha":
        a = _scalar_or_cells(spec, network, name, where, "alpha")
        _check_min(a, 1.0, network, name, where, "alpha", _ALPHA_WHY)
        return (a - 1.0).reshape(shape)
    # expert table
    s = float(spec.strength)  # type: ignore[arg-type]
    if not math.isfinite(s) or s < 0:
        raise PriorError(f"{where}: strength = {s:g}; it must be a finite number >= 0 "
                         f"(pseudo-observations per parent configuration)")
    t = _cells_array(spec.cells, network, name, where, "table")  # type: ignore[arg-type]
    _check_min(t, 0.0, network, name, where, "table", "probabilities must be >= 0")
    sums = t.sum(axis=1)
    off = np.flatnonzero(np.abs(sums - 1.0) > SUM_TOL)
    if off.size:
        i = int(off[0])
        raise PriorError(f"{where}: table row {i + 1} ({_cfg(network, name, i)}) sums to {sums[i]:.6g}, not 1; "
                         f"each row of an expert table is a distribution over the states of {name!r}")
    return (s * t).reshape(shape)


def _scalar_or_cells(spec: PriorSpec, network: Network, name: str, where: str, what: str) -> np.ndarray:
    q, r = _n_rows(network, name), network.node(name).card
    if spec.cells is None:
        v = float(spec.value)  # type: ignore[arg-type]
        if not math.isfinite(v):
            raise PriorError(f"{where}: {what} = {v}; it must be a finite number")
        return np.full((q, r), v)
    return _cells_array(spec.cells, network, name, where, what)


def _cells_array(cells: Cells, network: Network, name: str, where: str, what: str) -> np.ndarray:
    q, r = _n_rows(network, name), network.node(name).card
    lens = {len(row) for row in cells}
    if len(cells) != q or lens != {r}:
        got = f"{len(cells)} row(s) of {'/'.join(str(n) for n in sorted(lens))} entries"
        if _is_noisy(network, name):
            from .forms import cause_row_labels

            raise PriorError(f"{where}: {what} has {got}, expected {q} row(s) of {r} entries for the "
                             f"{network.cpd_form(name)} node {name!r} (one row per cause: "
                             f"{', '.join(cause_row_labels(network, name))})")
        parents = ", ".join(network.node(name).parents) or "none"
        raise PriorError(f"{where}: {what} has {got}, expected {q} row(s) of {r} entries for node {name!r} "
                         f"(one row per parent configuration, last parent varying fastest; parents: {parents})")
    a = np.asarray(cells, dtype=np.float64)
    if not np.all(np.isfinite(a)):
        i, j = np.argwhere(~np.isfinite(a))[0]
        raise PriorError(f"{where}: {what} row {i + 1} has a non-finite entry; use finite numbers")
    return a


def _check_min(a: np.ndarray, lo: float, network: Network, name: str, where: str, what: str, why: str) -> None:
    bad = np.argwhere(a.reshape(-1, a.shape[-1]) < lo)
    if bad.size:
        i, j = (int(v) for v in bad[0])
        val = a.reshape(-1, a.shape[-1])[i, j]
        state = network.node(name).states[j]
        raise PriorError(f"{where}: {what} row {i + 1} ({_cfg(network, name, i)}), state {state!r} is {val:g} < {lo:g}; "
                         f"{why}")


def _cfg(network: Network, name: str, row: int) -> str:
    if _is_noisy(network, name):
        from .forms import cause_row_labels

        return f"cause {cause_row_labels(network, name)[row]}"
    labels = network.parent_config_labels(name)[row]
    return ", ".join(f"{p}={s}" for p, s in zip(network.node(name).parents, labels)) or "no parents"


def resolve_pseudo_counts(prior: "Prior | Mapping[str, Any] | None", network: Network) -> dict[str, np.ndarray]:
    """Pseudo-counts for every free node from ``None`` (all zeros), a :class:`Prior`, or a mapping
    ``name -> array`` of explicit pseudo-counts (CPT shape or table layout; missing free nodes get
    zeros). Validates shapes and signs; raises :class:`PriorError`.
    """
    if prior is None:
        return {n: np.zeros(_shape(network, network.tie_source(n))) for n in network.free_names}
    if isinstance(prior, Prior):
        return prior.pseudo_counts(network)
    if not isinstance(prior, Mapping):
        raise PriorError(f"prior must be None, a Prior or a dict of pseudo-count arrays, got {type(prior).__name__}")
    specs, precisions = [], {}
    for name, v in prior.items():
        where = f"<pseudo_counts>[{name}]"
        try:
            a = np.asarray(v, dtype=np.float64)
        except (TypeError, ValueError):
            raise PriorError(f"{where}: pseudo-counts must be a number or an array of numbers") from None
        if name in network and network.cpd_form(name) == "logistic" and network.node(name).tied_to is None \
                and network.node(name).fixed is None and a.ndim == 2 and a.shape == _shape(network, name):
            # a logistic node's array holds the precisions 1/sd² of its coefficients (column 0, the
            # reference state, is 0): Prior.pseudo_counts's form
            if not np.all(np.isfinite(a)) or np.any(a < 0) or np.any(a[:, 0] != 0):
                raise PriorError(f"{where}: the precisions 1/sd^2 of a logistic node's coefficients must be finite "
                                 f"and >= 0, with 0 in the first (reference) state's column")
            precisions[str(name)] = a.copy()
            continue
        if a.ndim == 0:
            specs.append((str(name), PriorSpec("pseudo_counts", value=float(a))))
            continue
        if name in network and _is_noisy(network, name) and a.shape != _shape(network, name):
            from .forms import cause_row_labels

            raise PriorError(f"{where}: pseudo-counts have shape {a.shape}, expected {_shape(network, name)} for the "
                             f"{network.cpd_form(name)} node {name!r} (one row per cause: "
                             f"{', '.join(cause_row_labels(network, name))})")
        if a.ndim > 2 and name in network and a.shape != _shape(network, name):
            raise PriorError(f"{where}: pseudo-counts have shape {a.shape}, expected {network.cpt_shape(name)} "
                             f"(the CPT shape) or the 2-D table layout")
        specs.append((str(name), PriorSpec("pseudo_counts",
                                           cells=_as_cells(a.reshape(-1, a.shape[-1]).tolist(), "pseudo_counts", where))))
    p = Prior(nodes=tuple(specs), source="<pseudo_counts>")
    return {**p.pseudo_counts(network), **precisions}


# --------------------------------------------------------------------- objective pieces
def log_prior(probs: Mapping[str, Any], pseudo_counts: Mapping[str, np.ndarray]) -> float:
    """Σ c·log θ over the nodes of ``pseudo_counts`` (0·log 0 = 0; c > 0 with θ = 0 gives -inf).

    ``probs`` may hold more nodes (fixed ones); they are ignored. This is the log of the
    Dirichlet(α = c + 1) density up to its normalising constant; no softmax Jacobian.
    """
    total = 0.0
    for name, c in pseudo_counts.items():
        c = np.asarray(c, dtype=np.float64)
        if name not in probs:
            raise PriorError(f"log_prior: no probabilities for node {name!r}, which has pseudo-counts")
        th = np.asarray(probs[name], dtype=np.float64)
        if th.shape != c.shape:
            raise PriorError(f"log_prior: node {name!r}: probabilities have shape {th.shape}, pseudo-counts {c.shape}")
        pos = c > 0
        if not pos.any():
            continue
        with np.errstate(divide="ignore"):
            total += float(np.sum(c[pos] * np.log(th[pos])))
    return total


def log_prior_logits(logits: Mapping[str, Any], pseudo_counts: Mapping[str, np.ndarray]):
    """Σ c·log softmax(logits) for use inside a JAX objective (jit- and grad-safe).

    Only nodes present in both mappings contribute. Returns a JAX scalar.
    """
    from ._jax import jax, jnp

    total = jnp.zeros(())
    for name, z in logits.items():
        c = pseudo_counts.get(name)
        if c is None:
            continue
        c = np.asarray(c, dtype=np.float64)
        if not np.any(c > 0):
            continue
        total = total + jnp.sum(jnp.asarray(c) * jax.nn.log_softmax(z, axis=-1))
    return total


def check_l2(l2: Any) -> float:
    """Validate an ``--l2`` value: a finite number >= 0."""
    if not _is_number(l2):
        raise PriorError(f"--l2 must be a number >= 0, got {l2!r}")
    v = float(l2)
    if not math.isfinite(v) or v < 0:
        raise PriorError(f"--l2 = {v:g}; it must be a finite number >= 0 (0 switches the penalty off)")
    return v


def l2_penalty(logits: Mapping[str, Any], l2: float):
    """λ·Σ (logit − row mean)² over the free logits (invariant to the per-row softmax shift).

    Works on numpy and JAX arrays (jit- and grad-safe); returns a scalar of the input's kind.
    It shrinks every row toward the uniform distribution; shrinking toward expert tables is
    the prior's job.
    """
    total = 0.0
    for z in logits.values():
        d = z - z.mean(axis=-1, keepdims=True)
        total = total + (d * d).sum()
    return l2 * total


# --------------------------------------------------------------------- closed forms, diagnostics
def complete_data_map(counts: Any, pseudo_counts: Any) -> Any:
    """Closed-form MAP on complete data: ``θ̂ = (N + c) / (N_u + Σc)`` per row (last axis).

    ``counts`` and ``pseudo_counts`` are arrays of one CPT shape, or dicts of them keyed by node
    (then a dict is returned for the keys of ``counts``; a node absent from ``pseudo_counts``
    gets c = 0). A row with N_u + Σc = 0 is undefined and comes back as NaN.
    """
    if isinstance(counts, Mapping):
        pc = pseudo_counts or {}
        return {n: complete_data_map(v, pc.get(n, np.zeros(np.shape(v)))) for n, v in counts.items()}
    a = np.asarray(counts, dtype=np.float64) + np.asarray(pseudo_counts, dtype=np.float64)
    tot = a.sum(axis=-1, keepdims=True)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(tot > 0, a / np.where(tot > 0, tot, 1.0), np.nan)


def prior_only_rows(network: Network, expected_parent_counts: Mapping[str, Any],
                    pseudo_counts: Mapping[str, np.ndarray], threshold: float = 1e-9) -> dict[str, list[int]]:
    """Rows whose data weight is zero but which have a prior: their estimate is the prior mode.

    Args:
        network: the network (for shapes).
        expected_parent_counts: per free node, the (expected) number of records in each parent
            configuration, shape ``(q,)`` in table row order (or the parent shape).
        pseudo_counts: per free node, as from :meth:`Prior.pseudo_counts`.
        threshold: a data weight at or below this counts as zero.

    Returns:
        ``{name: [row, ...]}`` with 0-based table row indices, only for nodes that have such rows.
    """
    out: dict[str, list[int]] = {}
    for name, c in pseudo_counts.items():
        if name not in expected_parent_counts:
            continue
        q = network.n_parent_configs(name)
        w = np.asarray(expected_parent_counts[name], dtype=np.float64).reshape(-1)
        if w.size != q:
            raise PriorError(f"prior_only_rows: node {name!r}: {w.size} parent-configuration weights, expected {q}")
        csum = np.asarray(c, dtype=np.float64).reshape(q, -1).sum(axis=1)
        rows = np.flatnonzero((w <= threshold) & (csum > 0))
        if rows.size:
            out[name] = [int(i) for i in rows]
    return out


def describe_rows(network: Network, rows: Mapping[str, list[int]]) -> list[str]:
    """Readable labels for :func:`prior_only_rows` output, e.g. ``"vibration | wear=worn"``."""
    return [f"{name} | {_cfg(network, name, i)}" for name, idx in rows.items() for i in idx]


def result_pseudo_counts(result: Any, pseudo_counts: Mapping[str, Any] | None, *, what: str) -> dict[str, np.ndarray] | None:
    """The pseudo-counts a fit used: those given, or rebuilt from the prior its result records.

    ``what`` names the step that needs them, for the error message (e.g. "the EM cross-check").
    Returns None for a maximum-likelihood fit given no pseudo-counts.
    """
    from .errors import OptionError

    if pseudo_counts is not None:
        if getattr(result, "objective", "mle") == "mle" and any(np.any(np.asarray(v) > 0) for v in pseudo_counts.values()):
            raise OptionError("pseudo_counts were given but the result is a maximum-likelihood fit (objective mle); "
                              "pass the pseudo-counts the fit used, or none")
        return {k: np.asarray(v, dtype=np.float64) for k, v in pseudo_counts.items()}
    if getattr(result, "objective", "mle") != "map":
        return None
    spec = (result.extras or {}).get("prior", {})
    spec = spec.get("spec") if isinstance(spec, Mapping) else None
    if spec is None:
        raise OptionError(f"{what} of a MAP fit needs the prior: pass pseudo_counts=... "
                          f"(the result does not record its prior)")
    return prior_from_dict(spec, result.network, source="<result prior>").pseudo_counts(result.network)

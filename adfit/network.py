"""The static network description: nodes, states, parents, latent flags and fixed CPTs.

A :class:`Network` is immutable and hashable, so it can be a static argument to ``jax.jit``.
Parameters (logits or probabilities) are kept apart from it, as dicts of arrays keyed by node
name, one array per node shaped ``(*parent_cards, card)``.

Table layout (the network file, the prior file and every result): a CPT is a 2-D list with one
row per parent configuration, rows in row-major order over the parents as listed (the last
parent varies fastest, each parent's states in declared order), each row a distribution over
the node's states. A node without parents may give a flat list.
"""

from __future__ import annotations

from collections import Counter

import math
import re
import tomllib
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Iterable, Mapping, Sequence

import numpy as np

from .errors import NetworkError

SUM_TOL = 1e-6  # tolerance on a probability row summing to 1
# The largest table one record's exact sum over its hidden nodes may need (the elimination's
# largest clique, in entries): 2**27 entries are 1 GiB of float64 per record. A network whose
# elimination order needs more is refused before anything is compiled (docs/user-guide.md).
MAX_TABLE_ENTRIES = 2 ** 27


def table_too_large(entries: int, node: str, n_vars: int) -> str:
    """The one-line refusal of an elimination whose table would exceed MAX_TABLE_ENTRIES."""
    return (f"the exact sum over the hidden nodes needs a table of {entries:.3g} entries per record "
            f"({entries * 8 / 2 ** 30:.3g} GiB) when node {node!r} is summed out ({n_vars} nodes joined); "
            f"the limit is 2**27 = {MAX_TABLE_ENTRIES:,} entries: give the latent or often-missing nodes "
            f"fewer states, give nodes fewer parents, or record more of the hidden nodes")
_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")  # matched whole (fullmatch: "$" would let a trailing newline through)
_NODE_KEYS = {"states", "parents", "latent", "fixed", "cpd", "tied_to", "impossible", "increasing_with"}
# the forms a CPT may take (``cpd = "..."``; docs/user-guide.md "Structured CPTs"): the full table
# (softmax per row), the causal-independence forms and the multinomial logistic form
CPD_FORMS = ("table", "noisy_or", "noisy_max", "logistic")


@dataclass(frozen=True)
class Node:
    """One variable of the network.

    Attributes:
        name: identifier of the node (and of its data column).
        states: the state labels, in the order used by every table.
        parents: names of the parents, in the order that defines the table rows.
        latent: True when the node is never observed (it has no data column).
        fixed: a known CPT, flattened row-major from shape ``(*parent_cards, card)``;
            None when the CPT is estimated.
        cpd: the form of the estimated CPT, one of :data:`CPD_FORMS` ("table" by default).
        tied_to: the node whose parameters this node shares (same states, same parents' state
            lists, same form), or None. The tied node's form, impossible cells and monotone
            parents are the source's.
        impossible: cells fixed at 0, as ``(row, state)`` index pairs into the CPT's 2-D layout
            (row = parent configuration in row-major order, last parent fastest), sorted.
        increasing_with: parents along whose state order the node's distribution is
            stochastically non-decreasing (first-order dominance over the node's state order).
    """

    name: str
    states: tuple[str, ...]
    parents: tuple[str, ...] = ()
    latent: bool = False
    fixed: tuple[float, ...] | None = None
    cpd: str = "table"
    tied_to: str | None = None
    impossible: tuple[tuple[int, int], ...] = ()
    increasing_with: tuple[str, ...] = ()

    @property
    def card(self) -> int:
        return len(self.states)


@dataclass(frozen=True)
class Network:
    """A discrete Bayesian network structure with optional fixed CPTs.

    ``nodes`` are stored in a topological order (every parent before its children; among
    nodes free to go in either order, the order of the file is kept).
    """

    nodes: tuple[Node, ...]
    _index: Mapping[str, int] = field(default=None, compare=False, hash=False, repr=False)  # type: ignore[assignment]
    #: ``[network] title = "..."`` of the file: names the network in reports (not part of its identity)
    title: str | None = field(default=None, compare=False, hash=False)

    def __post_init__(self) -> None:
        index: dict[str, int] = {}
        for i, n in enumerate(self.nodes):
            if n.name in index:
                raise NetworkError(f"node {n.name!r} appears twice in the network; node names must be distinct")
            if len(n.states) < 2 or len(set(n.states)) != len(n.states):
                raise NetworkError(f"node {n.name!r}: states must be at least 2 distinct labels, got {list(n.states)}")
            for p in n.parents:
                if p not in index:
                    where = "is not a node of the network" if p not in {m.name for m in self.nodes} else \
                        "comes after it; nodes must be in topological order (use parse_network to sort them)"
                    raise NetworkError(f"node {n.name!r}: parent {p!r} {where}")
            index[n.name] = i
        object.__setattr__(self, "_index", index)
        for n in self.nodes:
            if n.fixed is not None:
                size = math.prod(self.node(p).card for p in n.parents) * n.card
                if len(n.fixed) != size:
                    raise NetworkError(f"node {n.name!r}: fixed table has {len(n.fixed)} entries, expected {size}")

    # ----------------------------------------------------------------- lookups
    @property
    def names(self) -> tuple[str, ...]:
        return tuple(n.name for n in self.nodes)

    @property
    def cards(self) -> tuple[int, ...]:
        return tuple(n.card for n in self.nodes)

    def __len__(self) -> int:
        return len(self.nodes)

    def __contains__(self, name: object) -> bool:
        return name in self._index

    def index(self, name: str) -> int:
        try:
            return self._index[name]
        except KeyError:
            from .errors import did_you_mean

            raise NetworkError(f"unknown node {name!r}; {did_you_mean(name, self.names)}"
                               f"the network has: {', '.join(self.names)}") from None

    def node(self, name: str) -> Node:
        return self.nodes[self.index(name)]

    @property
    def parent_indices(self) -> tuple[tuple[int, ...], ...]:
        return tuple(tuple(self._index[p] for p in n.parents) for n in self.nodes)

    @property
    def children(self) -> tuple[tuple[int, ...], ...]:
        kids: list[list[int]] = [[] for _ in self.nodes]
        for i, pa in enumerate(self.parent_indices):
            for p in pa:
                kids[p].append(i)
        return tuple(tuple(k) for k in kids)

    @property
    def observed_names(self) -> tuple[str, ...]:
        """Names of nodes that have a data column (not latent)."""
        return tuple(n.name for n in self.nodes if not n.latent)

    @property
    def latent_names(self) -> tuple[str, ...]:
        return tuple(n.name for n in self.nodes if n.latent)

    @property
    def free_names(self) -> tuple[str, ...]:
        """Names of nodes whose CPT is estimated (not fixed)."""
        return tuple(n.name for n in self.nodes if n.fixed is None)

    @property
    def fixed_names(self) -> tuple[str, ...]:
        return tuple(n.name for n in self.nodes if n.fixed is not None)

    @property
    def estimated_names(self) -> tuple[str, ...]:
        """Names of the estimated nodes that own their parameters: :attr:`free_names` without
        the nodes tied to another (``tied_to``), which share their source's."""
        return tuple(n.name for n in self.nodes if n.fixed is None and n.tied_to is None)

    def tied_names(self, source: str) -> tuple[str, ...]:
        """The nodes tied to ``source`` (they share its parameters)."""
        return tuple(n.name for n in self.nodes if n.tied_to == source)

    def cpt_shape(self, name: str) -> tuple[int, ...]:
        """Shape ``(*parent_cards, card)`` of the CPT array of ``name``."""
        n = self.node(name)
        return tuple(self.node(p).card for p in n.parents) + (n.card,)

    def n_parent_configs(self, name: str) -> int:
        return int(math.prod(self.cpt_shape(name)[:-1]))

    def fixed_table(self, name: str) -> np.ndarray | None:
        """The fixed CPT of ``name`` as an array of shape :meth:`cpt_shape`, or None."""
        n = self.node(name)
        if n.fixed is None:
            return None
        return np.asarray(n.fixed, dtype=np.float64).reshape(self.cpt_shape(name))

    def n_free_parameters(self) -> int:
        """Free parameters of the estimated CPTs: (possible states − 1) per parent configuration
        (``card − 1`` without impossible cells), counted once for a set of tied nodes. A node of
        a structured form counts its form's parameters: noisy_or / noisy_max a leak and one
        distribution per active parent state, logistic an intercept and one coefficient vector per
        non-reference parent state, each with ``card − 1`` free entries."""
        total = 0
        for m in self.estimated_names:
            node = self.node(m)
            if node.cpd in ("noisy_or", "noisy_max", "logistic"):
                rows = 1 + sum(self.node(p).card - 1 for p in node.parents)
                total += rows * (node.card - 1)
                continue
            total += self.n_parent_configs(m) * (node.card - 1) - len(node.impossible)
        return total

    def parent_config_labels(self, name: str) -> list[tuple[str, ...]]:
        """Labels of the parent configurations of ``name``, in table row order."""
        n = self.node(name)
        states = [self.node(p).states for p in n.parents]
        out: list[tuple[str, ...]] = [()]
        for st in states:
            out = [o + (s,) for o in out for s in st]
        return out

    # ----------------------------------------------------------------- tables
    def table_to_array(self, name: str, table: Any, *, what: str = "table", check_rows: bool = True) -> np.ndarray:
        """Convert a 2-D list (or flat list for a parentless node) into a CPT array.

        Raises NetworkError naming the node and row on a wrong shape, negative entries or (when
        ``check_rows``) rows that do not sum to 1.
        """
        return table_to_array(self, name, table, what=what, check_rows=check_rows)

    def array_to_table(self, name: str, array: Any) -> list[list[float]]:
        """Convert a CPT array of shape :meth:`cpt_shape` to the 2-D list layout."""
        a = np.asarray(array, dtype=np.float64)
        shape = self.cpt_shape(name)
        if a.shape != shape:
            raise NetworkError(f"node {name!r}: table has shape {a.shape}, expected {shape}")
        return a.reshape(-1, shape[-1]).tolist()

    def to_dict(self) -> dict[str, Any]:
        """The network in the TOML schema, as nested dicts (for embedding in results)."""
        nodes: dict[str, Any] = {}
        for n in self.nodes:
            d: dict[str, Any] = {"states": list(n.states)}
            if n.parents:
                d["parents"] = list(n.parents)
            if n.latent:
                d["latent"] = True
            if n.fixed is not None:
                d["fixed"] = self.array_to_table(n.name, self.fixed_table(n.name))
            if n.cpd != "table" and n.tied_to is None:
                d["cpd"] = n.cpd
            if n.tied_to is not None:
                d["tied_to"] = n.tied_to
            if n.impossible and n.tied_to is None:
                labels = self.parent_config_labels(n.name)
                d["impossible"] = [{"given": dict(zip(n.parents, labels[r])), "state": n.states[k]}
                                   for r, k in n.impossible]
            if n.increasing_with and n.tied_to is None:
                d["increasing_with"] = list(n.increasing_with)
            nodes[n.name] = d
        return ({"network": {"title": self.title}} if self.title else {}) | {"nodes": nodes}

    # ----------------------------------------------------------------- structured CPTs
    def cpd_form(self, name: str) -> str:
        """The form of ``name``'s CPT ("table" for fixed nodes); a tied node has its source's."""
        return self.node(self.tie_source(name)).cpd

    def tie_source(self, name: str) -> str:
        """The node whose parameters ``name`` uses: its ``tied_to`` or itself."""
        return self.node(name).tied_to or name

    def impossible_mask(self, name: str) -> np.ndarray:
        """Boolean array of shape :meth:`cpt_shape`: True where the cell is fixed at 0 (the
        source's cells for a tied node)."""
        src = self.node(self.tie_source(name))
        shape = self.cpt_shape(name)
        mask = np.zeros((int(math.prod(shape[:-1])), shape[-1]), dtype=bool)
        for r, k in src.impossible:
            mask[r, k] = True
        return mask.reshape(shape)

    def unsupported_structure(self, supported: Sequence[str] = ("table",), *, what: str = "this fit") -> str | None:
        """A one-line refusal naming the first estimated node whose form, tie, impossible cells or
        monotone constraint ``what`` cannot estimate yet (forms in ``supported`` and plain tables
        can), or None. Estimating such a node as a full table would silently give other numbers."""
        for n in self.nodes:
            if n.fixed is not None:
                continue
            key = ("cpd" if n.cpd not in supported else "tied_to" if n.tied_to and "tied" not in supported
                   else "impossible" if n.impossible and "impossible" not in supported
                   else "increasing_with" if n.increasing_with and "increasing" not in supported else None)
            if key is not None:
                return (f"nodes.{n.name}.{key}: {what} cannot estimate this structured CPT yet; "
                        f"remove the key to estimate a full table, or fix the table")
        return None

    @property
    def is_structured(self) -> bool:
        """True when some estimated node is not a plain full table (another form, a tie, an
        impossible cell or a monotone constraint)."""
        return any(n.fixed is None and (n.cpd != "table" or n.tied_to or n.impossible or n.increasing_with)
                   for n in self.nodes)


def table_to_array(network: Network, name: str, table: Any, *, what: str = "table",
                   check_rows: bool = True, source: str = "") -> np.ndarray:
    where = f"{source}: " if source else ""
    shape = network.cpt_shape(name)
    q, r = int(math.prod(shape[:-1])), shape[-1]
    bad_entry = _first_non_number(table)
    if bad_entry is not None:
        raise NetworkError(
            f"{where}node {name!r}: {what} has the entry {bad_entry!r}, which is not a number; "
            f"write probabilities as numbers such as 0.25")
    try:
        a = np.asarray(table, dtype=np.float64)
    except (TypeError, ValueError):
        raise NetworkError(
            f"{where}node {name!r}: {what} must be a list of {q} rows of {r} numbers "
            f"(ragged or non-numeric entries found)") from None
    if a.ndim == 1 and q == 1:
        a = a.reshape(1, -1)
    if a.ndim != 2 or a.shape != (q, r):
        raise NetworkError(
            f"{where}node {name!r}: {what} has shape {list(a.shape)}, expected {q} row(s) of {r} "
            f"entries (one row per parent configuration, last parent varying fastest)")
    if not np.all(np.isfinite(a)):
        raise NetworkError(f"{where}node {name!r}: {what} has a non-finite entry; use numbers between 0 and 1")
    bad = np.argwhere(a < 0)
    if bad.size:
        i, j = bad[0]
        raise NetworkError(
            f"{where}node {name!r}: {what} row {i + 1} has a negative entry {a[i, j]:g} "
            f"(state {network.node(name).states[j]!r}); probabilities must be >= 0")
    if check_rows:
        sums = a.sum(axis=1)
        off = np.flatnonzero(np.abs(sums - 1.0) > SUM_TOL)
        if off.size:
            i = off[0]
            labels = network.parent_config_labels(name)[i]
            cfg = ", ".join(f"{p}={s}" for p, s in zip(network.node(name).parents, labels)) or "no parents"
            raise NetworkError(
                f"{where}node {name!r}: {what} row {i + 1} ({cfg}) sums to {sums[i]:.6g}, not 1; "
                f"each row must be a distribution over the states")
    return a.reshape(shape)


def _first_non_number(table: Any) -> Any:
    """The first entry of a (nested) list that is not a real number (bool and str count as not), or None."""
    if isinstance(table, np.ndarray):
        return None if table.dtype.kind in "iuf" else next(iter(table.ravel()), None)
    if isinstance(table, (list, tuple)):
        for x in table:
            b = _first_non_number(x)
            if b is not None:
                return b
        return None
    if isinstance(table, (bool, np.bool_)) or not isinstance(table, (int, float, np.integer, np.floating)):
        return table
    return None


# --------------------------------------------------------------------- parsing
def load_network(path: str | Path) -> Network:
    """Read a network TOML file (schema in the module docstring and docs/user-guide.md)."""
    p = Path(path)
    try:
        raw = p.read_bytes()
    except FileNotFoundError:
        raise NetworkError(f"{p}: network file not found") from None
    except OSError as e:
        raise NetworkError(f"{p}: cannot read network file ({e.strerror})") from None
    try:
        doc = tomllib.loads(raw.decode("utf-8-sig"))  # a leading byte-order mark is allowed
    except UnicodeDecodeError:
        raise NetworkError(f"{p}: network file is not UTF-8 text") from None
    except tomllib.TOMLDecodeError as e:
        raise NetworkError(f"{p}: not valid TOML ({e})") from None
    except RecursionError:
        from .io import depth_message

        raise NetworkError(depth_message(p, None, "network")) from None
    from .io import depth_message, too_deep

    where = too_deep(doc)
    if where is not None:
        raise NetworkError(depth_message(p, where, "network"))
    return parse_network(doc, source=str(p))


def parse_network(doc: Mapping[str, Any], *, source: str = "<network>") -> Network:
    """Build a :class:`Network` from the parsed TOML document (a dict with a ``nodes`` table)."""
    if not isinstance(doc, Mapping) or "nodes" not in doc:
        raise NetworkError(f"{source}: no [nodes.NAME] tables found; each node needs a [nodes.NAME] table with states = [...]")
    extra = set(doc) - {"nodes", "network"}
    if extra:
        raise NetworkError(f"{source}: unknown top-level key(s) {sorted(extra)}; only [nodes.NAME] tables are allowed")
    if "network" in doc and not isinstance(doc["network"], Mapping):
        raise NetworkError(f"{source}: 'network' must be a table ([network]) of descriptive keys")
    title = (doc.get("network") or {}).get("title")
    if title is not None and not (isinstance(title, str) and title.strip()):
        raise NetworkError(f"{source}: [network] title must be a non-empty string, e.g. title = \"Gearbox fleet\"")
    title = title.strip() if title else None
    nodes_doc = doc["nodes"]
    if not isinstance(nodes_doc, Mapping) or not nodes_doc:
        raise NetworkError(f"{source}: [nodes] must contain at least one [nodes.NAME] table")

    raw_nodes: list[Node] = []
    fixed_raw: dict[str, Any] = {}
    impossible_raw: dict[str, Any] = {}
    for name, spec in nodes_doc.items():
        if not isinstance(name, str) or not _NAME.fullmatch(name):
            raise NetworkError(f"{source}: node name {name!r} is not an identifier (letters, digits, _; not starting with a digit)")
        if not isinstance(spec, Mapping):
            raise NetworkError(f"{source}: nodes.{name} must be a table with states = [...]")
        unknown = set(spec) - _NODE_KEYS
        if unknown:
            raise NetworkError(f"{source}: nodes.{name} has unknown key(s) {sorted(unknown)}; allowed: {sorted(_NODE_KEYS)}")
        states = spec.get("states")
        if not isinstance(states, list) or len(states) < 2:
            raise NetworkError(f"{source}: nodes.{name}.states must be a list of at least 2 labels")
        if any(not isinstance(s, (str, int)) or isinstance(s, bool) for s in states):
            raise NetworkError(f"{source}: nodes.{name}.states must be strings (or integers), got {states!r}")
        states_t = tuple(str(s) for s in states)
        if any(s.strip() == "" for s in states_t):
            raise NetworkError(f"{source}: nodes.{name}.states has an empty label; every state needs a name")
        odd = [s for s in states_t if s != s.strip() or not s.isprintable()]
        if odd:
            raise NetworkError(f"{source}: nodes.{name}.states label {odd[0]!r} has surrounding spaces or control "
                               f"characters; write it without them (data cells are matched after trimming spaces)")
        dup = sorted(s for s, k in Counter(states_t).items() if k > 1)  # linear: 1e6 states load in seconds
        if dup:
            raise NetworkError(f"{source}: nodes.{name}.states has duplicate label(s) {dup}; each state must be distinct")
        parents = spec.get("parents", [])
        if not isinstance(parents, list) or not all(isinstance(x, str) for x in parents):
            raise NetworkError(f"{source}: nodes.{name}.parents must be a list of node names")
        if len(set(parents)) != len(parents):
            raise NetworkError(f"{source}: nodes.{name}.parents lists a parent twice")
        if name in parents:
            raise NetworkError(f"{source}: node {name!r} lists itself as a parent (cycle {name} -> {name})")
        latent = spec.get("latent", False)
        if not isinstance(latent, bool):
            raise NetworkError(f"{source}: nodes.{name}.latent must be true or false")
        if "fixed" in spec:
            fixed_raw[name] = spec["fixed"]
        cpd = spec.get("cpd", "table")
        if cpd not in CPD_FORMS:
            raise NetworkError(f"{source}: nodes.{name}.cpd is {cpd!r}; use one of {', '.join(map(repr, CPD_FORMS))}")
        tied = spec.get("tied_to")
        if tied is not None and not isinstance(tied, str):
            raise NetworkError(f"{source}: nodes.{name}.tied_to must be the name of another node, got {tied!r}")
        inc = spec.get("increasing_with", [])
        if not isinstance(inc, list) or not all(isinstance(x, str) for x in inc) or len(set(inc)) != len(inc):
            raise NetworkError(f"{source}: nodes.{name}.increasing_with must be a list of distinct parent names")
        if "impossible" in spec:
            impossible_raw[name] = spec["impossible"]
        if ("fixed" in spec) and ("cpd" in spec or tied is not None or "impossible" in spec or inc):
            extra = [k for k in ("cpd", "tied_to", "impossible", "increasing_with") if k in spec]
            raise NetworkError(f"{source}: nodes.{name} has a fixed table and {', '.join(extra)}; these keys describe "
                               f"an estimated CPT: remove them or remove 'fixed'")
        raw_nodes.append(Node(name=name, states=states_t, parents=tuple(parents), latent=latent, cpd=cpd,
                              tied_to=tied, increasing_with=tuple(inc)))

    names = {n.name for n in raw_nodes}
    for n in raw_nodes:
        for p in n.parents:
            if p not in names:
                raise NetworkError(f"{source}: node {n.name!r} has unknown parent {p!r}; declare it as [nodes.{p}]")

    ordered = _topological(raw_nodes, source)
    _check_cpt_sizes(ordered, source)
    net = Network(tuple(ordered))
    if fixed_raw:
        nodes = []
        for n in net.nodes:
            if n.name in fixed_raw:
                arr = table_to_array(net, n.name, fixed_raw[n.name], what="fixed table", source=source)
                n = replace(n, fixed=tuple(float(v) for v in arr.ravel()))
            nodes.append(n)
        net = Network(tuple(nodes))
    if impossible_raw:
        net = Network(tuple(replace(n, impossible=_parse_impossible(net, n, impossible_raw[n.name], source))
                            if n.name in impossible_raw else n for n in net.nodes))
    _check_structure(net, source)
    return replace(net, title=title) if title else net


def _parse_impossible(net: Network, node: Node, raw: Any, source: str) -> tuple[tuple[int, int], ...]:
    """``impossible = [{ given = { parent = "state", ... }, state = "..." }, ...]`` as sorted
    ``(row, state)`` pairs; a parent left out of ``given`` stands for each of its states."""
    key = f"nodes.{node.name}.impossible"
    if not isinstance(raw, list):
        raise NetworkError(f"{source}: {key} must be a list of tables {{ given = {{ parent = \"state\" }}, state = \"...\" }}")
    cells: set[tuple[int, int]] = set()
    for i, entry in enumerate(raw):
        where = f"{key}[{i}]"
        if not isinstance(entry, Mapping) or "state" not in entry or set(entry) - {"given", "state"}:
            raise NetworkError(f"{source}: {where} must be a table with keys state (and optionally given), "
                               f"e.g. {{ given = {{ parent = \"state\" }}, state = \"...\" }}")
        state = entry["state"]
        if not isinstance(state, (str, int)) or isinstance(state, bool) or str(state) not in node.states:
            raise NetworkError(f"{source}: {where}.state is {state!r}, not a state of {node.name!r} "
                               f"(states: {list(node.states)})")
        given = entry.get("given", {})
        if not isinstance(given, Mapping):
            raise NetworkError(f"{source}: {where}.given must be a table {{ parent = \"state\", ... }}")
        choices = []
        for p in node.parents:
            pn = net.node(p)
            if p in given:
                v = given[p]
                if not isinstance(v, (str, int)) or isinstance(v, bool) or str(v) not in pn.states:
                    raise NetworkError(f"{source}: {where}.given.{p} is {v!r}, not a state of {p!r} "
                                       f"(states: {list(pn.states)})")
                choices.append([pn.states.index(str(v))])
            else:
                choices.append(range(pn.card))
        unknown = sorted(set(given) - set(node.parents))
        if unknown:
            raise NetworkError(f"{source}: {where}.given names {unknown[0]!r}, which is not a parent of {node.name!r} "
                               f"(parents: {list(node.parents)})")
        cards = [net.node(p).card for p in node.parents]
        k = node.states.index(str(state))
        for cfg in np.ndindex(*[len(c) for c in choices]) if choices else [()]:
            idx = [choices[j][c] for j, c in enumerate(cfg)]
            row = int(np.ravel_multi_index(idx, cards)) if cards else 0
            cells.add((row, k))
    return tuple(sorted(cells))


def _check_structure(net: Network, source: str) -> None:
    """The structured-CPT keys fit their node (one-line errors naming file, node and key)."""
    for n in net.nodes:
        key = f"{source}: nodes.{n.name}"
        if n.tied_to is not None:
            if n.tied_to == n.name:
                raise NetworkError(f"{key}.tied_to names the node itself; name another node with the same shape")
            if n.tied_to not in net:
                raise NetworkError(f"{key}.tied_to is {n.tied_to!r}, which is not a node of the network")
            src = net.node(n.tied_to)
            if src.fixed is not None:
                raise NetworkError(f"{key}.tied_to is {src.name!r}, whose CPT is fixed; give {n.name!r} the same "
                                   f"fixed table instead")
            if src.tied_to is not None:
                raise NetworkError(f"{key}.tied_to is {src.name!r}, which is itself tied to {src.tied_to!r}; "
                                   f"tie {n.name!r} to {src.tied_to!r} directly")
            if src.states != n.states:
                raise NetworkError(f"{key}.tied_to: {n.name!r} has states {list(n.states)} but {src.name!r} has "
                                   f"{list(src.states)}; tied nodes need the same states in the same order")
            mine = [net.node(p).states for p in n.parents]
            theirs = [net.node(p).states for p in src.parents]
            if mine != theirs:
                raise NetworkError(f"{key}.tied_to: the parents of {n.name!r} ({list(n.parents)}) and of {src.name!r} "
                                   f"({list(src.parents)}) must have the same state lists, in the same order")
            if n.cpd != "table" and n.cpd != src.cpd:
                raise NetworkError(f"{key}.cpd is {n.cpd!r} but its tie source {src.name!r} has {src.cpd!r}; "
                                   f"a tied node takes its source's form (leave cpd out)")
            if n.impossible or n.increasing_with:
                raise NetworkError(f"{key} is tied to {src.name!r}: give impossible / increasing_with on "
                                   f"{src.name!r} only (a tied node takes its source's)")
        if n.cpd in ("noisy_or", "noisy_max") and not n.parents:
            raise NetworkError(f"{key}.cpd = {n.cpd!r} needs at least one parent (a node without parents is a plain table)")
        if n.cpd == "noisy_or" and n.card != 2:
            raise NetworkError(f"{key}.cpd = 'noisy_or' needs a two-state node (first state absent, second present); "
                               f"{n.name!r} has {n.card} states: use 'noisy_max' for ordered states")
        if n.cpd in ("noisy_or", "noisy_max") and n.impossible:
            raise NetworkError(f"{key}.impossible is not available with cpd = {n.cpd!r}: every cell of its table is a "
                               f"product of the leak's and the active parents' cumulative terms, so a cell at 0 forces "
                               f"a leak or strength to 0 or 1, which sets cells of other parent configurations to 0 "
                               f"too (and at a configuration with several active parents it is not one condition on "
                               f"the parameters); use cpd = 'table' for cells that are impossible one by one")
        if n.increasing_with:
            if n.cpd == "logistic":
                raise NetworkError(f"{key}.increasing_with with cpd = 'logistic' is not estimated yet (monotone "
                                   f"coefficients); use cpd = 'table' with increasing_with, or drop one of the keys")
            if n.cpd != "table":
                raise NetworkError(f"{key}.increasing_with is available with cpd = 'table' only")
            for p in n.increasing_with:
                if p not in n.parents:
                    raise NetworkError(f"{key}.increasing_with names {p!r}, which is not a parent of {n.name!r} "
                                       f"(parents: {list(n.parents)})")
        if n.impossible:
            counts = Counter(r for r, _ in n.impossible)
            full = [r for r, c in counts.items() if c >= n.card]
            if full:
                labels = net.parent_config_labels(n.name)[full[0]]
                cfg = ", ".join(f"{p}={v}" for p, v in zip(n.parents, labels)) or "no parents"
                raise NetworkError(f"{key}.impossible makes every state impossible in the row {cfg}; "
                                   f"leave at least one state possible")


def _check_cpt_sizes(nodes: Sequence[Node], source: str) -> None:
    """Refuse a CPT (or all CPTs together) over MAX_TABLE_ENTRIES entries, before any array is made."""
    card = {n.name: len(n.states) for n in nodes}
    total = 0
    for n in nodes:
        rows = math.prod(card[p] for p in n.parents)
        size = rows * card[n.name]
        total += size
        if size > MAX_TABLE_ENTRIES:
            raise NetworkError(f"{source}: nodes.{n.name} has a CPT of {size:.3g} entries ({rows:.3g} parent "
                               f"configurations x {card[n.name]} states), more than the limit 2**27 = "
                               f"{MAX_TABLE_ENTRIES:,}: give it fewer parents, or its parents fewer states")
    if total > MAX_TABLE_ENTRIES:
        raise NetworkError(f"{source}: the CPTs have {total:.3g} entries in all, more than the limit 2**27 = "
                           f"{MAX_TABLE_ENTRIES:,}: give nodes fewer states or fewer parents")


def _topological(nodes: list[Node], source: str) -> list[Node]:
    """Stable topological sort (file order among ready nodes); names a cycle if there is one."""
    by_name = {n.name: n for n in nodes}
    done: set[str] = set()
    out: list[Node] = []
    remaining = list(nodes)
    while remaining:
        progressed = False
        for n in list(remaining):
            if all(p in done for p in n.parents):
                out.append(n)
                done.add(n.name)
                remaining.remove(n)
                progressed = True
                break
        if not progressed:
            raise NetworkError(f"{source}: the parents form a cycle: {' -> '.join(_find_cycle(by_name, remaining))}; "
                               f"a Bayesian network must be acyclic")
    return out


def _find_cycle(by_name: Mapping[str, Node], remaining: Iterable[Node]) -> list[str]:
    rem = {n.name for n in remaining}
    start = next(iter(sorted(rem)))
    path: list[str] = []
    seen: dict[str, int] = {}
    cur = start
    while cur not in seen:
        seen[cur] = len(path)
        path.append(cur)
        cur = next(p for p in by_name[cur].parents if p in rem)
    cyc = path[seen[cur]:] + [cur]
    return list(reversed(cyc))  # parent -> child direction


def network_from_dict(nodes: Mapping[str, Mapping[str, Any]]) -> Network:
    """Convenience for the Python API: ``network_from_dict({"a": {"states": [...]}, ...})``."""
    return parse_network({"nodes": dict(nodes)}, source="<dict>")

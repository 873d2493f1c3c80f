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
from dataclasses import dataclass, field
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
_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")
_NODE_KEYS = {"states", "parents", "latent", "fixed"}


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
    """

    name: str
    states: tuple[str, ...]
    parents: tuple[str, ...] = ()
    latent: bool = False
    fixed: tuple[float, ...] | None = None

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
            raise NetworkError(f"unknown node {name!r}; the network has: {', '.join(self.names)}") from None

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
        """Free parameters of the estimated CPTs: (card - 1) per parent configuration."""
        return sum(self.n_parent_configs(m) * (self.node(m).card - 1) for m in self.free_names)

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
            nodes[n.name] = d
        return {"nodes": nodes}


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
    nodes_doc = doc["nodes"]
    if not isinstance(nodes_doc, Mapping) or not nodes_doc:
        raise NetworkError(f"{source}: [nodes] must contain at least one [nodes.NAME] table")

    raw_nodes: list[Node] = []
    fixed_raw: dict[str, Any] = {}
    for name, spec in nodes_doc.items():
        if not _NAME.match(name):
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
        raw_nodes.append(Node(name=name, states=states_t, parents=tuple(parents), latent=latent))

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
                n = Node(n.name, n.states, n.parents, n.latent, tuple(float(v) for v in arr.ravel()))
            nodes.append(n)
        net = Network(tuple(nodes))
    return net


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

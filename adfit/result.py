"""Fit results: the frozen :class:`FitResult` and the result file ``adfit-result/1``.

The result JSON holds at least::

    {"format": "adfit-result/1", "method": "lbfgs" | "adam" | "em", "objective": "mle" | "map",
     "log_likelihood": float,  # marginal, natural log, at the returned CPTs
     "gradient_norm": float,   # of the objective w.r.t. the free logits, in records
     "converged": bool, "iterations": int,
     "nodes": {name: {"states": [...], "parents": [...], "table": [[...], ...], "fixed": bool}},
     "network": {...}}          # the network itself, so the file can be reloaded alone

Further sections (``"em_check"``, ``"se"``/``"interval"`` inside nodes, ``"restarts"``,
``"complete_case"`` ...) are added by the modules that compute them, through ``extras``.
"""

from __future__ import annotations

import dataclasses
import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping

import numpy as np
import pandas as pd

from .errors import ResultError
from .io import write_json
from .network import Network, parse_network

FORMAT = "adfit-result/1"


@dataclass(frozen=True, eq=False)
class FitResult:
    """The outcome of a fit (gradient or EM).

    Attributes:
        network: the network that was fitted.
        method: "lbfgs", "adam" or "em".
        objective: "mle" or "map".
        probs: CPT arrays of every node (fixed ones included), shaped ``network.cpt_shape``.
        log_likelihood: marginal log-likelihood of the observed cells at ``probs``.
        log_prior: sum of c·log θ over the pseudo-counts (0 for MLE).
        penalty: the L2 penalty value (subtracted).
        gradient_norm: Euclidean norm of the objective's gradient w.r.t. the free logits
            (units: records; equals the stationarity residual N(x,u) + c − θ(N(u) + Σc)).
        converged: True only when the stopping rule held.
        stop_reason: which rule stopped the run.
        iterations: iterations of the winning start.
        history: per-iteration "objective" and "gradient_norm" of the winning start.
        n_rows, n_distinct: records (total weight) and distinct rows.
        extras: further JSON-ready sections (restarts, em_check, uncertainty, ...).
    """

    network: Network
    method: str
    objective: str
    probs: Mapping[str, np.ndarray]
    log_likelihood: float
    log_prior: float = 0.0
    penalty: float = 0.0
    gradient_norm: float = float("nan")
    converged: bool = False
    stop_reason: str = ""
    iterations: int = 0
    history: Mapping[str, tuple[float, ...]] = field(default_factory=dict)
    n_rows: float = 0.0
    n_distinct: int = 0
    seed: int | None = None
    settings: Mapping[str, Any] = field(default_factory=dict)
    extras: Mapping[str, Any] = field(default_factory=dict)

    @property
    def objective_value(self) -> float:
        """log-likelihood + log-prior − penalty (what the fit maximised)."""
        return self.log_likelihood + self.log_prior - self.penalty

    def with_extras(self, **sections: Any) -> "FitResult":
        """A copy with further result sections added (or replaced)."""
        ex = dict(self.extras)
        ex.update(sections)
        return dataclasses.replace(self, extras=ex)

    def cpt(self, name: str) -> pd.DataFrame:
        """The CPT of ``name`` as a DataFrame: one row per parent configuration, one column per state."""
        net = self.network
        node = net.node(name)
        table = np.asarray(self.probs[name]).reshape(-1, node.card)
        if len(node.parents) == 1:
            index = pd.Index([lab[0] for lab in net.parent_config_labels(name)], name=node.parents[0])
        elif node.parents:
            labels = net.parent_config_labels(name)
            index = pd.MultiIndex.from_tuples(labels, names=list(node.parents))
        else:
            index = pd.Index(["(none)"], name="parents")
        return pd.DataFrame(table, index=index, columns=pd.Index(list(node.states), name=name))

    def cpts(self) -> dict[str, pd.DataFrame]:
        return {n: self.cpt(n) for n in self.network.names}

    def table(self, name: str) -> pd.DataFrame:
        """The CPT of ``name`` in long form, one row per cell: estimate, se, lower, upper.

        The index holds the parent states (one level per parent) and the node's state. ``se`` and
        ``lower``/``upper`` come from the result's error bars (NaN where the result has none, as for
        fixed nodes or a fit run without error bars).

        >>> res.table("failure").loc[("heavy", "yes")]   # doctest: +SKIP
        """
        net = self.network
        if name not in net:
            raise ResultError(f"table({name!r}): not a node of the network; nodes are {', '.join(net.names)}")
        node = net.node(name)
        est = np.asarray(self.probs[name], dtype=np.float64).reshape(-1, node.card)
        sec = (self.extras.get("nodes") or {}).get(name) or {}

        def grid(value: Any) -> np.ndarray:
            try:
                a = np.array([[_float(v) for v in row] for row in value], dtype=np.float64).reshape(est.shape)
            except (TypeError, ValueError):
                a = np.full(est.shape, np.nan)
            return a

        se = grid(sec["se"]) if sec.get("se") is not None else np.full(est.shape, np.nan)
        iv = sec.get("interval")
        if isinstance(iv, (list, tuple)) and len(iv) == 2:  # layout [lower_table, upper_table]
            lo, hi = grid(iv[0]), grid(iv[1])
        else:
            lo, hi = np.full(est.shape, np.nan), np.full(est.shape, np.nan)
        labels = net.parent_config_labels(name)
        tuples = [lab + (s,) for lab in labels for s in node.states]
        index = pd.MultiIndex.from_tuples(tuples, names=list(node.parents) + ["state"]) if node.parents \
            else pd.Index(list(node.states), name="state")
        return pd.DataFrame({"estimate": est.ravel(), "se": se.ravel(), "lower": lo.ravel(), "upper": hi.ravel()},
                            index=index)

    def standard_errors(self, name: str) -> pd.DataFrame:
        """The standard errors of ``name``'s CPT, laid out as :meth:`cpt` (rows: parent
        configurations, columns: states); NaN where the result has none."""
        return self._wide(name, "se")

    def intervals(self, name: str) -> tuple[pd.DataFrame, pd.DataFrame]:
        """``(lower, upper)``: the interval ends of ``name``'s CPT, each laid out as :meth:`cpt`;
        NaN where the result has none."""
        return self._wide(name, "lower"), self._wide(name, "upper")

    def _wide(self, name: str, column: str) -> pd.DataFrame:
        est = self.cpt(name)
        values = self.table(name)[column].to_numpy(dtype=np.float64).reshape(est.shape)
        return pd.DataFrame(values, index=est.index, columns=est.columns)

    # ------------------------------------------------------------------ serialisation
    def to_dict(self) -> dict[str, Any]:
        net = self.network
        nodes: dict[str, Any] = {}
        for n in net.nodes:
            nodes[n.name] = {
                "states": list(n.states),
                "parents": list(n.parents),
                "latent": n.latent,
                "fixed": n.fixed is not None,
                "table": net.array_to_table(n.name, self.probs[n.name]),
            }
        node_extras = self.extras.get("nodes", {})
        for name, sec in node_extras.items():
            nodes[name].update(sec)
        out: dict[str, Any] = {
            "format": FORMAT,
            "method": self.method,
            "objective": self.objective,
            "log_likelihood": _num(self.log_likelihood),
            "log_prior": _num(self.log_prior),
            "penalty": _num(self.penalty),
            "objective_value": _num(self.objective_value),
            "gradient_norm": _num(self.gradient_norm),
            "converged": bool(self.converged),
            "stop_reason": self.stop_reason,
            "iterations": int(self.iterations),
            "n_rows": _num(self.n_rows),
            "n_distinct": int(self.n_distinct),
            "seed": self.seed,
            "settings": _jsonable(dict(self.settings)),
            "history": {k: [_num(v) for v in vals] for k, vals in self.history.items()},
            "nodes": nodes,
        }
        for k, v in self.extras.items():
            if k != "nodes":
                out[k] = _jsonable(v)
        out["network"] = net.to_dict()
        return out

    def summary(self) -> str:
        """A few plain lines for the terminal."""
        lines = [
            f"method {self.method} ({self.objective.upper()}), {self.n_rows:,g} records, {self.n_distinct:,} distinct rows",
            f"log-likelihood {self.log_likelihood:,.2f}"
            + (f", log-prior {self.log_prior:,.2f}" if self.objective == "map" else "")
            + (f", penalty {self.penalty:,.2f}" if self.penalty else ""),
            f"gradient norm {self.gradient_norm:.3e} (records), iterations {self.iterations}, "
            + ("converged" if self.converged else f"NOT converged ({self.stop_reason})"),
        ]
        st = self.extras.get("stationarity") or {}
        if st.get("kkt_ratio") is not None:
            moves = []
            if st.get("boundary_escapes"):
                moves.append(f"{st['boundary_escapes']} move(s) off a false boundary")
            if st.get("saddle_escapes"):
                moves.append(f"{st['saddle_escapes']} move(s) off a saddle")
            lines.append(f"largest KKT ratio {st['kkt_ratio']:.6f} (a maximum needs <= 1 + {st.get('kkt_tol', 0):g} "
                         f"on every cell; worst: {st.get('kkt_worst_cell')})" + (f"; {', '.join(moves)}" if moves else ""))
        return "\n".join(lines)


def _num(x: Any) -> Any:
    if x is None:
        return None
    x = float(x)
    if math.isnan(x):
        return None
    if math.isinf(x):
        return "inf" if x > 0 else "-inf"
    return x


def _jsonable(obj: Any) -> Any:
    if isinstance(obj, Mapping):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return _jsonable(obj.tolist())
    if isinstance(obj, (np.floating, float)):
        return _num(obj)
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (np.bool_,)):
        return bool(obj)
    return obj


def write_result(path: str | Path, result: FitResult) -> None:
    """Write the result JSON atomically."""
    write_json(path, result.to_dict())


def _float(v: Any) -> float:
    if v is None:
        return float("nan")
    if isinstance(v, str):
        return float(v)
    return float(v)


# ------------------------------------------------------------------ the result file's schema
def _show(v: Any) -> str:
    """A short rendering of a bad value for a message."""
    if isinstance(v, Mapping):
        return "an object"
    if isinstance(v, (list, tuple)):
        return f"a list of {len(v)}"
    text = json.dumps(v) if isinstance(v, (str, bool, int, float)) or v is None else repr(v)
    return text if len(text) <= 40 else text[:37] + "..."


_SPECIAL = ("inf", "-inf", "nan")  # how to_dict writes non-finite numbers (NaN is written as null)


def _is_num(v: Any, *, nullable: bool = True) -> bool:
    if v is None:
        return nullable
    if isinstance(v, bool):
        return False
    if isinstance(v, (int, float)):
        return True
    return isinstance(v, str) and v.lower() in _SPECIAL


def _is_whole(v: Any) -> bool:
    return isinstance(v, int) and not isinstance(v, bool) and v >= 0


def validate_result_doc(doc: Any, source: str = "<result>") -> None:
    """Check the types, shapes and ranges of every field of an ``adfit-result/1`` document.

    Runs before anything is computed from the file. Each message names the field by its path
    (``fit.json: nodes.wear.table[2] has 2 entries, the node has 3 states``). The sections other
    modules add (restarts, em_check, ...) must be JSON objects; their readers check what is
    inside. Nesting is limited to :data:`adfit.io.MAX_DEPTH` levels. Raises :class:`ResultError`.
    """
    from .io import depth_message, too_deep

    def bad(msg: str) -> ResultError:
        return ResultError(f"{source}: {msg}; give the result file as adfit wrote it (adfit fit or em)")

    if not isinstance(doc, Mapping) or doc.get("format") != FORMAT:
        raise ResultError(f"{source}: not an adfit result file (expected \"format\": \"{FORMAT}\")")
    where = too_deep(doc)
    if where is not None:
        raise ResultError(depth_message(source, where, "result"))
    for key in ("method", "stop_reason"):
        if key in doc and not isinstance(doc[key], str):
            raise bad(f"{key} must be text, got {_show(doc[key])}")
    if "objective" in doc and doc["objective"] not in ("mle", "map"):
        raise bad(f"objective must be \"mle\" or \"map\", got {_show(doc['objective'])}")
    for key in ("log_likelihood", "log_prior", "penalty", "objective_value", "gradient_norm", "n_rows"):
        if key in doc and not _is_num(doc[key]):
            raise bad(f"{key} must be a number, got {_show(doc[key])}")
    for key in ("penalty", "gradient_norm", "n_rows"):
        v = doc.get(key)
        if isinstance(v, (int, float)) and not isinstance(v, bool) and v < 0:
            raise bad(f"{key} must be >= 0, got {_show(v)}")
    if "converged" in doc and not isinstance(doc["converged"], bool):
        raise bad(f"converged must be true or false, got {_show(doc['converged'])}")
    for key in ("iterations", "n_distinct"):
        if key in doc and not _is_whole(doc[key]):
            raise bad(f"{key} must be a whole number >= 0, got {_show(doc[key])}")
    if doc.get("seed") is not None and not _is_whole(doc["seed"]):
        raise bad(f"seed must be a whole number >= 0 or null, got {_show(doc['seed'])}")
    for key in ("settings", "history", "network"):
        if doc.get(key) is not None and not isinstance(doc[key], Mapping):
            raise bad(f"{key} must be an object, got {_show(doc[key])}")
    for name, values in (doc.get("history") or {}).items():
        if not isinstance(values, list):
            raise bad(f"history.{name} must be a list of numbers, got {_show(values)}")
        for i, v in enumerate(values):
            if not _is_num(v):
                raise bad(f"history.{name}[{i}] must be a number, got {_show(v)}")
    nodes = doc.get("nodes")
    if not isinstance(nodes, Mapping):
        raise ResultError(f"{source}: no \"nodes\" section" if nodes is None else
                          f"{source}: nodes must be an object (one entry per node), got {_show(nodes)}")
    for name, sec in nodes.items():
        if not isinstance(sec, Mapping):
            raise bad(f"nodes.{name} must be an object with states, parents and table, got {_show(sec)}")
        for key in ("states", "parents"):
            v = sec.get(key, [] if key == "parents" else None)
            if not isinstance(v, list) or not all(isinstance(x, str) for x in v):
                raise bad(f"nodes.{name}.{key} must be a list of names, got {_show(v)}")
        for key in ("latent", "fixed"):
            if key in sec and not isinstance(sec[key], bool):
                raise bad(f"nodes.{name}.{key} must be true or false, got {_show(sec[key])}")
    for name, sec in nodes.items():
        card = len(sec["states"])
        rows = 1
        for par in sec.get("parents", []):
            psec = nodes.get(par)
            if psec is None:
                raise bad(f"nodes.{name}.parents names {par!r}, which is not a node of the result")
            rows *= len(psec["states"])
        table = sec.get("table")
        if not sec.get("parents") and isinstance(table, list) and table and not isinstance(table[0], list):
            table = [table]  # a parentless node's table may be written flat
        _check_grid(bad, f"nodes.{name}.table", table, rows, card, nullable=False)
        if sec.get("se") is not None:
            _check_grid(bad, f"nodes.{name}.se", sec["se"], rows, card, nullable=True)
        iv = sec.get("interval")
        if iv is not None:
            if not isinstance(iv, list) or len(iv) != 2:
                raise bad(f"nodes.{name}.interval must be a pair [lower table, upper table], got {_show(iv)}")
            for j, part in enumerate(iv):
                _check_grid(bad, f"nodes.{name}.interval[{j}]", part, rows, card, nullable=True)
    for key in _SECTIONS:
        if doc.get(key) is not None and not isinstance(doc[key], Mapping) \
                and not (key == "restarts" and isinstance(doc[key], list)):  # older layout: a list of starts
            raise bad(f"{key} must be an object, got {_show(doc[key])}")


def _check_grid(bad, path: str, table: Any, rows: int, card: int, *, nullable: bool) -> None:
    """``table``: ``rows`` lists of ``card`` numbers (None allowed where ``nullable``)."""
    if not isinstance(table, list):
        raise bad(f"{path} must be a list of {rows} row(s) of {card} numbers, got {_show(table)}")
    if len(table) != rows:
        raise bad(f"{path} has {len(table)} row(s), the node has {rows} parent configuration(s)")
    for i, row in enumerate(table):
        if not isinstance(row, list):
            raise bad(f"{path}[{i}] must be a list of {card} numbers, got {_show(row)}")
        if len(row) != card:
            raise bad(f"{path}[{i}] has {len(row)} entries, the node has {card} states")
        for j, v in enumerate(row):
            if not _is_num(v, nullable=nullable):
                raise bad(f"{path}[{i}][{j}] must be a number, got {_show(v)}")


_CORE = {"format", "method", "objective", "log_likelihood", "log_prior", "penalty", "objective_value",
         "gradient_norm", "converged", "stop_reason", "iterations", "n_rows", "n_distinct", "seed",
         "settings", "history", "nodes", "network"}
# sections that other modules add (each a JSON object; their readers check what is inside)
_SECTIONS = ("restarts", "prior", "em", "em_check", "uncertainty", "complete_case", "information_criteria",
             "cross_validation", "latent_states")


#: keys renamed since results were first written: (section, old key, new key); read either way
RENAMED_KEYS: tuple[tuple[tuple[str, ...], str, str], ...] = (
    (("em_check", "em_from_fit"), "jax_log_likelihood", "log_likelihood_recomputed"),
    (("em_check", "em_own_start"), "jax_log_likelihood", "log_likelihood_recomputed"),
)


def upgrade_keys(doc: Mapping[str, Any]) -> Mapping[str, Any]:
    """``doc`` with the keys of older result files under their current names (a copy where
    something was renamed; ``doc`` itself otherwise)."""
    out: Any = doc
    for path, old, new in RENAMED_KEYS:
        sec: Any = out
        for k in path:
            sec = sec.get(k) if isinstance(sec, Mapping) else None
        if isinstance(sec, Mapping) and old in sec and new not in sec:
            if out is doc:
                out = json.loads(json.dumps(doc))
            sec = out
            for k in path:
                sec = sec[k]
            sec[new] = sec.pop(old)
    return out


def result_from_dict(doc: Mapping[str, Any], *, network: Network | None = None, source: str = "<result>") -> FitResult:
    """Rebuild a :class:`FitResult` from its JSON form.

    When ``network`` is given, the result's nodes must match it (names, states, parents);
    otherwise the network embedded in the file is used.
    """
    validate_result_doc(doc, source)
    doc = upgrade_keys(doc)
    nodes = doc["nodes"]
    if network is None:
        if "network" not in doc:
            raise ResultError(f"{source}: no embedded \"network\"; pass the network file as well")
        network = parse_network(doc["network"], source=f"{source} (embedded network)")
    probs: dict[str, np.ndarray] = {}
    for n in network.nodes:
        if n.name not in nodes:
            raise ResultError(f"{source}: node {n.name!r} of the network is not in the result; "
                              f"was it fitted with a different network?")
        sec = nodes[n.name]
        if list(sec.get("states", [])) != list(n.states) or list(sec.get("parents", [])) != list(n.parents):
            raise ResultError(f"{source}: node {n.name!r} has states/parents {sec.get('states')}/{sec.get('parents')} "
                              f"in the result but {list(n.states)}/{list(n.parents)} in the network")
        try:
            probs[n.name] = network.table_to_array(n.name, sec["table"], what="result table")
        except Exception as e:
            raise ResultError(f"{source}: {e}") from None
    extra_nodes = set(nodes) - set(network.names)
    if extra_nodes:
        raise ResultError(f"{source}: result has node(s) {sorted(extra_nodes)} that the network lacks")
    known = _CORE
    extras = {k: v for k, v in doc.items() if k not in known}
    node_keys = {"states", "parents", "latent", "fixed", "table"}
    node_extras = {n: {k: v for k, v in nodes[n].items() if k not in node_keys} for n in network.names}
    if any(node_extras.values()):  # per-node sections (se, interval, ...) go back where to_dict took them
        extras["nodes"] = {n: v for n, v in node_extras.items() if v}
    return FitResult(
        network=network, method=str(doc.get("method", "")), objective=str(doc.get("objective", "mle")),
        probs=probs, log_likelihood=_float(doc.get("log_likelihood")), log_prior=_float(doc.get("log_prior", 0.0)),
        penalty=_float(doc.get("penalty", 0.0)), gradient_norm=_float(doc.get("gradient_norm")),
        converged=bool(doc.get("converged", False)), stop_reason=str(doc.get("stop_reason", "")),
        iterations=int(doc.get("iterations", 0)),
        history={k: tuple(_float(x) for x in v) for k, v in (doc.get("history") or {}).items()},
        n_rows=_float(doc.get("n_rows", 0.0)), n_distinct=int(doc.get("n_distinct", 0)), seed=doc.get("seed"),
        settings=dict(doc.get("settings") or {}), extras=extras,
    )


def load_result(path: str | Path, network: Network | None = None) -> FitResult:
    """Read a result JSON written by adfit (``--params`` of ``score`` and ``impute``)."""
    p = Path(path)
    try:
        doc = json.loads(p.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise ResultError(f"{p}: result file not found") from None
    except IsADirectoryError:
        raise ResultError(f"{p}: is a folder; give the result JSON file written by adfit fit or em") from None
    except (json.JSONDecodeError, UnicodeDecodeError) as e:
        raise ResultError(f"{p}: not a valid JSON result file ({e})") from None
    except RecursionError:
        from .io import depth_message

        raise ResultError(depth_message(p, None, "result")) from None
    return result_from_dict(doc, network=network, source=str(p))

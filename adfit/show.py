"""Print and export fitted CPTs with their error bars (``adfit show``).

Pure functions from a :class:`~adfit.result.FitResult` to text: a long table with one row per
CPT cell (parent states, state, estimate, standard error, interval), rendered as plain text,
CSV, Markdown, or a network TOML file whose CPTs are ``fixed`` at the estimates (reloadable by
every command).
"""

from __future__ import annotations

import io
import json
import math
from typing import Sequence

import numpy as np
import pandas as pd

from .errors import OptionError
from .result import FitResult

FORMATS = ("text", "csv", "markdown", "toml")

_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


def defuse_cell(value: object) -> object:
    """A text cell that a spreadsheet would run as a formula gets a leading apostrophe.

    Numbers are left alone (a negative number is not a formula); only strings that start with
    ``=``, ``+``, ``-``, ``@``, a tab or a carriage return are changed (common practice against
    CSV formula injection).
    """
    if isinstance(value, str) and value.startswith(_FORMULA_START):
        return "'" + value
    return value


def check_nodes(result: FitResult, nodes: Sequence[str] | None) -> tuple[str, ...]:
    """The nodes to show (default: all), each checked against the network."""
    if not nodes:
        return result.network.names
    for n in nodes:
        if n not in result.network:
            from .errors import did_you_mean, spelled

            raise OptionError(f"{spelled(f'--node {n}', f'nodes=[{n!r}]')}: not a node of the network; "
                              f"{did_you_mean(n, result.network.names)}nodes are {', '.join(result.network.names)}")
    return tuple(nodes)


def cells(result: FitResult, nodes: Sequence[str] | None = None) -> pd.DataFrame:
    """One row per CPT cell of ``nodes``: node, parents (``p=s, ...``), state, estimate, se, lower, upper, fixed."""
    frames = []
    for name in check_nodes(result, nodes):
        t = result.table(name).reset_index()
        node = result.network.node(name)
        if node.parents:
            t.insert(0, "given", [", ".join(f"{p}={row[p]}" for p in node.parents) for _, row in t.iterrows()])
            t = t.drop(columns=list(node.parents))
        else:
            t.insert(0, "given", "")
        t.insert(0, "node", name)
        t["fixed"] = node.fixed is not None
        frames.append(t[["node", "given", "state", "estimate", "se", "lower", "upper", "fixed"]])
    return pd.concat(frames, ignore_index=True)


def _fmt(x: float, digits: int) -> str:
    return "" if x is None or not math.isfinite(x) else f"{x:.{digits}f}"


def format_text(result: FitResult, nodes: Sequence[str] | None = None, *, digits: int = 3) -> str:
    """Plain text: per node a block with one line per cell, estimate first, then SE and interval."""
    blocks = []
    for name in check_nodes(result, nodes):
        node = result.network.node(name)
        tag = " (fixed)" if node.fixed is not None else (" (latent)" if node.latent else "")
        t = cells(result, [name])
        has_iv = bool(np.isfinite(t["lower"].to_numpy(float)).any())
        has_se = bool(np.isfinite(t["se"].to_numpy(float)).any())
        head = ["given", "state", "estimate"] + (["se"] if has_se else []) + (["interval"] if has_iv else [])
        rows = []
        for _, r in t.iterrows():
            row = [r["given"] or "-", str(r["state"]), _fmt(r["estimate"], digits)]
            if has_se:
                row.append(_fmt(r["se"], digits))
            if has_iv:
                row.append(f"[{_fmt(r['lower'], digits)}, {_fmt(r['upper'], digits)}]"
                           if math.isfinite(r["lower"]) else "")
            rows.append(row)
        widths = [max(len(h), *(len(x[i]) for x in rows)) for i, h in enumerate(head)]
        lines = [f"P({name} | {', '.join(node.parents) or '-'}){tag}",
                 "  ".join(h.ljust(w) if i < 2 else h.rjust(w) for i, (h, w) in enumerate(zip(head, widths)))]
        lines += ["  ".join(c.ljust(w) if i < 2 else c.rjust(w) for i, (c, w) in enumerate(zip(row, widths)))
                  for row in rows]
        blocks.append("\n".join(lines))
    note = ("" if any(np.isfinite(cells(result, nodes)["se"].to_numpy(float)))
            else "\n\n(no standard errors in this result: fit with error bars to get them)")
    return "\n\n".join(blocks) + note


def format_csv(result: FitResult, nodes: Sequence[str] | None = None) -> str:
    """CSV, one row per cell; text cells that look like spreadsheet formulas are defused."""
    t = cells(result, nodes)
    for col in ("node", "given", "state"):
        t[col] = [defuse_cell(v) for v in t[col]]
    buf = io.StringIO()
    t.to_csv(buf, index=False, float_format="%.17g")
    return buf.getvalue()


def format_markdown(result: FitResult, nodes: Sequence[str] | None = None, *, digits: int = 3) -> str:
    """A Markdown table per node (pipes in labels escaped)."""
    blocks = []
    for name in check_nodes(result, nodes):
        node = result.network.node(name)
        t = cells(result, [name])
        esc = lambda s: str(s).replace("|", "\\|")  # noqa: E731
        lines = [f"### P({esc(name)} | {esc(', '.join(node.parents) or '-')})", "",
                 "| given | state | estimate | se | lower | upper |", "|---|---|---:|---:|---:|---:|"]
        for _, r in t.iterrows():
            lines.append(f"| {esc(r['given']) or '-'} | {esc(r['state'])} | {_fmt(r['estimate'], digits)} | "
                         f"{_fmt(r['se'], digits)} | {_fmt(r['lower'], digits)} | {_fmt(r['upper'], digits)} |")
        blocks.append("\n".join(lines))
    return "\n\n".join(blocks) + "\n"


def _toml_str(s: str) -> str:
    return json.dumps(str(s), ensure_ascii=False)  # a JSON string is a valid TOML basic string


def format_toml(result: FitResult, *, title: str | None = None) -> str:
    """A network file with every CPT ``fixed`` at the estimates (floats written exactly, with repr)."""
    net = result.network
    lines = ["# Network with every CPT fixed at the estimates of a fit (written by adfit show).",
             "# Reload it with any adfit command; the tables are the estimates, not the truth.", "",
             "[network]", f"title = {_toml_str(title or 'CPTs fixed at fitted estimates')}", ""]
    for node in net.nodes:
        lines.append(f"[nodes.{node.name}]")
        lines.append("states = [" + ", ".join(_toml_str(s) for s in node.states) + "]")
        if node.parents:
            lines.append("parents = [" + ", ".join(_toml_str(p) for p in node.parents) + "]")
        if node.latent:
            lines.append("latent = true")
        table = np.asarray(result.probs[node.name], dtype=np.float64).reshape(-1, node.card)
        if node.parents:
            labels = net.parent_config_labels(node.name)
            lines.append("fixed = [")
            for lab, row in zip(labels, table):
                cond = ", ".join(f"{p}={s}" for p, s in zip(node.parents, lab))
                lines.append("  [" + ", ".join(repr(float(v)) for v in row) + "],  # " + cond.replace("\n", " "))
            lines.append("]")
        else:
            lines.append("fixed = [" + ", ".join(repr(float(v)) for v in table[0]) + "]")
        lines.append("")
    return "\n".join(lines)


def render(result: FitResult, fmt: str = "text", nodes: Sequence[str] | None = None, *, digits: int = 3,
           title: str | None = None) -> str:
    """``result`` in format ``fmt`` (one of :data:`FORMATS`)."""
    if fmt not in FORMATS:
        raise OptionError(f"--format {fmt!r}: choose one of {', '.join(FORMATS)}")
    if fmt == "toml":
        if nodes:
            raise OptionError("--format toml writes the whole network; leave out --node")
        return format_toml(result, title=title)
    if fmt == "csv":
        return format_csv(result, nodes)
    if fmt == "markdown":
        return format_markdown(result, nodes, digits=digits)
    return format_text(result, nodes, digits=digits)

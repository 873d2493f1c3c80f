"""The self-contained HTML report of a fit (``adfit report``).

:func:`render_report` turns a result (the ``adfit-result/1`` JSON, as a dict or a path) into one
HTML page: no scripts, no fonts or pictures fetched from anywhere (every figure is a PNG held in
the page as a ``data:`` URI), readable on a laptop screen and printable. :func:`write_report`
adds the data-dependent part (the gaps overview, when the records are given) and writes the page
atomically.

Sections, in this order (their ``id`` in brackets); each is present, except "Further sections"
when it would be empty:

1. What was fitted (``fitted``): the network drawn in layers by topological depth (latent nodes
   with a dashed outline, fixed CPTs shaded; the legend is in the figure), records, gaps,
   objective, prior; the optimiser's settings and the prior as read folded under a ``<details>``.
2. Convergence (``convergence``): objective, shortfall below the best objective and gradient
   norm per iteration (the last two on log scales), for each start whose history the result
   holds; the table of starts.
3. Estimated CPTs (``cpts``): one table per node with the estimates, the intervals and standard
   errors when the result has them, and any identifiability flags.
4. EM cross-check (``em-check``): the verdict and the three runs side by side.
5. Gaps and complete cases (``gaps``): the missing-data overview (needs the records) and the
   complete-case comparison as a plot of both estimates per entry.
6. Missing-not-at-random sensitivity (``sensitivity``): with ``--sensitivity FILE`` (from
   ``adfit sensitivity``), each target against the log odds with the band of its intervals, MAR
   and the tipping point marked, the table of refits and the analysis' cautions.
7. Model assessment (``assessment``): AIC/BIC and cross-validation.
8. Further sections (``other``): anything else the result holds, shown as recorded (left out,
   heading and all, when there is nothing else).
9. Cautions (``cautions``).

A section that the result lacks is still there, saying plainly what is absent and which option
produces it.

Precision (one rule per kind of number, so a printed value is the JSON value rounded):
probabilities, standard errors and interval ends to 4 decimals (:data:`PROB_DECIMALS`);
log-likelihoods, objectives, AIC/BIC and G² to 4 decimals (:data:`LOGLIK_DECIMALS`); gradient
norms, parameter changes, tolerances and p-values to 3 significant digits in e-notation;
shares as percentages to 1 decimal; record counts whole (or to 2 decimals when fractional).
"""

from __future__ import annotations

import base64
import datetime as _dt
import html
import io
import json
import math
from pathlib import Path
from typing import Any, Iterable, Mapping, Sequence

import numpy as np

from .errors import AdfitError, ResultError
from .io import atomic_write
from .network import Network
from .result import FORMAT, FitResult, result_from_dict, upgrade_keys

__all__ = ["render_report", "write_report", "load_result_doc", "network_figure", "convergence_figure",
           "gaps_figure", "complete_case_figure", "sensitivity_figure", "network_layers", "SECTIONS",
           "error_bar_flags", "LATENT_CAUTION", "PROB_DECIMALS",
           "LOGLIK_DECIMALS", "SCI_DIGITS", "fmt_prob", "fmt_loglik", "fmt_sci", "fmt_count", "fmt_share",
           "REPORT_CAUTIONS"]

#: (id, heading) of every section, in page order
SECTIONS: tuple[tuple[str, str], ...] = (
    ("fitted", "What was fitted"),
    ("convergence", "Convergence"),
    ("cpts", "Estimated CPTs"),
    ("em-check", "EM cross-check"),
    ("gaps", "Gaps and complete cases"),
    ("sensitivity", "Missing-not-at-random sensitivity"),
    ("assessment", "Model assessment"),
    ("other", "Further sections"),
    ("cautions", "Cautions"),
)

PROB_DECIMALS = 4
LOGLIK_DECIMALS = 4
SCI_DIGITS = 3
#: largest CPT shown row by row; bigger tables show their first rows (all rows are in the JSON)
MAX_TABLE_ROWS = 200
#: most entries drawn in the complete-case plot (those that moved most)
MAX_PLOT_ENTRIES = 60
#: most nodes drawn in the network figure
MAX_DRAWN_NODES = 120
DPI = 144
SHADE = "#d4d4d4"      # fill of a node with a fixed CPT
INK = "#222222"

#: the caution on latent states (shown only when the network has a latent node)
LATENT_CAUTION = ("The states of a latent node are labels chosen by the fit; their meaning comes from the CPTs of its "
                  "children, not from their names.")

REPORT_CAUTIONS: tuple[str, ...] = (
    "The estimates rest on the network structure as given: a missing or wrong arrow changes them, and no part "
    "of this report tests the structure.",
    "The full-likelihood fit treats the gaps as missing at random (MAR): whether a cell is missing may depend on "
    "what was observed, not on the missing value itself. Missing not at random (MNAR) cannot be detected from "
    "the data; if it is plausible, the estimates may be biased.",
    LATENT_CAUTION,
    "Standard errors and intervals, where shown, are large-sample approximations; with few records in a parent "
    "configuration, or estimates near 0 or 1, they can be far off. A MAP fit depends on its prior.",
    "This report supports, and does not replace, engineering or clinical judgement. Local codes, regulations "
    "and licensed practice come first.",
)

_KNOWN_TOP = {"format", "method", "objective", "log_likelihood", "log_prior", "penalty", "objective_value",
              "gradient_norm", "converged", "stop_reason", "iterations", "n_rows", "n_distinct", "seed",
              "settings", "history", "nodes", "network", "restarts", "best_start", "optima", "em_check",
              "complete_case", "information_criteria", "cross_validation", "prior", "gaps", "em",
              "uncertainty", "identifiability", "stationarity", "starts_note", "latent_states"}
_KNOWN_NODE = {"states", "parents", "latent", "fixed", "table", "se", "interval", "se_status",
               "missing_information", "cpd", "parameters", "parameters_se", "parameters_interval",
               "parameters_status", "increasing_with", "binding"}


def _param_leaves(doc: Any, path: tuple = ()) -> list[tuple[tuple, Any]]:
    """(key path, value) of every number or list of numbers in a parameters layout."""
    if isinstance(doc, Mapping):
        return [x for k, v in doc.items() for x in _param_leaves(v, path + (str(k),))]
    return [(path, doc)]


def _parameters_table(name: str, sec: Mapping[str, Any]) -> str:
    """A structured node's parameters (noisy: leak and strengths; logistic: coefficients), with
    their standard errors and intervals when the result has them."""
    doc = sec.get("parameters")
    if not isinstance(doc, Mapping):
        return ""
    se = dict(_param_leaves(sec.get("parameters_se"))) if isinstance(sec.get("parameters_se"), Mapping) else {}
    iv = sec.get("parameters_interval")
    lo = dict(_param_leaves(iv[0])) if isinstance(iv, (list, tuple)) and len(iv) == 2 else {}
    hi = dict(_param_leaves(iv[1])) if isinstance(iv, (list, tuple)) and len(iv) == 2 else {}

    def cell(v: Any) -> str:
        if isinstance(v, (list, tuple)):
            return ", ".join(fmt_prob(x) for x in v)
        return fmt_prob(v)

    def label(path: tuple) -> str:
        if path[0] in ("leak", "intercept"):
            return path[0]
        if path[0] == "fraction" and len(path) == 2:  # a monotone node's fraction
            return path[1]
        return f"{path[1]}={path[2]}" if len(path) >= 3 else ".".join(path)

    rows = []
    for path, v in _param_leaves(doc):
        if path[0] == "coefficients" and isinstance(v, list) and not any(v):
            continue  # a reference state: 0 by definition
        def wrap(x: Any) -> str:
            return f"({cell(x)})" if isinstance(x, (list, tuple)) else cell(x)

        interval = f"{wrap(lo[path])} to {wrap(hi[path])}" if path in lo and path in hi else ""
        rows.append(f"<tr><th scope=\"row\">{esc(label(path))}</th><td>{esc(cell(v))}</td>"
                    f"<td>{esc(cell(se[path])) if se.get(path) is not None else ''}</td><td>{esc(interval)}</td></tr>")
    kind = str(sec.get("cpd") or "structured")
    what = ("log-odds against the first state" if kind == "logistic" else
            "probabilities (noisy-OR: of the second state; noisy-MAX: per state)")
    if sec.get("increasing_with"):
        kind = "monotone (increasing with " + ", ".join(map(str, sec["increasing_with"])) + ")"
        what = ("fractions: 1 = the constraint against one state lower binds, 0 = the cell is 0" if len(sec["increasing_with"]) == 1
                else "fractions: 1 = the constraint against the lowest configuration one state lower binds, 0 = the cell is 0")
    return (f'<table class="cpt-table params-table" data-node="{esc(name)}-parameters"><caption>{esc(kind)} '
            f"parameters of {esc(name)} ({esc(what)}); the table above is the one they imply</caption>"
            "<thead><tr><th>parameter</th><th>estimate</th><th>se</th><th>interval</th></tr></thead><tbody>"
            + "".join(rows) + "</tbody></table>" + _binding_list(sec))


def _binding_list(sec: Mapping[str, Any]) -> str:
    """A monotone node's binding constraints (the result's ``"binding"``), one line each."""
    lines = sec.get("binding")
    if not sec.get("increasing_with"):
        return ""
    if not lines:
        return "<p class=\"binding\">No monotonicity constraint binds at the estimate.</p>"
    return ("<p class=\"binding\">Binding constraints at the estimate (the data pull the other way; the "
            "estimate sits on the constraint):</p><ul class=\"binding\">"
            + "".join(f"<li>{esc(str(x))}</li>" for x in lines) + "</ul>")


# ============================================================================== number formats
def _f(v: Any) -> float:
    """A JSON number as float: None -> nan, "inf"/"-inf" strings -> inf."""
    if v is None or isinstance(v, bool):
        return math.nan
    if isinstance(v, str):
        try:
            return float(v)
        except ValueError:
            return math.nan
    try:
        return float(v)
    except (TypeError, ValueError):
        return math.nan


def _special(x: float) -> str | None:
    if math.isnan(x):
        return "n/a"
    if math.isinf(x):
        return "inf" if x > 0 else "-inf"
    return None


def _zero(s: str) -> str:
    """Write -0.0000 as 0.0000."""
    return s[1:] if s.startswith("-") and not any(c in "123456789" for c in s) else s


def fmt_prob(v: Any) -> str:
    """A probability (or a standard error, or an interval end): 4 decimals."""
    x = _f(v)
    return _special(x) or _zero(f"{x:.{PROB_DECIMALS}f}")


def fmt_loglik(v: Any) -> str:
    """A log-likelihood, objective, AIC/BIC or G²: 4 decimals."""
    x = _f(v)
    return _special(x) or _zero(f"{x:.{LOGLIK_DECIMALS}f}")


def fmt_sci(v: Any) -> str:
    """A gradient norm, change or tolerance: 3 significant digits, e-notation."""
    x = _f(v)
    return _special(x) or f"{x:.{SCI_DIGITS - 1}e}"


def fmt_count(v: Any) -> str:
    """A number of records: whole with thousands separators, or 2 decimals when fractional."""
    x = _f(v)
    if _special(x):
        return _special(x)  # type: ignore[return-value]
    return f"{int(x):,}" if float(x).is_integer() else f"{x:,.2f}"


def fmt_share(v: Any) -> str:
    """A share in [0, 1] as a percentage, 1 decimal."""
    x = _f(v)
    return _special(x) or f"{100.0 * x:.1f}%"


def fmt_p(v: Any) -> str:
    x = _f(v)
    if _special(x):
        return _special(x)  # type: ignore[return-value]
    return "<1e-300" if x < 1e-300 else fmt_sci(x)


def _fmt_any(v: Any) -> str:
    """A value of a section this module does not know: plain, short."""
    if v is None:
        return "n/a"
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, int):
        return f"{v:,}" if abs(v) >= 10_000 else str(v)
    if isinstance(v, float):
        if _special(v):
            return _special(v)  # type: ignore[return-value]
        if v.is_integer() and abs(v) < 1e15:
            return str(int(v))
        if 1e-3 <= abs(v) < 1e6:
            return f"{v:.6g}"
        return fmt_sci(v)
    return str(v)


# ============================================================================== HTML helpers
def esc(s: Any) -> str:
    return html.escape(str(s), quote=True)


def _table(headers: Sequence[str], rows: Iterable[Sequence[str]], *, cls: str = "plain", caption: str | None = None,
           raw: bool = False, num_from: int = 1) -> str:
    """A simple table; cells are escaped unless ``raw``; columns from ``num_from`` on are right-aligned."""
    out = [f'<p class="tcap">{esc(caption)}</p>'] if caption else []
    out.append(f'<table class="{cls}">')
    out.append("<thead><tr>" + "".join(f"<th>{esc(h)}</th>" for h in headers) + "</tr></thead><tbody>")
    for r in rows:
        cells = []
        for j, c in enumerate(r):
            body = c if raw else esc(c)
            cells.append(f'<td class="num">{body}</td>' if j >= num_from else f"<td>{body}</td>")
        out.append("<tr>" + "".join(cells) + "</tr>")
    out.append("</tbody></table>")
    return "".join(out)


def _kv(pairs: Iterable[tuple[str, str]], *, cls: str = "kv", raw: bool = False) -> str:
    rows = "".join(f'<tr><th scope="row">{esc(k)}</th><td>{v if raw else esc(v)}</td></tr>' for k, v in pairs)
    return f'<table class="{cls}"><tbody>{rows}</tbody></table>'


def _absent(text: str) -> str:
    return f'<p class="absent">{esc(text)}</p>'


def _note(text: str) -> str:
    return f'<p class="note">{esc(text)}</p>'


def _render_any(obj: Any, depth: int = 0) -> str:
    """Render a JSON value of unknown meaning as recorded: dicts as key/value tables, lists of
    records as tables, other lists inline."""
    if isinstance(obj, Mapping):
        if not obj:
            return "<span>(empty)</span>"
        if depth > 4:
            return f"<code>{esc(json.dumps(obj)[:400])}</code>"
        return _kv(((str(k), _render_any(v, depth + 1)) for k, v in obj.items()), raw=True)
    if isinstance(obj, (list, tuple)):
        if not obj:
            return "<span>(none)</span>"
        if all(isinstance(x, Mapping) for x in obj):
            keys: list[str] = []
            for x in obj:
                for k in x:
                    if k not in keys:
                        keys.append(str(k))
            if len(keys) <= 12 and depth <= 4:
                shown = list(obj)[:MAX_TABLE_ROWS]
                rows = [[_render_inline(x.get(k)) for k in keys] for x in shown]
                more = "" if len(obj) <= MAX_TABLE_ROWS else _note(f"{len(obj) - MAX_TABLE_ROWS} more rows in the JSON")
                return _table(keys, rows, raw=True, num_from=len(keys) + 1) + more
        return _render_inline(obj)
    return esc(_fmt_any(obj))


def _render_inline(v: Any) -> str:
    if isinstance(v, Mapping):
        return _render_any(v, 5) if len(v) > 6 else esc(", ".join(f"{k}: {_short(x)}" for k, x in v.items()))
    if isinstance(v, (list, tuple)):
        return esc(_short(v))
    return esc(_fmt_any(v))


def _short(v: Any, limit: int = 300) -> str:
    if isinstance(v, (list, tuple)):
        s = "[" + ", ".join(_short(x, limit) for x in v) + "]"
    elif isinstance(v, Mapping):
        s = "{" + ", ".join(f"{k}: {_short(x, limit)}" for k, x in v.items()) + "}"
    else:
        s = _fmt_any(v)
    return s if len(s) <= limit else s[: limit - 3] + "..."


# ============================================================================== figures
def _plain_text():
    """Labels drawn as written: matplotlib reads text between two ``$`` as maths markup (a state
    ``$\\foo$`` crashed the report, ``$x$`` came out in italics). Texts take the setting when
    they are created, tick labels when the figure is drawn: figures are built and saved inside."""
    import matplotlib

    return matplotlib.rc_context({"text.parse_math": False, "text.usetex": False})


def _plain_labels(draw):
    """Build a figure with :func:`_plain_text` on (node names and state labels are data)."""
    import functools

    @functools.wraps(draw)
    def wrapper(*args, **kwargs):
        with _plain_text():
            return draw(*args, **kwargs)

    return wrapper


def _figure(width: float, height: float):
    from matplotlib.figure import Figure

    return Figure(figsize=(width, height), dpi=DPI)


def _png(fig) -> tuple[str, float, float]:
    """The figure as a base64 PNG, and its size in CSS pixels (96 per inch)."""
    buf = io.BytesIO()
    with _plain_text():
        fig.savefig(buf, format="png", dpi=DPI, metadata={"Software": "adfit"})
    w, h = fig.get_size_inches()
    return base64.b64encode(buf.getvalue()).decode("ascii"), float(w) * 96.0, float(h) * 96.0


def _img(fig, alt: str, caption: str) -> str:
    data, w, h = _png(fig)
    return (f'<figure><img src="data:image/png;base64,{data}" alt="{esc(alt)}" width="{w:.0f}" height="{h:.0f}">'
            f"<figcaption>{esc(caption)}</figcaption></figure>")


def _layered(network: Network, sweeps: int = 4) -> tuple[list[list[str]], dict[tuple[str, str], list[str]]]:
    """Layers with a waypoint in every layer an arrow passes over, and the waypoints of each arrow.

    A waypoint (a name starting with NUL) keeps a slot free for the arrow in the layers between
    a parent and a child more than one layer below it, so that the arrow need not cross a box.
    """
    depth: dict[str, int] = {}
    for n in network.nodes:
        depth[n.name] = 0 if not n.parents else 1 + max(depth[p] for p in n.parents)
    layers: list[list[str]] = [[] for _ in range(max(depth.values(), default=-1) + 1)]
    for n in network.nodes:
        layers[depth[n.name]].append(n.name)
    up: dict[str, list[str]] = {n: [] for n in network.names}     # neighbours one layer up
    down: dict[str, list[str]] = {n: [] for n in network.names}   # neighbours one layer down
    ways: dict[tuple[str, str], list[str]] = {}
    for n in network.nodes:
        for p in n.parents:
            chain = [p]
            for d in range(depth[p] + 1, depth[n.name]):
                w = f"\0{p}>{n.name}@{d}"
                layers[d].append(w)
                up[w], down[w] = [], []
                chain.append(w)
            chain.append(n.name)
            ways[(p, n.name)] = chain[1:-1]
            for a, b in zip(chain, chain[1:]):
                down[a].append(b)
                up[b].append(a)

    def pos() -> dict[str, float]:
        return {name: i - (len(layer) - 1) / 2.0 for layer in layers for i, name in enumerate(layer)}

    def reorder(layer: list[str], neigh: Mapping[str, list[str]], where: Mapping[str, float]) -> list[str]:
        def key(item: tuple[int, str]) -> tuple[float, int]:
            i, name = item
            nb = neigh[name]
            return (float(np.mean([where[m] for m in nb])) if nb else i - (len(layer) - 1) / 2.0, i)
        return [name for _, name in sorted(enumerate(layer), key=key)]

    for s in range(sweeps):
        if s % 2 == 0:
            for d in range(1, len(layers)):
                layers[d] = reorder(layers[d], up, pos())
        else:
            for d in range(len(layers) - 2, -1, -1):
                layers[d] = reorder(layers[d], down, pos())
    return layers, ways


def network_layers(network: Network, sweeps: int = 4) -> list[list[str]]:
    """Nodes in layers by topological depth (roots in layer 0, each node one below its deepest
    parent), ordered within each layer to shorten the arrows (barycentres of the neighbours'
    positions, alternately from above and from below; an arrow that skips layers counts with a
    waypoint in each layer it passes)."""
    layers, _ = _layered(network, sweeps)
    return [[n for n in layer if not n.startswith("\0")] for layer in layers]


def _node_label(network: Network, name: str, limit: int = 26) -> tuple[str, str]:
    states = network.node(name).states
    text = ", ".join(states)
    if len(text) > limit:
        text = f"{len(states)} states"
    return name, text


def _clip(centre: tuple[float, float], toward: tuple[float, float], hw: float, hh: float) -> tuple[float, float]:
    """Where the segment from a box's centre toward a point leaves the box."""
    (x1, y1), (x2, y2) = centre, toward
    dx, dy = x2 - x1, y2 - y1
    t = min(hw / abs(dx) if dx else math.inf, hh / abs(dy) if dy else math.inf)
    return x1 + dx * t, y1 + dy * t


def _crosses(a: tuple[float, float], b: tuple[float, float], boxes: Sequence[tuple[float, float]],
             hw: float, hh: float) -> bool:
    ts = np.linspace(0.0, 1.0, 41)
    x = a[0] + ts * (b[0] - a[0])
    y = a[1] + ts * (b[1] - a[1])
    return any(bool(np.any((np.abs(x - ox) < hw) & (np.abs(y - oy) < hh))) for ox, oy in boxes)


@_plain_labels
def network_figure(network: Network):
    """The network drawn in layers (a matplotlib Figure, no display needed).

    Plain boxes: solid outline = observed node with an estimated CPT; dashed outline = latent
    node; grey fill = CPT fixed in the network. Arrows run straight from parent to child; one
    that skips layers and would cross a box runs through the free slots kept for it instead.
    """
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch, Rectangle

    layers, ways = _layered(network)
    labels = {n: _node_label(network, n) for n in network.names}
    chars = max(max(len(a), len(b)) for a, b in labels.values())
    bw = min(3.0, max(1.0, 0.085 * chars + 0.35))   # box width, inches
    bh, gap, vgap, margin, legend_h, slot = 0.55, 0.35, 0.75, 0.3, 0.75, 0.3

    def w_of(name: str) -> float:
        return slot if name.startswith("\0") else bw

    def span(layer: list[str]) -> float:
        return sum(w_of(n) for n in layer) + gap * (len(layer) - 1)

    width = max(6.0, max(span(layer) for layer in layers) + 2 * margin)
    height = len(layers) * (bh + vgap) - vgap + 2 * margin + legend_h
    scale = min(1.0, 16.0 / width)
    fig = _figure(width * scale, height * scale)
    ax = fig.add_axes((0.0, 0.0, 1.0, 1.0))
    ax.set_xlim(0, width)
    ax.set_ylim(0, height)
    ax.axis("off")
    centre: dict[str, tuple[float, float]] = {}
    for d, layer in enumerate(layers):
        y = height - margin - bh / 2 - d * (bh + vgap)
        x = (width - span(layer)) / 2
        for name in layer:
            centre[name] = (x + w_of(name) / 2, y)
            x += w_of(name) + gap
    fs = 10.5 * scale
    for name in network.names:
        cx, cy = centre[name]
        node = network.node(name)
        ax.add_patch(Rectangle((cx - bw / 2, cy - bh / 2), bw, bh, facecolor=SHADE if node.fixed is not None else "white",
                               edgecolor=INK, linewidth=1.3 * scale if not node.latent else 1.1 * scale,
                               linestyle="--" if node.latent else "-", zorder=2))
        top, bottom = labels[name]
        ax.text(cx, cy + 0.1, top, ha="center", va="center", fontsize=fs, fontweight="bold", color=INK, zorder=3)
        ax.text(cx, cy - 0.13, bottom, ha="center", va="center", fontsize=fs * 0.82, color="#444444", zorder=3)
    hw, hh = bw / 2 + 0.03, bh / 2 + 0.03
    arrow = dict(arrowstyle="-|>", color=INK, lw=1.0 * scale, shrinkA=0, shrinkB=0, mutation_scale=12 * scale)
    for node in network.nodes:
        for p in node.parents:
            a, b = centre[p], centre[node.name]
            others = [centre[m] for m in network.names if m not in (p, node.name)]
            pts = [a, b]
            if ways[(p, node.name)] and _crosses(_clip(a, b, hw, hh), _clip(b, a, hw, hh), others,
                                                 bw / 2 + 0.05, bh / 2 + 0.05):
                pts = [a] + [centre[w] for w in ways[(p, node.name)]] + [b]
            pts[0] = _clip(pts[0], pts[1], hw, hh)
            pts[-1] = _clip(pts[-1], pts[-2], hw, hh)
            if len(pts) > 2:
                ax.plot([q[0] for q in pts[:-1]], [q[1] for q in pts[:-1]], color=INK, lw=1.0 * scale,
                        solid_joinstyle="round", zorder=1)
            ax.annotate("", xy=pts[-1], xytext=pts[-2], arrowprops=arrow, zorder=1)
    handles = [Patch(facecolor="white", edgecolor=INK, label="observed node, CPT estimated"),
               Patch(facecolor="white", edgecolor=INK, linestyle="--", label="latent node (never observed)"),
               Patch(facecolor=SHADE, edgecolor=INK, label="CPT fixed in the network"),
               Line2D([], [], color=INK, marker=">", markersize=5, lw=1, label="arrow: parent to child")]
    fig.legend(handles=handles, loc="lower center", ncol=2 if width * scale < 8 else 4, frameon=False,
               fontsize=9 * max(scale, 0.8), bbox_to_anchor=(0.5, 0.01))
    return fig


def _starts(doc: Mapping[str, Any]) -> tuple[list[Mapping[str, Any]], Any, int | None]:
    """(list of starts, optima section or None, index of the best start or None)."""
    rs = doc.get("restarts")
    optima = doc.get("optima")
    best = doc.get("best_start")
    starts: list[Mapping[str, Any]] = []
    if isinstance(rs, Mapping):
        cand = rs.get("starts", rs.get("runs"))
        starts = [s for s in cand if isinstance(s, Mapping)] if isinstance(cand, list) else []
        optima = rs.get("optima", optima)
        best = rs.get("best_start", rs.get("best", best))
    elif isinstance(rs, list):
        starts = [s for s in rs if isinstance(s, Mapping)]
    best_i = int(best) if isinstance(best, (int, float)) and not isinstance(best, bool) else None
    return starts, optima, best_i


def _start_no(k: Any) -> Any:
    """A start as people count it: the result numbers starts from 0, the page from 1."""
    return int(k) + 1 if isinstance(k, (int, float)) and not isinstance(k, bool) else k


def _history_of(sec: Any) -> tuple[list[float], list[float]] | None:
    if not isinstance(sec, Mapping):
        return None
    h = sec.get("history") if isinstance(sec.get("history"), Mapping) else sec
    obj = h.get("objective")
    gn = h.get("gradient_norm")
    if not isinstance(obj, list) or not obj:
        return None
    return [_f(v) for v in obj], ([_f(v) for v in gn] if isinstance(gn, list) else [])


def convergence_histories(doc: Mapping[str, Any]) -> tuple[list[tuple[str, list[float], list[float], bool]], str]:
    """Histories to draw: ``[(label, objective, gradient_norm, is_best)]`` and a note saying
    whether they are per start or the best start's only."""
    starts, _, best = _starts(doc)
    out: list[tuple[str, list[float], list[float], bool]] = []
    for i, s in enumerate(starts):
        h = _history_of(s.get("history")) if isinstance(s.get("history"), Mapping) else None
        if h is None:
            continue
        k = s.get("start", i)
        is_best = best is not None and k == best
        kind = f" ({s['kind']})" if isinstance(s.get("kind"), str) else ""
        out.append((f"start {_start_no(k)}{kind}" + (", best" if is_best else ""), h[0], h[1], is_best))
    if out:
        missing = len(starts) - len(out)
        note = f"Histories of all {len(out)} starts." if not missing else \
            f"Histories of {len(out)} of the {len(starts)} starts (the others recorded none)."
        return out, note
    h = _history_of(doc.get("history"))
    if h is None:
        return [], "The result holds no per-iteration history."
    label = f"start {_start_no(best)} (best)" if best is not None else "the returned fit"
    if len(starts) > 1:
        note = (f"Only the best start's history is in the result ({len(starts)} starts were run; their final "
                f"values are in the table below).")
    else:
        note = "One start; its history is drawn."
    return [(label, h[0], h[1], True)], note


_SUPERSCRIPT = str.maketrans("-0123456789", "\u207b\u2070\u00b9\u00b2\u00b3\u2074\u2075\u2076\u2077\u2078\u2079")


def _power_of_ten(value: float, _pos=None) -> str:
    """A log axis's tick label as plain text: ``10⁻⁴`` at powers of ten, ``4e-05`` elsewhere
    (matplotlib's default labels are maths markup, which the report draws as written)."""
    if not (value > 0 and math.isfinite(value)):
        return ""
    e = math.log10(value)
    if abs(e - round(e)) < 1e-9:
        return "10" + str(int(round(e))).translate(_SUPERSCRIPT)
    return f"{value:.0e}"


_LINESTYLES = ("-", "--", ":", "-.")
_COLOURS = ("#1b1b1b", "#7a4b00", "#2f5f8a", "#6b6b6b", "#8a2f4d", "#3f7a3a")


@_plain_labels
def convergence_figure(histories: Sequence[tuple[str, list[float], list[float], bool]], *,
                       threshold: float | None = None):
    """Objective (linear), shortfall below the best objective (log) and gradient norm (log)
    per iteration, one line per start; ``threshold`` draws the gradient-norm stopping level."""
    fig = _figure(11.0, 3.6)
    axes = fig.subplots(1, 3)
    finite_all = [v for _, o, _, _ in histories for v in o if math.isfinite(v)]
    best = max(finite_all) if finite_all else 0.0
    floor = 1e-14 * max(1.0, abs(best))
    any_gn = False
    for k, (label, obj, gn, is_best) in enumerate(histories):
        style = dict(color=_COLOURS[k % len(_COLOURS)], linestyle=_LINESTYLES[(k // len(_COLOURS)) % 4],
                     lw=1.8 if is_best else 1.1, label=label)
        o = np.array(obj, dtype=float)
        it = np.arange(len(o))
        axes[0].plot(it, np.where(np.isfinite(o), o, np.nan), **style)
        short = best - o
        axes[1].plot(it, np.where(np.isfinite(short) & (short > floor), short, np.nan), **style)
        if gn:
            g = np.array(gn, dtype=float)
            axes[2].plot(np.arange(len(g)), np.where(np.isfinite(g) & (g > 0), g, np.nan), **style)
            any_gn = True
    axes[0].set_title("objective", fontsize=10)
    axes[0].ticklabel_format(axis="y", useOffset=False, style="plain")  # the objective itself, no "+c" corner note
    axes[1].set_title("best objective minus objective (log)", fontsize=10)
    axes[1].set_yscale("log")
    axes[2].set_title("gradient norm, records (log)", fontsize=10)
    axes[2].set_yscale("log")
    if threshold is not None and math.isfinite(threshold) and threshold > 0 and any_gn:
        axes[2].axhline(threshold, color="#888888", lw=1, linestyle=(0, (4, 3)), label="stopping level")
    if not any_gn:
        axes[2].text(0.5, 0.5, "not recorded\nfor this method", ha="center", va="center",
                     transform=axes[2].transAxes, fontsize=9, color="#555555")
        axes[2].set_yscale("linear")
        axes[2].set_yticks([])
    from matplotlib.ticker import FuncFormatter, MaxNLocator, NullFormatter

    for ax in axes[1:]:
        if ax.get_yscale() == "log":  # matplotlib's own log labels are maths markup, drawn raw here
            ax.yaxis.set_major_formatter(FuncFormatter(_power_of_ten))
            ax.yaxis.set_minor_formatter(NullFormatter())
    for ax in axes:
        ax.xaxis.set_major_locator(MaxNLocator(integer=True))
        ax.set_xlabel("iteration", fontsize=9)
        ax.tick_params(labelsize=8)
        ax.grid(True, color="#e6e6e6", lw=0.6)
    handles, labels = axes[0].get_legend_handles_labels()
    h2, l2 = axes[2].get_legend_handles_labels()
    for h, lab in zip(h2, l2):
        if lab == "stopping level":
            handles.append(h)
            labels.append(lab)
    if handles:
        fig.legend(handles, labels, loc="lower center", ncol=min(4, len(handles)), frameon=False, fontsize=8)
    rows = math.ceil(len(handles) / 4) if handles else 0
    fig.subplots_adjust(left=0.07, right=0.985, top=0.9, bottom=0.22 + 0.06 * max(0, rows - 1), wspace=0.3)
    return fig


@_plain_labels
def gaps_figure(columns: Sequence[Mapping[str, Any]]):
    """Share of missing cells per observed column (horizontal bars)."""
    names = [str(c.get("name")) for c in columns]
    shares = [100.0 * _f(c.get("share_missing")) for c in columns]
    fig = _figure(5.5, 0.9 + 0.3 * len(names))
    ax = fig.add_subplot(1, 1, 1)
    y = np.arange(len(names))[::-1]
    ax.barh(y, shares, color="#9a9a9a", edgecolor=INK, linewidth=0.6, height=0.6)
    for yi, s in zip(y, shares):
        ax.text(min(s, 100.0) + 1.5, yi, f"{s:.1f}%", va="center", fontsize=9)
    ax.set_yticks(y, names, fontsize=9)
    ax.set_xlim(0, 115)
    ax.set_xlabel("missing cells, % of records", fontsize=9.5)
    ax.tick_params(axis="x", labelsize=9)
    ax.grid(True, axis="x", color="#e6e6e6", lw=0.6)
    ax.set_axisbelow(True)
    fig.subplots_adjust(left=0.22, right=0.97, top=1 - 0.25 / fig.get_size_inches()[1],
                        bottom=0.6 / fig.get_size_inches()[1])
    return fig


def _entry_label(e: Mapping[str, Any]) -> str:
    par = e.get("parents") or {}
    cond = ", ".join(f"{p}={s}" for p, s in par.items()) if isinstance(par, Mapping) else ""
    return f"P({e.get('node')}={e.get('state')}" + (f" | {cond})" if cond else ")")


def _entry_interval(doc: Mapping[str, Any], e: Mapping[str, Any]) -> tuple[float, float] | None:
    node = (doc.get("nodes") or {}).get(e.get("node"))
    if not isinstance(node, Mapping):
        return None
    iv = node.get("interval")
    if not (isinstance(iv, (list, tuple)) and len(iv) == 2):
        return None
    states = list(node.get("states") or [])
    parents = list(node.get("parents") or [])
    try:
        j = states.index(e.get("state"))
        row = _row_index(doc, parents, e.get("parents") or {})
        lo, hi = _f(iv[0][row][j]), _f(iv[1][row][j])
    except (ValueError, IndexError, TypeError, KeyError):
        return None
    return (lo, hi) if math.isfinite(lo) and math.isfinite(hi) else None


def _row_index(doc: Mapping[str, Any], parents: Sequence[str], cfg: Mapping[str, str]) -> int:
    nodes = doc.get("nodes") or {}
    row = 0
    for p in parents:
        st = list(nodes[p]["states"])
        row = row * len(st) + st.index(cfg[p])
    return row


@_plain_labels
def complete_case_figure(doc: Mapping[str, Any], entries: Sequence[Mapping[str, Any]], *, z: float = 1.96):
    """Both estimates of every entry (rows), full likelihood with its error bar, complete case beside it.

    Error bars: the full fit's interval from the result's nodes when recorded, else ±z·SE from
    the comparison's entries, else none (the figure says which).
    """
    n = len(entries)
    labels = [_entry_label(e) for e in entries]
    labels = [t if len(t) <= 64 else t[:61] + "..." for t in labels]
    label_w = min(4.8, 0.07 * max((len(t) for t in labels), default=10) + 0.3)   # inches at 9 pt
    fig_w = label_w + 6.2
    fig = _figure(fig_w, 1.9 + 0.3 * n)
    ax = fig.add_subplot(1, 1, 1)
    y = np.arange(n)[::-1].astype(float)
    full = np.array([_f(e.get("full")) for e in entries])
    cc = np.array([_f(e.get("complete_case")) for e in entries])
    lo = np.full(n, np.nan)
    hi = np.full(n, np.nan)
    kinds = set()
    for i, e in enumerate(entries):
        iv = _entry_interval(doc, e)
        if iv is not None:
            lo[i], hi[i] = iv
            kinds.add("interval")
        elif e.get("se") is not None and math.isfinite(_f(e.get("se"))):
            s = _f(e.get("se"))
            lo[i], hi[i] = max(0.0, full[i] - z * s), min(1.0, full[i] + z * s)
            kinds.add("se")
    has = np.isfinite(lo)
    if has.any():
        xerr = np.vstack([np.where(has, full - lo, 0.0), np.where(has, hi - full, 0.0)])
        xerr = np.clip(xerr, 0.0, None)
        ax.errorbar(full[has], y[has] + 0.15, xerr=xerr[:, has], fmt="none", ecolor=INK, elinewidth=1.0, capsize=2.5)
    supported = np.array([bool(e.get("supported", True)) for e in entries])
    ax.plot(full, y + 0.15, "o", color=INK, markersize=4.5, label="all records (full likelihood)")
    ax.plot(cc[supported], y[supported] - 0.15, "s", markerfacecolor="white", markeredgecolor="#7a4b00",
            markersize=4.5, markeredgewidth=1.2, label="complete records only")
    if (~supported).any():
        ax.plot(cc[~supported], y[~supported] - 0.15, "x", color="#999999", markersize=4.5,
                label="complete case: configuration in no complete row")
    ax.set_yticks(y, labels, fontsize=9)
    ax.tick_params(axis="x", top=True, labeltop=n > 12)
    ax.set_xlim(-0.02, 1.02)
    ax.set_ylim(-0.8, n - 0.2)
    ax.set_xlabel("probability", fontsize=10)
    ax.tick_params(axis="x", labelsize=9)
    ax.grid(True, axis="x", color="#e6e6e6", lw=0.6)
    ax.set_axisbelow(True)
    bars = ("error bars: the full fit's recorded interval" if kinds == {"interval"} else
            f"error bars: full fit ± {z:g} SE" if kinds == {"se"} else
            "error bars: recorded interval, else ± 1.96 SE" if kinds else
            "no error bars: the result has no standard errors")
    h = fig.get_size_inches()[1]
    fig.legend(*ax.get_legend_handles_labels(), loc="upper center", bbox_to_anchor=(0.5, 1.0 - 0.05 / h), ncol=3,
               frameon=False, fontsize=9, title=bars, title_fontsize=9)
    fig.subplots_adjust(left=(label_w + 0.1) / fig_w, right=1 - 0.2 / fig_w, top=1 - (1.05 if n > 12 else 0.8) / h,
                        bottom=0.55 / h)
    return fig


# ============================================================================== sections
def _sec(sid: str, body: str) -> str:
    title = dict(SECTIONS)[sid]
    return f'<section id="{sid}"><h2>{esc(title)}</h2>{body}</section>'


def _section_fitted(doc: Mapping[str, Any], res: FitResult, gaps: Mapping[str, Any] | None) -> str:
    net = res.network
    parts: list[str] = []
    if len(net) <= MAX_DRAWN_NODES:
        parts.append(_img(network_figure(net), "the network",
                          f"The network: {len(net)} nodes, {sum(len(n.parents) for n in net.nodes)} arrows; "
                          f"latent: {', '.join(net.latent_names) or 'none'}; fixed CPTs: "
                          f"{', '.join(net.fixed_names) or 'none'}."))
    else:
        parts.append(_note(f"The network has {len(net)} nodes, too many to draw legibly; "
                           f"the node table below lists every node and its parents."))
    node_rows = []
    for n in net.nodes:
        role = ("latent" if n.latent else "observed") + (", CPT fixed" if n.fixed is not None else
                                                          f", CPT tied to {n.tied_to}" if n.tied_to else ", CPT estimated")
        if n.impossible:
            role += f", {len(n.impossible)} impossible cell(s)"
        node_rows.append([n.name, role, ", ".join(n.parents) or "-", ", ".join(n.states)])
    parts.append(_table(["node", "role", "parents", "states"], node_rows, cls="plain nodes", num_from=99))

    method = str(doc.get("method", ""))
    obj = str(doc.get("objective", "mle"))
    obj_text = {"mle": "maximum likelihood (MLE)", "map": "posterior mode (MAP) with a Dirichlet prior"}.get(obj, obj)
    conv = doc.get("converged")
    summary = [
        ("method", {"lbfgs": "L-BFGS on the exact marginal likelihood", "adam": "Adam on the exact marginal likelihood",
                    "em": "EM (the plain-numpy reference)"}.get(method, method)),
        ("objective", obj_text),
        ("records", f"{fmt_count(doc.get('n_rows'))} ({fmt_count(doc.get('n_distinct'))} distinct rows)"),
        ("log-likelihood", fmt_loglik(doc.get("log_likelihood"))),
    ]
    lp = _f(doc.get("log_prior"))
    if obj == "map" or (math.isfinite(lp) and lp != 0.0):
        summary.append(("log-prior", fmt_loglik(doc.get("log_prior"))))
    if _f(doc.get("penalty")) and math.isfinite(_f(doc.get("penalty"))):
        summary.append(("L2 penalty", fmt_loglik(doc.get("penalty"))))
    summary += [
        ("objective value", fmt_loglik(doc.get("objective_value", doc.get("log_likelihood")))),
        ("gradient norm (records)", fmt_sci(doc.get("gradient_norm"))),
    ]
    st = doc.get("stationarity") if isinstance(doc.get("stationarity"), dict) else {}
    if st.get("kkt_ratio") is not None:
        ratio = _f(st.get("kkt_ratio"))
        tol = _f(st.get("kkt_tol"))
        ok = math.isfinite(ratio) and math.isfinite(tol) and ratio <= 1 + tol
        summary.append(("largest KKT ratio", f"{ratio:.6f} ({'within' if ok else 'ABOVE'} 1 + {tol:g}; "
                                             f"worst cell {st.get('kkt_worst_cell')})"))
        moves = [f"{int(_f(st.get(k)))} {what}" for k, what in (("boundary_escapes", "off a false boundary"),
                                                                 ("saddle_escapes", "off a saddle"))
                 if math.isfinite(_f(st.get(k))) and _f(st.get(k)) > 0]
        if moves:
            summary.append(("moves the optimiser made", ", ".join(moves)))
    if isinstance(doc.get("starts_note"), str):
        summary.append(("starts", doc["starts_note"]))
    summary += [
        ("iterations", _fmt_any(doc.get("iterations"))),
        ("stopping rule", ("held" if conv else "did NOT hold") + (f": {doc['stop_reason']}" if doc.get("stop_reason") else "")),
        ("seed", _fmt_any(doc.get("seed"))),
    ]
    parts.append('<div class="cols"><div>')
    parts.append("<h3>The fit</h3>" + _kv(summary, cls="kv summary"))
    parts.append("</div><div>")
    parts.append("<h3>Gaps</h3>" + _gaps_brief(doc, net, gaps))
    parts.append("<h3>Prior</h3>" + _prior_brief(doc))
    parts.append("</div></div>")
    settings = doc.get("settings")
    if isinstance(settings, Mapping) and settings:
        parts.append("<details class=\"settings\"><summary>Settings of the optimiser (as recorded in the result)"
                     "</summary>" + _kv(((str(k), _fmt_any(v) if not isinstance(v, (dict, list)) else _short(v))
                                         for k, v in settings.items()), cls="kv small") + "</details>")
    return _sec("fitted", "".join(parts))


def _gaps_brief(doc: Mapping[str, Any], net: Network, gaps: Mapping[str, Any] | None) -> str:
    latent = list(net.latent_names)
    lat = (f"<p>Latent nodes (never observed by design, not gaps): {esc(', '.join(latent))}.</p>" if latent else "")
    if gaps is not None:
        cols = gaps.get("columns") or []
        with_gaps = [c for c in cols if _f(c.get("n_missing")) > 0]
        cr = gaps.get("complete_rows") or {}
        txt = (f"<p>{fmt_count(cr.get('count'))} of {fmt_count(gaps.get('n_rows'))} records are complete "
               f"({fmt_share(cr.get('share'))}); {len(with_gaps)} of {len(cols)} observed columns have gaps. "
               f"Details in <a href=\"#gaps\">Gaps and complete cases</a>.</p>")
        return txt + lat
    cc = doc.get("complete_case")
    if isinstance(cc, Mapping):
        return (f"<p>{fmt_count(cc.get('n_discarded'))} of {fmt_count(cc.get('n_rows'))} records "
                f"({fmt_share(cc.get('share_discarded'))}) have a gap in some observed column (from the complete-case "
                f"comparison). Give the records (<code>--data</code>) for the overview per column.</p>") + lat
    return _absent("Not known from the result alone: give the records (adfit report RESULT --data DATA) "
                   "for the gaps overview.") + lat


def _prior_brief(doc: Mapping[str, Any]) -> str:
    pr = doc.get("prior")
    if pr is None:
        if doc.get("objective") == "map":
            return _absent("The fit is MAP but the result does not record its prior.")
        return "<p>None: maximum likelihood, no pseudo-counts.</p>"
    if not isinstance(pr, Mapping):
        return _render_any(pr)
    pairs: list[tuple[str, str]] = []
    if pr.get("source"):
        pairs.append(("source", esc(pr["source"])))
    if pr.get("objective"):
        pairs.append(("objective", esc(pr["objective"])))
    tot = pr.get("total_pseudo_counts")
    if isinstance(tot, Mapping):
        pairs.append(("pseudo-counts per node", esc(", ".join(f"{k} {_fmt_any(v)}" for k, v in tot.items()))))
    sds = pr.get("coefficient_prior_sd")
    if isinstance(sds, Mapping) and sds:
        pairs.append(("normal prior on logistic coefficients (sd, log-odds)",
                      esc("; ".join(f"{k}: " + ", ".join(f"{kk.replace('_sd', '')} {_fmt_any(vv)}" for kk, vv in v.items())
                                    for k, v in sds.items() if isinstance(v, Mapping)))))
    rest = [(str(k), _render_any(v, 2)) for k, v in pr.items()
            if k not in {"source", "objective", "total_pseudo_counts", "spec", "coefficient_prior_sd"}]
    folded = ([("specification", _render_any(pr["spec"], 2))] if pr.get("spec") is not None else []) + rest
    return _kv(pairs, raw=True) + ("<details class=\"prior-spec\"><summary>The prior as read from its file</summary>"
                                   + _kv(folded, raw=True) + "</details>" if folded else "")


def _section_convergence(doc: Mapping[str, Any]) -> str:
    parts: list[str] = []
    hist, note = convergence_histories(doc)
    settings = doc.get("settings") if isinstance(doc.get("settings"), Mapping) else {}
    thr = _f(settings.get("gtol")) * _f(doc.get("n_rows")) if settings.get("gtol") is not None else None
    if hist:
        cap = (note + " Left: the objective (log-likelihood + log-prior - penalty). Middle: how far each "
               "iterate is below the best objective reached, on a log scale (the iterate that reaches the best "
               "value has no point). Right: the gradient norm with respect to the free logits, in records, on a "
               "log scale" + (f"; the dotted level is the stopping threshold gtol x records = {fmt_sci(thr)}."
                              if thr and math.isfinite(thr) else "."))
        parts.append(_img(convergence_figure(hist, threshold=thr), "convergence per iteration", cap))
    else:
        parts.append(_absent(note + " Refit with adfit fit to record it."))
    starts, optima, best = _starts(doc)
    if starts:
        keys = ["start", "kind", "objective", "iterations", "converged", "gradient_norm"]
        extra = [k for s in starts for k in s if k not in keys and k not in ("history", "optimum")]
        extra = list(dict.fromkeys(extra))
        has_opt = any("optimum" in s for s in starts)
        rows = []
        for i, s in enumerate(starts):
            k = s.get("start", i)
            mark = " (best)" if best is not None and k == best else ""
            rows.append([esc(f"{_start_no(k)}{mark}"), esc(s.get("kind", "")), esc(fmt_loglik(s.get("objective"))),
                         esc(_fmt_any(s.get("iterations"))),
                         esc("yes" if s.get("converged") else "no") if "converged" in s else "",
                         esc(fmt_sci(s.get("gradient_norm")))]
                        + ([esc(_fmt_any(s["optimum"] + 1)) if isinstance(s.get("optimum"), int)
                            else (esc("none (did not converge)") if s.get("converged") is False else "")]
                           if has_opt else [])
                        + [_render_inline(s.get(x)) for x in extra])
        parts.append("<h3>Starts</h3>")
        parts.append(_table(["start", "kind", "final objective", "iterations", "stopping rule held",
                             "final gradient norm"] + (["optimum reached"] if has_opt else []) + extra, rows,
                            raw=True, cls="plain starts", num_from=2))
        objs = [_f(s.get("objective")) for s in starts]
        fin = [o for o in objs if math.isfinite(o)]
        if len(fin) > 1:
            spread = max(fin) - min(fin)
            parts.append(_note(f"Spread of the final objectives over the starts: {fmt_sci(spread)}"
                               + (" (the starts reached the same value)." if spread <= 1e-6 * max(1.0, abs(max(fin)))
                                  else " (the starts ended at different values: the likelihood has several "
                                       "local maxima, or some starts stopped early).")))
    else:
        parts.append(_absent("The result lists no starts (one start, or a result written before starts were "
                             "recorded); use fit --restarts N to try several."))
    if optima is not None:
        nodes = (doc.get("network") or {}).get("nodes") if isinstance(doc.get("network"), Mapping) else None
        latent = not isinstance(nodes, Mapping) or any(isinstance(n, Mapping) and n.get("latent") for n in nodes.values())
        parts.append("<h3>Optima found</h3>" + _optima(optima, doc.get("restarts"), latent))
    em = doc.get("em")
    if isinstance(em, Mapping):
        pairs = []
        if "rate" in em:
            pairs.append(("rate of convergence (largest fraction of missing information)",
                          fmt_prob(em["rate"]) if em["rate"] is not None else "n/a (stopped too early to tell)"))
        if "stationarity_max" in em:
            pairs.append(("largest stationarity residual (records)", fmt_sci(em["stationarity_max"])))
        un = em.get("uninformed_rows")
        if isinstance(un, Mapping):
            pairs.append(("rows not informed by the data",
                          "; ".join(f"{k} given " + ", ".join(_cfg_text(r.get("parents")) for r in v if isinstance(r, Mapping))
                                    for k, v in un.items() if v) or "none"))
        for k, v in em.items():
            if k not in {"rate", "rate_meaning", "stationarity_max", "uninformed_rows", "trace"}:
                pairs.append((str(k), _short(v)))
        parts.append("<h3>EM run</h3>" + _kv(pairs, cls="kv em"))
    return _sec("convergence", "".join(parts))


def _optima(optima: Any, section: Any, latent: bool = True) -> str:
    """The distinct optima reached by the starts (adfit.restarts), best first."""
    if not (isinstance(optima, list) and all(isinstance(o, Mapping) for o in optima)):
        return _render_any(optima)
    parts: list[str] = []
    sec = section if isinstance(section, Mapping) else {}
    n = sec.get("n_starts")
    at_best = sec.get("starts_at_best_objective")
    n_conv = sec.get("n_converged")
    if n is not None and at_best is not None:
        if n_conv is None:  # a result written before non-converged starts were set apart
            parts.append(f"<p>{len(optima)} distinct optim{'um' if len(optima) == 1 else 'a'} from {esc(_fmt_any(n))} "
                         f"starts; {esc(_fmt_any(at_best))} reached the best objective.</p>")
        else:
            tol_abs = sec.get("best_objective_tolerance")
            parts.append(f"<p>{esc(_fmt_any(n_conv))} of {esc(_fmt_any(n))} starts converged (their stopping rule "
                         f"held); they reached {len(optima)} distinct optim{'um' if len(optima) == 1 else 'a'}, and "
                         f"{esc(_fmt_any(at_best))} of them the best objective"
                         + (f" (within {esc(fmt_sci(tol_abs))})" if tol_abs is not None else "")
                         + ". A start that did not converge is not counted as an optimum.</p>")
    if not optima:
        parts.append(_note("No start converged: no optimum was confirmed. Raise --max-iter or run more starts."))
    rows = []
    for i, o in enumerate(optima):
        k = o.get("optimum", i)
        num = int(k) + 1 if isinstance(k, (int, float)) and not isinstance(k, bool) else k
        rows.append([_fmt_any(num), fmt_loglik(o.get("objective")), fmt_loglik(o.get("log_likelihood")),
                     ", ".join(str(_start_no(x)) for x in o.get("starts") or []),
                     "best" if i == 0 else fmt_sci(o.get("max_abs_delta_theta")),
                     "yes" if o.get("same_objective_as_best") else "no",
                     "yes" if o.get("stationary") else "no", fmt_sci(o.get("gradient_norm"))])
    parts.append(_table(["optimum", "objective", "log-likelihood", "starts", "max |change| of a CPT entry to the best",
                         "objective as high as the best", "stationary", "gradient norm"], rows, cls="plain optima"))
    if any(o.get("same_objective_as_best") for o in optima[1:]):
        parts.append(_note("Some optima have the best objective with different CPTs: parameters not identified by "
                           "the data (a flat ridge), or equally high optima."))
    tol = sec.get("tolerances")
    if isinstance(tol, Mapping):
        parts.append(_note(f"Two starts reach the same optimum when their objectives agree within "
                           f"{fmt_sci(tol.get('objective_rtol'))} x max(1, |objective|) and every CPT entry within "
                           f"{fmt_sci(tol.get('theta_atol'))}" + (" after the latent states are relabelled."
                                                                   if latent else ".")))
    unconv = [u for u in (sec.get("not_converged") or []) if isinstance(u, Mapping)]
    if unconv:
        parts.append(_note("Did not converge (not counted as optima): " + "; ".join(
            f"start {_fmt_any(_start_no(u.get('start')))} at objective {fmt_loglik(u.get('objective'))}, gradient norm "
            f"{fmt_sci(u.get('gradient_norm'))}" + (" (above the best converged objective)" if u.get("above_best") else "")
            for u in unconv) + "."))
    if sec.get("n_failed"):
        parts.append(_note(f"{_fmt_any(sec['n_failed'])} start(s) ended with a non-finite objective."))
    return "".join(parts)


def _per_cell(value: Any, n_rows: int, card: int) -> bool:
    return (isinstance(value, list) and len(value) == n_rows
            and all(isinstance(r, list) and len(r) == card for r in value))


_STATUS_WORD = {"boundary": "on the boundary", "not identified": "not identified", "no data": "no data",
                "not computed": "not computed", "constrained": "fixed by the network"}


def _cfg_text(parents: Any) -> str:
    if isinstance(parents, Mapping):
        return ", ".join(f"{p}={s}" for p, s in parents.items()) or "(no parents)"
    return str(parents)


def _uncertainty_summary(unc: Mapping[str, Any]) -> str:
    """The ``"uncertainty"`` section (adfit.uncertainty): how the error bars were made, and the flags."""
    parts: list[str] = []
    pairs: list[tuple[str, str]] = []
    lvl = _f(unc.get("level"))
    if math.isfinite(lvl):
        pairs.append(("intervals", f"{100 * lvl:g}%" + (f": {unc['interval_kind']}" if unc.get("interval_kind") else "")))
    if unc.get("method"):
        pairs.append(("observed information", str(unc["method"])))
    if unc.get("n_coordinates") is not None:
        pairs.append(("coordinates", f"{_fmt_any(unc.get('n_coordinates'))} (free parameters "
                                     f"{_fmt_any(unc.get('n_free_parameters'))})"))
    if unc.get("em_rate") is not None:
        pairs.append(("largest fraction of missing information", fmt_prob(unc.get("em_rate"))))
    if pairs:
        parts.append(_kv(pairs, cls="kv"))
    flags: list[str] = []
    words = {"flat": "flat direction (not identified)", "weak": "weakly identified direction",
             "negative": "negative curvature (not a maximum)"}
    for d in unc.get("directions") or []:
        if not isinstance(d, Mapping):
            continue
        rows = "; ".join(f"{r.get('node')} given {_cfg_text(r.get('parents'))} ({fmt_share(r.get('share'))})"
                         for r in (d.get("rows") or [])[:6] if isinstance(r, Mapping)) or "spread over many rows"
        flags.append(f"{words.get(d.get('kind'), str(d.get('kind')))}, observed/complete information "
                     f"{fmt_sci(d.get('relative_curvature'))}: {rows}")
    for key, text in (("not_identified", "not identified (interval [0, 1])"),
                      ("no_data_rows", "no record reaches this parent configuration (interval [0, 1])"),
                      ("prior_only_rows", "informed by the prior only")):
        rows = [r for r in unc.get(key) or [] if isinstance(r, Mapping)]
        if rows:
            flags.append(f"{text}: " + "; ".join(f"{r.get('node')} given {_cfg_text(r.get('parents'))}" for r in rows))
    for key, text in (("boundary_entries", "on the boundary (one-sided interval, no SE)"),
                      ("wide_entries", f"intervals wider than {_fmt_any(unc.get('wide_threshold'))}")):
        ents = [e for e in unc.get(key) or [] if isinstance(e, Mapping)]
        if ents:
            flags.append(f"{text}: " + "; ".join(_entry_label(e) for e in ents[:20])
                + (f" and {len(ents) - 20} more" if len(ents) > 20 else ""))
    for name, text in (unc.get("latent") or {}).items():
        flags.append(f"latent node {name}: {text}")
    for n in unc.get("notes") or []:
        flags.append(str(n))
    parts.append("<p><strong>Identifiability flags.</strong></p>")
    if flags:
        parts.append('<ul class="flags">' + "".join(f"<li>{esc(t)}</li>" for t in flags) + "</ul>")
    else:
        parts.append(_note("None: every free entry is identified, with no weak direction, boundary cell or "
                           "unreached parent configuration."))
    if unc.get("caution"):
        parts.append(f'<p class="caution">{esc(unc["caution"])}</p>')
    shown = {"level", "interval_kind", "method", "n_coordinates", "n_free_parameters", "em_rate", "directions",
             "not_identified", "no_data_rows", "prior_only_rows", "boundary_entries", "wide_entries", "latent", "notes",
             "caution", "wide_threshold"}
    rest = {k: v for k, v in unc.items() if k not in shown}
    if rest:
        parts.append("<details><summary>Further details of the error bars</summary>" + _render_any(rest) + "</details>")
    return "".join(parts)


def _section_cpts(doc: Mapping[str, Any], res: FitResult) -> str:
    net = res.network
    nodes = doc.get("nodes") or {}
    parts: list[str] = []
    any_iv = any(isinstance(nodes.get(n, {}).get("interval"), list) for n in net.names)
    any_se = any(isinstance(nodes.get(n, {}).get("se"), list) for n in net.names)
    unc = doc.get("uncertainty")
    if any_iv or any_se:
        what = []
        if any_iv:
            what.append("the interval [lower, upper]")
        if any_se:
            what.append("the standard error (se)")
        parts.append(_note("Each cell shows the estimate (bold), then " + " and ".join(what)
                           + "; a cell whose error bar is special says so (on the boundary, not identified, no data)."))
    else:
        parts.append(_absent("No error bars in the result: the tables show the estimates only "
                             "(adfit fit adds standard errors and intervals unless they are switched off)."))
    if isinstance(unc, Mapping):
        parts.append("<h3>Error bars and identifiability</h3>" + _uncertainty_summary(unc))
    elif unc is not None:
        parts.append("<h3>Error bars and identifiability</h3>" + _render_any(unc))
    ident = doc.get("identifiability")
    if ident is not None:
        parts.append("<h3>Identifiability</h3>" + _render_any(ident))
    excluded = {}
    emc = doc.get("em_check")
    if isinstance(emc, Mapping) and isinstance(emc.get("excluded_rows"), Mapping):
        excluded = {k: set(v) for k, v in emc["excluded_rows"].items() if isinstance(v, list)}
    parts.append('<div class="cptgrid">')
    for name in net.names:
        parts.append(_cpt_block(net, name, nodes.get(name, {}), excluded.get(name, set())))
    parts.append("</div>")
    return _sec("cpts", "".join(parts))


def _cpt_block(net: Network, name: str, sec: Mapping[str, Any], excluded: set[int]) -> str:
    node = net.node(name)
    table = sec.get("table") or []
    n_rows, card = net.n_parent_configs(name), node.card
    iv = sec.get("interval")
    lo_t = hi_t = None
    if isinstance(iv, (list, tuple)) and len(iv) == 2 and _per_cell(iv[0], n_rows, card) and _per_cell(iv[1], n_rows, card):
        lo_t, hi_t = iv[0], iv[1]
    se_t = sec.get("se") if _per_cell(sec.get("se"), n_rows, card) else None
    st_t = sec.get("se_status") if _per_cell(sec.get("se_status"), n_rows, card) else None
    mi = sec.get("missing_information") if isinstance(sec.get("missing_information"), Mapping) else None
    tags = []
    if node.latent:
        tags.append("latent")
    if node.fixed is not None:
        tags.append("fixed in the network, not estimated")
    if node.tied_to:
        tags.append(f"tied to {node.tied_to}: the same parameters, estimated from both")
    if node.impossible:
        tags.append(f"{len(node.impossible)} cell(s) impossible by design, fixed at 0")
    if isinstance(sec.get("cpd"), str) and sec.get("cpd") != "table":
        tags.append(f"cpd {sec.get('cpd')}")
    head = f"P({name} | {', '.join(node.parents)})" if node.parents else f"P({name})"
    out = [f'<div class="cpt" id="cpt-{esc(name)}"><h3>{esc(head)}'
           + "".join(f' <span class="tag">{esc(t)}</span>' for t in tags) + "</h3>"]
    # other per-node entries: per cell (marked), per row (a column), or listed
    cell_flags: dict[str, list[list[Any]]] = {}
    row_flags: dict[str, list[Any]] = {}
    notes: list[str] = []
    if mi is not None and (mi.get("largest") is not None or mi.get("mean") is not None):
        notes.append(f"<li>fraction of missing information: largest {esc(fmt_prob(mi.get('largest')))}"
                     + (f", mean {esc(fmt_prob(mi.get('mean')))}" if mi.get("mean") is not None else "") + "</li>")
    mi_rows = mi.get("rows") if mi is not None and isinstance(mi.get("rows"), list) and len(mi["rows"]) == n_rows else None
    for k, v in sec.items():
        if k in _KNOWN_NODE:
            continue
        if _per_cell(v, n_rows, card):
            cell_flags[k] = v
        elif isinstance(v, list) and len(v) == n_rows and n_rows > 1 and all(not isinstance(x, (list, dict)) for x in v):
            row_flags[k] = v
        else:
            notes.append(f'<li><span class="flagname">{esc(k)}</span>: {_render_inline(v)}</li>')
    if lo_t is None and isinstance(iv, (list, tuple)) and iv:
        notes.append("<li>interval: recorded in a layout this report does not read (see the JSON)</li>")
    if notes:
        out.append('<ul class="flags">' + "".join(notes) + "</ul>")
    parents = list(node.parents)
    labels = net.parent_config_labels(name)
    heads = [esc(p) for p in parents] if parents else [""]
    heads += [esc(s) for s in node.states] + [esc(k) for k in row_flags]
    if mi_rows is not None:
        heads.append("missing info")
    out.append(f'<table class="cpt-table" data-node="{esc(name)}"><thead><tr>'
               + "".join(f"<th>{h}</th>" for h in heads) + "</tr></thead><tbody>")
    shown = min(n_rows, MAX_TABLE_ROWS)
    marks = {k: "*" * (i + 1) for i, k in enumerate(cell_flags)}
    for i in range(shown):
        cls = ' class="uninformed"' if i in excluded else ""
        row = [f"<tr{cls}>"]
        if parents:
            row += [f'<th scope="row">{esc(s)}</th>' for s in labels[i]]
        else:
            row.append('<th scope="row">(no parents)</th>')
        for j in range(card):
            try:
                est = table[i][j]
            except (IndexError, TypeError):
                est = None
            status = st_t[i][j] if st_t is not None else None
            cell = [f'<span class="est">{fmt_prob(est)}</span>']
            if lo_t is not None:
                cell.append(f'<span class="ci">[<span class="lo">{fmt_prob(lo_t[i][j])}</span>, '
                            f'<span class="hi">{fmt_prob(hi_t[i][j])}</span>]</span>')  # type: ignore[index]
            if se_t is not None and se_t[i][j] is not None:
                cell.append(f'<span class="se">se <span class="sev">{fmt_prob(se_t[i][j])}</span></span>')
            if status in _STATUS_WORD:
                cell.append(f'<span class="status">{esc(_STATUS_WORD[status])}</span>')
            for k, v in cell_flags.items():
                f = v[i][j]
                if f is True:
                    cell.append(f'<span class="flag">{esc(marks[k])}</span>')
                elif f not in (None, False, "", 0):
                    cell.append(f'<span class="flag">{esc(marks[k])} {esc(_fmt_any(f))}</span>')
            tdcls = "num" + (" weak" if status in ("not identified", "no data") else "")
            row.append(f'<td class="{tdcls}" data-node="{esc(name)}" data-row="{i}" data-col="{j}">'
                       + "".join(cell) + "</td>")
        for k, v in row_flags.items():
            row.append(f'<td class="rowflag">{esc(_fmt_any(v[i]))}</td>')
        if mi_rows is not None:
            row.append(f'<td class="num mi">{esc(fmt_prob(mi_rows[i]))}</td>')
        row.append("</tr>")
        out.append("".join(row))
    out.append("</tbody></table>")
    out.append(_parameters_table(name, sec))
    foot = []
    if n_rows > shown:
        foot.append(f"The first {shown} of {n_rows} rows are shown; all are in the JSON.")
    for k, m in marks.items():
        foot.append(f"{m} marks the cells flagged '{k}' in the result.")
    if excluded:
        foot.append("Grey rows: parent configurations not informed by the data (expected count 0); their values "
                    "are the starting values or the prior mode, not estimates.")
    if node.fixed is not None:
        foot.append("This CPT is given in the network and was not estimated.")
    out.append("".join(_note(t) for t in foot))
    out.append("</div>")
    return "".join(out)


def _verdict_text(verdict: str) -> str:
    """One sentence per EM verdict (adfit.crosscheck.VERDICT_MEANING; older results' verdicts too)."""
    from .crosscheck import LEGACY_VERDICTS, VERDICT_MEANING

    text = VERDICT_MEANING.get(verdict) or LEGACY_VERDICTS.get(verdict, "")
    return (text[:1].upper() + text[1:] + ".") if text else ""


def _section_em_check(doc: Mapping[str, Any]) -> str:
    c = doc.get("em_check")
    if not isinstance(c, Mapping):
        return _sec("em-check", _absent("No EM cross-check was run: use adfit fit --em-check."))
    verdict = str(c.get("verdict", "?"))
    parts = [f'<p class="verdict">Verdict: <strong>{esc(verdict)}</strong>. {esc(_verdict_text(verdict))}</p>']
    if c.get("detail"):
        parts.append(_note(str(c["detail"])))
    rows = []
    f = c.get("fit") or {}
    rows.append([f"fit ({f.get('method', '')})", fmt_loglik(f.get("objective_value")), fmt_sci(f.get("gradient_norm")),
                 "", "", "", "yes" if f.get("converged") else "no"])
    for key, label in (("em_from_fit", "EM from the fit's answer"), ("em_own_start", "EM from its own start")):
        s = c.get(key) or {}
        rows.append([label, fmt_loglik(s.get("objective_value")), fmt_sci(s.get("gradient_norm")),
                     fmt_sci(s.get("em_gradient_norm")), fmt_sci(s.get("max_abs_delta_theta")),
                     _fmt_any(s.get("iterations")), "yes" if s.get("converged") else "no"])
    parts.append(_table(["run", "objective", "gradient norm", "EM's own residual", "max |change| of a CPT entry",
                         "iterations", "stopping rule held"], rows, cls="plain emcheck"))
    pairs = []
    if c.get("objective_difference") is not None:
        pairs.append(("objective difference (EM own start - fit)", fmt_sci(c.get("objective_difference"))))
    tol = c.get("tolerances")
    if isinstance(tol, Mapping):
        pairs.append(("tolerance on the objective", fmt_sci(tol.get("objective_abs"))))
        pairs.append(("tolerance on CPT entries", fmt_sci(tol.get("theta_atol"))))
    own = c.get("em_own_start") or {}
    if own.get("seed") is not None:
        pairs.append(("seed of EM's own start", _fmt_any(own.get("seed"))))
    if own.get("rate") is not None:
        pairs.append(("EM rate of convergence (largest fraction of missing information)", fmt_prob(own.get("rate"))))
    perm = c.get("latent_permutation")
    if isinstance(perm, Mapping):
        moved = {k: v for k, v in perm.items() if isinstance(v, Mapping) and any(a != b for a, b in v.items())}
        pairs.append(("latent states relabelled (EM to fit)",
                      "; ".join(f"{k}: " + ", ".join(f"{a} to {b}" for a, b in v.items()) for k, v in moved.items())
                      or "none needed"))
    ex = c.get("excluded_rows")
    if isinstance(ex, Mapping) and ex:
        pairs.append(("rows not informed by the data (left out of the comparison)",
                      "; ".join(f"{k}: rows {', '.join(str(int(i) + 1) for i in v)}" for k, v in ex.items())))
    if pairs:
        parts.append(_kv(pairs, cls="kv"))
    where = (c.get("em_own_start") or {}).get("largest_delta_at")
    if isinstance(where, Mapping):
        cfg = ", ".join(f"{p}={s}" for p, s in (where.get("parents") or {}).items())
        parts.append(_note(f"Largest change between the fit and EM's own optimum: P({where.get('node')}="
                           f"{where.get('state')}" + (f" | {cfg})" if cfg else ")") + "."))
    return _sec("em-check", "".join(parts))


def _section_gaps(doc: Mapping[str, Any], gaps: Mapping[str, Any] | None, data_note: str | None) -> str:
    parts = ["<h3>Gaps overview</h3>"]
    if gaps is None and isinstance(doc.get("gaps"), Mapping):
        gaps = doc["gaps"]
    if gaps is None:
        parts.append(_absent("No gaps overview: it needs the records. Run adfit report RESULT --data DATA "
                             "(with the --missing / --count-column options used for the fit)."))
    else:
        if data_note:
            parts.append(_note(data_note))
        parts.append(_gaps_overview(gaps))
    parts.append("<h3>Complete-case comparison</h3>")
    cc = doc.get("complete_case")
    if not isinstance(cc, Mapping):
        parts.append(_absent("No complete-case comparison was run: use adfit fit --compare-complete-case."))
    else:
        parts.append(_complete_case(doc, cc))
    return _sec("gaps", "".join(parts))


def _gaps_overview(g: Mapping[str, Any]) -> str:
    parts: list[str] = []
    cols = [c for c in (g.get("columns") or []) if isinstance(c, Mapping)]
    cr = g.get("complete_rows") or {}
    parts.append(f"<p>{esc(g.get('source', ''))}: {fmt_count(g.get('n_rows'))} records "
                 f"({fmt_count(g.get('n_distinct'))} distinct rows); complete records {fmt_count(cr.get('count'))} "
                 f"({fmt_share(cr.get('share'))}).</p>")
    if g.get("latent"):
        parts.append(_note("Latent nodes, never observed by design and not counted as gaps: "
                           + ", ".join(map(str, g["latent"])) + "."))
    if cols:
        table = _table(["column", "missing", "share"],
                       [[str(c.get("name")), fmt_count(c.get("n_missing")), fmt_share(c.get("share_missing"))]
                        for c in cols], cls="plain gapcols")
        if any(_f(c.get("n_missing")) > 0 for c in cols):
            parts.append('<div class="cols"><div>' + table + "</div><div>")
            parts.append(_img(gaps_figure(cols), "missing share per column",
                              "Share of records with the cell missing, per observed column."))
            parts.append("</div></div>")
        else:
            parts.append(table)
    pats = g.get("patterns") or {}
    top = pats.get("top") or []
    if top:
        rows = [["complete" if not p.get("missing") else "missing " + ", ".join(p["missing"]),
                 fmt_count(p.get("count")), fmt_share(p.get("share"))] for p in top]
        total = pats.get("total")
        cap = f"Missingness patterns: {total} in all" + (f", the {len(top)} most frequent" if total and total > len(top) else "")
        parts.append(_table(["pattern", "records", "share"], rows, cls="plain patterns", caption=cap))
    mono = g.get("monotone") or {}
    if isinstance(mono, Mapping) and "monotone" in mono:
        parts.append(_note("Monotone pattern: " + ("yes" + (f" (columns in order of gaps: {', '.join(mono['order'])})"
                                                           if mono.get("order") else "")
                                                   if mono["monotone"] else "no (the sets of missing columns are not nested)")
                           + "."))
    mt = g.get("mcar_test") or {}
    tests = mt.get("tests") or []
    if tests:
        lvl = mt.get("level")
        rows = []
        for t in tests:
            against = (t.get("against") or [""])[0] if t.get("kind") == "pairwise" else "all others (joint)"
            star = " *" if _f(t.get("p_holm")) <= _f(lvl) else ""
            rows.append([str(t.get("column")), str(against), fmt_loglik(t.get("g2")), _fmt_any(t.get("df")),
                         fmt_p(t.get("p_value")), fmt_p(t.get("p_holm")) + star])
        parts.append(_table(["gaps in", "against", "G²", "df", "p", "Holm p"], rows, cls="plain mcar", num_from=2,
                            caption=f"MCAR tests: {mt.get('method', 'G² tests')}; level {_fmt_any(lvl)} "
                                    f"(* = rejected after Holm's adjustment)"))
    elif cols and not any(_f(c.get("n_missing")) > 0 for c in cols):
        parts.append(_note("No observed column has gaps: nothing to test."))
    readings = mt.get("readings") or []
    if readings:
        parts.append("<ul>" + "".join(f"<li>{esc(r.get('text', ''))}</li>" for r in readings) + "</ul>")
    for n in g.get("notes") or []:
        parts.append(_note(f"Note: {n}"))
    if mt.get("caution"):
        parts.append(f'<p class="caution">{esc(mt["caution"])}</p>')
    return "".join(parts)


def _complete_case(doc: Mapping[str, Any], cc: Mapping[str, Any]) -> str:
    parts: list[str] = []
    ll = cc.get("log_likelihood_all_rows") or {}
    pairs = [("records used by the complete-case fit", f"{fmt_count(cc.get('n_complete'))} of {fmt_count(cc.get('n_rows'))}"),
             ("records discarded", f"{fmt_count(cc.get('n_discarded'))} ({fmt_share(cc.get('share_discarded'))})"),
             ("log-likelihood of all records, full estimates", fmt_loglik(ll.get("full"))),
             ("log-likelihood of all records, complete-case estimates",
              fmt_loglik(ll.get("complete_case")) if ll.get("complete_case") is not None else "-inf")]
    if _f(ll.get("records_impossible_under_complete_case")) > 0:
        pairs.append(("records impossible under the complete-case estimates",
                      fmt_count(ll.get("records_impossible_under_complete_case"))))
    pairs.append(("largest |difference| of an entry", fmt_prob(cc.get("max_abs_difference"))))
    if cc.get("max_abs_z") is not None:
        pairs.append(("largest |difference| / SE", f"{_f(cc.get('max_abs_z')):.2f}"))
    pairs.append(("standard errors from", str(cc.get("se_source") or "none recorded")))
    parts.append(_kv(pairs, cls="kv"))
    entries = [e for e in (cc.get("entries") or []) if isinstance(e, Mapping)]
    if _f(cc.get("n_discarded")) == 0:
        parts.append(_note("No record has a gap: both fits are the same, so there is nothing to compare "
                           "(the entries are in the JSON)."))
    elif entries:
        order = sorted(range(len(entries)), key=lambda i: (not entries[i].get("supported", True),
                                                            entries[i].get("z") is None,
                                                            -abs(_f(entries[i].get("z")) if entries[i].get("z") is not None else 0.0),
                                                            -abs(_f(entries[i].get("difference")))))
        if len(entries) > MAX_PLOT_ENTRIES:
            keep = sorted(order[:MAX_PLOT_ENTRIES])
            cap_more = f" The {MAX_PLOT_ENTRIES} of {len(entries)} entries that moved most are drawn; all are in the table."
        else:
            keep, cap_more = list(range(len(entries))), ""
        parts.append(_img(complete_case_figure(doc, [entries[i] for i in keep]), "complete-case comparison",
                          "Each CPT entry estimated from all records (full likelihood, filled circle, with its error "
                          "bar) and from the complete records only (open square). A cross marks a complete-case "
                          "value whose parent configuration occurs in no complete row (only a starting value)."
                          + cap_more))
        rows = []
        for i in order:
            e = entries[i]
            rows.append([_entry_label(e), fmt_prob(e.get("full")), fmt_prob(e.get("complete_case")),
                         fmt_prob(e.get("difference")), fmt_prob(e.get("se")) if e.get("se") is not None else "",
                         f"{_f(e.get('z')):+.2f}" if e.get("z") is not None else "",
                         "yes" if e.get("supported", True) else "no"])
        parts.append('<div class="scroll">' + _table(
            ["entry", "full", "complete case", "difference", "SE (full)", "difference / SE", "in complete rows"],
            rows, cls="plain ccentries", caption="Entries, largest change first") + "</div>")
    if cc.get("caution"):
        parts.append(f'<p class="caution">{esc(cc["caution"])}</p>')
    return "".join(parts)


#: at most this many targets are drawn in the sensitivity figure (all are in its table)
MAX_SENSITIVITY_PANELS = 6


@_plain_labels
def sensitivity_figure(doc: Mapping[str, Any]):
    """Each target against log odds: the estimate, the band of its intervals, MAR (odds 1)
    marked, and the threshold and tipping point when the analysis has them."""
    targets = list(doc.get("targets") or [])[:MAX_SENSITIVITY_PANELS]
    rows = sorted(doc["rows"], key=lambda r: _f(r.get("odds")))
    x = np.log([_f(r.get("odds")) for r in rows])
    n = max(1, len(targets))
    cols = min(n, 3)
    nr = math.ceil(n / cols)
    fig = _figure(3.3 * cols + 0.4, 2.7 * nr + 0.3)
    tip = doc.get("tipping_point") if isinstance(doc.get("tipping_point"), Mapping) else None
    for i, t in enumerate(targets):
        ax = fig.add_subplot(nr, cols, i + 1)
        e = [r["targets"][t] for r in rows]
        y = np.array([_f(v.get("value")) for v in e])
        iv = [v.get("interval") for v in e]
        if all(isinstance(b, (list, tuple)) and len(b) == 2 for b in iv):
            ax.fill_between(x, [_f(b[0]) for b in iv], [_f(b[1]) for b in iv], color=SHADE, lw=0,
                            label=f"{100 * _f(doc.get('level', 0.95)):.0f}% interval")
        ax.plot(x, y, "-o", color=INK, ms=3.5, lw=1.2, label="estimate")
        ax.axvline(0.0, color="#7a4b00", ls="--", lw=0.9)
        ax.text(0.0, 0.98, " MAR", transform=ax.get_xaxis_transform(), va="top", fontsize=8, color="#7a4b00")
        if tip and tip.get("target") == t:
            ax.axhline(_f(tip.get("threshold")), color="#2f5f8a", ls=":", lw=0.9, label="threshold")
            if tip.get("crossed"):
                ax.plot([_f(tip.get("log_odds"))], [_f(tip.get("threshold"))], "D", color="#2f5f8a", ms=5,
                        label=f"tipping point, odds {_f(tip.get('odds')):.3g}")
        ax.set_title(t, fontsize=9)
        ax.set_xticks(x, [f"{math.exp(v):.3g}" for v in x], fontsize=8)
        ax.tick_params(axis="y", labelsize=8)
        ax.set_xlabel("odds (log scale)", fontsize=8.5)
        ax.grid(True, color="#e6e6e6", lw=0.6)
        if i == 0:
            ax.legend(fontsize=7, loc="best", frameon=False)
    fig.tight_layout()
    return fig


def _section_sensitivity(sens: Mapping[str, Any] | None) -> str:
    if sens is None:
        return _sec("sensitivity", _absent(
            "No sensitivity analysis: run adfit sensitivity NETWORK DATA --node X --state S --out sens.json, then "
            "adfit report RESULT --sensitivity sens.json, to see how far the estimates move if the gaps of X "
            "depend on its own value (missing not at random)."))
    shifts = sens.get("shifts") or [{"node": sens.get("node"), "state": sens.get("state")}]
    pred = sens.get("predictors") or []
    parts = [_note(
        "Each row refits the network assuming that the odds that a cell of "
        + " and ".join(f"{s.get('node')} is missing are multiplied by the row's odds when its true value is "
                       f"{s.get('state')}" for s in shifts)
        + (f", given {', '.join(map(str, pred))}" if pred else "")
        + " (a selection model; odds 1 is MAR, the fit above). The odds are assumptions, not estimates.")]
    targets = list(sens.get("targets") or [])
    caption = "Targets against the assumed odds (log scale); the band is the interval at each odds."
    if len(targets) > MAX_SENSITIVITY_PANELS:
        caption += f" The first {MAX_SENSITIVITY_PANELS} of {len(targets)} targets are drawn; the table has all."
    parts.append(_img(sensitivity_figure(sens), "sensitivity of the targets to the assumed odds", caption))
    rows = sorted(sens["rows"], key=lambda r: _f(r.get("odds")))

    def cell(e: Mapping[str, Any]) -> str:
        iv = e.get("interval")
        txt = fmt_prob(e.get("value"))
        if isinstance(iv, (list, tuple)) and len(iv) == 2:
            txt += f" [{fmt_prob(iv[0])}, {fmt_prob(iv[1])}]"
        return txt

    parts.append(_table(
        ["odds", "log-likelihood (selection model)", "log-likelihood (cells)", "converged"] + targets,
        [[f"{_f(r.get('odds')):g}" + (" (MAR)" if _f(r.get("odds")) == 1 else ""), fmt_loglik(r.get("log_likelihood")),
          fmt_loglik(r.get("log_likelihood_cells")), "yes" if r.get("converged") else "NO"]
         + [cell(r["targets"][t]) for t in targets] for r in rows], cls="plain sensitivity"))
    lls = [_f(r.get("log_likelihood")) for r in rows]
    parts.append(_note(f"The selection-model log-likelihood spans {fmt_sci(max(lls) - min(lls))} across the grid: "
                       "what little it varies comes from the network's own assumptions, not from evidence about "
                       "why cells are missing; do not read it as an estimate of the odds."))
    tip = sens.get("tipping_point")
    if isinstance(tip, Mapping):
        parts.append(f"<p>Tipping point: {esc(tip.get('note', ''))}.</p>")
    for n in sens.get("notes") or []:
        parts.append(_note(str(n)))
    cautions = sens.get("cautions") or []
    if cautions:
        parts.append("<ul>" + "".join(f"<li>{esc(c)}</li>" for c in cautions) + "</ul>")
    return _sec("sensitivity", "".join(parts))


def check_sensitivity_matches(sens: Mapping[str, Any], network: Network, source: str) -> None:
    """The sensitivity file must name nodes of the result's network (one-line ResultError)."""
    names = [s.get("node") for s in sens.get("shifts") or [{"node": sens.get("node")}]]
    names += [t.split("=", 1)[0] for t in sens.get("targets") or []]
    for n in names:
        if n not in network:
            raise ResultError(f"{source}: node {n!r} is not in the result's network; give the sensitivity file "
                              f"made with this network")


def _section_assessment(doc: Mapping[str, Any]) -> str:
    parts = ["<h3>Information criteria</h3>"]
    ic = doc.get("information_criteria")
    if isinstance(ic, Mapping):
        pairs = [("AIC", fmt_loglik(ic.get("aic"))), ("BIC", fmt_loglik(ic.get("bic"))),
                 ("log-likelihood", fmt_loglik(ic.get("log_likelihood"))),
                 ("free parameters k", _fmt_any(ic.get("n_parameters"))),
                 ("records n", fmt_count(ic.get("n_effective")))]
        if ic.get("n_parameters_removed_by_binding_constraints"):
            pairs.insert(4, ("removed by binding monotone constraints",
                             _fmt_any(ic["n_parameters_removed_by_binding_constraints"])))
        parts.append(_kv(pairs, cls="kv ic"))
        if ic.get("definitions"):
            parts.append(_note(str(ic["definitions"]) + "."))
        if ic.get("objective") == "map":
            parts.append(_note("The fit is MAP: log L is taken at the posterior mode, not at the maximum."))
    else:
        parts.append(_absent("No information criteria in the result (adfit fit records them)."))
    parts.append(_latent_states(doc))
    parts.append("<h3>Cross-validation</h3>")
    cv = doc.get("cross_validation")
    if isinstance(cv, Mapping):
        pairs = [("held-out log-likelihood", fmt_loglik(cv.get("heldout_log_likelihood"))
                  if cv.get("heldout_log_likelihood") is not None else "-inf"),
                 ("per record", fmt_loglik(cv.get("per_record")) if cv.get("per_record") is not None else "-inf"),
                 ("folds", f"{_fmt_any(cv.get('folds'))} over {cv.get('split', '')}, seed {_fmt_any(cv.get('seed'))}"),
                 ("records", fmt_count(cv.get("n_rows")))]
        if _f(cv.get("records_impossible")) > 0:
            pairs.append(("held-out records with probability 0", fmt_count(cv.get("records_impossible"))))
        parts.append(_kv(pairs, cls="kv cv"))
        folds = cv.get("fold_results") or []
        if folds:
            parts.append(_table(["fold", "training records", "held-out records", "held-out log-likelihood",
                                 "stopping rule held"],
                                [[_fmt_any(f.get("fold")), fmt_count(f.get("n_train")), fmt_count(f.get("n_test")),
                                  fmt_loglik(f.get("heldout_log_likelihood")) if f.get("heldout_log_likelihood") is not None else "-inf",
                                  "yes" if f.get("converged") else "no"] for f in folds], cls="plain folds"))
    else:
        parts.append(_absent("No cross-validation was run: use adfit fit --folds K."))
    return _sec("assessment", "".join(parts))


def _latent_states(doc: Mapping[str, Any]) -> str:
    """The table of candidate numbers of states of a latent node (``fit --latent-states``)."""
    sec = doc.get("latent_states")
    latent = [n for n, d in ((doc.get("network") or {}).get("nodes") or {}).items()
              if isinstance(d, Mapping) and d.get("latent")]
    if not isinstance(sec, Mapping):
        if not latent:
            return ""
        return ("<h3>Number of latent states</h3>"
                + _note("One number of states was fitted for each latent node; adfit fit --latent-states "
                        "NODE=2..6 fits several and compares them by BIC."))
    rows = []
    for c in sec.get("candidates") or []:
        if not isinstance(c, Mapping):
            continue
        rows.append([_fmt_any(c.get("states")) + (" (chosen)" if c.get("chosen") else ""),
                     fmt_loglik(c.get("log_likelihood")), _fmt_any(c.get("n_parameters")),
                     fmt_loglik(c.get("aic")), fmt_loglik(c.get("bic")), fmt_prob(c.get("relative_entropy")),
                     "yes" if c.get("converged") else "no"])
    out = [f"<h3>Number of states of {esc(sec.get('node', ''))}</h3>",
           _table(["states", "log-likelihood", "free parameters", "AIC", "BIC", "relative entropy",
                   "stopping rule held"], rows, cls="plain latent-states"),
           _note(f"The candidate with the lowest BIC ({_fmt_any(sec.get('chosen'))} states) was kept; the "
                 "CPTs in this report are its estimates. Relative entropy (Ramaswamy et al. 1993) describes how "
                 "sharply the records are assigned to states (1: with certainty, 0: not at all); it does not "
                 "choose. A candidate with more parameters than the data identify may fit no better; read its "
                 "error bars before trusting it. " + str(sec.get("definitions", "")) + ".")]
    return "".join(out)


def _section_other(doc: Mapping[str, Any]) -> str:
    extra = [k for k in doc if k not in _KNOWN_TOP]
    if not extra:
        return ""  # no heading without content
    parts = [_note("Sections of the result that this report does not interpret, shown as recorded.")]
    for k in extra:
        parts.append(f"<h3>{esc(k)}</h3>" + _render_any(doc[k]))
    return _sec("other", "".join(parts))


def _section_cautions(doc: Mapping[str, Any], gaps: Mapping[str, Any] | None, net: Network | None = None) -> str:
    items = [c for c in REPORT_CAUTIONS if c != LATENT_CAUTION or net is None or net.latent_names]
    if doc.get("objective") == "map":
        pr = doc.get("prior") if isinstance(doc.get("prior"), Mapping) else {}
        only_normal = bool(pr.get("coefficient_prior_sd")) and not any(
            (v or 0) > 0 for v in (pr.get("total_pseudo_counts") or {}).values())
        items.insert(3, ("This is a MAP fit." if only_normal else
                         "This is a MAP fit: the prior's pseudo-counts pull the estimates towards the prior, most "
                         "where a parent configuration has few records.")
                     + (" A normal prior pulls logistic coefficients towards 0 (no effect), most where a parent "
                        "state has few records; the error bars include its curvature."
                        if isinstance(doc.get("prior"), Mapping) and doc["prior"].get("coefficient_prior_sd") else ""))
    if not doc.get("converged"):
        items.insert(0, "The fit did NOT meet its stopping rule: the CPTs may not be at a maximum.")
    return _sec("cautions", "<ul>" + "".join(f"<li>{esc(t)}</li>" for t in items) + "</ul>")


def error_bar_flags(unc: Mapping[str, Any]) -> str:
    """The error bars' flags counted in a few words (the report's top line): every kind that
    needs care, or that none does."""
    def n_of(key: str) -> int:
        v = unc.get(key)
        return len(v) if isinstance(v, list) else 0

    kinds = [d.get("kind") for d in unc.get("directions") or [] if isinstance(d, Mapping)]
    wide = [e for e in unc.get("wide_entries") or []
            if isinstance(e, Mapping) and e.get("status") in ("interior", "boundary")]
    counts = [(kinds.count("negative"), "direction(s) of negative curvature"),
              (kinds.count("flat"), "flat direction(s)"),
              (kinds.count("weak"), "weakly identified direction(s)"),
              (n_of("not_identified"), "CPT row(s) not identified"),
              (n_of("no_data_rows"), "CPT row(s) without records"),
              (n_of("prior_only_rows"), "CPT row(s) informed by the prior only"),
              (n_of("boundary_entries"), "cell(s) on the boundary"),
              (len(wide), f"interval(s) wider than {_fmt_any(unc.get('wide_threshold', 0.5))}")]
    shown = [f"{n} {what}" for n, what in counts if n]
    return ", ".join(shown) if shown else "every free entry identified, no weak direction or wide interval"


def _glance(doc: Mapping[str, Any], gaps: Mapping[str, Any] | None) -> str:
    items = []
    items.append("stopping rule " + ("held" if doc.get("converged") else "did NOT hold"))
    emc = doc.get("em_check")
    items.append(f"EM cross-check: {emc.get('verdict')}" if isinstance(emc, Mapping) else "EM cross-check: not run")
    if gaps is not None:
        rej = (gaps.get("mcar_test") or {}).get("mcar_rejected")
        items.append("MCAR: " + {True: "rejected for some column", False: "not rejected", None: "nothing to test"}[rej]
                     if rej in (True, False, None) else "MCAR: ?")
    unc = doc.get("uncertainty")
    if isinstance(unc, Mapping):
        items.append("error bars: " + error_bar_flags(unc))
    else:
        items.append("error bars: none in the result")
    cc = doc.get("complete_case")
    if isinstance(cc, Mapping):
        items.append(f"largest complete-case change {fmt_prob(cc.get('max_abs_difference'))}")
    return '<p class="glance">' + " | ".join(esc(i) for i in items) + "</p>"


_CSS = """
:root { color-scheme: light; }
body { font-family: system-ui, -apple-system, "Segoe UI", Roboto, "DejaVu Sans", Arial, sans-serif;
       font-size: 15px; line-height: 1.45; color: #1d1d1d; background: #fff; margin: 0; }
main { max-width: 1120px; margin: 0 auto; padding: 20px 28px 40px; }
h1 { font-size: 1.55em; margin: 0.2em 0 0.2em; }
h2 { font-size: 1.25em; margin: 1.6em 0 0.6em; padding-bottom: 0.2em; border-bottom: 2px solid #1d1d1d; }
h3 { font-size: 1.03em; margin: 1.2em 0 0.4em; }
p { margin: 0.45em 0; }
code { font-family: ui-monospace, "DejaVu Sans Mono", Menlo, Consolas, monospace; font-size: 0.92em; }
.meta { color: #555; font-size: 0.9em; }
.glance { border: 1px solid #999; padding: 6px 10px; background: #f6f6f6; }
nav ol { columns: 2; margin: 0.4em 0; padding-left: 1.4em; }
nav a, a { color: #1d1d1d; }
table { border-collapse: collapse; margin: 0.5em 0 0.8em; font-size: 0.9em; }
th, td { border: 1px solid #bdbdbd; padding: 3px 7px; vertical-align: top; text-align: left; }
thead th { background: #ededed; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
table.kv th { background: #f4f4f4; font-weight: 600; max-width: 22em; }
table.small { font-size: 0.82em; }
.tcap { font-weight: 600; margin: 0.8em 0 0.2em; }
.cptgrid { display: flex; flex-wrap: wrap; gap: 0 40px; align-items: flex-start; }
.cpt { break-inside: avoid; page-break-inside: avoid; max-width: 100%; overflow-x: auto; }
.cpt-table td span { display: block; }
.cpt-table .est { font-weight: 600; }
.cpt-table .ci, .cpt-table .se, .cpt-table .flag, .cpt-table .status { font-size: 0.84em; color: #444;
  font-weight: normal; }
.cpt-table .status { font-style: italic; }
.cpt-table td.weak .est { color: #777; }
details { margin: 0.4em 0; }
details summary { cursor: pointer; color: #444; }
.cpt-table .ci span, .cpt-table .se span { display: inline; }
tr.uninformed td, tr.uninformed th { background: #eeeeee; color: #666; }
.tag { font-size: 0.78em; font-weight: normal; border: 1px solid #777; border-radius: 3px; padding: 0 5px;
       margin-left: 4px; white-space: nowrap; }
ul.flags { margin: 0.2em 0; font-size: 0.9em; }
.flagname { font-weight: 600; }
.absent { border-left: 4px solid #888; background: #f3f3f3; padding: 5px 10px; }
.note { color: #444; font-size: 0.92em; }
.caution { border: 1px solid #1d1d1d; padding: 6px 10px; font-size: 0.93em; }
.verdict { font-size: 1.05em; }
figure { margin: 0.6em 0 1em; break-inside: avoid; page-break-inside: avoid; }
figure img { max-width: 100%; height: auto; display: block; }
figcaption { font-size: 0.88em; color: #444; margin-top: 4px; max-width: 60em; }
.cols { display: flex; flex-wrap: wrap; gap: 0 36px; align-items: flex-start; }
.cols > div { flex: 1 1 420px; min-width: 0; }
.scroll { max-height: 32em; overflow: auto; }
section#cautions li { margin: 0.3em 0; }
@media print {
  body { font-size: 10pt; }
  main { max-width: none; padding: 0; }
  .scroll { max-height: none; overflow: visible; }
  h2 { break-after: avoid; page-break-after: avoid; }
  h3 { break-after: avoid; page-break-after: avoid; }
  table, figure { break-inside: avoid; page-break-inside: avoid; }
  nav { display: none; }
  a { text-decoration: none; }
}
"""


def _version() -> str:
    try:
        from importlib.metadata import version

        return version("adfit")
    except Exception:  # noqa: BLE001 - not installed as a distribution
        return "dev"


# ============================================================================== public API
def load_result_doc(path: str | Path) -> dict[str, Any]:
    """Read a result JSON for the report (checked by :func:`adfit.result.result_from_dict`)."""
    p = Path(path)
    try:
        doc = json.loads(p.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise ResultError(f"{p}: result file not found") from None
    except IsADirectoryError:
        raise ResultError(f"{p}: is a folder; give the result JSON file written by adfit fit") from None
    except (json.JSONDecodeError, UnicodeDecodeError) as e:
        raise ResultError(f"{p}: not a valid JSON result file ({e}); give the file written by adfit fit") from None
    except RecursionError:
        from .io import depth_message

        raise ResultError(depth_message(p, None, "result")) from None
    if not isinstance(doc, dict):
        raise ResultError(f"{p}: not an adfit result file (expected a JSON object with \"format\": \"{FORMAT}\")")
    return doc


def render_report(result: Mapping[str, Any] | FitResult | str | Path, *, gaps: Any = None,
                  title: str | None = None, source: str | None = None, data_note: str | None = None,
                  sensitivity: Mapping[str, Any] | None = None) -> str:
    """The report as one HTML string.

    Args:
        result: the result JSON as a dict, a :class:`FitResult`, or the path of a result file.
        gaps: the missing-data overview of the records (an :class:`adfit.gaps.GapsReport` or its
            ``to_dict()``), or None.
        title: the page title (default: from ``source``).
        source: where the result came from (shown in the header).
        data_note: a line shown above the gaps overview (e.g. that the records differ from the fit's).
        sensitivity: an ``adfit-sensitivity/1`` document (:mod:`adfit.sensitivity`), or None.

    Raises:
        ResultError: not an ``adfit-result/1`` document, or its tables do not match its network.
    """
    if isinstance(result, (str, Path)):
        source = source or str(result)
        doc: Mapping[str, Any] = load_result_doc(result)
    elif isinstance(result, FitResult):
        doc = json.loads(json.dumps(result.to_dict()))
    else:
        doc = result
    src = source or "<result>"
    res = result_from_dict(doc, source=src)
    doc = upgrade_keys(doc)  # keys of older result files under their current names
    if gaps is not None and hasattr(gaps, "to_dict"):
        gaps = gaps.to_dict()
    if sensitivity is not None:
        from .sensitivity import validate_sensitivity_doc

        validate_sensitivity_doc(sensitivity, "sensitivity")
        check_sensitivity_matches(sensitivity, res.network, "sensitivity")
    other = _section_other(doc)
    body = [
        _section_fitted(doc, res, gaps),
        _section_convergence(doc),
        _section_cpts(doc, res),
        _section_em_check(doc),
        _section_gaps(doc, gaps, data_note),
        _section_sensitivity(sensitivity),
        _section_assessment(doc),
        other,
        _section_cautions(doc, gaps, res.network),
    ]
    title = title or res.network.title or f"adfit report: {Path(src).name if source else 'fit'}"
    stamp = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    nav = "<nav><ol>" + "".join(f'<li><a href="#{sid}">{esc(t)}</a></li>' for sid, t in SECTIONS
                                if sid != "other" or other) + "</ol></nav>"
    head = (f"<h1>{esc(title)}</h1><p class=\"meta\">Result {esc(src)}; {esc(doc.get('method', ''))} "
            f"{esc(str(doc.get('objective', '')).upper())}; written by adfit {esc(_version())} on {esc(stamp)}.</p>")
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
            f"<title>{esc(title)}</title><style>{_CSS}</style></head><body><main>"
            + head + _glance(doc, gaps) + nav + "".join(body) + "</main></body></html>\n")


def write_report(out: str | Path, result: Mapping[str, Any] | FitResult | str | Path, *, data: Any = None,
                 missing: Iterable[str] | None = None, count_column: str | None = None,
                 ignore_columns: Iterable[str] = (), engine: str = "pandas", scheduler: str | None = None,
                 top: int = 10, level: float = 0.05, title: str | None = None,
                 sensitivity: Any = None) -> Path:
    """Render the report and write it atomically to ``out``.

    With ``data`` (a path, DataFrame or :class:`adfit.data.CodedData`) the gaps overview
    (:func:`adfit.gaps.overview`) is computed from the records against the result's network.
    ``sensitivity``: the path of an ``adfit sensitivity`` file (or its document, or a
    :class:`adfit.sensitivity.SensitivityResult`) adds the sensitivity section.
    """
    out = Path(out)
    sens_doc = None
    if sensitivity is not None:
        from .sensitivity import load_sensitivity

        if isinstance(sensitivity, (str, Path)):
            sens_doc = load_sensitivity(sensitivity)
            sens_src = str(sensitivity)
        else:
            sens_doc = sensitivity.to_dict() if hasattr(sensitivity, "to_dict") else dict(sensitivity)
            sens_src = "sensitivity"
        sens_doc = json.loads(json.dumps(sens_doc))
    source = str(result) if isinstance(result, (str, Path)) else None
    if isinstance(result, (str, Path)):
        result = load_result_doc(result)
    gaps = None
    note = None
    if data is not None:
        from .data import CodedData
        from .gaps import overview

        doc = result if isinstance(result, Mapping) else result.to_dict()
        net = result_from_dict(doc, source=source or "<result>").network
        if isinstance(data, CodedData):
            coded = data
        else:
            from .engines import load_coded

            coded = load_coded(net, data, engine=engine, scheduler=scheduler, missing=missing,
                               count_column=count_column, ignore_columns=tuple(ignore_columns))
        gaps = overview(net, coded, top=top, level=level)
        fitted = _f(doc.get("n_rows"))
        if math.isfinite(fitted) and abs(coded.n_rows - fitted) > 1e-9 * max(1.0, fitted):
            note = (f"These records ({fmt_count(coded.n_rows)}) are not the {fmt_count(fitted)} the fit used: "
                    f"the overview describes the records given.")
    if sens_doc is not None:
        doc0 = result if isinstance(result, Mapping) else result.to_dict()
        check_sensitivity_matches(sens_doc, result_from_dict(doc0, source=source or "<result>").network, sens_src)
    text = render_report(result, gaps=gaps, title=title, source=source, data_note=note, sensitivity=sens_doc)
    if out.is_dir():
        raise AdfitError(f"{out}: is a folder; give the report file name, e.g. --out report.html")
    with atomic_write(out) as fh:
        fh.write(text)
    return out

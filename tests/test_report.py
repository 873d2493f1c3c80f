"""The HTML report (adfit.report, `adfit report`).

Outside references: Python's html.parser (the page must parse with balanced tags), PIL (every
embedded picture must decode), decimal.Decimal (the printed numbers must be the JSON values
correctly rounded), pandas (gap counts straight from the CSV), brute-force enumeration of node
orders (the layered drawing), a parameter count (a two-item latent class model is not
identified), and headless Chromium when it is installed (the page must render offline).

Data: the Stouffer & Toby (1951) role-conflict responses as analysed by Goodman (1974), shipped in
tests/published.py; gaps are made by a seeded MAR rule (item4 goes missing more often when item1
is "-"), so the complete-case comparison has something to show.
"""

from __future__ import annotations

import base64
import copy
import io
import itertools
import json
import re
import shutil
import subprocess
import warnings
from decimal import ROUND_HALF_EVEN, Context, Decimal
from html.parser import HTMLParser

import numpy as np
import pytest

from adfit.errors import AdfitError, ResultError
from adfit.network import network_from_dict
from adfit.report import (SECTIONS, convergence_histories, fmt_count, fmt_loglik, fmt_prob, fmt_sci,
                          network_figure, network_layers, render_report, write_report)

from published import STOUFFER_TOBY_ITEMS, stouffer_toby


# ============================================================================ a small DOM
VOID = {"area", "base", "br", "col", "embed", "hr", "img", "input", "link", "meta", "source", "track", "wbr"}


class Node:
    def __init__(self, tag, attrs, parent):
        self.tag, self.attrs, self.parent, self.children = tag, dict(attrs), parent, []

    def text(self) -> str:
        return "".join(c if isinstance(c, str) else c.text() for c in self.children)

    def iter(self):
        for c in self.children:
            if isinstance(c, Node):
                yield c
                yield from c.iter()

    def find_all(self, tag=None, cls=None, **attrs):
        out = []
        for n in self.iter():
            if tag and n.tag != tag:
                continue
            if cls and cls not in (n.attrs.get("class") or "").split():
                continue
            if any(n.attrs.get(k.replace("_", "-")) != v for k, v in attrs.items()):
                continue
            out.append(n)
        return out

    def find(self, tag=None, cls=None, **attrs):
        found = self.find_all(tag, cls, **attrs)
        return found[0] if found else None


class StrictTree(HTMLParser):
    """Builds a tree and fails on any end tag that does not close the innermost open element."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.root = Node("#root", {}, None)
        self.cur = self.root
        self.doctype = None
        self.errors: list[str] = []

    def handle_decl(self, decl):
        self.doctype = decl

    def handle_starttag(self, tag, attrs):
        n = Node(tag, attrs, self.cur)
        self.cur.children.append(n)
        if tag not in VOID:
            self.cur = n

    def handle_startendtag(self, tag, attrs):
        self.cur.children.append(Node(tag, attrs, self.cur))

    def handle_endtag(self, tag):
        if tag in VOID:
            return
        if self.cur.tag != tag:
            self.errors.append(f"</{tag}> closes <{self.cur.tag}>")
            return
        self.cur = self.cur.parent

    def handle_data(self, data):
        self.cur.children.append(data)


def parse(text: str) -> Node:
    p = StrictTree()
    p.feed(text)
    p.close()
    assert not p.errors, p.errors[:5]
    assert p.cur is p.root, f"unclosed <{p.cur.tag}>"
    assert p.doctype and p.doctype.lower() == "doctype html"
    return p.root


def rounded(x: float, places: int) -> str:
    """The decimal text of the binary value x, rounded half-even to ``places`` (decimal module)."""
    s = str(Decimal(x).quantize(Decimal(1).scaleb(-places), rounding=ROUND_HALF_EVEN))
    return "0." + "0" * places if s.startswith("-") and set(s[1:]) <= set("0.") else s


# ============================================================================ the fitted case
def gappy_stouffer_toby():
    """Stouffer-Toby records with seeded MAR gaps, and the network with a fixed latent child."""
    net0, df = stouffer_toby()
    rows = df.loc[df.index.repeat(df["count"]), list(STOUFFER_TOBY_ITEMS)].reset_index(drop=True)
    rng = np.random.default_rng(1)
    rows.loc[rng.random(len(rows)) < np.where(rows.item1 == "-", 0.5, 0.1), "item4"] = ""
    rows.loc[rng.random(len(rows)) < 0.08, "item2"] = ""
    nodes = {n.name: {"states": list(n.states), "parents": list(n.parents), "latent": n.latent} for n in net0.nodes}
    nodes["audit"] = {"states": ["pass", "flag"], "parents": ["item1"], "latent": True, "fixed": [[0.9, 0.1], [0.3, 0.7]]}
    return network_from_dict(nodes), rows


@pytest.fixture(scope="module")
def case(tmp_path_factory):
    from adfit.assess import cross_validate
    from adfit.crosscheck import attach_em_check
    from adfit.data import load_data
    from adfit.fit import fit
    from adfit.gaps import compare_complete_case, information_criteria
    from adfit.result import write_result
    from adfit.uncertainty import attach_uncertainty

    d = tmp_path_factory.mktemp("report")
    net, rows = gappy_stouffer_toby()
    csv = d / "records.csv"
    rows.to_csv(csv, index=False)
    coded = load_data(net, csv)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = fit(net, coded, restarts=2, seed=0)
        res = attach_uncertainty(res, coded)
        res = attach_em_check(res, coded)
        cc = compare_complete_case(net, coded, full=res, seed=0)
        res = res.with_extras(complete_case=cc.to_dict(),
                              information_criteria=information_criteria(net, coded, res).to_dict(),
                              cross_validation=cross_validate(net, coded, folds=2, seed=0).to_dict())
    path = d / "fit.json"
    write_result(path, res)
    out = d / "report.html"
    write_report(out, path, data=csv)
    doc = json.loads(path.read_text())
    text = out.read_text(encoding="utf-8")
    return {"dir": d, "csv": csv, "rows": rows, "net": net, "json": path, "doc": doc, "html": out, "text": text,
            "tree": parse(text)}


def starts_of(doc):
    """The list of starts: ``restarts`` is that list, or a dict with it under ``"starts"``."""
    r = doc["restarts"]
    return r["starts"] if isinstance(r, dict) else r


def section(tree: Node, sid: str) -> Node:
    s = tree.find("section", id=sid)
    assert s is not None, sid
    return s


# ============================================================================ structure
def test_page_parses_and_needs_nothing_from_outside(case):
    tree = case["tree"]
    assert tree.find("meta", charset="utf-8") is not None
    assert not tree.find_all("script") and not tree.find_all("link") and not tree.find_all("iframe")
    for n in tree.iter():
        for k in ("src", "href", "srcset", "data", "poster"):
            v = n.attrs.get(k)
            if v is None:
                continue
            assert v.startswith("data:image/png;base64,") if k == "src" else v.startswith("#"), (n.tag, k, v[:40])
    css = "".join(s.text() for s in tree.find_all("style"))
    assert "url(" not in css and "@import" not in css
    # every in-page link points at an element of the page
    ids = {n.attrs["id"] for n in tree.iter() if "id" in n.attrs}
    for a in tree.find_all("a"):
        assert a.attrs["href"][1:] in ids


def test_every_section_present_in_order(case):
    tree = case["tree"]
    found = [n.attrs["id"] for n in tree.find_all("section")]
    # "Further sections" only when the result holds sections the report does not interpret
    assert found == [sid for sid, _ in SECTIONS if sid != "other"]
    assert "Further sections" not in case["text"]  # no hollow heading, in the page or its contents list
    for sid, title in SECTIONS:
        if sid != "other":
            assert section(tree, sid).find("h2").text() == title
    # the full case has every optional section of a fit result, so none says it is absent; the
    # sensitivity section needs a separate file (adfit sensitivity) and names the commands
    absent = [p.text() for sid, _ in SECTIONS if sid not in ("sensitivity", "other")
              for p in section(tree, sid).find_all("p", cls="absent")]
    assert absent == [], absent
    assert "adfit report RESULT --sensitivity" in section(tree, "sensitivity").find("p", cls="absent").text()


def test_every_image_decodes(case):
    from PIL import Image

    imgs = case["tree"].find_all("img")
    # network, convergence, gaps per column, complete-case comparison
    assert len(imgs) == 4
    for img in imgs:
        raw = base64.b64decode(img.attrs["src"].split(",", 1)[1], validate=True)
        with Image.open(io.BytesIO(raw)) as im:
            assert im.format == "PNG"
            im.load()
            px = np.asarray(im.convert("L"), dtype=float)
        # drawn at 144 dpi, shown at 96 CSS px per inch
        assert abs(px.shape[1] - 1.5 * float(img.attrs["width"])) <= 2
        assert abs(px.shape[0] - 1.5 * float(img.attrs["height"])) <= 2
        assert px.std() > 5 and (px < 100).mean() > 0.001, "an empty picture"
        assert img.attrs.get("alt")


# ============================================================================ numbers
def test_cpt_cells_are_the_json_rounded(case):
    doc, tree = case["doc"], section(case["tree"], "cpts")
    n_cells = 0
    for name, sec in doc["nodes"].items():
        table = tree.find("table", cls="cpt-table", data_node=name)
        assert table is not None, name
        for i, row in enumerate(sec["table"]):
            for j, v in enumerate(row):
                td = table.find("td", data_row=str(i), data_col=str(j))
                assert td.find("span", cls="est").text() == rounded(v, 4)
                n_cells += 1
                if "interval" in sec:
                    assert td.find("span", cls="lo").text() == rounded(sec["interval"][0][i][j], 4)
                    assert td.find("span", cls="hi").text() == rounded(sec["interval"][1][i][j], 4)
                if sec.get("se") and sec["se"][i][j] is not None:
                    assert td.find("span", cls="sev").text() == rounded(sec["se"][i][j], 4)
    assert n_cells == sum(len(s["table"]) * len(s["states"]) for s in doc["nodes"].values())
    # the fixed CPT is shown as given in the network file
    audit = tree.find("table", cls="cpt-table", data_node="audit")
    assert [c.find("span", cls="est").text() for c in audit.find_all("td")] == ["0.9000", "0.1000", "0.3000", "0.7000"]


def _kv(table: Node) -> dict[str, str]:
    return {tr.find("th").text(): tr.find("td").text() for tr in table.find_all("tr")}


def test_summary_em_check_and_criteria_are_the_json_rounded(case):
    doc, tree = case["doc"], case["tree"]
    fit_kv = _kv(section(tree, "fitted").find("table", cls="summary"))
    assert fit_kv["log-likelihood"] == rounded(doc["log_likelihood"], 4)
    assert fit_kv["objective value"] == rounded(doc["objective_value"], 4)
    assert fit_kv["gradient norm (records)"] == f"{doc['gradient_norm']:.2e}"
    assert float(fit_kv["gradient norm (records)"]) == pytest.approx(doc["gradient_norm"], rel=5e-3)
    assert fit_kv["records"].startswith(f"{int(doc['n_rows'])} ({doc['n_distinct']} distinct")

    em = doc["em_check"]
    rows = section(tree, "em-check").find("table", cls="emcheck").find("tbody").find_all("tr")
    for tr, key in zip(rows, ("fit", "em_from_fit", "em_own_start")):
        cells = [td.text() for td in tr.find_all("td")]
        assert cells[1] == rounded(em[key]["objective_value"], 4)
        assert float(cells[2]) == pytest.approx(em[key]["gradient_norm"], rel=5e-3)
    assert em["verdict"] in section(tree, "em-check").find("p", cls="verdict").text()

    ic = _kv(section(tree, "assessment").find("table", cls="ic"))
    assert ic["AIC"] == rounded(doc["information_criteria"]["aic"], 4)
    assert ic["BIC"] == rounded(doc["information_criteria"]["bic"], 4)
    assert ic["free parameters k"] == str(doc["information_criteria"]["n_parameters"])
    cv = _kv(section(tree, "assessment").find("table", cls="cv"))
    assert cv["held-out log-likelihood"] == rounded(doc["cross_validation"]["heldout_log_likelihood"], 4)

    starts = section(tree, "convergence").find("table", cls="starts").find("tbody").find_all("tr")
    assert len(starts) == len(starts_of(doc)) == 2
    for tr, s in zip(starts, starts_of(doc)):
        assert tr.find_all("td")[2].text() == rounded(s["objective"], 4)
    if isinstance(doc["restarts"], dict) and "optima" in doc["restarts"]:
        rows = section(tree, "convergence").find("table", cls="optima").find("tbody").find_all("tr")
        assert [tr.find_all("td")[1].text() for tr in rows] == [rounded(o["objective"], 4)
                                                                 for o in doc["restarts"]["optima"]]


def test_complete_case_table_is_the_json_rounded(case):
    cc = case["doc"]["complete_case"]
    assert cc["n_discarded"] > 0
    table = section(case["tree"], "gaps").find("table", cls="ccentries")
    got = {}
    for tr in table.find("tbody").find_all("tr"):
        cells = [td.text() for td in tr.find_all("td")]
        got[cells[0]] = cells[1:]
    assert len(got) == len(cc["entries"])
    for e in cc["entries"]:
        cond = ", ".join(f"{p}={s}" for p, s in e["parents"].items())
        label = f"P({e['node']}={e['state']}" + (f" | {cond})" if cond else ")")
        full, comp, diff, se, z, _ = got[label]
        assert (full, comp, diff) == (rounded(e["full"], 4), rounded(e["complete_case"], 4), rounded(e["difference"], 4))
        if e["se"] is not None:
            assert se == rounded(e["se"], 4) and float(z) == pytest.approx(e["z"], abs=0.005 + 1e-12)


def test_gap_counts_match_pandas(case):
    rows = case["rows"]
    table = section(case["tree"], "gaps").find("table", cls="gapcols")
    got = {tr.find_all("td")[0].text(): tr.find_all("td")[1].text() for tr in table.find("tbody").find_all("tr")}
    want = {c: str(int((rows[c] == "").sum())) for c in STOUFFER_TOBY_ITEMS}
    assert got == want and int(want["item4"]) > 0
    complete = int((rows != "").all(axis=1).sum())
    assert f"complete records {complete} " in section(case["tree"], "gaps").text()


@pytest.mark.parametrize("x", [0.12345, 0.00005, 0.99995, 1 / 3, 2.5e-5, 0.0, 1.0, 0.123449999999, 0.6789500000001])
def test_probability_format_is_correct_rounding(x):
    assert fmt_prob(x) == rounded(x, 4)


def test_formats_against_decimal_on_many_values():
    rng = np.random.default_rng(0)
    for x in np.concatenate([rng.random(300), -1000 * rng.random(300)]):
        x = float(x)
        assert fmt_prob(abs(x) % 1) == rounded(abs(x) % 1, 4)
        assert fmt_loglik(x) == rounded(x, 4)
        # three significant digits: the exact value rounded half-even in a 3-digit decimal context
        assert Decimal(fmt_sci(abs(x))) == Context(prec=3, rounding=ROUND_HALF_EVEN).plus(Decimal(abs(x)))
    assert fmt_count(1234.0) == "1,234" and fmt_count(2.5) == "2.50"
    assert fmt_prob(None) == "n/a" and fmt_loglik("-inf") == "-inf"


# ============================================================================ what is marked
def test_identifiability_flags_of_a_two_item_latent_model(tmp_path):
    # two binary items and a binary latent class: 5 free parameters against 3 degrees of freedom
    # of the 2x2 table (a parameter count), so no entry is identified and every cell says so
    from adfit.data import load_data
    from adfit.fit import fit
    from adfit.uncertainty import attach_uncertainty

    _, df = stouffer_toby()
    df = df.groupby(["item1", "item2"], as_index=False)["count"].sum()
    net = network_from_dict({"cls": {"states": ["k1", "k2"], "latent": True},
                             "item1": {"states": ["+", "-"], "parents": ["cls"]},
                             "item2": {"states": ["+", "-"], "parents": ["cls"]}})
    coded = load_data(net, df, count_column="count")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = attach_uncertainty(fit(net, coded, restarts=1), coded)
    tree = parse(render_report(res))
    cells = section(tree, "cpts").find_all("td", cls="num")
    cells = [c for c in cells if c.attrs.get("data-node")]
    assert len(cells) == 10
    assert all(c.find("span", cls="status").text() == "not identified" for c in cells)
    flags = section(tree, "cpts").text()
    assert "flat direction (not identified)" in flags and "not identified (interval [0, 1])" in flags


def test_network_drawing_marks_latent_and_fixed_nodes(case):
    from matplotlib.patches import Rectangle

    net = case["net"]
    fig = network_figure(net)
    boxes = [p for p in fig.axes[0].patches if isinstance(p, Rectangle)]
    assert len(boxes) == len(net)
    dashed = [b for b in boxes if b.get_linestyle() not in ("-", "solid")]
    grey = [b for b in boxes if b.get_facecolor()[:3] != (1.0, 1.0, 1.0)]
    assert len(dashed) == len(net.latent_names) == 2
    assert len(grey) == len(net.fixed_names) == 1
    legend = [t.get_text() for lg in fig.legends for t in lg.get_texts()]
    assert any("latent" in t for t in legend) and any("fixed" in t for t in legend)
    arrows = [c for c in fig.axes[0].texts if getattr(c, "arrow_patch", None) is not None]
    assert len(arrows) == sum(len(n.parents) for n in net.nodes)


def test_no_arrow_runs_through_a_box():
    # a layer-skipping arrow (c -> z) beside short ones: drawn straight, it would cut the box of
    # y; every drawn segment must stay out of every box but its own two ends'
    from matplotlib.patches import Rectangle

    net = network_from_dict({"r": {"states": ["0", "1"]}, "s": {"states": ["0", "1"]},
                             "a": {"states": ["0", "1"], "parents": ["r"]},
                             "c": {"states": ["clean", "dirty"], "parents": ["s"], "latent": True},
                             "x": {"states": ["0", "1", "2"], "parents": ["a", "c"]},
                             "y": {"states": ["0", "1"], "parents": ["a", "c"]},
                             "z": {"states": ["0", "1"], "parents": ["x", "c"]},
                             "w": {"states": ["0", "1"], "parents": ["x"]}})
    fig = network_figure(net)
    ax = fig.axes[0]
    boxes = [(b.get_x(), b.get_y(), b.get_x() + b.get_width(), b.get_y() + b.get_height())
             for b in ax.patches if isinstance(b, Rectangle)]
    segments = [(np.array(t.xyann, float), np.array(t.xy, float)) for t in ax.texts
                if getattr(t, "arrow_patch", None) is not None]
    for line in ax.lines:
        xy = np.column_stack(line.get_data())
        segments += list(zip(xy[:-1], xy[1:]))
    assert len(segments) > sum(len(n.parents) for n in net.nodes)  # at least one arrow was routed
    tol = 0.02

    def inside(pt, bx, pad):
        return bx[0] + pad < pt[0] < bx[2] - pad and bx[1] + pad < pt[1] < bx[3] - pad

    for p0, p1 in segments:
        own = [bx for bx in boxes if inside(p0, bx, -0.06) or inside(p1, bx, -0.06)]
        for t in np.linspace(0.02, 0.98, 97):
            pt = p0 + t * (p1 - p0)
            assert not any(inside(pt, bx, tol) for bx in boxes if bx not in own), (p0, p1)


def _crossings(net, layers) -> int:
    pos = {n: (d, i) for d, layer in enumerate(layers) for i, n in enumerate(layer)}
    edges = [(pos[p], pos[n.name]) for n in net.nodes for p in n.parents]
    count = 0
    for (a, b), (c, d) in itertools.combinations(edges, 2):
        if a[0] == c[0] and b[0] == d[0] and a[1] != c[1] and b[1] != d[1]:
            count += (a[1] - c[1]) * (b[1] - d[1]) < 0
    return count


def test_layers_follow_the_longest_path_and_avoid_crossings():
    # file order puts x1 (child of b) left of x2 (child of a) while a is left of b: one crossing
    net = network_from_dict({"a": {"states": ["0", "1"]}, "b": {"states": ["0", "1"]},
                             "x1": {"states": ["0", "1"], "parents": ["b"]},
                             "x2": {"states": ["0", "1"], "parents": ["a"]},
                             "y": {"states": ["0", "1"], "parents": ["x1", "a"]}})
    layers = network_layers(net)
    # layer = length of the longest path from a root, by enumeration of every path
    def longest(name):
        ps = net.node(name).parents
        return 0 if not ps else 1 + max(longest(p) for p in ps)
    assert all(longest(n) == d for d, layer in enumerate(layers) for n in layer)
    assert sorted(n for layer in layers for n in layer) == sorted(net.names)
    file_order = [[n for n in net.names if longest(n) == d] for d in range(len(layers))]
    assert _crossings(net, file_order) > 0
    best = min(_crossings(net, list(p)) for p in itertools.product(*(itertools.permutations(l) for l in layers)))
    assert _crossings(net, layers) == best == 0


# ============================================================================ what is absent
def test_absent_sections_say_what_to_run(case):
    doc = copy.deepcopy(case["doc"])
    for k in ("em_check", "complete_case", "information_criteria", "cross_validation", "uncertainty", "restarts",
              "best_start"):
        doc.pop(k, None)
    for sec in doc["nodes"].values():
        for k in ("se", "interval", "se_status", "missing_information"):
            sec.pop(k, None)
    tree = parse(render_report(doc))
    absent = {sid: " ".join(p.text() for p in section(tree, sid).find_all("p", cls="absent")) for sid, _ in SECTIONS
              if sid != "other"}
    assert "No EM cross-check was run: use adfit fit --em-check." in absent["em-check"]
    assert "--compare-complete-case" in absent["gaps"] and "--data" in absent["gaps"]
    assert "--folds" in absent["assessment"] and "No information criteria" in absent["assessment"]
    assert "No error bars" in absent["cpts"]
    assert "--restarts" in absent["convergence"]
    assert section(tree, "fitted").find("p", cls="absent") is not None  # gaps unknown without the records
    assert len(tree.find_all("img")) == 2  # network and convergence only
    # the CPT numbers are still there
    v = doc["nodes"]["item1"]["table"][1][0]
    assert section(tree, "cpts").find("td", data_node="item1", data_row="1", data_col="0").text() == rounded(v, 4)


def test_per_start_histories_when_recorded(case):
    doc = copy.deepcopy(case["doc"])
    hist, note = convergence_histories(doc)
    assert len(hist) == 1 and hist[0][3] and "Only the best start's history" in note
    assert hist[0][1] == pytest.approx(doc["history"]["objective"])
    # the history of each start, in either layout of "restarts": a list of starts, or a dict
    # holding them under "starts" (with the optima beside them)
    starts = starts_of(doc)
    for k, s in enumerate(starts):
        s["history"] = {"objective": doc["history"]["objective"][k:], "gradient_norm": doc["history"]["gradient_norm"][k:]}
    for layout in ({"starts": starts, "optima": [{"objective": doc["objective_value"], "starts": [0, 1]}]}, starts):
        doc["restarts"] = layout
        hist, note = convergence_histories(doc)
        assert len(hist) == len(starts) and note.startswith(f"Histories of all {len(hist)} starts")
        assert [h[3] for h in hist] == [k == doc["best_start"] for k in range(len(hist))]
        assert [h[1] for h in hist] == [s["history"]["objective"] for s in starts]
        conv = section(parse(render_report(doc)), "convergence")
        assert "Histories of all" in conv.find("figcaption").text()
        assert ("Optima found" in conv.text()) == isinstance(layout, dict)


def test_unknown_sections_are_shown_as_recorded(case):
    doc = copy.deepcopy(case["doc"])
    doc["sensitivity"] = {"perturbation": 0.125, "nodes": ["item1", "item2"]}
    tree = parse(render_report(doc))
    other = section(tree, "other")
    assert other.find("h3").text() == "sensitivity"
    assert "0.125" in other.text() and "item1, item2" in other.text()


def test_em_result_without_gradient_history(case):
    from adfit.data import load_data
    from adfit.em import fit_em

    net = case["net"]
    res = fit_em(net, load_data(net, case["csv"]), seed=0)
    doc = json.loads(json.dumps(res.to_dict()))
    (label, obj, gn, best), = convergence_histories(doc)[0]
    assert gn == [] and obj == pytest.approx(doc["history"]["objective"])
    tree = parse(render_report(doc))
    assert "EM (the plain-numpy reference)" in section(tree, "fitted").text()
    em_run = [h for h in section(tree, "convergence").find_all("h3") if h.text() == "EM run"]
    assert em_run and rounded(doc["em"]["rate"], 4) in section(tree, "convergence").text()
    assert len(tree.find_all("img")) == 2


def test_cautions(case):
    text = section(case["tree"], "cautions").text()
    for phrase in ("missing at random (MAR)", "engineering or clinical judgement", "Local codes, regulations",
                   "licensed practice come first"):
        assert phrase in text


# ============================================================================ files and the CLI
def test_records_other_than_the_fitted_ones_are_noted(case, tmp_path):
    few = tmp_path / "few.csv"
    case["rows"].iloc[:100].to_csv(few, index=False)
    out = tmp_path / "r.html"
    write_report(out, case["json"], data=few)
    assert "are not the 216 the fit used" in out.read_text()


def test_bad_inputs_are_one_line_errors_and_leave_the_old_file(case, tmp_path):
    out = tmp_path / "r.html"
    out.write_text("old")
    bad = tmp_path / "bad.json"
    bad.write_text('{"format": "something-else"}')
    with pytest.raises(ResultError, match="not an adfit result file"):
        write_report(out, bad)
    broken = tmp_path / "broken.json"
    broken.write_text("{")
    with pytest.raises(ResultError, match="not a valid JSON"):
        write_report(out, broken)
    doc = copy.deepcopy(case["doc"])
    doc["nodes"]["item1"]["table"] = [[0.5, 0.5]]
    wrong = tmp_path / "wrong.json"
    wrong.write_text(json.dumps(doc))
    with pytest.raises(AdfitError):
        write_report(out, wrong)
    assert out.read_text() == "old"
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".")] == []


def test_cli_report(case, tmp_path):
    from typer.testing import CliRunner

    from adfit.cli import app

    runner = CliRunner()
    out = tmp_path / "cli.html"
    r = runner.invoke(app, ["report", str(case["json"]), "--data", str(case["csv"]), "--out", str(out),
                            "--title", "Role conflict, two classes"])
    assert r.exit_code == 0, r.output
    tree = parse(out.read_text())
    assert tree.find("h1").text() == "Role conflict, two classes"
    bad = tmp_path / "bad.json"
    bad.write_text("[]")
    r = runner.invoke(app, ["report", str(bad), "--out", str(tmp_path / "x.html")])
    assert r.exit_code == 1
    lines = [ln for ln in r.output.splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith("adfit: error:")


# ============================================================================ a real browser
def _chromium() -> str | None:
    for name in ("chromium", "chromium-browser", "google-chrome", "chrome"):
        p = shutil.which(name)
        if p:
            return p
    return None


# Errors are caught from the first moment the page is parsed (a listener in <head>, capturing, so
# that a resource that fails to load counts too); after the load event the page writes what it
# saw into a <div> that --dump-dom prints.
TRAP = """<script>
window.__errors = [];
window.addEventListener('error', function (e) {
  window.__errors.push(e.message || ('failed to load ' + ((e.target && (e.target.src || e.target.href)) || '?')));
}, true);
</script>"""

CHECK = """<script>
window.addEventListener('load', function () {
  var bad = 0, n = 0;
  for (var i = 0; i < document.images.length; i++) {
    n++; var im = document.images[i];
    if (!im.complete || im.naturalWidth === 0) bad++;
  }
  var heads = [];
  document.querySelectorAll('section').forEach(function (s) {
    var h = s.querySelector('h2');
    if (h && h.getBoundingClientRect().height > 0) heads.push(s.id);
  });
  var out = document.createElement('div');
  out.id = 'render-check';
  out.textContent = 'images=' + n + ' broken=' + bad + ' sections=' + heads.join(',')
                    + ' width=' + document.documentElement.scrollWidth
                    + ' errors=' + window.__errors.length + ' [' + window.__errors.join(' | ') + ']';
  document.body.appendChild(out);
});
</script>"""


@pytest.mark.skipif(_chromium() is None, reason="no Chromium installed (.ci/run installs it as root)")
def test_renders_in_headless_chromium(case, tmp_path):
    from PIL import Image

    exe = _chromium()
    flags = ["--headless", "--no-sandbox", "--disable-gpu", "--no-first-run", "--disable-background-networking",
             "--disable-component-update", "--disable-sync", f"--user-data-dir={tmp_path / 'profile'}",
             "--window-size=1200,2000"]
    checked = tmp_path / "checked.html"
    page = case["text"].replace("<head>", "<head>" + TRAP, 1).replace("</body>", CHECK + "</body>")
    checked.write_text(page, encoding="utf-8")
    dom = subprocess.run([exe, *flags, "--virtual-time-budget=5000", "--dump-dom", checked.as_uri()],
                         capture_output=True, text=True, timeout=120)
    assert dom.returncode == 0, dom.stderr[-2000:]
    m = re.search(r"images=(\d+) broken=(\d+) sections=([\w,-]*) width=(\d+) errors=(\d+) \[(.*?)\]", dom.stdout)
    assert m, dom.stdout[-500:]
    images, broken = int(m.group(1)), int(m.group(2))
    shown, width, n_errors = m.group(3).split(","), int(m.group(4)), int(m.group(5))
    assert n_errors == 0, m.group(6)  # no script error and no resource that failed to load
    assert (images, broken) == (4, 0)
    # every section of the page is laid out with a visible heading, in order
    assert shown == [sid for sid, _ in SECTIONS if sid != "other"]
    assert width <= 1200  # nothing wider than the window: no sideways scrolling on a laptop
    # the key content is in the DOM the browser built: the estimates, the verdict, the cautions
    assert 'class="glance"' in dom.stdout and 'class="verdict"' in dom.stdout and "cpt-table" in dom.stdout
    assert "missing at random (MAR)" in dom.stdout
    shot = tmp_path / "page.png"
    r = subprocess.run([exe, *flags, f"--screenshot={shot}", case["html"].as_uri()], capture_output=True,
                       text=True, timeout=120)
    assert r.returncode == 0 and shot.exists(), r.stderr[-2000:]
    with Image.open(shot) as im:
        assert im.size == (1200, 2000)
        px = np.asarray(im.convert("L"), dtype=float)
    assert (px < 128).mean() > 0.01  # text and figures drawn, not a blank page
    # a page with a script error is caught (the check can fail)
    broken_page = tmp_path / "broken.html"
    broken_page.write_text(page.replace("</body>", "<script>undefined_function();</script></body>"), encoding="utf-8")
    dom = subprocess.run([exe, *flags, "--virtual-time-budget=5000", "--dump-dom", broken_page.as_uri()],
                         capture_output=True, text=True, timeout=120)
    m = re.search(r"errors=(\d+)", dom.stdout)
    assert m and int(m.group(1)) == 1, dom.stdout[-500:]


def test_report_sets_unconverged_starts_apart_and_explains_the_new_verdicts(case):
    # one start marked as not converged, rebuilt by adfit.restarts.summarise_optima's rule: the
    # report says how many converged, lists the other apart, and gives each verdict's meaning
    from adfit.crosscheck import VERDICT_MEANING

    doc = copy.deepcopy(case["doc"])
    sec = doc["restarts"]
    sec["starts"][1]["converged"] = False
    sec["starts"][1]["optimum"] = None
    sec.update(n_converged=1, not_converged=[{"start": 1, "objective": sec["starts"][1]["objective"],
                                              "gradient_norm": 3.0, "residual": 0.1, "above_best": False}],
               starts_at_best_objective=1, best_objective_tolerance=5e-4)
    for o in sec["optima"]:
        o["starts"] = [s for s in o["starts"] if s != 1]
    sec["optima"] = [o for o in sec["optima"] if o["starts"]]
    doc["em_check"]["verdict"] = "em-own-start-not-converged"
    conv = section(parse(render_report(doc)), "convergence")
    text = conv.text()
    # starts numbered from 1 on the page (the result numbers them from 0)
    assert "1 of 2 starts converged" in text and "Did not converge (not counted as optima): start 2" in text
    cells = [td.text() for td in conv.find("table", cls="starts").find("tbody").find_all("tr")[1].find_all("td")]
    assert "none (did not converge)" in cells
    for verdict, meaning in VERDICT_MEANING.items():
        doc["em_check"]["verdict"] = verdict
        p = section(parse(render_report(doc)), "em-check").find("p", cls="verdict").text()
        assert verdict in p and meaning[1:40] in p
    doc["em_check"]["verdict"] = "not-converged"  # a result of an earlier version
    p = section(parse(render_report(doc)), "em-check").find("p", cls="verdict").text()
    assert "earlier version" in p


# ============================================================================ practitioner's page
def test_top_line_counts_every_error_bar_flag(case):
    from adfit.report import error_bar_flags

    doc = copy.deepcopy(case["doc"])
    unc = doc["uncertainty"]
    unc["directions"] = [{"kind": "weak", "relative_curvature": 1e-3, "rows": []}] * 3
    unc["wide_entries"] = [{"node": "item1", "row": 0, "parents": {}, "state": "+", "width": 0.7,
                            "status": "interior"}] * 12
    unc["not_identified"] = unc["no_data_rows"] = unc["boundary_entries"] = unc["prior_only_rows"] = []
    glance = parse(render_report(doc)).find("p", cls="glance").text()
    assert "3 weakly identified direction(s)" in glance and "12 interval(s) wider than 0.5" in glance
    assert "identified, no weak" not in glance  # never "all is well" beside flags
    unc["directions"], unc["wide_entries"] = [], []
    assert error_bar_flags(unc) == "every free entry identified, no weak direction or wide interval"
    # a not-identified cell's wide interval is counted as not identified, not as wide
    unc["not_identified"] = [{"node": "item1", "row": 0, "parents": {}}]
    unc["wide_entries"] = [{"status": "not identified", "width": 1.0}]
    assert error_bar_flags(unc) == "1 CPT row(s) not identified"


def test_network_title_names_the_page_and_settings_are_folded(case, tmp_path):
    doc = copy.deepcopy(case["doc"])
    doc["network"]["network"] = {"title": "Role conflict survey"}
    tree = parse(render_report(doc, source="fit.json"))
    assert tree.find("h1").text() == "Role conflict survey" and tree.find("title").text() == "Role conflict survey"
    assert parse(render_report(doc, title="Given")).find("h1").text() == "Given"  # --title wins
    # internal settings only inside a folded <details> element
    fitted = section(tree, "fitted")
    det = fitted.find("details", cls="settings")
    assert det is not None and "tol" in det.text()
    assert not [h for h in fitted.find_all("h3") if h.text() == "Settings"]


def test_latent_caution_only_with_a_latent_node(case):
    from adfit.report import LATENT_CAUTION

    assert LATENT_CAUTION in section(case["tree"], "cautions").text()  # the case has latent nodes
    doc = copy.deepcopy(case["doc"])
    for sec in (doc["network"]["nodes"], doc["nodes"]):
        sec.pop("audit")
        sec["cls"]["latent"] = False
    for key in ("restarts", "best_start", "em_check", "complete_case", "cross_validation"):
        doc.pop(key, None)  # sections recorded for the latent fit
    doc["uncertainty"]["latent"] = {}
    tree = parse(render_report(doc))
    assert LATENT_CAUTION not in section(tree, "cautions").text()
    assert "relabel" not in tree.text()


def test_starts_are_numbered_from_one(case):
    rows = section(case["tree"], "convergence").find("table", cls="starts").find("tbody").find_all("tr")
    firsts = [tr.find_all("td")[0].text().split()[0] for tr in rows]
    assert firsts == [str(k + 1) for k in range(len(rows))]


def test_log_axes_of_the_convergence_plot_are_labelled_in_plain_text():
    # The report draws labels as written (text.parse_math off: states are data), so matplotlib's
    # default log labels ("$\mathdefault{10^{-4}}$", maths markup) would show raw; the axes carry
    # plain powers of ten instead. Reference values: powers of ten computed by numpy.
    import io

    from adfit.report import _plain_text, _power_of_ten, convergence_figure

    obj = list(-100.0 - np.logspace(2, -8, 25))
    gn = list(np.logspace(1, -6, 25))
    fig = convergence_figure([("start 1", obj, gn, True)], threshold=1e-5)
    with _plain_text():
        fig.savefig(io.BytesIO(), format="png")
    texts = [t.get_text() for ax in fig.axes for t in ax.get_yticklabels() + ax.get_xticklabels()]
    assert texts and not any("$" in t or "mathdefault" in t for t in texts), texts
    assert "10\u207b\u2074" in [t.get_text() for t in fig.axes[2].get_yticklabels()]
    # the objective's axis reads in objective units (no offset such as "-2.329e3" in a corner)
    assert fig.axes[0].yaxis.get_offset_text().get_text() == ""
    assert any(t.get_text().replace("\u2212", "-").startswith("-10") for t in fig.axes[0].get_yticklabels())
    assert [_power_of_ten(v) for v in (1e-4, 1.0, 1e3, 3e-5, 0.0)] == ["10\u207b\u2074", "10\u2070", "10\u00b3", "3e-05", ""]

"""The terminal summary of ``adfit fit``: short by default, estimates before intervals, one
number of decimals per kind of figure, no internal words, and flags that match the result file."""

from __future__ import annotations

import json
import re

import pytest
from typer.testing import CliRunner

from adfit.cli import app

INTERNAL = ("elimination route", "per-pattern", "ptol", "em_polish", "coordinates", "jax")


@pytest.fixture(scope="module")
def weak(tmp_path_factory):
    """Two binary items of a two-class latent node: 5 free parameters, 3 degrees of freedom in
    the 2x2 table of the items, so the fit cannot pin every parameter down (a latent class model
    needs at least three items to be identified: Goodman 1974, Biometrika 61(2), from memory)."""
    d = tmp_path_factory.mktemp("weak")
    (d / "net.toml").write_text('[network]\ntitle = "Two items, two classes"\n'
                                '[nodes.c]\nstates = ["k1", "k2"]\nlatent = true\n'
                                '[nodes.a]\nstates = ["no", "yes"]\nparents = ["c"]\n'
                                '[nodes.b]\nstates = ["no", "yes"]\nparents = ["c"]\n')
    rows = ["a,b"] + ["no,no"] * 30 + ["no,yes"] * 10 + ["yes,no"] * 12 + ["yes,yes"] * 28
    (d / "d.csv").write_text("\n".join(rows) + "\n")
    out = d / "fit.json"
    args = ["fit", str(d / "net.toml"), str(d / "d.csv"), "--out", str(out)]
    short = CliRunner().invoke(app, args)
    assert short.exit_code == 0, short.output
    doc = json.loads(out.read_text())
    verbose = CliRunner().invoke(app, args + ["--verbose"])
    assert verbose.exit_code == 0, verbose.output
    return {"short": short.stdout, "verbose": verbose.stdout, "doc": doc, "dir": d}


def test_short_by_default_and_the_rest_with_verbose(weak):
    short, verbose = weak["short"], weak["verbose"]
    assert len(short.splitlines()) < len(verbose.splitlines())
    assert "intervals for P(a | c)" not in short and "intervals for P(a | c)" in verbose
    assert "adfit show" in short  # where the intervals are
    # estimates first, then the intervals
    assert verbose.index("\nP(a | c)") < verbose.index("intervals for P(a | c)")


def test_no_internal_words(weak):
    for text in (weak["short"], weak["verbose"]):
        low = text.lower()
        for word in INTERNAL:
            assert word not in low, word


def test_estimates_have_three_decimals_and_equal_the_result_file(weak):
    doc = weak["doc"]
    block = weak["short"].split("\nP(a | c)")[1].split("\n\n")[0]
    cells = re.findall(r"\d+\.\d+", block)
    assert cells and all(len(c.split(".")[1]) == 3 for c in cells)
    table = doc["nodes"]["a"]["table"]  # rows = states of c, columns = states of a
    assert [float(c) for c in cells] == [pytest.approx(round(p, 3), abs=1e-12) for row in table for p in row]
    # log-likelihood figures: 2 decimals with thousands separators (Python's format spec ',.2f')
    assert f"log-likelihood {doc['log_likelihood']:,.2f}" in weak["short"]


def test_flags_are_counted_from_the_result(weak):
    unc = weak["doc"]["uncertainty"]
    kinds = [d["kind"] for d in unc["directions"]]
    expected = {"flat direction": kinds.count("flat"), "weakly identified direction": kinds.count("weak"),
                "not identified": len(unc["not_identified"]), "on the boundary": len(unc["boundary_entries"]),
                # wide intervals of cells that are identified (a not-identified cell is counted as such)
                "wider than": sum(e["status"] in ("interior", "boundary") for e in unc["wide_entries"])}
    assert sum(expected.values()) > 0  # the case is not identified: something must be flagged
    text = " ".join(weak["short"].split())  # the summary lines are folded at 80 columns
    assert "to read with care" in text and "every free CPT entry is identified" not in text
    for phrase, n in expected.items():
        if n:
            assert re.search(rf"\b{n} [^;]*{phrase}", text), (phrase, n, text)
        else:
            assert phrase not in text, phrase
    assert "latent node c: its states are labels" in text


def test_summary_lines_fit_in_80_columns(weak):
    head = weak["short"].split("\n\n")[0]
    assert max(len(x) for x in head.splitlines()) <= 80

"""The user guide keeps up with the program: every key of a real result file is documented in
it, with the interval layout and the place of prior_only_rows, and it links every other doc."""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest
from typer.testing import CliRunner

from adfit.cli import app

DOCS = Path(__file__).resolve().parents[1] / "docs"
GUIDE = (DOCS / "user-guide.md").read_text(encoding="utf-8")

#: sections whose inner keys are documented in another doc (linked from the guide's table)
ELSEWHERE = {"complete_case", "cross_validation"}
#: values keyed by names from the user's files (node names, states), not by adfit
NAMED_BY_USER = {"nodes", "network", "total_pseudo_counts", "spec", "latent_permutation", "excluded_rows",
                 "latent", "largest_delta_at"}


def _keys(obj, path=()):
    """(path, key) of every key adfit writes, down to the first list."""
    if not isinstance(obj, dict):
        return
    for k, v in obj.items():
        yield path, k
        if k in ELSEWHERE or k in NAMED_BY_USER:
            continue
        _sub = v
        if isinstance(v, list) and v and isinstance(v[0], dict) and k in ("starts", "optima", "directions"):
            _sub = v[0]
        yield from _keys(_sub, path + (k,))


@pytest.fixture(scope="module")
def result_doc(tmp_path_factory):
    """A latent fit with a prior, several starts, error bars and the EM check (every section a
    plain fit writes)."""
    d = tmp_path_factory.mktemp("docs")
    (d / "net.toml").write_text('[network]\ntitle = "Docs check"\n'
                                '[nodes.c]\nstates = ["k1", "k2"]\nlatent = true\n'
                                + "".join(f'[nodes.i{j}]\nstates = ["no", "yes"]\nparents = ["c"]\n' for j in (1, 2, 3)))
    (d / "prior.toml").write_text("[default]\npseudo_counts = 1\n")
    rows = ["i1,i2,i3"] + ["no,no,no"] * 20 + ["yes,yes,yes"] * 18 + ["no,yes,no"] * 5 + ["yes,no,"] * 6
    (d / "d.csv").write_text("\n".join(rows) + "\n")
    out = d / "fit.json"
    r = CliRunner().invoke(app, ["fit", str(d / "net.toml"), str(d / "d.csv"), "--prior", str(d / "prior.toml"),
                                 "--out", str(out), "--em-check", "-q"])
    assert r.exit_code == 0, r.output
    return json.loads(out.read_text())


def test_every_key_of_a_result_file_is_in_the_user_guide(result_doc):
    missing = sorted({".".join(p + (k,)) for p, k in _keys(result_doc) if f"`{k}`" not in GUIDE})
    assert not missing, missing
    # per-node sections, with error bars
    node = result_doc["nodes"]["i1"]
    for k in node:
        assert f"`{k}`" in GUIDE, k
    for status in {s for row in node["se_status"] for s in row}:
        assert f"`{status}`" in GUIDE, status


def test_interval_layout_and_prior_only_rows_are_documented():
    assert "`[lower_table, upper_table]`" in GUIDE
    assert re.search(r"`prior_only_rows`\*\*? \(CPT rows that only the prior informs", GUIDE)


def test_the_guide_links_every_other_doc():
    others = sorted(p.name for p in DOCS.glob("*.md") if p.name != "user-guide.md")
    assert others  # the check has something to check
    for name in others:
        assert f"]({name}" in GUIDE, name


def test_network_title_is_documented():
    assert "[network]" in GUIDE and "title" in GUIDE.split("[network]")[1][:400]

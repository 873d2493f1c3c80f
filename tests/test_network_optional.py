"""The network argument left out where a result file is given (``adfit score``, ``impute``,
``query`` with ``--params``): the network embedded in the result is used.

Reference outside the project: on complete records the maximum-likelihood CPT rows are the
relative frequencies, so the log-likelihood is sum n log(n / N) (closed form of the multinomial
likelihood, any statistics textbook); a posterior by Bayes' rule on the two-node table, by hand.
"""

from __future__ import annotations

import json
import math

import pandas as pd
import pytest
from typer.testing import CliRunner

from adfit.cli import app

NET = """
[nodes.wear]
states = ["light", "heavy"]

[nodes.failure]
states = ["no", "yes"]
parents = ["wear"]
"""

runner = CliRunner()


def invoke(args):
    return runner.invoke(app, [str(a) for a in args])


def one_line_error(r) -> bool:
    return (r.exit_code == 1 and r.output.count("\n") == 1 and r.output.startswith("adfit: error: ")
            and "Traceback" not in r.output and "Usage:" not in r.output)


@pytest.fixture(scope="module")
def fitted(tmp_path_factory):
    """Complete records, counts by hand: light 30 (27 no, 3 yes), heavy 10 (6 no, 4 yes)."""
    d = tmp_path_factory.mktemp("netopt")
    (d / "net.toml").write_text(NET)
    rows = [("light", "no")] * 27 + [("light", "yes")] * 3 + [("heavy", "no")] * 6 + [("heavy", "yes")] * 4
    pd.DataFrame(rows, columns=["wear", "failure"]).to_csv(d / "rec.csv", index=False)
    pd.DataFrame({"wear": ["light", "", "heavy"], "failure": ["", "yes", "no"]}).to_csv(d / "gaps.csv", index=False)
    r = invoke(["fit", d / "net.toml", d / "rec.csv", "--out", d / "fit.json", "-q", "--no-errors"])
    assert r.exit_code == 0, r.output
    return d


def test_score_without_the_network_uses_the_embedded_one(fitted):
    d = fitted
    a = invoke(["score", d / "rec.csv", "--params", d / "fit.json", "--json"])
    b = invoke(["score", d / "net.toml", d / "rec.csv", "--params", d / "fit.json", "--json"])
    assert a.exit_code == 0 and b.exit_code == 0, a.output + b.output
    # closed form: sum n log(n/N) over wear, then over failure within each wear state
    want = (30 * math.log(30 / 40) + 10 * math.log(10 / 40) + 27 * math.log(27 / 30) + 3 * math.log(3 / 30)
            + 6 * math.log(6 / 10) + 4 * math.log(4 / 10))
    assert json.loads(a.output)["log_likelihood"] == pytest.approx(want, abs=1e-6)
    assert json.loads(a.output) == json.loads(b.output)


def test_impute_and_query_without_the_network(fitted, tmp_path):
    d = fitted
    r = invoke(["impute", d / "gaps.csv", "--params", d / "fit.json", "--out", tmp_path / "a.csv"])
    assert r.exit_code == 0, r.output
    r = invoke(["impute", d / "net.toml", d / "gaps.csv", "--params", d / "fit.json", "--out", tmp_path / "b.csv"])
    assert r.exit_code == 0, r.output
    a, b = pd.read_csv(tmp_path / "a.csv"), pd.read_csv(tmp_path / "b.csv")
    pd.testing.assert_frame_equal(a, b)
    # Bayes by hand: P(light | yes) = .75 * .1 / (.75 * .1 + .25 * .4)
    assert a.loc[1, "wear__p_light"] == pytest.approx(0.075 / 0.175, abs=1e-6)
    r = invoke(["query", "--params", d / "fit.json", "--given", "failure=yes", "--target", "wear", "--json"])
    assert r.exit_code == 0, r.output
    assert json.loads(r.output)["posteriors"]["wear"]["light"] == pytest.approx(0.075 / 0.175, abs=1e-6)


def test_ambiguous_or_mismatched_invocations_are_one_line(fitted, tmp_path):
    d = fitted
    cases = [
        (["score", d / "rec.csv"], "give the network file and the data file"),
        (["impute", d / "gaps.csv", "--out", tmp_path / "x.csv"], "Missing option"),
        (["score", d / "net.toml", "--params", d / "fit.json"], "looks like a network file"),
        (["impute", d / "net.toml", "--params", d / "fit.json", "--out", tmp_path / "x.csv"], "looks like a network file"),
        (["score", d / "net.toml", d / "rec.csv", d / "gaps.csv", "--params", d / "fit.json"], "at most two paths"),
        (["query", "--given", "wear=light"], "give the network file"),
        (["score", tmp_path / "nowhere.toml", d / "rec.csv", "--params", d / "fit.json"], "file not found"),
    ]
    other = tmp_path / "other.toml"
    other.write_text(NET.replace('"heavy"]', '"heavy", "worn"]'))
    cases.append((["score", other, d / "rec.csv", "--params", d / "fit.json"], "worn"))
    cases.append((["query", other, "--params", d / "fit.json"], "worn"))
    for args, words in cases:
        r = invoke(args)
        if "Missing option" in words:  # the click layer: exit 2 under CliRunner (exit 1 from the console script)
            assert r.exit_code != 0 and words in r.output, r.output
            continue
        assert one_line_error(r) and words in r.output, (args, r.exit_code, r.output)
    assert not (tmp_path / "x.csv").exists()

"""The embedded demo (adfit/demo) and the ``adfit demo`` command.

The demo runs once (module fixture, 2 starts instead of 4 to save time); the CLI tests reuse
its outcome. What is checked against something outside the demo code:

* the embedded CSV is what the seeded generator writes (byte for byte), and its gaps follow the
  stated inspection rule (shares counted by pandas, binomial 4-SE bands: common practice);
* :func:`adfit.demo.marginal` against brute-force enumeration of the joint (itertools);
* the full-likelihood P(heavy wear) is within a few standard errors of the simulation's truth
  while the complete-case one is far above it (the MAR selection bias the demo is about); the
  SE scale used is the binomial SE of a proportion over the records in which wear was recorded
  (the full-likelihood estimate uses those records and more: a rough bound, common practice);
* the summary's counts against pandas on the CSV; fit.json reloads; the EM check agrees;
* package data: a setuptools build of the package (build_py, offline) ships the demo files.
"""

from __future__ import annotations

import importlib.util
import io
import itertools
import json
import math
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

import adfit.demo as demo
from adfit.cli import app
from adfit.demo import generate
from adfit.network import network_from_dict
from adfit.result import load_result

ROOT = Path(__file__).resolve().parents[1]


# ------------------------------------------------------------------ the embedded files
def test_embedded_csv_is_what_the_generator_writes():
    assert demo.resource_bytes(demo.DATA_FILE) == generate.csv_text().encode("utf-8")
    assert len(demo.resource_bytes(demo.DATA_FILE)) < 300_000


def test_generator_truth_matches_the_network():
    net = demo.demo_network()
    assert net.names == tuple(generate.STATES)
    assert net.latent_names == ("contamination",)
    for name, table in generate.true_tables().items():
        node = net.node(name)
        assert node.states == generate.STATES[name] and node.parents == generate.PARENTS[name]
        assert table.shape == net.cpt_shape(name)
        np.testing.assert_allclose(table.sum(axis=-1), 1.0, atol=1e-12)
    df = demo.demo_frame()
    assert tuple(df.columns) == net.observed_names == generate.COLUMNS
    prior = demo.demo_prior(net)
    c = prior.pseudo_counts(net)
    # [default] one pseudo-count per cell; the expert table worth 20 records per row
    np.testing.assert_allclose(c["season"], np.ones(4))
    np.testing.assert_allclose(c[demo.EXPERT_NODE].sum(axis=-1), 20.0)


def test_gaps_follow_the_inspection_rule():
    df = demo.demo_frame()
    n = len(df)
    assert n == generate.N_RECORDS
    assert (df["vibration_alarm"] != "").all() and (df["season"] != "").all() and (df["failure"] != "").all()
    for alarm, p in (("on", generate.INSPECT_IF_ALARM), ("off", generate.INSPECT_IF_QUIET)):
        sub = df[df["vibration_alarm"] == alarm]
        share = float((sub["bearing_wear"] != "").mean())
        assert abs(share - p) < 4 * math.sqrt(p * (1 - p) / len(sub)), (alarm, share, p)
    for col, p in generate.OUTAGE.items():
        share = float((df[col] == "").mean())
        assert abs(share - p) < 4 * math.sqrt(p * (1 - p) / n), (col, share, p)
    # the outages are independent of the alarm (MCAR), unlike the wear gaps
    on = df["vibration_alarm"] == "on"
    assert abs((df.loc[on, "oil_debris"] == "").mean() - (df.loc[~on, "oil_debris"] == "").mean()) < 0.04


def test_marginal_against_enumeration():
    # brute force: sum the product of the CPTs over every joint state (itertools)
    net = network_from_dict({
        "a": {"states": ["0", "1"]},
        "b": {"states": ["0", "1", "2"], "parents": ["a"]},
        "h": {"states": ["x", "y"], "parents": ["a"], "latent": True},
        "c": {"states": ["0", "1"], "parents": ["b", "h"]},
    })
    rng = np.random.default_rng(3)
    probs = {n: rng.dirichlet(np.ones(net.node(n).card), size=net.cpt_shape(n)[:-1]).reshape(net.cpt_shape(n))
             for n in net.names}
    brute = np.zeros(2)
    for x in itertools.product(*(range(k) for k in net.cards)):
        val = dict(zip(net.names, x))
        p = 1.0
        for node in net.nodes:
            p *= probs[node.name][tuple(val[q] for q in node.parents) + (val[node.name],)]
        brute[val["c"]] += p
    np.testing.assert_allclose(demo.marginal(net, probs, "c"), brute, atol=1e-14)
    np.testing.assert_allclose(demo.marginal(net, probs, "a"), probs["a"], atol=1e-14)


def test_marginal_se_is_the_binomial_se_on_complete_data():
    # With complete records the MLE of P(b = 1) = sum_a P(a) P(b=1 | a) is the share n_b / n, and
    # the delta method through the observed information gives the binomial SE sqrt(p(1-p)/n)
    # exactly (a linear function of the multinomial cell shares; closed form).
    unc_mod = pytest.importorskip("adfit.uncertainty")
    from adfit.fit import fit

    net = network_from_dict({"a": {"states": ["0", "1", "2"]}, "b": {"states": ["0", "1"], "parents": ["a"]}})
    rng = np.random.default_rng(1)
    a = rng.choice(3, 300, p=[0.5, 0.3, 0.2])
    b = (rng.random(300) < np.array([0.2, 0.5, 0.7])[a]).astype(int)
    df = pd.DataFrame({"a": a.astype(str), "b": b.astype(str)})
    r = fit(net, df)
    unc = unc_mod.compute_uncertainty(net, df, r.probs)
    p = float((b == 1).mean())
    assert demo.marginal(net, r.probs, "b")[1] == pytest.approx(p, abs=1e-8)
    assert demo.marginal_se(unc, "b", 1) == pytest.approx(math.sqrt(p * (1 - p) / 300), rel=1e-6)


# ------------------------------------------------------------------ the whole job
@pytest.fixture(scope="module")
def outcome(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo") / "adfit-demo"  # does not exist yet: the demo creates it
    return demo.run_demo(out, restarts=2, seed=0)


def test_demo_writes_its_files(outcome):
    for key in ("network", "prior", "data", "fit"):
        assert outcome.files[key].is_file(), key
    assert outcome.files["data"].read_bytes() == demo.resource_bytes(demo.DATA_FILE)
    res = load_result(outcome.files["fit"])
    assert res.network == demo.demo_network()
    assert res.objective == "map" and res.converged
    for section in ("em_check", "complete_case", "restarts", "prior", "information_criteria"):
        assert section in res.extras, section
    assert not list(outcome.out_dir.glob(".*.tmp")), "a temporary file was left behind"


def test_optional_steps_follow_the_installation(outcome):
    for step, module, key in (("uncertainty", "adfit.uncertainty", None), ("imputation", "adfit.impute", "imputed"),
                              ("report", "adfit.report", "report")):
        present = importlib.util.find_spec(module) is not None
        s = outcome.step(step)
        assert s is not None and s.status == ("done" if present else "skipped"), (step, s)
        if key is not None:
            assert (key in outcome.files) == present
    if "imputed" in outcome.files:
        data = pd.read_csv(outcome.files["data"], dtype=str, keep_default_na=False)
        imp = pd.read_csv(outcome.files["imputed"], dtype=str, keep_default_na=False)
        assert len(imp) == len(data)
        pd.testing.assert_frame_equal(imp[list(data.columns)], data)
        seen = data["bearing_wear"] != ""
        assert (imp.loc[seen, "bearing_wear__mode"] == data.loc[seen, "bearing_wear"]).all()
        assert set(imp.loc[~seen, "bearing_wear__mode"]) <= {"none", "light", "heavy"}
    if "report" in outcome.files:
        assert outcome.files["report"].read_text(encoding="utf-8").startswith("<!DOCTYPE html>")
    if importlib.util.find_spec("adfit.uncertainty") is not None:
        nodes = load_result(outcome.files["fit"]).extras.get("nodes", {})
        assert any("se" in sec for sec in nodes.values())


def test_counts_in_the_summary_match_pandas(outcome):
    df = pd.read_csv(outcome.files["data"], dtype=str, keep_default_na=False)
    rec = df["bearing_wear"] != ""
    d, f = outcome.numbers["data"], outcome.numbers["focus"]
    assert d["n_records"] == len(df) and d["focus_recorded"] == int(rec.sum())
    assert f["inspected_share"] == pytest.approx(float((df.loc[rec, "bearing_wear"] == "heavy").mean()), abs=1e-12)
    complete = (df != "").all(axis=1)
    assert f["n_discarded"] == int((~complete).sum())
    g = outcome.numbers["gaps"]
    assert g["focus_missing_share"] == pytest.approx(1 - rec.mean(), abs=1e-12)
    assert g["rejected"] and "vibration_alarm" in g["depends_on"]


def test_complete_case_bias_is_visible_and_the_full_fit_is_not_biased(outcome):
    f = outcome.numbers["focus"]
    truth = demo.marginal(demo.demo_network(), generate.true_tables(), demo.FOCUS_NODE)[2]
    assert f["truth"] == pytest.approx(truth, abs=1e-12)
    n_rec = outcome.numbers["data"]["focus_recorded"]
    se = math.sqrt(truth * (1 - truth) / n_rec)  # binomial SE over the records with wear recorded (rough bound)
    assert abs(f["full"] - truth) < 3 * se, (f["full"], truth, se)
    assert f["complete_case"] - truth > 5 * se, (f["complete_case"], truth, se)
    assert f["difference"] == pytest.approx(f["complete_case"] - f["full"], abs=1e-12)
    assert f["headline"].startswith("dropping incomplete rows would over-state the chance of heavy wear by ")
    assert f"{100 * f['difference']:.1f} percentage points" in f["headline"]
    cc = load_result(outcome.files["fit"]).extras["complete_case"]
    assert cc["n_discarded"] == f["n_discarded"]


def test_em_check_and_restarts(outcome):
    res = load_result(outcome.files["fit"])
    assert res.extras["em_check"]["verdict"] == "agree"
    assert outcome.numbers["em_check"]["verdict"] == "agree"
    rows = res.extras["restarts"]
    rows = rows["starts"] if isinstance(rows, dict) else rows
    assert len(rows) == 2 and outcome.numbers["fit"]["starts"] == 2
    # the expert table anchors the latent labels: contamination is more likely in old oil
    th = np.asarray(res.probs["contamination"])
    assert th[2, 1] > th[0, 1]


def test_summary_text_and_json(outcome):
    text = outcome.format_text()
    assert outcome.headline[0].upper() + outcome.headline[1:] in text
    for p in outcome.files.values():
        assert p.name in text
    assert "simulated" in text and "engineering" in text and "MAR" in text
    doc = json.loads(json.dumps(outcome.to_dict()))
    assert doc["format"] == demo.FORMAT
    assert {s["step"] for s in doc["steps"]} >= {"files", "gaps", "fit", "em_check", "uncertainty",
                                                  "complete_case", "imputation", "report"}
    assert set(doc["files"]) == set(outcome.files)
    assert outcome.format_quiet().splitlines() == [f"wrote {p}" for p in outcome.files.values()]


# ------------------------------------------------------------------ the command
@pytest.fixture()
def cached(outcome, monkeypatch):
    """``adfit demo`` with run_demo replaced by the fixture's outcome (records the call)."""
    calls = []

    def fake(out, **kw):
        calls.append((out, kw))
        return outcome
    monkeypatch.setattr(demo, "run_demo", fake)
    return calls


def test_cli_json_and_quiet(cached, outcome, tmp_path):
    runner = CliRunner()
    r = runner.invoke(app, ["demo", "--out", str(tmp_path / "d"), "--json", "--restarts", "3", "--seed", "5"])
    assert r.exit_code == 0, r.output
    doc = json.loads(r.stdout)
    assert doc["numbers"]["focus"]["headline"] == outcome.headline
    out, kw = cached[-1]
    assert Path(out) == tmp_path / "d" and kw["restarts"] == 3 and kw["seed"] == 5
    assert type(kw["reporter"]) is demo.Reporter  # no progress bars with --json
    r = runner.invoke(app, ["demo", "-q"])
    assert r.exit_code == 0
    assert r.stdout.splitlines() == outcome.format_quiet().splitlines()
    assert type(cached[-1][1]["reporter"]) is demo.Reporter and Path(cached[-1][0]) == demo.DEFAULT_OUT
    r = runner.invoke(app, ["demo"])
    assert r.exit_code == 0 and "percentage points" in r.stdout
    assert isinstance(cached[-1][1]["reporter"], demo.RichReporter)


def test_cli_errors_are_one_line(tmp_path):
    runner = CliRunner()
    a_file = tmp_path / "taken"
    a_file.write_text("x")
    for args in (["demo", "--out", str(a_file)], ["demo", "--out", str(tmp_path / "d"), "--restarts", "0"]):
        r = runner.invoke(app, args)
        assert r.exit_code == 1, (args, r.output)
        lines = r.stderr.strip().splitlines()
        assert len(lines) == 1 and lines[0].startswith("adfit: error: "), r.stderr
    assert not (tmp_path / "d").exists()


def test_rich_reporter_runs_the_fit_callback():
    from rich.console import Console

    buf = io.StringIO()
    rep = demo.RichReporter(console=Console(file=buf, force_terminal=True, width=100))
    with rep.running():
        cb, close = demo.fit_progress(rep, "fit", restarts=2)
        for start in range(2):
            for it in range(1, 4):
                cb(start, it, -100.0 + it, 1.0 / it)
        close()
        with rep.stage("EM"):
            pass
    assert "fit" in buf.getvalue()


# ------------------------------------------------------------------ package data
def test_a_build_of_the_package_ships_the_demo_files(tmp_path):
    src = tmp_path / "src"
    src.mkdir()
    shutil.copy(ROOT / "pyproject.toml", src)
    (src / "README.md").write_text("adfit\n")
    shutil.copytree(ROOT / "adfit", src / "adfit", ignore=shutil.ignore_patterns("__pycache__"))
    lib = tmp_path / "lib"
    r = subprocess.run([sys.executable, "-c", "from setuptools import setup; setup()", "-q", "build_py",
                        "--build-lib", str(lib)], cwd=src, capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    for name in (demo.NETWORK_FILE, demo.PRIOR_FILE, demo.DATA_FILE):
        assert (lib / "adfit" / "demo" / name).read_bytes() == demo.resource_bytes(name), name


def test_demo_sensitivity_analysis(outcome):
    # the demo's own question under missing-not-at-random gaps (adfit/sensitivity.py): odds 1 is
    # the demo's MAR fit, so its value is the full-likelihood marginal reported above it
    pytest.importorskip("adfit.sensitivity")
    from adfit.sensitivity import load_sensitivity

    doc = load_sensitivity(outcome.files["sensitivity"])
    target = f"{demo.FOCUS_NODE}={demo.FOCUS_STATE}"
    assert doc["node"] == demo.FOCUS_NODE and doc["predictors"] == [demo.SENSITIVITY_PREDICTOR]
    vals = [r["targets"][target]["value"] for r in doc["rows"]]
    mar = next(r for r in doc["rows"] if r["odds"] == 1)
    assert mar["targets"][target]["value"] == pytest.approx(outcome.numbers["focus"]["full"], abs=1e-6)
    assert all(a < b for a, b in zip(vals, vals[1:]))  # more heavy wear hidden in the gaps as the odds grow
    assert all(r["converged"] for r in doc["rows"])
    assert doc["tipping_point"]["threshold"] == pytest.approx(outcome.numbers["focus"]["complete_case"])
    step = outcome.step("sensitivity")
    assert step.status == "done" and "assumptions, not estimates" in step.note
    assert "assumptions, not estimates" in outcome.format_text()
    if "report" in outcome.files:
        page = outcome.files["report"].read_text(encoding="utf-8")
        assert 'id="sensitivity"' in page and "sensitivity of the targets" in page

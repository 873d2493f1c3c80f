"""Runs the example scripts (examples/gearbox_fleet.py, survey_latent_classes.py, water_quality.py)
and checks what they show against closed forms and brute force:

* an always-observed root factors out of every record's marginal likelihood, so its MLE is its
  share among the records and its MAP with pseudo-count c is (N + c) / (n + Kc) (Koller &
  Friedman 2009, ch. 17; counts by pandas); for the complete-case fit, over the complete rows;
* a leaf whose parents are always observed gets no information from the records where it is
  missing, so its MLE is the frequency among the records where it is observed (same argument);
* the latent class log-likelihood by brute force (numpy: sum over the classes of the product of
  the item probabilities of the answered items), the MLE property (the fit is at least as high as
  the simulation's truth), and invariance under relabelling of the classes;
* the gaps overview's shares against pandas.
"""

from __future__ import annotations

import importlib.util
import itertools
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

EXAMPLES = Path(__file__).resolve().parents[1] / "examples"


def _load(name: str):
    spec = importlib.util.spec_from_file_location(f"example_{name}", EXAMPLES / f"{name}.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def _share(series: pd.Series, states, pseudo: float = 0.0) -> np.ndarray:
    counts = series.value_counts().reindex(list(states), fill_value=0).to_numpy(float)
    return (counts + pseudo) / (counts.sum() + pseudo * len(states))


# ------------------------------------------------------------------ gearbox fleet (the Python API)
def test_gearbox_fleet(tmp_path, capsys):
    ex = _load("gearbox_fleet")
    out = ex.main(["--records", "1500", "--restarts", "2", "--out", str(tmp_path)])
    text = capsys.readouterr().out
    assert "EM cross-check: agree" in text and "engineering judgement" in text
    assert "would over-state the chance of heavy wear" in text
    net, res = out["network"], out["result"]
    df = pd.read_csv(out["data_path"], dtype=str, keep_default_na=False)
    assert len(df) == 1500 and res.n_rows == 1500
    # season: an always-observed root; MAP with one pseudo-count per cell (the demo prior's [default])
    np.testing.assert_allclose(res.probs["season"], _share(df["season"], net.node("season").states, 1.0), atol=1e-6)
    complete = df[(df != "").all(axis=1)]
    cmp = out["complete_case"]
    assert cmp.n_complete == len(complete)
    np.testing.assert_allclose(out["complete_case_fit"].probs["season"],
                               _share(complete["season"], net.node("season").states, 1.0), atol=1e-6)
    h = out["heavy"]
    assert h["complete_case"] > h["full"] + 0.03  # the inspected records over-represent worn bearings
    rec = int((df["bearing_wear"] != "").sum())
    se = math.sqrt(h["truth"] * (1 - h["truth"]) / rec)  # binomial SE over the recorded cells (rough bound)
    assert abs(h["full"] - h["truth"]) < 3 * se
    assert out["em_check"]["verdict"] == "agree"


# ------------------------------------------------------------------ survey latent classes
def _lc_loglik(ex, df: pd.DataFrame, probs) -> float:
    """Brute force: sum over classes of P(class) x product over answered items of P(answer | class)."""
    seg = np.asarray(probs["segment"])
    total = 0.0
    for _, row in df.iterrows():
        like = seg.copy()
        for item in ex.ITEMS:
            if row[item] != "":
                like = like * np.asarray(probs[item])[:, 1 if row[item] == "yes" else 0]
        total += math.log(like.sum())
    return total


def test_survey_latent_classes(capsys):
    ex = _load("survey_latent_classes")
    out = ex.main(["--customers", "600", "--restarts", "3", "--seed", "11"])
    text = capsys.readouterr().out
    assert "fitted state -> simulated segment" in text and "EM cross-check: agree" in text
    df, res = out["data"], out["result"]
    ll = _lc_loglik(ex, df, res.probs)
    assert res.log_likelihood == pytest.approx(ll, abs=1e-7)
    assert ll >= _lc_loglik(ex, df, ex.true_tables()) - 1e-9  # the MLE is at least as high as the truth
    # relabelling the classes changes nothing in the likelihood (every permutation, brute force)
    for perm in itertools.permutations(range(3)):
        p = {"segment": np.asarray(res.probs["segment"])[list(perm)],
             **{i: np.asarray(res.probs[i])[list(perm)] for i in ex.ITEMS}}
        assert _lc_loglik(ex, df, p) == pytest.approx(ll, abs=1e-7)
    assert out["loglik"]["relabelled"] == pytest.approx(out["loglik"]["fit"], abs=1e-8)
    # after matching, the fitted classes sit near the simulated ones (600 customers: a loose band)
    matched, truth = out["matched"], ex.true_tables()
    assert np.max(np.abs(np.asarray(matched["segment"]) - truth["segment"])) < 0.15
    for item in ex.ITEMS:
        assert np.max(np.abs(np.asarray(matched[item]) - truth[item])) < 0.2, item
    # every start ends at or below the best objective; the best is the one kept
    objs = [s["objective"] for s in out["starts"]]
    assert max(objs) == pytest.approx(res.objective_value, abs=1e-6)
    assert out["em_check"]["verdict"] == "agree"


# ------------------------------------------------------------------ water quality
def test_water_quality(capsys):
    ex = _load("water_quality")
    out = ex.main(["--days", "1200", "--seed", "5"])
    text = capsys.readouterr().out
    assert "Missingness patterns" in text and "would under-state the chance of murky water" in text
    df, net, full = out["data"], ex.NETWORK, out["full"]
    # the overview's shares against pandas; the station's two readings go missing together
    g = out["gaps"]
    for c in g.columns:
        assert c.share_missing == pytest.approx(float((df[c.name] == "").mean()), abs=1e-12), c.name
    assert ((df["turbidity"] == "") == (df["nitrate"] == "")).all()
    readings = {r.column: r for r in g.readings}
    assert readings["turbidity"].rejected and "rainfall" in readings["turbidity"].depends_on
    # closed forms: rainfall (always observed root) and turbidity (leaf, parents always observed)
    np.testing.assert_allclose(full.probs["rainfall"], _share(df["rainfall"], ("dry", "wet")), atol=1e-6)
    seen = df[df["turbidity"] != ""]
    for (i, r), (j, d) in itertools.product(enumerate(("dry", "wet")), enumerate(("low", "normal", "high"))):
        sub = seen[(seen["rainfall"] == r) & (seen["discharge"] == d)]
        np.testing.assert_allclose(full.probs["turbidity"][i, j], _share(sub["turbidity"], ("clear", "cloudy", "murky")),
                                   atol=1e-5, err_msg=f"{r}, {d}")
    complete = df[(df != "").all(axis=1)]
    np.testing.assert_allclose(out["complete_case_fit"].probs["rainfall"],
                               _share(complete["rainfall"], ("dry", "wet")), atol=1e-6)
    m = out["murky"]
    assert m["complete_case"] < m["full"]
    assert m["full"] == pytest.approx(float(ex.marginal(net, full.probs, "turbidity")[2]), abs=1e-12)


# ------------------------------------------------------------------ pump seals (noisy-OR and a tie)
def test_pump_seals_noisy_or(capsys):
    from test_emforms import brute_force_loglik

    ex = _load("pump_seals_noisy_or")
    out = ex.main(["--inspections", "300", "--seed", "4"])
    text = capsys.readouterr().out
    assert "EM check: agree" in text and "lower is better" in text
    df, noisy, table = out["data"], out["noisy"], out["table"]
    df = df.replace("", None)
    # the log-likelihood by brute force over the hidden cells (numpy/pandas, no adfit inference)
    assert noisy.log_likelihood == pytest.approx(brute_force_loglik(noisy.network, noisy.probs, df), abs=1e-8)
    # the noisy-OR is a sub-model of the full tables: its maximum cannot be higher
    assert noisy.log_likelihood <= table.log_likelihood + 1e-6
    # the implied table is Pearl's formula (1988, §4.3.2) at the reported parameters; the tie holds
    par = noisy.extras["nodes"]["seal_a"]["parameters"]
    for u in itertools.product((0, 1), repeat=3):
        sound = (1 - par["leak"]) * math.prod(1 - par["strength"][c]["yes"] for c, on in zip(ex.CAUSES, u) if on)
        np.testing.assert_allclose(noisy.probs["seal_a"][u], [sound, 1 - sound], atol=1e-12)
    np.testing.assert_array_equal(noisy.probs["seal_a"], noisy.probs["seal_b"])
    # BIC = −2 log L + k log n (Schwarz 1978), k = 3 causes + the seal's 1 leak + 3 strengths
    ic = out["ic_noisy"]
    assert ic.n_parameters == 3 + 4 and out["ic_table"].n_parameters == 3 + 2 * 8
    assert ic.bic == pytest.approx(-2 * noisy.log_likelihood + 7 * math.log(len(df)), rel=1e-12)

"""Runs examples/expert_prior.py and checks what it shows.

Checks: decomposability of the complete-data objective (a prior on one CPT changes that CPT
only), the closed form θ̂ = (N + c)/(N_u + Σc) (Koller & Friedman 2009, ch. 17) with counts by
pandas, and that with gaps the other estimates move, except an always-observed root, whose
likelihood term factors out of every record's marginal likelihood.
"""

from __future__ import annotations

import importlib.util
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

EXAMPLE = Path(__file__).resolve().parents[1] / "examples" / "expert_prior.py"


@pytest.fixture(scope="module")
def example():
    spec = importlib.util.spec_from_file_location("expert_prior_example", EXAMPLE)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def _counts(net, df, name):
    node = net.node(name)
    cols = list(node.parents) + [name]
    sub = df[(df[cols] != "").all(axis=1)]
    idx = pd.MultiIndex.from_product([net.node(c).states for c in cols], names=cols) if len(cols) > 1 \
        else pd.Index(node.states, name=name)
    return sub.groupby(cols).size().reindex(idx, fill_value=0).to_numpy(float).reshape(net.cpt_shape(name))


def test_expert_prior_example(example, capsys):
    out = example.main(["--records", "400", "--seed", "7"])
    text = capsys.readouterr().out
    assert "max |change|, complete" in text and "engineering judgement" in text
    net = example.NETWORK

    # complete records: only the node with the expert table moves
    moved = out["complete"]
    assert moved["vibration"] > 0.02
    for n in ("load", "wear", "oil_temp"):
        assert moved[n] < 1e-6, (n, moved[n])
    flat, expert = out["fits"]["complete"]
    df = out["data"]["complete"]
    for n in net.names:
        N = _counts(net, df, n)
        np.testing.assert_allclose(flat[n], (N + 1) / (N.sum(-1, keepdims=True) + N.shape[-1]), atol=1e-7)
    N = _counts(net, df, "vibration")
    c = example.STRENGTH * np.asarray(example.EXPERT_VIBRATION)
    np.testing.assert_allclose(expert["vibration"], (N + c) / (N + c).sum(-1, keepdims=True), atol=1e-7)

    # with 'wear' hidden in half the records: wear and oil_temp move too, load does not
    moved = out["gaps"]
    assert moved["vibration"] > 0.02 and moved["wear"] > 1e-3 and moved["oil_temp"] > 1e-3
    assert moved["load"] < 1e-6
    gaps = out["data"]["gaps"]
    assert (gaps["wear"] == "").mean() > 0.4
    N = _counts(net, gaps, "load")
    for fitted in out["fits"]["gaps"]:
        np.testing.assert_allclose(fitted["load"], (N + 1) / (N.sum() + 2), atol=1e-7)

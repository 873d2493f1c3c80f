"""The Python API: CPTs, standard errors and intervals as DataFrames, errors in Python terms, and
"did you mean" for names and labels one character or a case away."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from adfit.errors import DataError, NetworkError, OptionError, cli_terms, did_you_mean, similar_label


@pytest.fixture(scope="module")
def fitted():
    from adfit.fit import fit
    from adfit.network import parse_network
    from adfit.uncertainty import attach_uncertainty

    net = parse_network({"nodes": {"load": {"states": ["low", "high"]},
                                   "wear": {"states": ["none", "heavy"], "parents": ["load"]}}})
    df = pd.DataFrame({"load": ["low"] * 30 + ["high"] * 20,
                       "wear": ["none"] * 24 + ["heavy"] * 6 + ["none"] * 8 + ["heavy"] * 12})
    res = attach_uncertainty(fit(net, df), df)
    return net, df, res


def test_table_and_accessors_agree_with_closed_forms(fitted):
    net, df, res = fitted
    t = res.table("wear")
    assert list(t.columns) == ["estimate", "se", "lower", "upper"]
    assert t.index.names == ["load", "state"] and len(t) == 4
    # complete data: the MLE is the row share and its SE the binomial sqrt(p(1-p)/n) (closed form)
    p, n = 12 / 20, 20
    assert t.loc[("high", "heavy"), "estimate"] == pytest.approx(p, abs=1e-7)
    assert t.loc[("high", "heavy"), "se"] == pytest.approx(math.sqrt(p * (1 - p) / n), rel=1e-5)
    se = res.standard_errors("wear")
    lo, hi = res.intervals("wear")
    for wide, col in ((se, "se"), (lo, "lower"), (hi, "upper")):
        assert wide.shape == res.cpt("wear").shape
        assert list(wide.columns) == ["none", "heavy"] and list(wide.index) == ["low", "high"]
        np.testing.assert_allclose(wide.to_numpy().ravel(), t[col].to_numpy())
    assert (lo.to_numpy() <= res.cpt("wear").to_numpy()).all() and (res.cpt("wear").to_numpy() <= hi.to_numpy()).all()


def test_similar_labels_case_or_one_edit():
    states = ["none", "light", "heavy"]
    assert similar_label("Heavy", states) == "heavy"   # case only
    assert similar_label("hevy", states) == "heavy"    # one character removed
    assert similar_label("heavyy", states) == "heavy"  # one added
    assert similar_label("heavx", states) == "heavy"   # one changed
    assert similar_label("hxavx", states) is None      # two apart: no guess
    assert similar_label("of", ["on", "off"]) is None  # two candidates: no guess
    assert did_you_mean("Heavy", states) == "did you mean 'heavy'? " and did_you_mean("zzz", states) == ""


def test_node_names_get_did_you_mean_in_python_terms(fitted):
    net, df, res = fitted
    from adfit.impute import query

    with pytest.raises(NetworkError, match="did you mean 'wear'"):
        net.index("Wear")
    with pytest.raises(OptionError) as e:
        query(net, res.probs, {"Load": "high"}, ["wear"])
    msg = str(e.value)
    assert msg.startswith("given={'Load': 'high'}") and "did you mean 'load'" in msg and "--given" not in msg
    with pytest.raises(OptionError) as e:
        query(net, res.probs, {"load": "High"}, ["wear"])
    assert "did you mean 'high'" in str(e.value)
    with pytest.raises(OptionError) as e:
        query(net, res.probs, {"load": "high"}, ["wer"])
    assert str(e.value).startswith("targets=['wer']") and "did you mean 'wear'" in str(e.value)
    with cli_terms():  # the same error from the command line names the option
        with pytest.raises(OptionError) as e:
            query(net, res.probs, {"Load": "high"}, ["wear"])
    assert str(e.value).startswith("--given Load=high")


def test_data_column_options_get_did_you_mean(fitted):
    net, df, res = fitted
    from adfit.data import load_data

    with pytest.raises(DataError) as e:
        load_data(net, df.assign(pump_id=1), ignore_columns=["pump-id"])
    assert "did you mean 'pump_id'" in str(e.value) and "ignore_columns=" in str(e.value)
    with pytest.raises(DataError, match="did you mean 'count'"):
        load_data(net, df.assign(count=1), count_column="cout")
    with pytest.raises(DataError, match=r"did you mean 'weap' for 'wear'"):
        load_data(net, df.rename(columns={"wear": "weap"}))


def test_show_node_option_did_you_mean(fitted):
    from adfit.show import check_nodes

    net, df, res = fitted
    with pytest.raises(OptionError) as e:
        check_nodes(res, ["Wear"])
    assert str(e.value).startswith("nodes=['Wear']") and "did you mean 'wear'" in str(e.value)
    with cli_terms(), pytest.raises(OptionError) as e:
        check_nodes(res, ["Wear"])
    assert str(e.value).startswith("--node Wear")

"""Network file (TOML) parsing, validation and the CPT table layout.

External references used here:
- the row-major ("C order", last index fastest) convention of numpy.ravel_multi_index and the
  documented order of itertools.product (the rightmost element advances on every iteration);
- the TOML 1.0 specification (tomllib) for what is and is not a valid document.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from adfit.errors import AdfitError, NetworkError
from adfit.network import Network, Node, load_network, network_from_dict, parse_network

WEAR = """
[nodes.load]
states = ["low", "high"]

[nodes.lube]
states = ["ok", "poor", "dry"]

[nodes.wear]
states = ["none", "light", "heavy"]
parents = ["load", "lube"]

[nodes.crack]
states = ["no", "yes"]
parents = ["wear"]
latent = true
"""


def write(tmp_path, text, name="net.toml", encoding="utf-8"):
    p = tmp_path / name
    p.write_bytes(text.encode(encoding))
    return p


def one_line_error(exc_info) -> str:
    msg = str(exc_info.value)
    assert "\n" not in msg and msg.strip() == msg and msg, f"not a one-line message: {msg!r}"
    assert isinstance(exc_info.value, AdfitError)
    return msg


# ------------------------------------------------------------------ parsing
def test_parse_basic(tmp_path):
    net = load_network(write(tmp_path, WEAR))
    assert net.names == ("load", "lube", "wear", "crack")
    assert net.cards == (2, 3, 3, 2)
    assert net.node("wear").parents == ("load", "lube")
    assert net.cpt_shape("wear") == (2, 3, 3)
    assert net.latent_names == ("crack",)
    assert net.observed_names == ("load", "lube", "wear")
    assert net.free_names == net.names and net.fixed_names == ()
    # (card - 1) free parameters per parent configuration, counted by hand:
    # load 1, lube 2, wear 6*2, crack 3*1
    assert net.n_free_parameters() == 1 + 2 + 12 + 3
    assert net.parent_indices == ((), (), (0, 1), (2,))
    assert net.children == ((2,), (2,), (3,), ())


def test_topological_order_keeps_file_order_among_ready_nodes():
    net = network_from_dict({
        "c": {"states": ["0", "1"], "parents": ["b"]},
        "a": {"states": ["0", "1"]},
        "b": {"states": ["0", "1"], "parents": ["a"]},
        "d": {"states": ["0", "1"]},
    })
    # a is the first ready node, then b (now ready, earlier in the file than d), then c, then d
    assert net.names == ("a", "b", "c", "d")


def test_bom_is_accepted(tmp_path):
    net = load_network(write(tmp_path, WEAR, encoding="utf-8-sig"))
    assert net.names[0] == "load"


def test_integer_states_become_text():
    net = network_from_dict({"x": {"states": [1, 2, 3]}})
    assert net.node("x").states == ("1", "2", "3")


def test_network_metadata_table_is_allowed():
    net = parse_network({"network": {"title": "gearbox"}, "nodes": {"x": {"states": ["a", "b"]}}})
    assert net.names == ("x",)


def test_fixed_table_flat_list_for_root(tmp_path):
    net = network_from_dict({"x": {"states": ["a", "b", "c"], "fixed": [0.2, 0.3, 0.5]}})
    np.testing.assert_allclose(net.fixed_table("x"), [0.2, 0.3, 0.5])
    assert net.fixed_names == ("x",) and net.free_names == ()
    assert net.n_free_parameters() == 0


# ----------------------------------------------------------- table layout
def test_table_layout_is_row_major_last_parent_fastest():
    net = network_from_dict({
        "a": {"states": ["a0", "a1"]},
        "b": {"states": ["b0", "b1", "b2"]},
        "c": {"states": ["c0", "c1"], "parents": ["a", "b"]},
    })
    # A hand-written table: row r is the distribution given the r-th parent configuration in
    # the order (a0,b0) (a0,b1) (a0,b2) (a1,b0) (a1,b1) (a1,b2).
    rows = [[0.10, 0.90], [0.20, 0.80], [0.30, 0.70], [0.40, 0.60], [0.50, 0.50], [0.60, 0.40]]
    arr = net.table_to_array("c", rows)
    assert arr.shape == (2, 3, 2)
    for i, j in itertools.product(range(2), range(3)):
        r = i * 3 + j  # last parent fastest, written out by hand
        np.testing.assert_array_equal(arr[i, j], rows[r])
        assert np.ravel_multi_index((i, j), (2, 3)) == r  # numpy's C order agrees
    assert net.parent_config_labels("c") == list(itertools.product(["a0", "a1"], ["b0", "b1", "b2"]))
    assert net.array_to_table("c", arr) == rows
    assert net.n_parent_configs("c") == 6


def test_fixed_table_with_parents_round_trips_through_to_dict():
    rows = [[1.0, 0.0], [0.25, 0.75], [0.5, 0.5], [0.0, 1.0], [0.125, 0.875], [0.3, 0.7]]
    spec = {
        "a": {"states": ["a0", "a1"]},
        "b": {"states": ["b0", "b1", "b2"]},
        "c": {"states": ["c0", "c1"], "parents": ["a", "b"], "fixed": rows},
        "h": {"states": ["u", "v"], "parents": ["c"], "latent": True},
    }
    net = network_from_dict(spec)
    assert net.fixed_table("c")[1, 0].tolist() == rows[3]
    d = net.to_dict()
    assert d["nodes"]["c"]["fixed"] == rows
    assert d["nodes"]["h"] == {"states": ["u", "v"], "parents": ["c"], "latent": True}
    again = parse_network(d)
    assert again == net and hash(again) == hash(net)


def test_array_to_table_rejects_wrong_shape():
    net = network_from_dict({"a": {"states": ["0", "1"]}, "b": {"states": ["0", "1", "2"], "parents": ["a"]}})
    with pytest.raises(NetworkError) as e:
        net.array_to_table("b", np.ones((3, 2)) / 2)
    assert "'b'" in one_line_error(e) and "(2, 3)" in str(e.value)


def test_network_is_hashable_and_compared_by_value():
    a = network_from_dict({"x": {"states": ["a", "b"]}})
    b = network_from_dict({"x": {"states": ["a", "b"]}})
    c = network_from_dict({"x": {"states": ["b", "a"]}})
    assert a == b and hash(a) == hash(b) and a != c
    assert {a: 1}[b] == 1


def test_direct_construction_checks_invariants():
    with pytest.raises(NetworkError) as e:
        Network((Node("b", ("0", "1"), ("a",)), Node("a", ("0", "1"))))
    assert "topological" in one_line_error(e)
    with pytest.raises(NetworkError) as e:
        Network((Node("a", ("0", "1"), ("zz",)),))
    assert "'zz'" in one_line_error(e)
    with pytest.raises(NetworkError) as e:
        Network((Node("a", ("0", "0")),))
    one_line_error(e)
    with pytest.raises(NetworkError) as e:
        Network((Node("a", ("0", "1"), fixed=(1.0,)),))
    assert "entries" in one_line_error(e)
    with pytest.raises(NetworkError) as e:
        Network((Node("a", ("0", "1")), Node("a", ("0", "1"))))
    assert "twice" in one_line_error(e)


# ---------------------------------------------------------------- errors
@pytest.mark.parametrize("spec, needles", [
    ({"a": {"states": ["x", "y"], "parents": ["b"]}}, ["'a'", "unknown parent 'b'"]),
    ({"a": {"states": ["x", "y", "x"]}}, ["nodes.a.states", "duplicate", "'x'"]),
    ({"a": {"states": [1, "1"]}}, ["duplicate", "'1'"]),
    ({"a": {"states": ["x"]}}, ["at least 2"]),
    ({"a": {"states": "xy"}}, ["at least 2"]),
    ({"a": {}}, ["nodes.a.states"]),
    ({"a": {"states": ["x", ""]}}, ["empty label"]),
    ({"a": {"states": ["x", " y"]}}, ["' y'", "spaces"]),
    ({"a": {"states": ["x", 1.5]}}, ["strings"]),
    ({"a": {"states": ["x", True]}}, ["strings"]),
    ({"a": {"states": ["x", "y"], "latent": "yes"}}, ["latent", "true or false"]),
    ({"a": {"states": ["x", "y"], "parents": "b"}}, ["parents", "list"]),
    ({"a": {"states": ["x", "y"]}, "b": {"states": ["x", "y"], "parents": ["a", "a"]}}, ["twice"]),
    ({"a": {"states": ["x", "y"], "parents": ["a"]}}, ["cycle a -> a"]),
    ({"a": {"states": ["x", "y"], "colour": "red"}}, ["unknown key", "colour"]),
    ({"1a": {"states": ["x", "y"]}}, ["'1a'", "identifier"]),
    ({"a b": {"states": ["x", "y"]}}, ["'a b'", "identifier"]),
    ({"a": ["x", "y"]}, ["nodes.a must be a table"]),
])
def test_node_errors(spec, needles):
    with pytest.raises(NetworkError) as e:
        network_from_dict(spec)
    msg = one_line_error(e)
    for n in needles:
        assert n in msg, (n, msg)


def test_cycle_is_named_in_parent_to_child_order():
    spec = {
        "ok": {"states": ["0", "1"]},
        "a": {"states": ["0", "1"], "parents": ["c"]},
        "b": {"states": ["0", "1"], "parents": ["a", "ok"]},
        "c": {"states": ["0", "1"], "parents": ["b"]},
        "tail": {"states": ["0", "1"], "parents": ["c"]},  # depends on the cycle, is not on it
    }
    with pytest.raises(NetworkError) as e:
        network_from_dict(spec)
    msg = one_line_error(e)
    cyc = msg.split("cycle: ")[1].split(";")[0].split(" -> ")
    assert cyc[0] == cyc[-1] and sorted(cyc[:-1]) == ["a", "b", "c"]
    for parent, child in zip(cyc, cyc[1:]):  # each arrow goes from a parent to its child
        assert parent in spec[child]["parents"]


@pytest.mark.parametrize("fixed, needles", [
    ([[0.5, 0.5], [0.5, 0.6]], ["'b'", "row 2", "a=a1", "sums to 1.1"]),
    ([[0.5, 0.5]], ["'b'", "shape [1, 2]", "2 row(s) of 2"]),
    ([[0.5, 0.5, 0.0], [0.5, 0.5, 0.0]], ["shape [2, 3]"]),
    ([0.5, 0.5, 0.5, 0.5], ["shape [4]"]),
    ([[0.5, 0.5], [1.5, -0.5]], ["row 2", "negative", "-0.5", "state 'y'"]),
    ([[0.5, 0.5], [0.5]], ["ragged"]),
    ([[0.5, 0.5], ["0.5", 0.5]], ["'0.5'", "not a number"]),
    ([[0.5, 0.5], [True, False]], ["True", "not a number"]),
    ([[0.5, 0.5], [float("nan"), 1.0]], ["non-finite"]),
    ([[[0.5, 0.5]], [[0.5, 0.5]]], ["shape [2, 1, 2]"]),
])
def test_fixed_table_errors(fixed, needles):
    spec = {"a": {"states": ["a0", "a1"]}, "b": {"states": ["x", "y"], "parents": ["a"], "fixed": fixed}}
    with pytest.raises(NetworkError) as e:
        network_from_dict(spec)
    msg = one_line_error(e)
    for n in needles:
        assert n in msg, (n, msg)


@pytest.mark.parametrize("doc, needle", [
    ({}, "no [nodes.NAME]"),
    ({"nodes": {}}, "at least one"),
    ({"nodes": {"a": {"states": ["x", "y"]}}, "extra": 1}, "unknown top-level key"),
    ({"nodes": {"a": {"states": ["x", "y"]}}, "network": 3}, "'network' must be a table"),
])
def test_document_errors(doc, needle):
    with pytest.raises(NetworkError) as e:
        parse_network(doc)
    assert needle in one_line_error(e)


@pytest.mark.parametrize("text, needles", [
    ("[nodes.a]\nstates = [\"x\", \"y\"\n", ["not valid TOML", "end of document"]),
    ("[nodes.a]\nstates = [\"x\" \"y\"]\n", ["not valid TOML", "line 2"]),
    ("[nodes.a]\nstates = [\"x\", \"y\"]\n[nodes.a]\nstates = [\"x\", \"y\"]\n", ["not valid TOML", "line 3"]),
    ("", ["no [nodes.NAME]"]),
])
def test_file_errors(tmp_path, text, needles):
    p = write(tmp_path, text)
    with pytest.raises(NetworkError) as e:
        load_network(p)
    msg = one_line_error(e)
    assert str(p) in msg
    for n in needles:
        assert n in msg, (n, msg)


def test_missing_and_unreadable_files(tmp_path):
    with pytest.raises(NetworkError) as e:
        load_network(tmp_path / "nope.toml")
    assert "not found" in one_line_error(e)
    with pytest.raises(NetworkError) as e:
        load_network(tmp_path)
    assert "cannot read" in one_line_error(e)
    p = tmp_path / "latin.toml"
    p.write_bytes('[nodes.a]\nstates = ["gr\xfcn", "rot"]\n'.encode("latin-1"))
    with pytest.raises(NetworkError) as e:
        load_network(p)
    assert "UTF-8" in one_line_error(e)


def test_index_of_unknown_node():
    net = network_from_dict({"x": {"states": ["a", "b"]}})
    with pytest.raises(NetworkError) as e:
        net.index("y")
    assert "'y'" in one_line_error(e)


# ------------------------------------------------- random DAGs (hypothesis)
@st.composite
def dags(draw):
    n = draw(st.integers(1, 7))
    names = [f"v{i}" for i in range(n)]
    spec = {}
    for i, name in enumerate(names):  # parents only among earlier names: acyclic by construction
        parents = draw(st.lists(st.sampled_from(names[:i]), unique=True, max_size=min(3, i))) if i else []
        card = draw(st.integers(2, 4))
        spec[name] = {"states": [f"s{k}" for k in range(card)], "parents": parents}
    order = draw(st.permutations(names))  # the file may list the nodes in any order
    return {k: spec[k] for k in order}


@settings(max_examples=60, deadline=None)
@given(dags())
def test_random_dags_sort_and_round_trip(spec):
    net = network_from_dict(spec)
    pos = {n: i for i, n in enumerate(net.names)}
    assert set(net.names) == set(spec)
    for n in net.nodes:
        assert all(pos[p] < pos[n.name] for p in n.parents)
        assert net.cpt_shape(n.name) == tuple(len(spec[p]["states"]) for p in n.parents) + (n.card,)
        assert net.n_parent_configs(n.name) == math.prod(len(spec[p]["states"]) for p in n.parents)
    assert parse_network(net.to_dict()) == net


# --------------------------------------------------------------------------- structured-CPT keys
STRUCTURED = {
    "wear": {"states": ["low", "mid", "high"]},
    "load": {"states": ["no", "yes"]},
    "fault": {"states": ["absent", "present"], "parents": ["wear", "load"], "cpd": "noisy_or"},
    "fault2": {"states": ["absent", "present"], "parents": ["wear", "load"], "tied_to": "fault"},
    "gauge": {"states": ["a", "b", "c"], "parents": ["wear"], "increasing_with": ["wear"],
              "impossible": [{"given": {"wear": "low"}, "state": "c"}, {"given": {"wear": "high"}, "state": "a"}]},
}


def test_structured_keys_parse_and_round_trip():
    import copy

    net = parse_network({"nodes": copy.deepcopy(STRUCTURED)})
    assert net.node("fault").cpd == "noisy_or" and net.cpd_form("fault2") == "noisy_or"
    assert net.tie_source("fault2") == "fault" and net.tie_source("fault") == "fault"
    # rows in the module's layout (wear's states in order): low forbids c, high forbids a
    assert net.node("gauge").impossible == ((0, 2), (2, 0))
    assert net.impossible_mask("gauge").tolist() == [[False, False, True], [False] * 3, [True, False, False]]
    assert net.is_structured and not parse_network({"nodes": {"a": {"states": ["x", "y"]}}}).is_structured
    assert parse_network(net.to_dict()) == net
    # a parent left out of `given` stands for each of its states
    d = copy.deepcopy(STRUCTURED)
    d["gauge"]["impossible"] = [{"state": "c"}]
    assert parse_network({"nodes": d}).node("gauge").impossible == ((0, 2), (1, 2), (2, 2))


@pytest.mark.parametrize("change, expected", [
    (lambda d: d["fault"].update(cpd="noisy"), "nodes.fault.cpd is 'noisy'"),
    (lambda d: d["gauge"].update(cpd="noisy_or"), "nodes.gauge.cpd = 'noisy_or' needs a two-state node"),
    (lambda d: d["fault2"].update(tied_to="gauge"), "nodes.fault2.tied_to: 'fault2' has states"),
    (lambda d: d["fault2"].update(tied_to="nowhere"), "nodes.fault2.tied_to is 'nowhere', which is not a node"),
    (lambda d: d["fault2"].update(tied_to="fault2"), "nodes.fault2.tied_to names the node itself"),
    (lambda d: d["gauge"].update(impossible=[{"state": "a"}, {"state": "b"}, {"state": "c", "given": {"wear": "mid"}}]),
     "nodes.gauge.impossible makes every state impossible in the row wear=mid"),
    (lambda d: d["gauge"].update(increasing_with=["load"]), "nodes.gauge.increasing_with names 'load', which is not a parent"),
    (lambda d: d["gauge"].update(impossible=[{"state": "z"}]), "nodes.gauge.impossible[0].state is 'z'"),
    (lambda d: d["gauge"].update(impossible=[{"state": "a", "given": {"load": "no"}}]),
     "nodes.gauge.impossible[0].given names 'load'"),
    (lambda d: d["wear"].update(fixed=[0.2, 0.3, 0.5], cpd="logistic"), "nodes.wear has a fixed table and cpd"),
    (lambda d: d["fault"].update(parents=[]), None),  # noisy_or without parents
])
def test_structured_keys_that_do_not_fit_the_node_are_refused(change, expected):
    import copy

    d = copy.deepcopy(STRUCTURED)
    change(d)
    if expected is None:
        d.pop("fault2")
        expected = "nodes.fault.cpd = 'noisy_or' needs at least one parent"
    with pytest.raises(NetworkError) as e:
        parse_network({"nodes": d}, source="plant.toml")
    msg = str(e.value)
    assert msg.startswith("plant.toml: ") and expected in msg and "\n" not in msg


def test_structured_nodes_are_refused_by_estimators_that_cannot_fit_them_yet():
    """Until a form is estimated, fitting it as a full table would silently give other numbers."""
    import copy
    import pandas as pd

    from adfit.em import em_fit
    from adfit.fit import fit

    d = copy.deepcopy(STRUCTURED)
    # both estimators fit the forms, ties and impossible cells (tests/test_noisy.py,
    # test_logistic.py, test_emforms.py); monotone nodes only the gradient fit (test_monotone.py)
    net = parse_network({"nodes": {k: d[k] for k in ("wear", "gauge")}})
    df = pd.DataFrame({"wear": ["low", "high"], "gauge": ["a", "b"]})
    with pytest.raises(NetworkError, match="nodes.gauge.increasing_with: EM cannot estimate this structured CPT yet"):
        em_fit(net, df)


def test_network_title_is_read_kept_out_of_identity_and_embedded(tmp_path):
    from adfit.errors import NetworkError
    from adfit.network import parse_network

    body = {"nodes": {"a": {"states": ["x", "y"]}}}
    net = parse_network({"network": {"title": "  Gearbox fleet "}, **body})
    assert net.title == "Gearbox fleet"
    plain = parse_network(body)
    assert plain.title is None and net == plain and hash(net) == hash(plain)  # same network, whatever its title
    assert parse_network(net.to_dict()).title == "Gearbox fleet"  # embedded in result files and read back
    assert "network" not in plain.to_dict()
    for bad in (3, "", "  "):
        with pytest.raises(NetworkError, match=r"\[network\] title must be a non-empty string"):
            parse_network({"network": {"title": bad}, **body})

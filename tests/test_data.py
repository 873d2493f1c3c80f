"""Reading, coding and reducing data (adfit.data).

External references used here:
- pandas ``DataFrame.value_counts(dropna=False)`` / ``groupby(...).size()`` for the distinct rows
  and their counts, and ``numpy.lexsort`` for the lexicographic row order;
- the Palmer penguins data (PyPI package ``palmerpenguins``, Horst, Hill & Gorman 2020): 344
  birds, 152 Adelie, 68 Chinstrap, 124 Gentoo, 11 without a recorded sex (from memory, and
  checked against pandas on the shipped file below);
- the CSV rules of RFC 4180 (quoted fields may hold commas and line breaks, "" is a quote),
  written out by Python's ``csv`` module.
"""

from __future__ import annotations

import csv
import io

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from palmerpenguins import load_penguins

from adfit.data import (HIDDEN, CodedData, decode, encode_frame, load_data, missing_markers, read_table,
                        reduce_rows, resolve_inputs)
from adfit.errors import AdfitError, DataError
from adfit.network import network_from_dict

NET = network_from_dict({
    "load": {"states": ["low", "high"]},
    "wear": {"states": ["none", "light", "heavy"], "parents": ["load"]},
    "fault": {"states": ["no", "yes"], "parents": ["wear"], "latent": True},
    "temp": {"states": ["1", "2", "10"], "parents": ["wear"]},
})


def one_line(e) -> str:
    msg = str(e.value)
    assert isinstance(e.value, AdfitError) and msg and "\n" not in msg, repr(msg)
    return msg


def write(tmp_path, text, name="d.csv", encoding="utf-8"):
    p = tmp_path / name
    p.write_bytes(text.encode(encoding))
    return p


def as_counts(network, cd: CodedData) -> pd.Series:
    """Distinct rows as labels (missing = '<gap>') -> count, for comparing with pandas."""
    df = decode(network, cd.codes).fillna("<gap>")
    return pd.Series(cd.counts, index=pd.MultiIndex.from_frame(df)).sort_index()


def pandas_counts(df: pd.DataFrame, cols, missing=("", "NA", "NaN", "?")) -> pd.Series:
    d = df[list(cols)].astype(object).where(df[list(cols)].notna(), "<gap>")
    d = d.map(lambda v: "<gap>" if str(v).strip() in missing else str(v).strip())
    return d.value_counts(dropna=False).astype(float).sort_index().rename(None)


# ------------------------------------------------------------- penguins
PENG = network_from_dict({
    "species": {"states": ["Adelie", "Chinstrap", "Gentoo"]},
    "island": {"states": ["Biscoe", "Dream", "Torgersen"], "parents": ["species"]},
    "sex": {"states": ["female", "male"], "parents": ["species"]},
    "year": {"states": [2007, 2008, 2009]},
})
PCOLS = ["species", "island", "sex", "year"]


@pytest.fixture(scope="module")
def penguins():
    return load_penguins()[PCOLS]


def test_penguin_counts_equal_pandas(penguins):
    cd = encode_frame(PENG, penguins)
    assert cd.n_rows == 344
    species = pd.Series(cd.counts).groupby(cd.codes[:, 0]).sum()
    assert species.tolist() == [152, 68, 124]  # Horst et al. (2020), from memory
    assert cd.counts[cd.codes[:, PENG.index("sex")] == HIDDEN].sum() == 11  # from memory
    ref = penguins.astype(object).where(penguins.notna(), "<gap>").astype(str).value_counts().sort_index()
    got = as_counts(PENG, cd)
    assert got.index.tolist() == ref.index.tolist()
    np.testing.assert_array_equal(got.to_numpy(), ref.to_numpy(dtype=float))
    # inverse maps every record to its distinct row
    dec = decode(PENG, cd.codes[cd.inverse])
    np.testing.assert_array_equal(dec["island"].to_numpy(), penguins["island"].to_numpy())
    np.testing.assert_array_equal(dec["year"].to_numpy(), penguins["year"].astype(str).to_numpy())


def test_penguins_csv_equals_parquet_equals_frame(tmp_path, penguins):
    penguins.to_csv(tmp_path / "p.csv", index=False)
    penguins.to_parquet(tmp_path / "p.parquet", index=False)
    a = load_data(PENG, tmp_path / "p.csv")
    b = load_data(PENG, tmp_path / "p.parquet")
    c = load_data(PENG, penguins)
    for x in (b, c):
        np.testing.assert_array_equal(a.codes, x.codes)
        np.testing.assert_array_equal(a.counts, x.counts)
        np.testing.assert_array_equal(a.inverse, x.inverse)
    assert a.codes.dtype == np.int8 and a.counts.dtype == np.float64


def test_pre_aggregated_penguins_equal_raw(penguins):
    agg = (penguins.astype(object).where(penguins.notna(), "NA").groupby(PCOLS).size()
           .rename("n").reset_index())
    a = encode_frame(PENG, penguins)
    b = encode_frame(PENG, agg, count_column="n")
    np.testing.assert_array_equal(a.codes, b.codes)
    np.testing.assert_array_equal(a.counts, b.counts)
    assert b.inverse is None


# -------------------------------------------------------------- reduction
def test_reduce_rows_matches_pandas_groupby_and_lexicographic_order():
    rng = np.random.default_rng(0)
    cards = (2, 3, 4)
    codes = np.stack([rng.integers(-1, c, 500) for c in cards], axis=1).astype(np.int32)
    w = rng.random(500)
    d, c, inv = reduce_rows(codes, w, cards)
    ref = pd.DataFrame(codes).assign(w=w).groupby([0, 1, 2]).w.sum()  # groupby sorts its keys
    np.testing.assert_array_equal(d, np.array(ref.index.tolist()))
    np.testing.assert_allclose(c, ref.to_numpy(), rtol=1e-12)
    np.testing.assert_array_equal(d[inv], codes)
    order = np.lexsort(d.T[::-1])  # numpy's lexicographic order, first column most significant
    np.testing.assert_array_equal(order, np.arange(len(d)))


def test_reduce_rows_fallback_when_the_packed_key_would_overflow():
    rng = np.random.default_rng(1)
    cards = (9,) * 20  # 10**20 > 2**63: the packed row needs two int64 words
    codes = rng.integers(-1, 2, (300, 20)).astype(np.int32)
    codes = np.concatenate([codes, codes[:50]])
    d, c, inv = reduce_rows(codes, None, cards)
    ref = pd.DataFrame(codes).value_counts().sort_index()
    np.testing.assert_array_equal(d, np.array(ref.index.tolist()))
    np.testing.assert_array_equal(c, ref.to_numpy(dtype=float))
    np.testing.assert_array_equal(d[inv], codes)


def test_reduce_rows_empty():
    d, c, inv = reduce_rows(np.zeros((0, 3), np.int32), None, (2, 2, 2))
    assert d.shape == (0, 3) and c.shape == (0,) and inv.shape == (0,)


@settings(max_examples=40, deadline=None)
@given(st.lists(st.tuples(st.sampled_from(["low", "high", "", "NA", " high", "?"]),
                          st.sampled_from(["none", "light", "heavy", "NaN", "", "light "]),
                          st.sampled_from(["1", "2", "10", "", "?"])), min_size=1, max_size=40))
def test_random_frames_match_value_counts(rows):
    df = pd.DataFrame(rows, columns=["load", "wear", "temp"])
    cd = encode_frame(NET, df)
    assert cd.codes[:, NET.index("fault")].tolist() == [HIDDEN] * cd.n_distinct
    got = as_counts(NET, cd)
    ref = pandas_counts(df, ["load", "wear", "temp"])
    assert got.index.tolist() == ref.index.tolist()
    np.testing.assert_array_equal(got.to_numpy(), ref.to_numpy())


# ------------------------------------------------------------ CSV details
def test_csv_whitespace_bom_crlf_blank_lines_and_quotes(tmp_path):
    text = ("\ufeff load , wear ,temp\r\n"
            "low, none ,1\r\n"
            "\r\n"
            '"high","li""ght",2\r\n'  # not a state once unquoted: li"ght
            )
    p = write(tmp_path, text)
    with pytest.raises(DataError) as e:
        load_data(NET, p)
    msg = one_line(e)
    assert "line 4 (data row 2)" in msg and "'li\"ght'" in msg and "'wear'" in msg
    p = write(tmp_path, text.replace('"li""ght"', '"light"') + "  high  ,  heavy  ,  10  \r\n\r\n")
    cd = load_data(NET, p)
    assert as_counts(NET, cd).to_dict() == {("high", "heavy", "10"): 1.0, ("high", "light", "2"): 1.0,
                                            ("low", "none", "1"): 1.0}


def test_label_error_points_at_the_right_line(tmp_path):
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerows([["load", "wear", "temp", "note"], ["low", "none", "1", ""]])
    buf.write("\n\n")  # two empty lines: skipped, but they are lines of the file
    w.writerows([["low", "light", "2", 'say "hi",\nthen\nstop'], ["low", "heavy", "1", "ok"],
                 ["low", "hevy", "10", ""], ["high", "none", "2", ""]])
    text = buf.getvalue()
    # line 1 header, 2 first record, 3-4 empty, 5-7 one record with a quoted two-line note, 8, then 9
    assert text.split("\n")[8] == "low,hevy,10,"
    p = write(tmp_path, text)
    with pytest.raises(DataError) as e:
        load_data(NET, p, ignore_columns=["note"])
    msg = one_line(e)
    assert f"{p}: line 9 (data row 4), column 'wear': label 'hevy' is not a state of 'wear'" in msg
    # from Python the fix is spelled as the keyword; "hevy" is one letter from "heavy"
    assert "did you mean 'heavy'?" in msg and "missing=['hevy']" in msg and "--missing" not in msg
    with pytest.raises(DataError) as e:
        load_data(NET, pd.read_csv(p, dtype=str, keep_default_na=False), ignore_columns=["note"])
    assert "<DataFrame>: data row 4, column 'wear'" in one_line(e)


def test_parquet_label_error_names_the_data_row(tmp_path):
    df = pd.DataFrame({"load": ["low", "high", "low"], "wear": ["none", "none", "worn"], "temp": [1, 2, 10]})
    df.to_parquet(tmp_path / "d.parquet")
    with pytest.raises(DataError) as e:
        load_data(NET, tmp_path / "d.parquet")
    assert "d.parquet: data row 3, column 'wear': label 'worn'" in one_line(e)


@pytest.mark.parametrize("text, needles", [
    ("", ["the file is empty"]),
    ("\n\n", ["the file is empty"]),
    ("load,wear,temp\n", ["no records"]),
    ("load,wear,temp\nlow,none\n", ["line 2 has 2 field(s), the header has 3"]),
    ("load,wear,temp\nlow,none,1\nlow,none,1,1\n", ["line 3 has 4 field(s), the header has 3"]),
    ("load,wear,temp\nlow,none,1\n   \n", ["line 3 has 1 field(s)"]),
    ("load,wear,temp,\nlow,none,1,\n", ["column 4 has an empty name"]),
    ("load,wear,wear,temp\nlow,none,none,1\n", ["['wear'] appear more than once"]),
    ("load,wear\nlow,none\n", ["['temp'] are missing"]),
    ("load,wear,Temp\nlow,none,1\n", ["['temp'] are missing", "'Temp' for 'temp'"]),
    ("load,wear,temp,note\nlow,none,1,x\n", ["['note'] are not nodes", "ignore_columns=['note']"]),
    ("load,wear,temp,fault\nlow,none,1,no\n", ["'fault' is a latent node"]),
    ("load,wear,temp\nlow,none,01\n", ["line 2 (data row 1), column 'temp': label '01'"]),
    ("load,wear,temp\nlow,none,1.0\n", ["label '1.0'"]),
    ("load,wear,temp\nlow,none,n/a\n", ["label 'n/a'", "missing=['n/a']"]),
])
def test_csv_errors(tmp_path, text, needles):
    p = write(tmp_path, text)
    with pytest.raises(DataError) as e:
        load_data(NET, p)
    msg = one_line(e)
    assert msg.startswith(str(p)), msg
    for n in needles:
        assert n in msg, (n, msg)


def test_file_level_errors(tmp_path):
    with pytest.raises(DataError) as e:
        load_data(NET, tmp_path / "none.csv")
    assert "not found" in one_line(e)
    p = tmp_path / "latin.csv"
    p.write_bytes("load,wear,temp\nl\xf6w,none,1\n".encode("latin-1"))
    with pytest.raises(DataError) as e:
        load_data(NET, p)
    assert "not UTF-8" in one_line(e)
    p = write(tmp_path, "not parquet", name="x.parquet")
    with pytest.raises(DataError) as e:
        load_data(NET, p)
    assert "Parquet" in one_line(e)
    (tmp_path / "empty").mkdir()
    with pytest.raises(DataError) as e:
        load_data(NET, tmp_path / "empty")
    assert "no .csv or .parquet" in one_line(e)
    with pytest.raises(DataError) as e:
        load_data(NET, tmp_path / "nothing*.csv")
    assert "no file matches" in one_line(e)


def test_read_table_keeps_text(tmp_path):
    p = write(tmp_path, " a , b \n01, x \n,2\n")
    df = read_table(p)
    assert list(df.columns) == ["a", "b"]
    assert df["a"].tolist() == ["01", ""] and df["b"].tolist() == [" x ", "2"]


# ------------------------------------------------------- missing markers
def test_default_and_custom_missing_markers():
    df = pd.DataFrame({"load": ["low", "NA", "", "?", None, "n/a"], "wear": ["none"] * 6, "temp": ["1"] * 6})
    with pytest.raises(DataError) as e:
        encode_frame(NET, df)
    assert "data row 6" in one_line(e) and "'n/a'" in one_line(e)
    cd = encode_frame(NET, df.iloc[:5])
    assert cd.counts[cd.codes[:, 0] == HIDDEN].sum() == 4
    # --missing replaces NA, NaN and ?; an empty cell and a null stay missing
    with pytest.raises(DataError) as e:
        encode_frame(NET, df, missing=["n/a"])
    assert "data row 2" in one_line(e) and "label 'NA'" in one_line(e)
    cd = encode_frame(NET, df.drop(index=[1, 3]), missing=["n/a"])
    assert cd.counts[cd.codes[:, 0] == HIDDEN].sum() == 3
    assert missing_markers(["-9"]) == {"", "-9"}
    assert missing_markers(None) == {"", "NA", "NaN", "?"}


def test_a_state_that_is_also_a_missing_marker_is_an_error():
    net = network_from_dict({"answer": {"states": ["yes", "no", "NA"]}})
    with pytest.raises(DataError) as e:
        encode_frame(net, pd.DataFrame({"answer": ["yes", "NA"]}))
    assert "'NA'" in one_line(e) and "missing=['?']" in one_line(e)
    cd = encode_frame(net, pd.DataFrame({"answer": ["yes", "NA", "?"]}), missing=["?"])
    assert cd.codes[:, 0].tolist() == [HIDDEN, 0, 2]


# ------------------------------------------------------- typed columns
def test_numeric_and_boolean_columns():
    net = network_from_dict({"n": {"states": ["1", "2", "10"]}, "f": {"states": ["0.5", "1"]},
                             "b": {"states": ["false", "true"]}})
    df = pd.DataFrame({"n": [1, 2.0, 10, np.nan], "f": [0.5, 1.0, np.nan, 0.5], "b": [True, False, None, True]})
    cd = encode_frame(net, df)
    rows = decode(net, cd.codes[cd.inverse]).to_numpy().tolist()
    assert rows == [["1", "0.5", "true"], ["2", "1", "false"], ["10", None, None], [None, "0.5", "true"]]
    net2 = network_from_dict({"b": {"states": ["False", "True"]}})
    cd = encode_frame(net2, pd.DataFrame({"b": [True, False]}))
    assert cd.codes[:, 0].tolist() == [0, 1]
    cat = pd.DataFrame({"n": pd.Categorical(["10", "1", None]), "f": ["1"] * 3, "b": ["true"] * 3})
    assert encode_frame(net, cat).codes[:, 0].tolist() == [HIDDEN, 0, 2]


def test_parquet_nulls_and_nan_are_missing(tmp_path):
    df = pd.DataFrame({"load": ["low", None, "high"], "wear": ["none", "light", None],
                       "temp": pd.array([1, None, 10], dtype="Int64")})
    df.to_parquet(tmp_path / "d.parquet")
    df.astype(object).to_csv(tmp_path / "d.csv", index=False)
    a = load_data(NET, tmp_path / "d.parquet")
    b = load_data(NET, tmp_path / "d.csv")
    np.testing.assert_array_equal(a.codes, b.codes)
    assert (a.codes == HIDDEN).sum() == 3 * 1 + 3  # three gaps plus the latent column


# ----------------------------------------------------------- columns
def test_ignore_columns_and_count_column_rules():
    df = pd.DataFrame({"load": ["low"], "wear": ["none"], "temp": ["1"], "note": ["x"], "fault": ["no"], "n": [2]})
    cd = encode_frame(NET, df, ignore_columns=["note", "fault"], count_column="n")
    assert cd.counts.tolist() == [2.0]
    cases = [
        (dict(ignore_columns=["note", "fault", "nope"], count_column="n"), "'nope', which is not a column"),
        (dict(ignore_columns=["note", "fault", "wear"], count_column="n"), "'wear', which is an observed node"),
        (dict(ignore_columns=["note", "fault", "n"], count_column="n"), "both the count column"),
        (dict(ignore_columns=["note", "fault", "n"], count_column="load"), "also a node"),
        (dict(ignore_columns=["note", "fault"], count_column="m"), "count column 'm' not found"),
    ]
    for kw, needle in cases:
        with pytest.raises(DataError) as e:
            encode_frame(NET, df, **kw)
        assert needle in one_line(e), (kw, str(e.value))


@pytest.mark.parametrize("counts, needle", [
    (["2", "-1", "1"], "data row 2, column 'n': count '-1'"),
    (["2", "", "1"], "data row 2, column 'n': count ''"),
    (["2", "1", "many"], "data row 3, column 'n': count 'many'"),
    (["2", "inf", "1"], "data row 2"),
])
def test_bad_counts(counts, needle):
    df = pd.DataFrame({"load": ["low", "high", "low"], "wear": ["none"] * 3, "temp": ["1"] * 3, "n": counts})
    with pytest.raises(DataError) as e:
        encode_frame(NET, df, count_column="n")
    assert needle in one_line(e)


def test_counts_fractional_and_zero():
    df = pd.DataFrame({"load": ["low", "high", "low"], "wear": ["none"] * 3, "temp": ["1"] * 3,
                       "n": [0.5, 0, 2.25]})
    cd = encode_frame(NET, df, count_column="n")
    assert cd.counts.tolist() == [2.75] and cd.n_distinct == 1
    with pytest.raises(DataError) as e:
        encode_frame(NET, df.assign(n=0), count_column="n")
    assert "no records" in one_line(e)
    with pytest.raises(DataError) as e:
        encode_frame(NET, df.assign(n=[True, False, True]), count_column="n")
    assert "not a number" in one_line(e)


# ------------------------------------------------- files and folders
def test_folder_glob_and_list_of_files(tmp_path, penguins):
    (tmp_path / "parts").mkdir()
    (tmp_path / "parts" / "_SUCCESS").write_text("")
    for i, chunk in enumerate(np.array_split(np.arange(len(penguins)), 3)):
        penguins.iloc[chunk].to_csv(tmp_path / "parts" / f"part-{i}.csv", index=False)
    whole = encode_frame(PENG, penguins)
    for spec in (tmp_path / "parts", str(tmp_path / "parts" / "part-*.csv"),
                 sorted((tmp_path / "parts").glob("*.csv"))):
        cd = load_data(PENG, spec)
        np.testing.assert_array_equal(cd.codes, whole.codes)
        np.testing.assert_array_equal(cd.counts, whole.counts)
        np.testing.assert_array_equal(cd.inverse, whole.inverse)  # files in name order
    files, fmt = resolve_inputs(tmp_path / "parts")
    assert fmt == "csv" and [f.name for f in files] == ["part-0.csv", "part-1.csv", "part-2.csv"]
    penguins.to_parquet(tmp_path / "parts" / "x.parquet")
    with pytest.raises(DataError) as e:
        load_data(PENG, tmp_path / "parts")
    assert "mixes CSV and Parquet" in one_line(e)


def test_files_with_different_headers(tmp_path):
    write(tmp_path, "load,wear,temp\nlow,none,1\n", "a.csv")
    write(tmp_path, "load,temp,wear\nlow,1,none\n", "b.csv")
    with pytest.raises(DataError) as e:
        load_data(NET, tmp_path)
    assert "b.csv" in one_line(e) and "same header" in one_line(e)


# ---------------------------------------------------- ready-made codes
def test_coded_data_is_validated():
    good = CodedData(np.array([[0, 1, -1, 2]], np.int64), np.array([3]), None, "<coded>")
    cd = load_data(NET, good)
    assert cd.codes.dtype == np.int8 and cd.counts.dtype == np.float64
    bad = [
        (CodedData(np.zeros((1, 3), np.int32), np.ones(1)), "shape"),
        (CodedData(np.array([[0, 3, -1, 0]], np.int32), np.ones(1)), "node 'wear': code 3"),
        (CodedData(np.array([[0, 0, 1, 0]], np.int32), np.ones(1)), "latent"),
        (CodedData(np.array([[0, 0, -1, 0]], np.int32), np.zeros(1)), "> 0"),
        (CodedData(np.array([[0, 0, -1, 0]], np.int32), np.ones(2)), "counts has shape"),
        (CodedData(np.array([[0.0, 0, -1, 0]]), np.ones(1)), "integers"),
    ]
    for data, needle in bad:
        with pytest.raises(DataError) as e:
            load_data(NET, data)
        assert needle in one_line(e)


def test_subset_and_complete_cases():
    df = pd.DataFrame({"load": ["low", "", "high"], "wear": ["none", "light", ""], "temp": ["1", "2", "10"]})
    cd = encode_frame(NET, df)
    cc = cd.complete_cases(NET)
    assert cc.n_rows == 1 and cc.inverse is None
    assert decode(NET, cc.codes).iloc[0].tolist() == ["low", "none", "1"]


@pytest.mark.parametrize("kind,path", [("distinct", "_reduce_sorted"), ("ties", "_reduce_sorted"),
                                       ("repeated", "_reduce_hashed")])
def test_reduce_rows_with_three_key_words_matches_numpy_unique(kind, path, monkeypatch):
    """60 five-state columns: 6**60 needs three int64 words. Rows mostly distinct (sorted), with
    the columns of word 0 drawn from a pool (ties in word 0 broken by the later words; sorted),
    or whole rows drawn from a small pool (hashed); numpy's ``unique(axis=0)`` is the reference
    for the rows, their order and the inverse, ``np.bincount`` over its inverse for the counts."""
    import adfit.rowkeys as rk
    used = []
    real = getattr(rk, path)
    monkeypatch.setattr(rk, path, lambda *a: used.append(path) or real(*a))
    rng = np.random.default_rng({"distinct": 0, "repeated": 1, "ties": 2}[kind])
    cards = (5,) * 60
    n = 20_000  # above the sample size that chooses hashing or sorting
    if kind == "repeated":
        codes = rng.integers(-1, 5, (300, 60))[rng.integers(0, 300, n)]
    else:
        codes = rng.integers(-1, 5, (n, 60))
        if kind == "ties":
            codes[:, :25] = rng.integers(-1, 5, (8000, 25))[rng.integers(0, 8000, n)]
            codes[:, 25:] = rng.integers(0, 2, (n, 35))
    codes = codes.astype(np.int32)
    w = rng.random(n) + 0.5
    d, c, inv = reduce_rows(codes, w, cards)
    ref, ref_inv = np.unique(codes, axis=0, return_inverse=True)
    ref_inv = ref_inv.reshape(-1)
    np.testing.assert_array_equal(d, ref)
    np.testing.assert_array_equal(inv, ref_inv)
    np.testing.assert_array_equal(c, np.bincount(ref_inv, weights=w))
    d1, c1, _ = reduce_rows(codes, None, cards)
    np.testing.assert_array_equal(d1, ref)
    np.testing.assert_array_equal(c1, np.bincount(ref_inv).astype(float))
    assert used == [path, path]
    assert len(np.unique(codes[:, :24], axis=0)) < n / 2 if kind == "ties" else True  # word 0 repeats
    assert (len(ref) < n / 10) if kind == "repeated" else (len(ref) == n)


def test_ready_made_codes_are_checked_blockwise_and_the_first_bad_cell_is_named(monkeypatch):
    # validate_coded finds a bad code by per-column minima and maxima of row blocks; the message
    # names the first bad cell in column order (row, node, code), as a plain numpy search does.
    import adfit.data as data_mod

    net = network_from_dict({"a": {"states": ["x", "y", "z"]}, "h": {"states": ["p", "q"], "latent": True},
                             "b": {"states": ["u", "v"], "parents": ["a", "h"]}})
    monkeypatch.setattr(data_mod, "VALIDATE_BLOCK", 3 * 7)  # blocks of 7 rows: bad cells in later blocks too
    rng = np.random.default_rng(0)
    good = np.stack([rng.integers(-1, 3, 50), np.full(50, HIDDEN), rng.integers(-1, 2, 50)], axis=1).astype(np.int8)  # the network's code type: no copy
    assert load_data(net, CodedData(good, np.ones(50))).codes is good
    for j, row, code in [(0, 31, 3), (2, 44, -2), (2, 7, 2), (0, 49, -5)]:
        bad = good.copy()
        bad[row, j] = code
        col = bad[:, j]
        first = int(np.flatnonzero((col < HIDDEN) | (col >= net.cards[j]))[0])  # numpy, column by column
        with pytest.raises(DataError, match=rf"row {first + 1}, node '{net.names[j]}': code {code} is outside"):
            load_data(net, CodedData(bad, np.ones(50)))
    lat = good.copy()
    lat[20, 1] = 0
    with pytest.raises(DataError, match="latent node; its codes must all be -1"):
        load_data(net, CodedData(lat, np.ones(50)))


def test_label_errors_suggest_the_state_they_resemble_and_speak_the_callers_terms(tmp_path):
    """Case-only and one-character differences get a "did you mean"; the CLI names --missing and
    --ignore-columns, Python names missing= and ignore_columns= (same message otherwise)."""
    from typer.testing import CliRunner

    from adfit.cli import app
    from adfit.data import similar_label

    assert similar_label("Heavy", ["none", "light", "heavy"]) == "heavy"
    assert similar_label("hevy", ["none", "light", "heavy"]) == "heavy"
    assert similar_label("heavyy", ["none", "light", "heavy"]) == "heavy"
    assert similar_label("of", ["on", "off"]) is None          # two candidates: no guess
    assert similar_label("broken", ["none", "light", "heavy"]) is None
    net = network_from_dict({"wear": {"states": ["none", "light", "heavy"]}})
    (tmp_path / "n.toml").write_text('[nodes.wear]\nstates = ["none", "light", "heavy"]\n')
    (tmp_path / "d.csv").write_text("wear,pump_id\nnone,1\nHeavy,2\n")
    with pytest.raises(DataError) as e:
        load_data(net, tmp_path / "d.csv", ignore_columns=["pump_id"])
    assert "did you mean 'heavy'?" in one_line(e) and "missing=['Heavy']" in one_line(e)
    with pytest.raises(DataError) as e:
        load_data(net, tmp_path / "d.csv")
    assert "ignore_columns=['pump_id']" in one_line(e)
    r = CliRunner().invoke(app, ["gaps", str(tmp_path / "n.toml"), str(tmp_path / "d.csv")])
    assert r.exit_code == 1 and "--ignore-columns pump_id" in r.output and "ignore_columns=" not in r.output
    r = CliRunner().invoke(app, ["gaps", str(tmp_path / "n.toml"), str(tmp_path / "d.csv"), "--ignore-columns", "pump_id"])
    assert r.exit_code == 1 and "did you mean 'heavy'?" in r.output and "--missing Heavy" in r.output

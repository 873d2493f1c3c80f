"""The reduction engines (adfit.engines): same CodedData from pandas, stream, DuckDB and Dask.

External references used here: pandas ``value_counts(dropna=False)`` for the distinct rows and
their counts; the Palmer penguins data shipped in the PyPI package ``palmerpenguins``; the
row-major/lexicographic order of ``numpy.lexsort``.

The Dask tests share one ``distributed.LocalCluster`` with 2 workers started with
``processes=False`` (threads in this process: starting worker processes costs seconds, and the
code path - tasks submitted to a scheduler, results gathered - is the same).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from palmerpenguins import load_penguins

from adfit import engines
from adfit.data import HIDDEN, decode
from adfit.engines import ENGINES, Accumulator, load_coded
from adfit.errors import AdfitError, DataError, OptionError
from adfit.network import network_from_dict

FILE_ENGINES = ("stream", "duckdb", "dask")

NET = network_from_dict({
    "load": {"states": ["low", "high"]},
    "wear": {"states": ["none", "light", "heavy"], "parents": ["load"]},
    "fault": {"states": ["no", "yes"], "parents": ["wear"], "latent": True},
    "temp": {"states": ["1", "2", "10"], "parents": ["wear"]},
})
PENG = network_from_dict({
    "species": {"states": ["Adelie", "Chinstrap", "Gentoo"]},
    "island": {"states": ["Biscoe", "Dream", "Torgersen"], "parents": ["species"]},
    "sex": {"states": ["female", "male"], "parents": ["species"]},
    "year": {"states": [2007, 2008, 2009]},
})
PCOLS = ["species", "island", "sex", "year"]


@pytest.fixture(scope="module")
def cluster():
    from distributed import LocalCluster
    c = LocalCluster(n_workers=2, threads_per_worker=1, processes=False, dashboard_address=":0")
    yield c.scheduler_address
    c.close()


def run(network, path, engine, cluster, **kw):
    if engine == "dask":
        kw["scheduler"] = cluster
    return load_coded(network, path, engine=engine, **kw)


def one_line(e) -> str:
    msg = str(e.value)
    assert isinstance(e.value, AdfitError) and msg and "\n" not in msg, repr(msg)
    return msg


def same(a, b):
    np.testing.assert_array_equal(a.codes, b.codes)
    np.testing.assert_array_equal(a.counts, b.counts)
    assert a.codes.dtype == b.codes.dtype == np.int8 and a.counts.dtype == b.counts.dtype == np.float64


@pytest.fixture(scope="module")
def penguin_files(tmp_path_factory):
    d = tmp_path_factory.mktemp("peng")
    df = load_penguins()[PCOLS]
    df.to_csv(d / "p.csv", index=False)
    df.to_parquet(d / "p.parquet", index=False, row_group_size=40)  # 9 row groups
    (d / "csvparts").mkdir()
    (d / "pqparts").mkdir()
    for i, idx in enumerate(np.array_split(np.arange(len(df)), 4)):
        df.iloc[idx].to_csv(d / "csvparts" / f"part-{i}.csv", index=False)
        df.iloc[idx].to_parquet(d / "pqparts" / f"part-{i}.parquet", index=False, row_group_size=30)
    return d, df


# ------------------------------------------------------------ equality
@pytest.mark.parametrize("engine", FILE_ENGINES)
@pytest.mark.parametrize("where", ["p.csv", "p.parquet", "csvparts", "pqparts"])
def test_every_engine_gives_the_pandas_result(penguin_files, cluster, engine, where):
    d, df = penguin_files
    ref = load_coded(PENG, d / where)
    assert ref.inverse is not None and len(ref.inverse) == 344
    got = run(PENG, d / where, engine, cluster, chunk_rows=25)
    same(got, ref)
    assert got.inverse is None and got.source == str(d / where)
    # and both equal pandas' own counting of the shipped data
    expect = df.astype(object).where(df.notna(), "<gap>").astype(str).value_counts().sort_index()
    labels = decode(PENG, got.codes).fillna("<gap>")
    assert [tuple(r) for r in labels.to_numpy()] == expect.index.tolist()
    np.testing.assert_array_equal(got.counts, expect.to_numpy(dtype=float))


def test_rows_are_in_lexicographic_order(penguin_files):
    d, _ = penguin_files
    cd = load_coded(PENG, d / "p.parquet", engine="stream", chunk_rows=17)
    np.testing.assert_array_equal(np.lexsort(cd.codes.T[::-1]), np.arange(cd.n_distinct))


@pytest.fixture(scope="module")
def messy_csv(tmp_path_factory):
    """Spaces, a BOM, CRLF, empty lines, quoted cells, every missing marker, an ignored note."""
    d = tmp_path_factory.mktemp("messy")
    rng = np.random.default_rng(7)
    loads = np.array(["low", "high", " high", "NA", "", "?"])
    wears = np.array(["none", "light ", "heavy", "NaN", '"light"', ""])
    temps = np.array(["1", "2", "10", " 10 ", "?", ""])
    lines = ["\ufeffload , wear,temp ,note"]
    for k in range(300):
        lines.append(f"{rng.choice(loads)},{rng.choice(wears)},{rng.choice(temps)},\"n, {k}\"")
        if k % 50 == 0:
            lines.append("")
    p = d / "messy.csv"
    p.write_bytes(("\r\n".join(lines) + "\r\n").encode("utf-8"))
    return p


@pytest.mark.parametrize("engine", FILE_ENGINES)
def test_messy_csv_same_in_every_engine(messy_csv, cluster, engine):
    ref = load_coded(NET, messy_csv, ignore_columns=["note"])
    assert ref.n_rows == 300
    assert (ref.codes[:, NET.index("fault")] == HIDDEN).all()
    got = run(NET, messy_csv, engine, cluster, ignore_columns=["note"], chunk_rows=32)
    same(got, ref)


@pytest.mark.parametrize("engine", FILE_ENGINES)
def test_count_column_and_custom_missing(tmp_path, cluster, engine):
    df = pd.DataFrame({"load": ["low", "high", "-9", "low", "high"], "wear": ["none", "-9", "light", "none", "heavy"],
                       "temp": ["1", "2", "NA", "1", "10"], "n": ["2", "0.5", "3", "4", "0"]})
    df.to_csv(tmp_path / "agg.csv", index=False)
    with pytest.raises(DataError):  # NA is no longer a marker once --missing is given
        load_coded(NET, tmp_path / "agg.csv", missing=["-9"], count_column="n")
    df = df.assign(temp=df.temp.replace("NA", "-9"))
    df.to_csv(tmp_path / "agg.csv", index=False)
    df.to_parquet(tmp_path / "agg.parquet", index=False)
    ref = load_coded(NET, tmp_path / "agg.csv", missing=["-9"], count_column="n")
    assert ref.n_rows == 9.5 and ref.n_distinct == 3  # low/none/1 twice (2 + 4); the 0 row dropped
    for f in ("agg.csv", "agg.parquet"):
        same(run(NET, tmp_path / f, engine, cluster, missing=["-9"], count_column="n", chunk_rows=2), ref)


def test_packed_key_overflow_path_agrees(tmp_path):
    spec = {f"v{i}": {"states": [str(k) for k in range(9)]} for i in range(20)}  # 10**20 > 2**63
    net = network_from_dict(spec)
    rng = np.random.default_rng(3)
    x = rng.integers(0, 2, (400, 20)).astype(str)
    x[rng.random(x.shape) < 0.1] = ""
    df = pd.DataFrame(x, columns=list(spec))
    df = pd.concat([df, df.iloc[:100]])
    df.to_csv(tmp_path / "wide.csv", index=False)
    ref = load_coded(net, tmp_path / "wide.csv")
    for engine in ("stream", "duckdb"):
        same(load_coded(net, tmp_path / "wide.csv", engine=engine, chunk_rows=64), ref)
    assert ref.n_rows == 500
    expect = df.value_counts().sort_index()
    np.testing.assert_array_equal(ref.counts, expect.to_numpy(dtype=float))


def test_accumulator_merges_many_pieces():
    rng = np.random.default_rng(5)
    cards = (3, 4, 2)
    rows = np.stack([rng.integers(-1, c, 5000) for c in cards], axis=1).astype(np.int32)
    acc = Accumulator(cards)
    acc.merge_rows = 8  # merge often
    for piece in np.array_split(rows, 97):
        acc.add(piece)
    codes, counts = acc.result()
    ref = pd.DataFrame(rows).value_counts().sort_index()
    np.testing.assert_array_equal(codes, np.array(ref.index.tolist()))
    np.testing.assert_array_equal(counts, ref.to_numpy(dtype=float))


@settings(max_examples=15, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(rows=st.lists(st.tuples(st.sampled_from(["low", "high", "", "NA"]),
                               st.sampled_from(["none", "light", "heavy", "?"]),
                               st.sampled_from(["1", "2", "10", ""])), min_size=1, max_size=30),
       chunk=st.integers(1, 7))
def test_random_tables_stream_and_duckdb(tmp_path_factory, rows, chunk):
    p = tmp_path_factory.mktemp("h") / "r.csv"
    pd.DataFrame(rows, columns=["load", "wear", "temp"]).to_csv(p, index=False)
    ref = load_coded(NET, p)
    for engine in ("stream", "duckdb"):
        same(load_coded(NET, p, engine=engine, chunk_rows=chunk), ref)


# ------------------------------------------------------------- errors
def bad_label_files(d):
    """A label error on line 9 of the second CSV file; the same cell in Parquet row groups."""
    good = pd.DataFrame({"load": ["low", "high"] * 5, "wear": ["none", "light"] * 5, "temp": ["1", "2"] * 5})
    bad = good.copy()
    bad.loc[7, "wear"] = "hevy"
    (d / "csv").mkdir()
    (d / "pq").mkdir()
    good.to_csv(d / "csv" / "a.csv", index=False)
    bad.to_csv(d / "csv" / "b.csv", index=False)
    good.to_parquet(d / "pq" / "a.parquet", index=False, row_group_size=3)
    bad.to_parquet(d / "pq" / "b.parquet", index=False, row_group_size=3)  # row 8 is in the third group


@pytest.mark.parametrize("engine", ENGINES)
def test_label_error_names_file_line_column_and_label_in_every_engine(tmp_path, cluster, engine):
    bad_label_files(tmp_path)
    with pytest.raises(DataError) as e:
        run(NET, tmp_path / "csv", engine, cluster, chunk_rows=3)
    msg = one_line(e)
    assert msg.startswith(f"{tmp_path / 'csv' / 'b.csv'}: line 9 (data row 8), column 'wear': label 'hevy' "
                          f"is not a state of 'wear'"), msg
    with pytest.raises(DataError) as e:
        run(NET, tmp_path / "pq", engine, cluster, chunk_rows=3)
    assert one_line(e).startswith(f"{tmp_path / 'pq' / 'b.parquet'}: data row 8, column 'wear': label 'hevy'")


@pytest.mark.parametrize("engine", ENGINES)
def test_ragged_record_and_bad_count_in_every_engine(tmp_path, cluster, engine):
    p = tmp_path / "r.csv"
    p.write_text("load,wear,temp\nlow,none,1\n\nhigh,light,2,9\nlow,none,1\n")
    with pytest.raises(DataError) as e:
        run(NET, p, engine, cluster)
    assert one_line(e) == (f"{p}: line 4 has 4 field(s), the header has 3; every record needs one value per "
                           f"column (leave a cell empty for a gap)")
    p.write_text("load,wear,temp,n\nlow,none,1,2\nhigh,light,2,-1\nlow,none,1,3\n")
    with pytest.raises(DataError) as e:
        run(NET, p, engine, cluster, count_column="n")
    assert one_line(e).startswith(f"{p}: line 3 (data row 2), column 'n': count '-1'")


@pytest.mark.parametrize("engine", ENGINES)
def test_column_errors_before_reading_in_every_engine(tmp_path, cluster, engine):
    p = tmp_path / "c.csv"
    p.write_text("load,wear,temp,extra\nlow,none,1,x\n")
    with pytest.raises(DataError) as e:
        run(NET, p, engine, cluster)
    assert "['extra'] are not nodes" in one_line(e)
    same(run(NET, p, engine, cluster, ignore_columns=["extra"]), load_coded(NET, p, ignore_columns=["extra"]))


@pytest.mark.parametrize("engine", ("stream", "duckdb"))
def test_one_column_file_and_leading_empty_lines(tmp_path, engine):
    net = network_from_dict({"h": {"states": ["a", "b"], "latent": True},
                             "x": {"states": ["yes", "no"], "parents": ["h"]}})
    p = tmp_path / "one.csv"
    p.write_text("\n\nx\nyes\n\nno\n?\n\nyes\n")
    ref = load_coded(net, p)
    # after the header of a one-column file every line is a record (RFC 4180): the two empty
    # lines are gaps like "?"; the two before the header are not records
    assert ref.counts.tolist() == [3.0, 2.0, 1.0]  # gaps, yes, no
    same(load_coded(net, p, engine=engine), ref)


def test_duckdb_memory_limit(penguin_files):
    d, _ = penguin_files
    same(load_coded(PENG, d / "p.parquet", engine="duckdb", memory_limit="64MB"), load_coded(PENG, d / "p.parquet"))
    with pytest.raises(OptionError) as e:
        load_coded(PENG, d / "p.parquet", engine="duckdb", memory_limit="lots")
    assert "DuckDB settings" in one_line(e)


def test_option_errors(tmp_path, monkeypatch):
    p = tmp_path / "d.csv"
    p.write_text("load,wear,temp\nlow,none,1\n")
    cases = [
        (dict(engine="spark"), "choose one of pandas, stream, duckdb, dask"),
        (dict(engine="stream", scheduler="tcp://x:1"), "only used with --engine dask"),
        (dict(engine="stream", memory_limit="1GB"), "only used with --engine duckdb"),
        (dict(engine="stream", chunk_rows=0), "at least 1"),
    ]
    for kw, needle in cases:
        with pytest.raises(OptionError) as e:
            load_coded(NET, p, **kw)
        assert needle in one_line(e)
    with pytest.raises(OptionError) as e:
        load_coded(NET, pd.read_csv(p), engine="duckdb")
    assert "reads files" in one_line(e)
    monkeypatch.setattr(engines, "CONNECT_TIMEOUT", "1s")
    with pytest.raises(OptionError) as e:
        load_coded(NET, p, engine="dask", scheduler="tcp://127.0.0.1:9")
    assert "cannot reach a Dask scheduler" in one_line(e)


def test_dataframe_through_the_pandas_engine():
    df = pd.DataFrame({"load": ["low", "high"], "wear": ["none", ""], "temp": ["1", "10"]})
    cd = load_coded(NET, df)
    assert cd.n_rows == 2 and cd.inverse is not None


@pytest.mark.parametrize("engine", FILE_ENGINES)
def test_typed_parquet_columns_in_every_engine(tmp_path, cluster, engine):
    net = network_from_dict({
        "grade": {"states": ["A", "B", "C"]},
        "size": {"states": [1, 2, 10]},
        "ratio": {"states": ["0.5", "1"]},
        "flag": {"states": ["false", "true"]},
    })
    df = pd.DataFrame({
        "grade": pd.Categorical(["A", "C", None, "B", "A", "C"]),
        "size": pd.array([1, 10, 2, None, 1, 10], dtype="Int64"),
        "ratio": [0.5, 1.0, np.nan, 0.5, 0.5, 1.0],
        "flag": pd.array([True, False, None, True, True, False], dtype="boolean"),
    })
    df.to_parquet(tmp_path / "typed.parquet", index=False, row_group_size=2)
    ref = load_coded(net, tmp_path / "typed.parquet")
    expect = [["A", "1", "0.5", "true"], ["C", "10", "1", "false"], [None, "2", None, None],
              ["B", None, "0.5", "true"]]
    assert decode(net, ref.codes[ref.inverse]).to_numpy().tolist()[:4] == expect
    assert ref.counts.tolist() == [1.0, 2.0, 1.0, 2.0]  # rows by code: grade gap, A (twice), B, C (twice)
    same(run(net, tmp_path / "typed.parquet", engine, cluster, chunk_rows=2), ref)


@pytest.mark.parametrize("engine", FILE_ENGINES)
def test_label_error_after_many_chunks(tmp_path, cluster, engine):
    rng = np.random.default_rng(11)
    n = 6000
    df = pd.DataFrame({"load": rng.choice(["low", "high", ""], n), "wear": rng.choice(["none", "light", "heavy"], n),
                       "temp": rng.choice(["1", "2", "10", "?"], n)})
    df.to_csv(tmp_path / "big.csv", index=False)
    ref = load_coded(NET, tmp_path / "big.csv")
    same(run(NET, tmp_path / "big.csv", engine, cluster, chunk_rows=100), ref)  # about 15 CSV blocks
    df.loc[4321, "temp"] = "12"
    df.to_csv(tmp_path / "big.csv", index=False)
    with pytest.raises(DataError) as e:
        run(NET, tmp_path / "big.csv", engine, cluster, chunk_rows=100)
    assert f"big.csv: line 4323 (data row 4322), column 'temp': label '12'" in one_line(e)


def test_single_node_network_in_every_engine(tmp_path, cluster):
    net = network_from_dict({"x": {"states": ["a", "b", "c"]}})
    p = tmp_path / "x.csv"
    p.write_text("x\na\nc\n?\nc\nb\nc\n")
    ref = load_coded(net, p)
    assert ref.codes[:, 0].tolist() == [HIDDEN, 0, 1, 2] and ref.counts.tolist() == [1, 1, 1, 3]
    for engine in FILE_ENGINES:
        same(run(net, p, engine, cluster), ref)


def test_dask_without_scheduler_starts_and_closes_a_local_cluster(penguin_files):
    import threading
    d, _ = penguin_files
    before = threading.active_count()
    same(load_coded(PENG, d / "pqparts", engine="dask"), load_coded(PENG, d / "pqparts"))
    from distributed import default_client
    with pytest.raises(ValueError):  # no client left behind
        default_client()
    assert threading.active_count() <= before + 2


@pytest.mark.parametrize("engine", ENGINES)
def test_the_earliest_bad_row_is_reported_in_every_engine(tmp_path, cluster, engine):
    rows = [["low", "none", "1", "1"]] * 40
    rows[30] = ["lo", "none", "1", "1"]       # first node, late row
    rows[12] = ["low", "none", "3", "1"]      # last node, earlier row
    rows[25] = ["low", "nix", "1", "1"]
    (tmp_path / "parts").mkdir()
    head = "load,wear,temp,n\n"
    for k, part in enumerate((rows[:20], rows[20:])):
        (tmp_path / "parts" / f"p{k}.csv").write_text(head + "".join(",".join(r) + "\n" for r in part))
    with pytest.raises(DataError) as e:
        run(NET, tmp_path / "parts", engine, cluster, chunk_rows=5, count_column="n")
    assert one_line(e).startswith(f"{tmp_path / 'parts' / 'p0.csv'}: line 14 (data row 13), column 'temp': label '3'")
    rows[12] = ["low", "none", "1", "-2"]     # now a bad count comes first
    rows[3] = ["low", "none", "1", "x"]
    for k, part in enumerate((rows[:20], rows[20:])):
        (tmp_path / "parts" / f"p{k}.csv").write_text(head + "".join(",".join(r) + "\n" for r in part))
    with pytest.raises(DataError) as e:
        run(NET, tmp_path / "parts", engine, cluster, chunk_rows=5, count_column="n")
    assert one_line(e).startswith(f"{tmp_path / 'parts' / 'p0.csv'}: line 5 (data row 4), column 'n': count 'x'")


@pytest.mark.parametrize("engine", ENGINES)
def test_not_utf8_in_every_engine(tmp_path, cluster, engine):
    p = tmp_path / "latin.csv"
    p.write_bytes("load,wear,temp\nlow,none,1\nl\xf6w,none,1\n".encode("latin-1"))
    with pytest.raises(DataError) as e:
        run(NET, p, engine, cluster)
    assert one_line(e) == f"{p}: not UTF-8 text; save the CSV as UTF-8"


# ------------------------------------------- keys wider than one int64 word
WIDE = network_from_dict({f"v{i:02d}": {"states": [str(k) for k in range(4)]} for i in range(40)})  # 5**40 > 2**92


@pytest.fixture(scope="module")
def wide_files(tmp_path_factory):
    """40 four-state columns (the packed row needs two int64 words), gaps, repeated rows."""
    import pyarrow as pa
    import pyarrow.parquet as pq
    d = tmp_path_factory.mktemp("wide")
    rng = np.random.default_rng(17)
    n = 3000
    x = rng.integers(0, 4, (n, 40))
    x[:, :20] = rng.integers(0, 2, (n, 1))  # the first word takes few values: ties in word 0
    x[rng.random(x.shape) < 0.15] = HIDDEN
    x[n // 2:n // 2 + 600] = x[:600]        # repeated records
    names = list(WIDE.names)
    cols = {nm: pa.array(x[:, j].astype(np.int8), mask=x[:, j] == HIDDEN) for j, nm in enumerate(names)}
    table = pa.table(cols)
    pq.write_table(table, d / "w.parquet", row_group_size=700)
    pd.DataFrame({nm: np.where(x[:, j] == HIDDEN, "", x[:, j].astype(str)) for j, nm in enumerate(names)}) \
        .to_csv(d / "w.csv", index=False)
    return d, x


@pytest.mark.parametrize("where", ["w.parquet", "w.csv"])
@pytest.mark.parametrize("engine", ENGINES)
def test_keys_wider_than_63_bits_every_engine_matches_numpy_unique(wide_files, cluster, engine, where):
    d, x = wide_files
    got = run(WIDE, d / where, engine, cluster, chunk_rows=400)
    # reference: numpy's own lexicographic unique of the code matrix (first column most significant)
    ref_rows, ref_inv, ref_counts = np.unique(x, axis=0, return_inverse=True, return_counts=True)
    np.testing.assert_array_equal(got.codes, ref_rows)
    np.testing.assert_array_equal(got.counts, ref_counts.astype(float))
    assert got.codes.dtype == np.int8 and got.n_rows == len(x) and got.n_distinct < len(x)
    if engine == "pandas":
        np.testing.assert_array_equal(got.inverse, ref_inv.reshape(-1))
    else:
        same(got, load_coded(WIDE, d / where))


def test_wide_key_label_error_is_the_same_in_every_engine(tmp_path, cluster):
    rng = np.random.default_rng(4)
    df = pd.DataFrame(rng.integers(0, 4, (300, 40)).astype(str), columns=list(WIDE.names))
    df.iloc[217, 33] = "7"
    df.to_csv(tmp_path / "bad.csv", index=False)
    df.astype(int).to_parquet(tmp_path / "bad.parquet", index=False, row_group_size=50)
    for engine in ENGINES:
        with pytest.raises(DataError) as e:
            run(WIDE, tmp_path / "bad.csv", engine, cluster, chunk_rows=64)
        assert one_line(e).startswith(f"{tmp_path / 'bad.csv'}: line 219 (data row 218), column 'v33': label '7' "
                                      f"is not a state of 'v33'"), (engine, one_line(e))
        with pytest.raises(DataError) as e:
            run(WIDE, tmp_path / "bad.parquet", engine, cluster, chunk_rows=64)
        assert one_line(e).startswith(f"{tmp_path / 'bad.parquet'}: data row 218, column 'v33': label '7'"), engine


def test_accumulator_table_holds_only_the_distinct_rows():
    """The stream engine's memory: the running table never exceeds the distinct rows seen plus
    the pieces waiting to be merged, however many records pass through."""
    rng = np.random.default_rng(8)
    cards = (4,) * 40
    pool = rng.integers(-1, 4, (50, 40)).astype(np.int32)
    acc = Accumulator(cards)
    acc.merge_rows = 16
    seen = set()
    for _ in range(40):
        piece = pool[rng.integers(0, 50, 500)]
        seen.update(map(tuple, piece))
        acc.add(piece)
        assert acc.words.shape[1] <= len(seen) and acc._pending_rows <= max(len(seen), acc.merge_rows) + 50
    codes, counts = acc.result()
    assert codes.shape[0] == len(seen) and counts.sum() == 40 * 500

"""Reduction to distinct coded rows: pandas vs stream vs DuckDB vs Dask, side by side.

Default workload: a table of N rows x K small-integer columns (seeded; a hidden 4-state regime
that each column copies with some noise, and some gaps), written once as Parquet (one file, row
groups of 1 M rows) and as partitioned CSV (8 files); ``adfit.engines.load_coded`` is timed for
each engine in a fresh subprocess, printing wall time and peak resident memory.

    python benchmarks/bench_reduce.py                 # 10 M rows x 20 columns (a few minutes)
    python benchmarks/bench_reduce.py --rows 1000000  # quick look

``--net37``: the Parquet file of ``bench_scale.py parquet`` instead (the 37-node network, gaps
in 5 columns, nearly every row distinct: the packed row needs two int64 words), at each row count
of ``--rows-list`` (default 1 M and 10 M; the files are written once into ``--data-dir`` and
reused), every engine at each size:

    python benchmarks/bench_reduce.py --net37 [--rows-list 1000000,10000000] [--engines pandas,stream]

Memory: "peak MiB" is the peak resident memory of the process during the call (sampled every
5 ms) minus the resident memory just before it; for Dask the same figure of the two local worker
processes (processes=True) is added. "peak RSS GB" is the whole client process's peak (imports,
data, result; for Dask without the workers). "CPU s": user + system time of the client process
during the call, all its threads (DuckDB's and pyarrow's included; for Dask not the workers').
Every engine's codes and counts are compared with
the pandas engine's (a SHA-256 digest of both arrays). Copy the printed table into
docs/performance.md ("Reduction").
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import resource
import platform
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np


def make_data(folder: Path, rows: int, cols: int, card: int, noise: float, gaps: float, seed: int = 0):
    import pyarrow as pa
    import pyarrow.csv as pcsv
    import pyarrow.parquet as pq
    rng = np.random.default_rng(seed)
    regime = rng.integers(0, 4, rows)
    table = {}
    for j in range(cols):
        base = (regime + j) % card
        flip = rng.random(rows) < noise
        x = np.where(flip, rng.integers(0, card, rows), base).astype(np.int8)
        mask = rng.random(rows) < gaps
        table[f"c{j:02d}"] = pa.array(x, mask=mask)
    t = pa.table(table)
    pq.write_table(t, folder / "data.parquet", row_group_size=1_000_000)
    parts = folder / "csv"
    parts.mkdir()
    n_parts = 8
    edges = np.linspace(0, rows, n_parts + 1).astype(int)
    for i in range(n_parts):
        pcsv.write_csv(t.slice(edges[i], edges[i + 1] - edges[i]), parts / f"part-{i}.csv",
                       pcsv.WriteOptions(quoting_style="none"))
    spec = {name: {"states": [str(k) for k in range(card)]} for name in table}
    (folder / "net.json").write_text(json.dumps(spec))


def _rss_now_mb() -> float:
    with open("/proc/self/statm") as fh:
        return int(fh.read().split()[1]) * os.sysconf("SC_PAGE_SIZE") / 2 ** 20


class PeakSampler:
    """Samples this process's resident memory every few milliseconds; ``peak`` is the highest."""

    def __init__(self, every_s: float = 0.005):
        import threading
        self.base = _rss_now_mb()
        self.peak = self.base
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, args=(every_s,), daemon=True)
        self._thread.start()

    def _run(self, every_s: float) -> None:
        while not self._stop.is_set():
            self.peak = max(self.peak, _rss_now_mb())
            self._stop.wait(every_s)

    def stop(self) -> float:
        """Peak minus the resident memory at start (MiB)."""
        self._stop.set()
        self._thread.join()
        self.peak = max(self.peak, _rss_now_mb())
        return self.peak - self.base


def _worker_start() -> None:
    import builtins
    builtins._adfit_bench_sampler = PeakSampler()


def _worker_stop() -> float:
    import builtins
    return builtins._adfit_bench_sampler.stop()


def child(engine: str, path: str, net_file: str, out: str, memory_limit: str | None) -> None:
    from adfit.engines import load_coded
    from adfit.network import network_from_dict
    net = network_from_dict(json.loads(Path(net_file).read_text()))
    kw = {}
    extra_mb = 0.0
    if engine == "dask":
        from distributed import Client, LocalCluster
        cluster = LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=":0")
        client = Client(cluster)
        kw["scheduler"] = cluster.scheduler_address
        client.run(lambda: __import__("adfit.engines"))  # imports (adfit pulls in JAX) not counted
        client.run(_worker_start)
    if engine == "duckdb" and memory_limit:
        kw["memory_limit"] = memory_limit
    sampler = PeakSampler()
    t = time.perf_counter()
    cpu = time.process_time()
    cd = load_coded(net, path, engine=engine, **kw)
    wall = time.perf_counter() - t
    cpu = time.process_time() - cpu
    mem = sampler.stop()
    maxrss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1e6
    if engine == "dask":
        extra_mb = sum(client.run(_worker_stop).values())
        client.close()
        cluster.close()
    h = hashlib.sha256()
    h.update(memoryview(np.ascontiguousarray(cd.codes)).cast("B"))
    h.update(memoryview(np.ascontiguousarray(cd.counts)).cast("B"))
    print(json.dumps({"wall": wall, "cpu": cpu, "mem_mb": mem + extra_mb, "distinct": cd.n_distinct, "rows": cd.n_rows,
                      "digest": h.hexdigest(), "maxrss_gb": maxrss,
                      "load": " ".join(f"{x:.1f}" for x in os.getloadavg())}))


def run_child(engine: str, path: Path, net_file: Path, out: Path, mem: str | None) -> dict | str:
    r = subprocess.run([sys.executable, __file__, "--child", engine, str(path), str(net_file), str(out), mem or "-"],
                       capture_output=True, text=True)
    if r.returncode != 0:
        return f"failed: {r.stderr.strip().splitlines()[-1] if r.stderr else r.returncode}"
    return json.loads(r.stdout.strip().splitlines()[-1])


def main_net37(a) -> None:
    sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
    from bench_scale import write_parquet
    os.makedirs(a.data_dir, exist_ok=True)
    engines = a.engines.split(",")
    print(f"# 37-node network (benchmarks/bench_scale.py parquet data), Parquet; "
          f"{platform.processor() or platform.machine()}, {os.cpu_count()} CPUs, Python {platform.python_version()}; "
          f"load average at start {' '.join(f'{x:.1f}' for x in os.getloadavg())}")
    print(f"{'rows':>11} {'engine':<8} {'wall s':>7} {'CPU s':>6} {'peak MiB':>9} {'peak RSS GB':>12} "
          f"{'distinct rows':>14}  same as pandas  load")
    for rows in (int(r) for r in a.rows_list.split(",")):
        path, net_path = write_parquet(a.data_dir, rows)
        net_file = Path(net_path)
        ref = None
        for engine in engines:
            res = run_child(engine, Path(path), net_file, Path(a.data_dir) / "unused.npz", None)
            if isinstance(res, str):
                print(f"{rows:>11,} {engine:<8} {res}")
                continue
            if engine == "pandas":
                ref = res["digest"]
            same = "-" if ref is None else str(res["digest"] == ref)
            print(f"{rows:>11,} {engine:<8} {res['wall']:>7.2f} {res['cpu']:>6.2f} {res['mem_mb']:>9.0f} {res['maxrss_gb']:>12.2f} "
                  f"{res['distinct']:>14,}  {same:<14}  {res['load']}", flush=True)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=10_000_000)
    ap.add_argument("--cols", type=int, default=20)
    ap.add_argument("--card", type=int, default=3)
    ap.add_argument("--noise", type=float, default=0.02)
    ap.add_argument("--gaps", type=float, default=0.02)
    ap.add_argument("--runs", default="all",
                    help="comma-separated subset, e.g. duckdb-parquet,duckdb300-parquet (default: all)")
    ap.add_argument("--net37", action="store_true", help="the 37-node Parquet workload of bench_scale.py")
    ap.add_argument("--rows-list", default="1000000,10000000", help="with --net37: row counts")
    ap.add_argument("--engines", default="pandas,stream,duckdb,dask", help="with --net37: engines (pandas first)")
    ap.add_argument("--data-dir", default=os.path.join(tempfile.gettempdir(), "adfit-bench-scale"))
    ap.add_argument("--child", nargs=5, help=argparse.SUPPRESS)
    a = ap.parse_args()
    if a.child:
        engine, path, net_file, out, mem = a.child
        child(engine, path, net_file, out, None if mem == "-" else mem)
        return
    if a.net37:
        main_net37(a)
        return
    with tempfile.TemporaryDirectory(prefix="adfit-bench-") as tmp:
        d = Path(tmp)
        t = time.perf_counter()
        make_data(d, a.rows, a.cols, a.card, a.noise, a.gaps)
        size = {p.name: p.stat().st_size for p in [d / "data.parquet"]}
        csv_mb = sum(p.stat().st_size for p in (d / "csv").iterdir()) / 2 ** 20
        print(f"# {a.rows:,} rows x {a.cols} columns ({a.card} states, noise {a.noise}, gaps {a.gaps}); "
              f"generated in {time.perf_counter() - t:.1f} s; Parquet {size['data.parquet'] / 2 ** 20:.0f} MiB, "
              f"CSV (8 files) {csv_mb:.0f} MiB")
        print(f"# {platform.processor() or platform.machine()}, {os.cpu_count()} CPUs, Python {platform.python_version()}")
        runs = [("pandas", "parquet", None), ("stream", "parquet", None), ("duckdb", "parquet", None),
                ("duckdb", "parquet", "300MB"), ("dask", "parquet", None),
                ("pandas", "csv", None), ("stream", "csv", None), ("duckdb", "csv", None), ("dask", "csv", None)]
        if a.runs != "all":
            want = set(a.runs.split(","))
            runs = [r for r in runs if f"{r[0]}{'300' if r[2] else ''}-{r[1]}" in want]
        ref = None
        print(f"{'engine':<22} {'input':<8} {'wall s':>8} {'peak MiB':>9} {'distinct rows':>14}  same as pandas")
        for engine, fmt, mem in runs:
            path = d / "data.parquet" if fmt == "parquet" else d / "csv"
            out = d / f"{engine}-{fmt}-{mem}.npz"
            res = run_child(engine, path, d / "net.json", out, mem)
            if isinstance(res, str):
                print(f"{engine:<22} {fmt:<8} {res}")
                continue
            if ref is None:
                ref = res["digest"]
            ok = res["digest"] == ref
            name = engine + (f" (limit {mem})" if mem else "")
            print(f"{name:<22} {fmt:<8} {res['wall']:>8.2f} {res['mem_mb']:>9.0f} {res['distinct']:>14,}  {ok}  "
                  f"(peak RSS {res['maxrss_gb']:.2f} GB, load {res['load']})", flush=True)


if __name__ == "__main__":
    main()

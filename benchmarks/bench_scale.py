"""The fit at scale: many distinct rows, a large network, and a 10-million-row Parquet file.

Each measurement runs in a fresh Python process, so that its peak resident memory (printed as
"peak RSS", the whole process: JAX, the data, the plan) is its own. The data are seeded random
networks and CPTs (benchmarks/workloads.py): they measure speed and memory, not accuracy.

  rows      37-node network (<= 3 parents, 2-4 states, treewidth about 4), 20 % of cells missing
            completely at random (every row distinct): value-and-gradient at 100 000 and at
            1 000 000 distinct rows, time per row and peak memory of each.
  net200    200-node random network (<= 3 parents among the 6 previous nodes: treewidth <= 6),
            100 000 rows, 20 % MCAR cells: plan, first evaluation and a whole fit.
  parquet   10 000 000 rows of the 37-node network with gaps in 5 columns, missing at random
            (the chance of a gap depends on an always-observed column), in one Parquet file:
            read and reduce with adfit.engines.load_coded (DuckDB), then fit to convergence,
            each phase timed. The file is written once into --data-dir and reused.

  parquet-fit  the fit alone on the rows of that file read straight into codes (no reduction),
            each phase of the fit timed (also run by "parquet").

Usage:  python benchmarks/bench_scale.py [rows] [net200] [parquet] [parquet-fit] [--data-dir DIR]
                                         [--rows-small 100000] [--rows-large 1000000]
                                         [--rows-net200 100000] [--rows-parquet 10000000]
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time

sys.path.insert(0, os.path.dirname(__file__))

GAP_COLUMNS = (3, 9, 15, 22, 30)
DRIVERS = (0, 6, 12, 19, 27)  # always observed; each one drives the gaps of one gap column


def peak_rss_gb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1e6


def load() -> str:
    return " ".join(f"{x:.1f}" for x in os.getloadavg())


# --------------------------------------------------------------------------- children
def plan_and_first_call(net, data, probs):
    """The likelihood's plan and its first value-and-gradient (compile included), timed:
    ``(likelihood, log-CPTs, plan seconds, first-call seconds)``."""
    import jax
    import jax.numpy as jnp
    import numpy as np

    from adfit.likelihood import Likelihood
    t = time.perf_counter()
    lik = Likelihood(net, data)
    t_plan = time.perf_counter() - t
    lc = [jnp.asarray(np.log(probs[n])) for n in net.names]
    t = time.perf_counter()
    jax.block_until_ready(lik.expected_counts_logcpt(lc))
    return lik, lc, t_plan, time.perf_counter() - t


def child_rows(rows: int) -> None:
    import jax
    import numpy as np

    from workloads import coded, local_network, mask_mcar, random_cpts, sample
    net = local_network(37, seed=0)
    probs = random_cpts(net, seed=1)
    t = time.perf_counter()
    data = coded(net, mask_mcar(net, sample(net, probs, rows, seed=2), 0.2, seed=3))
    t_data = time.perf_counter() - t
    before = peak_rss_gb()
    lik, lc, t_plan, t_first = plan_and_first_call(net, data, probs)
    ts = []
    for _ in range(3):
        t = time.perf_counter()
        jax.block_until_ready(lik.expected_counts_logcpt(lc))
        ts.append(time.perf_counter() - t)
    steady = float(np.median(ts))
    print(json.dumps({"rows": data.n_distinct, "data_s": t_data, "plan_s": t_plan, "first_call_s": t_first,
                      "value_grad_s": steady, "us_per_row": steady / data.n_distinct * 1e6,
                      "peak_rss_gb": peak_rss_gb(), "rss_before_plan_gb": before, "route": lik.plan.route,
                      "load": load()}))


def child_net200(rows: int) -> None:
    import jax

    from adfit.fit import fit
    from workloads import coded, local_network, mask_mcar, random_cpts, sample
    net = local_network(200, window=6, seed=0)
    probs = random_cpts(net, seed=1)
    data = coded(net, mask_mcar(net, sample(net, probs, rows, seed=2), 0.2, seed=3))
    lik, lc, t_plan, t_first = plan_and_first_call(net, data, probs)
    t = time.perf_counter()
    jax.block_until_ready(lik.expected_counts_logcpt(lc))
    t_vg = time.perf_counter() - t
    describe = lik.plan.describe()
    rss_lik = peak_rss_gb()
    del lik
    import gc
    gc.collect()
    import adfit.fit as fit_module
    spent = _timed_phases(fit_module)
    marks = []
    t0 = time.perf_counter()
    res = fit(net, data, warn=False, progress=lambda k, it, o, g: marks.append(time.perf_counter() - t0))
    t_fit = time.perf_counter() - t0
    print(json.dumps({"rows": data.n_distinct, "plan_s": t_plan, "first_call_s": t_first, "value_grad_s": t_vg,
                      "describe": describe, "rss_likelihood_gb": rss_lik, "fit_s": t_fit,
                      "phases": _phase_fields(spent, t_fit, marks[0] if marks else None),
                      "first_iteration_s": marks[0] if marks else None, "iterations": res.iterations,
                      "converged": res.converged, "stop_reason": res.stop_reason, "gradient_norm": res.gradient_norm,
                      "max_residual": res.settings.get("max_residual"), "peak_rss_gb": peak_rss_gb(), "load": load()}))


#: the phases of a fit, as the functions adfit.fit calls for them
FIT_PHASES = (("load_data", "check the data"), ("Likelihood", "plan"), ("complete_family_start", "complete-family start"),
              ("check_possible", "first evaluation (compile included)"))


def _timed_phases(module, names=tuple(n for n, _ in FIT_PHASES)):
    """Wrap functions of ``module`` to add up their wall time and the XLA compile time spent
    inside them (phases of a fit, for the print). ``spent["compile"]`` is the compile time of the
    whole process, by compiled function in ``spent["compiled"]``."""
    import jax

    spent = {"compile": 0.0, "compiled": {}}

    def on_event(event, duration, **kw):
        if event == "/jax/core/compile/backend_compile_duration":
            spent["compile"] += duration
            name = str(kw.get("fun_name", "?"))
            n, t = spent["compiled"].get(name, (0, 0.0))
            spent["compiled"][name] = (n + 1, t + duration)
    jax.monitoring.register_event_duration_secs_listener(on_event)
    for name in names:
        fn = getattr(module, name)

        def wrapper(*a, _fn=fn, _name=name, **k):
            t, c = time.perf_counter(), spent["compile"]
            try:
                return _fn(*a, **k)
            finally:
                spent[_name] = spent.get(_name, 0.0) + time.perf_counter() - t
                spent[_name + ":compile"] = spent.get(_name + ":compile", 0.0) + spent["compile"] - c
        setattr(module, name, wrapper)
    return spent


def _phase_fields(spent, t_fit, first_iteration=None):
    """JSON fields of a fit's phases: the wrapped ones, and the optimiser (the rest: its
    compiles, iterations and the final evaluation) with the compile time inside it."""
    out = {name: spent.get(name, 0.0) for name, _ in FIT_PHASES}
    inside = sum(spent.get(name + ":compile", 0.0) for name, _ in FIT_PHASES)
    out["optimiser"] = t_fit - sum(out.values())
    out["optimiser_compile"] = spent["compile"] - inside
    out["compiled_top"] = sorted(((k, n, t) for k, (n, t) in spent["compiled"].items()), key=lambda x: -x[2])[:6]
    out["first_iteration"] = first_iteration
    return out


def _print_phases(ph, indent="  "):
    parts = [f"{label} {ph[name]:.1f} s" for name, label in FIT_PHASES]
    print(f"{indent}phases: " + ", ".join(parts) + f", optimiser (compiles, iterations, final evaluation) "
          f"{ph['optimiser']:.1f} s of which XLA compile {ph['optimiser_compile']:.1f} s"
          + (f"; first iteration after {ph['first_iteration']:.1f} s" if ph.get("first_iteration") else ""))
    print(f"{indent}largest compiles: " + ", ".join(f"{k} x{n} {t:.2f} s" for k, n, t in ph["compiled_top"]))


def child_parquet(path: str, net_path: str, engine: str) -> None:
    import adfit.fit as fit_module
    from adfit.engines import load_coded
    from adfit.fit import fit
    from adfit.network import network_from_dict
    spent = _timed_phases(fit_module)
    net = network_from_dict(json.loads(open(net_path).read()))
    t0 = time.perf_counter()
    data = load_coded(net, path, engine=engine)
    t_read = time.perf_counter() - t0
    rss_read = peak_rss_gb()
    marks = []
    t1 = time.perf_counter()
    res = fit(net, data, warn=False, progress=lambda k, it, o, g: marks.append(time.perf_counter() - t1))
    t_fit = time.perf_counter() - t1
    print(json.dumps({"records": data.n_rows, "distinct": data.n_distinct, "read_reduce_s": t_read,
                      "rss_after_read_gb": rss_read, "fit_s": t_fit,
                      "fit_until_first_iteration_s": marks[0] if marks else None,
                      "iterations": res.iterations, "converged": res.converged, "stop_reason": res.stop_reason,
                      "route": res.settings.get("route"), "end_to_end_s": time.perf_counter() - t0,
                      "phases": _phase_fields(spent, t_fit, marks[0] if marks else None),
                      "peak_rss_gb": peak_rss_gb(), "load": load()}))


def child_parquet_fit_only(path: str, net_path: str) -> None:
    """The fit alone, on the Parquet rows read straight into codes (no reduction: the rows are
    all but distinct, each kept with count 1), for the fit's own time and peak memory."""
    import numpy as np
    import pyarrow.parquet as pq

    import adfit.fit as fit_module
    from adfit.data import CodedData
    from adfit.fit import fit
    from adfit.network import network_from_dict
    net = network_from_dict(json.loads(open(net_path).read()))
    spent = _timed_phases(fit_module)
    pf = pq.ParquetFile(path)
    try:  # the network's code type (int8 here); int32 for a checkout from before lean codes
        from adfit.data import codes_dtype
        dtype = codes_dtype(net)
    except ImportError:
        dtype = np.dtype(np.int32)
    codes = np.empty((pf.metadata.num_rows, len(net)), dtype)
    r = 0
    for b in pf.iter_batches(batch_size=1_000_000):
        for j, name in enumerate(net.names):
            col = b.column(name)
            codes[r:r + len(b), j] = np.asarray(col.fill_null(-1).to_numpy(zero_copy_only=False), dtype=dtype)
        r += len(b)
    data = CodedData(codes, np.ones(len(codes)), None, path)
    rss_data = peak_rss_gb()
    marks = []
    t1 = time.perf_counter()
    res = fit(net, data, warn=False, progress=lambda k, it, o, g: marks.append(time.perf_counter() - t1))
    t_fit = time.perf_counter() - t1
    print(json.dumps({"rows": len(codes), "codes_dtype": str(codes.dtype), "rss_data_gb": rss_data, "fit_s": t_fit, "iterations": res.iterations,
                      "converged": res.converged, "log_likelihood": res.log_likelihood,
                      "phases": _phase_fields(spent, t_fit, marks[0] if marks else None),
                      "peak_rss_gb": peak_rss_gb(), "load": load()}))


# --------------------------------------------------------------------------- data for the Parquet run
def write_parquet(folder: str, rows: int, block: int = 1_000_000) -> tuple[str, str]:
    """37-node network with states "0".."k-1"; gaps in GAP_COLUMNS, missing at random."""
    import numpy as np
    import pyarrow as pa
    import pyarrow.parquet as pq

    from workloads import local_network, random_cpts, sample
    net = local_network(37, seed=0)
    probs = random_cpts(net, seed=1)
    spec = {}
    for node in net.nodes:
        spec[node.name] = {"states": [str(k) for k in range(node.card)], "parents": list(node.parents)}
    path = os.path.join(folder, f"records_{rows}.parquet")
    net_path = os.path.join(folder, "network.json")
    with open(net_path, "w") as fh:
        json.dump(spec, fh)
    if os.path.exists(path):
        return path, net_path
    tmp = path + ".part"
    writer = None
    for b, start in enumerate(range(0, rows, block)):
        n = min(block, rows - start)
        x = sample(net, probs, n, seed=1000 + b)
        rng = np.random.default_rng(2000 + b)
        cols = {}
        for j, node in enumerate(net.nodes):
            mask = None
            if j in GAP_COLUMNS:
                drv = x[:, DRIVERS[GAP_COLUMNS.index(j)]]
                mask = rng.random(n) < np.where(drv == 0, 0.45, 0.15)  # MAR: depends on an observed cell
            cols[node.name] = pa.array(x[:, j].astype(np.int8), mask=mask)
        table = pa.table(cols)
        if writer is None:
            writer = pq.ParquetWriter(tmp, table.schema)
        writer.write_table(table, row_group_size=block)
    writer.close()
    os.replace(tmp, path)
    return path, net_path


# --------------------------------------------------------------------------- driver
def run_child(args: list[str]) -> dict:
    out = subprocess.run([sys.executable, __file__, "--child", *args], capture_output=True, text=True)
    if out.returncode != 0:
        raise SystemExit(out.stderr)
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("what", nargs="*", default=["rows", "net200", "parquet"])
    ap.add_argument("--data-dir", default=os.path.join(tempfile.gettempdir(), "adfit-bench-scale"))
    ap.add_argument("--rows-small", type=int, default=100_000)
    ap.add_argument("--rows-large", type=int, default=1_000_000)
    ap.add_argument("--rows-net200", type=int, default=100_000)
    ap.add_argument("--rows-parquet", type=int, default=10_000_000)
    ap.add_argument("--engine", default="duckdb")
    ap.add_argument("--child", nargs="+", default=None, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        kind, *rest = args.child
        if kind == "rows":
            child_rows(int(rest[0]))
        elif kind == "net200":
            child_net200(int(rest[0]))
        elif kind == "parquet-fit":
            child_parquet_fit_only(rest[0], rest[1])
        else:
            child_parquet(rest[0], rest[1], rest[2])
        return
    print(f"{os.cpu_count()} CPUs; load average at start {load()}")
    if "rows" in args.what:
        print("\n== many distinct rows: 37 nodes, 20 % MCAR cells, value and gradient")
        per = {}
        for rows in (args.rows_small, args.rows_large):
            r = run_child(["rows", str(rows)])
            per[rows] = r["us_per_row"]
            print(f"{r['rows']:>10,} distinct rows: plan {r['plan_s']:.1f} s, first call {r['first_call_s']:.1f} s, "
                  f"value+gradient {r['value_grad_s'] * 1e3:.0f} ms = {r['us_per_row']:.2f} us/row, "
                  f"peak RSS {r['peak_rss_gb']:.2f} GB (data alone {r['rss_before_plan_gb']:.2f} GB), "
                  f"route {r['route']}  (load {r['load']})")
        print(f"time per row at {args.rows_large:,} / at {args.rows_small:,}: "
              f"{per[args.rows_large] / per[args.rows_small]:.2f}")
    if "net200" in args.what:
        print(f"\n== 200-node network (treewidth <= 6), {args.rows_net200:,} rows, 20 % MCAR cells")
        r = run_child(["net200", str(args.rows_net200)])
        print(f"plan {r['plan_s']:.1f} s; {r['describe']}")
        print(f"first value+gradient {r['first_call_s']:.1f} s, then {r['value_grad_s']:.2f} s; "
              f"peak RSS of plan and evaluation {r['rss_likelihood_gb']:.2f} GB")
        print(f"fit {r['fit_s']:.1f} s (first iteration after {r['first_iteration_s']:.1f} s: plan, compiles, start): "
              f"{r['iterations']} iterations, converged={r['converged']} ({r['stop_reason']}), gradient norm "
              f"{r['gradient_norm']:.2e}, largest residual {r['max_residual']:.1e}; peak RSS {r['peak_rss_gb']:.2f} GB  "
              f"(load {r['load']})")
        _print_phases(r["phases"])
    if "parquet" in args.what:
        os.makedirs(args.data_dir, exist_ok=True)
        t = time.perf_counter()
        path, net_path = write_parquet(args.data_dir, args.rows_parquet)
        print(f"\n== {args.rows_parquet:,} rows, 37 nodes, MAR gaps in 5 columns, Parquet "
              f"({os.path.getsize(path) / 2 ** 20:.0f} MiB; written or found in {time.perf_counter() - t:.0f} s)")
        r = run_child(["parquet", path, net_path, args.engine])
        print(f"read + reduce ({args.engine}): {r['read_reduce_s']:.1f} s -> {r['distinct']:,} distinct rows "
              f"(RSS {r['rss_after_read_gb']:.2f} GB)")
        print(f"fit: {r['fit_s']:.1f} s ({r['fit_until_first_iteration_s']:.1f} s until the first iteration), "
              f"{r['iterations']} iterations, converged={r['converged']} ({r['stop_reason']}), route {r['route']}")
        _print_phases(r["phases"])
        print(f"end to end {r['end_to_end_s']:.1f} s; peak RSS {r['peak_rss_gb']:.2f} GB  (load {r['load']})")
    if "parquet" in args.what or "parquet-fit" in args.what:
        os.makedirs(args.data_dir, exist_ok=True)
        path, net_path = write_parquet(args.data_dir, args.rows_parquet)
        r = run_child(["parquet-fit", path, net_path])
        print(f"\n== the fit alone on {args.rows_parquet:,} rows (read into codes without reduction, count 1 each): "
              f"{r['fit_s']:.1f} s, {r['iterations']} iterations, converged={r['converged']}, log-likelihood "
              f"{r['log_likelihood']:.6f}; peak RSS {r['peak_rss_gb']:.2f} GB (the {r.get('codes_dtype', 'int32')} codes alone {r['rss_data_gb']:.2f} GB)  "
              f"(load {r['load']})")
        _print_phases(r["phases"])


if __name__ == "__main__":
    main()

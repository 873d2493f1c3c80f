"""Speed and memory of the marginal likelihood, side by side with a straightforward baseline.

Prints, for each workload: the plan (route and blocks), plan time, compile time, one
value-and-gradient, one value, peak memory and (optionally) a whole fit; and the same
value-and-gradient by a baseline written the obvious way (one ``jnp.einsum`` per elimination
step over *all* rows, rows on the leading axis, evidence as indicator vectors for every node, no
chunking, autodiff for the gradient). The two are timed in alternating rounds in the same
process, so that the load of a shared machine hits both alike (each timed call 0.2 s after the
previous one ended, so that no thread pool is still spinning); the script prints the load
average before and after, the minimum and the median of the rounds, and their ratios.

Compile time is the first call minus the median steady call. ``--cache`` also measures the first
call of a fresh process with a persistent compilation cache (``jax_compilation_cache_dir``),
cold and then warm, as a CLI run again and again on the same network would see it.

Workloads (issue targets, 2 cores):
  A. 37-node random network (<= 3 parents, 2-4 states, banded: treewidth about 4),
     100 000 rows, 20 % of cells missing completely at random;
  B. the same network, gaps only in 5 columns, 1 000 000 rows.

Usage:  python benchmarks/bench_likelihood.py [--rows-a 100000] [--rows-b 1000000] [--rounds 5]
                                              [--no-fit] [--no-baseline] [--cache] [--baseline-b]
"""

from __future__ import annotations

import argparse
import os
import platform
import resource
import subprocess
import sys
import tempfile
import time

sys.path.insert(0, os.path.dirname(__file__))

import jax  # noqa: E402
import jax.numpy as jnp  # noqa: E402
import numpy as np  # noqa: E402

import adfit._jax  # noqa: E402,F401  (float64)
from adfit.fit import fit  # noqa: E402
from adfit.likelihood import Likelihood, _min_fill_order, logits_from_probs  # noqa: E402
from workloads import coded, local_network, mask_mcar, random_cpts, sample  # noqa: E402


def peak_rss_gb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1e6


def load() -> str:
    return " ".join(f"{x:.1f}" for x in os.getloadavg())


def machine() -> str:
    cpu = "?"
    try:
        with open("/proc/cpuinfo") as fh:
            cpu = next(line.split(":", 1)[1].strip() for line in fh if line.startswith("model name"))
    except (OSError, StopIteration):
        pass
    mem = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") / 2 ** 30
    return (f"{platform.machine()}, {os.cpu_count()} CPUs ({cpu}), {mem:.0f} GiB RAM, Python {platform.python_version()}, "
            f"jax {jax.__version__}, numpy {np.__version__}")


def once(fn, *args, settle: float = 0.0) -> float:
    if settle:
        time.sleep(settle)  # let the thread pools of the previous call go idle (they spin a while)
    t = time.perf_counter()
    jax.block_until_ready(fn(*args))
    return time.perf_counter() - t


def baseline(net, data):
    """One einsum per elimination step over all rows (rows first), indicators for every node."""
    n = len(net)
    cards = net.cards
    scopes = [tuple(net.parent_indices[i]) + (i,) for i in range(n)]
    order = _min_fill_order(list(range(n)), scopes, cards)
    codes = jnp.asarray(data.codes)
    w = jnp.asarray(data.counts)
    alphabet = "abcdefghijklmnopqrstuvwxyABCDEFGHIJKLMNOPQRSTUVWXYZ"  # 'z' is the row index
    letters = {v: alphabet[v] for v in range(n)}

    def loglik(logits):
        lcs = []
        for node in net.nodes:
            lcs.append(jax.nn.log_softmax(logits[node.name], axis=-1))
        factors = []
        for i in range(n):
            factors.append((jnp.exp(lcs[i]), scopes[i], False))
            c = codes[:, i]
            lam = jnp.where(c[:, None] < 0, 1.0, (c[:, None] == jnp.arange(cards[i])[None, :]).astype(jnp.float64))
            factors.append((lam, (i,), True))
        total = jnp.zeros(codes.shape[0])
        for v in order:
            ins = [f for f in factors if v in f[1]]
            factors = [f for f in factors if v not in f[1]]
            union = []
            for _, sc, _ in ins:
                for u in sc:
                    if u not in union:
                        union.append(u)
            out_sc = tuple(u for u in union if u != v)
            subs = []
            for _, sc, batched in ins:
                subs.append(("z" if batched else "") + "".join(letters[u] for u in sc))
            expr = ",".join(subs) + "->z" + "".join(letters[u] for u in out_sc)
            msg = jnp.einsum(expr, *[a for a, _, _ in ins])
            s = jax.lax.stop_gradient(jnp.max(msg.reshape(msg.shape[0], -1), axis=1))
            s = jnp.where(s > 0, s, 1.0)
            msg = msg / s.reshape((-1,) + (1,) * len(out_sc))
            total = total + jnp.log(s)
            factors.append((msg, out_sc, True))
        for a, sc, _ in factors:
            total = total + jnp.log(a)
        return jnp.sum(w * total)

    return jax.jit(jax.value_and_grad(loglik))


def stats(ts):
    return min(ts), float(np.median(ts))


def run_workload(label, net, probs, data, *, rounds: int, with_fit: bool, with_baseline: bool):
    print(f"\n== {label}: {len(net)} nodes, {data.n_rows:,.0f} records, {data.n_distinct:,} distinct rows  (load {load()})")
    t = time.perf_counter()
    lik = Likelihood(net, data)
    t_plan = time.perf_counter() - t
    print(f"plan: {t_plan:.2f} s; route {lik.plan.route}")
    print(f"  {lik.plan.describe()}")
    lc = [jnp.asarray(np.log(probs[n])) for n in net.names]
    logits = {k: jnp.asarray(v) for k, v in logits_from_probs(net, probs).items()}
    first_vg = once(lik.expected_counts_logcpt, lc)
    first_v = once(lik.value_logcpt, lc)
    print(f"peak RSS after adfit's plan, compile and first calls: {peak_rss_gb():.2f} GB")
    vg_b = None
    if with_baseline:
        vg_b = baseline(net, data)
        first_b = once(vg_b, logits)
    t_a, t_v, t_b = [], [], []
    for _ in range(rounds):
        t_a.append(once(lik.expected_counts_logcpt, lc, settle=0.2))
        t_v.append(once(lik.value_logcpt, lc, settle=0.2))
        if vg_b is not None:
            t_b.append(once(vg_b, logits, settle=0.2))
    a_min, a_med = stats(t_a)
    v_min, v_med = stats(t_v)
    print(f"adfit    value+gradient  min {a_min * 1e3:8.1f} ms  median {a_med * 1e3:8.1f} ms   "
          f"compile {first_vg - a_med:.2f} s (first call {first_vg:.2f} s)")
    print(f"adfit    value only      min {v_min * 1e3:8.1f} ms  median {v_med * 1e3:8.1f} ms   "
          f"compile {first_v - v_med:.2f} s")
    print(f"         per distinct row: {a_med / data.n_distinct * 1e6:.3f} us (value+gradient)")
    if vg_b is not None:
        b_min, b_med = stats(t_b)
        print(f"baseline value+gradient  min {b_min * 1e3:8.1f} ms  median {b_med * 1e3:8.1f} ms   "
              f"compile {first_b - b_med:.2f} s")
        print(f"ratio baseline / adfit (value+gradient): {b_min / a_min:.1f}x on minima, {b_med / a_med:.1f}x on medians "
              f"({rounds} alternating rounds)")
        print(f"peak RSS with the baseline: {peak_rss_gb():.2f} GB")
    if with_fit:
        t = time.perf_counter()
        res = fit(net, data, warn=False)
        t_fit = time.perf_counter() - t
        print(f"whole fit {t_fit:.1f} s (plan and every compile inside): {res.iterations} iterations, "
              f"converged={res.converged} ({res.stop_reason}), gradient norm {res.gradient_norm:.2e}")
        print(f"peak RSS so far {peak_rss_gb():.2f} GB")
    print(f"(load {load()})")


def workload(name: str, rows: int):
    net = local_network(37, seed=0)
    probs = random_cpts(net, seed=1)
    if name == "A":
        x = sample(net, probs, rows, seed=2)
        return net, probs, coded(net, mask_mcar(net, x, 0.2, seed=3))
    x = sample(net, probs, rows, seed=4)
    return net, probs, coded(net, mask_mcar(net, x, 0.3, columns=[3, 9, 15, 22, 30], seed=5))


def first_call_child(name: str, rows: int) -> None:
    """In a fresh process: plan, then the first value-and-gradient (compile included)."""
    net, probs, data = workload(name, rows)
    t = time.perf_counter()
    lik = Likelihood(net, data)
    lc = [jnp.asarray(np.log(probs[n])) for n in net.names]
    t1 = time.perf_counter()
    jax.block_until_ready(lik.expected_counts_logcpt(lc))
    t2 = time.perf_counter()
    jax.block_until_ready(lik.expected_counts_logcpt(lc))
    t3 = time.perf_counter()
    print(f"plan {t1 - t:.2f} s, first call {t2 - t1:.2f} s, second {t3 - t2:.3f} s")


def cache_figures(name: str, rows: int) -> None:
    with tempfile.TemporaryDirectory() as d:
        for what in ("cold cache", "warm cache"):
            env = dict(os.environ, JAX_COMPILATION_CACHE_DIR=d, JAX_PERSISTENT_CACHE_MIN_COMPILE_TIME_SECS="0",
                       JAX_PERSISTENT_CACHE_MIN_ENTRY_SIZE_BYTES="0")
            out = subprocess.run([sys.executable, __file__, "--child", name, "--rows-a", str(rows)], env=env,
                                 capture_output=True, text=True, check=True).stdout.strip()
            print(f"fresh process, {what}: {out}")


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--rows-a", type=int, default=100_000)
    ap.add_argument("--rows-b", type=int, default=1_000_000)
    ap.add_argument("--rounds", type=int, default=5)
    ap.add_argument("--no-fit", action="store_true")
    ap.add_argument("--no-baseline", action="store_true")
    ap.add_argument("--cache", action="store_true", help="also time first calls with a persistent compilation cache")
    ap.add_argument("--baseline-b", action="store_true",
                    help="also run the baseline on workload B (it holds every row's cliques: ~1 GB per 100 000 rows)")
    ap.add_argument("--child", default=None, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        first_call_child(args.child, args.rows_a)
        return
    print(f"machine: {machine()}")
    print(f"load average at start: {load()}")
    if args.rows_a:
        net, probs, data_a = workload("A", args.rows_a)
        run_workload("A: 20 % MCAR cells", net, probs, data_a, rounds=args.rounds, with_fit=not args.no_fit,
                     with_baseline=not args.no_baseline)
        if args.cache:
            print("\n== A: first call in a fresh process with a persistent compilation cache")
            cache_figures("A", args.rows_a)
        del data_a
    if args.rows_b:
        net, probs, data_b = workload("B", args.rows_b)
        run_workload("B: gaps in 5 columns", net, probs, data_b, rounds=args.rounds, with_fit=not args.no_fit,
                     with_baseline=args.baseline_b)


if __name__ == "__main__":
    main()

"""Reading records with a count column: load_data on 1 M rows x 8 three-state columns + counts.

Prints the median and fastest of 5 warm calls. Run it at two commits side by side (set
PYTHONPATH to each checkout) to see what a change to the validation of counts costs:

    PYTHONPATH=/path/to/old python benchmarks/bench_count_column.py
    PYTHONPATH=/path/to/new python benchmarks/bench_count_column.py
"""
import sys, time, numpy as np, pandas as pd, statistics
from adfit.network import parse_network
from adfit.data import load_data
import adfit

print(adfit.__file__)
net = parse_network({"nodes": {f"x{i}": {"states": ["a", "b", "c"]} for i in range(8)}})
rng = np.random.default_rng(0)
n = 1_000_000
df = pd.DataFrame({f"x{i}": np.array(["a", "b", "c"], dtype=object)[rng.integers(0, 3, n)] for i in range(8)})
df["n"] = rng.integers(1, 50, n).astype(float)
load_data(net, df.head(1000), count_column="n")
ts = []
for _ in range(5):
    t = time.perf_counter(); load_data(net, df, count_column="n"); ts.append(time.perf_counter() - t)
print(f"load_data, 1 M rows x 8 columns + count column: median {statistics.median(ts):.3f} s, min {min(ts):.3f} s")

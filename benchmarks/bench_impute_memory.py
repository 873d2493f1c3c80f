"""Peak memory of `adfit impute` against the number of records (the demo gearbox network, its
records repeated), and the estimate adfit.limits makes before the work. Prints one line per size:
records, wall time, peak resident memory of the command (getrusage of the child), the estimate.

Usage: python benchmarks/bench_impute_memory.py [records ...]   (default: 100000 300000 1000000)
"""

from __future__ import annotations

import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(HERE))

DEMO = HERE / "adfit" / "demo"


def main() -> None:
    sizes = [int(a) for a in sys.argv[1:]] or [100_000, 300_000, 1_000_000]
    env = {**os.environ, "PYTHONPATH": str(HERE)}
    from adfit import limits
    from adfit.network import load_network

    net = load_network(DEMO / "gearbox.toml")
    with tempfile.TemporaryDirectory() as t:
        d = Path(t)
        fit = d / "fit.json"
        subprocess.run([sys.executable, "-m", "adfit", "em", str(DEMO / "gearbox.toml"), str(DEMO / "gearbox_records.csv"),
                        "--out", str(fit)], check=True, env=env, capture_output=True)
        lines = (DEMO / "gearbox_records.csv").read_text().splitlines()
        head, body = lines[0], lines[1:]
        for n in sizes:
            data = d / f"r{n}.csv"
            with data.open("w") as fh:
                fh.write(head + "\n")
                for i in range(n):
                    fh.write(body[i % len(body)] + "\n")
            out = d / "out.csv"
            script = ("import resource, sys; from adfit.cli import main; sys.argv = ['adfit'] + sys.argv[1:]\n"
                      "try:\n    main()\nfinally:\n"
                      "    print('peak', resource.getrusage(resource.RUSAGE_SELF).ru_maxrss, file=sys.stderr)")
            t0 = time.perf_counter()
            p = subprocess.run([sys.executable, "-c", script, "impute", str(DEMO / "gearbox.toml"), str(data),
                                "--params", str(fit), "--out", str(out)], env=env, capture_output=True, text=True)
            dt = time.perf_counter() - t0
            peak = [int(x.split()[1]) for x in p.stderr.splitlines() if x.startswith("peak ")]
            from adfit.data import load_data
            from adfit.impute import default_nodes

            est = limits.impute_bytes(n, len(head.split(",")), net, default_nodes(net, load_data(net, DEMO / "gearbox_records.csv")))
            print(f"{n:>9,} records  {dt:6.1f} s  peak {peak[0] / 1024 if peak else float('nan'):7.0f} MiB  "
                  f"estimate {est / 2 ** 20:7.0f} MiB  exit {p.returncode}", flush=True)
            if p.returncode:
                print(p.stderr[-500:])
            data.unlink()
            out.unlink(missing_ok=True)


if __name__ == "__main__":
    main()

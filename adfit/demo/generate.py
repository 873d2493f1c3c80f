"""The seeded generator of the demo records (``gearbox_records.csv``).

The scenario is invented for the demo and the records are simulated from the CPTs below (the
demo's "truth"). Run ``python -m adfit.demo.generate [--out FILE]`` to write the file again;
with the default seed and size it reproduces the embedded CSV byte for byte.

How the gaps arise:

* ``bearing_wear`` is recorded only when a technician inspected the gearbox, and an inspection
  is far more likely after the vibration alarm was raised (:data:`INSPECT_IF_ALARM` against
  :data:`INSPECT_IF_QUIET`). The gaps in ``bearing_wear`` therefore depend on an observed column
  (``vibration_alarm``, which has no gaps): missing at random (MAR), not completely at random.
  Rows with an inspection over-represent alarmed turbines, hence worn bearings.
* ``load``, ``lube_age``, ``oil_debris`` and ``temp_alarm`` lose a few cells to sensor outages and
  lost log entries, independently of everything (MCAR), at the rates of :data:`OUTAGE`.
* ``contamination`` is latent: it has no column at all.

Only ``Generator.random`` is used (inverse-CDF draws), whose stream numpy keeps stable across
versions, so the same seed gives the same file.
"""

from __future__ import annotations

import argparse
import io
from pathlib import Path

import numpy as np

SEED = 20240611
N_RECORDS = 4000

#: the node order and states of gearbox.toml (the generator does not read the file)
STATES: dict[str, tuple[str, ...]] = {
    "season": ("winter", "spring", "summer", "autumn"),
    "load": ("low", "medium", "high"),
    "lube_age": ("fresh", "mid", "old"),
    "contamination": ("clean", "contaminated"),
    "bearing_wear": ("none", "light", "heavy"),
    "vibration_alarm": ("off", "on"),
    "oil_debris": ("low", "high"),
    "temp_alarm": ("off", "on"),
    "failure": ("no", "yes"),
}
PARENTS: dict[str, tuple[str, ...]] = {
    "season": (),
    "load": ("season",),
    "lube_age": (),
    "contamination": ("lube_age",),
    "bearing_wear": ("load", "contamination"),
    "vibration_alarm": ("bearing_wear",),
    "oil_debris": ("bearing_wear", "contamination"),
    "temp_alarm": ("load", "contamination"),
    "failure": ("bearing_wear",),
}

#: the simulation's CPTs, in the network table layout (rows: parent configurations, last
#: parent varying fastest). Invented, chosen to be plausible, not taken from any fleet.
TRUE_CPTS: dict[str, list[list[float]]] = {
    "season": [[0.27, 0.24, 0.22, 0.27]],
    "load": [
        [0.15, 0.40, 0.45],  # winter: strong winds
        [0.30, 0.45, 0.25],  # spring
        [0.50, 0.35, 0.15],  # summer: light winds
        [0.20, 0.45, 0.35],  # autumn
    ],
    "lube_age": [[0.35, 0.40, 0.25]],
    "contamination": [
        [0.90, 0.10],  # fresh oil
        [0.75, 0.25],  # mid
        [0.50, 0.50],  # old oil
    ],
    "bearing_wear": [
        [0.75, 0.20, 0.05],  # load low,    clean
        [0.50, 0.35, 0.15],  # load low,    contaminated
        [0.65, 0.27, 0.08],  # load medium, clean
        [0.35, 0.40, 0.25],  # load medium, contaminated
        [0.50, 0.35, 0.15],  # load high,   clean
        [0.20, 0.40, 0.40],  # load high,   contaminated
    ],
    "vibration_alarm": [
        [0.93, 0.07],  # wear none
        [0.75, 0.25],  # light
        [0.30, 0.70],  # heavy
    ],
    "oil_debris": [
        [0.92, 0.08],  # wear none,  clean
        [0.45, 0.55],  # wear none,  contaminated
        [0.80, 0.20],  # wear light, clean
        [0.35, 0.65],  # wear light, contaminated
        [0.45, 0.55],  # wear heavy, clean
        [0.15, 0.85],  # wear heavy, contaminated
    ],
    "temp_alarm": [
        [0.96, 0.04],  # load low,    clean
        [0.75, 0.25],  # load low,    contaminated
        [0.93, 0.07],  # load medium, clean
        [0.65, 0.35],  # load medium, contaminated
        [0.88, 0.12],  # load high,   clean
        [0.50, 0.50],  # load high,   contaminated
    ],
    "failure": [
        [0.99, 0.01],  # wear none
        [0.96, 0.04],  # light
        [0.80, 0.20],  # heavy
    ],
}

#: chance that a gearbox is inspected (so that bearing_wear is recorded) in a quarter ...
INSPECT_IF_ALARM = 0.80  # ... after the vibration alarm was raised
INSPECT_IF_QUIET = 0.30  # ... without an alarm (routine inspections)
#: share of cells lost to sensor outages and lost log entries, independently of everything
OUTAGE: dict[str, float] = {"load": 0.03, "lube_age": 0.04, "oil_debris": 0.06, "temp_alarm": 0.05}

#: the columns of the CSV (every node but the latent one), in network order
COLUMNS: tuple[str, ...] = tuple(n for n in STATES if n != "contamination")


def true_tables() -> dict[str, np.ndarray]:
    """The true CPTs as arrays shaped ``(*parent_cards, card)``."""
    out = {}
    for name, rows in TRUE_CPTS.items():
        shape = tuple(len(STATES[p]) for p in PARENTS[name]) + (len(STATES[name]),)
        out[name] = np.asarray(rows, dtype=np.float64).reshape(shape)
    return out


def _draw(rng: np.random.Generator, probs: np.ndarray) -> np.ndarray:
    """One category per row of ``probs`` (rows, card) by the inverse CDF of a uniform draw."""
    u = rng.random(probs.shape[0])
    cum = np.cumsum(probs, axis=1)
    cum[:, -1] = 1.0
    return (u[:, None] >= cum).sum(axis=1)


def simulate(n_records: int = N_RECORDS, seed: int = SEED) -> dict[str, np.ndarray]:
    """Simulated records as codes: every node (the latent one included), plus ``inspected``.

    Returns ``{name: int array (n_records,)}`` with state indices, before any gap is made, and
    ``"inspected"`` (0/1).
    """
    rng = np.random.default_rng(seed)
    t = true_tables()
    x: dict[str, np.ndarray] = {}
    for name in STATES:  # topological order
        table = t[name]
        pa = PARENTS[name]
        rows = table.reshape(-1, table.shape[-1])[0:1].repeat(n_records, axis=0) if not pa else \
            table[tuple(x[p] for p in pa)]
        x[name] = _draw(rng, rows)
    p_inspect = np.where(x["vibration_alarm"] == 1, INSPECT_IF_ALARM, INSPECT_IF_QUIET)
    x["inspected"] = (rng.random(n_records) < p_inspect).astype(np.int64)
    return x


def records(n_records: int = N_RECORDS, seed: int = SEED) -> tuple[list[list[str]], dict[str, np.ndarray]]:
    """The CSV rows (labels, ``""`` for a gap) and the full simulated codes behind them."""
    x = simulate(n_records, seed)
    rng = np.random.default_rng([seed, 1])  # a separate stream for the outages
    hidden = {c: np.zeros(n_records, dtype=bool) for c in COLUMNS}
    hidden["bearing_wear"] = x["inspected"] == 0
    for c in COLUMNS:  # fixed order, so the stream is reproducible
        if c in OUTAGE:
            hidden[c] = rng.random(n_records) < OUTAGE[c]
    rows = []
    for i in range(n_records):
        rows.append(["" if hidden[c][i] else STATES[c][x[c][i]] for c in COLUMNS])
    return rows, x


def csv_text(n_records: int = N_RECORDS, seed: int = SEED) -> str:
    """The demo CSV as text (header, then one line per record; ``\\n`` line ends)."""
    rows, _ = records(n_records, seed)
    buf = io.StringIO()
    buf.write(",".join(COLUMNS) + "\n")
    for r in rows:
        buf.write(",".join(r) + "\n")
    return buf.getvalue()


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description="Write the simulated gearbox records of the adfit demo.")
    ap.add_argument("--out", type=Path, default=Path(__file__).with_name("gearbox_records.csv"))
    ap.add_argument("--records", type=int, default=N_RECORDS)
    ap.add_argument("--seed", type=int, default=SEED)
    args = ap.parse_args(argv)
    from ..io import atomic_write

    with atomic_write(args.out, "wb") as fh:  # bytes: the same line ends on every platform
        fh.write(csv_text(args.records, args.seed).encode("utf-8"))
    print(f"wrote {args.out} ({args.records} records, seed {args.seed})")


if __name__ == "__main__":
    main()

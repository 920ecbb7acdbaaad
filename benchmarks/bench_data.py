"""Benchmark of the historian data layer.

Reading, converting and masking a long-format export of 10 tags x 100,000 rows each
(1,000,000 rows: ISO 8601 stamps with offsets, tag, value, quality), against a bare
``pandas.read_csv`` of the same file in the same run.  The target: at most 3x its time.

    python benchmarks/bench_data.py [--rows 100000] [--repeat 3] [--spikes]

The scenario is invented: five inputs and five outputs of a process unit logged every 10 s,
with a bad-quality stretch and an out-of-range run per tag, units to convert (degF readings,
kW, kg/h, psig, %-of-span).  The two sides run alternately and the best of ``--repeat``
timings of each is compared (the machine's load varies); one warm-up load first pays the
one-time setup (the unit registry; each tag's unit conversion, which is remembered per
declaration), as any second load in a process would not.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from graybox.data import SymbolInfo, load_experiment  # noqa: E402

TAGS = {  # symbol -> (tag, role, model units, tag config)
    "T1": ("TI_101", "output", "K", {"units": "degF", "temperature": "reading", "valid": [0, 400]}),
    "T2": ("TI_102", "output", "degC", {"units": "degF", "temperature": "reading", "valid": [0, 400]}),
    "P1": ("PI_201", "output", "Pa", {"units": "psig", "atmosphere": "101.325 kPa", "valid": [0, 200]}),
    "L1": ("LI_301", "output", "m", {"units": "%", "span": [0, 4], "span_units": "m", "valid": [0, 100]}),
    "X1": ("AI_401", "output", "dimensionless", {"units": "percent", "valid": [0, 100]}),
    "Q1": ("JI_501", "input", "W", {"units": "kW", "valid": [0, 500]}),
    "Q2": ("JI_502", "input", "W", {"units": "Btu/h", "valid": [0, 2e6]}),
    "F1": ("FI_601", "input", "kg/s", {"units": "kg/h", "valid": [0, 1e4]}),
    "F2": ("FI_602", "input", "kg/s", {"units": "lb/h", "valid": [0, 1e4]}),
    "V1": ("ZI_701", "input", "dimensionless", {"units": "%", "valid": [0, 100]}),
}


def write_export(path: Path, rows: int, seed: int = 1) -> None:
    rng = np.random.default_rng(seed)
    t = pd.Timestamp("2026-01-01T00:00Z") + pd.to_timedelta(np.arange(rows) * 10, unit="s")
    stamps = t.tz_convert("Europe/Berlin").strftime("%Y-%m-%dT%H:%M:%S%z").str.replace(
        r"(\d\d)(\d\d)$", r"\1:\2", regex=True)
    frames = []
    for k, (tag, *_rest) in enumerate(TAGS.values()):
        v = 50 + 10 * np.sin(np.arange(rows) / (500 + 37 * k)) + rng.normal(0, 0.3, rows)
        q = np.full(rows, "Good", dtype=object)
        q[1000:1100] = "Bad"
        v[5000:5050] = 1e7
        frames.append(pd.DataFrame({"timestamp": stamps, "tag": tag, "value": np.round(v, 3), "quality": q}))
    pd.concat(frames).sort_values("timestamp", kind="stable").to_csv(path, index=False)


def config(path: Path, spikes: bool) -> tuple[dict, dict]:
    table = {"files": [path.name], "layout": "long", "time_column": "timestamp", "quality_column": "quality",
             "good_quality": ["good"], "max_gap": "5 min", "tags": {}}
    if spikes:
        table["spikes"] = {"window": "10 min", "threshold": 6}
    symbols = {}
    for sym, (tag, role, units, extra) in TAGS.items():
        table["tags"][sym] = {"tag": tag, **extra}
        symbols[sym] = SymbolInfo(sym, role, units)
    return table, symbols


def best_of(fn, repeat: int) -> tuple[float, object]:
    best, out = float("inf"), None
    for _ in range(repeat):
        t0 = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t0)
    return best, out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=100_000, help="rows per tag")
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--spikes", action="store_true", help="also run the robust spike filter")
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "export_long.csv"
        write_export(path, args.rows)
        size = path.stat().st_size / 1e6
        table, symbols = config(path, args.spikes)
        def ours_fn():
            return load_experiment(table, "bench", symbols=symbols, base_dir=Path(tmp),
                                   where=f"{tmp}/bench.toml [data]")

        t0 = time.perf_counter()
        ours_fn()
        first = time.perf_counter() - t0
        bare, ours = float("inf"), float("inf")
        for _ in range(args.repeat):
            b, frame = best_of(lambda: pd.read_csv(path), 1)
            o, (rec, rep) = best_of(ours_fn, 1)
            bare, ours = min(bare, b), min(ours, o)
        masked = sum(t.masked_total for t in rep.tags)
    ratio = ours / bare
    print(f"file: {len(frame):,} rows ({len(TAGS)} tags x {args.rows:,}), {size:.1f} MB")
    print(f"pandas.read_csv (bare):              {bare:7.3f} s")
    print(f"graybox load_experiment{' + spikes' if args.spikes else ''}: {ours:7.3f} s  "
          f"({masked:,} values masked, {len(rec.segments)} segment(s))")
    print(f"first load in this process (with one-time setup): {first:.3f} s")
    print(f"ratio: {ratio:.2f}x (target <= 3x)")
    return 0 if ratio <= 3.0 else 1


if __name__ == "__main__":
    raise SystemExit(main())

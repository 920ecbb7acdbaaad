"""The demo's whole job, ``graybox demo`` (least squares, then posterior sampling to
convergence), stage by stage: first with an empty compile cache (cold: numba compiles the
model's kernels), then again with the cache filled (warm), each in a fresh process.

    python benchmarks/bench_demo.py [--no-sample]

Wall times are measured around each process (interpreter start and imports included); the
stages come from the run's own record (``results.json``: run.stages, run.wall_s).  Target
(issue 5): the whole job, fit and converged posterior, under 60 s on 2 cores.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def run_once(cache: Path, out: Path, sample: bool) -> tuple[float, dict]:
    env = dict(os.environ, GRAYBOX_CACHE_DIR=str(cache), NUMBA_NUM_THREADS="1")
    cmd = [sys.executable, "-m", "graybox", "demo", "--out", str(out)] + ([] if sample else ["--no-sample"])
    t0 = time.perf_counter()
    proc = subprocess.run(cmd, env=env, cwd=ROOT, capture_output=True, text=True)
    wall = time.perf_counter() - t0
    if proc.returncode != 0:
        sys.exit(f"graybox demo failed ({proc.returncode}):\n{proc.stdout[-3000:]}\n{proc.stderr[-3000:]}")
    return wall, json.loads((out / "results.json").read_text())


def report(label: str, wall: float, doc: dict) -> None:
    run = doc["run"]
    print(f"\n== {label} ==")
    print(f"  process wall time (start, imports, job, exit): {wall:7.2f} s")
    print(f"  job wall time (run record):                    {run['wall_s']:7.2f} s")
    for stage, seconds in run["stages"].items():
        print(f"    {stage:<40s} {seconds:7.2f} s")
    sampler = doc.get("sampler")
    if sampler:
        keys = ("converged", "steps", "walkers", "draws")
        print("  sampler: " + ", ".join(f"{k} {sampler[k]}" for k in keys if k in sampler))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--no-sample", action="store_true", help="least squares only")
    args = ap.parse_args()
    print(f"{os.cpu_count()} logical cores; numba threads per process: 1")
    with tempfile.TemporaryDirectory(prefix="graybox-bench-demo-") as tmp:
        tmp = Path(tmp)
        cache = tmp / "cache"
        for label in ("cold (empty compile cache)", "warm (compiled kernels loaded from the cache)"):
            out = tmp / label.split()[0]
            wall, doc = run_once(cache, out, not args.no_sample)
            report(label, wall, doc)


if __name__ == "__main__":
    main()

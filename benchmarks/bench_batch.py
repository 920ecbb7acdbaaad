"""How far one machine goes with fleet batches: ``graybox batch`` on the local process pool.

    python benchmarks/bench_batch.py [--jobs 12] [--workers 2] [--sample]

The fleet is the bundled demo study fitted on ``--jobs`` overlapping 24-hour windows of the
demo log (a year of daily windows of one unit looks like this).  Every job runs in its own
process (its own interpreter start and imports, the compiled model loaded from the on-disk
cache after the first job of a model), so the per-job figure is what a fleet pays per unit.
One job first warms the compile cache; then the whole fleet is timed, and the same fleet
run again shows the rerun skip (config and data hashes unchanged).
"""

from __future__ import annotations

import argparse
import os
import shutil
import sys
import tempfile
import time
from pathlib import Path

import pandas as pd

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from graybox.batch.runner import BatchSettings, run_batch  # noqa: E402

STUDY = ROOT / "configs" / "storage_vessel.toml"
DATA = ROOT / "datasets" / "storage_vessel" / "vessel_log.csv"


def fleet(folder: Path, n_jobs: int, sample: bool) -> Path:
    (folder / "data").mkdir()
    shutil.copyfile(DATA, folder / "data" / DATA.name)
    text = STUDY.read_text().replace('files = ["../datasets/storage_vessel/vessel_log.csv"]',
                                     f'files = ["data/{DATA.name}"]')
    (folder / "study.toml").write_text(text)
    start = pd.Timestamp("2026-02-09T06:00:00+01:00")
    step = pd.Timedelta(hours=48) / max(n_jobs - 1, 1)
    rows = ["job,study,data,start,end,sample"]
    for i in range(n_jobs):
        lo = start + i * step
        rows.append(f"W{i:03d},study.toml,,{lo.isoformat()},{(lo + pd.Timedelta(hours=24)).isoformat()},"
                    f"{'yes' if sample else 'no'}")
    path = folder / "fleet.csv"
    path.write_text("\n".join(rows) + "\n")
    return path


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--jobs", type=int, default=12)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--sample", action="store_true", help="posterior sampling in every job")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory(prefix="graybox-bench-batch-") as tmp:
        tmp = Path(tmp)
        os.environ.setdefault("GRAYBOX_CACHE_DIR", str(tmp / "cache"))
        manifest = fleet(tmp, args.jobs, args.sample)
        quiet = lambda *a, **k: None  # noqa: E731
        t0 = time.perf_counter()
        warm_manifest = tmp / "one.csv"
        warm_manifest.write_text("\n".join(manifest.read_text().splitlines()[:2]) + "\n")
        run_batch(warm_manifest, BatchSettings(tmp / "warm", workers=1), echo=quiet)
        t_warm = time.perf_counter() - t0
        t0 = time.perf_counter()
        table = run_batch(manifest, BatchSettings(tmp / "fleet", workers=args.workers), echo=quiet)
        t_fleet = time.perf_counter() - t0
        t0 = time.perf_counter()
        again = run_batch(manifest, BatchSettings(tmp / "fleet", workers=args.workers), echo=quiet)
        t_rerun = time.perf_counter() - t0
    done = int((table["status"] == "done").sum())
    per_job = t_fleet / args.jobs
    print(f"{os.cpu_count()} logical cores, {args.workers} workers, {args.jobs} jobs "
          f"({'with' if args.sample else 'without'} posterior sampling)")
    print(f"first job (cold compile cache, one worker): {t_warm:.1f} s")
    print(f"fleet: {done}/{args.jobs} done in {t_fleet:.1f} s = {per_job:.2f} s per job "
          f"({3600 / per_job:,.0f} jobs per hour on this machine)")
    print(f"median job wall time inside its process: {table['wall_s'].median():.2f} s")
    print(f"rerun with nothing changed: {int((again['status'] == 'skipped').sum())} skipped in {t_rerun:.2f} s")
    return 0 if done == args.jobs else 1


if __name__ == "__main__":
    raise SystemExit(main())

"""Fleet batches: local pool and a Dask LocalCluster on loopback.

The reference for a batch is the same fits run one by one in this process: a batch must
give identical estimates (same data, same seed derivation, same code)."""

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from graybox.batch.manifest import read_manifest
from graybox.batch.runner import BatchSettings, job_seed, run_batch
from graybox.errors import BatchError
from graybox.workflow import fit_study

STUDY = """
[study]
name = "lag_unit"
seed = 7

[model.states.y]
units = ""
rate = "(K*u - y)/tau"
initial = "measured"

[model.inputs]
u = ""

[parameters.K]
guess = 1.0
bounds = [0.1, 10.0]

[parameters.tau]
guess = 50.0
bounds = [1.0, 1000.0]
units = "s"

[data]
files = ["unit.csv"]
time_column = "t"
time_format = "epoch_s"

[data.tags]
u = "u"
y = "y"

[estimate]
engine = "reference"
"""


def unit_data(path: Path, K: float, tau: float, seed: int, broken: bool = False) -> None:
    """Exact first-order response to held steps (closed form per interval) plus noise."""
    rng = np.random.default_rng(seed)
    t = np.arange(0.0, 1200.0, 10.0)
    u = np.where((t // 200) % 2 == 0, 1.0, 0.0)
    y = np.empty_like(t)
    y[0] = 0.3
    for k in range(1, t.size):
        y[k] = K * u[k - 1] + (y[k - 1] - K * u[k - 1]) * np.exp(-10.0 / tau)
    y += 0.01 * rng.standard_normal(t.size)
    cells = [f"{a:.1f},{b:.1f},{c:.6f}" for a, b, c in zip(t + 1.7e9, u, y)]
    if broken:
        cells[5] = cells[5].rsplit(",", 1)[0] + ",n/a?"
    path.write_text("t,u,y\n" + "\n".join(cells) + "\n")


def fleet(tmp_path: Path, n: int, broken: int | None = None, timeouts: dict | None = None) -> Path:
    (tmp_path / "study.toml").write_text(STUDY)
    rows = ["job,study,data,timeout"]
    for i in range(n):
        data = tmp_path / f"unit{i:02d}.csv"
        unit_data(data, 1.0 + 0.1 * i, 40.0 + 5 * i, i, broken=(i == broken))
        rows.append(f"U{i:02d},study.toml,{data.name},{(timeouts or {}).get(i, '')}")
    manifest = tmp_path / "fleet.csv"
    manifest.write_text("\n".join(rows) + "\n")
    return manifest


def one_by_one(manifest: Path, out: Path, base_seed: int) -> dict:
    out.mkdir()
    estimates = {}
    for job in read_manifest(manifest):
        if not job.data or "unit05" in str(job.data[0]):
            continue
        doc = fit_study(job.study, out / job.name, echo=lambda _m: None, sample=False, overrides=job.overrides(),
                        seed=job_seed(base_seed, job.name))
        estimates[job.name] = (doc["parameters"]["K"]["estimate"], doc["parameters"]["tau"]["estimate"])
    return estimates


@pytest.mark.slow
def test_twenty_jobs_on_a_local_cluster_match_one_by_one(tmp_path):
    from distributed import LocalCluster

    manifest = fleet(tmp_path, 20, broken=5)
    reference = one_by_one(manifest, tmp_path / "single", base_seed=3)
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address=None) as cluster:
        df = run_batch(manifest, BatchSettings(tmp_path / "fleet", timeout_s=300, cluster=cluster.scheduler_address,
                                               base_seed=3), echo=lambda _m: None)
    assert len(df) == 20
    failed = df[df.status == "failed"]
    assert list(failed.job) == ["U05"]
    assert "line 7" in failed.error.iloc[0] and "n/a?" in failed.error.iloc[0]
    done = df[df.status == "done"].set_index("job")
    assert len(done) == 19
    for name, (k, tau) in reference.items():
        assert done.loc[name, "K.estimate"] == pytest.approx(k, rel=1e-12)
        assert done.loc[name, "tau.estimate"] == pytest.approx(tau, rel=1e-12)
    assert (tmp_path / "fleet" / "U00" / "results.json").is_file()
    table = pd.read_parquet(tmp_path / "fleet" / "jobs.parquet")
    assert set(table.job) == set(df.job)


def test_local_pool_timeout_and_rerun_skip(tmp_path):
    manifest = fleet(tmp_path, 3, timeouts={2: 0.2})
    out = tmp_path / "fleet"
    df = run_batch(manifest, BatchSettings(out, workers=2, timeout_s=300), echo=lambda _m: None)
    status = dict(zip(df.job, df.status))
    assert status == {"U00": "done", "U01": "done", "U02": "timeout"}
    assert "timeout" in df.set_index("job").loc["U02", "error"]
    again = run_batch(manifest, BatchSettings(out, workers=2, timeout_s=300), echo=lambda _m: None)
    assert dict(zip(again.job, again.status))["U00"] == "skipped"
    # a changed data file is not skipped
    unit_data(tmp_path / "unit01.csv", 2.0, 80.0, 99)
    third = run_batch(manifest, BatchSettings(out, workers=2, timeout_s=300), echo=lambda _m: None)
    assert dict(zip(third.job, third.status))["U01"] == "done"
    doc = json.loads((out / "U01" / "results.json").read_text())
    assert doc["run"]["batch"]["job"] == "U01"


def test_manifest_errors_name_the_line(tmp_path):
    (tmp_path / "study.toml").write_text(STUDY)
    (tmp_path / "m.csv").write_text("job,study,data\nA,study.toml,missing.csv\n")
    with pytest.raises(BatchError, match=r"m.csv:2.*data file not found"):
        read_manifest(tmp_path / "m.csv")
    (tmp_path / "m.csv").write_text("job,study,start,end\nA,study.toml,2026-02-01,2026-01-01\n")
    with pytest.raises(BatchError, match=r"m.csv:2.*ends .* before it starts"):
        read_manifest(tmp_path / "m.csv")
    (tmp_path / "m.csv").write_text("job,study,strat\nA,study.toml,2026-02-01\n")
    with pytest.raises(BatchError, match="did you mean 'start'"):
        read_manifest(tmp_path / "m.csv")
    (tmp_path / "m.csv").write_text("job,study,start\nA,study.toml,yesterday-ish\n")
    with pytest.raises(BatchError, match="is not a timestamp"):
        read_manifest(tmp_path / "m.csv")


def test_cluster_that_does_not_answer(tmp_path):
    import socket
    import time

    manifest = fleet(tmp_path, 1)
    with socket.socket() as s:  # a free loopback port with nothing listening
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    t0 = time.perf_counter()
    with pytest.raises(BatchError, match="no Dask scheduler answered"):
        run_batch(manifest, BatchSettings(tmp_path / "o", cluster=f"tcp://127.0.0.1:{port}", connect_timeout_s=2),
                  echo=lambda _m: None)
    assert time.perf_counter() - t0 < 30


def test_seeds_depend_on_the_job_not_the_order():
    assert job_seed(3, "U01") == job_seed(3, "U01")
    assert job_seed(3, "U01") != job_seed(3, "U02")
    assert job_seed(3, "U01") != job_seed(4, "U01")


def test_version_mismatch_names_worker_and_package():
    from graybox.batch.runner import stack_versions, version_mismatches

    here = stack_versions()
    assert set(here) >= {"graybox", "numpy", "scipy", "lmfit", "emcee", "numba"}
    assert version_mismatches(here, {"tcp://w1:1": dict(here), "tcp://w2:2": dict(here)}) == []
    other = dict(here, numba="0.0.1")
    lines = version_mismatches(here, {"tcp://w1:1": dict(here), "tcp://w2:2": other})
    assert lines == [f"tcp://w2:2: numba 0.0.1 (here {here['numba']})"]

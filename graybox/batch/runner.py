"""Fleet batches: many fits from a manifest, on a local process pool or a Dask cluster.

Each job runs in its own process (``graybox.batch.job``) started with a timeout, so one job
that fails or hangs never stops the others.  Locally, a thread pool starts those processes
(``--workers`` at a time); on a cluster each job is a Dask task that starts the process on
its worker.  Without shared storage the study file and data files travel with the job (as
bytes) and the finished run folder travels back (as a tar archive).

Seeds: each job's seed is drawn from ``numpy.random.SeedSequence(base_seed,
spawn_key=(stable id of the job name,))``, so it depends on the job, not on the order or on
which worker ran it.  A rerun skips a job only when its finished run folder records the
same study file hash, the same overrides and the same data file hashes.
"""

from __future__ import annotations

import hashlib
import io
import json
import shutil
import subprocess
import sys
import tarfile
import tempfile
import time
from concurrent.futures import ThreadPoolExecutor, as_completed
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from graybox.batch.job import job_environment
from graybox.batch.manifest import Job, read_manifest
from graybox.errors import BatchError
from graybox.runs.folder import RESULTS, sha256_file

STATUS_DONE, STATUS_FAILED, STATUS_TIMEOUT, STATUS_SKIPPED = "done", "failed", "timeout", "skipped"


@dataclass(frozen=True)
class BatchSettings:
    """How a fleet batch runs: the output folder, local worker count, per-job timeout (s),
    the Dask scheduler address (None: local threads), whether workers share the output
    storage, the base seed each job's seed derives from, and the cluster connect timeout (s)."""

    out: Path
    workers: int = 2
    timeout_s: float = 1800.0
    cluster: str | None = None
    shared_storage: bool = False
    base_seed: int = 0
    connect_timeout_s: float = 10.0


@dataclass
class JobOutcome:
    """What became of one job: its name, status (``done``, ``failed``, ``timeout`` or
    ``skipped``), the error text, wall time (s), its run folder and its results document."""

    job: str
    status: str
    error: str = ""
    wall_s: float = 0.0
    run_folder: str = ""
    results: dict = field(default_factory=dict)


def job_seed(base_seed: int, job: str) -> int:
    """A job's seed: numpy's SeedSequence of the base seed with a spawn key from the SHA-256
    of the job's name, so it depends on the name only, not on the job's order or worker."""
    stable = int.from_bytes(hashlib.sha256(job.encode()).digest()[:8], "little")
    return int(np.random.SeedSequence(base_seed, spawn_key=(stable,)).generate_state(1)[0])


def study_data_files(job: Job) -> list[Path]:
    """The data files a job reads: its own, or those its study file names."""
    if job.data:
        return list(job.data)
    from graybox.configkit import load_toml

    raw = load_toml(job.study)
    tables = [raw["data"]] if "data" in raw else list(raw.get("experiments", {}).values())
    files = []
    for t in tables:
        names = t.get("files", [])
        for name in [names] if isinstance(names, str) else names:
            files.append((job.study.parent / name).resolve())
    return files


def fingerprint(job: Job) -> dict:
    """What a job's result depends on: its name, the SHA-256 of its study file and of its
    data files, and its overrides (recorded in the run; equal fingerprints mean the job is done)."""
    return {
        "job": job.name,
        "study_sha256": sha256_file(job.study),
        "overrides": job.overrides(),
        "data_sha256": sorted(sha256_file(p) for p in study_data_files(job) if p.is_file()),
    }


def already_done(out: Path, fp: dict) -> bool:
    """Whether ``out`` holds a finished run of a job with this fingerprint (an unreadable results file: no)."""
    path = out / RESULTS
    if not path.is_file():
        return False
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError):
        return False
    return doc.get("run", {}).get("batch") == fp


# -- what travels with a job -----------------------------------------------------------------


def job_spec(job: Job, settings: BatchSettings, fp: dict) -> dict:
    """The job's spec with absolute paths (shared storage)."""
    return {
        "job": job.name,
        "study": str(job.study),
        "overrides": job.overrides(),
        "seed": job_seed(settings.base_seed, job.name),
        "sample": job.sample if job.sample is not None else False,
        "batch": fp,
    }


def pack_job(job: Job, spec: dict) -> dict:
    """Bytes of the study and data files, with the spec rewritten to payload-local names."""
    files = {"study.toml": job.study.read_bytes()}
    data = study_data_files(job)
    local = []
    for i, p in enumerate(data):
        name = f"data/{i:03d}_{p.name}"
        files[name] = p.read_bytes()
        local.append(name)
    packed = dict(spec)
    packed["study"] = "study.toml"
    overrides = json.loads(json.dumps(spec["overrides"]))
    if local:
        raw_study = _raw_study(job.study)
        if "experiments" in raw_study and not job.data:
            raise BatchError(f"job '{job.name}': a study with several [experiments] needs shared storage "
                             "to run on a cluster", hint="add --shared-storage (the workers see the same files)")
        overrides.setdefault("data", {})["files"] = local
    packed["overrides"] = overrides
    return {"spec": packed, "files": files}


def _raw_study(path: Path) -> dict:
    from graybox.configkit import load_toml

    return load_toml(path)


def execute(spec: dict, timeout_s: float, payload_files: dict | None = None) -> dict:
    """Run one job in a subprocess with a timeout.  With ``payload_files`` the job runs in a
    temporary folder and its run folder is returned as tar bytes (``run_tar``)."""
    t0 = time.perf_counter()
    with tempfile.TemporaryDirectory(prefix="graybox-job-") as tmp:
        tmp = Path(tmp)
        spec = dict(spec)
        if payload_files is not None:
            for name, content in payload_files.items():
                target = tmp / name
                target.parent.mkdir(parents=True, exist_ok=True)
                target.write_bytes(content)
            spec["study"] = str(tmp / spec["study"])
            files = spec.get("overrides", {}).get("data", {}).get("files")
            if files:
                spec["overrides"]["data"]["files"] = [str(tmp / f) for f in files]
            spec["out"] = str(tmp / "run")
        spec_path = tmp / "job.json"
        spec_path.write_text(json.dumps(spec), encoding="utf-8")
        try:
            proc = subprocess.run([sys.executable, "-m", "graybox.batch.job", str(spec_path)], capture_output=True,
                                  text=True, timeout=timeout_s, env=job_environment(), stdin=subprocess.DEVNULL)
        except subprocess.TimeoutExpired:
            return {"status": STATUS_TIMEOUT, "error": f"exceeded the job timeout of {timeout_s:g} s",
                    "wall_s": time.perf_counter() - t0}
        wall = time.perf_counter() - t0
        if proc.returncode != 0:
            lines = [ln for ln in proc.stderr.strip().splitlines() if ln.strip()]
            msg = next((ln for ln in reversed(lines) if ln.startswith(("error:", "internal error:"))),
                       lines[-1] if lines else f"exit code {proc.returncode}")
            if msg.startswith("error:"):  # the whole located message, hint included
                start = max(i for i, ln in enumerate(lines) if ln.startswith("error:"))
                msg = " ".join(ln.strip() for ln in lines[start:])
            return {"status": STATUS_FAILED, "error": msg, "wall_s": wall}
        out = Path(spec["out"])
        result = {"status": STATUS_DONE, "error": "", "wall_s": wall,
                  "results": json.loads((out / RESULTS).read_text(encoding="utf-8"))}
        if payload_files is not None:
            buf = io.BytesIO()
            with tarfile.open(fileobj=buf, mode="w:gz") as tar:
                tar.add(out, arcname=".")
            result["run_tar"] = buf.getvalue()
        return result


def unpack_run(tar_bytes: bytes, target: Path) -> None:
    """Extract a returned run folder atomically into ``target``."""
    tmp = Path(tempfile.mkdtemp(prefix=f".{target.name}.partial-", dir=target.parent))
    try:
        with tarfile.open(fileobj=io.BytesIO(tar_bytes), mode="r:gz") as tar:
            tar.extractall(tmp, filter="data")
        if target.exists():
            shutil.rmtree(target)
        tmp.rename(target)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise


# -- running many -----------------------------------------------------------------------------


def _progress(total: int, desc: str):
    from tqdm import tqdm

    return tqdm(total=total, desc=desc, unit="job", disable=not sys.stderr.isatty(), leave=False)


def run_local(todo: list[tuple[Job, dict]], settings: BatchSettings) -> list[JobOutcome]:
    """The jobs run on a local pool of ``workers`` threads, each job in its own subprocess with
    its timeout (:func:`execute`), with a progress bar; one outcome per job."""
    outcomes = []
    with ThreadPoolExecutor(max_workers=max(1, settings.workers)) as pool, _progress(len(todo), "jobs") as bar:
        futures = {}
        for job, spec in todo:
            spec = dict(spec, out=str(settings.out / job.name))
            futures[pool.submit(execute, spec, job.timeout_s or settings.timeout_s)] = job
        for fut in as_completed(futures):
            job = futures[fut]
            outcomes.append(_outcome(job, fut.result(), settings))
            bar.update(1)
    return outcomes


def connect(address: str, timeout_s: float):
    """A Dask client for an existing cluster; a clear error when nothing answers."""
    from distributed import Client

    try:
        client = Client(address, timeout=f"{timeout_s}s")
    except (OSError, TimeoutError) as exc:
        raise BatchError(f"no Dask scheduler answered at {address} within {timeout_s:g} s ({type(exc).__name__})",
                         hint="check the address (tcp://host:8786) and that the scheduler is running") from None
    check_versions(client)
    return client


STACK = ("graybox", "numpy", "scipy", "pandas", "lmfit", "emcee", "numba", "pint")


def stack_versions() -> dict[str, str]:
    """The versions of graybox and the packages its numbers depend on, in this process."""
    from graybox.versions import installed_versions

    return installed_versions(STACK, missing="missing")


def version_mismatches(local: dict[str, str], remote: dict[str, dict[str, str]]) -> list[str]:
    """One line per worker and package whose version differs from the client's."""
    return [f"{worker}: {name} {got} (here {local[name]})"
            for worker, versions in sorted(remote.items())
            for name, got in sorted(versions.items()) if got != local.get(name)]


def check_versions(client) -> None:
    """Client and workers must run the same graybox and the same numerical packages (Dask's
    own check covers Python, dask, distributed and its dependencies)."""
    try:
        client.get_versions(check=True)
    except ValueError as exc:
        raise BatchError(f"the cluster's package versions differ from this machine's: {exc}",
                         hint="install the same versions on the workers") from None
    bad = version_mismatches(stack_versions(), client.run(stack_versions))
    if bad:
        raise BatchError("workers run other package versions than this machine: " + "; ".join(bad[:8])
                         + (f"; and {len(bad) - 8} more" if len(bad) > 8 else ""),
                         hint="install the same versions on the workers (e.g. from one lock file)")


def run_cluster(todo: list[tuple[Job, dict]], settings: BatchSettings, client) -> list[JobOutcome]:
    """The jobs run on a Dask cluster through ``client``: written by the workers into the shared
    output folder, or (no shared storage) sent with their files and returned as tar bytes
    unpacked here; a lost worker is one failed job."""
    from distributed import as_completed as dask_completed

    futures = {}
    for job, spec in todo:
        if settings.shared_storage:
            spec = dict(spec, out=str(settings.out / job.name))
            fut = client.submit(execute, spec, job.timeout_s or settings.timeout_s, None, key=f"graybox-{job.name}-{spec['seed']}",
                                pure=False)
        else:
            packed = pack_job(job, spec)
            fut = client.submit(execute, packed["spec"], job.timeout_s or settings.timeout_s, packed["files"],
                                key=f"graybox-{job.name}-{spec['seed']}", pure=False)
        futures[fut] = job
    outcomes = []
    with _progress(len(futures), "jobs") as bar:
        for fut in dask_completed(list(futures)):
            job = futures[fut]
            try:
                res = fut.result()
            except Exception as exc:  # noqa: BLE001 - a lost worker is one failed job, not a failed batch
                res = {"status": STATUS_FAILED, "error": f"the worker failed: {type(exc).__name__}: {exc}", "wall_s": 0.0}
            if res.get("run_tar"):
                unpack_run(res.pop("run_tar"), settings.out / job.name)
            outcomes.append(_outcome(job, res, settings))
            bar.update(1)
    return outcomes


def _outcome(job: Job, res: dict, settings: BatchSettings) -> JobOutcome:
    folder = str(settings.out / job.name) if res["status"] == STATUS_DONE else ""
    return JobOutcome(job.name, res["status"], res.get("error", ""), float(res.get("wall_s", 0.0)), folder,
                      res.get("results", {}))


def summary_frame(outcomes: list[JobOutcome]) -> pd.DataFrame:
    """One row per job: status, error, wall time, run folder, convergence, observations,
    and each free parameter's estimate, standard error and 95% interval ends."""
    rows = []
    for o in outcomes:
        row = {"job": o.job, "status": o.status, "error": o.error, "wall_s": o.wall_s, "run_folder": o.run_folder}
        fit = o.results.get("fit", {})
        row["converged"] = fit.get("converged")
        row["n_obs"] = fit.get("n_obs")
        for name, p in o.results.get("parameters", {}).items():
            if p.get("fixed"):
                continue
            row[f"{name}.estimate"] = p.get("estimate")
            row[f"{name}.stderr"] = p.get("stderr")
            lo, hi = (p.get("ci95") or [None, None])[:2]
            row[f"{name}.ci95_lo"] = lo
            row[f"{name}.ci95_hi"] = hi
        rows.append(row)
    df = pd.DataFrame(rows)
    return df.sort_values("job").reset_index(drop=True) if not df.empty else df


def run_batch(manifest: str | Path, settings: BatchSettings, *, echo=print) -> pd.DataFrame:
    """Run every job of the manifest; write jobs.csv and jobs.parquet into ``settings.out``."""
    jobs = read_manifest(manifest)
    out = Path(settings.out).absolute()
    out.mkdir(parents=True, exist_ok=True)
    settings = BatchSettings(out, settings.workers, settings.timeout_s, settings.cluster, settings.shared_storage,
                             settings.base_seed, settings.connect_timeout_s)
    todo, outcomes = [], []
    for job in jobs:
        fp = fingerprint(job)
        if already_done(out / job.name, fp):
            prev = json.loads((out / job.name / RESULTS).read_text(encoding="utf-8"))
            outcomes.append(JobOutcome(job.name, STATUS_SKIPPED, "", 0.0, str(out / job.name), prev))
            continue
        todo.append((job, job_spec(job, settings, fp)))
    if settings.cluster:
        client = connect(settings.cluster, settings.connect_timeout_s)
        try:
            outcomes += run_cluster(todo, settings, client)
        finally:
            client.close()
    else:
        outcomes += run_local(todo, settings)
    df = summary_frame(outcomes)
    df.to_csv(out / "jobs.csv", index=False)
    df.to_parquet(out / "jobs.parquet", index=False)
    counts = df["status"].value_counts().to_dict()
    echo(df[["job", "status", "wall_s", "error"]].to_string(index=False))
    echo(f"{len(df)} jobs: " + ", ".join(f"{v} {k}" for k, v in sorted(counts.items())) + f"; summary in {out}/jobs.csv")
    return df

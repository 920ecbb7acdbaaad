"""One fleet job, run in its own process: ``python -m graybox.batch.job SPEC.json``.

The parent (a local thread or a Dask worker) starts this process with a timeout, so a job
that hangs or overruns is killed without taking its worker down.  One numba / BLAS thread
per job: fleets parallelise over jobs.

A job spec is JSON: ``{"job", "study", "overrides", "out", "seed", "sample", "batch"}``.
The process fits the study through the public API (:func:`graybox.fit`, then the
posterior when the study samples), writes the run folder ``out`` atomically
(:func:`graybox.write_run`) and exits 0, or 2 on a user error (its message on stderr), or 1
on a bug.
"""

from __future__ import annotations

import json
import os
import sys
from pathlib import Path

SINGLE_THREAD_ENV = {
    "NUMBA_NUM_THREADS": "1",
    "OMP_NUM_THREADS": "1",
    "OPENBLAS_NUM_THREADS": "1",
    "MKL_NUM_THREADS": "1",
}


def job_environment() -> dict[str, str]:
    """This process's environment with one numba / BLAS thread and a file-only plot backend."""
    env = dict(os.environ)
    env.update(SINGLE_THREAD_ENV)
    env.setdefault("MPLBACKEND", "Agg")
    return env


def run_spec(spec: dict) -> None:
    """Fit one job's study (its overrides and seed applied) and write its run folder."""
    from graybox.api import fit, write_run
    from graybox.stages import RunClock
    from graybox.study import load_study

    clock = RunClock.now()
    study = load_study(spec["study"], spec.get("overrides") or {}, sample=spec.get("sample")).with_seed(spec.get("seed"))
    result = fit(study, clock=clock)
    final = result.sample() if study.sampler.enabled else result
    write_run(spec["out"], final, force=True, run_info={"batch": spec.get("batch", {})})


def main(argv: list[str] | None = None) -> int:
    """Run the job spec named by ``argv[0]``; the exit code says how it went."""
    argv = sys.argv[1:] if argv is None else argv
    from graybox.errors import EXIT_INTERNAL, EXIT_OK, EXIT_USER, GrayboxError

    try:
        spec = json.loads(Path(argv[0]).read_text(encoding="utf-8"))
        run_spec(spec)
        return EXIT_OK
    except GrayboxError as exc:
        print(f"error: {exc.render()}", file=sys.stderr)
        return EXIT_USER
    except Exception as exc:  # noqa: BLE001 - reported to the parent as an internal failure
        import traceback

        traceback.print_exc()
        print(f"internal error: {type(exc).__name__}: {exc}", file=sys.stderr)
        return EXIT_INTERNAL


if __name__ == "__main__":
    sys.exit(main())

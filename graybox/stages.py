"""The stages between a :class:`~graybox.study.Study` and its results, as small functions the
public API (:mod:`graybox.api`) composes: the data loaded from the study's data specs into
records, the estimation problem, the informative windows, the held-out validation, the
fitted traces and the results document (``results.json``).
"""

from __future__ import annotations

import dataclasses
import hashlib
import platform
import sys
import time
from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import Callable

import numpy as np

from graybox.data.spec import DataSpec
from graybox.data.record import Record
from graybox.data.report import DataReport
from graybox.errors import GrayboxError
from graybox.estimate.result import FitResult
from graybox.estimate.problem import Experiment, Problem
from graybox.model.spec import ModelSpec
from graybox.runs.artifacts import OutputTrace
from graybox.runs.folder import sha256_file
from graybox.simulate import Engine, plan
from graybox.study import Study
from graybox.versions import GRAYBOX_VERSION, installed_versions

Echo = Callable[[str], None]

CAUTION = ("Caution: a fitted model supports engineering judgement; it does not replace it, nor safety systems, "
           "local codes or licensed engineering review.")


def quiet(_message: str) -> None:
    """An echo that prints nothing (the API's default: results show themselves)."""


@dataclass(frozen=True)
class RunClock:
    """When a run started: the UTC instant (for the run record) and the monotonic clock
    reading (for its wall time)."""

    started_utc: datetime
    perf: float

    @classmethod
    def now(cls) -> "RunClock":
        """The clock started now."""
        return cls(datetime.now(timezone.utc), time.perf_counter())

    def elapsed(self) -> float:
        """Seconds since the start."""
        return time.perf_counter() - self.perf


@dataclass
class Prepared:
    """A study's data loaded and its estimation problem built."""

    study: Study
    problem: Problem
    reports: dict[str, DataReport]  # experiment -> what the data layer did
    engine: Engine
    validation: list[Record] = field(default_factory=list)  # held-out records (the data table's `holdout`)


# -- data and problem ------------------------------------------------------------------------------
def load_data(spec: DataSpec):
    """An experiment's data read from its spec: the data layer's assembly (record or None,
    report, the problems that stop a fit, none raised)."""
    from graybox.data.assemble import assemble

    return assemble(spec)


def fit_part(record: Record, spec: DataSpec) -> tuple[Record, Record | None]:
    """The part of a record a fit uses and its held-out part (None without ``holdout``)."""
    if spec.holdout is None:
        return record, None
    from graybox.data.split import split_record

    return split_record(record, spec.holdout)


def load_records(study: Study) -> tuple[list[Record], dict[str, DataReport], list[Record]]:
    """Fit records, data reports and held-out validation records, per experiment; the first
    problem that stops a fit (every sample of an output masked, no usable segment) is raised."""
    from graybox.data.assemble import load_spec

    records, reports, validation = [], {}, []
    for name, spec in study.experiments.items():
        record, reports[name] = load_spec(spec)
        rec, held = fit_part(record, spec)
        if held is not None:
            validation.append(held)
        records.append(rec)
    return records, reports, validation


def problem_for(spec: ModelSpec, records: list[Record], engine: Engine) -> Problem:
    """The estimation problem of ``records`` (one experiment each) simulated by ``engine``."""
    return Problem(spec, [Experiment(r.name, plan(spec, r)) for r in records], engine)


def engine_for(study: Study, spec: ModelSpec | None = None) -> Engine:
    """The study's simulation engine for its model (or for ``spec``)."""
    return Engine(spec if spec is not None else study.spec, study.engine, study.tol)


def prepare(study) -> Prepared:
    """Load a study's data and build its estimation problem.  Takes a
    :class:`~graybox.study.Study` (or the :class:`~graybox.config.StudySettings` of
    ``graybox.config.read_study``, whose data tables are then validated here)."""
    from graybox.study import as_study

    study = as_study(study)
    records, reports, validation = load_records(study)
    engine = engine_for(study)
    return Prepared(study, problem_for(study.spec, records, engine), reports, engine, validation)


# -- informative windows ----------------------------------------------------------------------------
def guess_sensitivities(spec: ModelSpec, engine: Engine) -> Callable:
    """d output / d free parameter at the guesses, one row per observation of each output
    (rows not compared are zero): what the informative-window ranking needs."""

    def sensitivity_fn(record) -> dict[str, np.ndarray]:
        problem = problem_for(spec, [record], engine)
        sims = problem.simulate(problem.guess()[None], sens=True)
        cols = [c for j, c in problem.column_map(0) if problem.free[j].kind == "parameter"]
        out = {}
        for o in spec.output_names:
            S = sims[0].sens[o][0][:, cols]
            out[o] = np.where(np.isfinite(S), S, 0.0)
        return out

    return sensitivity_fn


def ranked_windows(name: str, record: Record, spec: DataSpec, sensitivity_fn: Callable) -> tuple[list, str | None]:
    """The informative windows of one fit record (:func:`graybox.data.windows.rank_record`,
    the one rule for their settings), or none and a note when the record is too short to
    rank (that is not a failed fit)."""
    from graybox.data.windows import rank_record

    try:
        return rank_record(record, sensitivity_fn, spec.search), None
    except GrayboxError as exc:
        return [], f"note: informative windows of '{name}' not ranked: {exc.message}"


def informative_windows(prepared: Prepared) -> tuple[list, list[str]]:
    """The most informative windows of each fit record (log det of the Fisher information
    at the guesses, from the inputs alone) and a note for each record not ranked."""
    fn = guess_sensitivities(prepared.study.spec, prepared.engine)
    scores, notes = [], []
    for (name, spec), ex in zip(prepared.study.experiments.items(), prepared.problem.experiments):
        ranked, note = ranked_windows(name, ex.record, spec, fn)
        scores += ranked
        if note:
            notes.append(note)
    return scores, notes


# -- fitted traces and held-out validation ----------------------------------------------------------
def traces_for(problem: Problem, x: np.ndarray) -> list[OutputTrace]:
    """Measured and simulated values of every output at its compared observations."""
    preds, _ = problem.predictions(np.atleast_2d(x))
    traces = []
    for e, (ex, pred) in enumerate(zip(problem.experiments, preds)):
        rec = ex.record
        for o in problem.spec.outputs:
            used = ex.timeline.used[o.name]
            traces.append(OutputTrace(ex.name, o.name, o.units, rec.outputs[o.name].t[used], rec.start_utc,
                                      problem.observed(e, o.name), pred[o.name][0]))
    return traces


def validation_spec(spec: ModelSpec) -> ModelSpec:
    """The model for held-out data: initial states that were estimated on the fit part
    start from their first measurement (if measured directly) or the steady state."""
    from graybox.model.spec import INITIAL_ESTIMATE, INITIAL_MEASURED, INITIAL_STEADY

    measured = {o.state for o in spec.outputs if o.state}
    states = tuple(dataclasses.replace(s, initial=INITIAL_MEASURED if s.name in measured else INITIAL_STEADY)
                   if s.initial == INITIAL_ESTIMATE else s for s in spec.states)
    return dataclasses.replace(spec, states=states)


def validate(prepared: Prepared, res: FitResult) -> tuple[dict, list[OutputTrace]]:
    """Predict the held-out records with the fitted parameters (no refit): per output the
    number of observations, bias, RMSE and RMSE relative to the fitted noise level."""
    if not prepared.validation:
        return {}, []
    spec = validation_spec(prepared.study.spec)
    problem = problem_for(spec, prepared.validation, engine_for(prepared.study, spec))
    x = np.array([res.parameters[f.name].estimate for f in problem.free])
    traces = traces_for(problem, x)
    out: dict = {}
    for tr in traces:
        r = tr.residual
        sigma = res.sigmas[tr.output]
        out.setdefault(tr.experiment, {})[tr.output] = {
            "n_obs": int(r.size), "bias": float(np.mean(r)), "rmse": float(np.sqrt(np.mean(r**2))),
            "rmse_over_sigma": float(np.sqrt(np.mean(r**2)) / sigma),
            "start_utc": tr.utc()[0].strftime("%Y-%m-%dT%H:%M:%SZ"), "end_utc": tr.utc()[-1].strftime("%Y-%m-%dT%H:%M:%SZ"),
        }
    return out, traces


def validation_text(summary: dict) -> str:
    """The held-out validation as the command line prints it."""
    lines = ["held-out validation (fitted parameters, no refit):"]
    for exp, outs in summary.items():
        for o, v in outs.items():
            lines.append(f"  {exp}/{o}: {v['n_obs']} observations {v['start_utc']} .. {v['end_utc']}, "
                         f"bias {v['bias']:.4g}, RMSE {v['rmse']:.4g} ({v['rmse_over_sigma']:.2f} x the fitted sigma)")
    return "\n".join(lines)


# -- the results document ---------------------------------------------------------------------------
def study_text(study: Study) -> str:
    """The study as used, as TOML text: the study file's own text when it came from one;
    otherwise written from its tables (data frames named by their labels)."""
    if study.path is not None:
        return study.path.read_text(encoding="utf-8")
    from graybox.tomltext import toml_text

    return ("# written by graybox: this study was given as Python values, not read from a file\n"
            + toml_text(study.raw))


def study_sha256(study: Study) -> str:
    """The SHA-256 of the study file (or of :func:`study_text` for a study given as values)."""
    if study.path is not None:
        return sha256_file(study.path)
    return hashlib.sha256(study_text(study).encode("utf-8")).hexdigest()


def run_record(prepared: Prepared, clock: RunClock) -> dict:
    """results.json ``run``: seed, dataset, study file and its hash, data files with hashes,
    versions, engine, integrator, start time and wall time so far."""
    study = prepared.study
    files = []
    for ex in prepared.problem.experiments:
        for src in ex.record.sources:
            files.append({"experiment": ex.name, **dict(src)})
    return {
        "seed": study.seed,
        "dataset": study.dataset,
        "config": str(study.path) if study.path is not None else None,
        "config_sha256": study_sha256(study),
        "data_files": files,
        "graybox_version": GRAYBOX_VERSION,
        "engine": prepared.engine.name,
        "engine_note": prepared.engine.note,
        "integrator": {"method": study.tol.method, "rtol": study.tol.rtol, "atol": study.tol.atol},
        "started_utc": clock.started_utc.strftime("%Y-%m-%dT%H:%M:%SZ"),
        "wall_s": clock.elapsed(),
        "python": sys.version.split()[0],
        "platform": platform.platform(),
        "packages": installed_versions(),
    }


def results_document(prepared: Prepared, res: FitResult, clock: RunClock) -> dict:
    """The results document of a least-squares fit (``results.json`` before sampling)."""
    study = prepared.study
    return {
        "graybox": {"version": GRAYBOX_VERSION, "schema": 1},
        "study": {"name": study.name, "model": study.spec.describe(), "model_warnings": list(study.spec.warnings)},
        "parameters": {name: p.to_dict() for name, p in res.parameters.items()},
        "noise": res.noise_dict(),
        "fit": res.fit_dict(),
        "data": {name: rep.to_dict() for name, rep in prepared.reports.items()},
        "run": run_record(prepared, clock),
    }

"""graybox from Python: check a study, fit it, sample its posterior, write its run folder.

::

    import pandas as pd, graybox
    log = pd.read_csv("datasets/storage_vessel/vessel_log.csv")
    study = graybox.Study.from_file("configs/storage_vessel.toml", data=log)
    result = graybox.fit(study)
    print(result)                      # the summary `graybox fit` prints

``graybox fit`` and ``graybox check`` are these functions with a study file and printing
(:mod:`graybox.workflow`); ``graybox batch`` runs ``graybox fit`` once per job.
"""

from __future__ import annotations

import shutil
import time
from pathlib import Path

from graybox.estimate.fit import fit as least_squares
from graybox.results import StudyCheck, StudyFit, StudyPosterior, sample
from graybox.runs.artifacts import plot_overlay, write_fitted_csv
from graybox.runs.folder import RESULTS, building, write_json
from graybox.stages import (Echo, RunClock, engine_for, fit_part, guess_sensitivities, informative_windows, load_data,
                            prepare, quiet, ranked_windows, results_document, study_text, traces_for, validate)
from graybox.study import Study, as_study, load_study

__all__ = ["Study", "StudyCheck", "StudyFit", "StudyPosterior", "check", "fit", "load_study", "sample", "write_run",
           "write_run_document"]


def check(study: Study, *, echo: Echo = quiet) -> StudyCheck:
    """Load the study's data as a fit would and rank its informative windows, without
    fitting.  Problems that stop a fit (every sample of an output masked, no usable segment)
    are listed in the result (``ok`` is then False), each report echoed as it is made;
    errors that stop reading are raised."""
    study = as_study(study)
    fn = guess_sensitivities(study.spec, engine_for(study))
    reports, notes = {}, []
    for name, spec in study.experiments.items():
        result = load_data(spec)
        report, note = result.report, None
        if result.record is not None:  # the windows of the part a fit uses, by the rule the fit uses
            record, _ = fit_part(result.record, spec)
            ranked, note = ranked_windows(name, record, spec, fn)
            report = report.with_windows(ranked)
        echo(report.summary())
        if note:
            echo(note)
            notes.append(note)
        reports[name] = report
    return StudyCheck(study, reports, tuple(notes))


def fit(study: Study, *, echo: Echo = quiet, clock: RunClock | None = None) -> StudyFit:
    """Fit a study by least squares: load its data, build the problem, rank the
    informative windows, fit, and predict any held-out data.

    ``echo`` receives what ``graybox fit`` prints as it goes (model warnings, data reports,
    the fit summary); ``clock``: when the run started (default: now)."""
    clock = clock or RunClock.now()
    study = as_study(study)
    for w in study.spec.warnings:
        echo(f"warning: {w}")
    stages: dict[str, float] = {}
    mark = time.perf_counter()
    prepared = prepare(study)
    for rep in prepared.reports.values():
        echo(rep.summary())
    windows, notes = informative_windows(prepared)
    for note in notes:
        echo(note)
    stages["data_and_model_s"], mark = time.perf_counter() - mark, time.perf_counter()
    res = least_squares(prepared.problem, study.fit)
    stages["least_squares_s"] = time.perf_counter() - mark
    echo(res.summary())
    doc = results_document(prepared, res, clock)
    doc["run"]["overrides"] = dict(study.settings.overrides)
    doc["run"]["stages"] = dict(stages)
    validation, val_traces = validate(prepared, res)
    return StudyFit(study, prepared, res, tuple(windows), tuple(notes), validation, tuple(val_traces), clock, stages,
                    doc)


def write_run(out: str | Path, result: StudyFit | StudyPosterior, *, force: bool = False,
              run_info: dict | None = None) -> Path:
    """Write the run folder ``out`` of a fit (or of its posterior); returns the folder.  See
    :func:`write_run_document` for what it holds."""
    write_run_document(out, result, force=force, run_info=run_info)
    return Path(out)


def write_run_document(out: str | Path, result: StudyFit | StudyPosterior, *, force: bool = False,
                       run_info: dict | None = None) -> dict:
    """Write the run folder ``out`` of a fit (or of its posterior); returns the results
    document as written.  The folder holds results.json (the
    result's ``to_dict()``, with ``run_info`` merged into its run record), study.toml (the
    study as used), fitted.csv and fit.png, windows.csv, and with a posterior samples.npz,
    corner.png and trace.png, the bands in fitted.csv and fit.png; with held-out data
    validation.csv and validation.png.  Built under a temporary sibling and renamed into
    place (``force``: replace an existing folder)."""
    mark = time.perf_counter()
    out = Path(out)
    fitted = result.fit if isinstance(result, StudyPosterior) else result
    post = result if isinstance(result, StudyPosterior) else None
    study = fitted.study
    doc = result.to_dict()
    doc["run"].update(run_info or {})
    with building(out, force) as tmp:
        if study.path is not None:
            shutil.copyfile(study.path, tmp / "study.toml")
        else:
            (tmp / "study.toml").write_text(study_text(study), encoding="utf-8")
        problem = fitted.prepared.problem
        traces = traces_for(problem, fitted.estimate.x)
        if post is not None:
            by_key = {(ex.name, o): band for ex, exp_bands in zip(problem.experiments, post.bands)
                      for o, band in exp_bands.items()}
            for tr in traces:
                tr.bands = by_key[(tr.experiment, tr.output)].trace_bands()
        write_fitted_csv(tmp / "fitted.csv", traces)
        title = "least squares with posterior bands" if post is not None else "least-squares fit"
        plot_overlay(tmp / "fit.png", traces, f"{study.name}: {title}")
        if post is not None:
            post.posterior.save_samples(tmp / "samples.npz")
            post.posterior.write_plots(tmp)
        if fitted.windows:
            from graybox.data.windows import write_windows

            write_windows(list(fitted.windows), tmp)
        if fitted.validation_traces:
            write_fitted_csv(tmp / "validation.csv", list(fitted.validation_traces))
            plot_overlay(tmp / "validation.png", list(fitted.validation_traces),
                         f"{study.name}: held-out data, fitted parameters")
        doc["run"]["stages"] = {**doc["run"].get("stages", {}), "writing_s": time.perf_counter() - mark}
        doc["run"]["wall_s"] = fitted.clock.elapsed()
        write_json(tmp / RESULTS, doc)
    return doc

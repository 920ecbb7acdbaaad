"""The jobs behind the commands, callable from Python the same way as from the shell.

``fit_study``: study file -> data + model -> simulation -> least squares -> (posterior) ->
run folder.  ``check_study``: the checks a fit would make, without fitting.
``run_demo``: the whole job on the bundled demo data.
"""

from __future__ import annotations

import dataclasses
import json
import platform
import shutil
import sys
import time
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Callable

import numpy as np

import graybox
from graybox.config import Study, load_study
from graybox.errors import GrayboxError
from graybox.estimate.fit import FitResult, fit
from graybox.estimate.problem import Experiment, Problem
from graybox.runs.artifacts import OutputTrace, plot_overlay, write_fitted_csv
from graybox.runs.folder import RESULTS, building, sha256_file, write_json
from graybox.simulate import Engine, plan
from graybox.versions import installed_versions

Echo = Callable[[str], None]

@dataclass
class Prepared:
    study: Study
    problem: Problem
    reports: dict  # experiment -> DataReport
    engine: Engine
    validation: list  # held-out records (the data table's `holdout`), possibly empty


def data_symbols(study: Study) -> dict:
    """What the data layer may feed: every model input and every measured output."""
    from graybox.data.config import SymbolInfo

    spec = study.spec
    out = {u.name: SymbolInfo(u.name, "input", u.units, u.hold) for u in spec.inputs}
    for o in spec.outputs:
        out[o.name] = SymbolInfo(o.name, "output", o.units, "previous")
    return out


def load_records(study: Study) -> tuple[list, dict, list]:
    """Fit records, data reports and held-out validation records, per experiment."""
    from graybox.data import data_spec, load_experiment
    from graybox.data.split import split_record

    symbols = data_symbols(study)
    records, reports, validation = [], {}, []
    for name, table in study.experiments.items():
        where = table.where()
        rec, rep = load_experiment(table.data, name, symbols=symbols, base_dir=study.base_dir, where=where,
                                   dynamic=bool(study.spec.states))
        holdout = data_spec(table.data, name, symbols=symbols, base_dir=study.base_dir, where=where).holdout
        if holdout is not None:
            rec, held = split_record(rec, holdout)
            validation.append(held)
        records.append(rec)
        reports[name] = rep
    return records, reports, validation


def prepare(study: Study) -> Prepared:
    records, reports, validation = load_records(study)
    engine = Engine(study.spec, study.engine, study.tol)
    experiments = [Experiment(r.name, plan(study.spec, r)) for r in records]
    return Prepared(study, Problem(study.spec, experiments, engine), reports, engine, validation)


def validation_spec(spec):
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
    engine = Engine(spec, prepared.study.engine, prepared.study.tol)
    problem = Problem(spec, [Experiment(r.name, plan(spec, r)) for r in prepared.validation], engine)
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
    lines = ["held-out validation (fitted parameters, no refit):"]
    for exp, outs in summary.items():
        for o, v in outs.items():
            lines.append(f"  {exp}/{o}: {v['n_obs']} observations {v['start_utc']} .. {v['end_utc']}, "
                         f"bias {v['bias']:.4g}, RMSE {v['rmse']:.4g} ({v['rmse_over_sigma']:.2f} x the fitted sigma)")
    return "\n".join(lines)


def traces_for(problem: Problem, x: np.ndarray) -> list[OutputTrace]:
    preds, _ = problem.predictions(np.atleast_2d(x))
    traces = []
    for e, (ex, pred) in enumerate(zip(problem.experiments, preds)):
        rec = ex.record
        for o in problem.spec.outputs:
            used = ex.timeline.used[o.name]
            traces.append(OutputTrace(ex.name, o.name, o.units, rec.outputs[o.name].t[used], rec.start_utc,
                                      problem.observed(e, o.name), pred[o.name][0]))
    return traces


def run_record(study: Study, prepared: Prepared, started: datetime, wall_s: float) -> dict:
    files = []
    for ex in prepared.problem.experiments:
        for src in ex.record.sources:
            files.append({"experiment": ex.name, **dict(src)})
    return {
        "seed": study.seed,
        "dataset": study.dataset,
        "config": str(study.path),
        "config_sha256": sha256_file(study.path),
        "data_files": files,
        "graybox_version": graybox.__version__,
        "engine": prepared.engine.name,
        "engine_note": prepared.engine.note,
        "integrator": {"method": study.tol.method, "rtol": study.tol.rtol, "atol": study.tol.atol},
        "started_utc": started.strftime("%Y-%m-%dT%H:%M:%SZ"),
        "wall_s": wall_s,
        "python": sys.version.split()[0],
        "platform": platform.platform(),
        "packages": installed_versions(),
    }


def results_document(study: Study, prepared: Prepared, res: FitResult, started: datetime, wall_s: float) -> dict:
    return {
        "graybox": {"version": graybox.__version__, "schema": 1},
        "study": {"name": study.name, "model": study.spec.describe(), "model_warnings": list(study.spec.warnings)},
        "parameters": {name: p.to_dict() for name, p in res.parameters.items()},
        "noise": res.noise_dict(),
        "fit": res.fit_dict(),
        "data": {name: rep.to_dict() for name, rep in prepared.reports.items()},
        "run": run_record(study, prepared, started, wall_s),
    }


CAUTION = ("Caution: a fitted model supports engineering judgement; it does not replace it, nor safety systems, "
           "local codes or licensed engineering review.")


def with_seed(study: Study, seed: int | None) -> Study:
    if seed is None:
        return study
    return dataclasses.replace(study, seed=int(seed), fit=dataclasses.replace(study.fit, seed=int(seed)))


def fit_study(config: str | Path, out: str | Path, *, force: bool = False, echo: Echo = print,
              sample: bool | None = None, sampler_options: dict | None = None, overrides: dict | None = None,
              seed: int | None = None, run_info: dict | None = None) -> dict:
    """Fit a study and write its run folder; returns the results document.

    ``overrides`` replace study-file keys (fleet batches); ``seed`` replaces the study's seed;
    ``run_info`` is merged into the run record."""
    t0 = time.perf_counter()
    started = datetime.now(timezone.utc)
    out = Path(out)
    from graybox.runs.folder import check_target

    check_target(out.absolute(), force)
    study = with_seed(load_study(config, overrides, sample=sample, sampler_options=sampler_options), seed)
    from graybox.posterior import predictive_bands, run_posterior
    from graybox.posterior.config import expand_priors

    sampling = study.sampler  # parsed and checked by load_study, with this run's sample decision
    do_sample = sampling.enabled
    for w in study.spec.warnings:
        echo(f"warning: {w}")
    stages: dict[str, float] = {}
    mark = time.perf_counter()
    prepared = prepare(study)
    priors = expand_priors(study.priors, study.spec, prepared.problem) if do_sample else None
    for name, rep in prepared.reports.items():
        echo(rep.summary())
    windows = informative_windows(study, prepared, echo)
    stages["data_and_model_s"], mark = time.perf_counter() - mark, time.perf_counter()
    res = fit(prepared.problem, study.fit)
    stages["least_squares_s"], mark = time.perf_counter() - mark, time.perf_counter()
    echo(res.summary())
    wall = time.perf_counter() - t0
    doc = results_document(study, prepared, res, started, wall)
    post = None
    bands = None
    if do_sample:
        post = run_posterior(prepared.problem, res, study.noise, sampling,
                             sampling.seed if sampling.seed is not None else study.seed, priors=priors, file=study.path)
        echo(post.summary())
        for name, entry in post.to_parameters_dict().items():
            doc["parameters"][name].update(entry)
        for o, entry in post.to_noise_dict().items():
            doc["noise"][o].update(entry)
        doc["sampler"] = post.sampler_dict()
        rng = np.random.default_rng(np.random.SeedSequence([study.seed, 0x62616E64]))  # "band"
        bands = predictive_bands(prepared.problem, post, sampling.band_draws, rng)
        stages["posterior_s"], mark = time.perf_counter() - mark, time.perf_counter()
    val_summary, val_traces = validate(prepared, res)
    if val_summary:
        doc["validation"] = val_summary
        echo(validation_text(val_summary))
    doc["run"]["overrides"] = overrides or {}
    doc["run"].update(run_info or {})
    with building(out, force) as tmp:
        shutil.copyfile(study.path, tmp / "study.toml")
        traces = traces_for(prepared.problem, res.x)
        if bands is not None:
            by_key = {(ex.name, o): band for ex, exp_bands in zip(prepared.problem.experiments, bands)
                      for o, band in exp_bands.items()}
            for tr in traces:
                tr.bands = by_key[(tr.experiment, tr.output)].trace_bands()
        write_fitted_csv(tmp / "fitted.csv", traces)
        title = "least squares with posterior bands" if bands is not None else "least-squares fit"
        plot_overlay(tmp / "fit.png", traces, f"{study.name}: {title}")
        if post is not None:
            post.save_samples(tmp / "samples.npz")
            post.write_plots(tmp)
        if windows:
            from graybox.data.windows import write_windows

            write_windows(windows, tmp)
        if val_traces:
            write_fitted_csv(tmp / "validation.csv", val_traces)
            plot_overlay(tmp / "validation.png", val_traces, f"{study.name}: held-out data, fitted parameters")
        stages["writing_s"] = time.perf_counter() - mark
        doc["run"]["stages"] = stages
        doc["run"]["wall_s"] = time.perf_counter() - t0
        write_json(tmp / RESULTS, doc)
    echo(f"run folder: {out}")
    echo(CAUTION)
    return doc


def guess_sensitivities(study: Study, engine: Engine) -> Callable:
    """d output / d free parameter at the guesses, one row per observation of each output
    (rows not compared are zero): what the informative-window ranking needs."""

    def sensitivity_fn(record) -> dict[str, np.ndarray]:
        problem = Problem(study.spec, [Experiment(record.name, plan(study.spec, record))], engine)
        sims = problem.simulate(problem.guess()[None], sens=True)
        cols = [c for j, c in problem.column_map(0) if problem.free[j].kind == "parameter"]
        out = {}
        for o in study.spec.output_names:
            S = sims[0].sens[o][0][:, cols]
            out[o] = np.where(np.isfinite(S), S, 0.0)
        return out

    return sensitivity_fn


DEFAULT_WINDOW_S, DEFAULT_TOP = 86400.0, 5


def informative_windows(study: Study, prepared: Prepared, echo: Echo) -> list:
    """The most informative windows of each fit record (log det of the Fisher information
    at the guesses, from the inputs alone), for the run folder."""
    from graybox.data import data_spec
    from graybox.data.windows import rank_windows

    fn = guess_sensitivities(study, prepared.engine)
    symbols = data_symbols(study)
    scores = []
    for (name, table), ex in zip(study.experiments.items(), prepared.problem.experiments):
        search = data_spec(table.data, name, symbols=symbols, base_dir=study.base_dir, where=table.where()).search
        lo, hi = ex.record.time_span()
        window = search.window if search else min(DEFAULT_WINDOW_S, (hi - lo) / 2)
        try:
            ranked = rank_windows(ex.record, fn, window=window, step=search.step if search else window / 4,
                                  top=search.top if search else DEFAULT_TOP, noise=dict(search.noise) if search else None)
        except GrayboxError as exc:  # a record too short to rank is not a failed fit
            echo(f"note: informative windows of '{name}' not ranked: {exc.message}")
            continue
        scores += ranked
    return scores


def check_study(config: str | Path, *, echo: Echo = print, sample: bool | None = None,
                sampler_options: dict | None = None) -> int:
    """Model and data checks without fitting, then the informative windows; 0 when a fit
    could run, 2 (with the reasons printed) when it could not.

    The study is loaded exactly as ``fit_study`` loads it (``sample`` and ``sampler_options``
    as there), so every error the study file alone can cause is raised here with the same
    message; sampling on means the priors were checked for sampling too."""
    from graybox.data import check_experiment

    study = load_study(config, sample=sample, sampler_options=sampler_options)
    echo(study.spec.describe())
    echo(sampling_text(study, sample))
    for w in study.spec.warnings:
        echo(f"warning: {w}")
    engine = Engine(study.spec, study.engine, study.tol)
    symbols = data_symbols(study)
    fn = guess_sensitivities(study, engine)
    ok = True
    for name, table in study.experiments.items():
        rep = check_experiment(table.data, name, symbols=symbols, base_dir=study.base_dir, where=table.where(),
                               sensitivity_fn=fn, dynamic=bool(study.spec.states))
        echo(rep.summary())
        ok &= rep.ok
    if not ok:
        echo("a fit could not run: see the problems above")
        return 2
    echo(f"the checks passed: a fit can run ({len(study.experiments)} experiment(s))")
    return 0


def sampling_text(study: Study, sample: bool | None) -> str:
    """One line: whether a fit would sample, who decided, and what was checked for it."""
    who = "the study's [sampling] enabled, default true" if sample is None else ("--no-sample" if not sample else "the caller")
    if study.sampler.enabled:
        return (f"sampling: on ({who}); sampler settings and priors checked for sampling "
                f"(a uniform prior needs finite bounds)")
    return f"sampling: off ({who}); priors checked, except that a uniform prior may have infinite bounds"


DEMO = "storage_vessel"


def demo_paths() -> tuple[Path, Path]:
    """The bundled demo study file and dataset folder (source tree or installed copy)."""
    root = Path(graybox.__file__).resolve().parent.parent
    cfg = root / "configs" / f"{DEMO}.toml"
    data = root / "datasets" / DEMO
    if not cfg.exists():
        raise GrayboxError(f"the demo study file {cfg} is missing",
                           hint="run the demo from a source checkout (pip install -e .)")
    return cfg, data


def run_demo(out: str | Path, *, force: bool = False, echo: Echo = print, sample: bool | None = None,
             sampler_options: dict | None = None) -> dict:
    cfg, data = demo_paths()
    doc = fit_study(cfg, out, force=force, echo=echo, sample=sample, sampler_options=sampler_options)
    truth = json.loads((data / "truth.json").read_text())["parameters"]
    echo("demo truth check (values the data were generated with):")
    for name, value in truth.items():
        p = doc["parameters"][name]
        lo, hi = p["ci95"]
        inside = lo <= value <= hi
        echo(f"  {name}: true {value:g}, estimate {p['estimate']:.6g}, 95% interval [{lo:.6g}, {hi:.6g}] "
             f"{'contains' if inside else 'MISSES'} the truth")
        if "posterior" in p:
            clo, chi = p["posterior"]["ci95"]
            echo(f"  {name}: posterior median {p['posterior']['median']:.6g}, 95% credible interval "
                 f"[{clo:.6g}, {chi:.6g}] {'contains' if clo <= value <= chi else 'MISSES'} the truth")
    return doc

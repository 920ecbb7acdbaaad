"""The jobs behind the commands: the public API (:mod:`graybox.api`) with a study file and
printing.

``fit_study``: study file -> :func:`graybox.fit` -> (posterior) -> :func:`graybox.write_run`.
``check_study``: :func:`graybox.check`, printed.  ``run_demo``: the whole job on the bundled
demo data.
"""

from __future__ import annotations

import json
from pathlib import Path

from graybox.api import check, fit, write_run_document
from graybox.errors import GrayboxError
from graybox.runs.folder import check_target
from graybox.stages import CAUTION, Echo, RunClock, prepare, validation_text  # noqa: F401  (prepare: re-exported)
from graybox.study import Study, load_study

__all__ = ["CAUTION", "check_study", "demo_paths", "fit_study", "prepare", "run_demo", "sampling_text"]


def fit_study(config: str | Path, out: str | Path, *, force: bool = False, echo: Echo = print,
              sample: bool | None = None, sampler_options: dict | None = None, overrides: dict | None = None,
              seed: int | None = None, run_info: dict | None = None) -> dict:
    """Fit a study file and write its run folder; returns the results document.

    ``sample`` decides whether to sample (None: the study's ``[sampling] enabled``);
    ``sampler_options`` replace ``[sampling]`` keys; ``overrides`` replace study-file keys
    (fleet batches); ``seed`` replaces the study's seed; ``run_info`` is merged into the run
    record."""
    clock = RunClock.now()
    out = Path(out)
    check_target(out.absolute(), force)
    study = load_study(config, overrides, sample=sample, sampler_options=sampler_options).with_seed(seed)
    result = fit(study, echo=echo, clock=clock)
    final = result.sample(echo=echo) if study.sampler.enabled else result
    if result.validation:
        echo(validation_text(result.validation))
    doc = write_run_document(out, final, force=force, run_info=run_info)
    echo(f"run folder: {out}")
    echo(CAUTION)
    return doc


def check_study(config: str | Path, *, echo: Echo = print, sample: bool | None = None,
                sampler_options: dict | None = None) -> int:
    """Model and data checks without fitting, then the informative windows; 0 when a fit
    could run, 2 (with the reasons printed) when it could not.

    The study is loaded exactly as ``fit_study`` loads it (``sample`` and ``sampler_options``
    as there), so every error the study alone can cause is raised here with the same
    message; sampling on means the priors were checked for sampling too."""
    study = load_study(config, sample=sample, sampler_options=sampler_options)
    echo(study.spec.describe())
    echo(sampling_text(study, sample))
    for w in study.spec.warnings:
        echo(f"warning: {w}")
    result = check(study, echo=echo)
    echo(result.verdict())
    return 0 if result.ok else 2


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
    root = Path(__file__).resolve().parent.parent  # graybox/workflow.py -> the source tree
    cfg = root / "configs" / f"{DEMO}.toml"
    data = root / "datasets" / DEMO
    if not cfg.exists():
        raise GrayboxError(f"the demo study file {cfg} is missing",
                           hint="run the demo from a source checkout (pip install -e .)")
    return cfg, data


def run_demo(out: str | Path, *, force: bool = False, echo: Echo = print, sample: bool | None = None,
             sampler_options: dict | None = None) -> dict:
    """The whole job on the bundled demo data, then whether the 95% intervals contain the
    values the data were generated with."""
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

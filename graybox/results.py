"""Results that show themselves: a study's least-squares fit (:class:`StudyFit`), its
posterior (:class:`StudyPosterior`) and its checks (:class:`StudyCheck`).

Each gives ``summary()`` (the text ``graybox fit`` / ``graybox check`` prints; also its
``repr``), ``_repr_html_`` (a table for notebooks, every text escaped), ``to_dict()`` (the
``results.json`` document, keys as the run folder writes them) and ``to_frame()`` (the
parameters as a pandas table).  The posterior also gives its kept draws as a DataFrame or
an array with their names.  :meth:`StudyFit.sample` runs the posterior stage.
"""

from __future__ import annotations

import copy
import html
import time
from dataclasses import dataclass, field, replace

import numpy as np
import pandas as pd

from graybox.data.report import DataReport
from graybox.errors import GrayboxError
from graybox.estimate.result import FitResult, ParameterEstimate
from graybox.posterior.sample import PosteriorResult
from graybox.runs.artifacts import OutputTrace, fitted_table
from graybox.stages import Echo, Prepared, RunClock, quiet, traces_for, validation_text
from graybox.study import Study

BAND_STREAM = 0x62616E64  # "band": the credible and prediction bands' own random stream
FRAME_COLUMNS = ("estimate", "stderr", "ci95_lo", "ci95_hi", "units", "fixed", "at_bound", "determined", "guess",
                 "lower", "upper")
POSTERIOR_COLUMNS = ("median", "mean", "sd", "ci95_lo", "ci95_hi", "ess", "rhat")


# -- tables and HTML -----------------------------------------------------------------------------
def parameter_frame(parameters: dict) -> pd.DataFrame:
    """results.json ``parameters`` as a table, one row per parameter (index ``parameter``):
    estimate, stderr, 95% interval ends, units, fixed, at_bound, determined, guess, bounds;
    with ``posterior_*`` columns where the parameter was sampled."""
    rows = []
    for p in parameters.values():
        lo, hi = p["ci95"]
        blo, bhi = p["bounds"]
        row = {"estimate": p["estimate"], "stderr": p["stderr"], "ci95_lo": lo, "ci95_hi": hi, "units": p["units"],
               "fixed": p["fixed"], "at_bound": p["at_bound"], "determined": p["determined"], "guess": p["guess"],
               "lower": blo, "upper": bhi}
        post = p.get("posterior")
        if post is not None:
            row.update({f"posterior_{k}": post[k] for k in ("median", "mean", "sd", "ess", "rhat")})
            row["posterior_ci95_lo"], row["posterior_ci95_hi"] = post["ci95"]
        rows.append(row)
    columns = list(FRAME_COLUMNS)
    if any("posterior" in p for p in parameters.values()):
        columns += [f"posterior_{k}" for k in POSTERIOR_COLUMNS]
    return pd.DataFrame(rows, index=pd.Index(list(parameters), name="parameter"), columns=columns)


def _cell(v) -> str:
    if isinstance(v, float):
        return "" if np.isnan(v) else f"{v:.6g}"
    return "" if v is None else str(v)


def html_table(frame: pd.DataFrame) -> str:
    """A plain HTML table of ``frame`` (index first), every header and cell escaped."""
    esc = html.escape
    head = "".join(f"<th>{esc(str(c))}</th>" for c in [frame.index.name or "", *frame.columns])
    body = "".join("<tr><th>" + esc(str(i)) + "</th>" + "".join(f"<td>{esc(_cell(v))}</td>" for v in row) + "</tr>"
                   for i, row in zip(frame.index, frame.itertuples(index=False)))
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def html_block(title: str, frame: pd.DataFrame | None, text: str, warnings: list[str]) -> str:
    """A result for a notebook: a title, a table, its warnings and the full text (escaped)."""
    esc = html.escape
    parts = [f"<div class=\"graybox-result\"><p><strong>{esc(title)}</strong></p>"]
    if frame is not None:
        parts.append(html_table(frame))
    if warnings:
        parts.append("<ul>" + "".join(f"<li>{esc(w)}</li>" for w in warnings) + "</ul>")
    parts.append(f"<details><summary>full summary</summary><pre>{esc(text)}</pre></details></div>")
    return "".join(parts)


# -- least squares -----------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class StudyFit:
    """A study fitted by least squares (:func:`graybox.fit`): estimates with standard
    errors and 95% intervals, noise levels, fit statistics, the data reports, informative
    windows and held-out validation."""

    study: Study
    prepared: Prepared  # the loaded data and the estimation problem
    estimate: FitResult  # the estimate layer's result
    windows: tuple = ()  # the informative windows of the fit records (WindowScore)
    notes: tuple[str, ...] = ()  # records whose windows were not ranked
    validation: dict = field(default_factory=dict)  # experiment -> output -> held-out bias, RMSE, ...
    validation_traces: tuple[OutputTrace, ...] = ()
    clock: RunClock = field(default_factory=RunClock.now)
    stages: dict = field(default_factory=dict)  # seconds per stage so far
    document: dict = field(default_factory=dict)  # the results document as of the fit

    @property
    def parameters(self) -> dict[str, ParameterEstimate]:
        """Name -> estimate, standard error, 95% interval, units, ... (free values and fixed parameters)."""
        return self.estimate.parameters

    @property
    def sigmas(self) -> dict[str, float]:
        """Output -> its noise level (estimated or given)."""
        return self.estimate.sigmas

    @property
    def reports(self) -> dict[str, DataReport]:
        """Experiment -> what the data layer did to its data."""
        return self.prepared.reports

    def summary(self) -> str:
        """The least-squares summary ``graybox fit`` prints, then the held-out validation."""
        text = self.estimate.summary()
        return text + ("\n" + validation_text(self.validation) if self.validation else "")

    def data_summary(self) -> str:
        """The data reports ``graybox fit`` prints before fitting."""
        return "\n".join(rep.summary() for rep in self.reports.values())

    @property
    def data_warnings(self) -> list[str]:
        """What the data layer warned about (long gaps and silences, stuck runs, clock
        changes), each prefixed by its experiment."""
        return [f"{name}: {w}" for name, rep in self.reports.items() for w in rep.warnings]

    def __repr__(self) -> str:
        """The summary; when the data layer warned, a last line saying how many times and
        where to read them (a notebook user sees no data report otherwise)."""
        n = len(self.data_warnings)
        pointer = f"\ndata: {n} warning(s) from loading the data: data_summary() shows them" if n else ""
        return self.summary() + pointer

    def _repr_html_(self) -> str:
        return html_block(f"{self.study.name}: least squares", self.to_frame(), self.summary(),
                          self.data_warnings + list(self.estimate.warnings))

    def to_dict(self) -> dict:
        """The results document (``results.json`` of a run without sampling)."""
        doc = copy.deepcopy(self.document)
        if self.validation:
            doc["validation"] = copy.deepcopy(self.validation)
        return doc

    def to_frame(self) -> pd.DataFrame:
        """The parameters as a table (see :func:`parameter_frame`)."""
        return parameter_frame(self.document["parameters"])

    def traces(self) -> list[OutputTrace]:
        """Measured and fitted values of every output at its compared observations."""
        return traces_for(self.prepared.problem, self.estimate.x)

    def fitted_frame(self) -> pd.DataFrame:
        """Fitted against measured at every compared observation (``fitted.csv``)."""
        return fitted_table(self.traces())

    def sample(self, *, walkers: int | None = None, max_steps: int | None = None, seed: int | None = None,
               check_every: int | None = None, progress: bool | str | None = None,
               echo: Echo = quiet) -> "StudyPosterior":
        """Sample the posterior from this fit (:func:`sample`)."""
        return sample(self, walkers=walkers, max_steps=max_steps, seed=seed, check_every=check_every,
                      progress=progress, echo=echo)


# -- posterior ---------------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class StudyPosterior:
    """The posterior of a fitted study (:meth:`StudyFit.sample`): credible intervals, noise
    parameters, convergence, and the credible and prediction bands of every output."""

    fit: StudyFit
    posterior: PosteriorResult  # the posterior layer's result (chain, diagnostics)
    bands: tuple = ()  # per experiment: output -> PredictiveBand
    seconds: float = 0.0

    @property
    def converged(self) -> bool:
        """Whether the chain met every convergence criterion."""
        return self.posterior.converged

    @property
    def names(self) -> list[str]:
        """The sampled quantities: free values, then noise parameters (``sigma[T]``, ...)."""
        return list(self.posterior.names)

    def summary(self) -> str:
        """The posterior summary ``graybox fit`` prints."""
        return self.posterior.summary()

    def __repr__(self) -> str:
        return self.summary()

    def _repr_html_(self) -> str:
        status = "converged" if self.converged else "NOT CONVERGED"
        return html_block(f"{self.fit.study.name}: posterior ({status})", self.to_frame(), self.summary(),
                          list(self.posterior.warnings))

    def to_dict(self) -> dict:
        """The results document with the posterior (``results.json`` of a sampled run)."""
        doc = copy.deepcopy(self.fit.document)
        for name, entry in self.posterior.to_parameters_dict().items():
            doc["parameters"][name].update(entry)
        for o, entry in self.posterior.to_noise_dict().items():
            doc["noise"][o].update(entry)
        doc["sampler"] = self.posterior.sampler_dict()
        doc["run"]["stages"] = {**doc["run"].get("stages", {}), "posterior_s": self.seconds}
        if self.fit.validation:
            doc["validation"] = copy.deepcopy(self.fit.validation)
        return doc

    def to_frame(self) -> pd.DataFrame:
        """The parameters as a table with their posterior columns (see :func:`parameter_frame`)."""
        return parameter_frame(self.to_dict()["parameters"])

    def draws_array(self, include_noise: bool = True) -> tuple[np.ndarray, list[str]]:
        """The kept draws (after burn-in, thinned, walkers pooled; natural units), one row
        per draw, and the name of each column (free values, then noise parameters)."""
        flat = self.posterior.flat()
        n = flat.shape[1] if include_noise else self.posterior.n_free
        return flat[:, :n].copy(), self.names[:n]

    def draws(self, include_noise: bool = True) -> pd.DataFrame:
        """The kept draws as a table, one column per sampled quantity (see :meth:`draws_array`)."""
        values, names = self.draws_array(include_noise)
        return pd.DataFrame(values, columns=names)


def sampler_for(study: Study, options: dict):
    """The study's sampler settings, on, with the given options (None: not given) checked
    like the ``[sampling]`` keys they replace."""
    from graybox.posterior.config import apply_overrides

    base = replace(study.sampler, enabled=True)
    try:
        return apply_overrides(base, options)
    except GrayboxError as exc:  # located at the command-line option: name the keyword instead
        prefix = "command-line option --"
        if exc.where and exc.where.startswith(prefix):
            key = exc.where[len(prefix):].replace("-", "_")
            raise type(exc)(exc.message, where=f"sample() keyword {key}", hint=exc.hint) from None
        raise


def proper_priors(fitted: StudyFit) -> list:
    """One prior per free value, proper as sampling needs (a study loaded with sampling off
    had its uniform priors without finite bounds let through: checked here)."""
    from graybox.posterior.config import expand_priors, parameter_priors

    study = fitted.study
    base = study.priors if study.sampler.enabled else parameter_priors(study.spec, study.path, proper=True)
    return expand_priors(base, study.spec, fitted.prepared.problem)


def sample(fitted: StudyFit, *, walkers: int | None = None, max_steps: int | None = None, seed: int | None = None,
           check_every: int | None = None, progress: bool | str | None = None, echo: Echo = quiet) -> StudyPosterior:
    """Sample the posterior of a fitted study with emcee, starting from the least-squares
    estimate; the bands of every output follow.  The keywords replace the study's
    ``[sampling]`` settings (None: as the study says); the seed is ``seed``, else the
    ``[sampling] seed``, else the study's."""
    from graybox.posterior import predictive_bands, run_posterior

    mark = time.perf_counter()
    study = fitted.study
    options = {"walkers": walkers, "max_steps": max_steps, "seed": seed, "check_every": check_every,
               "progress": progress}
    settings = sampler_for(study, options)
    priors = proper_priors(fitted)
    problem = fitted.prepared.problem
    post = run_posterior(problem, fitted.estimate, study.noise_models, settings, study.seed, priors=priors, file=study.path)
    echo(post.summary())
    rng = np.random.default_rng(np.random.SeedSequence([study.seed, BAND_STREAM]))
    bands = predictive_bands(problem, post, settings.band_draws, rng)
    return StudyPosterior(fitted, post, tuple(bands), time.perf_counter() - mark)


# -- checks ------------------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class StudyCheck:
    """A study built and its data loaded, without fitting (:func:`graybox.check`): each
    experiment's data report with its informative windows, and whether a fit could run."""

    study: Study
    reports: dict[str, DataReport]
    notes: tuple[str, ...] = ()  # records whose windows were not ranked

    @property
    def ok(self) -> bool:
        """True when a fit could run (no data report lists a problem)."""
        return all(rep.ok for rep in self.reports.values())

    def verdict(self) -> str:
        """The last line ``graybox check`` prints."""
        if not self.ok:
            return "a fit could not run: see the problems above"
        return f"the checks passed: a fit can run ({len(self.study.experiments)} experiment(s))"

    def summary(self) -> str:
        """The data reports (with their windows), the notes and the verdict."""
        return "\n".join([*(rep.summary() for rep in self.reports.values()), *self.notes, self.verdict()])

    def __repr__(self) -> str:
        return self.summary()

    def _repr_html_(self) -> str:
        problems = [p for rep in self.reports.values() for p in rep.problems]
        return html_block(f"{self.study.name}: checks ({'a fit can run' if self.ok else 'a fit could not run'})",
                          None, self.summary(), problems)

    def to_dict(self) -> dict:
        """Experiment -> its data report as a dict (results.json ``data``), and ``ok``."""
        return {"data": {name: rep.to_dict() for name, rep in self.reports.items()}, "ok": self.ok}

    def to_frame(self) -> pd.DataFrame:
        """One row per tag of every experiment: rows read, valid, masked, coverage, gaps."""
        rows = [{"experiment": name, "symbol": t.symbol, "tag": t.tag, "role": t.role, "rows_read": t.rows_read,
                 "valid": t.valid, "masked": t.masked_total, "coverage_pct": t.coverage_pct, "gaps": t.gaps,
                 "conversion": t.conversion}
                for name, rep in self.reports.items() for t in rep.tags]
        return pd.DataFrame(rows)

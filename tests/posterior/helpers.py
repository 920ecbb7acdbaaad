"""Builders shared by the posterior tests: small problems through the real model, data,
simulation and estimation layers (nothing mocked)."""

from __future__ import annotations

from datetime import datetime, timezone

import numpy as np

from graybox.config import NoiseSpec
from graybox.configkit import Table
from graybox.data.record import OutputSeries, InputSeries, Record, Segment, record_from_arrays
from graybox.estimate.fit import FitSettings, fit
from graybox.estimate.problem import Experiment, Problem
from graybox.model.build import build_spec
from graybox.simulate import Engine, plan

LINEAR_MODEL = {"inputs": {"x": ""}, "outputs": {"y": {"expr": "a + b*x"}}}


def spec_of(model: dict, params: dict):
    return build_spec(Table(model, ("model",)), Table(params, ("parameters",)))


def problem_of(spec, t, inputs: dict, outputs: dict, engine: str = "reference") -> Problem:
    rec = record_from_arrays("main", t, inputs, outputs)
    return Problem(spec, [Experiment("main", plan(spec, rec))], Engine(spec, engine))


def problem_of_record(spec, rec: Record, engine: str = "reference") -> Problem:
    return Problem(spec, [Experiment(rec.name, plan(spec, rec))], Engine(spec, engine))


def fitted(problem: Problem, sigmas: dict):
    return fit(problem, FitSettings(sigmas=sigmas))


def noise(output: str, sigma=None, kind="gaussian", **options) -> dict:
    return {output: NoiseSpec(output, sigma, kind, dict(options))}


def segmented_record(t: np.ndarray, inputs: dict, outputs: dict, cuts: list[float]) -> Record:
    """A record on one time base split into segments at ``cuts`` (segment i: [cut_i, next))."""
    ins = {k: InputSeries(k, t, np.asarray(v, float)) for k, v in inputs.items()}
    outs = {k: OutputSeries(k, t, np.asarray(v, float)) for k, v in outputs.items()}
    edges = [t[0], *cuts, t[-1] + 1.0]
    segs = []
    for lo, hi in zip(edges[:-1], edges[1:]):
        inside = t[(t >= lo) & (t < hi)]
        segs.append(Segment(float(inside[0]), float(inside[-1])))
    return Record("main", datetime(2026, 1, 1, tzinfo=timezone.utc), ins, outs, tuple(segs))

"""Coverage of graybox's 95% intervals on replicated data.

Reference: the nominal coverage of a 95% confidence interval (common practice, no source):
over many replicate data sets drawn from a known truth, the interval should contain the
true value in about 95% of them.  With 400 fixed-seed replicates the binomial standard
error of an observed coverage is 1.1 points, so 92-98% is a band of about +-2.7 of them.

Model: static exponential decay y = A*exp(-k*x), x on [0, 10] (20 points), A = 2, k = 0.3,
Gaussian noise sd 0.05 (a mildly nonlinear model, so the intervals are the usual
linearisation ones); fitted through the Python API with the reference engine.
"""

from __future__ import annotations

import numpy as np
import pytest

from graybox.data.record import record_from_arrays
from graybox.estimate.fit import FitSettings, fit
from graybox.estimate.problem import Experiment, Problem
from graybox.simulate import Engine, plan

TRUTH = {"A": 2.0, "k": 0.3}
NOISE_SD = 0.05
REPLICATES = 400
X = np.linspace(0.0, 10.0, 20)


def decay_spec():
    """The model as a spec (the [model] and [parameters] tables of a study file)."""
    from graybox.configkit import Table
    from graybox.model.build import build_spec

    return build_spec(Table({"inputs": {"x": ""}, "outputs": {"y": {"expr": "A*exp(-k*x)"}}}, ("model",)),
                      Table({"A": {"guess": 1.0}, "k": {"guess": 0.1}}, ("parameters",)))


def replicate_problem(spec, engine: Engine, y: np.ndarray) -> Problem:
    """One replicate data set as an estimation problem (a static table, rows 0, 1, 2, ... s)."""
    rec = record_from_arrays("rep", np.arange(X.size, dtype=float), {"x": X}, {"y": y})
    return Problem(spec, [Experiment(rec.name, plan(spec, rec))], engine)


def coverage(settings: FitSettings, seed: int) -> dict[str, float]:
    """Fraction of replicates whose 95% interval contains the truth, per parameter."""
    spec = decay_spec()
    engine = Engine(spec, "reference")
    rng = np.random.default_rng(seed)
    mean = TRUTH["A"] * np.exp(-TRUTH["k"] * X)
    hits = {name: 0 for name in TRUTH}
    for _ in range(REPLICATES):
        res = fit(replicate_problem(spec, engine, mean + NOISE_SD * rng.standard_normal(X.size)), settings)
        for name, true in TRUTH.items():
            lo, hi = res.parameters[name].ci95
            hits[name] += lo <= true <= hi
    return {name: h / REPLICATES for name, h in hits.items()}


@pytest.fixture(scope="module")
def estimated_sigma() -> dict[str, float]:
    return coverage(FitSettings(), seed=20260101)


@pytest.fixture(scope="module")
def given_sigma() -> dict[str, float]:
    return coverage(FitSettings(sigmas={"y": NOISE_SD}), seed=20260102)


@pytest.mark.parametrize("name", list(TRUTH))
def test_coverage_with_estimated_sigma(estimated_sigma, name):
    """Nominal 95% coverage (common practice): sigma estimated, Student-t intervals."""
    assert 0.92 <= estimated_sigma[name] <= 0.98, estimated_sigma


@pytest.mark.parametrize("name", list(TRUTH))
def test_coverage_with_given_sigma(given_sigma, name):
    """Nominal 95% coverage (common practice): sigma given (the true one), normal intervals."""
    assert 0.92 <= given_sigma[name] <= 0.98, given_sigma

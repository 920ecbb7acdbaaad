"""The Gaussian log-likelihood from sums of squares (the engine's SSE mode, no trajectory
kept) against scipy.stats.norm.logpdf summed over the residuals of stored trajectories.

Reference: scipy.stats.norm (the reference library's density), evaluated on residuals from
``problem.predictions`` (the store mode); two experiments, two outputs, a dynamic model on the
compiled core and on the reference path, some sets failing.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from graybox.data.record import record_from_arrays
from graybox.estimate.problem import Experiment, Problem
from graybox.posterior.likelihood import LogPosterior
from graybox.posterior.noise import noise_layout
from graybox.posterior.config import priors_from_spec
from graybox.simulate import Engine, plan
from tests.posterior.helpers import noise, spec_of

MODEL = {"states": {"y": {"units": "", "rate": "(K*u - y)/tau", "initial": "estimate"}}, "inputs": {"u": ""},
         "outputs": {"y_m": {"expr": "y"}, "y2": {"expr": "2*y + 0.1*u"}}}
PARAMS = {"K": {"guess": 1.5, "bounds": [0.1, 10]}, "tau": {"guess": 4.0, "bounds": [0.5, 50], "units": "s"}}


def problem(engine: str) -> Problem:
    spec = spec_of(MODEL, PARAMS)
    rng = np.random.default_rng(3)
    exps = []
    for name, n in (("a", 80), ("b", 50)):
        t = np.arange(n) * 1.0
        u = np.where((t // 10) % 2 == 0, 1.0, 0.2)
        outs = {"y_m": 1.5 * u + 0.1 * rng.standard_normal(n), "y2": 3 * u + 0.1 * rng.standard_normal(n)}
        outs["y2"][::7] = np.nan  # gaps: only compared observations count
        exps.append(Experiment(name, plan(spec, record_from_arrays(name, t, {"u": u}, outs))))
    return Problem(spec, exps, Engine(spec, engine))


@pytest.mark.parametrize("engine", ["compiled", "reference"])
def test_sums_equal_the_density_of_the_residuals(engine):
    prob = problem(engine)
    nz = {**noise("y_m"), **noise("y2")}
    layout = noise_layout(nz, prob)
    post = LogPosterior(prob, priors_from_spec(prob.spec, prob), layout)
    assert post._sums_suffice
    rng = np.random.default_rng(0)
    n_sets = 6
    X = np.column_stack([rng.uniform(1.0, 2.0, n_sets), rng.uniform(2.0, 8.0, n_sets),
                         rng.uniform(-0.2, 0.2, (n_sets, prob.n_free - 2))])
    X[5, 1] = 0.0  # tau = 0: the rate is not finite, the set fails
    sig = rng.uniform(0.05, 0.3, (n_sets, 2))
    N = np.log(sig)
    got = post._gaussian_from_sums(X, N)
    preds, ok = prob.predictions(X)
    assert ok.tolist() == [True] * 5 + [False]
    for s in range(5):
        ref = 0.0
        for e, pred in enumerate(preds):
            for r, o in enumerate(prob.spec.output_names):
                resid = prob.observed(e, o) - pred[o][s]
                ref += stats.norm(0.0, sig[s, r]).logpdf(resid).sum()
        assert got[s] == pytest.approx(ref, rel=1e-12)
    assert got[5] == -np.inf

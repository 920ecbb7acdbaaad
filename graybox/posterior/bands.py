"""Credible and prediction bands of the model outputs from posterior draws.

For each draw of the free vector the model is simulated at the compared observations; the
2.5% and 97.5% quantiles over draws give the 95% credible band of the model output.  Adding
one draw of the error process per draw (with that draw's noise parameters: independent
Gaussian or Student-t errors, or the AR(1) process with the record's own spacings) gives
the 95% prediction band of a new measurement (the posterior predictive distribution, e.g.
Gelman et al., *Bayesian Data Analysis*, 3rd ed., section 6.3).
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from graybox.estimate.problem import Problem

CHUNK = 128  # draws simulated per batch


class PredictiveBand(NamedTuple):
    """95% bands at the compared observations of one output of one experiment."""

    lo_cred: np.ndarray
    hi_cred: np.ndarray
    lo_pred: np.ndarray
    hi_pred: np.ndarray

    def trace_bands(self) -> dict[str, tuple[np.ndarray, np.ndarray]]:
        """As ``graybox.runs.artifacts.OutputTrace.bands`` wants them."""
        return {"credible95": (self.lo_cred, self.hi_cred), "prediction95": (self.lo_pred, self.hi_pred)}


def model_draws(problem: Problem, X: np.ndarray) -> tuple[list[dict[str, np.ndarray]], np.ndarray]:
    """Model outputs for each row of X, simulated in chunks: per experiment {output: (n, n_used)}."""
    parts, oks = [], []
    for i in range(0, X.shape[0], CHUNK):
        preds, ok = problem.predictions(X[i:i + CHUNK])
        parts.append(preds)
        oks.append(ok)
    preds = [{o: np.concatenate([p[e][o] for p in parts]) for o in problem.spec.output_names}
             for e in range(len(problem.experiments))]
    return preds, np.concatenate(oks)


def predictive_bands(problem: Problem, posterior, n_draws: int, rng: np.random.Generator
                     ) -> list[dict[str, PredictiveBand]]:
    """Per experiment (in problem order), per output: the 95% credible band of the model and
    the 95% prediction band (noise included), aligned with ``problem.observed(e, output)``."""
    rows = posterior.draws(n_draws, rng, include_noise=True)
    n_free = posterior.n_free
    X = rows[:, :n_free]
    layout = posterior.layout
    N = np.column_stack([p.to_sampled(rows[:, n_free + k]) for k, p in enumerate(layout.params)]) \
        if layout.params else np.zeros((rows.shape[0], 0))
    preds, ok = model_draws(problem, X)
    if not ok.any():
        raise RuntimeError("no posterior draw could be simulated for the bands")
    out = []
    for e, pred in enumerate(preds):
        bands = {}
        for o in problem.spec.output_names:
            y = pred[o][ok]
            noise = layout.simulate(o, e, N[ok], rng, y.shape[1])
            lo_c, hi_c = np.quantile(y, [0.025, 0.975], axis=0)
            lo_p, hi_p = np.quantile(y + noise, [0.025, 0.975], axis=0)
            bands[o] = PredictiveBand(lo_c, hi_c, lo_p, hi_p)
        out.append(bands)
    return out

"""Linear-Gaussian model with known noise and Gaussian priors: the samples against the exact
conjugate posterior.

Reference: Bayesian linear regression with known variance (Gelman et al., *Bayesian Data
Analysis*, 3rd ed., section 14.8 and appendix A; any text on conjugate normal models): with
y = X beta + e, e ~ N(0, s^2 I) and beta ~ N(m0, S0),
Sigma_n = (S0^-1 + X^T X / s^2)^-1 and mu_n = Sigma_n (S0^-1 m0 + X^T y / s^2).
The bounds are 100 prior standard deviations wide, so their truncation is immaterial.

Tolerances come from the chain itself: the Monte Carlo standard error of a mean is
sd / sqrt(ESS); of a covariance element, sqrt((S_ii S_jj + S_ij^2) / ESS) (the large-sample
variance of a Gaussian sample covariance).  The prior is chosen strong enough that ignoring
it would move the mean by more than 10 Monte Carlo errors, which the test asserts too; for
that the run asks for an ESS of 2,000 (the default 400 left Monte Carlo errors about 1.7
times as large, and the stop rule no longer runs far past its ESS target).
"""

from __future__ import annotations

import numpy as np
import pytest

from graybox.posterior import SamplerSettings, run_posterior
from tests.posterior.helpers import LINEAR_MODEL, fitted, noise, problem_of, spec_of

SIGMA = 0.5
M0 = np.array([0.0, 1.0])
SD0 = np.array([0.15, 0.3])


def conjugate(X: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    S0inv = np.diag(1 / SD0**2)
    cov = np.linalg.inv(S0inv + X.T @ X / SIGMA**2)
    return cov @ (S0inv @ M0 + X.T @ y / SIGMA**2), cov


def test_samples_match_the_conjugate_posterior():
    rng = np.random.default_rng(2024)
    n = 25
    x = np.linspace(-1.0, 2.0, n)
    y = 0.6 + 2.0 * x + rng.normal(0, SIGMA, n)
    spec = spec_of(LINEAR_MODEL, {
        "a": {"guess": 0.0, "bounds": [-15.0, 15.0], "prior": {"kind": "normal", "mean": 0.0, "sd": 0.15}},
        "b": {"guess": 1.0, "bounds": [-29.0, 31.0], "prior": {"kind": "normal", "mean": 1.0, "sd": 0.3}},
    })
    prob = problem_of(spec, np.arange(n, dtype=float), {"x": x}, {"y": y})
    res = fitted(prob, {"y": SIGMA})
    settings = SamplerSettings(walkers=16, check_every=200, progress=False, min_ess=2000)
    post = run_posterior(prob, res, noise("y", SIGMA), settings, seed=7)
    assert post.converged, post.reason
    X = np.column_stack([np.ones(n), x])
    mu, cov = conjugate(X, y)
    draws = post.post_burn().reshape(-1, 2)
    ess = np.array([post.check.ess_mean[0], post.check.ess_mean[1]])
    sd = np.sqrt(np.diag(cov))
    mcse = sd / np.sqrt(ess)
    mean = draws.mean(axis=0)
    assert np.all(np.abs(mean - mu) < 4 * mcse), (mean, mu, mcse)
    # the prior matters: the least-squares (flat-prior) mean is far away in Monte Carlo units
    assert np.all(np.abs(res.x - mu) > 10 * mcse), (res.x, mu, mcse)
    S = np.cov(draws.T)
    ess_min = float(np.min(ess))
    se_cov = np.sqrt((np.outer(np.diag(cov), np.diag(cov)) + cov**2) / ess_min)
    assert np.all(np.abs(S - cov) < 4 * se_cov), (S, cov, se_cov)
    # the reported summaries agree with the draws
    p = post.to_parameters_dict()
    assert p["a"]["posterior"]["mean"] == pytest.approx(mean[0])
    assert p["b"]["posterior"]["sd"] == pytest.approx(np.std(draws[:, 1], ddof=1))

"""One-parameter decay with a skewed posterior, sampled in log space, against quadrature.

Model: y = exp(-s / tau) + e at six points s, e ~ N(0, 0.15^2) known, tau in [0.5, 100] with
``log_scale = true``.  Reference: the posterior of tau computed by numerical quadrature
(scipy.integrate.quad for the normalising constant and the CDF, scipy.optimize.brentq for
its quantiles) from likelihood x prior as the user wrote it, in tau.  Sampling ln tau
without the log-Jacobian would instead give the density likelihood x prior / tau, whose
quantiles are computed too and must be rejected by the same tolerance (so the test can fail).

Tolerance: the Monte Carlo standard error of a sample quantile,
sqrt(q (1 - q) / ESS) / f(x_q) (asymptotic normality of sample quantiles, e.g. van der Vaart,
*Asymptotic Statistics*, section 21.2), with the bulk ESS at the median and the tail ESS at
2.5% and 97.5%; 4 standard errors.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, optimize

from graybox.posterior import SamplerSettings, run_posterior
from tests.posterior.helpers import fitted, noise, problem_of, spec_of

S = np.array([0.5, 1.0, 2.0, 3.0, 5.0, 8.0])
SIGMA = 0.15
LO, HI = 0.5, 100.0
QS = (0.025, 0.5, 0.975)


def data() -> np.ndarray:
    rng = np.random.default_rng(5)
    return np.exp(-S / 3.0) + rng.normal(0, SIGMA, S.size)


def quadrature_posterior(y: np.ndarray, log_prior, jacobian: bool):
    """Density (normalised) and quantiles of tau."""
    def unnorm(t):
        w = np.exp(log_prior(t)) if jacobian else np.exp(log_prior(t)) / t
        return np.exp(-0.5 * np.sum((y - np.exp(-S / t)) ** 2) / SIGMA**2) * w

    z = integrate.quad(unnorm, LO, HI, limit=500, points=[2.0, 3.0, 5.0, 10.0])[0]

    def cdf(x):
        return integrate.quad(unnorm, LO, x, limit=500)[0] / z

    quantiles = [optimize.brentq(lambda x: cdf(x) - q, LO, HI, xtol=1e-10) for q in QS]
    return (lambda t: unnorm(t) / z), np.array(quantiles)


@pytest.mark.parametrize("prior, log_prior", [
    (None, lambda t: 0.0),
    ({"kind": "lognormal", "median": 2.0, "log_sd": 0.6}, lambda t: -0.5 * (np.log(t / 2.0) / 0.6) ** 2 - np.log(t)),
])
def test_log_space_sampling_matches_quadrature(prior, log_prior):
    y = data()
    p = {"guess": 2.0, "bounds": [LO, HI], "log_scale": True}
    if prior:
        p["prior"] = prior
    spec = spec_of({"inputs": {"s": ""}, "outputs": {"y": {"expr": "exp(-s/tau)"}}}, {"tau": p})
    prob = problem_of(spec, np.arange(S.size, dtype=float), {"s": S}, {"y": y})
    res = fitted(prob, {"y": SIGMA})
    post = run_posterior(prob, res, noise("y", SIGMA), SamplerSettings(walkers=16, check_every=200, progress=False),
                         seed=3)
    assert post.converged, post.reason
    draws = post.post_burn()[:, :, 0].ravel()
    got = np.quantile(draws, QS)
    dens, ref = quadrature_posterior(y, log_prior, jacobian=True)
    _, wrong = quadrature_posterior(y, log_prior, jacobian=False)
    ess = np.array([post.check.ess_tail[0], post.check.ess[0], post.check.ess_tail[0]])
    se = np.sqrt(np.array(QS) * (1 - np.array(QS)) / ess) / np.array([dens(q) for q in ref])
    assert np.all(np.abs(got - ref) < 4 * se), (got, ref, se)
    assert np.any(np.abs(got - wrong) > 4 * se), (got, wrong, se)  # without the Jacobian it would fail
    # the posterior is skewed: the upper tail is longer than the lower
    assert (ref[2] - ref[1]) > 1.3 * (ref[1] - ref[0])
    ci = post.to_parameters_dict()["tau"]["posterior"]["ci95"]
    assert ci == pytest.approx([got[0], got[2]])

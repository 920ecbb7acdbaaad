"""Coverage of the 95% credible intervals over 200 fixed-seed replicates, and their width.

Model: the static line through the origin y = b x at ten points x in [0.1, 1], b = 2,
Gaussian noise sd 0.3, b uniform on [-50, 50] (the truncation is immaterial).

* sigma given: the posterior of b is N(b_hat, sigma^2 / x'x), so the 95% credible interval
  is the classical z-interval, whose frequentist coverage is exactly 95%.  Reference: the
  exact binomial 99% acceptance region of the covered count for 200 replicates at p = 0.95
  (scipy.stats.binom).
* sigma sampled (prior 1/sigma): the marginal posterior of b is Student-t with n - 1
  degrees of freedom around b_hat with scale s / sqrt(x'x) (Gelman et al., *Bayesian Data
  Analysis*, 3rd ed., section 14.2), so the interval must be the classical t-interval.  The
  width check is sharp (a Gaussian-quantile interval would be 1.96 / 2.262 = 0.87 of it, a
  wrong sampler far off: this check is what exposed emcee's snooker move, see
  graybox.posterior.sample.emcee_moves).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from graybox.posterior import SamplerSettings, run_posterior
from tests.posterior.helpers import fitted, noise, problem_of, spec_of

X = np.linspace(0.1, 1.0, 10)
B, SIGMA = 2.0, 0.3
SETTINGS = SamplerSettings(walkers=16, check_every=100, progress=False)


def acceptance(n: int, p: float = 0.95, level: float = 0.99) -> tuple[float, float]:
    return stats.binom.ppf((1 - level) / 2, n, p) / n, stats.binom.isf((1 - level) / 2, n, p) / n


def replicate_interval(r: int, sigma_given: float | None) -> tuple[float, float, np.ndarray]:
    spec = spec_of({"inputs": {"x": ""}, "outputs": {"y": {"expr": "b*x"}}},
                   {"b": {"guess": 1.0, "bounds": [-50.0, 50.0]}})
    rng = np.random.default_rng(5000 + r)
    y = B * X + rng.normal(0, SIGMA, X.size)
    prob = problem_of(spec, np.arange(X.size, dtype=float), {"x": X}, {"y": y})
    res = fitted(prob, {"y": sigma_given} if sigma_given else {})
    post = run_posterior(prob, res, noise("y", sigma_given), SETTINGS, seed=r)
    assert post.converged, post.reason
    lo, hi = post.to_parameters_dict()["b"]["posterior"]["ci95"]
    return lo, hi, y


def mean_within(ratio: np.ndarray, target: float) -> bool:
    return abs(ratio.mean() - target) < 4 * ratio.std(ddof=1) / np.sqrt(ratio.size)


@pytest.mark.slow
def test_credible_intervals_cover_at_the_nominal_rate():
    n_rep = 200
    covered, ratio = [], []
    for r in range(n_rep):
        lo, hi, _ = replicate_interval(r, SIGMA)
        covered.append(lo <= B <= hi)
        ratio.append((hi - lo) / (2 * stats.norm.ppf(0.975) * SIGMA / np.sqrt(X @ X)))
    lo_acc, hi_acc = acceptance(n_rep)
    rate = float(np.mean(covered))
    assert lo_acc <= rate <= hi_acc, (rate, lo_acc, hi_acc)
    assert mean_within(np.array(ratio), 1.0), (np.mean(ratio), np.std(ratio))


def test_sampled_sigma_gives_the_t_interval():
    ratio = []
    for r in range(20):
        lo, hi, y = replicate_interval(r, None)
        b_hat = float(X @ y / (X @ X))
        s = np.sqrt(np.sum((y - b_hat * X) ** 2) / (X.size - 1))
        ratio.append((hi - lo) / (2 * stats.t.ppf(0.975, X.size - 1) * s / np.sqrt(X @ X)))
    ratio = np.array(ratio)
    assert mean_within(ratio, 1.0), (ratio.mean(), ratio.std())
    assert not mean_within(ratio, stats.norm.ppf(0.975) / stats.t.ppf(0.975, X.size - 1))

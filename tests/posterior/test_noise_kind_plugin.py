"""A noise kind added the way a new one is added (one class, one registry entry) works
through the whole posterior layer with no other change: layout, sampled parameters with
their own prior and start, likelihood, sampler, results dictionaries and prediction bands.

The kind here, generalised-normal (exponential-power) errors with density
beta / (2 sigma Gamma(1/beta)) exp(-|e / sigma|^beta) and a sampled shape beta, is checked
against scipy.stats.gennorm (reference library); beta = 1 is the Laplace distribution and
beta = 2 a Gaussian of sd sigma / sqrt(2) (scipy.stats.gennorm documentation)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats
from scipy.special import gammaln

from graybox.posterior import SamplerSettings, predictive_bands, run_posterior
from graybox.posterior.noise import noise_layout
from graybox.posterior.noise_kinds import REGISTRY
from graybox.posterior.noise_kinds.base import NoiseParam, independent_pairs
from tests.posterior.helpers import LINEAR_MODEL, fitted, noise, problem_of, spec_of

BETA_BOUNDS = (0.5, 8.0)


class GenNormal:
    """``kind = "gennorm"``: independent generalised-normal errors of scale sigma and shape
    beta, beta sampled (ln beta flat on [ln 0.5, ln 8])."""

    name, options, sums_suffice = "gennorm", (), False

    def given(self, t):
        return {}

    def given_values(self, m):
        return {}

    def sampled(self, m):
        return [NoiseParam(f"beta[{m.output}]", m.output, "beta", True, math.log(BETA_BOUNDS[0]),
                           math.log(BETA_BOUNDS[1]), "ln beta flat on [ln 0.5, ln 8]")]

    def start(self, m, plan, p, residuals):
        return math.log(2.0), 0.1

    def plan(self, problem, output):
        return None

    def loglik(self, m, plan, e, R, v):
        s = np.asarray(v["sigma"], float).reshape(-1, 1)
        b = np.asarray(v["beta"], float).reshape(-1, 1)
        const = np.log(b) - np.log(2 * s) - gammaln(1 / b)
        return R.shape[1] * const[:, 0] - np.sum(np.abs(R / s) ** b, axis=1)

    def whitened(self, m, plan, e, r, v):
        return r, independent_pairs(r)

    def simulate(self, m, plan, e, v, rng, n):
        s = np.asarray(v["sigma"], float).reshape(-1, 1)
        b = np.asarray(v["beta"], float).reshape(-1, 1)
        return s * stats.gennorm.rvs(np.broadcast_to(b, (s.shape[0], n)), random_state=rng)

    def draw(self, sigma, rng, n, phi_j=None, nu=None):
        raise NotImplementedError

    def checks(self, m, r, w, pair, v):
        return []

    def describe(self, m, sig):
        return f"independent generalised-normal errors, {sig}, beta sampled"

    def entries(self, m, plan):
        return {}


@pytest.fixture
def registered(monkeypatch):
    monkeypatch.setitem(REGISTRY, GenNormal.name, GenNormal())


def laplace_line(n=400, seed=11):
    rng = np.random.default_rng(seed)
    x = np.linspace(0.0, 1.0, n)
    y = 1.0 + 2.0 * x + rng.laplace(0.0, 0.3, n)
    spec = spec_of(LINEAR_MODEL, {"a": {"guess": 0.0, "bounds": [-10.0, 10.0]},
                                  "b": {"guess": 1.0, "bounds": [-10.0, 10.0]}})
    return problem_of(spec, np.arange(n, dtype=float), {"x": x}, {"y": y})


def test_plugged_in_kind_has_scipys_likelihood(registered):
    prob = laplace_line()
    lay = noise_layout(noise("y", None, "gennorm"), prob)
    assert [p.name for p in lay.params] == ["sigma[y]", "beta[y]"]
    rng = np.random.default_rng(2)
    R = rng.laplace(0.0, 0.5, (3, 400))
    sig, beta = np.array([0.3, 0.5, 1.2]), np.array([0.8, 1.0, 2.0])
    N = np.column_stack([np.log(sig), np.log(beta)])
    ref = [stats.gennorm.logpdf(R[k], beta[k], scale=sig[k]).sum() for k in range(3)]
    assert lay.loglik("y", 0, R, N) == pytest.approx(ref, rel=1e-12)
    assert np.isneginf(lay.log_prior(np.array([[0.0, math.log(9.0)]]))[0])


def test_plugged_in_kind_runs_through_the_sampler(registered):
    """Laplace errors (beta = 1): the sampled shape's 95% interval contains 1 and excludes the
    Gaussian's 2; the results dictionaries and the prediction bands come out."""
    prob = laplace_line()
    post = run_posterior(prob, fitted(prob, {}), noise("y", None, "gennorm"),
                         SamplerSettings(walkers=16, check_every=200, progress=False), seed=4)
    assert post.converged
    lo, hi = post.stats["beta[y]"]["ci95"]
    assert lo < 1.0 < hi < 2.0
    entry = post.to_noise_dict()["y"]
    assert entry["kind"] == "gennorm" and set(entry["posterior"]) == {"sigma", "beta"}
    bands = predictive_bands(prob, post, 50, np.random.default_rng(1))[0]["y"]
    assert np.all(bands.lo_pred <= bands.lo_cred) and np.all(bands.hi_pred >= bands.hi_cred)

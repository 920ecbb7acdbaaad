"""Noise-model log-likelihoods against scipy's densities.

References: scipy.stats.multivariate_normal with the Ornstein-Uhlenbeck covariance
sigma^2 exp(-|t_i - t_k| / tau_e) (the continuous-time AR(1) process, whose sampled values at
any times form an exact Markov chain with phi_j = exp(-dt_j / tau_e); e.g. Brockwell & Davis,
*Time Series: Theory and Methods*), block-diagonal across segments and long gaps;
scipy.stats.t and scipy.stats.norm for the independent models.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from graybox.posterior.noise import (
    GAP_FACTOR,
    loglik_ar1,
    loglik_gaussian,
    loglik_student,
    noise_layout,
    simulate_errors,
)
from tests.posterior.helpers import LINEAR_MODEL, noise, problem_of, problem_of_record, segmented_record, spec_of

SPEC = spec_of(LINEAR_MODEL, {"a": {"guess": 1.0, "bounds": [-5, 5]}, "b": {"guess": 1.0, "bounds": [-5, 5]}})


def uneven_times(rng, n=60):
    return np.cumsum(rng.uniform(0.5, 3.0, n))


def ou_cov(t: np.ndarray, sigma: float, tau_e: float, blocks: np.ndarray) -> np.ndarray:
    c = sigma**2 * np.exp(-np.abs(t[:, None] - t[None, :]) / tau_e)
    return np.where(blocks[:, None] == blocks[None, :], c, 0.0)


def test_ar1_with_time_constant_equals_ou_multivariate_normal():
    rng = np.random.default_rng(1)
    t = uneven_times(rng)
    x = np.sin(t / 10)
    prob = problem_of(SPEC, t, {"x": x}, {"y": 1 + x})
    lay = noise_layout(noise("y", 0.3, "ar1", error_time_constant=4.0), prob)
    R = rng.normal(0, 0.3, (3, t.size))
    got = lay.loglik("y", 0, R, np.zeros((3, 0)))
    cov = ou_cov(t, 0.3, 4.0, np.zeros(t.size))
    ref = [stats.multivariate_normal(np.zeros(t.size), cov).logpdf(r) for r in R]
    assert got == pytest.approx(ref, rel=1e-10)


def test_ar1_with_sampled_phi_uses_the_median_spacing():
    """phi_j = phi ** (dt_j / dt_ref) is the OU process with tau_e = -dt_ref / ln(phi)."""
    rng = np.random.default_rng(2)
    t = uneven_times(rng)
    x = np.cos(t / 7)
    prob = problem_of(SPEC, t, {"x": x}, {"y": x})
    lay = noise_layout(noise("y", None, "ar1"), prob)
    dt_ref = float(np.median(np.diff(t)))
    assert lay.spacing["y"].dt_ref == pytest.approx(dt_ref)
    phis = np.array([0.3, 0.8, 0.95])
    sig = np.array([0.5, 1.0, 2.0])
    N = np.column_stack([np.log(sig), phis])  # sampled: ln sigma, phi
    R = rng.normal(0, 1.0, (3, t.size))
    got = lay.loglik("y", 0, R, N)
    for k in range(3):
        cov = ou_cov(t, sig[k], -dt_ref / np.log(phis[k]), np.zeros(t.size))
        assert got[k] == pytest.approx(stats.multivariate_normal(np.zeros(t.size), cov).logpdf(R[k]), rel=1e-10)


def test_ar1_restarts_at_segments_and_long_gaps():
    """Two segments, and inside the second a gap longer than GAP_FACTOR median spacings:
    three independent blocks."""
    t = np.concatenate([np.arange(0, 30, 1.0), np.arange(40, 60, 1.0), np.arange(60 + GAP_FACTOR + 5, 100, 1.0)])
    x = np.sin(t / 9)
    rec = segmented_record(t, {"x": x}, {"y": x}, cuts=[35.0])
    prob = problem_of_record(SPEC, rec)
    lay = noise_layout(noise("y", 0.7, "ar1", phi=0.85), prob)
    assert lay.spacing["y"].n_restarts == 3
    blocks = np.zeros(t.size)
    blocks[t >= 35] = 1
    blocks[t >= 60 + GAP_FACTOR] = 2
    rng = np.random.default_rng(3)
    R = rng.normal(0, 0.7, (2, t.size))
    got = lay.loglik("y", 0, R, np.zeros((2, 0)))
    cov = ou_cov(t, 0.7, -1.0 / np.log(0.85), blocks)
    ref = [stats.multivariate_normal(np.zeros(t.size), cov).logpdf(r) for r in R]
    assert got == pytest.approx(ref, rel=1e-10)


def test_ar1_with_phi_zero_is_independent_gaussian():
    rng = np.random.default_rng(4)
    R = rng.normal(0, 2.0, (2, 40))
    assert loglik_ar1(R, np.array([2.0, 2.0]), np.zeros((1, 40))) == pytest.approx(
        loglik_gaussian(R, np.array([2.0, 2.0])), rel=1e-12)


def test_independent_models_match_scipy():
    rng = np.random.default_rng(5)
    R = rng.standard_t(3, (4, 50)) * 0.4
    sig = np.array([0.2, 0.4, 0.8, 1.6])
    nu = np.array([1.5, 3.0, 10.0, 200.0])
    assert loglik_student(R, sig, nu) == pytest.approx(
        [stats.t.logpdf(R[k], nu[k], scale=sig[k]).sum() for k in range(4)], rel=1e-12)
    assert loglik_gaussian(R, sig) == pytest.approx(
        [stats.norm.logpdf(R[k], scale=sig[k]).sum() for k in range(4)], rel=1e-12)


def test_student_t_layout_samples_log_nu_with_its_prior():
    """nu ~ Gamma(2, rate 0.1) sampled as ln nu: density of ln nu = gamma pdf(nu) * nu.
    Reference: scipy.stats.gamma."""
    rng = np.random.default_rng(6)
    t = np.arange(30.0)
    prob = problem_of(SPEC, t, {"x": t / 30}, {"y": t / 30})
    lay = noise_layout(noise("y", None, "student_t"), prob)
    z = np.log(np.array([1.5, 4.0, 20.0, 300.0]))
    N = np.column_stack([np.zeros(4), z])
    diff = lay.log_prior(N) - (stats.gamma(2.0, scale=10.0).logpdf(np.exp(z)) + z)
    assert np.ptp(diff) < 1e-10
    assert np.isneginf(lay.log_prior(np.array([[0.0, np.log(0.5)]]))[0])
    R = rng.normal(size=(4, 30))
    assert lay.loglik("y", 0, R, N) == pytest.approx(
        [stats.t.logpdf(R[k], np.exp(z[k]), scale=1.0).sum() for k in range(4)], rel=1e-12)


def test_simulated_ar1_errors_have_the_stated_correlation_and_variance():
    """Draws for the prediction band: lag-one correlation phi, marginal sd sigma (sample
    estimates within 5 of their large-sample standard errors; Bartlett's formula for r1)."""
    rng = np.random.default_rng(7)
    n, phi = 20000, 0.9
    e = simulate_errors("ar1", np.array([0.5]), rng, n, phi_j=np.full((1, n), phi))[0]
    r1 = np.corrcoef(e[:-1], e[1:])[0, 1]
    assert abs(r1 - phi) < 5 * np.sqrt((1 - phi**2) / n)
    # variance of the sample variance of an AR(1): 2 sigma^4 (1 + phi^2) / ((1 - phi^2) n)
    se_var = np.sqrt(2 * 0.5**4 * (1 + phi**2) / ((1 - phi**2) * n))
    assert abs(np.var(e) - 0.25) < 5 * se_var

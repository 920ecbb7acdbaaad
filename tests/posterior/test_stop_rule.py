"""The sampler's stop rule and the Monte Carlo errors it reports, against analytic results.

References, per test:

* Stationary AR(1) series x_t = phi x_(t-1) + e_t with unit marginal variance: integrated
  autocorrelation time tau = (1 + phi) / (1 - phi) (e.g. Sokal, "Monte Carlo methods in
  statistical mechanics", 1997); lag-k correlation phi^k, so the indicator I(x <= q) has
  lag-k covariance Phi2(q, q; phi^k) - p^2 (the bivariate normal CDF, scipy.stats), which
  gives the asymptotic variance of a sample quantile, p (1 - p) tau_I / (N f(q)^2) with
  tau_I = 1 + 2 sum_k corr_k (the delta method on the empirical CDF; for iid draws
  p (1 - p) / (N f(q)^2), any text on order statistics).
* Sokal's variance of a windowed tau estimate, 2 (2M + 1) tau^2 / N (from memory, see
  graybox/posterior/diagnostics.py) and Vats & Knudson's R-hat ~ sqrt(1 + m / ESS) (from
  memory): checked here on replicated AR(1) chains.
* Linear regression with known sigma and a flat prior: the posterior is exactly
  N(beta_hat, sigma^2 (X^T X)^-1) (Gelman et al., Bayesian Data Analysis, 3rd ed.,
  section 14.2), so its 2.5% and 97.5% quantiles are beta_hat -+ 1.959964 sd.

Tolerances are three standard errors of the replicate statistic compared (the standard
error of a standard deviation estimated from R replicates is about 1 / sqrt(2 (R - 1)) of
it), or a few Monte Carlo standard errors where a chain is compared with an exact answer.
"""

from __future__ import annotations

import json
import math

import emcee
import numpy as np
import pytest
from scipy import signal, stats

from graybox.posterior import SamplerSettings, run_posterior
from graybox.posterior.diagnostics import (
    AUTOCORR_C,
    autocorr_change_sd,
    autocorr_creep,
    autocorr_time,
    autocorr_time_sd,
    ess_bulk,
    quantile_mcse,
    rhat_grouped,
    rhat_rank,
)
from graybox.posterior.convergence import STABILITY_PART, check_convergence
from tests.posterior.helpers import LINEAR_MODEL, fitted, noise, problem_of, spec_of

Z975 = stats.norm.ppf(0.975)


def ar1_walkers(rng: np.random.Generator, phi: float, n_walkers: int, n_steps: int) -> np.ndarray:
    """(n_walkers, n_steps) stationary AR(1) series with unit marginal variance."""
    e = rng.standard_normal((n_walkers, n_steps)) * math.sqrt(1.0 - phi**2)
    zi = (phi * rng.standard_normal(n_walkers))[:, None]  # x_(-1) ~ N(0, 1)
    return signal.lfilter([1.0], [1.0, -phi], e, axis=1, zi=zi)[0]


def as_chain(x: np.ndarray) -> np.ndarray:
    """(walkers, steps) -> emcee's layout (steps, walkers, 1)."""
    return x.T[:, :, None]


def sd_se(n_replicates: int) -> float:
    """Relative standard error of a standard deviation estimated from n replicates."""
    return 1.0 / math.sqrt(2.0 * (n_replicates - 1))


# ---------------------------------------------------------------------------------------------
# (a) the noise of the autocorrelation-time estimate


def test_sokal_formula_for_the_plain_windowed_estimate():
    """Sokal's 2 (2M + 1) tau^2 / N, the leading large-window term of the variance of a
    windowed sum of autocovariances (here with the mean and variance known), against 300
    replicates of 32 AR(1) walkers (phi = 0.8, tau = 9, window M = 5 tau = 45, 1,000
    steps).  The terms it neglects (the window's edges) are of relative order tau / M and
    lower the spread by a few percent, within the three standard errors allowed."""
    rng = np.random.default_rng(31)
    phi, walkers, n, reps = 0.8, 32, 1000, 300
    tau = (1 + phi) / (1 - phi)
    window = int(AUTOCORR_C * tau)
    est = []
    for _ in range(reps):
        x = ar1_walkers(rng, phi, walkers, n)
        f = np.fft.rfft(x, 2 * n, axis=1)
        acov = np.fft.irfft(f * np.conj(f), axis=1)[:, : window + 1] / n  # known mean 0, variance 1
        est.append(2.0 * float(np.mean(acov, axis=0).sum()) - 1.0)
    spread = np.std(est, ddof=1) / tau
    formula = math.sqrt(2.0 * (2 * window + 1) / (walkers * n))
    assert abs(spread / formula - 1.0) < 3 * sd_se(reps), (spread, formula)


@pytest.mark.parametrize("phi, n_steps", [(0.5, 600), (0.8, 1000)])
def test_tau_noise_formula_bounds_emcees_estimator(phi, n_steps):
    """For emcee's estimator as the stop rule uses it (ratio to lag 0, walker means removed,
    automatic window) the formula must not understate the replicate spread (an honest chain
    would then fail the 2-sd bound more often than 1 in 20) and must not overstate it by
    more than 2x (the bound would then only catch changes beyond 4 real standard
    deviations).  The same for the difference between the estimates on the whole chain
    and on its first three quarters, the quantity the rule bounds; and that difference's
    mean is the creep the estimator's bias predicts (within three standard errors of the
    replicates' mean).  200 replicates of 32 AR(1) walkers at 111-200 tau."""
    rng = np.random.default_rng(32)
    walkers, reps = 32, 200
    tau = (1 + phi) / (1 - phi)
    n_part = int(STABILITY_PART * n_steps)
    whole, part = [], []
    for _ in range(reps):
        chain = as_chain(ar1_walkers(rng, phi, walkers, n_steps))
        whole.append(autocorr_time(chain)[0])
        part.append(autocorr_time(chain[:n_part])[0])
    whole, part = np.array(whole), np.array(part)
    limit = 1.0 + 3 * sd_se(reps)
    ratio = np.std(whole, ddof=1) / tau / float(autocorr_time_sd(tau, n_steps, walkers))
    assert 0.5 < ratio < limit, ratio
    change = (whole - part) / whole
    ratio_change = np.std(change, ddof=1) / float(autocorr_change_sd(np.array(tau), n_part, n_steps, walkers))
    assert 0.5 < ratio_change < limit, ratio_change
    creep = float(autocorr_creep(np.array(tau), n_part, n_steps))
    assert abs(np.mean(change) - creep) < 3 * np.std(change, ddof=1) / math.sqrt(reps), (np.mean(change), creep)


# ---------------------------------------------------------------------------------------------
# (b) Monte Carlo standard errors of quantiles


def quantile_sd_analytic(phi: float, p: float, n_draws: int) -> float:
    """Asymptotic sd of the p quantile of n_draws stationary AR(1) draws (module docstring)."""
    z = stats.norm.ppf(p)
    acf_sum, k = 0.0, 1
    while phi**k > 1e-12:
        r = phi**k
        acf_sum += float(stats.multivariate_normal([0.0, 0.0], [[1.0, r], [r, 1.0]]).cdf([z, z])) - p * p
        k += 1
    tau_i = 1.0 + 2.0 * acf_sum / (p * (1.0 - p))
    return math.sqrt(p * (1.0 - p) * tau_i / n_draws) / stats.norm.pdf(z)


@pytest.mark.parametrize("phi, n_steps", [(0.0, 400), (0.7, 1000)])
def test_quantile_mcse_against_analytic_and_replicate_spread(phi, n_steps):
    """Quantile MCSE (Vehtari et al. 2021, section 4.4) of the 2.5%, 50% and 97.5% quantiles
    of 16 AR(1) walkers, over 300 replicates: the replicates' spread matches the analytic
    asymptotic sd within three standard errors, and the root-mean-square MCSE matches it
    within 5% (its own replicate noise is about 0.5%; the rest allows for the finite-sample
    error of the indicator's ESS)."""
    rng = np.random.default_rng(33)
    walkers, reps = 16, 300
    samples = [ar1_walkers(rng, phi, walkers, n_steps) for _ in range(reps)]
    for p in (0.025, 0.5, 0.975):
        exact = quantile_sd_analytic(phi, p, walkers * n_steps)
        q = np.array([np.quantile(x, p) for x in samples])
        mcse = np.array([quantile_mcse(x, p) for x in samples])
        assert abs(np.std(q, ddof=1) / exact - 1.0) < 3 * sd_se(reps), (p, np.std(q, ddof=1), exact)
        assert abs(math.sqrt(np.mean(mcse**2)) / exact - 1.0) < 0.05, (p, math.sqrt(np.mean(mcse**2)), exact)


# ---------------------------------------------------------------------------------------------
# R-hat across walker groups


def test_rhat_follows_sqrt_one_plus_chains_over_ess():
    """R-hat ~ sqrt((n - 1) / n + m / ESS) for m well-mixed chains of n draws (Vats &
    Knudson 2021): across 32 walkers (m = 64 split halves) R-hat stays above 1.0075 even at
    ESS ~3,500, across four walker groups (m = 8) it is about eight times closer to 1.  30
    replicates of 32 AR(1) walkers (phi = 0.8) x 1,000 steps; the relation is asymptotic and
    the reported R-hat is the larger of the bulk and folded versions, so the mean excess
    over 1 must match the prediction within 25%."""
    rng = np.random.default_rng(34)
    walkers, n, reps = 32, 1000, 30
    per_walker, grouped, pred_walker, pred_grouped = [], [], [], []
    for _ in range(reps):
        x = ar1_walkers(rng, 0.8, walkers, n)
        ess = ess_bulk(x)
        per_walker.append(rhat_rank(x) - 1.0)
        grouped.append(rhat_grouped(x) - 1.0)
        half = n // 2
        pred_walker.append(math.sqrt((half - 1) / half + 2 * walkers / ess) - 1.0)
        pooled = half * walkers // 4
        pred_grouped.append(math.sqrt((pooled - 1) / pooled + 8 / ess) - 1.0)
    for got, want in ((per_walker, pred_walker), (grouped, pred_grouped)):
        assert abs(np.mean(got) / np.mean(want) - 1.0) < 0.25, (np.mean(got), np.mean(want))
    assert np.mean(per_walker) > 1.0075 - 1.0
    assert np.mean(grouped) < np.mean(per_walker) / 5


def test_grouped_rhat_flags_a_displaced_group_and_a_shared_trend():
    """Vehtari et al. (2021) section 4: R-hat must flag chains in another region and a drift
    that every chain shares (splitting).  Here: the walkers of one group (every fourth)
    shifted by half a standard deviation; and a common trend of one standard deviation."""
    rng = np.random.default_rng(35)
    x = ar1_walkers(rng, 0.5, 32, 2000)
    assert rhat_grouped(x) < 1.01
    shifted = x.copy()
    shifted[1::4] += 0.5
    assert rhat_grouped(shifted) > 1.01
    trend = x + np.linspace(0.0, 1.0, x.shape[1])[None, :]
    assert rhat_grouped(trend) > 1.01


# ---------------------------------------------------------------------------------------------
# (c) a well-mixed run stops early with the right interval


def test_rule_stops_a_gaussian_posterior_early_with_the_exact_interval():
    """y = a + b x with sigma known and uniform priors 500 posterior sd wide: the posterior is
    N(beta_hat, sigma^2 (X^T X)^-1).  The run (default 32 walkers, checks every 100 steps)
    must stop within 600 steps, and its medians and interval ends must lie within four of
    their reported Monte Carlo standard errors of the exact quantiles."""
    rng = np.random.default_rng(36)
    n, sigma = 400, 0.2
    x = np.linspace(0.0, 1.0, n)
    y = 1.0 + 2.0 * x + rng.normal(0.0, sigma, n)
    params = {"a": {"guess": 0.0, "bounds": [-10.0, 10.0]}, "b": {"guess": 1.0, "bounds": [-10.0, 10.0]}}
    prob = problem_of(spec_of(LINEAR_MODEL, params), np.arange(n, dtype=float), {"x": x}, {"y": y})
    res = fitted(prob, {"y": sigma})
    post = run_posterior(prob, res, noise("y", sigma), SamplerSettings(check_every=100, progress=False), seed=5)
    assert post.converged, post.reason
    assert post.n_steps <= 600, post.n_steps
    X = np.column_stack([np.ones(n), x])
    beta = np.linalg.lstsq(X, y, rcond=None)[0]
    sd = sigma * np.sqrt(np.diag(np.linalg.inv(X.T @ X)))
    for j, name in enumerate(("a", "b")):
        s = post.stats[name]
        assert abs(s["median"] - beta[j]) < 4 * s["mcse_median"], (name, s["median"], beta[j], s["mcse_median"])
        for k, sign in enumerate((-1.0, 1.0)):
            exact = beta[j] + sign * Z975 * sd[j]
            assert abs(s["ci95"][k] - exact) < 4 * s["mcse_ci95"][k], (name, k, s["ci95"][k], exact)
        # the reported errors are no larger than an ESS of 400 allows: sqrt(p (1 - p) / 400) /
        # phi(z_p) posterior sd, 0.134 sd at an interval end and 0.063 sd at the median
        for k, p in enumerate((0.025, 0.975)):
            assert s["mcse_ci95"][k] < math.sqrt(p * (1 - p) / 400) / stats.norm.pdf(Z975) * sd[j]
        assert s["mcse_median"] < math.sqrt(0.25 / 400) / stats.norm.pdf(0.0) * sd[j]
    text = post.summary()
    line = next(li for li in text.splitlines() if li.strip().startswith("a "))
    assert f"{post.stats['a']['mcse_median']:.2g}" in line and f"{post.stats['a']['mcse_ci95'][1]:.2g}" in line
    assert "MCSE" in text


# ---------------------------------------------------------------------------------------------
# (d) chains that are not done


def test_a_run_still_arriving_is_not_converged():
    """emcee's differential-evolution ensemble started in a tiny ball 30 sd from the mode of a
    standard 2-D Gaussian, checked after 100 steps: not converged, and R-hat (not only the
    chain length) says so."""
    rng = np.random.default_rng(37)
    walkers = 32
    start = 30.0 + 1e-3 * rng.standard_normal((walkers, 2))
    sampler = emcee.EnsembleSampler(walkers, 2, lambda z: -0.5 * np.sum(z**2, axis=1), vectorize=True,
                                    moves=emcee.moves.DEMove())
    sampler.random_state = np.random.RandomState(38).get_state()
    sampler.run_mcmc(start, 100, progress=False)
    check = check_convergence(sampler.get_chain(), None, SamplerSettings(progress=False), always_diagnose=True)
    assert not check.converged
    assert not check.rhat_ok


def test_a_drifting_chain_is_not_converged_a_stationary_one_is():
    """32 AR(1) walkers (phi = 0.5, tau = 3) x 2,000 steps pass every criterion; the same
    walkers with a common drift of one marginal sd over the run are long enough and have
    ESS far above 400, but are not converged."""
    rng = np.random.default_rng(39)
    x = ar1_walkers(rng, 0.5, 32, 2000)
    st = SamplerSettings(progress=False)
    still = check_convergence(as_chain(x), None, st)
    assert still.converged, still.failed(st)
    drift = x + np.linspace(0.0, 1.0, x.shape[1])[None, :]
    moving = check_convergence(as_chain(drift), None, st, always_diagnose=True)
    assert moving.long_enough and np.all(moving.ess_min >= st.min_ess)
    assert not moving.converged


def test_a_walker_that_has_not_moved_is_reported_not_a_crash():
    """A walker stuck at its start (its autocorrelation cannot be estimated): not converged,
    the reason says why, and the check's record holds no NaN (results.json is strict JSON)."""
    rng = np.random.default_rng(41)
    x = ar1_walkers(rng, 0.5, 16, 300)
    x[3] = 0.5  # exactly representable: the walker's deviations from its mean are exactly 0
    st = SamplerSettings(progress=False)
    check = check_convergence(as_chain(x), None, st, always_diagnose=True)
    assert not check.converged
    assert any("has not moved" in f for f in check.failed(st))
    assert "NaN" not in json.dumps(check.to_dict())


# ---------------------------------------------------------------------------------------------
# threads


def test_thread_count_does_not_change_the_samples():
    """The half-ensemble's rows shared over two threads give the very samples of one thread
    (every row is simulated alone): a first-order model on the compiled core."""
    spec = spec_of({"states": {"y": {"units": "", "rate": "(K*u - y)/tau", "initial": "estimate"}},
                    "inputs": {"u": ""}},
                   {"K": {"guess": 1.5, "bounds": [0.1, 10.0]},
                    "tau": {"guess": 4.0, "units": "s", "bounds": [0.5, 50.0]}})
    rng = np.random.default_rng(40)
    t = np.arange(200, dtype=float)
    u = np.where((t // 40) % 2 == 0, 1.0, 2.0)
    yv, ys = 0.5, []
    for i in range(t.size):
        ys.append(yv)
        yv = 2.0 * u[i] + (yv - 2.0 * u[i]) * math.exp(-1.0 / 5.0)
    prob = problem_of(spec, t, {"u": u}, {"y": np.array(ys) + rng.normal(0.0, 0.05, t.size)}, engine="compiled")
    assert prob.engine.name == "compiled"
    res = fitted(prob, {})
    st = SamplerSettings(walkers=16, max_steps=60, check_every=60, progress=False)
    one = run_posterior(prob, res, noise("y"), st, seed=3, _threads=1)
    two = run_posterior(prob, res, noise("y"), st, seed=3, _threads=2)
    assert np.array_equal(one.chain, two.chain) and np.array_equal(one.log_prob, two.log_prob)
    assert one.n_evaluations == two.n_evaluations

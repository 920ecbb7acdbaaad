"""Convergence diagnostics of an ensemble chain.

* Integrated autocorrelation time per sampled quantity: emcee's estimator
  (``emcee.autocorr.integrated_time``: the walker-averaged autocorrelation function with
  Sokal's automatic window, c = 5; Foreman-Mackey et al., PASP 125 (2013) 306, and the emcee
  documentation's "Autocorrelation analysis" tutorial).
* Rank-normalised split R-hat (bulk and folded, the larger reported) and bulk and tail
  effective sample sizes: Vehtari, Gelman, Simpson, Carpenter & Buerkner (2021),
  "Rank-normalization, folding, and localization: An improved R-hat for assessing
  convergence of MCMC", Bayesian Analysis 16(2), 667-718, sections 4.1-4.3 and appendix A;
  the autocorrelations are combined over chains as in their equation (10) and truncated by
  Geyer's initial monotone sequence (Geyer, Statistical Science 7 (1992) 473-483).
* Monte Carlo standard error of a quantile: Vehtari et al. (2021) section 4.4: the ESS of
  the indicator I(x <= q_p) gives a Beta interval for the probability level, mapped back
  through the draws' quantiles.
* Noise of the autocorrelation-time estimate: for a window of M lags and N draws the
  plain windowed estimate (known mean) has variance about 2 (2M + 1) tau^2 / N (Sokal,
  "Monte Carlo methods in statistical mechanics: foundations and new algorithms", 1997,
  section 3, from memory; the large-sample formula for windowed spectral estimates at zero
  frequency).  With emcee's automatic window M is about c tau (c = 5), and the
  walker-averaged autocorrelation function counts as N = walkers x steps draws (the walkers
  treated as independent series: an approximation, the ensemble couples them).  emcee's
  estimator divides by the lag-0 value and removes each walker's mean, which lowers both its
  spread and its value: on stationary AR(1) walkers (tests/posterior/test_stop_rule.py) its
  spread across replicates is below the formula's, so a bound built on the formula errs
  towards passing an honest chain.
* Bias of that estimator: each walker's autocovariances, taken about its own mean, are
  low by about the variance of that mean, gamma(0) tau / n, at every lag; divided by the
  lag-0 value (low by the same) and summed over the 2M + 1 lags of the window this gives
  E[tau_hat] ~ tau (1 - (2M + 1 - tau) / n) (derived here from the standard bias of a
  sample autocovariance about an estimated mean, e.g. Priestley, Spectral Analysis and
  Time Series, 1981, section 5.3, from memory): about 18% low at n = 50 tau, so the
  estimate creeps up as a chain lengthens, by (2M + 1 - tau) (1/n_1 - 1/n_2) from n_1 to
  n_2 steps (checked against replicated AR(1) walkers in tests/posterior/test_stop_rule.py).
* R-hat across groups of walkers: for m chains R-hat is about sqrt(1 + m / ESS) (Vats &
  Knudson, "Revisiting the Gelman-Rubin diagnostic", Statistical Science 36 (2021) 518-529,
  from memory; checked in tests/posterior/test_stop_rule.py), so the bound 1.01 goes with
  the ESS of 400 that Vehtari et al. pair it with for their four chains (eight split
  halves), whereas across 32 walkers (64 split halves) it would demand an ESS near 3,200
  from a perfectly mixed ensemble.  The walkers are therefore pooled into four interleaved
  groups (each walker cut in halves first), as the superchains of the nested R-hat of
  Margossian et al. (2024) pool chains; rank normalisation, splitting and folding are
  unchanged.

Walkers of an affine-invariant ensemble are coupled (every move uses another walker's
position), so they are not the independent chains R-hat was designed for: R-hat across
walker groups is a heuristic check that no group of walkers sits in a different region and
that the two halves of the chain agree, not a proof of convergence.  The ESS treats each
walker as a chain.
"""

from __future__ import annotations

import math

import numpy as np
from emcee.autocorr import integrated_time
from scipy import stats

RHAT_NOTE = ("R-hat is computed across four groups of walkers; the walkers of an ensemble sampler are coupled, "
             "so it is a heuristic check, not the independent-chain diagnostic it was designed as")
RHAT_GROUPS = 4


def autocorr_time(chain: np.ndarray) -> np.ndarray:
    """Integrated autocorrelation time per quantity of ``chain`` (n_steps, n_walkers, n_dim)."""
    with np.errstate(invalid="ignore", divide="ignore"):  # NaN for a walker that has not moved
        return np.asarray(integrated_time(chain, c=5, tol=0, quiet=True), float)


AUTOCORR_C = 5.0  # Sokal's window constant, as passed to emcee


def autocorr_time_sd(tau: np.ndarray, n_steps: int, n_walkers: int) -> np.ndarray:
    """Relative standard deviation of the integrated autocorrelation time estimated from
    ``n_steps`` steps of ``n_walkers`` walkers: sqrt(2 (2M + 1) / (walkers x steps)) with the
    window M = c tau (module docstring)."""
    tau = np.asarray(tau, float)
    return np.sqrt(2.0 * (2.0 * AUTOCORR_C * tau + 1.0) / (n_walkers * max(n_steps, 1)))


def autocorr_change_sd(tau: np.ndarray, n_before: int, n_now: int, n_walkers: int) -> np.ndarray:
    """Relative standard deviation of the change of the tau estimate between a chain of
    ``n_before`` steps and its continuation to ``n_now`` steps.  The later estimate is
    (to first order) the step-weighted average of the earlier one and the new part's, so the
    change has variance var(before) - var(now), proportional to 1/n_before - 1/n_now."""
    tau = np.asarray(tau, float)
    if n_before <= 0 or n_now <= n_before:
        return np.full(tau.shape, np.inf)
    per_draw = 2.0 * (2.0 * AUTOCORR_C * tau + 1.0) / n_walkers
    return np.sqrt(per_draw * (1.0 / n_before - 1.0 / n_now))


def autocorr_creep(tau: np.ndarray, n_before: int, n_now: int) -> np.ndarray:
    """Expected relative rise of emcee's tau estimate from ``n_before`` to ``n_now`` steps of
    a stationary chain, (2M + 1 - tau) (1/n_before - 1/n_now) with M = c tau (the estimator's
    bias, module docstring)."""
    tau = np.asarray(tau, float)
    if n_before <= 0 or n_now <= n_before:
        return np.zeros(tau.shape)
    return ((2.0 * AUTOCORR_C - 1.0) * tau + 1.0) * (1.0 / n_before - 1.0 / n_now)


def split_chains(x: np.ndarray) -> np.ndarray:
    """(n_chains, n_draws) -> (2 n_chains, n_draws // 2): each chain cut into halves (the
    middle draw dropped when the count is odd), Vehtari et al. (2021) section 4.1."""
    n = x.shape[1] // 2
    return np.concatenate([x[:, :n], x[:, x.shape[1] - n:]], axis=0)


def rank_normalise(x: np.ndarray) -> np.ndarray:
    """z = Phi^-1((r - 3/8) / (S - 1/4)) with r the pooled ranks (ties averaged), eq. (14)."""
    r = stats.rankdata(x, method="average").reshape(x.shape)
    return stats.norm.ppf((r - 0.375) / (x.size + 0.25))


def rhat_basic(x: np.ndarray) -> float:
    """Classic R-hat of chains x (n_chains, n_draws): sqrt(var_plus / W), eqs. (1)-(4)."""
    n = x.shape[1]
    if n < 2:
        return math.nan
    w = float(np.mean(np.var(x, axis=1, ddof=1)))
    b_over_n = float(np.var(np.mean(x, axis=1), ddof=1))
    if w <= 0:
        return math.nan if b_over_n == 0 else math.inf
    var_plus = (n - 1) / n * w + b_over_n
    return math.sqrt(var_plus / w)


def rhat_rank(x: np.ndarray) -> float:
    """Rank-normalised split R-hat: max of the bulk and the folded versions (section 4.2)."""
    return _rhat_bulk_folded(split_chains(x))


def _rhat_bulk_folded(s: np.ndarray) -> float:
    bulk = rhat_basic(rank_normalise(s))
    folded = rhat_basic(rank_normalise(np.abs(s - np.median(s))))
    return float(max(bulk, folded))


def group_count(n_chains: int, groups: int = RHAT_GROUPS) -> int:
    """The number of walker groups: ``groups`` when it divides the walker count, else the
    largest divisor below it (an even ensemble always allows two)."""
    for g in range(min(groups, n_chains), 1, -1):
        if n_chains % g == 0:
            return g
    return 1


def rhat_grouped(x: np.ndarray, groups: int = RHAT_GROUPS) -> float:
    """Rank-normalised split R-hat of chains x (n_chains, n_draws) pooled into groups: each
    chain cut in halves, the first halves of group k's chains (k, k + g, k + 2g, ...) joined
    into one chain and their second halves into another, then the bulk and folded R-hat of
    :func:`rhat_rank` over these 2 g pooled chains (module docstring).  With one chain per
    group it is :func:`rhat_rank`."""
    m = x.shape[0]
    g = group_count(m, groups)
    s = split_chains(x)
    if g == m:
        return _rhat_bulk_folded(s)
    pooled = [s[half * m + np.arange(k, m, g)].ravel() for half in (0, 1) for k in range(g)]
    return _rhat_bulk_folded(np.array(pooled))


def _autocovariance(x: np.ndarray) -> np.ndarray:
    """Biased autocovariance of each row (divided by n), by FFT."""
    n = x.shape[1]
    xc = x - x.mean(axis=1, keepdims=True)
    size = 1 << (2 * n - 1).bit_length()
    f = np.fft.rfft(xc, n=size, axis=1)
    return np.fft.irfft(f * np.conjugate(f), n=size, axis=1)[:, :n] / n


def ess_basic(x: np.ndarray) -> float:
    """Effective sample size of chains x (n_chains, n_draws): the multi-chain autocorrelation
    of Vehtari et al. (2021) eq. (10), Geyer's initial positive and monotone sequences."""
    m, n = x.shape
    if n < 4:
        return math.nan
    acov = _autocovariance(x)
    mean_var = float(np.mean(acov[:, 0])) * n / (n - 1)
    var_plus = mean_var * (n - 1) / n
    if m > 1:
        var_plus += float(np.var(np.mean(x, axis=1), ddof=1))
    if var_plus <= 0:
        return math.nan
    rho = np.zeros(n)
    rho[0] = 1.0
    rho_even = 1.0
    rho_odd = 1.0 - (mean_var - float(np.mean(acov[:, 1]))) / var_plus
    rho[1] = rho_odd
    t = 1
    while t < n - 3 and rho_even + rho_odd > 0:
        rho_even = 1.0 - (mean_var - float(np.mean(acov[:, t + 1]))) / var_plus
        rho_odd = 1.0 - (mean_var - float(np.mean(acov[:, t + 2]))) / var_plus
        if rho_even + rho_odd >= 0:
            rho[t + 1] = rho_even
            rho[t + 2] = rho_odd
        t += 2
    max_t = t - 2
    if rho_even > 0:  # the last even-lag term still positive: kept in the tail term below
        rho[max_t + 1] = rho_even
    # initial monotone sequence: pair sums may not increase
    t = 1
    while t <= max_t - 2:
        if rho[t + 1] + rho[t + 2] > rho[t - 1] + rho[t]:
            rho[t + 1] = (rho[t - 1] + rho[t]) / 2
            rho[t + 2] = rho[t + 1]
        t += 2
    tau = -1.0 + 2.0 * float(np.sum(rho[: max_t + 1])) + float(rho[max_t + 1])
    tau = max(tau, 1.0 / math.log10(m * n))
    return m * n / tau


def ess_bulk(x: np.ndarray) -> float:
    """Bulk ESS: ESS of the rank-normalised split chains (section 4.3)."""
    return ess_basic(rank_normalise(split_chains(x)))


def ess_tail(x: np.ndarray) -> float:
    """Tail ESS: the smaller ESS of the 5% and 95% quantile indicators (section 4.3)."""
    s = split_chains(x)
    q05, q95 = np.quantile(s, [0.05, 0.95])
    return float(min(ess_basic((s <= q05).astype(float)), ess_basic((s <= q95).astype(float))))


def ess_quantile(x: np.ndarray, p: float) -> float:
    """ESS of the ``p`` quantile: ESS of the split chains' indicator I(x <= q_p), section 4.3."""
    s = split_chains(x)
    return ess_basic((s <= np.quantile(s, p)).astype(float))


def quantile_mcse(x: np.ndarray, p: float, ess: float | None = None) -> float:
    """Monte Carlo standard error of the ``p`` quantile of chains x (n_chains, n_draws),
    Vehtari et al. (2021) section 4.4: with S the ESS of the indicator, the probability
    levels a, b = Beta(S p + 1, S (1 - p) + 1) quantiles at Phi(-1), Phi(1) map through the
    draws' quantiles to a +-1 sd interval; the MCSE is half its width."""
    s = ess_quantile(x, p) if ess is None else ess
    if not (s > 0 and math.isfinite(s)):
        return math.nan
    a, b = stats.beta.ppf([stats.norm.cdf(-1.0), stats.norm.cdf(1.0)], s * p + 1.0, s * (1.0 - p) + 1.0)
    lo, hi = np.quantile(x, [a, b])
    return float((hi - lo) / 2.0)


def ess_mean(x: np.ndarray) -> float:
    """ESS for the posterior mean: ESS of the split chains themselves (no rank transform)."""
    return ess_basic(split_chains(x))


DIAGNOSTIC_KEYS = ("rhat", "ess", "ess_tail", "ess_mean", "ess_ci95")
CI95 = (0.025, 0.975)


def chain_diagnostics(chain: np.ndarray) -> dict[str, np.ndarray]:
    """Per quantity of ``chain`` (n_steps, n_walkers, n_dim): rhat (walker groups,
    :func:`rhat_grouped`), ess (bulk), ess_tail
    (5%/95%), ess_mean and ess_ci95 (the smaller ESS of the 2.5% and 97.5% quantiles, the
    reported interval's ends)."""
    n_dim = chain.shape[2]
    out = {k: np.full(n_dim, np.nan) for k in DIAGNOSTIC_KEYS}
    for d in range(n_dim):
        x = chain[:, :, d].T  # walkers as chains
        out["rhat"][d] = rhat_grouped(x)
        out["ess"][d] = ess_bulk(x)
        out["ess_tail"][d] = ess_tail(x)
        out["ess_mean"][d] = ess_mean(x)
        out["ess_ci95"][d] = min(ess_quantile(x, CI95[0]), ess_quantile(x, CI95[1]))
    return out

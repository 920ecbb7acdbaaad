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

Here each walker is treated as a chain.  Walkers of an affine-invariant ensemble are coupled
(every move uses another walker's position), so they are not the independent chains R-hat
was designed for: R-hat across walkers is a heuristic check that no walker sits in a
different region, not a proof of convergence.
"""

from __future__ import annotations

import math

import numpy as np
from emcee.autocorr import integrated_time
from scipy import stats

RHAT_NOTE = ("R-hat is computed across walkers; the walkers of an ensemble sampler are coupled, so it is a "
             "heuristic check, not the independent-chain diagnostic it was designed as")


def autocorr_time(chain: np.ndarray) -> np.ndarray:
    """Integrated autocorrelation time per quantity of ``chain`` (n_steps, n_walkers, n_dim)."""
    return np.asarray(integrated_time(chain, c=5, tol=0, quiet=True), float)


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
    s = split_chains(x)
    bulk = rhat_basic(rank_normalise(s))
    folded = rhat_basic(rank_normalise(np.abs(s - np.median(s))))
    return float(max(bulk, folded))


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


def ess_mean(x: np.ndarray) -> float:
    """ESS for the posterior mean: ESS of the split chains themselves (no rank transform)."""
    return ess_basic(split_chains(x))


def chain_diagnostics(chain: np.ndarray) -> dict[str, np.ndarray]:
    """Per quantity: rhat, ess (bulk), ess_tail, ess_mean of ``chain`` (n_steps, n_walkers, n_dim)."""
    n_dim = chain.shape[2]
    out = {k: np.full(n_dim, np.nan) for k in ("rhat", "ess", "ess_tail", "ess_mean")}
    for d in range(n_dim):
        x = chain[:, :, d].T  # walkers as chains
        out["rhat"][d] = rhat_rank(x)
        out["ess"][d] = ess_bulk(x)
        out["ess_tail"][d] = ess_tail(x)
        out["ess_mean"][d] = ess_mean(x)
    return out

"""The stop rule of the posterior sampler, its checks, and burn-in and thinning.

Checked every ``check_every`` steps; all must hold (:func:`check_convergence`): the chain
after burn-in is longer than ``tau_factor`` (50) times the largest integrated
autocorrelation time estimated on it, and that estimate differs from the one on the chain's
first three quarters (less the rise the estimator's bias alone gives) by less than its own
estimation noise allows (:func:`tau_bound`); rank-normalised split R-hat across four groups
of walkers below ``rhat_max`` (1.01; a heuristic here, the walkers being coupled); bulk ESS,
tail ESS and the ESS of the 95% interval's ends at least ``min_ess`` (400) for every
quantity (Vehtari et al. 2021), so that the median and the interval ends are known to the
Monte Carlo standard errors reported with them.  Burn-in is 2 tau_max and thinning
tau_min / 2 (the emcee documentation's rule).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from graybox.posterior.config import SamplerSettings
from graybox.posterior.diagnostics import (DIAGNOSTIC_KEYS, autocorr_change_sd, autocorr_creep, autocorr_time,
                                          chain_diagnostics)


@dataclass(frozen=True)
class Check:
    """One convergence check (per-quantity arrays in the order of the sampled names)."""

    steps: int
    tau: np.ndarray  # on the chain after burn-in
    tau_change: np.ndarray  # relative difference from the estimate on its first three quarters, less the creep
    tau_tol: np.ndarray  # the bound each change had to stay below
    burn_in: int
    rhat: np.ndarray
    ess: np.ndarray
    ess_tail: np.ndarray
    ess_mean: np.ndarray
    ess_ci95: np.ndarray
    long_enough: bool
    tau_stable: bool
    rhat_ok: bool
    ess_ok: bool

    @property
    def converged(self) -> bool:
        """Whether every criterion of the stop rule holds."""
        return self.long_enough and self.tau_stable and self.rhat_ok and self.ess_ok

    @property
    def ess_min(self) -> np.ndarray:
        """Per quantity, the smallest of the bulk, tail and interval-end ESS."""
        return np.minimum(np.minimum(self.ess, self.ess_tail), self.ess_ci95)

    def failed(self, st: SamplerSettings) -> list[str]:
        """The criteria not met, in words (for the "not converged" reason)."""
        out = []
        if not np.all(np.isfinite(self.tau)):
            out.append("the autocorrelation time could not be estimated (a walker has not moved)")
        elif not self.long_enough:
            out.append(f"chain of {self.steps - self.burn_in} steps after burn-in is not longer than "
                       f"{st.tau_factor:g} x tau_max ({st.tau_factor * float(np.max(self.tau)):.0f})")
        if not self.tau_stable:
            k = worst(self.tau_change / self.tau_tol)
            if math.isfinite(float(self.tau_change[k])):
                out.append(f"tau differs by {100 * float(self.tau_change[k]):.1f}% from its estimate on the first "
                           f"three quarters of the chain, beyond its bias's creep (bound "
                           f"{100 * float(self.tau_tol[k]):.1f}%, set by its estimation noise)")
            else:
                out.append("tau could not be estimated on the chain's first three quarters")
        if not self.rhat_ok:
            value = extreme(self.rhat, max)
            if not np.all(np.isfinite(self.rhat)):
                out.append("R-hat not computed for every quantity")
            else:
                out.append(f"R-hat {value:.4f} >= {st.rhat_max:g}")
        if not self.ess_ok:
            value = extreme(self.ess_min, min)
            if not np.all(np.isfinite(self.ess_min)):
                out.append("ESS not computed for every quantity")
            else:
                out.append(f"ESS {value:.0f} < {st.min_ess:g}")
        return out

    def to_dict(self) -> dict:
        """The check as recorded in results.json ``sampler.checks``."""
        k = worst(self.tau_change / self.tau_tol)
        return {"steps": self.steps, "burn_in": self.burn_in, "tau_max": finite_or_none(np.max(self.tau)),
                "tau_change": finite_or_none(self.tau_change[k]), "tau_bound": finite_or_none(self.tau_tol[k]),
                "rhat_max": extreme(self.rhat, max), "ess_min": extreme(self.ess_min, min),
                "converged": self.converged}


def worst(ratio: np.ndarray) -> int:
    """Index of the largest ratio (NaN counts as the largest)."""
    r = np.where(np.isnan(ratio), np.inf, ratio)
    return int(np.argmax(r))


def extreme(values: np.ndarray, pick) -> float | None:
    """max or min over the finite entries (None when there is none)."""
    finite = [float(v) for v in np.ravel(values) if np.isfinite(v)]
    return pick(finite) if finite else None


def finite_or_none(v) -> float | None:
    """``v`` as a float, None when not finite (JSON has no NaN)."""
    v = float(v)
    return v if math.isfinite(v) else None


def burn_and_thin(tau: np.ndarray, steps: int) -> tuple[int, int]:
    """Burn-in 2 tau_max (at most half the chain), thinning tau_min / 2 (at least 1).  A tau
    that could not be estimated (NaN: a walker that has not moved yet) gives the longest
    burn-in and no thinning."""
    finite = np.asarray(tau, float)[np.isfinite(tau)]
    if finite.size < np.size(tau):
        return steps // 2, 1
    burn = int(min(math.ceil(2.0 * float(np.max(finite))), steps // 2))
    thin = max(1, int(0.5 * float(np.min(finite))))
    return burn, thin


STABILITY_PART = 0.75  # tau is compared with its estimate on this leading share of the kept chain


def tau_bound(tau: np.ndarray, n_part: int, n_now: int, n_walkers: int, floor: float) -> np.ndarray:
    """The bound on the relative difference between tau estimated on ``n_now`` kept steps and
    on their first ``n_part``: max(floor, 2 sd), sd the standard deviation of that difference
    from the estimator's own noise (:func:`graybox.posterior.diagnostics.autocorr_change_sd`).

    A fixed tight bound (1%) asks more of tau than its estimate can give: with 32 walkers,
    tau = 8 and 400 kept steps, the difference from the first 300 steps' estimate has a
    standard deviation of about 6.5%, so a 1% bound holds only by chance and the chain runs on
    long after every reported number is settled.  Two standard deviations flag a drift
    beyond the estimator's noise (a chain still finding its way, whose tau keeps growing)
    while an honest estimate passes at least about 19 times in 20 (the formula overstates
    emcee's estimator's noise, see the diagnostics module); the floor (5% by default) keeps
    a long chain from being held for differences that cannot matter (a 5% error in tau
    moves the 50-tau length by 2.5 tau)."""
    return np.maximum(floor, 2.0 * autocorr_change_sd(tau, n_part, n_now, n_walkers))


def check_convergence(chain: np.ndarray, prev: Check | None, st: SamplerSettings,
                      always_diagnose: bool = False) -> Check:
    """The stop rule on ``chain`` (n_steps, n_walkers, n_dim), natural units.  ``prev`` (the
    previous check) is part of the signature of a criterion (``run_posterior`` passes it)
    but not used: stability is judged within the chain itself, so the first check can
    already stop.  Every reported quantity must be known to its stated precision:

    * burn-in 2 tau_max (tau on the whole chain, which the initial ball's spreading can only
      lengthen); tau then re-estimated on the kept chain (after burn-in);
    * the kept chain is longer than ``tau_factor`` (50) x tau_max;
    * tau is stable: for every quantity, its relative difference from the estimate on the
      kept chain's first three quarters, less the rise the estimator's bias alone gives
      (:func:`graybox.posterior.diagnostics.autocorr_creep`), is below :func:`tau_bound`
      (its estimation noise, floor ``tau_rtol``);
    * rank-normalised split R-hat across four walker groups below ``rhat_max`` (1.01;
      :func:`graybox.posterior.diagnostics.rhat_grouped`);
    * bulk ESS, tail ESS (5%/95%) and the ESS of the reported interval's ends (2.5%/97.5%)
      at least ``min_ess`` (400) for every quantity (Vehtari et al. 2021): the Monte Carlo
      error of the median is then about 1/16 and of each interval end about 1/7 of a
      posterior standard deviation (Gaussian case), and both are reported.

    R-hat and ESS (the costlier part) are computed only once the autocorrelation criteria
    hold, or when ``always_diagnose``; otherwise they are NaN and count as not met."""
    steps, n_walkers, n_dim = chain.shape
    burn, _ = burn_and_thin(autocorr_time(chain), steps)
    kept = chain[burn:]
    n_now = steps - burn
    n_part = int(STABILITY_PART * n_now)
    tau = autocorr_time(kept)
    with np.errstate(invalid="ignore", divide="ignore"):
        if n_part >= 4:  # the difference beyond the estimator's expected creep (its bias shrinking with n)
            change = np.abs((tau - autocorr_time(kept[:n_part])) / tau - autocorr_creep(tau, n_part, n_now))
        else:
            change = np.full(n_dim, np.inf)
        change = np.where(np.isfinite(change), change, np.inf)
    bound = tau_bound(tau, n_part, n_now, n_walkers, st.tau_rtol)
    long_enough = bool(n_now > st.tau_factor * float(np.max(tau)))
    stable = bool(np.all(change < bound))
    if (long_enough and stable) or always_diagnose:
        diag = chain_diagnostics(kept)
    else:
        diag = {k: np.full(n_dim, np.nan) for k in DIAGNOSTIC_KEYS}
    with np.errstate(invalid="ignore"):
        rhat_ok = bool(np.all(diag["rhat"] < st.rhat_max))
        ess_ok = bool(np.all(np.minimum(np.minimum(diag["ess"], diag["ess_tail"]), diag["ess_ci95"]) >= st.min_ess))
    return Check(steps, tau, change, bound, burn, diag["rhat"], diag["ess"], diag["ess_tail"], diag["ess_mean"],
                 diag["ess_ci95"], long_enough, stable, rhat_ok, ess_ok)

"""Posterior sampling with emcee's affine-invariant ensemble sampler.

``run_posterior`` samples the free values (the least-squares layout: parameters and
estimated initial states) and the noise parameters, with the priors of
:mod:`graybox.posterior.priors` and the likelihoods of :mod:`graybox.posterior.noise`.

* Sampler: ``emcee.EnsembleSampler`` (Foreman-Mackey et al., PASP 125 (2013) 306) driven
  directly with ``vectorize=True`` so that each call simulates half the ensemble in one
  batch; moves: differential evolution (default) or the stretch move
  (Goodman & Weare, Comm. App. Math. Comp. Sci. 5 (2010) 65), see :func:`emcee_moves`.
* Start: walkers in a small ball around the least-squares optimum, N(x_hat, (0.1)^2 C) in
  the sampled space (C: the least-squares covariance, mapped through the log transform),
  reflected back into the prior's support and clipped; when C is singular or missing a
  diagonal ball of relative size 1e-3 is used instead (the sampler dictionary says which).
* Randomness: one ``numpy.random.Generator`` from the seed draws the ball and seeds emcee's
  legacy ``RandomState``, so a seed fixes every number.
* Stop rule (checked every ``check_every`` steps; all must hold, see
  :func:`check_convergence`): the chain after burn-in is longer than ``tau_factor`` (50)
  times the largest integrated autocorrelation time estimated on it, and that estimate
  differs from the one on the chain's first three quarters (less the rise the estimator's
  bias alone gives) by less than its own estimation noise allows (:func:`tau_bound`);
  rank-normalised split R-hat across four groups of walkers below ``rhat_max`` (1.01; a
  heuristic here, the walkers being coupled); bulk ESS, tail ESS and the ESS of the 95%
  interval's ends at least ``min_ess`` (400) for every quantity (Vehtari et al. 2021), so
  that the median and the interval ends are known to the Monte Carlo standard errors
  reported with them.  Burn-in is 2 tau_max and thinning tau_min / 2 (the emcee
  documentation's rule).  A run stopped by ``max_steps`` is "not converged" wherever it is
  reported.
* Threads: the compiled simulation core releases the GIL, so each half-ensemble's rows are
  shared out over up to :func:`sampler_threads` threads; every row is simulated alone, so
  the samples do not depend on the thread count.
"""

from __future__ import annotations

import math
import os
import sys
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import emcee
import numpy as np

from graybox.errors import SampleError
from graybox.estimate.fit import FitResult
from graybox.estimate.problem import Problem
from graybox.posterior.checks import lag_one, residual_checks
from graybox.posterior.config import SamplerSettings, priors_from_spec
from graybox.posterior.diagnostics import (CI95, DIAGNOSTIC_KEYS, RHAT_NOTE, autocorr_change_sd, autocorr_creep,
                                          autocorr_time, chain_diagnostics, group_count, quantile_mcse)
from graybox.posterior.likelihood import LogPosterior
from graybox.posterior.noise import NoiseLayout, noise_layout
from graybox.posterior.priors import Prior

START_SCALE = 0.1  # ball radius in least-squares standard deviations
FALLBACK_REL = 1e-3  # relative ball size when the covariance is singular
MAX_REDRAWS = 50
SEED_STREAM = 0x706F7374  # separates the sampler's stream from other uses of the study seed
REPRODUCIBILITY = ("identical samples need the same study file, data, seed, walker count, step limit and check "
                   "interval, the same simulation engine, platform and versions of graybox, numpy, scipy and emcee "
                   "(floating-point results can differ between CPUs, BLAS builds and compiled-core versions)")


# ---------------------------------------------------------------------------------------------
# starting ensemble


@dataclass(frozen=True)
class Start:
    centre: np.ndarray  # sampled space
    cov: np.ndarray  # sampled space
    method: str  # "least-squares covariance" or "diagonal fallback (...)"


def start_distribution(post: LogPosterior, fit_result: FitResult) -> Start:
    """Centre and covariance of the starting ball in the sampled space."""
    x = np.asarray(fit_result.x, float)
    n_free, n_dim = post.n_free, post.n_dim
    centre = np.empty(n_dim)
    centre[:n_free] = [p.to_sampled(np.array(v)) for p, v in zip(post.priors, x)]
    jac = np.array([1.0 / v if p.log_scale else 1.0 for p, v in zip(post.priors, x)])
    cov_free = np.asarray(fit_result.covariance, float) * np.outer(jac, jac)
    method = "least-squares covariance"
    if cov_free.shape != (n_free, n_free) or not np.all(np.isfinite(cov_free)) or not _is_pd(cov_free):
        sd = FALLBACK_REL * np.where(np.abs(centre[:n_free]) > 0, np.abs(centre[:n_free]), 1.0)
        cov_free = np.diag(sd**2)
        method = "diagonal fallback (the least-squares covariance is singular or not available)"
    noise_sd = np.empty(n_dim - n_free)
    residuals = post.residuals(x)
    for k, p in enumerate(post.layout.params):
        n_o = sum(r[p.output].size for r in residuals)
        if p.what == "log_sigma":
            centre[n_free + k] = math.log(max(fit_result.sigmas[p.output], 1e-300))
            noise_sd[k] = 1.0 / math.sqrt(2.0 * n_o)
        elif p.what == "phi":
            phi = _phi_guess(post.layout, p.output, residuals)
            centre[n_free + k] = phi
            noise_sd[k] = max(math.sqrt((1 - phi**2) / n_o), 1e-3)
        else:
            centre[n_free + k] = math.log(10.0)
            noise_sd[k] = 0.2
    cov = np.zeros((n_dim, n_dim))
    cov[:n_free, :n_free] = cov_free
    cov[n_free:, n_free:] = np.diag(noise_sd**2)
    return Start(centre, cov, method)


def _is_pd(c: np.ndarray) -> bool:
    try:
        np.linalg.cholesky(c)
    except np.linalg.LinAlgError:
        return False
    return bool(np.all(np.diag(c) > 0))


def _phi_guess(layout: NoiseLayout, output: str, residuals: list[dict]) -> float:
    """Lag-one correlation of the least-squares residuals (at the reference spacing), in (0, 1)."""
    plan = layout.spacing[output]
    r = np.concatenate([res[output] for res in residuals])
    pair = np.concatenate([plan.ratio[e] > 0 for e in range(len(residuals))])
    r1 = lag_one(r, pair)
    return float(np.clip(r1 if np.isfinite(r1) else 0.5, 0.02, 0.98))


def sampled_bounds(post: LogPosterior) -> tuple[np.ndarray, np.ndarray]:
    lo = [p.sampled_bounds()[0] for p in post.priors] + [p.lower for p in post.layout.params]
    hi = [p.sampled_bounds()[1] for p in post.priors] + [p.upper for p in post.layout.params]
    return np.array(lo, float), np.array(hi, float)


def into_support(Z: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """Reflect rows across finite bounds (keeps walkers distinct), then clip strictly inside."""
    Z = Z.copy()
    width = np.where(np.isfinite(hi - lo), hi - lo, np.inf)
    for _ in range(3):
        below = np.isfinite(lo) & (Z < lo)
        Z = np.where(below, 2 * lo - Z, Z)
        above = np.isfinite(hi) & (Z >= hi)
        Z = np.where(above, 2 * hi - Z, Z)
    eps = 1e-9 * np.where(np.isfinite(width), width, 1.0)
    lo_c = np.where(np.isfinite(lo), lo + eps, -np.inf)
    hi_c = np.where(np.isfinite(hi), hi - eps, np.inf)
    return np.clip(Z, lo_c, hi_c)


def initial_ensemble(post: LogPosterior, start: Start, n_walkers: int, rng: np.random.Generator
                     ) -> tuple[np.ndarray, np.ndarray]:
    """Walkers and their log-posteriors; non-finite walkers are redrawn, then refused."""
    lo, hi = sampled_bounds(post)
    lp_centre = post(start.centre[None, :])[0]
    if not np.isfinite(lp_centre):
        raise SampleError("the log-posterior is not finite at the least-squares optimum ("
                          + _values_text(post, start.centre) + ")",
                          hint="the optimum lies outside a prior's support or its simulation fails; check the "
                               "priors against the bounds and the least-squares result")
    L = np.linalg.cholesky(start.cov)
    Z = into_support(start.centre + START_SCALE * rng.standard_normal((n_walkers, post.n_dim)) @ L.T, lo, hi)
    lp = post(Z)
    for _ in range(MAX_REDRAWS):
        bad = ~np.isfinite(lp)
        if not bad.any():
            break
        Z[bad] = into_support(start.centre + START_SCALE * rng.standard_normal((int(bad.sum()), post.n_dim)) @ L.T,
                              lo, hi)
        lp[bad] = post(Z[bad])
    bad = np.flatnonzero(~np.isfinite(lp))
    if bad.size:
        raise SampleError(f"the log-posterior is not finite at the start of walker {bad[0]} ("
                          + _values_text(post, Z[bad[0]]) + f"), after {MAX_REDRAWS} redraws",
                          hint="the model fails to simulate or leaves a prior's support close to the optimum; "
                               "check bounds, priors and initial states")
    return Z, lp


def _values_text(post: LogPosterior, z: np.ndarray) -> str:
    v = post.natural(z[None, :])[0]
    return ", ".join(f"{n} = {x:.6g}" for n, x in zip(post.names, v))


# ---------------------------------------------------------------------------------------------
# convergence


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
        return self.long_enough and self.tau_stable and self.rhat_ok and self.ess_ok

    @property
    def ess_min(self) -> np.ndarray:
        """Per quantity, the smallest of the bulk, tail and interval-end ESS."""
        return np.minimum(np.minimum(self.ess, self.ess_tail), self.ess_ci95)

    def failed(self, st: SamplerSettings) -> list[str]:
        out = []
        if not np.all(np.isfinite(self.tau)):
            out.append("the autocorrelation time could not be estimated (a walker has not moved)")
        elif not self.long_enough:
            out.append(f"chain of {self.steps - self.burn_in} steps after burn-in is not longer than "
                       f"{st.tau_factor:g} x tau_max ({st.tau_factor * float(np.max(self.tau)):.0f})")
        if not self.tau_stable:
            k = _worst(self.tau_change / self.tau_tol)
            if math.isfinite(float(self.tau_change[k])):
                out.append(f"tau differs by {100 * float(self.tau_change[k]):.1f}% from its estimate on the first "
                           f"three quarters of the chain, beyond its bias's creep (bound "
                           f"{100 * float(self.tau_tol[k]):.1f}%, set by its estimation noise)")
            else:
                out.append("tau could not be estimated on the chain's first three quarters")
        if not self.rhat_ok:
            value = _extreme(self.rhat, max)
            if not np.all(np.isfinite(self.rhat)):
                out.append("R-hat not computed for every quantity")
            else:
                out.append(f"R-hat {value:.4f} >= {st.rhat_max:g}")
        if not self.ess_ok:
            value = _extreme(self.ess_min, min)
            if not np.all(np.isfinite(self.ess_min)):
                out.append("ESS not computed for every quantity")
            else:
                out.append(f"ESS {value:.0f} < {st.min_ess:g}")
        return out

    def to_dict(self) -> dict:
        k = _worst(self.tau_change / self.tau_tol)
        return {"steps": self.steps, "burn_in": self.burn_in, "tau_max": _num(np.max(self.tau)),
                "tau_change": _num(self.tau_change[k]), "tau_bound": _num(self.tau_tol[k]),
                "rhat_max": _extreme(self.rhat, max), "ess_min": _extreme(self.ess_min, min),
                "converged": self.converged}


def _worst(ratio: np.ndarray) -> int:
    """Index of the largest ratio (NaN counts as the largest)."""
    r = np.where(np.isnan(ratio), np.inf, ratio)
    return int(np.argmax(r))


def _extreme(values: np.ndarray, pick) -> float | None:
    """max or min over the finite entries (None when there is none)."""
    finite = [float(v) for v in np.ravel(values) if np.isfinite(v)]
    return pick(finite) if finite else None


def _mcse_text(v: float | None) -> str:
    """A Monte Carlo standard error in the summary table: two significant digits, "n/a" when
    not computed."""
    return "n/a" if v is None else f"{v:.2g}"


def _num(v) -> float | None:
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


# ---------------------------------------------------------------------------------------------
# result


def quantity_stats(x: np.ndarray, check: Check, d: int, converged: bool) -> dict:
    """Summary of one quantity's post-burn-in draws ``x`` (n_walkers, n_draws), with the
    Monte Carlo standard errors of the mean, the median and the interval ends (the last two
    by :func:`graybox.posterior.diagnostics.quantile_mcse`, the walkers as chains)."""
    flat = x.ravel()
    lo, med, hi = np.quantile(flat, [CI95[0], 0.5, CI95[1]])
    sd = float(np.std(flat, ddof=1))
    ess_mean = float(check.ess_mean[d])
    return {
        "median": float(med),
        "mean": float(np.mean(flat)),
        "sd": sd,
        "ci95": [float(lo), float(hi)],
        "mcse_mean": float(sd / math.sqrt(ess_mean)) if ess_mean > 0 else None,
        "mcse_median": _num(quantile_mcse(x, 0.5)),
        "mcse_ci95": [_num(quantile_mcse(x, CI95[0])), _num(quantile_mcse(x, CI95[1]))],
        "ess": _num(check.ess[d]),
        "ess_tail": _num(check.ess_tail[d]),
        "ess_ci95": _num(check.ess_ci95[d]),
        "rhat": _num(check.rhat[d]),
        "converged": converged,
    }


@dataclass(frozen=True, eq=False)
class PosteriorResult:
    """The chain and everything reported about it."""

    names: list[str]  # free values, then noise parameters ("sigma[T]", "phi[T]", "nu[T]")
    n_free: int
    chain: np.ndarray  # (n_walkers, n_steps, n_dim), natural units
    log_prob: np.ndarray  # (n_walkers, n_steps)
    burn_in: int
    thin: int
    tau: np.ndarray
    acceptance: np.ndarray  # per walker
    converged: bool
    reason: str
    check: Check
    history: list[dict]
    priors: list[Prior]
    layout: NoiseLayout
    settings: SamplerSettings
    seed: int
    start_method: str
    fit_x: np.ndarray
    warnings: list[str] = field(default_factory=list)
    n_evaluations: int = 0
    wall_s: float = 0.0
    engine: str = ""
    stats: dict = field(default_factory=dict)  # name -> quantity_stats

    # -- shapes ---------------------------------------------------------------------------------
    @property
    def n_walkers(self) -> int:
        return int(self.chain.shape[0])

    @property
    def n_steps(self) -> int:
        return int(self.chain.shape[1])

    @property
    def free_names(self) -> list[str]:
        return self.names[: self.n_free]

    @property
    def noise_names(self) -> list[str]:
        return self.names[self.n_free:]

    def post_burn(self) -> np.ndarray:
        """(n_walkers, n_steps - burn_in, n_dim)."""
        return self.chain[:, self.burn_in:, :]

    def flat(self) -> np.ndarray:
        """Post-burn-in, thinned draws of every quantity: (n_draws, n_dim)."""
        return self.chain[:, self.burn_in::self.thin, :].reshape(-1, self.chain.shape[2])

    def draws(self, n: int, rng: np.random.Generator, include_noise: bool = False) -> np.ndarray:
        """``n`` draws of the free vector (natural units) from the post-burn-in thinned chain;
        without replacement when the chain holds enough.  With ``include_noise`` the noise
        parameters (natural units) follow the free values in each row."""
        flat = self.flat()
        idx = rng.choice(flat.shape[0], size=n, replace=n > flat.shape[0])
        rows = flat[idx]
        return rows if include_noise else rows[:, : self.n_free]

    def median(self) -> np.ndarray:
        return np.median(self.post_burn().reshape(-1, self.chain.shape[2]), axis=0)

    # -- reporting ------------------------------------------------------------------------------
    def to_parameters_dict(self) -> dict:
        """Per free value: {"posterior": {...}} (results.json ``parameters.NAME.posterior``)."""
        out = {}
        for j, name in enumerate(self.free_names):
            out[name] = {"posterior": {**self.stats[name], "prior": self.priors[j].to_dict()}}
        return out

    def to_noise_dict(self) -> dict:
        """Per output: the noise model and, for its sampled noise parameters,
        ``posterior.{sigma, phi, nu}.{median, mean, sd, ci95, ess, rhat, ...}``."""
        out = {}
        for m in self.layout.models:
            entry: dict = {"kind": m.kind, "model": m.describe(), "sigma_given": m.sigma, **self.layout.entries(m)}
            post = {}
            for p in self.layout.params:
                if p.applies_to(m.output):  # its own, or its noise group's shared sigma
                    key = {"log_sigma": "sigma", "phi": "phi", "log_nu": "nu"}[p.what]
                    post[key] = {**self.stats[p.name], "prior": p.describe()}
            entry["posterior"] = post
            entry["warnings"] = [w for w in self.warnings if w.startswith(f"{m.output}:")]
            out[m.output] = entry
        return out

    def sampler_dict(self) -> dict:
        return {
            "method": "emcee EnsembleSampler, vectorized over half-ensembles",
            "moves": self.settings.moves,
            "walkers": self.n_walkers,
            "steps": self.n_steps,
            "max_steps": self.settings.max_steps,
            "check_every": self.settings.check_every,
            "burn_in": self.burn_in,
            "thin": self.thin,
            "draws": int(self.flat().shape[0]),
            "tau": {n: _num(t) for n, t in zip(self.names, self.tau)},
            "acceptance": float(np.mean(self.acceptance)),
            "acceptance_min": float(np.min(self.acceptance)),
            "converged": self.converged,
            "reason": self.reason,
            "criteria": {"tau_factor": self.settings.tau_factor, "tau_rtol": self.settings.tau_rtol,
                         "rhat_max": self.settings.rhat_max, "min_ess": self.settings.min_ess,
                         "rhat_note": RHAT_NOTE, "rhat_walker_groups": group_count(self.n_walkers),
                         "tau_compared_with": f"its estimate on the first {STABILITY_PART:.0%} of the kept chain, less "
                                              "the estimator's expected creep; bound max(tau_rtol, 2 sd of that "
                                              "difference)",
                         "ess_of": "bulk, tail (5%, 95%) and interval ends (2.5%, 97.5%)"},
            "checks": self.history,
            "start": self.start_method,
            "seed": self.seed,
            "seed_note": "numpy Generator(SeedSequence([seed, 0x706f7374])) draws the start and seeds emcee's "
                         "RandomState",
            "reproducibility": REPRODUCIBILITY,
            "emcee_version": emcee.__version__,
            "engine": self.engine,
            "evaluations": self.n_evaluations,
            "wall_s": self.wall_s,
            "warnings": list(self.warnings),
        }

    def summary(self) -> str:
        status = "converged" if self.converged else "NOT CONVERGED"
        lines = [f"posterior ({status}): {self.n_walkers} walkers x {self.n_steps} steps, burn-in {self.burn_in}, "
                 f"thin {self.thin}, acceptance {np.mean(self.acceptance):.2f}, {self.wall_s:.1f} s"]
        lines.append(f"  {self.reason}")
        if not self.converged:
            lines.append("  these numbers are NOT final: the chain did not meet the convergence criteria")
        width = max(len(n) for n in self.names)
        lines.append(f"  {'':{width}}  {'median':>12} {'(MCSE)':>9} {'95% credible interval':>29} "
                     f"{'(MCSE of the ends)':>20} {'ESS':>7} {'R-hat':>7}")
        for n in self.names:
            s = self.stats[n]
            lo, hi = s["ci95"]
            m_lo, m_hi = s["mcse_ci95"]
            ess = s["ess"] if s["ess"] is not None else float("nan")
            rhat = s["rhat"] if s["rhat"] is not None else float("nan")
            lines.append(f"  {n:{width}}  {s['median']:12.6g} {_mcse_text(s['mcse_median']):>9} "
                         f"[{lo:13.6g}, {hi:13.6g}] {'(' + _mcse_text(m_lo) + ', ' + _mcse_text(m_hi) + ')':>20} "
                         f"{ess:7.0f} {rhat:7.4f}")
        lines.append("  MCSE: Monte Carlo standard error of the median and of each interval end (Vehtari et al. 2021, "
                     "section 4.4), from the chain's effective sample size")
        lines.append("  priors:")
        for p in self.priors:
            lines.append(f"    {p.name}: {p.describe()}")
        for p in self.layout.params:
            lines.append(f"    {p.name}: {p.describe()}")
        lines.append("  noise model:")
        for m in self.layout.models:
            lines.append(f"    {m.output}: {m.describe()}")
        lines.append(f"  note: {RHAT_NOTE}")
        for w in self.warnings:
            lines.append(f"  warning: {w}")
        return "\n".join(lines)

    # -- files ----------------------------------------------------------------------------------
    def save_samples(self, path: str | Path) -> None:
        """samples.npz: chain (walker x step x quantity, natural units), log_prob (walker x
        step), names, n_free, burn_in, thin, converged, and which quantities were sampled in
        log space."""
        log_sampled = [p.log_scale for p in self.priors] + [p.what != "phi" for p in self.layout.params]
        np.savez_compressed(
            Path(path), chain=self.chain, log_prob=self.log_prob, names=np.array(self.names, dtype=str),
            n_free=np.int64(self.n_free), burn_in=np.int64(self.burn_in), thin=np.int64(self.thin),
            converged=np.bool_(self.converged), log_sampled=np.array(log_sampled, bool),
            tau=self.tau, seed=np.int64(self.seed),
        )

    def write_plots(self, folder: str | Path) -> list[Path]:
        from graybox.posterior.plots import corner_plot, trace_plot

        folder = Path(folder)
        return [corner_plot(self, folder / "corner.png"), trace_plot(self, folder / "trace.png")]


# ---------------------------------------------------------------------------------------------
# driver


def check_walkers(n_walkers: int, n_dim: int) -> None:
    if n_walkers % 2:
        raise SampleError(f"the walker count must be even (the ensemble moves in two halves), got {n_walkers}",
                          hint="set [sampling] walkers to an even number")
    if n_walkers < 2 * n_dim:
        raise SampleError(f"{n_walkers} walkers are too few for {n_dim} sampled quantities (at least {2 * n_dim})",
                          hint=f"set [sampling] walkers to at least {max(32, 4 * n_dim)}, or leave it out")


def emcee_moves(name: str):
    """The proposal.  "differential": the differential-evolution move (ter Braak, Statistics
    and Computing 16 (2006) 239; emcee's ``DEMove``); on near-Gaussian posteriors its
    autocorrelation time is several times shorter than the stretch move's.  "stretch":
    Goodman & Weare (2010).  emcee's snooker variant (``DESnookerMove``) is deliberately not
    used: in tests/posterior/test_coverage.py (a two-dimensional Student-t posterior) emcee
    3.1.6's snooker move gave 95% intervals 43% too narrow, and a 0.8/0.2 DE/snooker mixture
    6% too narrow, while DE alone and the stretch move matched the exact interval."""
    if name == "stretch":
        return emcee.moves.StretchMove()
    return emcee.moves.DEMove()


def _progress_bar(st: SamplerSettings):
    show = st.progress if isinstance(st.progress, bool) else sys.stderr.isatty()
    if not show:
        return None
    from tqdm import tqdm

    return tqdm(total=st.max_steps, desc="sampling", unit="step", file=sys.stderr, leave=False)


def sampler_threads(engine_name: str, environ=os.environ) -> int:
    """Threads for one log-posterior batch: with the compiled core (which releases the GIL)
    the cores this process may run on, at most ``NUMBA_NUM_THREADS`` when that is set
    (fleet jobs and the test suite set it to 1: they parallelise over processes); one for
    the numpy reference path."""
    if engine_name != "compiled":
        return 1
    try:
        cores = len(os.sched_getaffinity(0))
    except AttributeError:  # not on every platform
        cores = os.cpu_count() or 1
    limit = environ.get("NUMBA_NUM_THREADS", "").strip()
    if limit.isdigit() and int(limit) > 0:
        cores = min(cores, int(limit))
    return max(1, cores)


class BatchEvaluator:
    """The log-posterior of a batch of rows (emcee's ``vectorize=True`` call), the rows
    shared out in contiguous blocks over ``n_threads`` threads.  Each row is simulated on
    its own (its own adaptive step), so the values do not depend on the blocks.  Counts the
    rows inside the prior's support (the simulated parameter sets) itself."""

    def __init__(self, post: LogPosterior, n_threads: int):
        self.post = post
        self.n_threads = max(1, int(n_threads))
        self.n_sets = 0
        self._pool = ThreadPoolExecutor(self.n_threads, thread_name_prefix="graybox-lp") if self.n_threads > 1 \
            else None

    def __call__(self, Z: np.ndarray) -> np.ndarray:
        Z = np.atleast_2d(np.asarray(Z, float))
        self.n_sets += int(np.count_nonzero(np.isfinite(self.post.log_prior(Z))))
        if self._pool is None or Z.shape[0] < 2:
            return self.post(Z)
        blocks = np.array_split(Z, min(self.n_threads, Z.shape[0]))
        return np.concatenate(list(self._pool.map(self.post, blocks)))

    def close(self) -> None:
        if self._pool is not None:
            self._pool.shutdown(wait=True)


def run_posterior(problem: Problem, fit_result: FitResult, noise: dict, settings: SamplerSettings, seed: int, *,
                  priors: list[Prior] | None = None, file: Path | None = None,
                  _criterion: Callable | None = None, _threads: int | None = None) -> PosteriorResult:
    """Sample the posterior; ``noise``: output -> NoiseSpec (``study.noise``); ``seed``: the
    study's seed, used unless ``settings.seed`` is given; ``file``: the study file, for error
    locations.  Private, for benchmarks/bench_stop_rule.py and the tests: ``_criterion``, a
    replacement for :func:`check_convergence` with its signature; ``_threads``, the thread
    count instead of :func:`sampler_threads`."""
    criterion = check_convergence if _criterion is None else _criterion
    t0 = time.perf_counter()
    st = settings
    used_seed = int(st.seed if st.seed is not None else seed)
    priors = priors if priors is not None else priors_from_spec(problem.spec, problem, file)
    layout = noise_layout(noise, problem, file)
    post = LogPosterior(problem, priors, layout)
    n_dim = post.n_dim
    n_walkers = st.n_walkers(n_dim)
    check_walkers(n_walkers, n_dim)
    rng = np.random.default_rng(np.random.SeedSequence([used_seed, SEED_STREAM]))
    start = start_distribution(post, fit_result)
    Z0, lp0 = initial_ensemble(post, start, n_walkers, rng)
    n_start_sets = post.n_sets  # the start's evaluations (single-threaded)
    evaluate = BatchEvaluator(post, sampler_threads(problem.engine.name) if _threads is None else _threads)
    sampler = emcee.EnsembleSampler(n_walkers, n_dim, evaluate, vectorize=True, moves=emcee_moves(st.moves))
    sampler.random_state = np.random.RandomState(int(rng.integers(0, 2**32 - 1))).get_state()
    state = emcee.State(Z0, log_prob=lp0)
    bar = _progress_bar(st)
    history: list[dict] = []
    check = before = None
    try:
        while sampler.iteration < st.max_steps:
            n = min(st.check_every, st.max_steps - sampler.iteration)
            for state in sampler.sample(state, iterations=n, skip_initial_state_check=sampler.iteration > 0):
                if bar is not None:
                    bar.update(1)
            raw = sampler.get_chain()
            chain = post.natural(raw.reshape(-1, n_dim)).reshape(raw.shape)
            before, check = check, criterion(chain, check, st)
            history.append(check.to_dict())
            if check.converged:
                break
    except ValueError as exc:  # emcee refuses a degenerate initial ensemble
        raise SampleError(f"the sampler could not start: {exc}",
                          hint="the starting walkers are degenerate; check for parameters the data do not determine")
    finally:
        evaluate.close()
        if bar is not None:
            bar.close()
    raw = sampler.get_chain()  # (steps, walkers, dim), sampled space
    chain = post.natural(raw.reshape(-1, n_dim)).reshape(raw.shape).transpose(1, 0, 2)
    if not check.converged:  # the summaries still need R-hat and ESS
        check = criterion(chain.transpose(1, 0, 2), before, st, always_diagnose=True)
    log_prob = sampler.get_log_prob().T
    converged = check.converged
    if converged:
        k = _worst(check.tau_change / check.tau_tol)
        reason = (f"converged after {check.steps} steps: chain after burn-in > {st.tau_factor:g} x tau_max, tau "
                  f"stable within its noise ({100 * float(check.tau_change[k]):.1f}% from its estimate on the "
                  f"first three quarters, less its bias's creep, < {100 * float(check.tau_tol[k]):.1f}%), "
                  f"R-hat < {st.rhat_max:g}, bulk, tail and interval-end ESS >= {st.min_ess:g}")
    else:
        reason = f"not converged: stopped at the step limit of {st.max_steps} steps; " + "; ".join(check.failed(st))
    burn = check.burn_in
    _, thin = burn_and_thin(check.tau, chain.shape[1])
    stats = {name: quantity_stats(chain[:, burn:, d], check, d, converged) for d, name in enumerate(post.names)}
    med = np.median(chain[:, burn:, :].reshape(-1, n_dim), axis=0)
    natural_noise = {}
    for m in layout.models:
        s, ph, nu = layout.values(post.sampled(med[None, :])[:, post.n_free:], m.output)
        natural_noise[m.output] = (float(s[0]), None if ph is None else float(ph[0]),
                                   None if nu is None else float(nu[0]))
    warnings = residual_checks(layout, post.residuals(med[: post.n_free]), natural_noise, problem.spec.output_names)
    if not converged:
        warnings.insert(0, "the sampler stopped at its step limit before converging: the posterior summaries are "
                           "not final")
    return PosteriorResult(
        names=post.names, n_free=post.n_free, chain=chain, log_prob=log_prob, burn_in=burn, thin=thin,
        tau=check.tau, acceptance=np.asarray(sampler.acceptance_fraction, float), converged=converged, reason=reason,
        check=check, history=history, priors=priors, layout=layout, settings=st, seed=used_seed,
        start_method=start.method, fit_x=np.asarray(fit_result.x, float), warnings=warnings,
        n_evaluations=n_start_sets + evaluate.n_sets, wall_s=time.perf_counter() - t0, engine=problem.engine.name,
        stats=stats,
    )


from graybox.posterior.bands import PredictiveBand, predictive_bands  # noqa: E402  (re-exported)

__all__ = ["PosteriorResult", "PredictiveBand", "predictive_bands", "run_posterior"]

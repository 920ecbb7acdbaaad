"""The starting ensemble of the posterior sampler.

Walkers start in a small ball around the least-squares optimum, N(x_hat, (0.1)^2 C) in the
sampled space (C: the least-squares covariance, mapped through the log transform),
reflected back into the prior's support and clipped; when C is singular or missing a
diagonal ball of relative size 1e-3 is used instead (the sampler dictionary says which).
Noise parameters start at the least-squares sigma (ln sigma, sd 1/sqrt(2n)); a noise kind's
own parameters where the kind says (AR(1): the residuals' lag-one correlation; Student-t:
nu = 10).  Walkers whose log-posterior is not finite are
redrawn, then refused with a located error.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from graybox.errors import SampleError
from graybox.estimate.result import FitResult
from graybox.posterior.likelihood import LogPosterior

START_SCALE = 0.1  # ball radius in least-squares standard deviations
FALLBACK_REL = 1e-3  # relative ball size when the covariance is singular
MAX_REDRAWS = 50


@dataclass(frozen=True)
class Start:
    """The starting ball: its centre, covariance and how the covariance was found."""

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
        if p.key == "sigma":  # every kind's scale; a kind's own parameters start where the kind says
            n_o = sum(r[p.output].size for r in residuals)
            centre[n_free + k] = math.log(max(fit_result.sigmas[p.output], 1e-300))
            noise_sd[k] = 1.0 / math.sqrt(2.0 * n_o)
        else:
            centre[n_free + k], noise_sd[k] = post.layout.start(p, residuals)
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


def sampled_bounds(post: LogPosterior) -> tuple[np.ndarray, np.ndarray]:
    """Lower and upper bounds of every sampled quantity, in the sampled space."""
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

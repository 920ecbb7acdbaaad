"""Do the residuals contradict the noise model?  Checks at the posterior median.

* Independent-error models (Gaussian, Student-t): the lag-one autocorrelation r1 of the
  residuals.  Under AR(1) errors the variance of a mean-like estimate grows by
  (1 + phi) / (1 - phi) (e.g. Box, Jenkins & Reinsel, *Time Series Analysis*, section 7.1),
  so intervals from an independent-error likelihood are too narrow by up to
  sqrt((1 + r1) / (1 - r1)): 4.4x at r1 = 0.9.
* AR(1): r1 of the standardised innovations, which should be uncorrelated.
* Gaussian: more residuals beyond 4 sigma than the normal tail allows (P = 6.3e-5 each)
  points to outliers and to the Student-t model.
* A given sigma far from the residuals' scatter.

A check is "significant" at |r1| sqrt(n) > 3 (the large-sample standard error of r1 under
independence is 1/sqrt(n); Bartlett's formula) and only reported when |r1| > 0.2, since with
seconds-rate data a tiny but irrelevant correlation is always significant.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numpy as np
from scipy import stats

if TYPE_CHECKING:
    from graybox.posterior.noise import NoiseLayout

R1_REPORT = 0.2
Z_SIGNIFICANT = 3.0
OUTLIER_Z = 4.0


def lag_one(r: np.ndarray, pair: np.ndarray) -> float:
    """Lag-one autocorrelation over the consecutive pairs flagged in ``pair`` (pair[j]: j-1, j
    belong to one run)."""
    r = r - np.mean(r)
    den = float(np.sum(r**2))
    if den <= 0 or not pair.any():
        return math.nan
    prev = np.roll(r, 1)
    return float(np.sum((r * prev)[pair]) / den)


def residual_checks(layout: NoiseLayout, residuals: list[dict[str, np.ndarray]], natural_noise: dict,
                    outputs: list[str]) -> list[str]:
    """Warnings (text) where the residuals at the posterior median contradict the noise model
    (each noise kind's ``checks``, on every experiment's residuals in turn).

    ``natural_noise``: output -> its noise values at the posterior median (:meth:`NoiseLayout.at`);
    ``residuals``: per experiment {output: residual vector}."""
    out = []
    for o in outputs:
        m = layout.model(o)
        v = natural_noise[o]
        pieces, pairs, whitened = [], [], []
        for e, res in enumerate(residuals):
            w, pair = m.family.whitened(m, layout.spacing.get(o), e, res[o], v)
            pieces.append(res[o])
            pairs.append(pair)
            whitened.append(w)
        out += m.family.checks(m, np.concatenate(pieces), np.concatenate(whitened), np.concatenate(pairs), v)
    return out


# -- the checks a noise kind composes (graybox/posterior/noise_kinds) ---------------------------


def correlated_errors(o: str, r: np.ndarray, pair: np.ndarray) -> list[str]:
    """Residuals correlated although the model assumes independent errors."""
    n = r.size
    r1 = lag_one(r, pair)
    if np.isfinite(r1) and r1 > R1_REPORT and r1 * math.sqrt(n) > Z_SIGNIFICANT:
        factor = math.sqrt((1 + r1) / (1 - r1)) if r1 < 1 else math.inf
        return [f"{o}: the residuals are correlated (lag-one r = {r1:.2f}), but the noise model assumes "
                f"independent errors: intervals may be too narrow by up to {factor:.1f}x; "
                f"consider kind = \"ar1\" in [noise.{o}]"]
    return []


def correlated_innovations(o: str, w: np.ndarray, pair: np.ndarray) -> list[str]:
    """AR(1) innovations still correlated."""
    n = w.size
    r1 = lag_one(w, pair)
    if np.isfinite(r1) and abs(r1) > R1_REPORT and abs(r1) * math.sqrt(n) > Z_SIGNIFICANT:
        return [f"{o}: the AR(1) innovations are still correlated (lag-one r = {r1:.2f}): the error "
                "correlation is more complex than AR(1), and intervals may still be too narrow"]
    return []


def negative_correlation(o: str, r: np.ndarray, pair: np.ndarray) -> list[str]:
    """Residuals negatively correlated, which the AR(1) model (phi in [0, 1)) cannot follow."""
    n = r.size
    raw = lag_one(r, pair)
    if np.isfinite(raw) and raw < -R1_REPORT and abs(raw) * math.sqrt(n) > Z_SIGNIFICANT:
        return [f"{o}: the residuals are negatively correlated (lag-one r = {raw:.2f}); the AR(1) model "
                "here allows phi in [0, 1) only"]
    return []


def outliers(o: str, r: np.ndarray, sigma: float | None) -> list[str]:
    """More residuals beyond ``OUTLIER_Z`` sigma than Gaussian errors allow."""
    if sigma is None or not sigma > 0:
        return []
    n = r.size
    count = int(np.sum(np.abs(r) > OUTLIER_Z * sigma))
    expected = n * 2 * stats.norm.sf(OUTLIER_Z)
    if count >= 5 and count > 10 * expected:
        return [f"{o}: {count} residuals lie beyond {OUTLIER_Z:g} sigma (about {expected:.2g} expected "
                f"for Gaussian errors): outliers; consider kind = \"student_t\" in [noise.{o}]"]
    return []


def given_sigma_mismatch(m, r: np.ndarray) -> list[str]:
    """A given sigma far from the residuals' scatter (with at least 30 residuals)."""
    if m.sigma is None or r.size < 30:
        return []
    scatter = float(np.std(r))
    ratio = scatter / m.sigma
    if ratio > 1.5 or ratio < 1 / 1.5:
        return [f"{m.output}: the residuals scatter with sd {scatter:.3g}, but sigma = {m.sigma:.3g} is given: "
                "the given noise level does not match the data; intervals follow the given value"]
    return []


def large_dof(m, nu: float | None) -> list[str]:
    """Sampled Student-t degrees of freedom so large that Gaussian errors would do."""
    if m.dof is None and nu is not None and nu > 50:
        return [f"{m.output}: the Student-t degrees of freedom came out large (median nu = {nu:.0f}): the residuals "
                "show no outliers and Gaussian errors would do"]
    return []

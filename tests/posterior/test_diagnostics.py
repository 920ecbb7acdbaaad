"""Convergence diagnostics against analytic results.

References: for iid draws the effective sample size is the draw count and R-hat is 1; for a
stationary AR(1) chain with coefficient phi the integrated autocorrelation time is
(1 + phi) / (1 - phi), so ESS = M N (1 - phi) / (1 + phi) (e.g. Sokal, "Monte Carlo methods in
statistical mechanics", 1997; Geyer 1992).  R-hat must flag a chain with a shifted mean
(bulk) and one with a different spread but the same mean (only the folded version sees
it; Vehtari et al. 2021, section 4.2).
"""

from __future__ import annotations

import numpy as np
import pytest

from graybox.posterior.diagnostics import (
    autocorr_time,
    ess_bulk,
    ess_mean,
    ess_tail,
    rank_normalise,
    rhat_basic,
    rhat_rank,
    split_chains,
)


def ar1_chains(rng, m, n, phi):
    z = rng.standard_normal((m, n))
    x = np.empty((m, n))
    x[:, 0] = z[:, 0]
    s = np.sqrt(1 - phi**2)
    for j in range(1, n):
        x[:, j] = phi * x[:, j - 1] + s * z[:, j]
    return x


def test_iid_chains():
    rng = np.random.default_rng(11)
    x = rng.standard_normal((8, 5000))
    assert ess_bulk(x) == pytest.approx(40000, rel=0.05)
    assert ess_mean(x) == pytest.approx(40000, rel=0.05)
    assert ess_tail(x) == pytest.approx(40000, rel=0.08)
    assert abs(rhat_rank(x) - 1) < 0.002


@pytest.mark.parametrize("phi", [0.5, 0.9])
def test_ar1_chain_ess_and_tau(phi):
    rng = np.random.default_rng(12)
    m, n = 8, 40000
    x = ar1_chains(rng, m, n, phi)
    tau = (1 + phi) / (1 - phi)
    assert ess_mean(x) == pytest.approx(m * n / tau, rel=0.08)
    assert autocorr_time(x.T[:, :, None])[0] == pytest.approx(tau, rel=0.08)


def test_rhat_flags_shifted_and_overdispersed_chains():
    rng = np.random.default_rng(13)
    x = rng.standard_normal((8, 2000))
    shifted = x.copy()
    shifted[0] += 0.5
    assert rhat_rank(shifted) > 1.01
    wide = x.copy()
    wide[:2] *= 3.0  # same mean, three times the spread
    bulk_only = rhat_basic(rank_normalise(split_chains(wide)))
    assert bulk_only < 1.01  # the bulk version misses it ...
    assert rhat_rank(wide) > 1.01  # ... the folded version does not


def test_rhat_flags_a_trend_within_chains():
    """Splitting catches a drift that every chain shares (section 4.1)."""
    rng = np.random.default_rng(14)
    x = rng.standard_normal((8, 2000)) + np.linspace(0, 1.0, 2000)[None, :]
    assert rhat_basic(x) < 1.01
    assert rhat_rank(x) > 1.01

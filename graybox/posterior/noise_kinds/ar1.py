"""AR(1) errors: a stationary Gaussian AR(1) process of marginal standard deviation sigma.

With observations at uneven times the lag-one coefficient of step j is
``phi_j = phi ** (dt_j / dt_ref)`` (dt_ref: the median spacing; phi is the correlation at that
spacing) or, from a declared error time constant, ``phi_j = exp(-dt_j / tau_e)``.  Both are
the exact discretisation of an Ornstein-Uhlenbeck process, whose covariance is
sigma^2 exp(-|t_i - t_k| / tau_e), so the likelihood is the exact Gaussian one:
e_1 ~ N(0, sigma^2), e_j | e_{j-1} ~ N(phi_j e_{j-1}, sigma^2 (1 - phi_j^2)) (the
prediction-error decomposition, e.g. Box, Jenkins & Reinsel, *Time Series Analysis*, ch. 7;
Brockwell & Davis, *Time Series: Theory and Methods*, section 8.7).  The process restarts
(phi_j = 0) at the start of every experiment and segment and after a gap longer than
``GAP_FACTOR`` reference spacings.  Without ``phi`` or ``error_time_constant``, phi is
sampled, uniform on [0, 1).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from graybox.configkit import Table, parse_duration
from graybox.errors import ConfigError, SampleError
from graybox.posterior.checks import correlated_innovations, given_sigma_mismatch, lag_one, negative_correlation
from graybox.posterior.noise_kinds.base import NoiseParam, checked_number, option_error

GAP_FACTOR = 10.0  # a spacing above this many reference spacings restarts the AR(1) process
PHI_UPPER = 1.0  # exclusive


@dataclass(frozen=True)
class SpacingPlan:
    """Per experiment, the spacing before each compared observation of one output, in units
    of the reference spacing (0 where the process restarts)."""

    ratio: tuple[np.ndarray, ...]  # per experiment (n_used,): dt_j / dt_ref, 0 at restarts
    dt: tuple[np.ndarray, ...]  # per experiment (n_used,): dt_j in seconds, 0 at restarts
    dt_ref: float
    n_restarts: int

    def lag_coefficients(self, e: int, phi: np.ndarray | None, tau_e: float | None) -> np.ndarray:
        """phi_j per set (n_sets, n_used) for experiment ``e`` (0 at restarts)."""
        ratio = self.ratio[e]
        restart = ratio == 0
        if tau_e is not None:
            pj = np.exp(-self.dt[e] / tau_e)[None, :]
        else:
            phi = np.asarray(phi, float).reshape(-1, 1)
            with np.errstate(divide="ignore"):
                pj = np.exp(np.log(np.maximum(phi, 0.0)) * ratio[None, :])  # phi ** ratio, phi = 0 -> 0
            pj = np.where(phi > 0, pj, 0.0)
        return np.where(restart[None, :], 0.0, pj)


def spacing_plan(problem, output: str) -> SpacingPlan:
    """Spacings of the compared observations of ``output`` within each segment."""
    per_exp_t, per_exp_first = [], []
    for ex in problem.experiments:
        tl = ex.timeline
        series = ex.record.outputs[output]
        label = np.full(series.t.size, -1)
        for seg in tl.segments:
            label[seg.obs_index[output]] = seg.index
        used = tl.used[output]
        t = series.t[used]
        lab = label[used]
        first = np.ones(t.size, bool)
        first[1:] = lab[1:] != lab[:-1]
        per_exp_t.append(t)
        per_exp_first.append(first)
    gaps = np.concatenate([np.diff(t)[~f[1:]] for t, f in zip(per_exp_t, per_exp_first)])
    dt_ref = float(np.median(gaps)) if gaps.size else 1.0
    ratios, dts, n_restart = [], [], 0
    for t, first in zip(per_exp_t, per_exp_first):
        dt = np.zeros(t.size)
        dt[1:] = np.diff(t)
        restart = first | (dt > GAP_FACTOR * dt_ref)
        dt[restart] = 0.0
        ratios.append(dt / dt_ref)
        dts.append(dt)
        n_restart += int(restart.sum())
    return SpacingPlan(tuple(ratios), tuple(dts), dt_ref, n_restart)


def loglik_ar1(R: np.ndarray, sigma: np.ndarray, phi_j: np.ndarray) -> np.ndarray:
    """Exact Gaussian AR(1) log-likelihood (prediction-error decomposition).

    R (n_sets, n) residuals in time order; phi_j (n_sets or 1, n) the lag coefficient from
    observation j-1 to j, 0 at a restart (then e_j ~ N(0, sigma^2), the stationary term)."""
    sigma = np.asarray(sigma, float).reshape(-1, 1)
    prev = np.zeros_like(R)
    prev[:, 1:] = R[:, :-1]
    innov = R - phi_j * prev
    var = sigma**2 * (1.0 - phi_j**2)
    with np.errstate(divide="ignore", invalid="ignore"):
        terms = np.log(2 * np.pi * var) + innov**2 / var
    return -0.5 * np.sum(terms, axis=1)


def innovations(R: np.ndarray, phi_j: np.ndarray) -> np.ndarray:
    """Standardised AR(1) innovations (e_j - phi_j e_{j-1}) / sqrt(1 - phi_j^2), in sigma units."""
    prev = np.zeros_like(R)
    prev[:, 1:] = R[:, :-1]
    return (R - phi_j * prev) / np.sqrt(1.0 - phi_j**2)


def simulate_ar1(sigma: np.ndarray, rng: np.random.Generator, n: int, phi_j: np.ndarray) -> np.ndarray:
    """Draws of the AR(1) process with lag coefficients ``phi_j``, one row per set (n_sets, n)."""
    sigma = np.asarray(sigma, float).reshape(-1, 1)
    n_sets = sigma.shape[0]
    z = rng.standard_normal((n_sets, n))
    pj = np.broadcast_to(phi_j, (n_sets, n))
    e = np.empty((n_sets, n))
    scale = np.sqrt(1.0 - pj**2)
    prev = np.zeros(n_sets)
    for j in range(n):
        prev = pj[:, j] * prev + scale[:, j] * z[:, j]
        e[:, j] = prev
    return sigma * e


class AR1:
    """``kind = "ar1"``: AR(1) errors; options ``phi`` or ``error_time_constant``."""

    name = "ar1"
    options = ("phi", "error_time_constant")
    sums_suffice = False

    def given(self, t: Table) -> dict:
        """``phi`` in [0, 1) or ``error_time_constant`` (a duration), not both."""
        if "phi" in t and "error_time_constant" in t:
            raise option_error(t, "phi", "give either phi or error_time_constant, not both",
                               "phi = exp(-spacing / error_time_constant): one determines the other")
        out = {}
        if "phi" in t:
            phi = checked_number(t, "phi")
            if not 0.0 <= phi < 1.0:
                raise option_error(t, "phi", f"phi must be in [0, 1), got {phi!r}",
                                   "the lag-one correlation of the errors at the median spacing")
            out["phi"] = phi
        if "error_time_constant" in t:
            try:
                out["tau_e"] = parse_duration(t.data["error_time_constant"], t.where("error_time_constant"))
            except ConfigError as exc:
                raise SampleError(exc.message, where=exc.where, hint=exc.hint) from None
        return out

    def sampled(self, m) -> list[NoiseParam]:
        """phi, unless ``phi`` or ``error_time_constant`` is given."""
        if m.phi is not None or m.tau_e is not None:
            return []
        return [NoiseParam(f"phi[{m.output}]", m.output, "phi", False, 0.0, PHI_UPPER, "uniform on [0, 1)",
                           upper_open=True)]

    def given_values(self, m) -> dict:
        """A given phi (an error time constant enters the lag coefficients directly)."""
        return {} if m.phi is None else {"phi": m.phi}

    def start(self, m, plan: SpacingPlan, p: NoiseParam, residuals: list[np.ndarray]) -> tuple[float, float]:
        """phi at the residuals' lag-one correlation (in (0.02, 0.98); 0.5 when it cannot be
        estimated), sd sqrt((1 - phi^2) / n), at least 1e-3."""
        r = np.concatenate(residuals)
        pair = np.concatenate([plan.ratio[e] > 0 for e in range(len(residuals))])
        r1 = lag_one(r, pair)
        phi = float(np.clip(r1 if np.isfinite(r1) else 0.5, 0.02, 0.98))
        return phi, max(math.sqrt((1 - phi**2) / r.size), 1e-3)

    def plan(self, problem, output: str) -> SpacingPlan:
        """The spacings of the output's compared observations."""
        return spacing_plan(problem, output)

    def loglik(self, m, plan: SpacingPlan, e: int, R: np.ndarray, v: dict) -> np.ndarray:
        """:func:`loglik_ar1` with the experiment's lag coefficients."""
        return loglik_ar1(R, v["sigma"], plan.lag_coefficients(e, v.get("phi"), m.tau_e))

    def whitened(self, m, plan: SpacingPlan, e: int, r: np.ndarray, v: dict) -> tuple[np.ndarray, np.ndarray]:
        """The standardised innovations; pairs within one run of the process."""
        phi = v.get("phi")
        pj = plan.lag_coefficients(e, None if phi is None else np.array([phi]), m.tau_e)
        return innovations(r[None, :], pj)[0], plan.ratio[e] > 0

    def simulate(self, m, plan: SpacingPlan, e: int, v: dict, rng: np.random.Generator, n: int) -> np.ndarray:
        """:func:`simulate_ar1` with the experiment's lag coefficients."""
        return self.draw(v["sigma"], rng, n, phi_j=plan.lag_coefficients(e, v.get("phi"), m.tau_e))

    def draw(self, sigma, rng: np.random.Generator, n: int, phi_j=None, nu=None) -> np.ndarray:
        """:func:`simulate_ar1` with lag coefficients ``phi_j``."""
        return simulate_ar1(sigma, rng, n, phi_j)

    def checks(self, m, r: np.ndarray, w: np.ndarray, pair: np.ndarray, v: dict) -> list[str]:
        """Innovations still correlated, negatively correlated residuals, a given sigma far
        from the scatter."""
        return [*correlated_innovations(m.output, w, pair), *negative_correlation(m.output, r, pair),
                *given_sigma_mismatch(m, r)]

    def describe(self, m, sig: str) -> str:
        """In words."""
        if m.tau_e is not None:
            corr = f"error time constant {m.tau_e:g} s given"
        elif m.phi is not None:
            corr = f"phi = {m.phi:g} at the median spacing, given"
        else:
            corr = "phi sampled"
        return f"AR(1) correlated Gaussian errors, {sig}, {corr}"

    def entries(self, m, plan: SpacingPlan) -> dict:
        """The given correlation, the reference spacing and the restarts."""
        return {"phi_given": m.phi, "error_time_constant_s": m.tau_e, "reference_spacing_s": plan.dt_ref,
                "restarts": plan.n_restarts}

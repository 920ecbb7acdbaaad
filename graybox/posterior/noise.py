"""Noise models of the measured outputs and their log-likelihoods, batched over parameter sets.

Per output the residuals e = measured - model at the compared observations follow one of:

* ``gaussian``: independent N(0, sigma^2);
* ``ar1``: a stationary Gaussian AR(1) process of marginal standard deviation sigma.  With
  observations at uneven times the lag-one coefficient of step j is
  ``phi_j = phi ** (dt_j / dt_ref)`` (dt_ref: the median spacing; phi is the correlation at
  that spacing) or, from a declared error time constant, ``phi_j = exp(-dt_j / tau_e)``.
  Both are the exact discretisation of an Ornstein-Uhlenbeck process, whose covariance is
  sigma^2 exp(-|t_i - t_k| / tau_e), so the likelihood below is the exact Gaussian one:
  e_1 ~ N(0, sigma^2), e_j | e_{j-1} ~ N(phi_j e_{j-1}, sigma^2 (1 - phi_j^2))
  (the prediction-error decomposition, e.g. Box, Jenkins & Reinsel, *Time Series Analysis*,
  ch. 7; Brockwell & Davis, *Time Series: Theory and Methods*, section 8.7).  The process
  restarts (phi_j = 0) at the start of every experiment and segment and after a gap longer
  than ``GAP_FACTOR`` reference spacings;
* ``student_t``: independent Student-t errors of scale sigma and nu degrees of freedom, for
  records with outliers (e.g. Lange, Little & Taylor, JASA 84 (1989) 881-896).

Sampled noise parameters (appended to the free vector, in this order per output): ln sigma
when sigma is not given (prior p(sigma) proportional to 1/sigma, flat in ln sigma, the
Jeffreys prior of a scale); phi for an AR(1) output with neither ``phi`` nor
``error_time_constant`` given (uniform on [0, 1)); ln nu for a Student-t output without
``dof`` (nu ~ Gamma(2, rate 0.1), truncated to [1, 1000], the prior of Juarez & Steel,
JASA 105 (2010) 1219-1231, as recommended in the Stan prior-choice notes; from memory).
Outputs of a noise group (``[noise.groups]``, outputs in the same units) share one sampled
ln sigma, named ``sigma[GROUP]`` and laid out at the group's first output; every output of
the group reads its sigma from it (:meth:`NoiseParam.applies_to`), so the likelihood is
that of one sigma for all the group's residuals.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np
from scipy.special import gammaln

from graybox.configkit import Table, parse_duration
from graybox.errors import ConfigError, SampleError

KIND_GAUSSIAN = "gaussian"
KIND_AR1 = "ar1"
KIND_STUDENT = "student_t"
GAP_FACTOR = 10.0  # a spacing above this many reference spacings restarts the AR(1) process
NU_BOUNDS = (1.0, 1000.0)
NU_GAMMA_SHAPE, NU_GAMMA_RATE = 2.0, 0.1
PHI_UPPER = 1.0  # exclusive


@dataclass(frozen=True)
class NoiseModel:
    """The noise model of one output, validated."""

    output: str
    kind: str
    sigma: float | None  # None: sampled
    phi: float | None = None  # AR(1) correlation at the reference spacing, given
    tau_e: float | None = None  # AR(1) error time constant in seconds, given
    dof: float | None = None  # Student-t degrees of freedom, given
    group: str | None = None  # the noise group whose one sigma it shares ([noise.groups])
    shared_with: tuple[str, ...] = ()  # the group's other outputs

    @property
    def samples_phi(self) -> bool:
        return self.kind == KIND_AR1 and self.phi is None and self.tau_e is None

    @property
    def samples_nu(self) -> bool:
        return self.kind == KIND_STUDENT and self.dof is None

    def describe(self) -> str:
        sig = "sigma sampled" if self.sigma is None else f"sigma = {self.sigma:g} given"
        if self.group is not None:
            sig = f"sigma[{self.group}] sampled, shared with {', '.join(self.shared_with)}"
        if self.kind == KIND_GAUSSIAN:
            return f"independent Gaussian errors, {sig}"
        if self.kind == KIND_AR1:
            if self.tau_e is not None:
                corr = f"error time constant {self.tau_e:g} s given"
            elif self.phi is not None:
                corr = f"phi = {self.phi:g} at the median spacing, given"
            else:
                corr = "phi sampled"
            return f"AR(1) correlated Gaussian errors, {sig}, {corr}"
        nu = "nu sampled" if self.dof is None else f"nu = {self.dof:g} given"
        return f"independent Student-t errors, {sig}, {nu}"


@dataclass(frozen=True)
class NoiseParam:
    """One sampled noise parameter."""

    name: str  # e.g. "sigma[T]"; the sampled value is its transform (see ``what``)
    output: str
    what: str  # "log_sigma", "phi" or "log_nu"
    lower: float  # in the sampled space
    upper: float
    shared: tuple[str, ...] = ()  # further outputs whose sigma this is (a noise group; ``output`` is its first)

    def applies_to(self, output: str) -> bool:
        """Whether this parameter belongs to ``output`` (its own, or its group's shared sigma)."""
        return output == self.output or output in self.shared

    def to_natural(self, z: np.ndarray) -> np.ndarray:
        return np.exp(z) if self.what in ("log_sigma", "log_nu") else np.asarray(z, float)

    def to_sampled(self, v: np.ndarray) -> np.ndarray:
        return np.log(v) if self.what in ("log_sigma", "log_nu") else np.asarray(v, float)

    def log_prior(self, z: np.ndarray) -> np.ndarray:
        """Log prior density in the sampled space (Jacobian included), -inf outside."""
        z = np.asarray(z, float)
        inside = (z >= self.lower) & (z < self.upper) & np.isfinite(z)
        if self.what == "log_nu":
            nu = np.exp(np.clip(z, -50, 50))
            # Gamma(2, 0.1) density of nu: (shape - 1) ln nu - rate nu; plus the Jacobian z
            lp = (NU_GAMMA_SHAPE - 1.0) * z - NU_GAMMA_RATE * nu + z
        else:
            lp = np.zeros_like(z)
        return np.where(inside, lp, -np.inf)

    def describe(self) -> str:
        return {"log_sigma": "p(sigma) ~ 1/sigma (flat in ln sigma)",
                "phi": "uniform on [0, 1)",
                "log_nu": "nu ~ Gamma(2, rate 0.1) on [1, 1000]"}[self.what]


# -- building the models from the study's [noise] tables ---------------------------------------------


def noise_models(noise: dict, outputs: list[str], file: Path | None = None) -> list[NoiseModel]:
    """Validate the ``NoiseSpec`` of every output (``noise``: output -> NoiseSpec; outputs
    without one get sampled-sigma Gaussian noise)."""
    models = []
    groups: dict[str, list[str]] = {}
    for o in outputs:
        spec = noise.get(o)
        if spec is not None and getattr(spec, "group", None) is not None:
            groups.setdefault(spec.group, []).append(o)
    for o in outputs:
        spec = noise.get(o)
        if spec is None:
            models.append(NoiseModel(o, KIND_GAUSSIAN, None))
            continue
        m = _noise_model(spec, Table(dict(spec.options), ("noise", o), file))
        group = getattr(spec, "group", None)
        if group is not None:
            if m.sigma is not None:
                raise SampleError(f"output '{o}' has its sigma given, but it is in the noise group '{group}', "
                                  "which shares one sampled sigma", where=Table({}, ("noise", o), file).where("sigma"),
                                  hint=f"remove its sigma, or take '{o}' out of the group")
            m = replace(m, group=group, shared_with=tuple(g for g in groups[group] if g != o))
        models.append(m)
    return models


def _noise_model(spec, t: Table) -> NoiseModel:
    kind = spec.kind
    allowed = {KIND_GAUSSIAN: (), KIND_AR1: ("phi", "error_time_constant"), KIND_STUDENT: ("dof",)}
    if kind not in allowed:
        raise _sample_error(t, "kind", f"unknown noise kind '{kind}'",
                            "choose one of: " + ", ".join(allowed))
    for key in t.keys():
        if key not in allowed[kind]:
            owner = "ar1" if key in ("phi", "error_time_constant") else "student_t" if key == "dof" else None
            raise _sample_error(t, key, f"'{key}' does not apply to kind = \"{kind}\"",
                                f"it belongs to kind = \"{owner}\"" if owner else None)
    if spec.sigma is not None and not (math.isfinite(spec.sigma) and spec.sigma > 0):
        raise _sample_error(t, "sigma", f"sigma must be positive and finite, got {spec.sigma!r}")
    phi = tau_e = dof = None
    if "phi" in t and "error_time_constant" in t:
        raise _sample_error(t, "phi", "give either phi or error_time_constant, not both",
                            "phi = exp(-spacing / error_time_constant): one determines the other")
    if "phi" in t:
        phi = _checked(t, "phi")
        if not 0.0 <= phi < 1.0:
            raise _sample_error(t, "phi", f"phi must be in [0, 1), got {phi!r}",
                                "the lag-one correlation of the errors at the median spacing")
    if "error_time_constant" in t:
        try:
            tau_e = parse_duration(t.data["error_time_constant"], t.where("error_time_constant"))
        except ConfigError as exc:
            raise SampleError(exc.message, where=exc.where, hint=exc.hint) from None
    if "dof" in t:
        dof = _checked(t, "dof")
        if not dof > 0:
            raise _sample_error(t, "dof", f"dof must be positive, got {dof!r}",
                                "the Student-t degrees of freedom; 3 to 10 suits records with outliers")
    return NoiseModel(spec.output, kind, spec.sigma, phi, tau_e, dof)


def _checked(t: Table, key: str) -> float:
    try:
        return float(t.number(key))
    except ConfigError as exc:
        raise SampleError(exc.message, where=exc.where, hint=exc.hint) from None


def _sample_error(t: Table, key: str | None, message: str, hint: str | None = None) -> SampleError:
    return SampleError(message, where=t.where(key), hint=hint)


def noise_params(models: list[NoiseModel]) -> list[NoiseParam]:
    """The sampled noise parameters, in layout order: per output its ln sigma (one per noise
    group, at the group's first output and shared by the others), phi and ln nu."""
    out = []
    seen_groups: set[str] = set()
    for m in models:
        if m.sigma is None and m.group is None:
            out.append(NoiseParam(f"sigma[{m.output}]", m.output, "log_sigma", -math.inf, math.inf))
        elif m.sigma is None and m.group not in seen_groups:
            seen_groups.add(m.group)
            out.append(NoiseParam(f"sigma[{m.group}]", m.output, "log_sigma", -math.inf, math.inf,
                                  shared=m.shared_with))
        if m.samples_phi:
            out.append(NoiseParam(f"phi[{m.output}]", m.output, "phi", 0.0, PHI_UPPER))
        if m.samples_nu:
            out.append(NoiseParam(f"nu[{m.output}]", m.output, "log_nu", math.log(NU_BOUNDS[0]),
                                  math.log(NU_BOUNDS[1])))
    return out


# -- observation-time structure for AR(1) ----------------------------------------------------------


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


# -- log-likelihoods, batched over sets (rows) -----------------------------------------------------


def loglik_gaussian(R: np.ndarray, sigma: np.ndarray) -> np.ndarray:
    """Sum over columns of log N(R; 0, sigma^2); R (n_sets, n), sigma (n_sets,)."""
    sigma = np.asarray(sigma, float).reshape(-1)
    n = R.shape[1]
    return -0.5 * n * np.log(2 * np.pi * sigma**2) - 0.5 * np.sum(R**2, axis=1) / sigma**2


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


def loglik_student(R: np.ndarray, sigma: np.ndarray, nu: np.ndarray) -> np.ndarray:
    """Sum of Student-t log densities of scale sigma and nu degrees of freedom."""
    sigma = np.asarray(sigma, float).reshape(-1, 1)
    nu = np.asarray(nu, float).reshape(-1, 1)
    n = R.shape[1]
    const = gammaln((nu + 1) / 2) - gammaln(nu / 2) - 0.5 * np.log(nu * np.pi * sigma**2)
    return n * const[:, 0] - 0.5 * np.sum((nu + 1) * np.log1p((R / sigma) ** 2 / nu), axis=1)


def innovations(R: np.ndarray, phi_j: np.ndarray) -> np.ndarray:
    """Standardised AR(1) innovations (e_j - phi_j e_{j-1}) / sqrt(1 - phi_j^2), in sigma units."""
    prev = np.zeros_like(R)
    prev[:, 1:] = R[:, :-1]
    return (R - phi_j * prev) / np.sqrt(1.0 - phi_j**2)


def simulate_errors(kind: str, sigma: np.ndarray, rng: np.random.Generator, n: int,
                    phi_j: np.ndarray | None = None, nu: np.ndarray | None = None) -> np.ndarray:
    """Draws of the error process, one row per set (n_sets, n), for prediction bands."""
    sigma = np.asarray(sigma, float).reshape(-1, 1)
    n_sets = sigma.shape[0]
    if kind == KIND_STUDENT:
        nu = np.asarray(nu, float).reshape(-1, 1)
        return sigma * rng.standard_t(np.broadcast_to(nu, (n_sets, n)))
    z = rng.standard_normal((n_sets, n))
    if kind == KIND_GAUSSIAN:
        return sigma * z
    pj = np.broadcast_to(phi_j, (n_sets, n))
    e = np.empty((n_sets, n))
    scale = np.sqrt(1.0 - pj**2)
    prev = np.zeros(n_sets)
    for j in range(n):
        prev = pj[:, j] * prev + scale[:, j] * z[:, j]
        e[:, j] = prev
    return sigma * e


@dataclass(frozen=True)
class NoiseLayout:
    """Models of every output, the sampled noise parameters and the AR(1) spacing plans."""

    models: tuple[NoiseModel, ...]
    params: tuple[NoiseParam, ...]
    spacing: dict = field(default_factory=dict)  # output -> SpacingPlan (AR(1) outputs)

    def model(self, output: str) -> NoiseModel:
        for m in self.models:
            if m.output == output:
                return m
        raise KeyError(output)

    def values(self, N: np.ndarray, output: str) -> tuple[np.ndarray, np.ndarray | None, np.ndarray | None]:
        """sigma, phi, nu per set (natural units) from the sampled noise columns N (n_sets, n_noise)."""
        m = self.model(output)
        n_sets = N.shape[0]
        sigma = np.full(n_sets, m.sigma if m.sigma is not None else np.nan)
        phi = np.full(n_sets, m.phi) if m.phi is not None else None
        nu = np.full(n_sets, m.dof) if m.dof is not None else None
        for k, p in enumerate(self.params):
            if not p.applies_to(output):
                continue
            v = p.to_natural(N[:, k])
            if p.what == "log_sigma":
                sigma = v
            elif p.what == "phi":
                phi = v
            else:
                nu = v
        return sigma, phi, nu

    def log_prior(self, N: np.ndarray) -> np.ndarray:
        total = np.zeros(N.shape[0])
        for k, p in enumerate(self.params):
            total = total + p.log_prior(N[:, k])
        return total

    def loglik(self, output: str, e: int, R: np.ndarray, N: np.ndarray) -> np.ndarray:
        """Log-likelihood of the residuals R (n_sets, n_used) of ``output`` in experiment ``e``."""
        m = self.model(output)
        sigma, phi, nu = self.values(N, output)
        if m.kind == KIND_GAUSSIAN:
            return loglik_gaussian(R, sigma)
        if m.kind == KIND_STUDENT:
            return loglik_student(R, sigma, nu)
        pj = self.spacing[output].lag_coefficients(e, phi, m.tau_e)
        return loglik_ar1(R, sigma, pj)


def noise_layout(noise: dict, problem, file: Path | None = None) -> NoiseLayout:
    """The noise layout of a problem from ``study.noise`` (output -> NoiseSpec)."""
    models = noise_models(noise, problem.spec.output_names, file)
    spacing = {m.output: spacing_plan(problem, m.output) for m in models if m.kind == KIND_AR1}
    return NoiseLayout(tuple(models), tuple(noise_params(models)), spacing)

"""Noise models of the measured outputs and their log-likelihoods, batched over parameter sets.

Per output the residuals e = measured - model at the compared observations follow one of the
noise kinds registered in :mod:`graybox.posterior.noise_kinds` (one module each):

* ``gaussian``: independent N(0, sigma^2);
* ``ar1``: a stationary Gaussian AR(1) process of marginal standard deviation sigma, with the
  exact likelihood at uneven spacings (:mod:`graybox.posterior.noise_kinds.ar1`);
* ``student_t``: independent Student-t errors of scale sigma and nu degrees of freedom, for
  records with outliers (:mod:`graybox.posterior.noise_kinds.student_t`).

Sampled noise parameters (appended to the free vector, in this order per output): ln sigma
when sigma is not given (prior p(sigma) proportional to 1/sigma, flat in ln sigma, the
Jeffreys prior of a scale); then the kind's own: phi for an AR(1) output with neither
``phi`` nor ``error_time_constant`` given (uniform on [0, 1)); ln nu for a Student-t output
without ``dof`` (nu ~ Gamma(2, rate 0.1), truncated to [1, 1000], the prior of Juarez &
Steel, JASA 105 (2010) 1219-1231; from memory).
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

from graybox.configkit import Table
from graybox.errors import SampleError
from graybox.posterior.noise_kinds import (DEFAULT_KIND, NOISE_KINDS, NOISE_OPTIONS, REGISTRY, NoiseKind, noise_kind,
                                           option_owner)
# re-exported: the likelihoods and the AR(1) spacing plan, for callers of this module
from graybox.posterior.noise_kinds.ar1 import GAP_FACTOR, SpacingPlan, innovations, loglik_ar1, spacing_plan
from graybox.posterior.noise_kinds.base import NoiseParam, option_error
from graybox.posterior.noise_kinds.gaussian import loglik_gaussian
from graybox.posterior.noise_kinds.student_t import loglik_student


SIGMA_PRIOR = "p(sigma) ~ 1/sigma (flat in ln sigma)"


@dataclass(frozen=True)
class NoiseModel:
    """The noise model of one output, validated; its behaviour is its kind's (:attr:`family`)."""

    output: str
    kind: str
    sigma: float | None  # None: sampled
    phi: float | None = None  # AR(1) correlation at the reference spacing, given
    tau_e: float | None = None  # AR(1) error time constant in seconds, given
    dof: float | None = None  # Student-t degrees of freedom, given
    group: str | None = None  # the noise group whose one sigma it shares ([noise.groups])
    shared_with: tuple[str, ...] = ()  # the group's other outputs

    @property
    def family(self) -> NoiseKind:
        """The registered noise kind (:mod:`graybox.posterior.noise_kinds`)."""
        return noise_kind(self.kind)

    def describe(self) -> str:
        """The model in words."""
        sig = "sigma sampled" if self.sigma is None else f"sigma = {self.sigma:g} given"
        if self.group is not None:
            sig = f"sigma[{self.group}] sampled, shared with {', '.join(self.shared_with)}"
        return self.family.describe(self, sig)


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
            models.append(NoiseModel(o, DEFAULT_KIND, None))
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
    if kind not in REGISTRY:
        raise option_error(t, "kind", f"unknown noise kind '{kind}'", "choose one of: " + ", ".join(NOISE_KINDS))
    family = noise_kind(kind)
    for key in t.keys():
        if key not in family.options:
            owner = option_owner(key)
            raise option_error(t, key, f"'{key}' does not apply to kind = \"{kind}\"",
                               f"it belongs to kind = \"{owner}\"" if owner else None)
    if spec.sigma is not None and not (math.isfinite(spec.sigma) and spec.sigma > 0):
        raise option_error(t, "sigma", f"sigma must be positive and finite, got {spec.sigma!r}")
    return NoiseModel(spec.output, kind, spec.sigma, **family.given(t))


def noise_params(models: list[NoiseModel]) -> list[NoiseParam]:
    """The sampled noise parameters, in layout order: per output its ln sigma (one per noise
    group, at the group's first output and shared by the others), then its kind's own."""
    out = []
    seen_groups: set[str] = set()
    for m in models:
        if m.sigma is None and m.group is None:
            out.append(NoiseParam(f"sigma[{m.output}]", m.output, "sigma", True, -math.inf, math.inf, SIGMA_PRIOR))
        elif m.sigma is None and m.group not in seen_groups:
            seen_groups.add(m.group)
            out.append(NoiseParam(f"sigma[{m.group}]", m.output, "sigma", True, -math.inf, math.inf, SIGMA_PRIOR,
                                  shared=m.shared_with))
        out += m.family.sampled(m)
    return out


def simulate_errors(kind: str, sigma: np.ndarray, rng: np.random.Generator, n: int,
                    phi_j: np.ndarray | None = None, nu: np.ndarray | None = None) -> np.ndarray:
    """Draws of the error process of noise kind ``kind``, one row per set (n_sets, n);
    ``phi_j``: the AR(1) lag coefficients (n_sets or 1, n); ``nu``: Student-t degrees of
    freedom per set (see each kind's ``draw``)."""
    return noise_kind(kind).draw(sigma, rng, n, phi_j=phi_j, nu=nu)


@dataclass(frozen=True)
class NoiseLayout:
    """Models of every output, the sampled noise parameters and each output's plan from its
    kind (``spacing``: output -> SpacingPlan for AR(1) outputs)."""

    models: tuple[NoiseModel, ...]
    params: tuple[NoiseParam, ...]
    spacing: dict = field(default_factory=dict)  # output -> its kind's plan (AR(1): SpacingPlan)

    @property
    def sums_suffice(self) -> bool:
        """Whether every output's log-likelihood needs only its sums of squares."""
        return all(m.family.sums_suffice for m in self.models)

    def model(self, output: str) -> NoiseModel:
        """The noise model of ``output``."""
        for m in self.models:
            if m.output == output:
                return m
        raise KeyError(output)

    def values(self, N: np.ndarray, output: str) -> dict[str, np.ndarray]:
        """The noise values of ``output`` per set, natural units, by key ("sigma" and its
        kind's own, e.g. "phi", "nu"; a key is absent when the model has no such value):
        given ones from the model, sampled ones from the noise columns N (n_sets, n_noise)."""
        m = self.model(output)
        n_sets = N.shape[0]
        v = {"sigma": np.full(n_sets, m.sigma if m.sigma is not None else np.nan)}
        v.update({key: np.full(n_sets, value) for key, value in m.family.given_values(m).items()})
        for k, p in enumerate(self.params):
            if p.applies_to(output):
                v[p.key] = p.to_natural(N[:, k])
        return v

    def at(self, n: np.ndarray, output: str) -> dict[str, float]:
        """:meth:`values` at one row ``n`` of noise columns, as floats."""
        return {key: float(a[0]) for key, a in self.values(np.atleast_2d(n), output).items()}

    def log_prior(self, N: np.ndarray) -> np.ndarray:
        """Sum of the noise parameters' log priors (sampled space) per row of N."""
        total = np.zeros(N.shape[0])
        for k, p in enumerate(self.params):
            total = total + p.log_prior(N[:, k])
        return total

    def loglik(self, output: str, e: int, R: np.ndarray, N: np.ndarray) -> np.ndarray:
        """Log-likelihood of the residuals R (n_sets, n_used) of ``output`` in experiment ``e``."""
        m = self.model(output)
        return m.family.loglik(m, self.spacing.get(output), e, R, self.values(N, output))

    def simulate(self, output: str, e: int, N: np.ndarray, rng: np.random.Generator, n: int) -> np.ndarray:
        """Draws (n_sets, n) of the error process of ``output`` in experiment ``e``, one per
        row of N (the sets' sampled noise columns)."""
        m = self.model(output)
        return m.family.simulate(m, self.spacing.get(output), e, self.values(N, output), rng, n)

    def start(self, p: NoiseParam, residuals: list[dict[str, np.ndarray]]) -> tuple[float, float]:
        """Centre and sd of the starting ball of a kind's own sampled parameter ``p``."""
        m = self.model(p.output)
        return m.family.start(m, self.spacing.get(p.output), p, [r[p.output] for r in residuals])

    def entries(self, m: NoiseModel) -> dict:
        """The kind's keys of ``m``'s results.json entry."""
        return m.family.entries(m, self.spacing.get(m.output))


def noise_layout(noise: dict, problem, file: Path | None = None) -> NoiseLayout:
    """The noise layout of a problem: ``noise`` is either the study's validated noise models
    (a sequence of :class:`NoiseModel`, one per measured output, as ``Study.noise_models``
    holds them: used as they are, not validated again) or ``study.noise`` (output ->
    NoiseSpec), validated here."""
    if isinstance(noise, (list, tuple)):
        models = list(noise)
        if [m.output for m in models] != list(problem.spec.output_names):
            raise ValueError("noise models must be given for every measured output, in the model's order")
    else:
        models = noise_models(noise, problem.spec.output_names, file)
    plans = {m.output: m.family.plan(problem, m.output) for m in models}
    spacing = {o: plan for o, plan in plans.items() if plan is not None}
    return NoiseLayout(tuple(models), tuple(noise_params(models)), spacing)


__all__ = ["DEFAULT_KIND", "GAP_FACTOR", "NOISE_KINDS", "NOISE_OPTIONS", "NoiseLayout", "NoiseModel", "NoiseParam",
           "SpacingPlan", "innovations", "loglik_ar1", "loglik_gaussian", "loglik_student", "noise_layout",
           "noise_models", "noise_params", "simulate_errors", "spacing_plan"]

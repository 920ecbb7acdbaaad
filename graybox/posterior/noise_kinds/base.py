"""The protocol every noise kind follows, and the sampled noise parameter.

A noise kind (``kind = "..."`` in ``[noise.OUTPUT]``) is one small class holding everything
that differs between error models: the options it takes, the noise parameters it samples
beyond sigma, the per-output plan it needs from the problem (the AR(1) spacings), its
log-likelihood, its whitened residuals, draws of its errors for prediction bands, its
residual checks, its description and its entries in results.json.  The classes live one
per module in this package and are registered by kind in :mod:`graybox.posterior.noise_kinds`;
the rest of the posterior layer calls them through :class:`NoiseKind` and never compares a
kind's name.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Protocol

import numpy as np

from graybox.configkit import Table
from graybox.errors import ConfigError, SampleError

LogDensity = Callable[[np.ndarray], np.ndarray]


@dataclass(frozen=True)
class NoiseParam:
    """One sampled noise parameter: its name, the output it belongs to, the natural quantity
    it is (``key``: "sigma", or a kind's own, e.g. "phi", "nu"), whether it is sampled as its
    logarithm, its bounds in the sampled space and its prior (flat there unless ``density``)."""

    name: str  # e.g. "sigma[T]"
    output: str
    key: str  # the natural quantity: "sigma", "phi", "nu", ...
    log: bool  # sampled as ln(value)
    lower: float  # in the sampled space
    upper: float
    prior: str  # the prior, in words
    density: LogDensity | None = None  # sampled-space log density (Jacobian included) inside the bounds; None: flat
    upper_open: bool = False  # the upper bound itself is outside the support
    shared: tuple[str, ...] = ()  # further outputs whose sigma this is (a noise group; ``output`` is its first)

    @property
    def what(self) -> str:
        """The sampled quantity: "log_sigma", "phi", "log_nu", ..."""
        return f"log_{self.key}" if self.log else self.key

    def applies_to(self, output: str) -> bool:
        """Whether this parameter belongs to ``output`` (its own, or its group's shared sigma)."""
        return output == self.output or output in self.shared

    def to_natural(self, z: np.ndarray) -> np.ndarray:
        """Natural value (sigma, phi, nu) from the sampled one."""
        return np.exp(z) if self.log else np.asarray(z, float)

    def to_sampled(self, v: np.ndarray) -> np.ndarray:
        """Sampled value from the natural one (inverse of :meth:`to_natural`)."""
        return np.log(v) if self.log else np.asarray(v, float)

    def log_prior(self, z: np.ndarray) -> np.ndarray:
        """Log prior density in the sampled space (Jacobian included), -inf outside."""
        z = np.asarray(z, float)
        inside = (z >= self.lower) & (z < self.upper) & np.isfinite(z)
        lp = np.zeros_like(z) if self.density is None else self.density(z)
        return np.where(inside, lp, -np.inf)

    def describe(self) -> str:
        """The prior, in words."""
        return self.prior


class NoiseKind(Protocol):
    """What a noise kind provides.  ``m`` is the output's validated
    :class:`graybox.posterior.noise.NoiseModel`; ``plan`` what :meth:`plan` built for it (None
    for kinds that need none); ``v``: the noise values by key ("sigma" and the kind's own,
    given or sampled), per parameter set (n_sets,) or, at the posterior median, floats."""

    name: str  # the value of ``kind`` in [noise.OUTPUT]
    options: tuple[str, ...]  # the keys of [noise.OUTPUT] it takes besides sigma, kind (and group)
    sums_suffice: bool  # its log-likelihood needs only the residuals' sum of squares

    def given(self, t: Table) -> dict:
        """Its options from the output's table, validated: NoiseModel fields (phi, tau_e, dof)."""

    def given_values(self, m) -> dict:
        """Its noise values fixed by the study (key -> value), e.g. a given phi."""

    def sampled(self, m) -> list[NoiseParam]:
        """Its sampled parameters beyond sigma, in layout order."""

    def start(self, m, plan, p: NoiseParam, residuals: list[np.ndarray]) -> tuple[float, float]:
        """Centre and standard deviation (sampled space) of the starting ball of its sampled
        parameter ``p``, from the least-squares residuals of each experiment."""

    def plan(self, problem, output: str):
        """What it needs from the problem for this output (None when nothing)."""

    def loglik(self, m, plan, e: int, R: np.ndarray, v: dict) -> np.ndarray:
        """Log-likelihood of residuals R (n_sets, n_used) of experiment ``e``, per set."""

    def whitened(self, m, plan, e: int, r: np.ndarray, v: dict) -> tuple[np.ndarray, np.ndarray]:
        """The residual vector ``r`` of experiment ``e`` made independent under the model (in
        sigma units up to a factor), and the flags of consecutive pairs within one run."""

    def simulate(self, m, plan, e: int, v: dict, rng: np.random.Generator, n: int) -> np.ndarray:
        """Draws of the error process (n_sets, n) for experiment ``e``, for prediction bands."""

    def draw(self, sigma, rng: np.random.Generator, n: int, phi_j=None, nu=None) -> np.ndarray:
        """Draws (n_sets, n) with the parameters resolved per observation: ``phi_j`` the AR(1)
        lag coefficients, ``nu`` the degrees of freedom (each used by its kind only; for
        :func:`graybox.posterior.noise.simulate_errors`)."""

    def checks(self, m, r: np.ndarray, w: np.ndarray, pair: np.ndarray, v: dict) -> list[str]:
        """Warnings where the residuals ``r`` (whitened ``w``) at the posterior median
        contradict the model; ``v`` at the median."""

    def describe(self, m, sig: str) -> str:
        """The model in words; ``sig`` says how sigma is known."""

    def entries(self, m, plan) -> dict:
        """Its keys in results.json ``noise.OUTPUT`` (after ``sigma_given``)."""


def checked_number(t: Table, key: str) -> float:
    """A number from a [noise.OUTPUT] table, a config error re-raised as the sampling layer's."""
    try:
        return float(t.number(key))
    except ConfigError as exc:
        raise SampleError(exc.message, where=exc.where, hint=exc.hint) from None


def option_error(t: Table, key: str | None, message: str, hint: str | None = None) -> SampleError:
    """A located error of a [noise.OUTPUT] key."""
    return SampleError(message, where=t.where(key), hint=hint)


def independent_pairs(r: np.ndarray) -> np.ndarray:
    """Pair flags of an independent-error residual vector: every consecutive pair but the first."""
    pair = np.ones(r.size, bool)
    pair[0] = False
    return pair

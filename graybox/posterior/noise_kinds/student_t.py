"""Independent Student-t errors of scale sigma and nu degrees of freedom, for records with
outliers (e.g. Lange, Little & Taylor, JASA 84 (1989) 881-896).

Without ``dof``, ln nu is sampled: nu ~ Gamma(2, rate 0.1), truncated to [1, 1000] (the prior
of Juarez & Steel, JASA 105 (2010) 1219-1231; from memory).
"""

from __future__ import annotations

import math

import numpy as np
from scipy.special import gammaln

from graybox.configkit import Table
from graybox.posterior.checks import correlated_errors, large_dof
from graybox.posterior.noise_kinds.base import NoiseParam, checked_number, independent_pairs, option_error

NU_BOUNDS = (1.0, 1000.0)
NU_GAMMA_SHAPE, NU_GAMMA_RATE = 2.0, 0.1


def log_nu_prior(z: np.ndarray) -> np.ndarray:
    """Log density of z = ln nu for nu ~ Gamma(2, rate 0.1): (shape - 1) ln nu - rate nu,
    plus the Jacobian z (up to a constant)."""
    nu = np.exp(np.clip(z, -50, 50))
    return (NU_GAMMA_SHAPE - 1.0) * z - NU_GAMMA_RATE * nu + z


def loglik_student(R: np.ndarray, sigma: np.ndarray, nu: np.ndarray) -> np.ndarray:
    """Sum of Student-t log densities of scale sigma and nu degrees of freedom."""
    sigma = np.asarray(sigma, float).reshape(-1, 1)
    nu = np.asarray(nu, float).reshape(-1, 1)
    n = R.shape[1]
    const = gammaln((nu + 1) / 2) - gammaln(nu / 2) - 0.5 * np.log(nu * np.pi * sigma**2)
    return n * const[:, 0] - 0.5 * np.sum((nu + 1) * np.log1p((R / sigma) ** 2 / nu), axis=1)


class StudentT:
    """``kind = "student_t"``: independent Student-t errors; option ``dof``."""

    name = "student_t"
    options = ("dof",)
    sums_suffice = False

    def given(self, t: Table) -> dict:
        """``dof``, positive, when given."""
        if "dof" not in t:
            return {}
        dof = checked_number(t, "dof")
        if not dof > 0:
            raise option_error(t, "dof", f"dof must be positive, got {dof!r}",
                               "the Student-t degrees of freedom; 3 to 10 suits records with outliers")
        return {"dof": dof}

    def sampled(self, m) -> list[NoiseParam]:
        """ln nu, unless ``dof`` is given."""
        if m.dof is not None:
            return []
        return [NoiseParam(f"nu[{m.output}]", m.output, "nu", True, math.log(NU_BOUNDS[0]), math.log(NU_BOUNDS[1]),
                           "nu ~ Gamma(2, rate 0.1) on [1, 1000]", density=log_nu_prior)]

    def given_values(self, m) -> dict:
        """The given degrees of freedom."""
        return {} if m.dof is None else {"nu": m.dof}

    def start(self, m, plan, p: NoiseParam, residuals: list[np.ndarray]) -> tuple[float, float]:
        """ln nu around ln 10, sd 0.2."""
        return math.log(10.0), 0.2

    def plan(self, problem, output: str):
        """Nothing needed."""
        return None

    def loglik(self, m, plan, e: int, R: np.ndarray, v: dict) -> np.ndarray:
        """:func:`loglik_student`."""
        return loglik_student(R, v["sigma"], v["nu"])

    def whitened(self, m, plan, e: int, r: np.ndarray, v: dict) -> tuple[np.ndarray, np.ndarray]:
        """The residuals themselves."""
        return r, independent_pairs(r)

    def simulate(self, m, plan, e: int, v: dict, rng: np.random.Generator, n: int) -> np.ndarray:
        """:meth:`draw`."""
        return self.draw(v["sigma"], rng, n, nu=v["nu"])

    def draw(self, sigma, rng: np.random.Generator, n: int, phi_j=None, nu=None) -> np.ndarray:
        """sigma times standard Student-t draws of nu degrees of freedom."""
        sigma = np.asarray(sigma, float).reshape(-1, 1)
        nu = np.asarray(nu, float).reshape(-1, 1)
        return sigma * rng.standard_t(np.broadcast_to(nu, (sigma.shape[0], n)))

    def checks(self, m, r: np.ndarray, w: np.ndarray, pair: np.ndarray, v: dict) -> list[str]:
        """Correlated residuals; a sampled nu so large that Gaussian errors would do."""
        return [*correlated_errors(m.output, r, pair), *large_dof(m, v.get("nu"))]

    def describe(self, m, sig: str) -> str:
        """In words."""
        nu = "nu sampled" if m.dof is None else f"nu = {m.dof:g} given"
        return f"independent Student-t errors, {sig}, {nu}"

    def entries(self, m, plan) -> dict:
        """The given degrees of freedom."""
        return {"dof_given": m.dof}

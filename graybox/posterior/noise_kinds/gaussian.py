"""Independent Gaussian errors: e_j ~ N(0, sigma^2), the default noise kind."""

from __future__ import annotations

import numpy as np

from graybox.configkit import Table
from graybox.posterior.checks import correlated_errors, given_sigma_mismatch, outliers
from graybox.posterior.noise_kinds.base import NoiseParam, independent_pairs


def loglik_gaussian(R: np.ndarray, sigma: np.ndarray) -> np.ndarray:
    """Sum over columns of log N(R; 0, sigma^2); R (n_sets, n), sigma (n_sets,)."""
    sigma = np.asarray(sigma, float).reshape(-1)
    n = R.shape[1]
    return -0.5 * n * np.log(2 * np.pi * sigma**2) - 0.5 * np.sum(R**2, axis=1) / sigma**2


class Gaussian:
    """``kind = "gaussian"``: independent N(0, sigma^2) errors."""

    name = "gaussian"
    options: tuple[str, ...] = ()
    sums_suffice = True

    def given(self, t: Table) -> dict:
        """No options."""
        return {}

    def given_values(self, m) -> dict:
        """None beyond sigma."""
        return {}

    def sampled(self, m) -> list[NoiseParam]:
        """Nothing beyond sigma."""
        return []

    def start(self, m, plan, p: NoiseParam, residuals: list[np.ndarray]) -> tuple[float, float]:
        """Never called: it samples nothing of its own."""
        raise ValueError(p.name)

    def plan(self, problem, output: str):
        """Nothing needed."""
        return None

    def loglik(self, m, plan, e: int, R: np.ndarray, v: dict) -> np.ndarray:
        """:func:`loglik_gaussian`."""
        return loglik_gaussian(R, v["sigma"])

    def whitened(self, m, plan, e: int, r: np.ndarray, v: dict) -> tuple[np.ndarray, np.ndarray]:
        """The residuals themselves."""
        return r, independent_pairs(r)

    def simulate(self, m, plan, e: int, v: dict, rng: np.random.Generator, n: int) -> np.ndarray:
        """:meth:`draw`."""
        return self.draw(v["sigma"], rng, n)

    def draw(self, sigma, rng: np.random.Generator, n: int, phi_j=None, nu=None) -> np.ndarray:
        """sigma times standard normal draws."""
        sigma = np.asarray(sigma, float).reshape(-1, 1)
        return sigma * rng.standard_normal((sigma.shape[0], n))

    def checks(self, m, r: np.ndarray, w: np.ndarray, pair: np.ndarray, v: dict) -> list[str]:
        """Correlated residuals, outliers, a given sigma far from the scatter."""
        return [*correlated_errors(m.output, r, pair), *outliers(m.output, r, v["sigma"]), *given_sigma_mismatch(m, r)]

    def describe(self, m, sig: str) -> str:
        """In words."""
        return f"independent Gaussian errors, {sig}"

    def entries(self, m, plan) -> dict:
        """No keys of its own."""
        return {}

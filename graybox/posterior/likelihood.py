"""The log-posterior over the sampled vector, batched over walkers.

The sampled vector is the problem's free vector (log-scale entries as their logarithm),
followed by the noise parameters of :mod:`graybox.posterior.noise`.  One call evaluates a
whole batch of rows (emcee's ``vectorize=True`` passes half an ensemble at a time): the rows
inside the prior's support go through one ``problem.predictions`` call, rows outside it or
whose simulation fails get -inf.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from graybox.estimate.problem import Problem
from graybox.posterior.noise import NoiseLayout
from graybox.posterior.priors import Prior, log_prior_sampled


@dataclass
class LogPosterior:
    """Callable Z (n_sets, n_dim) -> log posterior (n_sets,), up to a constant."""

    problem: Problem
    priors: list[Prior]
    layout: NoiseLayout
    n_calls: int = 0
    n_sets: int = 0
    _observed: list = field(default_factory=list, repr=False)

    def __post_init__(self):
        self._observed = [{o: self.problem.observed(e, o) for o in self.problem.spec.output_names}
                          for e in range(len(self.problem.experiments))]

    @property
    def n_free(self) -> int:
        return len(self.priors)

    @property
    def n_dim(self) -> int:
        return self.n_free + len(self.layout.params)

    @property
    def names(self) -> list[str]:
        return [p.name for p in self.priors] + [p.name for p in self.layout.params]

    # -- transforms --------------------------------------------------------------------------
    def free_values(self, Z: np.ndarray) -> np.ndarray:
        """Natural free vectors from sampled rows."""
        Z = np.atleast_2d(Z)
        return np.column_stack([p.from_sampled(Z[:, j]) for j, p in enumerate(self.priors)])

    def natural(self, Z: np.ndarray) -> np.ndarray:
        """Every sampled quantity in natural units (sigma, phi, nu for the noise part)."""
        Z = np.atleast_2d(Z)
        noise = [p.to_natural(Z[:, self.n_free + k]) for k, p in enumerate(self.layout.params)]
        return np.column_stack([self.free_values(Z), *noise]) if noise else self.free_values(Z)

    def sampled(self, V: np.ndarray) -> np.ndarray:
        """Inverse of :meth:`natural`."""
        V = np.atleast_2d(V)
        cols = [p.to_sampled(V[:, j]) for j, p in enumerate(self.priors)]
        cols += [p.to_sampled(V[:, self.n_free + k]) for k, p in enumerate(self.layout.params)]
        return np.column_stack(cols)

    # -- densities ---------------------------------------------------------------------------
    def log_prior(self, Z: np.ndarray) -> np.ndarray:
        Z = np.atleast_2d(Z)
        return log_prior_sampled(self.priors, Z[:, : self.n_free]) + self.layout.log_prior(Z[:, self.n_free:])

    def log_likelihood(self, Z: np.ndarray) -> np.ndarray:
        """Log-likelihood of rows Z (all assumed inside the support)."""
        Z = np.atleast_2d(Z)
        X = self.free_values(Z)
        N = Z[:, self.n_free:]
        preds, ok = self.problem.predictions(X)
        ll = np.zeros(Z.shape[0])
        with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
            for e, pred in enumerate(preds):
                for o in self.problem.spec.output_names:
                    R = self._observed[e][o][None, :] - pred[o]
                    ll = ll + self.layout.loglik(o, e, R, N)
        return np.where(ok & np.isfinite(ll), ll, -np.inf)

    def __call__(self, Z: np.ndarray) -> np.ndarray:
        Z = np.atleast_2d(np.asarray(Z, float))
        lp = self.log_prior(Z)
        inside = np.isfinite(lp)
        out = np.full(Z.shape[0], -np.inf)
        if inside.any():
            self.n_calls += 1
            self.n_sets += int(inside.sum())
            out[inside] = lp[inside] + self.log_likelihood(Z[inside])
        return np.where(np.isnan(out), -np.inf, out)

    def residuals(self, x: np.ndarray) -> list[dict[str, np.ndarray]]:
        """measured - model per experiment and output at one natural free vector."""
        preds, _ = self.problem.predictions(np.atleast_2d(x))
        return [{o: self._observed[e][o] - pred[o][0] for o in self.problem.spec.output_names}
                for e, pred in enumerate(preds)]

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
from graybox.posterior.priors import Prior


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
        bounds = [p.sampled_bounds() for p in self.priors] + [(p.lower, p.upper) for p in self.layout.params]
        self._lo = np.array([b[0] for b in bounds], float)
        self._hi = np.array([b[1] for b in bounds], float)
        self._upper_open = np.array([False] * self.n_free + [p.upper_open for p in self.layout.params])
        self._log_free = np.array([p.log_scale for p in self.priors], bool)
        self._shaped = [j for j, p in enumerate(self.priors) if p.shaped]
        self._log_noise = np.array([p.log for p in self.layout.params], bool)
        self._sums_suffice = self.layout.sums_suffice
        self._shaped_noise = [self.n_free + k for k, p in enumerate(self.layout.params) if p.density is not None]

    @property
    def n_free(self) -> int:
        """The number of free values (the least-squares layout)."""
        return len(self.priors)

    @property
    def n_dim(self) -> int:
        """The number of sampled quantities: free values, then noise parameters."""
        return self.n_free + len(self.layout.params)

    @property
    def names(self) -> list[str]:
        """The names of the sampled quantities, in column order."""
        return [p.name for p in self.priors] + [p.name for p in self.layout.params]

    # -- transforms --------------------------------------------------------------------------
    def free_values(self, Z: np.ndarray) -> np.ndarray:
        """Natural free vectors from sampled rows."""
        X = np.array(np.atleast_2d(Z)[:, : self.n_free], float)
        X[:, self._log_free] = np.exp(X[:, self._log_free])
        return X

    def natural(self, Z: np.ndarray) -> np.ndarray:
        """Every sampled quantity in natural units (sigma, phi, nu for the noise part)."""
        V = np.array(np.atleast_2d(Z), float)
        log = np.concatenate([self._log_free, self._log_noise])
        V[:, log] = np.exp(V[:, log])
        return V

    def sampled(self, V: np.ndarray) -> np.ndarray:
        """Inverse of :meth:`natural`."""
        Z = np.array(np.atleast_2d(V), float)
        log = np.concatenate([self._log_free, self._log_noise])
        Z[:, log] = np.log(Z[:, log])
        return Z

    # -- densities ---------------------------------------------------------------------------
    def log_prior(self, Z: np.ndarray) -> np.ndarray:
        """Sampled-space log prior of rows Z: the same as summing each Prior's and
        NoiseParam's ``log_density_sampled`` / ``log_prior`` (support check, shaped
        densities, log-Jacobians), vectorised over columns."""
        Z = np.atleast_2d(Z)
        inside = np.all((Z >= self._lo) & np.where(self._upper_open, Z < self._hi, Z <= self._hi), axis=1)
        inside &= np.all(np.isfinite(Z), axis=1)
        lp = np.where(inside, 0.0, -np.inf)
        if not inside.any():
            return lp
        Zi = Z[inside]
        total = np.sum(Zi[:, : self.n_free][:, self._log_free], axis=1)  # log-Jacobians of log-scale values
        for j in self._shaped:
            p = self.priors[j]
            total = total + p.log_density(p.from_sampled(Zi[:, j]))
        for c in self._shaped_noise:
            total = total + self.layout.params[c - self.n_free].log_prior(Zi[:, c])
        lp[inside] = total
        return lp

    def log_likelihood(self, Z: np.ndarray) -> np.ndarray:
        """Log-likelihood of rows Z (all assumed inside the support).  With Gaussian noise on
        every output it needs only the sums of squares (the engine's SSE mode: no
        trajectory is kept); AR(1) and Student-t errors need the residuals themselves."""
        Z = np.atleast_2d(Z)
        X = self.free_values(Z)
        N = Z[:, self.n_free:]
        if self._sums_suffice:
            return self._gaussian_from_sums(X, N)
        preds, ok = self.problem.predictions(X)
        ll = np.zeros(Z.shape[0])
        with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
            for e, pred in enumerate(preds):
                for o in self.problem.spec.output_names:
                    R = self._observed[e][o][None, :] - pred[o]
                    ll = ll + self.layout.loglik(o, e, R, N)
        return np.where(ok & np.isfinite(ll), ll, -np.inf)

    def _gaussian_from_sums(self, X: np.ndarray, N: np.ndarray) -> np.ndarray:
        """sum over experiments and outputs of -n/2 log(2 pi sigma^2) - SSE / (2 sigma^2)."""
        sums, ok = self.problem.sse_by_experiment(X)
        ll = np.zeros(X.shape[0])
        with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
            for r, o in enumerate(self.problem.spec.output_names):
                sigma = self.layout.values(N, o)["sigma"]
                for e, sse in enumerate(sums):
                    n = self._observed[e][o].size
                    ll = ll - 0.5 * n * np.log(2 * np.pi * sigma**2) - 0.5 * sse[:, r] / sigma**2
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

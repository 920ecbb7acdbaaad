"""The result of a least-squares fit: each parameter's estimate with its standard error and
interval, and the whole fit (covariance, noise levels, counts, information criteria,
convergence), with the ``results.json`` sections they write (``parameters``, ``fit``,
``noise``: keys are a contract, add and never rename) and the printed summary.  Built by
:func:`graybox.estimate.fit.fit`.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np


@dataclass
class ParameterEstimate:
    """One parameter's result, in its declared units: estimate, standard error and 95%
    interval (Wald, with the result's quantile), whether it was fixed, which bound it sits
    at (interval then one-sided), its guess and bounds, where the interval was cut at a
    bound, and whether the data determine it at all (rank-deficient Jacobian: False)."""

    name: str
    estimate: float
    stderr: float
    ci95: tuple[float, float]
    units: str
    fixed: bool
    at_bound: str | None = None  # "lower" / "upper"
    one_sided: bool = False
    guess: float = float("nan")
    lower: float = -np.inf
    upper: float = np.inf
    clipped: str | None = None  # the Wald interval was cut at this bound: "lower", "upper" or "both"
    determined: bool = True  # False: the data do not determine it (rank-deficient Jacobian)

    def to_dict(self) -> dict:
        """The ``results.json`` entry ``parameters.NAME`` (keys are a contract: add, never rename)."""
        return {
            "estimate": self.estimate,
            "stderr": self.stderr,
            "ci95": list(self.ci95),
            "units": self.units,
            "fixed": self.fixed,
            "at_bound": self.at_bound,
            "interval": "one-sided" if self.one_sided else "two-sided",
            "guess": self.guess,
            "bounds": [self.lower, self.upper],
            "ci95_clipped": self.clipped,
            "determined": self.determined,
        }


@dataclass
class FitResult:
    """A least-squares fit: free-value names and values ``x`` (n_free,), each parameter's
    estimate, covariance and correlation (n_free, n_free), each output's sigma (model units)
    and whether it was estimated, sums of squares overall and per output, observation
    counts, log-likelihood, AIC and BIC, convergence, evaluations, Jacobian rank and
    condition number, the multistart record, wall time (s), warnings, the interval quantile,
    degrees of freedom, the noise groups and the noise-level iteration."""

    names: list[str]
    x: np.ndarray
    parameters: dict[str, ParameterEstimate]
    covariance: np.ndarray
    correlation: np.ndarray
    sigmas: dict[str, float]
    sigma_estimated: dict[str, bool]
    sse: float
    sse_per_output: dict[str, float]
    n_obs: int
    n_obs_per_output: dict[str, int]
    n_free: int
    loglik: float
    aic: float
    bic: float
    converged: bool
    message: str
    nfev: int
    rank: int
    condition: float
    starts: list[dict] = field(default_factory=list)
    wall_s: float = 0.0
    warnings: list[str] = field(default_factory=list)
    quantile: float = 1.96
    dof: int = 0
    noise_groups: dict[str, list[str]] = field(default_factory=dict)  # declared groups sharing one sigma
    reweighting: dict | None = None  # the noise-level iteration, when estimated sigmas change the weights

    def fit_dict(self) -> dict:
        """The ``results.json`` section ``fit``: counts, sums of squares, information criteria, convergence."""
        return {
            "n_obs": self.n_obs,
            "n_free": self.n_free,
            "dof": self.dof,
            "sse": self.sse,
            "sse_per_output": self.sse_per_output,
            "weighted_sse": float(sum(self.sse_per_output[o] / self.sigmas[o] ** 2 for o in self.sigmas)),
            "loglik": self.loglik,
            "aic": self.aic,
            "bic": self.bic,
            "converged": self.converged,
            "message": self.message,
            "nfev": self.nfev,
            "jacobian_rank": self.rank,
            "condition_number": self.condition,
            "interval_quantile": self.quantile,
            "correlation": {"names": self.names, "matrix": self.correlation.tolist()},
            "starts": self.starts,
            "warnings": self.warnings,
            "noise_groups": self.noise_groups,
            "reweighting": self.reweighting,
        }

    def group_of(self, output: str) -> str | None:
        """The declared noise group ``output`` shares its sigma with, if any."""
        for name, members in self.noise_groups.items():
            if output in members:
                return name
        return None

    def noise_dict(self) -> dict:
        """The ``results.json`` section ``noise``: per output its sigma (model units), whether it
        was estimated, its observations and the noise group it shares the sigma with."""
        out = {}
        for o in self.sigmas:
            group = self.group_of(o)
            members = self.noise_groups.get(group, [])
            out[o] = {"sigma": self.sigmas[o], "estimated": self.sigma_estimated[o], "n_obs": self.n_obs_per_output[o],
                      "group": group, "shared_with": [m for m in members if m != o],
                      "group_n_obs": sum(self.n_obs_per_output[m] for m in members) if group else None}
        return out

    def summary(self) -> str:
        """The text ``graybox fit`` prints: status, the parameter table, noise levels and warnings."""
        from graybox.estimate.summary import fit_summary

        return fit_summary(self)

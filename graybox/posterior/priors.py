"""Prior densities of the free values, and the map between values and the sampled space.

A prior is written per parameter in the study file::

    [parameters.UA]
    bounds = [0.5, 500.0]
    prior = { kind = "lognormal", median = 20.0, log_sd = 1.0 }
    log_scale = true          # sample log(UA); the prior stays the one written above

Kinds (the density of the *value* x, truncated to the bounds; constants dropped, since the
sampler only needs the density up to a factor):

* ``uniform`` (the default): flat between the bounds, which must be finite;
* ``normal``: keys ``mean``, ``sd``;
* ``lognormal``: keys ``median``, ``log_sd`` (the standard deviation of ln x), x > 0;
* ``halfnormal``: key ``sd``; a normal of mean zero folded onto x >= 0.

A value with ``log_scale`` is sampled as z = ln x.  The density of z is
p_z(z) = p_x(e^z) |dx/dz| = p_x(e^z) e^z, so ``log p_z = log p_x + z``: the log-Jacobian is
added and the prior stays what the user wrote (change of variables, e.g. Gelman et al.,
*Bayesian Data Analysis*, 3rd ed., section 1.8).

Estimated initial states carry no prior key: flat over their ``initial_bounds`` (improper
when those are infinite; the data determine an initial state sharply, and the least-squares
stage has already refused a problem whose Jacobian is rank-deficient).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

KIND_UNIFORM = "uniform"
KIND_NORMAL = "normal"
KIND_LOGNORMAL = "lognormal"
KIND_HALFNORMAL = "halfnormal"
KIND_FLAT = "flat"  # initial states without finite bounds: improper, never written by users
PRIOR_KINDS = (KIND_UNIFORM, KIND_NORMAL, KIND_LOGNORMAL, KIND_HALFNORMAL)
PRIOR_KEYS = {
    KIND_UNIFORM: (),
    KIND_NORMAL: ("mean", "sd"),
    KIND_LOGNORMAL: ("median", "log_sd"),
    KIND_HALFNORMAL: ("sd",),
}


@dataclass(frozen=True)
class Prior:
    """The prior of one free value, truncated to [lower, upper]."""

    name: str
    kind: str
    lower: float
    upper: float
    log_scale: bool = False
    loc: float = 0.0  # normal: mean; lognormal: ln(median)
    scale: float = 1.0  # normal/halfnormal: sd; lognormal: log_sd

    # -- sampled space ----------------------------------------------------------------------
    def to_sampled(self, x: np.ndarray) -> np.ndarray:
        return np.log(x) if self.log_scale else np.asarray(x, float)

    def from_sampled(self, z: np.ndarray) -> np.ndarray:
        return np.exp(z) if self.log_scale else np.asarray(z, float)

    def sampled_bounds(self) -> tuple[float, float]:
        lo, hi = self.support()
        if self.log_scale:
            return (math.log(lo) if lo > 0 else -math.inf), (math.log(hi) if hi < math.inf else math.inf)
        return lo, hi

    def support(self) -> tuple[float, float]:
        """Where the density is positive: the bounds, cut by the kind's own support."""
        lo, hi = self.lower, self.upper
        if self.kind in (KIND_LOGNORMAL,):
            lo = max(lo, 0.0)
        if self.kind == KIND_HALFNORMAL:
            lo = max(lo, 0.0)
        return lo, hi

    # -- densities --------------------------------------------------------------------------
    def log_density(self, x: np.ndarray) -> np.ndarray:
        """log p_x(x) up to a constant; -inf outside the support."""
        return log_density(self.kind, self.loc, self.scale, self.support(), np.asarray(x, float))

    def log_density_sampled(self, z: np.ndarray) -> np.ndarray:
        """log p_z(z) = log p_x(x(z)) + log|dx/dz| (the log-Jacobian, z itself in log space)."""
        z = np.asarray(z, float)
        x = self.from_sampled(z)
        lp = self.log_density(x)
        if self.log_scale:
            lp = lp + z
        return np.where(np.isfinite(z), lp, -np.inf)

    def describe(self) -> str:
        if self.kind == KIND_UNIFORM:
            text = f"uniform on [{self.lower:g}, {self.upper:g}]"
        elif self.kind == KIND_FLAT:
            text = f"flat (improper) on [{self.lower:g}, {self.upper:g}]"
        elif self.kind == KIND_NORMAL:
            text = f"normal(mean {self.loc:g}, sd {self.scale:g})"
        elif self.kind == KIND_LOGNORMAL:
            text = f"lognormal(median {math.exp(self.loc):g}, log_sd {self.scale:g})"
        else:
            text = f"halfnormal(sd {self.scale:g})"
        if self.kind not in (KIND_UNIFORM, KIND_FLAT) and (np.isfinite(self.lower) or np.isfinite(self.upper)):
            text += f" truncated to [{self.lower:g}, {self.upper:g}]"
        if self.log_scale:
            text += ", sampled in log space"
        return text

    def to_dict(self) -> dict:
        out: dict = {"kind": self.kind, "bounds": [self.lower, self.upper], "log_scale": self.log_scale}
        if self.kind == KIND_NORMAL:
            out.update(mean=self.loc, sd=self.scale)
        elif self.kind == KIND_LOGNORMAL:
            out.update(median=math.exp(self.loc), log_sd=self.scale)
        elif self.kind == KIND_HALFNORMAL:
            out.update(sd=self.scale)
        return out


def log_density(kind: str, loc: float, scale: float, support: tuple[float, float], x: np.ndarray) -> np.ndarray:
    """Unnormalised log density of ``kind`` at ``x``, -inf outside ``support``."""
    lo, hi = support
    inside = (x >= lo) & (x <= hi) & np.isfinite(x)
    with np.errstate(divide="ignore", invalid="ignore"):
        if kind in (KIND_UNIFORM, KIND_FLAT):
            lp = np.zeros_like(x)
        elif kind == KIND_NORMAL:
            lp = -0.5 * ((x - loc) / scale) ** 2
        elif kind == KIND_HALFNORMAL:
            lp = -0.5 * (x / scale) ** 2
        elif kind == KIND_LOGNORMAL:
            lx = np.log(np.where(x > 0, x, 1.0))
            lp = -0.5 * ((lx - loc) / scale) ** 2 - lx
        else:  # pragma: no cover - kinds are validated when priors are built
            raise ValueError(kind)
    return np.where(inside, lp, -np.inf)


def log_prior_sampled(priors: list[Prior], Z: np.ndarray) -> np.ndarray:
    """Sum of the sampled-space log priors over the columns of Z (n_sets, n_free)."""
    Z = np.atleast_2d(Z)
    total = np.zeros(Z.shape[0])
    for j, p in enumerate(priors):
        total = total + p.log_density_sampled(Z[:, j])
    return total

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

Each kind is one small class (:class:`PriorKind`) registered in ``REGISTRY`` by its name:
the one place a kind's name is looked up.  A new prior is one class and one registry entry.

Estimated initial states carry no prior key: flat over their ``initial_bounds`` (improper
when those are infinite; the data determine an initial state sharply, and the least-squares
stage has already refused a problem whose Jacobian is rank-deficient).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Protocol

import numpy as np

from graybox.configkit import Table
from graybox.errors import SampleError



class PriorKind(Protocol):
    """What a prior kind provides; ``p`` is a :class:`Prior` of this kind."""

    name: str  # the value of ``kind`` in a parameter's prior (or "flat", never written by users)
    keys: tuple[str, ...]  # its keys besides ``kind``
    scales: tuple[str, ...]  # those of its keys that must be positive (standard deviations)
    shaped: bool  # its density is not constant on its support
    written: bool  # a study file may name it

    def support(self, lo: float, hi: float) -> tuple[float, float]:
        """Where the density is positive, within the bounds [lo, hi]."""

    def log_density(self, loc: float, scale: float, x: np.ndarray) -> np.ndarray:
        """Unnormalised log density at ``x`` inside the support."""

    def build(self, name: str, lo: float, hi: float, log_scale: bool, values: dict, t: Table,
              proper: bool) -> tuple[Prior, float | None, str | None]:
        """The prior from its validated key ``values``, with the centre that must lie inside the
        bounds and the key to locate an error at (None, None: no further checks)."""

    def describe(self, p: Prior) -> str:
        """The density in words (without truncation or log-space notes)."""

    def entries(self, p: Prior) -> dict:
        """Its keys in results.json ``parameters.NAME.posterior.prior``."""


class Uniform:
    """``uniform`` (the default): flat between the bounds, which must be finite."""

    name, keys, scales, shaped, written = "uniform", (), (), False, True

    def support(self, lo: float, hi: float) -> tuple[float, float]:
        """The bounds."""
        return lo, hi

    def log_density(self, loc: float, scale: float, x: np.ndarray) -> np.ndarray:
        """Zero."""
        return np.zeros_like(x)

    def build(self, name, lo, hi, log_scale, values, t, proper):
        """Refused on infinite bounds, or recorded as flat when sampling will not run."""
        if not (math.isfinite(lo) and math.isfinite(hi)):
            if not proper:
                return Prior(name, KIND_FLAT, lo, hi, log_scale), None, None
            where = t.where("kind" if "kind" in t else None)  # no prior written: the parent's line
            raise SampleError(f"parameter '{name}' has a uniform prior (the default) but its bounds "
                              f"[{lo:g}, {hi:g}] are not both finite", where=where,
                              hint="give finite bounds = [low, high], or a normal, lognormal or halfnormal prior "
                                   "(or turn sampling off: [sampling] enabled = false, or --no-sample)")
        return Prior(name, self.name, lo, hi, log_scale), None, None

    def describe(self, p: Prior) -> str:
        """In words."""
        return f"uniform on [{p.lower:g}, {p.upper:g}]"

    def entries(self, p: Prior) -> dict:
        """None of its own."""
        return {}


class Flat(Uniform):
    """``flat``: improper flat over infinite bounds (estimated initial states, or a uniform
    prior when sampling is off); never written by users."""

    name, written = "flat", False

    def describe(self, p: Prior) -> str:
        """In words."""
        return f"flat (improper) on [{p.lower:g}, {p.upper:g}]"


class Normal:
    """``normal``: keys ``mean``, ``sd``."""

    name, keys, scales, shaped, written = "normal", ("mean", "sd"), ("sd",), True, True

    def support(self, lo: float, hi: float) -> tuple[float, float]:
        """The bounds."""
        return lo, hi

    def log_density(self, loc: float, scale: float, x: np.ndarray) -> np.ndarray:
        """-((x - mean) / sd)^2 / 2."""
        return -0.5 * ((x - loc) / scale) ** 2

    def build(self, name, lo, hi, log_scale, values, t, proper):
        """Centred at the mean."""
        return Prior(name, self.name, lo, hi, log_scale, values["mean"], values["sd"]), values["mean"], "mean"

    def describe(self, p: Prior) -> str:
        """In words."""
        return f"normal(mean {p.loc:g}, sd {p.scale:g})"

    def entries(self, p: Prior) -> dict:
        """mean, sd."""
        return {"mean": p.loc, "sd": p.scale}


class LogNormal:
    """``lognormal``: keys ``median``, ``log_sd`` (the standard deviation of ln x), x > 0."""

    name, keys, scales, shaped, written = "lognormal", ("median", "log_sd"), ("log_sd",), True, True

    def support(self, lo: float, hi: float) -> tuple[float, float]:
        """The bounds, above zero."""
        return max(lo, 0.0), hi

    def log_density(self, loc: float, scale: float, x: np.ndarray) -> np.ndarray:
        """-((ln x - ln median) / log_sd)^2 / 2 - ln x."""
        lx = np.log(np.where(x > 0, x, 1.0))
        return -0.5 * ((lx - loc) / scale) ** 2 - lx

    def build(self, name, lo, hi, log_scale, values, t, proper):
        """A positive median; centred at it."""
        if not values["median"] > 0:
            raise SampleError(f"a lognormal prior needs a positive median, got {values['median']!r}",
                              where=t.where("median"))
        prior = Prior(name, self.name, lo, hi, log_scale, math.log(values["median"]), values["log_sd"])
        return prior, values["median"], "median"

    def describe(self, p: Prior) -> str:
        """In words."""
        return f"lognormal(median {math.exp(p.loc):g}, log_sd {p.scale:g})"

    def entries(self, p: Prior) -> dict:
        """median, log_sd."""
        return {"median": math.exp(p.loc), "log_sd": p.scale}


class HalfNormal:
    """``halfnormal``: key ``sd``; a normal of mean zero folded onto x >= 0."""

    name, keys, scales, shaped, written = "halfnormal", ("sd",), ("sd",), True, True

    def support(self, lo: float, hi: float) -> tuple[float, float]:
        """The bounds, from zero."""
        return max(lo, 0.0), hi

    def log_density(self, loc: float, scale: float, x: np.ndarray) -> np.ndarray:
        """-(x / sd)^2 / 2."""
        return -0.5 * (x / scale) ** 2

    def build(self, name, lo, hi, log_scale, values, t, proper):
        """Bounds that reach above zero; centred at max(lower, 0)."""
        prior = Prior(name, self.name, lo, hi, log_scale, 0.0, values["sd"])
        if hi <= 0:
            raise SampleError(f"a halfnormal prior lives on values >= 0, but the bounds of '{name}' are "
                              f"[{lo:g}, {hi:g}]", where=t.where("kind"),
                              hint="use a normal prior, or bounds that include positive values")
        return prior, max(lo, 0.0), "sd"

    def describe(self, p: Prior) -> str:
        """In words."""
        return f"halfnormal(sd {p.scale:g})"

    def entries(self, p: Prior) -> dict:
        """sd."""
        return {"sd": p.scale}


REGISTRY: dict[str, PriorKind] = {k.name: k for k in (Uniform(), Normal(), LogNormal(), HalfNormal(), Flat())}
KIND_UNIFORM = Uniform.name
KIND_FLAT = Flat.name  # initial states without finite bounds: improper, never written by users
PRIOR_KINDS = tuple(k.name for k in REGISTRY.values() if k.written)  # what a study file may name
PRIOR_KEYS = {name: REGISTRY[name].keys for name in PRIOR_KINDS}


def prior_kind(name: str) -> PriorKind:
    """The registered prior kind called ``name`` (validated names only)."""
    return REGISTRY[name]


def written_kinds() -> tuple[str, ...]:
    """The prior kinds a study file may name, in registry order (read at each call)."""
    return tuple(k.name for k in REGISTRY.values() if k.written)


@dataclass(frozen=True)
class Prior:
    """The prior of one free value, truncated to [lower, upper]; its density is its kind's
    (:attr:`family`)."""

    name: str
    kind: str
    lower: float
    upper: float
    log_scale: bool = False
    loc: float = 0.0  # normal: mean; lognormal: ln(median)
    scale: float = 1.0  # normal/halfnormal: sd; lognormal: log_sd

    @property
    def family(self) -> PriorKind:
        """The registered prior kind."""
        return prior_kind(self.kind)

    @property
    def shaped(self) -> bool:
        """Whether the density varies on its support (not uniform or flat)."""
        return self.family.shaped

    # -- sampled space ----------------------------------------------------------------------
    def to_sampled(self, x: np.ndarray) -> np.ndarray:
        """The sampled value (ln x with ``log_scale``)."""
        return np.log(x) if self.log_scale else np.asarray(x, float)

    def from_sampled(self, z: np.ndarray) -> np.ndarray:
        """The value from the sampled one."""
        return np.exp(z) if self.log_scale else np.asarray(z, float)

    def sampled_bounds(self) -> tuple[float, float]:
        """The support in the sampled space."""
        lo, hi = self.support()
        if self.log_scale:
            return (math.log(lo) if lo > 0 else -math.inf), (math.log(hi) if hi < math.inf else math.inf)
        return lo, hi

    def support(self) -> tuple[float, float]:
        """Where the density is positive: the bounds, cut by the kind's own support."""
        return self.family.support(self.lower, self.upper)

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
        """The prior in words."""
        text = self.family.describe(self)
        if self.shaped and (np.isfinite(self.lower) or np.isfinite(self.upper)):
            text += f" truncated to [{self.lower:g}, {self.upper:g}]"
        if self.log_scale:
            text += ", sampled in log space"
        return text

    def to_dict(self) -> dict:
        """results.json ``parameters.NAME.posterior.prior``."""
        out: dict = {"kind": self.kind, "bounds": [self.lower, self.upper], "log_scale": self.log_scale}
        out.update(self.family.entries(self))
        return out


def log_density(kind: str, loc: float, scale: float, support: tuple[float, float], x: np.ndarray) -> np.ndarray:
    """Unnormalised log density of ``kind`` at ``x``, -inf outside ``support``."""
    lo, hi = support
    inside = (x >= lo) & (x <= hi) & np.isfinite(x)
    with np.errstate(divide="ignore", invalid="ignore"):
        lp = prior_kind(kind).log_density(loc, scale, x)
    return np.where(inside, lp, -np.inf)


def log_prior_sampled(priors: list[Prior], Z: np.ndarray) -> np.ndarray:
    """Sum of the sampled-space log priors over the columns of Z (n_sets, n_free)."""
    Z = np.atleast_2d(Z)
    total = np.zeros(Z.shape[0])
    for j, p in enumerate(priors):
        total = total + p.log_density_sampled(Z[:, j])
    return total

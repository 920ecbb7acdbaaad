"""The ``[sampling]`` table and the priors written under ``[parameters.NAME]``.

::

    [sampling]
    enabled = true          # sample after the least-squares stage
    walkers = 32            # default: max(32, 4 x dimension), rounded up to even
    max_steps = 20000       # step limit; a run stopped by it is reported as not converged
    check_every = 500       # steps between convergence checks
    seed = 7                # default: the study's seed
    min_ess = 400           # effective sample size every sampled quantity must reach
    rhat_max = 1.01         # rank-normalised split R-hat bound
    tau_factor = 50         # chain length must exceed this many autocorrelation times
    band_draws = 400        # posterior draws behind the credible and prediction bands
    progress = "auto"       # progress bar: "auto" (when stderr is a terminal), true, false
    moves = "differential"  # proposal: "differential" (differential evolution) or "stretch"
                            # (the affine-invariant stretch move)
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np

from graybox.configkit import Table
from graybox.errors import ConfigError, SampleError
from graybox.posterior.priors import (KIND_FLAT, KIND_LOGNORMAL, KIND_NORMAL, KIND_UNIFORM, PRIOR_KEYS,
                                      PRIOR_KINDS, Prior)

SAMPLING_KEYS = ("enabled", "walkers", "max_steps", "check_every", "seed", "min_ess", "rhat_max", "tau_factor",
                 "band_draws", "progress", "moves")
MOVES = ("differential", "stretch")
PROGRESS_CHOICES = ("auto", True, False)


@dataclass(frozen=True)
class SamplerSettings:
    """How the posterior stage runs (see the module docstring for the keys)."""

    enabled: bool = True
    walkers: int | None = None  # None: max(32, 4 * n_dim), rounded up to even, at run time
    max_steps: int = 20000
    check_every: int = 500
    seed: int | None = None  # None: the study's seed
    min_ess: float = 400.0
    rhat_max: float = 1.01
    tau_factor: float = 50.0
    tau_rtol: float = 0.01  # the autocorrelation estimate must be stable within this over the last check
    band_draws: int = 400
    progress: str | bool = "auto"
    moves: str = "differential"

    def n_walkers(self, n_dim: int) -> int:
        """The walker count for ``n_dim`` sampled quantities."""
        if self.walkers is not None:
            return int(self.walkers)
        n = max(32, 4 * n_dim)
        return n + (n % 2)


def sampler_settings(table: Table, overrides: dict | None = None) -> SamplerSettings:
    """Settings from the ``[sampling]`` table, then ``overrides`` (CLI options; keys of
    ``SAMPLING_KEYS``, a value of None means "not given")."""
    table.check_keys(SAMPLING_KEYS)
    st = SamplerSettings()
    values: dict = {}
    if "enabled" in table:
        values["enabled"] = table.boolean("enabled")
    for key, minimum in (("walkers", 2), ("max_steps", 1), ("check_every", 1), ("seed", 0), ("band_draws", 10)):
        if key in table:
            values[key] = int(table.number(key, integer=True, minimum=minimum))
    if "min_ess" in table:
        values["min_ess"] = table.number("min_ess", positive=True)
    if "tau_factor" in table:
        values["tau_factor"] = table.number("tau_factor", positive=True)
    if "rhat_max" in table:
        values["rhat_max"] = table.number("rhat_max", positive=True)
        if not values["rhat_max"] > 1.0:
            raise table.error("rhat_max", f"must be above 1, got {values['rhat_max']!r}",
                              hint="1.01 is the usual bound (Vehtari et al. 2021)")
    if "progress" in table:
        value = table.get("progress")
        if value not in PROGRESS_CHOICES:
            raise table.error("progress", f"must be \"auto\", true or false, got {value!r}")
        values["progress"] = value
    if "moves" in table:
        values["moves"] = table.string("moves", choices=MOVES)
    if "walkers" in values and values["walkers"] % 2:
        raise table.error("walkers", f"must be even (the ensemble is updated in two halves), got {values['walkers']}")
    st = replace(st, **values)
    return apply_overrides(st, overrides or {})


def apply_overrides(st: SamplerSettings, overrides: dict) -> SamplerSettings:
    """Replace settings by the given non-None overrides, checked like the table's keys."""
    given = {k: v for k, v in overrides.items() if v is not None}
    for key in given:
        if key not in SAMPLING_KEYS:
            raise SampleError(f"unknown sampler option '{key}'", hint="options: " + ", ".join(SAMPLING_KEYS))
    table = Table(given, ("sampling (command-line options)",))
    checked = sampler_settings(table) if given else SamplerSettings()
    return replace(st, **{k: getattr(checked, k) for k in given})


# -- priors ---------------------------------------------------------------------------------------------


def priors_from_spec(spec, problem, file: Path | None = None) -> list[Prior]:
    """One prior per entry of ``problem.free`` (local parameters get theirs once per
    experiment), validated; ``file`` (the study file) only sharpens error locations."""
    for p in spec.parameters:
        if p.fixed and p.prior is not None:
            t = Table({"prior": p.prior}, ("parameters", p.name), file)
            raise SampleError(f"parameter '{p.name}' is fixed, so it cannot have a prior", where=t.where("prior"),
                              hint="remove the prior, or set fixed = false to estimate it")
    by_name = {p.name: _prior_of(p, file) for p in spec.parameters if not p.fixed}
    out = []
    for f in problem.free:
        if f.kind == "parameter":
            base = by_name[spec.parameters[f.index].name]
            out.append(replace(base, name=f.name))
        else:
            finite = math.isfinite(f.lower) and math.isfinite(f.upper)
            out.append(Prior(f.name, KIND_UNIFORM if finite else KIND_FLAT, f.lower, f.upper))
    return out


def _prior_of(p, file: Path | None) -> Prior:
    raw = p.prior if p.prior is not None else {"kind": KIND_UNIFORM}
    t = Table(dict(raw), ("parameters", p.name, "prior"), file)
    try:
        kind = t.string("kind", KIND_UNIFORM, PRIOR_KINDS)
        t.check_keys(("kind", *PRIOR_KEYS[kind]))
        values = {k: t.number(k) for k in PRIOR_KEYS[kind]}
    except ConfigError as exc:
        raise SampleError(exc.message, where=exc.where, hint=exc.hint) from None
    for key in ("sd", "log_sd"):
        if key in values and not values[key] > 0:
            raise SampleError(f"the prior's {key} must be positive, got {values[key]!r}", where=t.where(key),
                              hint="a scale of a prior is a standard deviation: a positive number")
    lo, hi = float(p.lower), float(p.upper)
    if kind == KIND_UNIFORM:
        if not (math.isfinite(lo) and math.isfinite(hi)):
            raise SampleError(f"parameter '{p.name}' has a uniform prior (the default) but its bounds "
                              f"[{lo:g}, {hi:g}] are not both finite", where=t.where("kind" if "kind" in t else None),
                              hint="give finite bounds = [low, high], or a normal, lognormal or halfnormal prior")
        return Prior(p.name, kind, lo, hi, p.log_scale)
    if kind == KIND_NORMAL:
        prior = Prior(p.name, kind, lo, hi, p.log_scale, values["mean"], values["sd"])
        centre, key = values["mean"], "mean"
    elif kind == KIND_LOGNORMAL:
        if not values["median"] > 0:
            raise SampleError(f"a lognormal prior needs a positive median, got {values['median']!r}",
                              where=t.where("median"))
        prior = Prior(p.name, kind, lo, hi, p.log_scale, math.log(values["median"]), values["log_sd"])
        centre, key = values["median"], "median"
    else:
        prior = Prior(p.name, kind, lo, hi, p.log_scale, 0.0, values["sd"])
        centre, key = 0.0, "sd"
        if hi <= 0:
            raise SampleError(f"a halfnormal prior lives on values >= 0, but the bounds of '{p.name}' are "
                              f"[{lo:g}, {hi:g}]", where=t.where("kind"),
                              hint="use a normal prior, or bounds that include positive values")
        centre = max(lo, 0.0)
    s_lo, s_hi = prior.support()
    if not s_lo < s_hi:
        raise SampleError(f"the {kind} prior of '{p.name}' puts no probability inside its bounds [{lo:g}, {hi:g}]",
                          where=t.where("kind"))
    if not lo <= centre <= hi:
        raise SampleError(f"the prior of '{p.name}' is centred at {centre:g}, outside its bounds [{lo:g}, {hi:g}]",
                          where=t.where(key),
                          hint="move the prior inside the bounds, or widen the bounds if the prior is right")
    if not lo <= p.guess <= hi or not np.isfinite(prior.log_density(np.array([p.guess])))[0]:
        raise SampleError(f"the guess of '{p.name}' ({p.guess:g}) has zero prior probability", where=t.where("kind"))
    return prior

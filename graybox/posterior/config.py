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
from graybox.posterior.priors import KIND_FLAT, KIND_UNIFORM, Prior, prior_kind, written_kinds

SAMPLING_KEYS = ("enabled", "walkers", "max_steps", "check_every", "seed", "min_ess", "rhat_max", "tau_factor",
                 "band_draws", "progress", "moves")
MOVES = ("differential", "stretch")
PROGRESS_CHOICES = ("auto", True, False)
# Upper limits: far above any useful run, low enough that a typo (a walker count in the
# millions) is refused at once instead of exhausting memory minutes into the run.  The chain
# alone holds walkers x steps x dimension numbers of 8 bytes.
LIMITS = {"walkers": 10_000, "max_steps": 1_000_000, "check_every": 1_000_000, "band_draws": 100_000,
          "seed": 2**63 - 1}
MAX_WALKER_STEPS = 50_000_000  # walkers x max_steps: 400 MB of chain per sampled quantity


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
    tau_rtol: float = 0.05  # floor of the bound on tau's drift within the kept chain (last quarter against the first three; the bound follows tau's noise)
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
            if values[key] > LIMITS[key]:
                raise table.error(key, f"must be at most {LIMITS[key]:,}, got {values[key]:,}",
                                  hint=_LIMIT_HINTS.get(key))
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
    _check_chain_size(st, table)
    return apply_overrides(st, overrides or {})


def _check_chain_size(st: SamplerSettings, table: Table) -> None:
    """Refuse walkers x max_steps above ``MAX_WALKER_STEPS`` (located at the key ``table`` gives)."""
    if st.walkers is None or st.walkers * st.max_steps <= MAX_WALKER_STEPS:
        return
    key = "walkers" if "walkers" in table else "max_steps"
    raise table.error(key, f"walkers x max_steps = {st.walkers:,} x {st.max_steps:,} is more than the "
                           f"{MAX_WALKER_STEPS:,} allowed (the chain would not fit in memory)",
                      hint="fewer walkers or fewer steps: 32 to 100 walkers and 20,000 steps are typical")


_LIMIT_HINTS = {"walkers": "32 to 100 walkers are typical; more rarely helps (the default: max(32, 4 x dimension))",
                "max_steps": "20,000 steps are typical; a run that needs far more is better reparametrised"}


def apply_overrides(st: SamplerSettings, overrides: dict) -> SamplerSettings:
    """Replace settings by the given non-None overrides, checked like the table's keys; an
    error names the command-line option (``walkers`` -> ``--walkers``)."""
    given = {k: v for k, v in overrides.items() if v is not None}
    for key in given:
        if key not in SAMPLING_KEYS:
            raise SampleError(f"unknown sampler option '{key}'", hint="options: " + ", ".join(SAMPLING_KEYS))
    if not given:
        return st
    table = Table(given, ("sampling (command-line options)",))
    try:
        checked = sampler_settings(table)
        merged = replace(st, **{k: getattr(checked, k) for k in given})
        _check_chain_size(merged, table)
    except ConfigError as exc:
        key = exc.where.rsplit("key '", 1)[-1].rstrip("'") if exc.where and "key '" in exc.where else None
        where = f"command-line option --{key.replace('_', '-')}" if key else exc.where
        raise ConfigError(exc.message, where=where, hint=exc.hint) from None
    return merged


# -- priors ---------------------------------------------------------------------------------------------


def priors_from_spec(spec, problem, file: Path | None = None) -> list[Prior]:
    """One prior per entry of ``problem.free`` (local parameters get theirs once per
    experiment), validated; ``file`` (the study file) only sharpens error locations."""
    return expand_priors(parameter_priors(spec, file), spec, problem)


def parameter_priors(spec, file: Path | None = None, *, proper: bool = True) -> dict[str, Prior]:
    """The prior of every free parameter (by name), from the study file alone: what
    ``graybox.load_study`` checks before any data is read.

    ``proper``: sampling will run, so a uniform prior (the default) needs finite bounds.
    Without it (sampling off) such a prior is recorded as flat (improper) instead of refused;
    every other check (kind, keys, scales, centre and guess inside the bounds) runs either way."""
    for p in spec.parameters:
        if p.fixed and p.prior is not None:
            t = Table({"prior": p.prior}, ("parameters", p.name), file)
            raise SampleError(f"parameter '{p.name}' is fixed, so it cannot have a prior", where=t.where("prior"),
                              hint="remove the prior, or set fixed = false to estimate it")
    return {p.name: _prior_of(p, file, proper) for p in spec.parameters if not p.fixed}


def expand_priors(base: dict[str, Prior], spec, problem) -> list[Prior]:
    """One prior per entry of ``problem.free``: a parameter's from ``base`` (see
    :func:`parameter_priors`), renamed per experiment for local parameters; an estimated
    initial state's flat over its initial bounds."""
    out = []
    for f in problem.free:
        if f.kind == "parameter":
            out.append(replace(base[spec.parameters[f.index].name], name=f.name))
        else:
            finite = math.isfinite(f.lower) and math.isfinite(f.upper)
            out.append(Prior(f.name, KIND_UNIFORM if finite else KIND_FLAT, f.lower, f.upper))
    return out


def _prior_of(p, file: Path | None, proper: bool = True) -> Prior:
    t = Table(dict(p.prior) if p.prior is not None else {}, ("parameters", p.name, "prior"), file)
    try:
        kind = t.string("kind", KIND_UNIFORM, written_kinds())
        family = prior_kind(kind)
        t.check_keys(("kind", *family.keys))
        values = {k: t.number(k) for k in family.keys}
    except ConfigError as exc:
        raise SampleError(exc.message, where=exc.where, hint=exc.hint) from None
    for key in family.scales:
        if not values[key] > 0:
            raise SampleError(f"the prior's {key} must be positive, got {values[key]!r}", where=t.where(key),
                              hint="a scale of a prior is a standard deviation: a positive number")
    lo, hi = float(p.lower), float(p.upper)
    prior, centre, key = family.build(p.name, lo, hi, p.log_scale, values, t, proper)
    if centre is None:
        return prior
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

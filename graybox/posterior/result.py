"""The posterior sample and everything reported about it: per-quantity summaries, the
results.json dictionaries (parameters, noise, sampler), the summary text, samples.npz and
the corner and trace plots.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import emcee
import numpy as np

from graybox.posterior.config import SamplerSettings
from graybox.posterior.convergence import STABILITY_PART, Check, finite_or_none
from graybox.posterior.diagnostics import CI95, RHAT_NOTE, group_count, quantile_mcse
from graybox.posterior.noise import NoiseLayout
from graybox.posterior.priors import Prior

REPRODUCIBILITY = ("identical samples need the same study file, data, seed, walker count, step limit and check "
                   "interval, the same simulation engine, platform and versions of graybox, numpy, scipy and emcee "
                   "(floating-point results can differ between CPUs, BLAS builds and compiled-core versions)")


def _mcse_text(v: float | None) -> str:
    """A Monte Carlo standard error in the summary table: two significant digits, "n/a" when
    not computed."""
    return "n/a" if v is None else f"{v:.2g}"


def quantity_stats(x: np.ndarray, check: Check, d: int, converged: bool) -> dict:
    """Summary of one quantity's post-burn-in draws ``x`` (n_walkers, n_draws), with the
    Monte Carlo standard errors of the mean, the median and the interval ends (the last two
    by :func:`graybox.posterior.diagnostics.quantile_mcse`, the walkers as chains)."""
    flat = x.ravel()
    lo, med, hi = np.quantile(flat, [CI95[0], 0.5, CI95[1]])
    sd = float(np.std(flat, ddof=1))
    ess_mean = float(check.ess_mean[d])
    return {
        "median": float(med),
        "mean": float(np.mean(flat)),
        "sd": sd,
        "ci95": [float(lo), float(hi)],
        "mcse_mean": float(sd / math.sqrt(ess_mean)) if ess_mean > 0 else None,
        "mcse_median": finite_or_none(quantile_mcse(x, 0.5)),
        "mcse_ci95": [finite_or_none(quantile_mcse(x, CI95[0])), finite_or_none(quantile_mcse(x, CI95[1]))],
        "ess": finite_or_none(check.ess[d]),
        "ess_tail": finite_or_none(check.ess_tail[d]),
        "ess_ci95": finite_or_none(check.ess_ci95[d]),
        "rhat": finite_or_none(check.rhat[d]),
        "converged": converged,
    }


@dataclass(frozen=True, eq=False)
class PosteriorResult:
    """The chain and everything reported about it."""

    names: list[str]  # free values, then noise parameters ("sigma[T]", "phi[T]", "nu[T]")
    n_free: int
    chain: np.ndarray  # (n_walkers, n_steps, n_dim), natural units
    log_prob: np.ndarray  # (n_walkers, n_steps)
    burn_in: int
    thin: int
    tau: np.ndarray
    acceptance: np.ndarray  # per walker
    converged: bool
    reason: str
    check: Check
    history: list[dict]
    priors: list[Prior]
    layout: NoiseLayout
    settings: SamplerSettings
    seed: int
    start_method: str
    fit_x: np.ndarray
    warnings: list[str] = field(default_factory=list)
    n_evaluations: int = 0
    wall_s: float = 0.0
    engine: str = ""
    stats: dict = field(default_factory=dict)  # name -> quantity_stats

    # -- shapes ---------------------------------------------------------------------------------
    @property
    def n_walkers(self) -> int:
        """The walker count."""
        return int(self.chain.shape[0])

    @property
    def n_steps(self) -> int:
        """The steps run."""
        return int(self.chain.shape[1])

    @property
    def free_names(self) -> list[str]:
        """The names of the free values."""
        return self.names[: self.n_free]

    @property
    def noise_names(self) -> list[str]:
        """The names of the sampled noise parameters."""
        return self.names[self.n_free:]

    def post_burn(self) -> np.ndarray:
        """(n_walkers, n_steps - burn_in, n_dim)."""
        return self.chain[:, self.burn_in:, :]

    def flat(self) -> np.ndarray:
        """Post-burn-in, thinned draws of every quantity: (n_draws, n_dim)."""
        return self.chain[:, self.burn_in::self.thin, :].reshape(-1, self.chain.shape[2])

    def draws(self, n: int, rng: np.random.Generator, include_noise: bool = False) -> np.ndarray:
        """``n`` draws of the free vector (natural units) from the post-burn-in thinned chain;
        without replacement when the chain holds enough.  With ``include_noise`` the noise
        parameters (natural units) follow the free values in each row."""
        flat = self.flat()
        idx = rng.choice(flat.shape[0], size=n, replace=n > flat.shape[0])
        rows = flat[idx]
        return rows if include_noise else rows[:, : self.n_free]

    def median(self) -> np.ndarray:
        """The post-burn-in median of every quantity (natural units)."""
        return np.median(self.post_burn().reshape(-1, self.chain.shape[2]), axis=0)

    # -- reporting ------------------------------------------------------------------------------
    def to_parameters_dict(self) -> dict:
        """Per free value: {"posterior": {...}} (results.json ``parameters.NAME.posterior``)."""
        out = {}
        for j, name in enumerate(self.free_names):
            out[name] = {"posterior": {**self.stats[name], "prior": self.priors[j].to_dict()}}
        return out

    def to_noise_dict(self) -> dict:
        """Per output: the noise model and, for its sampled noise parameters,
        ``posterior.{sigma, phi, nu}.{median, mean, sd, ci95, ess, rhat, ...}``."""
        out = {}
        for m in self.layout.models:
            entry: dict = {"kind": m.kind, "model": m.describe(), "sigma_given": m.sigma, **self.layout.entries(m)}
            post = {}
            for p in self.layout.params:
                if p.applies_to(m.output):  # its own, or its noise group's shared sigma
                    post[p.key] = {**self.stats[p.name], "prior": p.describe()}
            entry["posterior"] = post
            entry["warnings"] = [w for w in self.warnings if w.startswith(f"{m.output}:")]
            out[m.output] = entry
        return out

    def sampler_dict(self) -> dict:
        """results.json ``sampler``: settings, steps, burn-in and thinning, tau, acceptance, the
        stop rule's criteria and checks, start, seed and reproducibility, evaluations, warnings."""
        return {
            "method": "emcee EnsembleSampler, vectorized over half-ensembles",
            "moves": self.settings.moves,
            "walkers": self.n_walkers,
            "steps": self.n_steps,
            "max_steps": self.settings.max_steps,
            "check_every": self.settings.check_every,
            "burn_in": self.burn_in,
            "thin": self.thin,
            "draws": int(self.flat().shape[0]),
            "tau": {n: finite_or_none(t) for n, t in zip(self.names, self.tau)},
            "acceptance": float(np.mean(self.acceptance)),
            "acceptance_min": float(np.min(self.acceptance)),
            "converged": self.converged,
            "reason": self.reason,
            "criteria": {"tau_factor": self.settings.tau_factor, "tau_rtol": self.settings.tau_rtol,
                         "rhat_max": self.settings.rhat_max, "min_ess": self.settings.min_ess,
                         "rhat_note": RHAT_NOTE, "rhat_walker_groups": group_count(self.n_walkers),
                         "tau_compared_with": f"its estimate on the first {STABILITY_PART:.0%} of the kept chain, less "
                                              "the estimator's expected creep; bound max(tau_rtol, 2 sd of that "
                                              "difference)",
                         "ess_of": "bulk, tail (5%, 95%) and interval ends (2.5%, 97.5%)"},
            "checks": self.history,
            "start": self.start_method,
            "seed": self.seed,
            "seed_note": "numpy Generator(SeedSequence([seed, 0x706f7374])) draws the start and seeds emcee's "
                         "RandomState",
            "reproducibility": REPRODUCIBILITY,
            "emcee_version": emcee.__version__,
            "engine": self.engine,
            "evaluations": self.n_evaluations,
            "wall_s": self.wall_s,
            "warnings": list(self.warnings),
        }

    def summary(self) -> str:
        """The text the command line prints: status, per quantity the median and the 95% credible
        interval with their Monte Carlo standard errors, ESS and R-hat; priors, noise model, warnings."""
        status = "converged" if self.converged else "NOT CONVERGED"
        lines = [f"posterior ({status}): {self.n_walkers} walkers x {self.n_steps} steps, burn-in {self.burn_in}, "
                 f"thin {self.thin}, acceptance {np.mean(self.acceptance):.2f}, {self.wall_s:.1f} s"]
        lines.append(f"  {self.reason}")
        if not self.converged:
            lines.append("  these numbers are NOT final: the chain did not meet the convergence criteria")
        width = max(len(n) for n in self.names)
        lines.append(f"  {'':{width}}  {'median':>12} {'(MCSE)':>9} {'95% credible interval':>29} "
                     f"{'(MCSE of the ends)':>20} {'ESS':>7} {'R-hat':>7}")
        for n in self.names:
            s = self.stats[n]
            lo, hi = s["ci95"]
            m_lo, m_hi = s["mcse_ci95"]
            ess = s["ess"] if s["ess"] is not None else float("nan")
            rhat = s["rhat"] if s["rhat"] is not None else float("nan")
            lines.append(f"  {n:{width}}  {s['median']:12.6g} {_mcse_text(s['mcse_median']):>9} "
                         f"[{lo:13.6g}, {hi:13.6g}] {'(' + _mcse_text(m_lo) + ', ' + _mcse_text(m_hi) + ')':>20} "
                         f"{ess:7.0f} {rhat:7.4f}")
        lines.append("  MCSE: Monte Carlo standard error of the median and of each interval end (Vehtari et al. 2021, "
                     "section 4.4), from the chain's effective sample size")
        lines.append("  priors:")
        for p in self.priors:
            lines.append(f"    {p.name}: {p.describe()}")
        for p in self.layout.params:
            lines.append(f"    {p.name}: {p.describe()}")
        lines.append("  noise model:")
        for m in self.layout.models:
            lines.append(f"    {m.output}: {m.describe()}")
        lines.append(f"  note: {RHAT_NOTE}")
        for w in self.warnings:
            lines.append(f"  warning: {w}")
        return "\n".join(lines)

    # -- files ----------------------------------------------------------------------------------
    def save_samples(self, path: str | Path) -> None:
        """samples.npz: chain (walker x step x quantity, natural units), log_prob (walker x
        step), names, n_free, burn_in, thin, converged, and which quantities were sampled in
        log space."""
        log_sampled = [p.log_scale for p in self.priors] + [p.log for p in self.layout.params]
        np.savez_compressed(
            Path(path), chain=self.chain, log_prob=self.log_prob, names=np.array(self.names, dtype=str),
            n_free=np.int64(self.n_free), burn_in=np.int64(self.burn_in), thin=np.int64(self.thin),
            converged=np.bool_(self.converged), log_sampled=np.array(log_sampled, bool),
            tau=self.tau, seed=np.int64(self.seed),
        )

    def write_plots(self, folder: str | Path) -> list[Path]:
        """corner.png and trace.png in ``folder``; their paths."""
        from graybox.posterior.plots import corner_plot, trace_plot

        folder = Path(folder)
        return [corner_plot(self, folder / "corner.png"), trace_plot(self, folder / "trace.png")]

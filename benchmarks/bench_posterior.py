"""Benchmark: the posterior sampling stage against emcee driven the obvious way.

Model: the heated vessel of ../shared/bench/baseline.py (M cp dT/dt = F cp (T_in - T) + Q -
UA (T - T_amb); UA, cp and the initial temperature free), built through graybox's
build_spec, on its 10,000-sample record (10 s spacing), the temperature simulated exactly
under held inputs (baseline.exact) plus Gaussian noise of sd 0.05 K.  Sampled: UA, cp, T0
and sigma.

* graybox: least squares, then ``run_posterior`` with the default settings (walkers
  max(32, 4 x 4) = 32, convergence checks every 500 steps) until converged, timed.
* baseline: the same emcee ensemble and move with one ``baseline.baseline`` call (one scipy
  solve_ivp over the whole record) per walker per step, vectorize=False; timed on a short
  fixed number of steps (default 2) in the same run and extrapolated linearly to the step
  count graybox needed.  Extrapolating per step is honest for a fixed-cost-per-evaluation
  baseline: every step evaluates every walker once.

Run:  python benchmarks/bench_posterior.py [--baseline-steps 2] [--max-steps N] [--demo]
``--max-steps`` caps the graybox run (the report then says "not converged" and gives the
per-step ratio only); ``--demo`` also times the sampling stage of the bundled demo study.
"""

from __future__ import annotations

import argparse
import importlib.util
import os
import sys
import time
from dataclasses import replace
from pathlib import Path

import emcee
import numpy as np

ROOT = Path(__file__).resolve().parents[1]
BASELINE = ROOT.parent / "shared" / "bench" / "baseline.py"


def load_baseline():
    spec = importlib.util.spec_from_file_location("bench_baseline", BASELINE)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def vessel_spec(base):
    from graybox.configkit import Table
    from graybox.model.build import build_spec

    model = {
        "name": "bench_heated_vessel",
        "states": {"T": {"units": "degC", "rate": "(F*cp*(T_in - T) + Q - UA*(T - T_amb)) / (M*cp)",
                         "initial": "estimate", "initial_bounds": [0.0, 100.0]}},
        "inputs": {"F": "kg/s", "T_in": "degC", "Q": "W", "T_amb": "degC"},
        "constants": {"M": {"value": float(base.M), "units": "kg"}},
    }
    params = {"UA": {"guess": 100.0, "bounds": [1.0, 2000.0], "units": "W/K"},
              "cp": {"guess": 4000.0, "bounds": [1000.0, 10000.0], "units": "J/(kg*K)"}}
    return build_spec(Table(model, ("model",)), Table(params, ("parameters",)))


def vessel_problem(base, n: int, sigma: float, seed: int):
    from graybox.data.record import record_from_arrays
    from graybox.estimate.problem import Experiment, Problem
    from graybox.simulate import Engine, plan

    rec = base.make_record(n, seed)
    y = base.exact(base.THETA, rec) + np.random.default_rng(seed + 1).normal(0, sigma, n)
    spec = vessel_spec(base)
    record = record_from_arrays("vessel", rec["t"], {k: rec[k] for k in ("F", "T_in", "Q", "T_amb")}, {"T": y})
    return Problem(spec, [Experiment("vessel", plan(spec, record))], Engine(spec, "auto")), rec, y


def baseline_per_step(base, rec, y, sigma: float, x_start: np.ndarray, n_walkers: int, steps: int, seed: int) -> float:
    """Seconds per ensemble step of emcee with one solve_ivp call per walker."""

    def log_prob(theta):
        ua, cp, t0, log_s = theta
        if not (1.0 <= ua <= 2000.0 and 1000.0 <= cp <= 10000.0 and 0.0 <= t0 <= 100.0):
            return -np.inf
        s = np.exp(log_s)
        model = base.baseline((ua, cp, t0), rec)
        return float(-y.size * np.log(s) - 0.5 * np.sum((y - model) ** 2) / s**2)

    rng = np.random.default_rng(seed)
    p0 = x_start + 1e-4 * np.abs(x_start) * rng.standard_normal((n_walkers, x_start.size))
    sampler = emcee.EnsembleSampler(n_walkers, x_start.size, log_prob, moves=emcee.moves.DEMove())
    state = sampler.run_mcmc(p0, 1)  # the initial evaluation is not a step: excluded
    t0 = time.perf_counter()
    sampler.run_mcmc(state, steps)
    return (time.perf_counter() - t0) / steps


def run_vessel(args) -> dict:
    from graybox.estimate.fit import FitSettings, fit
    from graybox.config import NoiseSpec
    from graybox.posterior import SamplerSettings, run_posterior

    base = load_baseline()
    prob, rec, y = vessel_problem(base, args.samples, args.sigma, args.seed)
    t0 = time.perf_counter()
    res = fit(prob, FitSettings(sigmas={}))
    t_fit = time.perf_counter() - t0
    st = SamplerSettings(progress=False)
    if args.max_steps:
        st = replace(st, max_steps=args.max_steps)
    t0 = time.perf_counter()
    post = run_posterior(prob, res, {"T": NoiseSpec("T", None)}, st, seed=args.seed)
    t_graybox = time.perf_counter() - t0
    x_start = np.array([*res.x, np.log(res.sigmas["T"])])
    per_step = baseline_per_step(base, rec, y, args.sigma, x_start, post.n_walkers, args.baseline_steps, args.seed)
    return {"engine": prob.engine.name, "fit_s": t_fit, "graybox_s": t_graybox, "steps": post.n_steps,
            "walkers": post.n_walkers, "converged": post.converged, "reason": post.reason,
            "baseline_per_step_s": per_step, "baseline_extrapolated_s": per_step * post.n_steps,
            "graybox_per_step_s": t_graybox / post.n_steps, "post": post}


def run_demo(args) -> dict:
    from graybox import load_study
    from graybox.estimate.fit import fit
    from graybox.posterior import run_posterior
    from graybox.stages import prepare

    study = load_study(ROOT / "configs" / "storage_vessel.toml", sampler_options={"max_steps": args.max_steps or None})
    prepared = prepare(study)
    res = fit(prepared.problem, study.fit)
    st = replace(study.sampler, progress=False)
    t0 = time.perf_counter()
    post = run_posterior(prepared.problem, res, study.noise, st, seed=study.seed, file=study.path)
    return {"demo_s": time.perf_counter() - t0, "post": post, "n_obs": prepared.problem.n_obs,
            "engine": prepared.engine.name}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--samples", type=int, default=10_000)
    ap.add_argument("--sigma", type=float, default=0.05)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--baseline-steps", type=int, default=2)
    ap.add_argument("--max-steps", type=int, default=0, help="cap the graybox run (0: to convergence or 20000)")
    ap.add_argument("--demo", action="store_true", help="also time the demo study's sampling stage")
    args = ap.parse_args(argv)
    cores = len(os.sched_getaffinity(0))
    print(f"cores available: {cores}; python {sys.version.split()[0]}; emcee {emcee.__version__}")
    r = run_vessel(args)
    post = r["post"]
    print(f"heated vessel, {args.samples} samples, engine {r['engine']}: least squares {r['fit_s']:.1f} s")
    print(f"graybox sampling: {r['walkers']} walkers x {r['steps']} steps in {r['graybox_s']:.1f} s "
          f"({1e3 * r['graybox_per_step_s']:.2f} ms/step); {'converged' if r['converged'] else 'NOT CONVERGED'}")
    print(f"  {r['reason']}")
    print(f"baseline (solve_ivp per walker per step): {r['baseline_per_step_s']:.2f} s/step measured on "
          f"{args.baseline_steps} steps; extrapolated to {r['steps']} steps: {r['baseline_extrapolated_s']:.0f} s")
    print(f"speed-up (per step, same walkers, same run): {r['baseline_per_step_s'] / r['graybox_per_step_s']:.0f}x")
    for name in post.names:
        s = post.stats[name]
        lo, hi = s["ci95"]
        print(f"  {name}: median {s['median']:.6g}, 95% [{lo:.6g}, {hi:.6g}], ESS {s['ess'] or 0:.0f}")
    if args.demo:
        d = run_demo(args)
        p = d["post"]
        print(f"demo study ({d['n_obs']} observations, engine {d['engine']}): sampling stage {d['demo_s']:.1f} s, "
              f"{p.n_walkers} walkers x {p.n_steps} steps, {'converged' if p.converged else 'NOT CONVERGED'}")
    return 0


if __name__ == "__main__":
    sys.exit(main())

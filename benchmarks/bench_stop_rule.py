"""Benchmark and soundness study of the sampler's stop rule (issue 13, section 6).

The stop rule of ``graybox.posterior.sample.check_convergence`` (kept chain > 50 tau after
burn-in, tau within its own estimation noise of its estimate on the first three quarters,
R-hat < 1.01 across four walker groups, bulk, tail and interval-end ESS >= 400) against
the rule it replaced (preserved below as ``old_rule`` and selected through
``run_posterior``'s private ``_criterion``: tau on the whole chain, changed by less than a
fixed 1% since the previous check, chain > 50 tau, R-hat < 1.01 across single walkers, bulk
and tail ESS >= 400), on three studies, the same sampler settings for both rules:

* ``tank``: an invented drained tank, A dh/dt = q_in - Cd a sqrt(2 g h) (A = 3 m^2, outlet
  a = 20 cm^2, Cd = 0.62 to be estimated), the level logged every 5 s for 36 h (25,920
  rows, 25,919 compared observations) in cm, the inflow (L/s, held) stepping between 2 and
  5 L/s every 20-120 min, level noise of sd 2 mm (sigma estimated): one coefficient and
  sigma; checks every 100 steps;
* ``demo``: the bundled storage-vessel study (configs/storage_vessel.toml);
* ``two_tanks``: two invented drained tanks in series (C1, C2, both levels logged every
  10 s for 12 h, each level's sigma estimated): four sampled quantities; checks every 100
  steps.  (The demo's study file checks every 100 steps too.)

For each: the posterior stage (``run_posterior``, after least squares, timed alone, on as
many threads as ``graybox.posterior.sample.sampler_threads`` gives) with the new rule and
with the old one, then a reference chain ten times as long as the new rule's (another
seed, one check at its end), and each 95% interval end compared with the reference's:
z = (end - end_ref) / sqrt(mcse^2 + mcse_ref^2), the Monte Carlo standard errors of the
quantiles (Vehtari et al. 2021, section 4.4).  Agreement: every |z| < 3.

The study files and CSV logs are written to a temporary folder by this script.

Run:  python benchmarks/bench_stop_rule.py [--models tank,demo,two_tanks] [--no-old]
      [--out benchmarks/results/stop_rule.txt]   (the default; "-" writes no file)
Target (issue 13): the tank's posterior stage under 30 s on 2 cores, intervals equal to the
10x reference's within Monte Carlo error.
"""

from __future__ import annotations

import argparse
import math
import os
import sys
import tempfile
import time
from dataclasses import replace
from datetime import datetime, timedelta, timezone
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from graybox.posterior.diagnostics import DIAGNOSTIC_KEYS, autocorr_time, chain_diagnostics, rhat_rank  # noqa: E402
from graybox.posterior.convergence import Check, burn_and_thin  # noqa: E402
from graybox.posterior.sample import sampler_threads  # noqa: E402

G = 9.80665
START = datetime(2026, 3, 2, tzinfo=timezone.utc)


# ---------------------------------------------------------------------------------------------
# the rule that was replaced, preserved here only


OLD_TAU_RTOL = 0.01  # the old rule's fixed bound on tau's change between checks


def old_rule(chain: np.ndarray, prev: Check | None, st, always_diagnose: bool = False) -> Check:
    """The stop rule before issue 13 (graybox/posterior/sample.py before this change): tau
    on the whole chain (burn-in included), chain longer than 50 tau_max, the largest
    relative change of tau since the previous check below 1% (none at the first check),
    rank-normalised split R-hat < 1.01 across single walkers, bulk and tail ESS >= 400 (the
    interval-end ESS not required)."""
    steps, _, n_dim = chain.shape
    tau = autocorr_time(chain)
    change = np.full(n_dim, np.inf) if prev is None else np.abs(prev.tau - tau) / tau
    bound = np.full(n_dim, OLD_TAU_RTOL)
    burn, _ = burn_and_thin(tau, steps)
    long_enough = bool(steps > st.tau_factor * float(np.max(tau)))
    stable = bool(np.all(change < bound))
    if (long_enough and stable) or always_diagnose:
        diag = chain_diagnostics(chain[burn:])
        diag["rhat"] = np.array([rhat_rank(chain[burn:, :, d].T) for d in range(n_dim)])  # walkers as chains
    else:
        diag = {k: np.full(n_dim, np.nan) for k in DIAGNOSTIC_KEYS}
    with np.errstate(invalid="ignore"):
        rhat_ok = bool(np.all(diag["rhat"] < st.rhat_max))
        ess_ok = bool(np.all(np.minimum(diag["ess"], diag["ess_tail"]) >= st.min_ess))
    return Check(steps, tau, change, bound, burn, diag["rhat"], diag["ess"], diag["ess_tail"], diag["ess_mean"],
                 diag["ess_ci95"], long_enough, stable, rhat_ok, ess_ok)


# ---------------------------------------------------------------------------------------------
# invented scenarios


def held_steps(rng: np.random.Generator, n: int, dt: float, lo: float, hi: float, minutes=(20, 120)) -> np.ndarray:
    """A piecewise-constant signal: a new level in [lo, hi] every 20-120 min."""
    out = np.empty(n)
    i = 0
    while i < n:
        k = int(rng.uniform(*minutes) * 60 / dt)
        out[i:i + k] = rng.uniform(lo, hi)
        i += k
    return out


def rk4_held(rate, x0: np.ndarray, u: np.ndarray, dt: float, sub: int = 20) -> np.ndarray:
    """States at every sample under inputs held over each interval: classical RK4 with
    ``sub`` sub-steps per interval (error far below the noise at these time constants)."""
    x = np.array(x0, float)
    out = np.empty((len(u), x.size))
    out[0] = x
    h = dt / sub
    for k in range(len(u) - 1):
        for _ in range(sub):
            k1 = rate(x, u[k])
            k2 = rate(x + h / 2 * k1, u[k])
            k3 = rate(x + h / 2 * k2, u[k])
            k4 = rate(x + h * k3, u[k])
            x = x + h / 6 * (k1 + 2 * k2 + 2 * k3 + k4)
        out[k + 1] = x
    return out


def stamps(n: int, dt: float) -> list[str]:
    return [(START + timedelta(seconds=i * dt)).isoformat().replace("+00:00", "Z") for i in range(n)]


def write_csv(path: Path, columns: dict[str, np.ndarray], n: int, dt: float, fmt: dict[str, str]) -> None:
    names = list(columns)
    lines = ["timestamp," + ",".join(names)]
    for i, ts in enumerate(stamps(n, dt)):
        lines.append(ts + "," + ",".join(format(columns[c][i], fmt[c]) for c in names))
    path.write_text("\n".join(lines) + "\n")


TANK_TOML = """# Invented benchmark study: a drained tank, the outlet coefficient estimated.
[study]
name = "drained_tank"
seed = 1301

[model.states.h]
units = "m"
rate = "(q_in - Cd*a*sqrt(2*g*max(h, 0.0))) / A"
initial = "measured"

[model.inputs]
q_in = "m**3/s"

[model.constants]
A = { value = 3.0, units = "m**2" }
a = { value = 0.002, units = "m**2" }
g = { value = 9.80665, units = "m/s**2" }

[parameters.Cd]
guess = 0.5
bounds = [0.1, 1.2]

[data]
files = ["tank_log.csv"]
time_column = "timestamp"
time_format = "iso"

[data.tags.h]
tag = "LT101_level_cm"
units = "cm"

[data.tags.q_in]
tag = "FT100_inflow_l_s"
units = "L/s"

[noise.h]
sigma = "estimate"
"""

TWO_TANKS_TOML = """# Invented benchmark study: two drained tanks in series, both outlet coefficients estimated.
[study]
name = "two_tanks"
seed = 1302

[model.states.h1]
units = "m"
rate = "(q_in - C1*a1*sqrt(2*g*max(h1, 0.0))) / A1"
initial = "measured"

[model.states.h2]
units = "m"
rate = "(C1*a1*sqrt(2*g*max(h1, 0.0)) - C2*a2*sqrt(2*g*max(h2, 0.0))) / A2"
initial = "measured"

[model.inputs]
q_in = "m**3/s"

[model.constants]
A1 = { value = 1.5, units = "m**2" }
A2 = { value = 2.0, units = "m**2" }
a1 = { value = 0.0015, units = "m**2" }
a2 = { value = 0.002, units = "m**2" }
g = { value = 9.80665, units = "m/s**2" }

[parameters.C1]
guess = 0.5
bounds = [0.1, 1.2]

[parameters.C2]
guess = 0.5
bounds = [0.1, 1.2]

[data]
files = ["two_tanks_log.csv"]
time_column = "timestamp"
time_format = "iso"

[data.tags.h1]
tag = "LT201_level_cm"
units = "cm"

[data.tags.h2]
tag = "LT202_level_cm"
units = "cm"

[data.tags.q_in]
tag = "FT200_inflow_l_s"
units = "L/s"

[noise.h1]
sigma = "estimate"

[noise.h2]
sigma = "estimate"
"""

SAMPLING = "\n[sampling]\ncheck_every = {check_every}\nprogress = false\n"


def write_tank(folder: Path, check_every: int, hours: float = 36.0, dt: float = 5.0) -> Path:
    rng = np.random.default_rng(1301)
    n = int(hours * 3600 / dt)
    A, a, cd = 3.0, 0.002, 0.62
    q = held_steps(rng, n, dt, 0.002, 0.005)
    h0 = (q[0] / (cd * a * math.sqrt(2 * G))) ** 2

    def rate(x, u):
        return np.array([(u - cd * a * math.sqrt(2 * G * max(x[0], 0.0))) / A])

    h = rk4_held(rate, [h0], q, dt, sub=5)[:, 0] + rng.normal(0.0, 0.002, n)
    write_csv(folder / "tank_log.csv", {"LT101_level_cm": 100 * h, "FT100_inflow_l_s": 1000 * q}, n, dt,
              {"LT101_level_cm": ".3f", "FT100_inflow_l_s": ".4f"})
    path = folder / "tank.toml"
    path.write_text(TANK_TOML + SAMPLING.format(check_every=check_every))
    return path


def write_two_tanks(folder: Path, check_every: int, hours: float = 12.0, dt: float = 10.0) -> Path:
    rng = np.random.default_rng(1302)
    n = int(hours * 3600 / dt)
    A1, A2, a1, a2, c1, c2 = 1.5, 2.0, 0.0015, 0.002, 0.6, 0.65
    q = held_steps(rng, n, dt, 0.0015, 0.004)
    k1, k2 = c1 * a1 * math.sqrt(2 * G), c2 * a2 * math.sqrt(2 * G)
    x0 = [(q[0] / k1) ** 2, (q[0] / k2) ** 2]

    def rate(x, u):
        o1 = k1 * math.sqrt(max(x[0], 0.0))
        return np.array([(u - o1) / A1, (o1 - k2 * math.sqrt(max(x[1], 0.0))) / A2])

    x = rk4_held(rate, x0, q, dt, sub=5)
    h1 = x[:, 0] + rng.normal(0.0, 0.002, n)
    h2 = x[:, 1] + rng.normal(0.0, 0.003, n)
    write_csv(folder / "two_tanks_log.csv", {"LT201_level_cm": 100 * h1, "LT202_level_cm": 100 * h2,
                                             "FT200_inflow_l_s": 1000 * q}, n, dt,
              {"LT201_level_cm": ".3f", "LT202_level_cm": ".3f", "FT200_inflow_l_s": ".4f"})
    path = folder / "two_tanks.toml"
    path.write_text(TWO_TANKS_TOML + SAMPLING.format(check_every=check_every))
    return path


# ---------------------------------------------------------------------------------------------
# runs


def prepared_fit(path: Path):
    """Study, prepared problem, least-squares result, sampler settings, priors (the stages
    before sampling, not timed)."""
    from graybox import load_study
    from graybox.estimate.fit import fit
    from graybox.posterior import priors_from_spec
    from graybox.stages import prepare

    study = load_study(path)
    prepared = prepare(study)
    res = fit(prepared.problem, study.fit)
    st = replace(study.sampler, progress=False)
    priors = priors_from_spec(study.spec, prepared.problem, study.path)
    return study, prepared.problem, res, st, priors


def sample(ctx, st, seed: int, criterion=None, threads: int | None = None):
    from graybox.posterior import run_posterior

    study, problem, res, _, priors = ctx
    t0, c0 = time.perf_counter(), time.process_time()
    post = run_posterior(problem, res, study.noise, st, seed, priors=priors, file=study.path, _criterion=criterion,
                         _threads=threads)
    wall, cpu = time.perf_counter() - t0, time.process_time() - c0
    CPU[id(post)] = cpu
    return post, wall


CPU: dict[int, float] = {}  # process CPU seconds of each run (all threads), by id of its result


def load_text() -> str:
    """The 1-minute load average against the cores (other work on the machine slows the wall time)."""
    try:
        return f"load average {os.getloadavg()[0]:.1f}"
    except OSError:
        return "load average n/a"


def compare(post, ref) -> list[tuple[str, str, float, float, float, float, float]]:
    """Per quantity and interval end: (name, end, value, reference, mcse, mcse_ref, z)."""
    rows = []
    for name in post.names:
        s, r = post.stats[name], ref.stats[name]
        for k, end in enumerate(("2.5%", "97.5%")):
            m, mr = s["mcse_ci95"][k], r["mcse_ci95"][k]
            z = (s["ci95"][k] - r["ci95"][k]) / math.sqrt(m**2 + mr**2)
            rows.append((name, end, s["ci95"][k], r["ci95"][k], m, mr, z))
    return rows


def describe_old(post) -> str:
    """The old rule's outcome in its own terms (run_posterior's reason text describes the new rule)."""
    if not post.converged:
        return post.reason
    return (f"stopped after {post.n_steps} steps: chain > 50 x tau_max, tau changed < {100 * OLD_TAU_RTOL:g}% since "
            f"the previous check, R-hat across walkers < 1.01, bulk and tail ESS >= 400")


def calibration(ctx, st, n_seeds: int, echo) -> float:
    """The reported Monte Carlo errors against the spread they describe: ``n_seeds`` runs of
    the new rule (seeds 1, 2, ...), per interval end the standard deviation over the runs
    divided by the root-mean-square MCSE they reported; returns the root-mean-square of
    that ratio over the ends (1 when the MCSE is right; its sampling error is about
    1 / sqrt(2 (n_seeds - 1)) per end)."""
    ends, mcse, steps = [], [], []
    for seed in range(1, n_seeds + 1):
        post, _ = sample(ctx, st, seed)
        ends.append([post.stats[n]["ci95"][k] for n in post.names for k in (0, 1)])
        mcse.append([post.stats[n]["mcse_ci95"][k] for n in post.names for k in (0, 1)])
        steps.append(post.n_steps)
    ends, mcse = np.array(ends), np.array(mcse)
    ratio = ends.std(axis=0, ddof=1) / np.sqrt(np.mean(mcse**2, axis=0))
    overall = float(np.sqrt(np.mean(ratio**2)))
    echo(f"  calibration, {n_seeds} seeds (steps {min(steps)}-{max(steps)}): spread of each interval end over the "
         f"runs / its reported MCSE: {', '.join(f'{r:.2f}' for r in ratio)}; overall {overall:.2f} "
         f"(sampling error about {1 / math.sqrt(2 * (n_seeds - 1)):.2f} per end)")
    return overall


def study_one(label: str, path: Path, run_old: bool, echo, n_calibrate: int = 0) -> dict:
    ctx = prepared_fit(path)
    study, problem, res, st, _ = ctx
    seed = study.seed
    sample(ctx, replace(st, max_steps=20, check_every=20), seed)  # warm-up: compiled kernels loaded, caches filled
    new, t_new = sample(ctx, st, seed)
    echo(f"\n== {label}: {study.name} ({len(new.names)} sampled: {', '.join(new.names)}; {res.n_obs:,} observations; "
         f"{new.n_walkers} walkers, check every {st.check_every} steps, "
         f"{sampler_threads(problem.engine.name)} thread(s), {problem.engine.name} engine) ==")
    echo(f"  new rule: {new.n_steps} steps, {t_new:.1f} s wall ({CPU[id(new)]:.1f} s CPU, {load_text()}), converged "
         f"{new.converged}; tau_max {float(np.max(new.tau)):.2f}, burn-in {new.burn_in}")
    echo(f"    {new.reason}")
    if label == "tank":  # the same samples on one thread: what the threads bring
        one, t_one = sample(ctx, st, seed, threads=1)
        same = np.array_equal(one.chain, new.chain)
        echo(f"  new rule on one thread: {one.n_steps} steps, {t_one:.1f} s wall ({load_text()}); identical samples "
             f"{same}; threads speed-up {t_one / t_new:.2f}x")
    out = {"label": label, "n_obs": res.n_obs, "n_sampled": len(new.names), "steps_new": new.n_steps,
           "s_new": t_new, "cpu_new": CPU[id(new)], "converged_new": new.converged}
    n_ref = 10 * new.n_steps
    ref, t_ref = sample(ctx, replace(st, max_steps=n_ref, check_every=n_ref), seed + 1)
    echo(f"  reference: {ref.n_steps} steps (seed {seed + 1}), {t_ref:.1f} s wall, burn-in {ref.burn_in}, "
         f"converged {ref.converged}")
    rows = compare(new, ref)
    echo(f"  new rule against the reference:")
    echo(f"  {'quantity':<12} {'end':>6} {'at the stop':>14} {'reference':>14} {'MCSE':>10} {'MCSE ref':>10} "
         f"{'z':>6}")
    for name, end, v, vr, m, mr, z in rows:
        echo(f"  {name:<12} {end:>6} {v:14.7g} {vr:14.7g} {m:10.3g} {mr:10.3g} {z:6.2f}")
    zmax = max(abs(r[-1]) for r in rows)
    echo(f"  largest |z| = {zmax:.2f}: " + ("agree within Monte Carlo error (|z| < 3)" if zmax < 3 else
                                          "DISAGREE beyond Monte Carlo error"))
    out.update(zmax=zmax, steps_ref=ref.n_steps)
    if n_calibrate:
        out["calibration"] = calibration(ctx, st, n_calibrate, echo)
    if run_old:
        old, t_old = sample(ctx, st, seed, criterion=old_rule)
        echo(f"  old rule: {old.n_steps} steps, {t_old:.1f} s wall ({CPU[id(old)]:.1f} s CPU, {load_text()}), "
             f"converged {old.converged}; tau_max {float(np.max(old.tau)):.2f}")
        echo(f"    {describe_old(old)}")
        echo(f"  old / new: {old.n_steps / new.n_steps:.2f}x the steps, {t_old / t_new:.2f}x the time")
        zold = max(abs(r[-1]) for r in compare(old, ref))
        echo(f"  old rule's interval ends against the same reference: largest |z| = {zold:.2f}")
        out.update(steps_old=old.n_steps, s_old=t_old, cpu_old=CPU[id(old)], converged_old=old.converged,
                   zmax_old=zold)
    return out


TABLE_HEAD = ("| model | observations | sampled | new rule: steps, s | old rule: steps, s | old / new: steps, time "
              "| 10x reference: steps, max abs z | spread / MCSE, 16 seeds |")


def table_row(r: dict) -> str:
    old = f"{r['steps_old']:,}, {r['s_old']:.1f}" if "steps_old" in r else "not run"
    ratio = f"{r['steps_old'] / r['steps_new']:.1f}x, {r['s_old'] / r['s_new']:.1f}x" if "steps_old" in r else "-"
    flag = "" if r["converged_new"] else " (NOT converged)"
    return (f"| {r['label']} | {r['n_obs']:,} | {r['n_sampled']} | {r['steps_new']:,}, {r['s_new']:.1f}{flag} | {old} "
            f"| {ratio} | {r['steps_ref']:,}, {r['zmax']:.2f} | "
            + (f"{r['calibration']:.2f}" if "calibration" in r else "-") + " |")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--models", default="tank,demo,two_tanks")
    ap.add_argument("--no-old", action="store_true", help="skip the old rule (it can take minutes)")
    ap.add_argument("--calibrate", default="demo,two_tanks", help="models whose MCSE is checked over 16 seeds "
                                                                 '("" for none)')
    ap.add_argument("--out", default=str(ROOT / "benchmarks" / "results" / "stop_rule.txt"),
                    help='write the report to this file ("-": no file)')
    args = ap.parse_args()
    lines: list[str] = []

    def echo(text: str) -> None:
        print(text, flush=True)
        lines.append(text)

    try:
        cores = len(os.sched_getaffinity(0))
    except AttributeError:
        cores = os.cpu_count()
    echo(f"bench_stop_rule: {datetime.now(timezone.utc):%Y-%m-%d %H:%M} UTC, {cores} cores available, "
         f"NUMBA_NUM_THREADS={os.environ.get('NUMBA_NUM_THREADS', 'unset')}; seconds are wall time of the "
         f"posterior stage alone (after least squares) on a machine shared with other work")
    results = []
    with tempfile.TemporaryDirectory(prefix="graybox-bench-stop-") as tmp:
        tmp = Path(tmp)
        for label in args.models.split(","):
            if label == "tank":
                path = write_tank(tmp, check_every=100)
            elif label == "two_tanks":
                path = write_two_tanks(tmp, check_every=100)
            elif label == "demo":
                path = ROOT / "configs" / "storage_vessel.toml"
            else:
                sys.exit(f"unknown model {label!r}")
            n_cal = 16 if label in args.calibrate.split(",") else 0
            results.append(study_one(label, path, not args.no_old, echo, n_cal))
    echo("\nsummary (same sampler settings for both rules; z: interval end minus the 10x reference's over their "
         "combined Monte Carlo standard error):")
    echo(TABLE_HEAD)
    echo("| --- | --- | --- | --- | --- | --- | --- | --- |")
    for r in results:
        echo(table_row(r))
    tank = next((r for r in results if r["label"] == "tank"), None)
    if tank is not None:
        ok = tank["s_new"] < 30.0 and tank["zmax"] < 3.0
        echo(f"target (tank posterior stage < 30 s, interval ends within Monte Carlo error of the 10x reference): "
             f"{'met' if ok else 'NOT met'} ({tank['s_new']:.1f} s, max |z| {tank['zmax']:.2f})")
    if args.out != "-":
        Path(args.out).write_text("\n".join(lines) + "\n")


if __name__ == "__main__":
    main()

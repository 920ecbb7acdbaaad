"""Simulation speed and memory: the compiled core against the frozen floor, in one run.

    python benchmarks/bench_simulate.py            # 1e3, 1e4, 1e5 samples, and the memory check
    python benchmarks/bench_simulate.py --quick    # 1e3 and 1e4 only, no 1e6 memory check

The yardstick is ``../shared/bench/baseline.py`` (frozen, not tuned): a heated vessel
M*cp*dT/dt = F*cp*(T_in - T) + Q - UA*(T - T_amb) with inputs held every 10 s, parameters UA,
cp and the initial temperature T0.  It provides ``floor`` (a hand-written numba RK4 loop, one
step per sample, one thread), ``baseline`` (the obvious solve_ivp script) and ``exact`` (the
closed-form solution under held inputs).  The same model is built here through graybox's
build_spec with ``initial = "estimate"`` (T0 passed as x0_est), simulated by

* the compiled core (one set; 64 sets in one call, per set; the SSE-only mode),
* the batched numpy reference (one set; 64 sets, per set),
* the solve_ivp loop (``baseline``),

and every figure is reported against the floor measured in the same run, with the largest
error against ``exact``.  Times are the best of several repeats (robust to a loaded machine).
"""

from __future__ import annotations

import argparse
import resource
import sys
import time
import tracemalloc
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO.parent / "shared" / "bench"))

import baseline as yard  # noqa: E402

from graybox.configkit import Table  # noqa: E402
from graybox.data.record import record_from_arrays  # noqa: E402
from graybox.model.build import build_spec  # noqa: E402
from graybox.simulate import Tolerances, generate, plan, simulate_reference  # noqa: E402
from graybox.simulate.compiled import compile_model  # noqa: E402

INPUTS = ("F", "Q", "T_in", "T_amb")


def vessel_spec():
    """The yardstick's model through graybox's model layer."""
    model = {
        "name": "bench_vessel",
        "states": {"T": {"units": "degC", "rate": "(F*cp*(T_in - T) + Q - UA*(T - T_amb))/(M*cp)",
                         "initial": "estimate"}},
        "inputs": {"F": "kg/s", "Q": "W", "T_in": "degC", "T_amb": "degC"},
        "constants": {"M": {"value": float(yard.M), "units": "kg"}},
    }
    params = {"UA": {"guess": float(yard.THETA[0]), "units": "W/K"},
              "cp": {"guess": float(yard.THETA[1]), "units": "J/(kg*K)"}}
    return build_spec(Table(model, ("model",)), Table(params, ("parameters",)))


def graybox_record(rec: dict, observed: np.ndarray):
    return record_from_arrays("bench", rec["t"], {k: rec[k] for k in INPUTS}, {"T": observed},
                              units={"F": "kg/s", "Q": "W", "T_in": "degC", "T_amb": "degC", "T": "degC"})


def best_time(fn, repeats: int, warm: bool = True) -> float:
    """Best wall time of ``repeats`` calls (seconds)."""
    if warm:
        fn()
    best = np.inf
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def ms(seconds: float) -> str:
    return f"{seconds * 1e3:10.3f} ms"


def bench_size(spec, n: int, rtol: float, n_batch: int = 64) -> dict:
    rec = yard.make_record(n)
    exact = yard.exact(yard.THETA, rec)
    grec = graybox_record(rec, exact)
    t0 = time.perf_counter()
    tl = plan(spec, grec)
    t_plan = time.perf_counter() - t0
    cm = compile_model(spec)
    cm_ref_order = compile_model(spec, fast_path=False)
    tol = Tolerances(rtol=rtol)
    theta = yard.THETA[None, :2].copy()
    x0 = np.array([[yard.THETA[2]]])
    rng = np.random.default_rng(0)
    theta_b = theta * rng.uniform(0.9, 1.1, (n_batch, 2))
    x0_b = x0 + rng.uniform(-1.0, 1.0, (n_batch, 1))
    reps = 30 if n <= 10_000 else 5

    out: dict = {"n": n, "plan": t_plan}
    out["floor"] = best_time(lambda: yard.floor(yard.THETA, rec), reps)
    out["err_floor"] = float(np.max(np.abs(yard.floor(yard.THETA, rec) - exact)))

    res = cm.simulate(tl, theta, x0_est=x0, tol=tol)
    assert res.ok.all() and res.methods == ["explicit"]
    out["err_compiled"] = float(np.max(np.abs(res.outputs["T"][0] - exact)))
    out["steps_per_interval"] = res.n_steps / (n - 1)
    out["compiled"] = best_time(lambda: cm.simulate(tl, theta, x0_est=x0, tol=tol), reps)
    out["compiled_sse"] = best_time(lambda: cm.sse(tl, theta, x0_est=x0, tol=tol), reps)
    sse = cm.sse(tl, theta, x0_est=x0, tol=tol)[0]
    out["rms_sse"] = float(np.sqrt(sse[0, 0] / n))  # observations are `exact`: the RMS error
    out["compiled_b64"] = best_time(lambda: cm.simulate(tl, theta_b, x0_est=x0_b, tol=tol), max(3, reps // 5)) / n_batch
    out["compiled_sse_b64"] = best_time(lambda: cm.sse(tl, theta_b, x0_est=x0_b, tol=tol), max(3, reps // 5)) / n_batch
    res_ro = cm_ref_order.simulate(tl, theta, x0_est=x0, tol=tol)
    out["err_ref_order"] = float(np.max(np.abs(res_ro.outputs["T"][0] - exact)))
    out["compiled_ref_order"] = best_time(lambda: cm_ref_order.simulate(tl, theta, x0_est=x0, tol=tol), reps)
    out["compiled_sens"] = best_time(lambda: cm.simulate(tl, theta, x0_est=x0, tol=tol, sens=True), reps)

    funcs = generate(spec)
    ref_reps = 3 if n <= 10_000 else 1
    ref = simulate_reference(funcs, tl, theta, x0_est=x0, tol=tol)
    out["err_reference"] = float(np.max(np.abs(ref.outputs["T"][0] - exact)))
    out["reference"] = best_time(lambda: simulate_reference(funcs, tl, theta, x0_est=x0, tol=tol), ref_reps,
                                 warm=False)
    out["reference_b64"] = best_time(lambda: simulate_reference(funcs, tl, theta_b, x0_est=x0_b, tol=tol), 1,
                                     warm=False) / n_batch

    ivp_reps = 2 if n <= 10_000 else 1
    out["solve_ivp"] = best_time(lambda: yard.baseline(yard.THETA, rec), ivp_reps, warm=False)
    out["err_solve_ivp"] = float(np.max(np.abs(yard.baseline(yard.THETA, rec) - exact))) if n <= 10_000 else np.nan
    return out


def report(r: dict) -> None:
    f = r["floor"]
    print(f"\n== {r['n']:,} samples (planning the timeline once: {r['plan'] * 1e3:.1f} ms) ==")
    print(f"  {'engine':44s} {'time/set':>13s} {'/ floor':>9s} {'max |err| vs exact':>20s}")
    rows = [
        ("floor (numba RK4, one step per sample)", f, r["err_floor"]),
        ("compiled, 1 set", r["compiled"], r["err_compiled"]),
        ("compiled, 64 sets per call (per set)", r["compiled_b64"], None),
        ("compiled SSE only, 1 set", r["compiled_sse"], None),
        ("compiled SSE only, 64 sets (per set)", r["compiled_sse_b64"], None),
        ("compiled, reference operation order, 1 set", r["compiled_ref_order"], r["err_ref_order"]),
        ("compiled with sensitivities (3 cols), 1 set", r["compiled_sens"], None),
        ("numpy reference, 1 set", r["reference"], r["err_reference"]),
        ("numpy reference, 64 sets (per set)", r["reference_b64"], None),
        ("solve_ivp loop (baseline.py)", r["solve_ivp"], r["err_solve_ivp"]),
    ]
    for name, t, err in rows:
        e = "" if err is None else ("n/a" if not np.isfinite(err) else f"{err:.2e} K")
        print(f"  {name:44s} {ms(t)} {t / f:8.2f}x {e:>20s}")
    print(f"  compiled steps per 10 s interval: {r['steps_per_interval']:.3f}; RMS error from the SSE mode: "
          f"{r['rms_sse']:.2e} K")
    print(f"  solve_ivp loop / compiled: {r['solve_ivp'] / r['compiled']:.0f}x (1 set), "
          f"{r['solve_ivp'] / r['compiled_b64']:.0f}x (per set in 64); "
          f"numpy reference / compiled: {r['reference'] / r['compiled']:.0f}x")


def memory_check(spec, n: int = 1_000_000, n_sets: int = 64) -> None:
    """SSE mode on a long record with many sets: Python-side peak (tracemalloc) and the
    process's peak resident set size, against the size one trajectory of the batch needs."""
    print(f"\n== memory: {n:,} samples x {n_sets} sets, SSE mode ==")
    rec = yard.make_record(n)
    grec = graybox_record(rec, yard.exact(yard.THETA, rec))
    t0 = time.perf_counter()
    tl = plan(spec, grec)
    cm = compile_model(spec)
    cm.tables(tl)
    t_prep = time.perf_counter() - t0
    rng = np.random.default_rng(1)
    theta = yard.THETA[None, :2] * rng.uniform(0.9, 1.1, (n_sets, 2))
    x0 = yard.THETA[2] + rng.uniform(-1.0, 1.0, (n_sets, 1))
    rss_before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    tracemalloc.start()
    t0 = time.perf_counter()
    sse, n_used, ok = cm.sse(tl, theta, x0_est=x0)
    t_sse = time.perf_counter() - t0
    current, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    rss_after = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    trajectory = n_sets * n * 8
    print(f"  record + timeline + kernel tables prepared in {t_prep:.2f} s (once per record)")
    print(f"  SSE of {n_sets} sets in {t_sse:.2f} s ({t_sse / n_sets * 1e3:.1f} ms per set), all ok: {bool(ok.all())}, "
          f"{int(n_used[0]):,} observations each")
    print(f"  Python-side peak during the call: {peak / 1e3:.1f} kB "
          f"(one trajectory of the batch would be {trajectory / 1e6:.0f} MB)")
    print(f"  process peak RSS: {rss_before / 1024:.0f} MB before the call, {rss_after / 1024:.0f} MB after "
          f"(growth {max(rss_after - rss_before, 0) / 1024:.0f} MB)")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--quick", action="store_true", help="1e3 and 1e4 samples only, no memory check")
    ap.add_argument("--rtol", type=float, default=Tolerances().rtol, help="graybox's relative tolerance")
    args = ap.parse_args()
    spec = vessel_spec()
    t0 = time.perf_counter()
    cm = compile_model(spec)
    small = graybox_record(yard.make_record(100), np.zeros(100))
    tl = plan(spec, small)
    cm.simulate(tl, yard.THETA[None, :2], x0_est=[[20.0]])
    cm.sse(tl, yard.THETA[None, :2], x0_est=[[20.0]])
    cm.simulate(tl, yard.THETA[None, :2], x0_est=[[20.0]], sens=True)
    compile_model(spec, fast_path=False).simulate(tl, yard.THETA[None, :2], x0_est=[[20.0]])
    yard.floor(yard.THETA, yard.make_record(100))
    print(f"compiled core ready in {time.perf_counter() - t0:.2f} s (loaded from the on-disk cache when warm); "
          f"graybox rtol = {args.rtol:g}")
    sizes = (1_000, 10_000) if args.quick else (1_000, 10_000, 100_000)
    for n in sizes:
        report(bench_size(spec, n, args.rtol))
    if not args.quick:
        memory_check(spec)


if __name__ == "__main__":
    main()

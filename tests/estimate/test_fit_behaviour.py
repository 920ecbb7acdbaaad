"""Least-squares behaviour: experiments, local parameters, initial states, bounds, failures.

Data here are generated from the model itself (noise-free or with fixed-seed noise), so the
truth is known by construction; closed-form linear-regression results are the reference
where a formula exists (ordinary least squares with known sigma: cov = sigma^2 (X^T X)^-1,
common practice).
"""

import numpy as np
import pytest
import statsmodels.api as sm

from graybox.data.record import record_from_arrays
from graybox.errors import FitError
from graybox.estimate.fit import FitSettings, fit
from graybox.estimate.problem import Experiment, Problem
from graybox.simulate import Engine, plan

LAG = {"states": {"y": {"units": "", "rate": "(K*u - y)/tau"}}, "inputs": {"u": ""}}


def steps(t, period):
    return np.where((t // period) % 2 == 0, 1.0, 0.2)


def lag_data(t, K, tau, y0, noise, rng):
    """Exact first-order step responses (held input, closed form per interval)."""
    u = steps(t, 40.0)
    y = np.empty_like(t)
    y[0] = y0
    for k in range(1, t.size):
        dt = t[k] - t[k - 1]
        y[k] = K * u[k - 1] + (y[k - 1] - K * u[k - 1]) * np.exp(-dt / tau)
    return u, y + noise * rng.standard_normal(t.size)


def problem_for(spec, records, engine="reference"):
    eng = Engine(spec, engine)
    return Problem(spec, [Experiment(r.name, plan(spec, r)) for r in records], eng)


def test_local_and_shared_parameters_across_experiments(build):
    """K local to each experiment, tau shared; noise-free data recover the truth."""
    spec = build(dict(LAG, states={"y": {"units": "", "rate": "(K*u - y)/tau", "initial": 0.0}}),
                 {"K": {"guess": 1.0, "bounds": [0.1, 10], "scope": "local"},
                  "tau": {"guess": 3.0, "bounds": [0.1, 100], "units": "s"}})
    t = np.arange(0, 200, 2.0)
    rng = np.random.default_rng(0)
    recs = []
    for name, K in (("before", 2.0), ("after", 3.0)):
        u, y = lag_data(t, K, 7.0, 0.0, 0.0, rng)
        recs.append(record_from_arrays(name, t, {"u": u}, {"y": y}))
    res = fit(problem_for(spec, recs), FitSettings(sigmas={"y": 1e-3}))
    assert res.names == ["K[before]", "K[after]", "tau"]
    assert res.parameters["K[before]"].estimate == pytest.approx(2.0, rel=1e-7)
    assert res.parameters["K[after]"].estimate == pytest.approx(3.0, rel=1e-7)
    assert res.parameters["tau"].estimate == pytest.approx(7.0, rel=1e-7)


def test_estimated_initial_state(build):
    spec = build(dict(LAG, states={"y": {"units": "", "rate": "(K*u - y)/tau", "initial": "estimate"}}),
                 {"K": {"guess": 1.0, "bounds": [0.1, 10]}, "tau": {"guess": 3.0, "bounds": [0.1, 100], "units": "s"}})
    t = np.arange(0, 200, 2.0)
    u, y = lag_data(t, 2.0, 7.0, 1.7, 0.0, np.random.default_rng(0))
    res = fit(problem_for(spec, [record_from_arrays("main", t, {"u": u}, {"y": y})]), FitSettings(sigmas={"y": 1e-3}))
    assert res.parameters["y0[main]"].estimate == pytest.approx(1.7, rel=1e-7)
    assert res.parameters["tau"].estimate == pytest.approx(7.0, rel=1e-7)


def test_known_sigma_gives_closed_form_covariance(build):
    """Static linear model y = a + b*x with sigma given: cov = sigma^2 (X^T X)^-1 exactly and
    intervals use the normal quantile (scale_covar off)."""
    spec = build({"inputs": {"x": ""}, "outputs": {"y": {"expr": "a + b*x"}}}, {"a": {"guess": 0.0}, "b": {"guess": 1.0}})
    rng = np.random.default_rng(3)
    x = np.linspace(0, 10, 40)
    y = 1.5 + 0.3 * x + 0.2 * rng.standard_normal(x.size)
    res = fit(problem_for(spec, [record_from_arrays("main", np.arange(x.size), {"x": x}, {"y": y})]),
              FitSettings(sigmas={"y": 0.2}))
    X = np.column_stack([np.ones_like(x), x])
    cov = 0.2**2 * np.linalg.inv(X.T @ X)
    assert np.allclose(res.covariance, cov, rtol=1e-9)
    assert res.quantile == pytest.approx(1.959963984540054, rel=1e-12)
    ols = sm.OLS(y, X).fit()
    assert [res.parameters[n].estimate for n in ("a", "b")] == pytest.approx(ols.params, rel=1e-10)


def test_loglik_matches_statsmodels(build):
    """Full Gaussian log-likelihood with the ML sigma equals statsmodels OLS llf; AIC counts
    sigma as a parameter (statsmodels' does not), so ours is larger by 2."""
    spec = build({"inputs": {"x": ""}, "outputs": {"y": {"expr": "a + b*x"}}}, {"a": {"guess": 0.0}, "b": {"guess": 1.0}})
    rng = np.random.default_rng(4)
    x = np.linspace(0, 5, 30)
    y = -1.0 + 2.0 * x + 0.5 * rng.standard_normal(x.size)
    res = fit(problem_for(spec, [record_from_arrays("main", np.arange(x.size), {"x": x}, {"y": y})]))
    ols = sm.OLS(y, np.column_stack([np.ones_like(x), x])).fit()
    assert res.loglik == pytest.approx(ols.llf, rel=1e-10)
    assert res.aic == pytest.approx(ols.aic + 2, rel=1e-10)
    assert res.bic == pytest.approx(ols.bic + np.log(x.size), rel=1e-10)


def test_multistart_escapes_a_local_minimum(build):
    """y = sin(w*x): from w guess 1.0 the local fit stalls in a side minimum; a Latin-hypercube
    multi-start over [0.5, 5] finds the true w = 3.1 (noise-free data)."""
    spec = build({"inputs": {"x": ""}, "outputs": {"y": {"expr": "sin(w*x)"}}}, {"w": {"guess": 1.0, "bounds": [0.5, 5]}})
    x = np.linspace(0, 10, 200)
    rec = record_from_arrays("main", np.arange(x.size), {"x": x}, {"y": np.sin(3.1 * x)})
    single = fit(problem_for(spec, [rec]), FitSettings(sigmas={"y": 0.01}))
    assert abs(single.parameters["w"].estimate - 3.1) > 0.1
    multi = fit(problem_for(spec, [rec]), FitSettings(sigmas={"y": 0.01}, multistart=12, seed=1))
    assert multi.parameters["w"].estimate == pytest.approx(3.1, rel=1e-8)
    assert len(multi.starts) == 13


def test_estimate_at_bound_is_flagged_one_sided(build):
    spec = build({"inputs": {"x": ""}, "outputs": {"y": {"expr": "a*x"}}}, {"a": {"guess": 1.0, "bounds": [0.5, 2.0]}})
    x = np.linspace(1, 2, 20)
    rec = record_from_arrays("main", np.arange(x.size), {"x": x}, {"y": 3.0 * x + 0.01 * np.sin(7 * x)})
    res = fit(problem_for(spec, [rec]))
    p = res.parameters["a"]
    assert p.at_bound == "upper" and p.one_sided and p.ci95[1] == 2.0
    assert any("upper bound" in w for w in res.warnings)


def test_nan_at_initial_guess_is_a_user_error(build):
    spec = build({"inputs": {"x": ""}, "outputs": {"y": {"expr": "log(a - x)"}}}, {"a": {"guess": 0.5}})
    x = np.linspace(1, 2, 10)
    with pytest.raises(FitError, match=r"NaN or overflow at the initial guess \(a = 0.5\)"):
        fit(problem_for(spec, [record_from_arrays("main", np.arange(10), {"x": x}, {"y": x})]))


def test_torricelli_drain_recovers_the_orifice_coefficient(build):
    """Torricelli drain dh/dt = -c*sqrt(h), closed form h = (sqrt(h0) - c t/2)^2 (analytic)."""
    spec = build({"states": {"h": {"units": "m", "rate": "-c*sqrt(h)", "initial": 1.0}}},
                 {"c": {"guess": 0.062, "bounds": [1e-3, 10], "units": "m**0.5/s"}})
    t = np.linspace(0, 30, 31)
    h = (1.0 - 0.05 * t / 2) ** 2
    res = fit(problem_for(spec, [record_from_arrays("main", t, {}, {"h": h})]), FitSettings(sigmas={"h": 1e-4}))
    assert res.parameters["c"].estimate == pytest.approx(0.05, rel=1e-7)
    assert res.converged


def test_failing_trial_points_are_rejected_not_fatal(build):
    """y = log(a*x), unbounded a from 5 towards 0.001: the Gauss-Newton steps overshoot to
    a <= 0, where the model is NaN.  Those trial points must be rejected steps (the spy
    counts them), and the fit still reaches the truth (noise-free data)."""
    spec = build({"inputs": {"x": ""}, "outputs": {"y": {"expr": "log(a*x)"}}}, {"a": {"guess": 5.0}})
    x = np.linspace(1, 3, 20)
    prob = problem_for(spec, [record_from_arrays("main", np.arange(20), {"x": x}, {"y": np.log(0.001 * x)})])
    real = prob.residuals
    nan_calls = []

    def spy(xv, sig):
        r = real(xv, sig)
        nan_calls.append(bool(np.isnan(r).any()))
        return r

    prob.residuals = spy
    res = fit(prob, FitSettings(sigmas={"y": 1e-3}))
    assert sum(nan_calls) >= 1
    assert res.parameters["a"].estimate == pytest.approx(0.001, rel=1e-10)
    assert res.converged


def test_everything_fixed_is_an_error(build):
    spec = build({"inputs": {"x": ""}, "outputs": {"y": {"expr": "a*x"}}}, {"a": {"guess": 1.0, "fixed": True}})
    with pytest.raises(FitError, match="nothing to estimate"):
        problem_for(spec, [record_from_arrays("main", np.arange(3), {"x": np.ones(3)}, {"y": np.ones(3)})])

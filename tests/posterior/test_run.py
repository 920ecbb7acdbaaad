"""The posterior stage end to end: results, files, reproducibility, honesty about
non-convergence, bands, noise-model warnings and the errors raised before sampling.

References named per test: binomial bounds (scipy.stats.binom) for the share of
observations inside the 95% prediction band; the analytic AR(1) / outlier constructions of
the data for the residual checks.
"""

from __future__ import annotations

import dataclasses
import json

import numpy as np
import pytest
from scipy import stats

from graybox.errors import SampleError
from graybox.posterior import SamplerSettings, predictive_bands, run_posterior
from graybox.posterior.noise import simulate_errors
from tests.posterior.helpers import LINEAR_MODEL, fitted, noise, problem_of, spec_of

FAST = SamplerSettings(walkers=16, check_every=200, progress=False)
LINE = {"a": {"guess": 0.0, "bounds": [-10.0, 10.0]}, "b": {"guess": 1.0, "bounds": [-10.0, 10.0]}}


def line_problem(n=400, seed=0, sigma=0.2, errors=None, params=LINE):
    rng = np.random.default_rng(seed)
    x = np.linspace(0.0, 1.0, n)
    e = rng.normal(0, sigma, n) if errors is None else errors
    prob = problem_of(spec_of(LINEAR_MODEL, params), np.arange(n, dtype=float), {"x": x}, {"y": 1 + 2 * x + e})
    return prob, x


@pytest.fixture(scope="module")
def sampled():
    prob, x = line_problem()
    res = fitted(prob, {})
    return prob, res, run_posterior(prob, res, noise("y"), FAST, seed=11)


def test_results_dictionaries_and_files(sampled, tmp_path):
    prob, res, post = sampled
    assert post.converged
    params = post.to_parameters_dict()
    assert set(params) == {"a", "b"}
    for name in ("a", "b"):
        p = params[name]["posterior"]
        assert set(p) >= {"median", "mean", "sd", "ci95", "ess", "rhat"}
        assert p["ci95"][0] < p["median"] < p["ci95"][1]
        assert p["ess"] >= 400 and p["rhat"] < 1.01
        # the posterior agrees with least squares for this linear model with a flat prior
        assert abs(p["mean"] - res.parameters[name].estimate) < 0.2 * p["sd"]
        assert p["sd"] == pytest.approx(res.parameters[name].stderr, rel=0.1)
    noise_d = post.to_noise_dict()
    assert noise_d["y"]["kind"] == "gaussian" and set(noise_d["y"]["posterior"]) == {"sigma"}
    sig = noise_d["y"]["posterior"]["sigma"]
    assert sig["ci95"][0] < 0.2 < sig["ci95"][1]
    s = post.sampler_dict()
    assert {"walkers", "steps", "burn_in", "thin", "tau", "acceptance", "converged", "reason"} <= set(s)
    assert s["walkers"] == 16 and s["converged"] and s["steps"] > 50 * max(s["tau"].values())
    assert 0.05 < s["acceptance"] < 0.9
    json.dumps({"p": params, "n": noise_d, "s": s})
    post.save_samples(tmp_path / "samples.npz")
    with np.load(tmp_path / "samples.npz") as z:
        assert z["chain"].shape == (16, post.n_steps, 3)
        assert z["log_prob"].shape == (16, post.n_steps)
        assert list(z["names"]) == ["a", "b", "sigma[y]"]
        assert int(z["burn_in"]) == post.burn_in and bool(z["converged"])
        assert np.all(z["chain"][:, :, 2] > 0)  # sigma in natural units
    paths = post.write_plots(tmp_path)
    assert all(p.exists() and p.stat().st_size > 10_000 for p in paths)
    text = post.summary()
    assert "converged" in text and "sigma[y]" in text and "independent Gaussian errors, sigma sampled" in text
    draws = post.draws(100, np.random.default_rng(0))
    assert draws.shape == (100, 2)


def test_same_seed_same_samples_other_seed_other_samples(sampled):
    prob, res, post = sampled
    st = dataclasses.replace(FAST, max_steps=400)
    a = run_posterior(prob, res, noise("y"), st, seed=11)
    b = run_posterior(prob, res, noise("y"), st, seed=11)
    c = run_posterior(prob, res, noise("y"), st, seed=12)
    assert np.array_equal(a.chain, b.chain) and np.array_equal(a.log_prob, b.log_prob)
    assert not np.array_equal(a.chain, c.chain)
    # the settings' seed wins over the study's
    d = run_posterior(prob, res, noise("y"), dataclasses.replace(st, seed=11), seed=99)
    assert np.array_equal(a.chain, d.chain)
    # and the first 400 steps of the long run are the short run's (same stream)
    assert np.array_equal(post.chain[:, :400], a.chain)


def test_step_limit_is_reported_as_not_converged(sampled):
    prob, res, _ = sampled
    post = run_posterior(prob, res, noise("y"), dataclasses.replace(FAST, max_steps=150), seed=1)
    assert not post.converged
    assert post.reason.startswith("not converged: stopped at the step limit of 150 steps")
    assert "NOT CONVERGED" in post.summary() and "NOT final" in post.summary()
    assert post.sampler_dict()["converged"] is False
    assert all(v["posterior"]["converged"] is False for v in post.to_parameters_dict().values())
    assert post.to_noise_dict()["y"]["posterior"]["sigma"]["converged"] is False
    assert post.warnings and "not final" in post.warnings[0]


def test_prediction_band_holds_95_percent_of_the_observations(sampled):
    """Reference: with a correct noise model a new observation falls inside the 95%
    prediction band with probability 0.95; the observations themselves nearly so (the fit
    used them); binomial 99% bounds for 400 observations (scipy.stats.binom)."""
    prob, _, post = sampled
    bands = predictive_bands(prob, post, 400, np.random.default_rng(3))
    band = bands[0]["y"]
    y = prob.observed(0, "y")
    assert band.lo_cred.shape == y.shape
    assert np.all(band.lo_pred < band.lo_cred) and np.all(band.hi_cred < band.hi_pred)
    inside = np.mean((y >= band.lo_pred) & (y <= band.hi_pred))
    n = y.size
    assert stats.binom.ppf(0.005, n, 0.95) / n <= inside <= stats.binom.isf(0.005, n, 0.95) / n
    x = np.linspace(0.0, 1.0, n)
    truth = 1 + 2 * x
    assert np.mean((truth >= band.lo_cred) & (truth <= band.hi_cred)) > 0.5
    assert set(band.trace_bands()) == {"credible95", "prediction95"}


def test_correlated_residuals_are_flagged_and_ar1_widens():
    rng = np.random.default_rng(4)
    n = 400
    e = simulate_errors("ar1", np.array([0.2]), rng, n, phi_j=np.full((1, n), 0.9))[0]
    prob, _ = line_problem(n, errors=e)
    res = fitted(prob, {})
    iid = run_posterior(prob, res, noise("y"), FAST, seed=1)
    assert any("residuals are correlated" in w and "ar1" in w for w in iid.warnings)
    ar = run_posterior(prob, res, noise("y", None, "ar1"), FAST, seed=1)
    assert ar.converged and not any("correlated" in w for w in ar.warnings)
    assert ar.stats["phi[y]"]["ci95"][0] < 0.9 < ar.stats["phi[y]"]["ci95"][1]
    ratio = ar.stats["a"]["sd"] / iid.stats["a"]["sd"]
    assert 2.5 < ratio < 6.0  # sqrt(19) = 4.4 for phi = 0.9
    nd = ar.to_noise_dict()["y"]
    assert set(nd["posterior"]) == {"sigma", "phi"} and nd["reference_spacing_s"] == 1.0


def test_outliers_are_flagged_and_student_t_samples_nu():
    rng = np.random.default_rng(5)
    n = 300
    e = rng.normal(0, 0.1, n)
    e[rng.choice(n, 12, replace=False)] += rng.choice([-1.0, 1.0], 12) * rng.uniform(1.0, 2.0, 12)
    prob, _ = line_problem(n, errors=e)
    res = fitted(prob, {})
    gauss = run_posterior(prob, res, noise("y"), FAST, seed=2)
    assert any("outliers" in w and "student_t" in w for w in gauss.warnings)
    robust = run_posterior(prob, res, noise("y", None, "student_t"), FAST, seed=2)
    assert robust.converged
    assert robust.stats["nu[y]"]["median"] < 5
    # downweighting the outliers makes the slope better determined, and its interval still covers
    assert robust.stats["b"]["sd"] < 0.8 * gauss.stats["b"]["sd"]
    assert robust.stats["b"]["ci95"][0] < 2.0 < robust.stats["b"]["ci95"][1]
    assert gauss.stats["sigma[y]"]["ci95"][0] > 0.15  # the Gaussian scale is inflated by the outliers


@pytest.mark.slow
def test_estimated_initial_state_is_sampled():
    """First-order model dy/dt = (K u - y) / tau with y(0) estimated: the initial state is a
    sampled quantity; every posterior lies within 4 sd of the values the data were made with
    (exact solution under held inputs), with the spread of the least-squares intervals."""
    spec = spec_of({"states": {"y": {"units": "", "rate": "(K*u - y)/tau", "initial": "estimate",
                                     "initial_bounds": [-5.0, 5.0]}}, "inputs": {"u": ""}},
                   {"K": {"guess": 1.5, "bounds": [0.1, 10.0]},
                    "tau": {"guess": 4.0, "units": "s", "bounds": [0.1, 100.0], "log_scale": True}})
    t = np.arange(0.0, 20.0, 1.0)
    u = np.where(t < 8, 1.0, 2.0)
    y_true = np.empty(t.size)
    y, k, tau = 0.5, 2.0, 5.0
    for i in range(t.size):  # exact solution under held inputs
        y_true[i] = y
        y = k * u[i] + (y - k * u[i]) * np.exp(-1.0 / tau)
    rng = np.random.default_rng(6)
    prob = problem_of(spec, t, {"u": u}, {"y": y_true + rng.normal(0, 0.05, t.size)})
    res = fitted(prob, {"y": 0.05})
    post = run_posterior(prob, res, noise("y", 0.05), SamplerSettings(walkers=12, check_every=100, progress=False),
                         seed=3)
    assert post.names == ["K", "tau", "y0[main]"]
    assert post.converged, post.reason
    for name, truth in (("K", 2.0), ("tau", 5.0), ("y0[main]", 0.5)):
        st = post.stats[name]
        assert abs(st["median"] - truth) < 4 * st["sd"], (name, st)
        # a nearly linear model: the posterior spread is the least-squares one
        assert st["sd"] == pytest.approx(res.parameters[name].stderr, rel=0.25), (name, st)


def test_errors_before_sampling(sampled):
    prob, res, _ = sampled
    with pytest.raises(SampleError, match="too few for 3 sampled quantities"):
        run_posterior(prob, res, noise("y"), dataclasses.replace(FAST, walkers=4), seed=0)
    with pytest.raises(SampleError, match="must be even"):
        run_posterior(prob, res, noise("y"), dataclasses.replace(FAST, walkers=17), seed=0)


def test_non_finite_start_names_the_values():
    """The least-squares optimum b < 0 lies outside a half-normal prior's support."""
    params = {"a": {"guess": 0.0, "bounds": [-10.0, 10.0]},
              "b": {"guess": 0.5, "bounds": [-5.0, 5.0], "prior": {"kind": "halfnormal", "sd": 2.0}}}
    rng = np.random.default_rng(7)
    x = np.linspace(0, 1, 50)
    prob = problem_of(spec_of(LINEAR_MODEL, params), np.arange(50.0), {"x": x},
                      {"y": 1 - 1.0 * x + rng.normal(0, 0.1, 50)})
    res = fitted(prob, {})
    with pytest.raises(SampleError) as err:
        run_posterior(prob, res, noise("y"), FAST, seed=0)
    assert "not finite" in err.value.message and "b = -" in err.value.message and "sigma[y] = " in err.value.message


def test_singular_covariance_falls_back_to_a_diagonal_ball(sampled):
    prob, res, _ = sampled
    broken = dataclasses.replace(res, covariance=np.full((2, 2), np.nan))
    post = run_posterior(prob, broken, noise("y"), dataclasses.replace(FAST, max_steps=400), seed=0)
    assert post.start_method.startswith("diagonal fallback")
    assert post.sampler_dict()["start"].startswith("diagonal fallback")


def test_progress_bar_on_request(sampled, capsys):
    prob, res, _ = sampled
    run_posterior(prob, res, noise("y"), dataclasses.replace(FAST, max_steps=200, progress=True), seed=0)
    assert "sampling" in capsys.readouterr().err
    run_posterior(prob, res, noise("y"), dataclasses.replace(FAST, max_steps=200), seed=0)
    assert "sampling" not in capsys.readouterr().err

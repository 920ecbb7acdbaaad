"""Priors (densities against scipy.stats, the log-space Jacobian) and the located errors of
bad prior, noise and sampler settings, all raised before any sampling starts."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, stats

from graybox.configkit import Table
from graybox.errors import ConfigError, SampleError
from graybox.posterior.config import SAMPLING_KEYS, SamplerSettings, priors_from_spec, sampler_settings
from graybox.posterior.noise import noise_layout
from graybox.posterior.priors import Prior

from tests.posterior.helpers import LINEAR_MODEL, noise, problem_of, spec_of

X = np.linspace(0.0, 1.0, 12)
T = np.arange(12.0)


def linear_problem(params: dict):
    spec = spec_of(LINEAR_MODEL, params)
    return spec, problem_of(spec, T, {"x": X}, {"y": 1 + 2 * X})


def one_prior(prior: dict | None, bounds=(0.1, 50.0), log_scale=False) -> Prior:
    p = {"guess": 2.0, "bounds": list(bounds), "log_scale": log_scale}
    if prior is not None:
        p["prior"] = prior
    spec, prob = linear_problem({"a": {"guess": 1.0, "bounds": [-5, 5]}, "b": p})
    return priors_from_spec(spec, prob)[1]


@pytest.mark.parametrize("prior, ref", [
    ({"kind": "normal", "mean": 3.0, "sd": 1.5}, stats.norm(3.0, 1.5)),
    ({"kind": "lognormal", "median": 4.0, "log_sd": 0.7}, stats.lognorm(0.7, scale=4.0)),
    ({"kind": "halfnormal", "sd": 6.0}, stats.halfnorm(scale=6.0)),
    (None, stats.uniform(0.1, 49.9)),
])
def test_log_density_matches_scipy_up_to_a_constant(prior, ref):
    """Reference: scipy.stats logpdf.  Inside the bounds the difference is one constant;
    outside it the density is zero (-inf)."""
    p = one_prior(prior)
    x = np.linspace(0.2, 49.0, 200)
    diff = p.log_density(x) - ref.logpdf(x)
    assert np.ptp(diff) < 1e-10
    assert np.all(np.isneginf(p.log_density(np.array([0.05, 60.0]))))


@pytest.mark.parametrize("prior", [{"kind": "normal", "mean": 3.0, "sd": 1.5},
                                   {"kind": "lognormal", "median": 4.0, "log_sd": 0.7}, None])
def test_log_space_density_carries_the_jacobian(prior):
    """Change of variables z = ln x: the density of z integrates over z to the same
    probabilities as scipy's (truncated) density of x over x.  Reference: scipy.integrate.quad
    of scipy.stats densities."""
    p = one_prior(prior, bounds=(0.5, 30.0), log_scale=True)
    zl, zh = np.log(0.5), np.log(30.0)
    norm_z = integrate.quad(lambda z: np.exp(p.log_density_sampled(np.array([z]))[0]), zl, zh, limit=200)[0]
    norm_x = integrate.quad(lambda x: np.exp(p.log_density(np.array([x]))[0]), 0.5, 30.0, limit=200)[0]
    for a, b in [(0.5, 2.0), (2.0, 5.0), (5.0, 30.0)]:
        pz = integrate.quad(lambda z: np.exp(p.log_density_sampled(np.array([z]))[0]), np.log(a), np.log(b))[0]
        px = integrate.quad(lambda x: np.exp(p.log_density(np.array([x]))[0]), a, b)[0]
        assert pz / norm_z == pytest.approx(px / norm_x, rel=1e-8)


def test_local_parameters_and_initial_states_get_priors():
    """One prior per free-vector entry, in the problem's layout order."""
    spec = spec_of({"states": {"y": {"units": "", "rate": "(K - y)/tau", "initial": "estimate",
                                     "initial_bounds": [-5.0, 5.0]}}, "inputs": {"u": ""}},
                   {"K": {"guess": 1.0, "bounds": [0.1, 10], "prior": {"kind": "normal", "mean": 1.0, "sd": 0.5}},
                    "tau": {"guess": 5.0, "units": "s", "bounds": [0.1, 100], "log_scale": True}})
    t = np.arange(10.0)
    prob = problem_of(spec, t, {"u": 0 * t}, {"y": 1 - np.exp(-t / 5)})
    pri = priors_from_spec(spec, prob)
    assert [p.name for p in pri] == prob.names
    assert [p.kind for p in pri] == ["normal", "uniform", "uniform"]
    assert pri[1].log_scale and not pri[2].log_scale
    assert (pri[2].lower, pri[2].upper) == (-5.0, 5.0)


@pytest.mark.parametrize("params, text, where", [
    ({"b": {"guess": 2.0, "fixed": True, "prior": {"kind": "normal", "mean": 2, "sd": 1}}},
     "is fixed, so it cannot have a prior", "[parameters.b]"),
    ({"b": {"guess": 2.0, "bounds": [0.1, 10], "prior": {"kind": "normal", "mean": 20, "sd": 1}}},
     "outside its bounds", "[parameters.b.prior] key 'mean'"),
    ({"b": {"guess": 2.0, "bounds": [0.1, 10], "prior": {"kind": "normal", "mean": 2, "sd": 0}}},
     "sd must be positive", "[parameters.b.prior] key 'sd'"),
    ({"b": {"guess": 2.0, "bounds": [0.1, 10], "prior": {"kind": "lognormal", "median": 2, "log_sd": -1}}},
     "log_sd must be positive", "key 'log_sd'"),
    ({"b": {"guess": 2.0, "bounds": [0.1, 10], "prior": {"kind": "lognormal", "median": -2, "log_sd": 1}}},
     "positive median", "key 'median'"),
    ({"b": {"guess": -2.0, "bounds": [-10, -1], "prior": {"kind": "halfnormal", "sd": 1}}},
     "lives on values >= 0", "[parameters.b.prior]"),
    ({"b": {"guess": 2.0}}, "bounds [-inf, inf] are not both finite", "[parameters.b.prior]"),
    ({"b": {"guess": 2.0, "lower": 0.0}}, "are not both finite", "[parameters.b.prior]"),
    ({"b": {"guess": 2.0, "bounds": [0.1, 10], "prior": {"kind": "gamma", "shape": 2}}},
     "'gamma' is not a valid choice", "key 'kind'"),
    ({"b": {"guess": 2.0, "bounds": [0.1, 10], "prior": {"kind": "normal", "mean": 2, "sdev": 1}}},
     "unknown key", "key 'sdev'"),
    ({"b": {"guess": 2.0, "bounds": [0.1, 10], "prior": {"kind": "normal", "mean": 2}}},
     "missing required key", "key 'sd'"),
])
def test_bad_priors_are_located_errors(params, text, where):
    """Each bad prior is a SampleError naming the parameter's table and key."""
    spec, prob = linear_problem({"a": {"guess": 1.0, "bounds": [-5, 5]}, **params})
    with pytest.raises(SampleError) as err:
        priors_from_spec(spec, prob)
    assert text in err.value.message
    assert where in (err.value.where or "")


@pytest.mark.parametrize("options, kind, text, key", [
    ({"phi": 1.0}, "ar1", "phi must be in [0, 1)", "phi"),
    ({"phi": -0.2}, "ar1", "phi must be in [0, 1)", "phi"),
    ({"phi": 0.5, "error_time_constant": 10.0}, "ar1", "not both", "phi"),
    ({"phi": 0.5}, "gaussian", "does not apply", "phi"),
    ({"dof": 4}, "ar1", "does not apply", "dof"),
    ({"dof": 0}, "student_t", "dof must be positive", "dof"),
    ({"error_time_constant": "ten minutes"}, "ar1", "is not a duration", "error_time_constant"),
    ({"error_time_constant": -3}, "ar1", "must be positive", "error_time_constant"),
])
def test_bad_noise_options_are_located_errors(options, kind, text, key):
    spec, prob = linear_problem({"a": {"guess": 1.0, "bounds": [-5, 5]}, "b": {"guess": 1.0, "bounds": [-5, 5]}})
    with pytest.raises(SampleError) as err:
        noise_layout(noise("y", None, kind, **options), prob)
    assert text in err.value.message
    assert f"[noise.y] key '{key}'" in (err.value.where or "")


def test_noise_layout_parameters_and_durations():
    """Sampled noise quantities per output, and a declared error time constant as text."""
    spec, prob = linear_problem({"a": {"guess": 1.0, "bounds": [-5, 5]}, "b": {"guess": 1.0, "bounds": [-5, 5]}})
    assert [p.name for p in noise_layout(noise("y", None, "ar1"), prob).params] == ["sigma[y]", "phi[y]"]
    assert [p.name for p in noise_layout(noise("y", 0.1, "ar1"), prob).params] == ["phi[y]"]
    lay = noise_layout(noise("y", 0.1, "ar1", error_time_constant="5 min"), prob)
    assert lay.params == () and lay.model("y").tau_e == pytest.approx(300.0)
    assert [p.name for p in noise_layout(noise("y", None, "student_t"), prob).params] == ["sigma[y]", "nu[y]"]
    assert [p.name for p in noise_layout(noise("y", None, "student_t", dof=4), prob).params] == ["sigma[y]"]


def test_sampler_settings_from_table_and_overrides():
    table = Table({"walkers": 48, "max_steps": 3000, "seed": 5, "progress": False}, ("sampling",))
    st = sampler_settings(table, {"walkers": 64, "seed": None, "enabled": False})
    assert (st.walkers, st.max_steps, st.seed, st.enabled, st.progress) == (64, 3000, 5, False, False)
    assert SamplerSettings().n_walkers(3) == 32 and SamplerSettings().n_walkers(11) == 44
    assert SamplerSettings().n_walkers(9) == 36
    assert set(SAMPLING_KEYS) >= {"enabled", "walkers", "max_steps", "seed"}


@pytest.mark.parametrize("data, key, text", [
    ({"walker": 32}, "walker", "unknown key"),
    ({"walkers": 31}, "walkers", "must be even"),
    ({"walkers": 1}, "walkers", "at least 2"),
    ({"max_steps": 0}, "max_steps", "at least 1"),
    ({"rhat_max": 0.99}, "rhat_max", "must be above 1"),
    ({"progress": "yes"}, "progress", "must be \"auto\", true or false"),
    ({"moves": "walk"}, "moves", "not a valid choice"),
])
def test_bad_sampling_table(data, key, text):
    with pytest.raises(ConfigError) as err:
        sampler_settings(Table(data, ("sampling",)))
    assert text in err.value.message and f"key '{key}'" in err.value.where


def test_bad_override_is_an_error():
    with pytest.raises(SampleError, match="unknown sampler option"):
        sampler_settings(Table({}, ("sampling",)), {"walkrs": 10})
    with pytest.raises(ConfigError, match="must be even"):
        sampler_settings(Table({}, ("sampling",)), {"walkers": 33})


def test_vectorised_log_prior_equals_the_sum_of_its_parts():
    """LogPosterior.log_prior (vectorised) against the per-quantity definitions."""
    from graybox.posterior.likelihood import LogPosterior
    from graybox.posterior.priors import log_prior_sampled

    spec, prob = linear_problem({"a": {"guess": 1.0, "bounds": [0.5, 5], "log_scale": True,
                                       "prior": {"kind": "lognormal", "median": 1.0, "log_sd": 0.5}},
                                 "b": {"guess": 1.0, "bounds": [-5, 5], "prior": {"kind": "normal", "mean": 1,
                                                                                   "sd": 2}}})
    lay = noise_layout(noise("y", None, "student_t"), prob)
    post = LogPosterior(prob, priors_from_spec(spec, prob), lay)
    rng = np.random.default_rng(0)
    Z = np.column_stack([rng.uniform(-1, 2, 400), rng.uniform(-6, 6, 400), rng.normal(0, 1, 400),
                         rng.uniform(-0.5, 7.5, 400)])
    ref = log_prior_sampled(post.priors, Z[:, :2]) + lay.log_prior(Z[:, 2:])
    got = post.log_prior(Z)
    assert np.array_equal(np.isfinite(got), np.isfinite(ref)) and np.isfinite(ref).sum() > 50
    assert got[np.isfinite(ref)] == pytest.approx(ref[np.isfinite(ref)], rel=1e-12, abs=1e-12)
    assert post.sampled(post.natural(Z)) == pytest.approx(Z)

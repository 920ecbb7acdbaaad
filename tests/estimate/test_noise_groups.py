"""Noise groups: outputs in the same units sharing one estimated sigma.

References: ordinary least squares on the stacked responses, numpy.linalg.lstsq, with
s^2 = SSE / (n - p) and cov = s^2 (X^T X)^-1 (common practice); the Gaussian log density of
scipy.stats.norm for the posterior's likelihood.  The study-file checks are graybox's own
rules (graybox/config.py: same units, each output in one group, names that exist, no given
sigma), each error located at its file, line, table and key.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from graybox.config import NoiseSpec
from graybox.study import load_study
from graybox.data.record import record_from_arrays
from graybox.errors import ConfigError, FitError
from graybox.estimate.fit import FitSettings, fit
from graybox.estimate.problem import Experiment, Problem
from graybox.posterior.config import priors_from_spec
from graybox.posterior.likelihood import LogPosterior
from graybox.posterior.noise import noise_layout
from graybox.simulate import Engine, plan

# two responses sharing the intercept: y1 = a + b x, y2 = a + c x, y3 (other units) = d x
MODEL = {"inputs": {"x": ""},
         "outputs": {"y1": {"expr": "a + b*x", "units": "m"}, "y2": {"expr": "a + c*x", "units": "m"},
                     "y3": {"expr": "d*x", "units": "s"}}}
PARAMS = {"a": {"guess": 0.0, "units": "m", "bounds": [-10, 10]}, "b": {"guess": 1.0, "units": "m", "bounds": [-10, 10]},
          "c": {"guess": 1.0, "units": "m", "bounds": [-10, 10]}, "d": {"guess": 1.0, "units": "s", "bounds": [0.1, 10]}}


def data(seed=5, n=30):
    rng = np.random.default_rng(seed)
    x = np.linspace(0.0, 4.0, n)
    y1 = 1.0 + 0.5 * x + 0.3 * rng.standard_normal(n)
    y2 = 1.0 - 0.2 * x + 0.1 * rng.standard_normal(n)  # another scatter: the shared sigma pools both
    y3 = 2.0 * x + 0.05 * rng.standard_normal(n)
    return x, y1, y2, y3


def problem(build, x, y1, y2, y3):
    spec = build(MODEL, PARAMS)
    rec = record_from_arrays("main", np.arange(x.size), {"x": x}, {"y1": y1, "y2": y2, "y3": y3})
    return Problem(spec, [Experiment("main", plan(spec, rec))], Engine(spec, "reference"))


def stacked_ols(x, y1, y2):
    """Pooled OLS of (y1, y2) on [1, x, 0] and [1, 0, x] (a, b, c)."""
    one, zero = np.ones_like(x), np.zeros_like(x)
    X = np.vstack([np.column_stack([one, x, zero]), np.column_stack([one, zero, x])])
    y = np.concatenate([y1, y2])
    beta, *_ = np.linalg.lstsq(X, y, rcond=None)
    r = y - X @ beta
    return X, beta, float(r @ r)


def test_shared_sigma_is_pooled_ols(build):
    """y1 and y2 share one sigma, y3 has its own: a, b, c are the stacked OLS solution (the
    shared sigma weighs y1 and y2 alike, and y3 shares no parameter with them), the shared
    sigma^2 = SSE_12 / (n_12 - p_12) with the n/(n - p) correction of the whole fit, and the
    covariance of (a, b, c) is sigma^2 (X^T X)^-1."""
    x, y1, y2, y3 = data()
    res = fit(problem(build, x, y1, y2, y3), FitSettings(groups={"length": ("y1", "y2")}))
    X, beta, sse12 = stacked_ols(x, y1, y2)
    got = np.array([res.parameters[n].estimate for n in "abc"])
    assert got == pytest.approx(beta, rel=1e-10)
    assert res.sigmas["y1"] == res.sigmas["y2"] != res.sigmas["y3"]
    n, p = 3 * x.size, 4
    s2 = sse12 / (2 * x.size) * n / (n - p)  # the pooled ML variance, small-sample corrected
    assert res.sigmas["y1"] ** 2 == pytest.approx(s2, rel=1e-10)
    cov = s2 * np.linalg.inv(X.T @ X)
    assert res.covariance[:3, :3] == pytest.approx(cov, rel=1e-8)
    assert res.noise_groups == {"length": ["y1", "y2"]}
    assert res.noise_dict()["y3"]["group"] is None and res.noise_dict()["y1"]["shared_with"] == ["y2"]
    # the log-likelihood counts one sigma for the pair (ML value), and AIC one parameter for it
    v12, v3 = sse12 / (2 * x.size), res.sse_per_output["y3"] / x.size
    ll = (stats.norm(0, np.sqrt(v12)).logpdf(np.concatenate([y1 - X[:x.size] @ beta, y2 - X[x.size:] @ beta])).sum()
          + stats.norm(0, np.sqrt(v3)).logpdf(y3 - res.parameters["d"].estimate * x).sum())
    assert res.loglik == pytest.approx(ll, rel=1e-10)
    assert res.aic == pytest.approx(2 * (4 + 2) - 2 * ll, rel=1e-10)


def test_per_output_sigmas_differ_from_the_pooled_fit(build):
    """Without the group the intercept a is weighted by each output's own scatter: a
    different (weighted) estimate, so the group is not a no-op."""
    x, y1, y2, y3 = data()
    res = fit(problem(build, x, y1, y2, y3), FitSettings())
    _, beta, _ = stacked_ols(x, y1, y2)
    assert abs(res.parameters["a"].estimate - beta[0]) > 1e-4


def test_api_groups_are_checked(build):
    x, y1, y2, y3 = data()
    prob = problem(build, x, y1, y2, y3)
    with pytest.raises(FitError, match="not a measured output"):
        fit(prob, FitSettings(groups={"g": ("y1", "y9")}))
    with pytest.raises(FitError, match="has its sigma given"):
        fit(prob, FitSettings(sigmas={"y2": 0.1}, groups={"g": ("y1", "y2")}))
    with pytest.raises(FitError, match="in noise groups 'g' and 'h'"):
        fit(prob, FitSettings(groups={"g": ("y1", "y2"), "h": ("y2", "y3")}))


# -- the posterior shares the sigma too ----------------------------------------------------------
@pytest.mark.parametrize("kind", ["gaussian", "student_t"])
def test_posterior_likelihood_uses_one_sigma_for_the_group(build, kind):
    """The layout has one ln sigma for the group (named after it) and the log-likelihood of
    rows (sums of squares for Gaussian noise, residuals for Student-t) equals scipy's density
    with that one sigma on both outputs' residuals."""
    x, y1, y2, y3 = data()
    prob = problem(build, x, y1, y2, y3)
    options = {"dof": 5.0} if kind == "student_t" else {}
    noise = {o: NoiseSpec(o, None, kind, dict(options), "length" if o != "y3" else None) for o in ("y1", "y2")}
    noise["y3"] = NoiseSpec("y3", None, kind, dict(options))
    layout = noise_layout(noise, prob)
    assert [p.name for p in layout.params] == ["sigma[length]", "sigma[y3]"]
    assert "shared with y2" in layout.model("y1").describe()
    post = LogPosterior(prob, priors_from_spec(prob.spec, prob), layout)
    X = np.array([[0.9, 0.45, -0.15, 2.01], [1.1, 0.55, -0.25, 1.99]])
    sig = np.array([[0.2, 0.04], [0.35, 0.06]])
    ll = post.log_likelihood(np.column_stack([X, np.log(sig)]))
    for s in range(2):
        a, b, c, d = X[s]
        pairs = ((y1 - a - b * x, sig[s, 0]), (y2 - a - c * x, sig[s, 0]), (y3 - d * x, sig[s, 1]))
        dist = (lambda sd: stats.norm(0, sd)) if kind == "gaussian" else (lambda sd: stats.t(5.0, 0, sd))
        ref = sum(dist(sd).logpdf(r).sum() for r, sd in pairs)
        assert ll[s] == pytest.approx(ref, rel=1e-11)


# -- the study file --------------------------------------------------------------------------------
STUDY = """[model.inputs]
x = ""

[model.outputs.y1]
expr = "a + b*x"
units = "m"

[model.outputs.y2]
expr = "a + c*x"
units = "m"

[model.outputs.y3]
expr = "d*x"
units = "s"

[parameters.a]
guess = 0.0
units = "m"

[parameters.b]
guess = 1.0
units = "m"

[parameters.c]
guess = 1.0
units = "m"

[parameters.d]
guess = 1.0
units = "s"

[data]
files = ["d.csv"]
stuck_after = "off"

[data.tags]
x = "x"
y1 = "y1"
y2 = "y2"
y3 = "y3"

[sampling]
enabled = false
{noise}
"""


def study_file(tmp_path: Path, noise: str) -> Path:
    path = tmp_path / "study.toml"
    path.write_text(STUDY.format(noise=noise))
    return path


def test_study_file_groups_reach_the_fit_and_results(tmp_path):
    """[noise.groups] length = ["y1", "y2"] through load_study: the settings carry the group,
    the fit pools it (= stacked OLS), and the summary says which outputs share the sigma."""
    x, y1, y2, y3 = data()
    lines = ["x,y1,y2,y3"] + [",".join(repr(float(v)) for v in row) for row in zip(x, y1, y2, y3)]
    (tmp_path / "d.csv").write_text("\n".join(lines) + "\n")
    study = load_study(study_file(tmp_path, '\n[noise.groups]\nlength = ["y1", "y2"]\n'))
    assert study.fit.groups == {"length": ("y1", "y2")}
    assert study.noise["y2"].group == "length" and study.noise["y3"].group is None
    assert [m.group for m in study.noise_models] == ["length", "length", None]
    from graybox.workflow import prepare

    res = fit(prepare(study).problem, study.fit)
    _, beta, _ = stacked_ols(x, y1, y2)
    assert np.array([res.parameters[n].estimate for n in "abc"]) == pytest.approx(beta, rel=1e-10)
    text = res.summary()
    assert "noise group 'length': one sigma shared by y1, y2" in text
    assert [line.split()[-1] for line in text.splitlines() if line.startswith(("y1 ", "y2 "))] == ["'length'"] * 2


BAD_GROUPS = {
    "unknown output": ('length = ["y1", "y7"]', "'y7' is not a measured output", "key 'length'"),
    "close name suggested": ('length = ["y1", "y22"]', "did you mean 'y2'", "key 'length'"),
    "different units": ('mixed = ["y1", "y3"]', "must have the same units, but 'y1' is in [m] and 'y3' in [s]",
                        "key 'mixed'"),
    "output in two groups": ('g1 = ["y1", "y2"]\ng2 = ["y2", "y1"]', "'y2' is already in the noise group 'g1'",
                             "key 'g2'"),
    "named twice": ('length = ["y1", "y1"]', "'y1' is named twice", "key 'length'"),
    "one output": ('length = ["y1"]', "names 1 output(s)", "key 'length'"),
    "not a list": ('length = "y1"', "a noise group is a list of output names", "key 'length'"),
    "named after an output": ('y1 = ["y1", "y2"]', "has the name of an output", "key 'y1'"),
}


@pytest.mark.parametrize("case", sorted(BAD_GROUPS))
def test_bad_groups_are_located_errors(tmp_path, case):
    text, fragment, key = BAD_GROUPS[case]
    path = study_file(tmp_path, f"\n[noise.groups]\n{text}\n")
    with pytest.raises(ConfigError) as err:
        load_study(path)
    msg = str(err.value)
    assert fragment in msg, msg
    assert f"{path}:" in msg and "[noise.groups]" in msg and key in msg


def test_a_given_sigma_in_a_group_is_located_at_its_key(tmp_path):
    path = study_file(tmp_path, '\n[noise.y2]\nsigma = 0.1\n\n[noise.groups]\nlength = ["y1", "y2"]\n')
    with pytest.raises(ConfigError, match="has its sigma given, but it is in the noise group 'length'") as err:
        load_study(path)
    assert "[noise.y2] key 'sigma'" in str(err.value) and f"{path}:" in str(err.value)


def test_mixed_noise_kinds_in_a_group_are_refused(tmp_path):
    path = study_file(tmp_path, '\n[noise.y2]\nkind = "student_t"\n\n[noise.groups]\nlength = ["y1", "y2"]\n')
    with pytest.raises(ConfigError, match="must have one noise kind"):
        load_study(path)


def test_posterior_reports_the_group_sigma_under_every_member(tmp_path):
    """The posterior samples one sigma[length] for y1 and y2: results.json's noise entry of
    each member carries that same posterior (graybox's own reporting rule; before, only the
    group's first output had it and the others showed an empty posterior)."""
    import graybox

    x, y1, y2, y3 = data()
    lines = ["x,y1,y2,y3"] + [",".join(repr(float(v)) for v in row) for row in zip(x, y1, y2, y3)]
    (tmp_path / "d.csv").write_text("\n".join(lines) + "\n")
    bounded = {name: {**v, "bounds": [-10.0, 10.0] if name != "d" else [0.1, 10.0]}
               for name, v in {"a": {"guess": 0.0, "units": "m"}, "b": {"guess": 1.0, "units": "m"},
                               "c": {"guess": 1.0, "units": "m"}, "d": {"guess": 1.0, "units": "s"}}.items()}
    study = graybox.load_study(study_file(tmp_path, '\n[noise.groups]\nlength = ["y1", "y2"]\n'),
                               {"parameters": bounded}, sample=True)
    post = graybox.fit(study).sample(walkers=16, max_steps=400, seed=3)
    noise = post.to_dict()["noise"]
    s1, s2 = noise["y1"]["posterior"]["sigma"], noise["y2"]["posterior"]["sigma"]
    assert s1["median"] == s2["median"] and s1["ci95"] == s2["ci95"]
    assert noise["y3"]["posterior"]["sigma"]["median"] != s1["median"]

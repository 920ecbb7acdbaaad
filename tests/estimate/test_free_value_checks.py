"""Free values the data cannot determine, and intervals at the bounds.

* A free value that no measured output depends on (structurally, or with a zero Jacobian
  column at the guess) is refused before any fitting, with an error naming it.
* A rank deficiency found only at the optimum keeps the determined values' standard errors:
  reference statsmodels OLS on the identifiable reduced design (the undetermined values'
  combination as one regressor), whose residual degrees of freedom are n - rank.
* A Wald interval reaching beyond the value's own bound is clipped there and marked:
  reference statsmodels' t interval (conf_int) for the unclipped end.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import statsmodels.api as sm

from graybox.cli import main
from graybox.study import load_study
from graybox.data.record import record_from_arrays
from graybox.errors import ConfigError, FitError
from graybox.estimate.fit import FitSettings, fit, wald_interval
from graybox.estimate.problem import Experiment, Problem
from graybox.simulate import Engine, plan


def problem_for(spec, x, y, **inputs):
    rec = record_from_arrays("main", np.arange(x.size), {"x": x, **inputs}, {"y": y})
    return Problem(spec, [Experiment("main", plan(spec, rec))], Engine(spec, "reference"))


# -- refused before any computation --------------------------------------------------------------
STUDY = """[model.inputs]
x = ""
u = ""
{model}

[parameters.a]
guess = 1.0
{params}

[data]
files = ["d.csv"]
stuck_after = "off"
{data}

[sampling]
enabled = false
"""


def study_file(tmp_path: Path, model: str, params: str = "", data: str = "[data.tags]\nx = \"x\"\nu = \"u\"\ny = \"y\"",
               rows: str | None = None) -> Path:
    (tmp_path / "d.csv").write_text(rows or "x,u,y\n" + "".join(f"{i},0,{2.0 * i + 0.1 * (-1) ** i}\n"
                                                               for i in range(12)))
    path = tmp_path / "study.toml"
    path.write_text(STUDY.format(model=model, params=params, data=data))
    return path


STATIC = '[model.outputs.y]\nexpr = "a*x"'


def test_a_parameter_in_no_equation_is_refused_at_its_table(tmp_path):
    path = study_file(tmp_path, STATIC, "\n[parameters.spare]\nguess = 2.0\nbounds = [0.1, 10]")
    with pytest.raises(ConfigError, match="parameter 'spare' is free, but no measured output depends on it") as err:
        load_study(path)
    text = str(err.value)
    assert f"{path}:10 [parameters.spare]" in text and "set fixed = true, or remove it" in text


def test_a_fixed_unused_parameter_is_only_warned_about(tmp_path):
    path = study_file(tmp_path, STATIC, "\n[parameters.spare]\nguess = 2.0\nfixed = true")
    assert any("'spare' is not used" in w for w in load_study(path).spec.warnings)


def test_a_parameter_of_an_unmeasured_state_or_unused_derived_quantity_is_refused(tmp_path):
    """k appears only in the rate of a state no output depends on; g only in a derived
    quantity nobody uses: neither can influence the data."""
    model = (STATIC + '\n\n[model.states.z]\nunits = ""\nrate = "-k*z"\ninitial = 1.0\n\n'
             '[model.derived]\nq = { expr = "g*x" }\n\n[model.constants]\ntau = { value = 10.0, units = "s" }')
    path = study_file(tmp_path, model, '\n[parameters.k]\nguess = 0.1\nunits = "1/s"\n\n[parameters.g]\nguess = 1.0',
                      data="time_column = \"x\"\n[data.tags]\nu = \"u\"\ny = \"y\"")
    with pytest.raises(ConfigError, match="parameter 'k' is free, but no measured output") as err:
        load_study(path)
    assert "[parameters.k]" in str(err.value)
    path = study_file(tmp_path, model.replace("-k*z", "-z/tau"), "\n[parameters.g]\nguess = 1.0",
                      data="time_column = \"x\"\n[data.tags]\nu = \"u\"\ny = \"y\"")
    with pytest.raises(ConfigError, match="parameter 'g' is free"):
        load_study(path)


def test_an_estimated_initial_state_no_output_sees_is_refused(tmp_path):
    model = (STATIC + '\n\n[model.states.z]\nunits = ""\nrate = "-z/tau"\ninitial = "estimate"\n\n'
             '[model.constants]\ntau = { value = 10.0, units = "s" }')
    path = study_file(tmp_path, model, data="time_column = \"x\"\n[data.tags]\nu = \"u\"\ny = \"y\"")
    with pytest.raises(ConfigError, match="the initial value of state 'z' is to be estimated") as err:
        load_study(path)
    assert "[model.states.z] key 'initial'" in str(err.value)


def test_a_state_reached_through_another_state_counts(tmp_path, build):
    """y measures s1, whose rate uses s2, whose rate uses k: k is reachable (no error)."""
    spec = build({"states": {"s1": {"units": "", "rate": "(s2 - s1)/tau", "initial": 0.0},
                             "s2": {"units": "", "rate": "-k*s2", "initial": 1.0}},
                  "constants": {"tau": {"value": 1.0, "units": "s"}},
                  "outputs": {"y": {"expr": "s1"}}}, {"k": {"guess": 0.5, "bounds": [0.01, 10], "units": "1/s"}})
    from graybox.estimate.reach import unused_free_values

    assert unused_free_values(spec) == []


def test_the_python_api_refuses_it_too(build):
    spec = build({"inputs": {"x": ""}, "outputs": {"y": {"expr": "a*x"}}}, {"a": {"guess": 1.0}, "spare": {"guess": 1.0}})
    x = np.linspace(1, 2, 10)
    with pytest.raises(FitError, match="parameter 'spare' is free"):
        fit(problem_for(spec, x, 2 * x, u=np.zeros(10)))


def test_a_zero_jacobian_column_at_the_guess_is_refused(build):
    """b multiplies an input that is zero throughout the record: its column is zero for any
    value, and the old fit lost every standard error (rank 1/2) after a warning."""
    spec = build({"inputs": {"x": "", "u": ""}, "outputs": {"y": {"expr": "a*x + b*u"}}},
                 {"a": {"guess": 1.0}, "b": {"guess": 1.0}})
    x = np.linspace(1, 2, 10)
    with pytest.raises(FitError, match=r"no measured output depends on b = 1 at the initial guess") as err:
        fit(problem_for(spec, x, 2 * x, u=np.zeros(10)))
    assert "fix it, or remove it" in err.value.hint


def test_cli_fit_refuses_a_zero_column_with_exit_2(tmp_path, capsys):
    path = study_file(tmp_path, '[model.outputs.y]\nexpr = "a*x + b*u"', "\n[parameters.b]\nguess = 1.0")
    code = main(["fit", str(path), "--out", str(tmp_path / "run")])
    err = capsys.readouterr().err
    assert code == 2 and "Traceback" not in err
    assert "error: " in err and "no measured output depends on b = 1 at the initial guess" in err
    assert not (tmp_path / "run").exists()


def test_cli_check_and_fit_refuse_an_unused_parameter(tmp_path, capsys):
    path = study_file(tmp_path, STATIC, "\n[parameters.spare]\nguess = 2.0")
    assert main(["check", str(path)]) == 2
    err_check = capsys.readouterr().err
    assert main(["fit", str(path), "--out", str(tmp_path / "run")]) == 2
    err_fit = capsys.readouterr().err
    line = [x for x in err_check.splitlines() if x.startswith("error: ")][0]
    assert line == [x for x in err_fit.splitlines() if x.startswith("error: ")][0]
    assert "parameter 'spare' is free" in line and "[parameters.spare]" in line


# -- a rank deficiency found at the optimum ------------------------------------------------------
def quadratic_data():
    rng = np.random.default_rng(1)
    x = np.linspace(0, 3, 25)
    return x, 1 + 0.5 * x - 0.3 * x**2 + 0.05 * rng.standard_normal(x.size)


def test_a_product_of_two_values_keeps_the_others_standard_errors(build):
    """y = a + b x + c d x^2: only c d is determined (rank 3/4 everywhere).  a and b keep the
    estimates, standard errors and t intervals of OLS on [1, x, x^2] (residual dof n - 3);
    c and d are marked undetermined, without a standard error."""
    spec = build({"inputs": {"x": ""}, "outputs": {"y": {"expr": "a + b*x + c*d*x**2"}}},
                 {"a": {"guess": 0.0}, "b": {"guess": 1.0}, "c": {"guess": 1.0}, "d": {"guess": 1.0}})
    x, y = quadratic_data()
    res = fit(problem_for(spec, x, y))
    ols = sm.OLS(y, np.column_stack([np.ones_like(x), x, x**2])).fit()
    assert res.rank == 3 and res.dof == ols.df_resid == 22
    for j, name in enumerate("ab"):
        p = res.parameters[name]
        assert p.determined and p.estimate == pytest.approx(ols.params[j], rel=1e-8)
        assert p.stderr == pytest.approx(ols.bse[j], rel=1e-6)
        assert p.ci95 == pytest.approx(tuple(ols.conf_int(0.05)[j]), rel=1e-6)
    assert res.parameters["c"].estimate * res.parameters["d"].estimate == pytest.approx(ols.params[2], rel=1e-8)
    for name in "cd":
        assert not res.parameters[name].determined and np.isnan(res.parameters[name].stderr)
        assert res.parameters[name].to_dict()["determined"] is False
    assert res.sigmas["y"] ** 2 == pytest.approx(ols.scale, rel=1e-8)
    assert any("do not determine c, d" in w for w in res.warnings)
    assert "NOT DETERMINED" in res.summary()


def test_a_term_that_vanishes_at_the_optimum_keeps_the_others_standard_errors(build):
    """y = a + b x + c max(d, 0) x^2 with c >= 0.5 and concave data: the fit drives d below 0,
    where c and d have no influence at all (zero columns at the optimum, not at the guess).
    a and b are then OLS on [1, x], with its standard errors (residual dof n - 2)."""
    spec = build({"inputs": {"x": ""}, "outputs": {"y": {"expr": "a + b*x + c*max(d, 0)*x**2"}}},
                 {"a": {"guess": 0.0}, "b": {"guess": 1.0}, "c": {"guess": 1.0, "bounds": [0.5, 10]},
                  "d": {"guess": 1.0}})
    x, y = quadratic_data()
    res = fit(problem_for(spec, x, y))
    assert res.parameters["d"].estimate < 0  # the premise: the term switched itself off
    ols = sm.OLS(y, np.column_stack([np.ones_like(x), x])).fit()
    assert res.rank == 2 and res.dof == ols.df_resid
    for j, name in enumerate("ab"):
        assert res.parameters[name].estimate == pytest.approx(ols.params[j], rel=1e-8)
        assert res.parameters[name].stderr == pytest.approx(ols.bse[j], rel=1e-6)
    assert [res.parameters[n].determined for n in "abcd"] == [True, True, False, False]
    corr = res.correlation
    assert np.isfinite(corr[0, 1]) and np.isnan(corr[2, 3])


# -- intervals at the bounds --------------------------------------------------------------------
def test_a_wald_interval_is_clipped_at_the_bound_and_marked(build):
    """A slope bounded below by 1e-10, estimated at about one standard error above it: the
    t interval of statsmodels reaches below zero; graybox's ends at the bound, marked, and
    its upper end is statsmodels'."""
    spec = build({"inputs": {"x": ""}, "outputs": {"y": {"expr": "a*x"}}}, {"a": {"guess": 1e-6, "bounds": [1e-10, 1]}})
    rng = np.random.default_rng(8)
    x = np.linspace(1, 2, 20)
    y = 2e-7 * x + 1e-6 * rng.standard_normal(x.size)
    ols = sm.OLS(y, x[:, None]).fit()
    lo_ref, hi_ref = ols.conf_int(0.05)[0]
    assert 1e-10 < ols.params[0] and lo_ref < 1e-10 < hi_ref  # the premise
    res = fit(problem_for(spec, x, y))
    p = res.parameters["a"]
    assert p.estimate == pytest.approx(ols.params[0], rel=1e-8) and p.at_bound is None
    assert p.ci95[0] == 1e-10 and p.ci95[1] == pytest.approx(hi_ref, rel=1e-8)
    assert p.clipped == "lower" and p.to_dict()["ci95_clipped"] == "lower"
    assert "interval clipped at the lower bound" in res.summary()
    assert any("clipped at its lower bound" in w for w in res.warnings)


def test_wald_interval_rules():
    """The interval arithmetic itself: x -/+ q se, one-sided q1 at a bound, clipped where it
    leaves [lo, hi] (q = 1.96, q1 = 1.645, the normal quantiles, common practice)."""
    assert wald_interval(1.0, 0.1, 0.0, 2.0, 1.96, 1.645, None) == ((pytest.approx(0.804), pytest.approx(1.196)), None)
    assert wald_interval(0.1, 0.1, 0.0, 2.0, 1.96, 1.645, None) == ((0.0, pytest.approx(0.296)), "lower")
    assert wald_interval(1.9, 0.1, 0.0, 2.0, 1.96, 1.645, None) == ((pytest.approx(1.704), 2.0), "upper")
    assert wald_interval(1.0, 1.0, 0.0, 2.0, 1.96, 1.645, None) == ((0.0, 2.0), "both")
    assert wald_interval(0.0, 0.1, 0.0, 2.0, 1.96, 1.645, "lower") == ((0.0, pytest.approx(0.1645)), None)
    assert wald_interval(0.0, 2.0, 0.0, 2.0, 1.96, 1.645, "lower") == ((0.0, 2.0), "upper")
    assert wald_interval(2.0, 0.1, 0.0, 2.0, 1.96, 1.645, "upper") == ((pytest.approx(1.8355), 2.0), None)

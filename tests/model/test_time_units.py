"""``[model] time_units``: rates written per minute or per hour, simulated in seconds.

References: the analytic solution of first-order decay, x' = -k x, x(t) = x0 exp(-k t)
(standard calculus), with its sensitivity dx/dk = -t x0 exp(-k t); NIST SP 811 (1 min =
60 s, 1 h = 3600 s); pint for the unit checks.
"""

import numpy as np
import pytest

from graybox.data.record import record_from_arrays
from graybox.errors import ModelError
from graybox.simulate import Engine, Tolerances, plan

K_PER_MIN = 0.3
X0 = 2.0


def decay_model(time_units="min", k_units="1/min"):
    model = {"states": {"x": {"units": "percent", "rate": "-k*x", "initial": X0}}, "inputs": {"u": ""},
             "derived": {"kx": {"expr": "k*x", "units": f"percent*{k_units}"}},
             "outputs": {"y": {"expr": "x", "units": "percent"}, "x_half": {"expr": "x/2", "units": "percent"}}}
    if time_units is not None:
        model["time_units"] = time_units
    return model, {"k": {"guess": K_PER_MIN, "bounds": [0.01, 5.0], "units": k_units}}


def test_rate_in_percent_per_minute_passes_only_with_minutes(build):
    """A rate in %/min against a state in %: accepted with time_units = "min"; without it
    the check names the factor 1/60 (1 min = 60 s, NIST SP 811) and the key to set."""
    model, params = decay_model()
    spec = build(model, params)
    assert spec.time_units == "min" and spec.time_seconds == 60.0
    model, params = decay_model(time_units=None)
    with pytest.raises(ModelError, match=r"factor 0\.0166667") as exc:
        build(model, params)
    assert "time_units" in exc.value.hint
    model, params = decay_model(time_units="h", k_units="1/h")
    assert build(model, params).time_seconds == 3600.0


@pytest.mark.parametrize("bad", ["kg", "degC", "", "parsec"])
def test_time_units_must_be_a_time(build, bad):
    model, params = decay_model(time_units=bad)
    with pytest.raises(ModelError) as exc:
        build(model, params)
    assert "time_units" in exc.value.where


@pytest.mark.parametrize("engine", ["reference", "compiled"])
def test_decay_per_minute_simulated_in_seconds(build, engine):
    """k = 0.3 1/min written per minute; the record's time is in seconds: x = x0 exp(-0.3 t/60)
    and dx/dk = -(t/60) x0 exp(-0.3 t/60) (t/60 in minutes, k in 1/min), at 1e-7."""
    model, params = decay_model()
    spec = build(model, params)
    t = np.arange(0.0, 1201.0, 30.0)
    rec = record_from_arrays("decay", t, {"u": np.zeros_like(t)}, {"y": np.zeros_like(t), "x_half": np.zeros_like(t)})
    tl = plan(spec, rec)
    res = Engine(spec, engine, Tolerances(rtol=1e-10, atol=1e-12)).simulate(tl, np.array([[K_PER_MIN]]), sens=True)
    minutes = t / 60.0
    exact = X0 * np.exp(-K_PER_MIN * minutes)
    np.testing.assert_allclose(res.outputs["y"][0], exact, rtol=1e-7, atol=0)
    np.testing.assert_allclose(res.outputs["x_half"][0], exact / 2, rtol=1e-7, atol=0)
    np.testing.assert_allclose(res.sens["y"][0, :, 0], -minutes * exact, rtol=1e-6, atol=1e-12)


def test_derived_quantities_and_outputs_are_not_rescaled(build):
    """Only rates are converted: derived quantities and outputs keep their expressions (the
    per-second rate is the written rate divided by 60)."""
    from graybox.model.expr import Num, div

    model, params = decay_model()
    spec = build(model, params)
    assert spec.derived_exprs["kx"] == build(*decay_model(time_units="s", k_units="1/s")).derived_exprs["kx"]
    assert spec.output_exprs == build(*decay_model(time_units="s", k_units="1/s")).output_exprs
    (rate,) = spec.rates
    seconds = build(*decay_model(time_units="s", k_units="1/s")).rates[0]
    assert rate == div(seconds, Num(60.0)) and rate != seconds
    assert "[percent/min]" in spec.describe()


def test_python_function_rates_per_hour(build):
    """model_from_function with time_units = "h": the function's rate per hour is divided by
    3600 (NIST SP 811) before the engines see it."""
    from graybox.model.api import model_from_function

    spec = model_from_function("decay", states={"x": ""}, inputs={"u": ""},
                               parameters={"k": {"guess": 0.5, "units": "1/h"}},
                               rhs=lambda x, u, p: {"x": -p["k"] * x["x"]}, initial={"x": 1.0}, time_units="h")
    out = np.zeros((1, 1))
    spec.python_rhs(np.array([[2.0]]), np.array([0.0]), np.array([[0.5]]), out)
    assert out[0, 0] == pytest.approx(-0.5 * 2.0 / 3600.0, rel=1e-15)


STUDY = """
[study]
name = "batch_decay"
seed = 7

[model]
time_units = "min"

[model.states.x]
units = "percent"
rate = "-k*x + 0*u"

[model.inputs]
u = "percent/min"

[parameters.k]
guess = 0.1
bounds = [0.01, 2.0]
units = "1/min"

[data]
files = ["batch.csv"]
time_column = "timestamp"
time_format = "iso"

[data.tags.x]
tag = "AI_conc"
units = "percent"

[data.tags.u]
tag = "FI_feed"
units = "percent/min"

[noise.x]
sigma = 0.05
"""


def test_fit_through_a_study_file_recovers_k_per_minute(tmp_path):
    """A batch record sampled every 30 s for 20 min, x = 80 exp(-0.3 t/min) plus Gaussian
    noise (sd 0.05 %): the fit reports k in 1/min and recovers 0.3 within 3 standard errors
    (and within 1%)."""
    import pandas as pd

    from graybox.workflow import fit_study

    t = np.arange(0.0, 1201.0, 30.0)
    rng = np.random.default_rng(11)
    x = 80.0 * np.exp(-K_PER_MIN * t / 60.0) + 0.05 * rng.standard_normal(t.size)
    stamps = pd.Timestamp("2026-03-02T08:00:00Z") + pd.to_timedelta(t, unit="s")
    pd.DataFrame({"timestamp": stamps.strftime("%Y-%m-%dT%H:%M:%SZ"), "AI_conc": x,
                  "FI_feed": np.zeros_like(t)}).to_csv(tmp_path / "batch.csv", index=False)
    (tmp_path / "study.toml").write_text(STUDY)
    doc = fit_study(tmp_path / "study.toml", tmp_path / "run", echo=lambda _m: None, sample=False)
    k = doc["parameters"]["k"]
    assert k["units"] == "1/min"
    assert abs(k["estimate"] - K_PER_MIN) <= 3 * k["stderr"]
    assert k["estimate"] == pytest.approx(K_PER_MIN, rel=0.01)

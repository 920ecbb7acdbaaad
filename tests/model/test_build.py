"""Degrees-of-freedom, units and parameter checks made before any fit."""

import pytest

from graybox.errors import ModelError

VESSEL = {
    "states": {"T": {"units": "degC", "rate": "(eta*Q - UA*(T - T_room))/C"}},
    "inputs": {"Q": "W", "T_room": {"units": "degC"}},
    "constants": {"C": {"value": 4.2e6, "units": "J/K"}},
}
PARAMS = {"UA": {"guess": 30, "bounds": [1, 500], "units": "W/K"}, "eta": {"guess": 0.9, "bounds": [0.1, 1.2]}}


def copy_model(**changes):
    import copy

    m = copy.deepcopy(VESSEL)
    for k, v in changes.items():
        m[k] = v
    return m


def test_vessel_builds(build):
    spec = build(VESSEL, PARAMS)
    assert spec.state_names == ["T"]
    assert spec.outputs[0].state == "T"
    assert spec.states[0].initial == "measured"  # default for a directly measured state
    assert spec.warnings == ()


def test_misspelt_symbol_suggests_close_names(build):
    m = copy_model(states={"T": {"units": "degC", "rate": "(eta*Q - UA*(T - T_rom))/C"}})
    with pytest.raises(ModelError, match=r"(?s)'T_rom' is not defined.*did you mean 'T_room'"):
        build(m, PARAMS)


def test_state_without_rate(build):
    m = copy_model(states={"T": {"units": "degC"}})
    with pytest.raises(ModelError, match="has no rate equation"):
        build(m, PARAMS)


def test_symbol_with_two_roles(build):
    params = dict(PARAMS, Q={"guess": 1.0})
    with pytest.raises(ModelError, match="declared as an input .* and again as a parameter"):
        build(VESSEL, params)


def test_circular_derived_quantities(build):
    m = copy_model(derived={"a": "b*2", "b": "a/2"},
                   states={"T": {"units": "degC", "rate": "(eta*Q*a*b - UA*(T - T_room))/C"}})
    with pytest.raises(ModelError, match="in a circle: a -> b -> a|in a circle: b -> a -> b"):
        build(m, PARAMS)


def test_unused_parameter_is_warned(build):
    spec = build(VESSEL, dict(PARAMS, spare={"guess": 1.0}))
    assert any("spare" in w for w in spec.warnings)


def test_guess_outside_bounds(build):
    params = dict(PARAMS, UA={"guess": 600, "bounds": [1, 500], "units": "W/K"})
    with pytest.raises(ModelError, match=r"guess 600.0 of parameter 'UA' is outside its bounds"):
        build(VESSEL, params)


def test_unit_mismatch_names_the_term_and_factor(build):
    m = copy_model(inputs={"Q": "kW", "T_room": "degC"})
    with pytest.raises(ModelError) as exc:
        build(m, PARAMS)
    msg = str(exc.value)
    assert "(eta * Q)" in msg and "factor 1000" in msg


def test_rate_with_wrong_dimension(build):
    m = copy_model(states={"T": {"units": "degC", "rate": "eta*Q - UA*(T - T_room)"}})
    with pytest.raises(ModelError, match="rate of state 'T' is in .* but must be in"):
        build(m, PARAMS)


def test_offset_temperature_used_as_factor(build):
    """An Arrhenius term needs absolute temperature: degC as a factor is refused
    (common practice: the product of a reading depends on the scale's zero)."""
    m = copy_model(derived={"k": {"expr": "exp(-1000/T)"}},
                   states={"T": {"units": "degC", "rate": "(eta*Q*k - UA*(T - T_room))/C"}})
    with pytest.raises(ModelError, match="temperature reading on an offset scale used as a factor"):
        build(m, PARAMS)


def test_exp_of_dimensional_argument(build):
    m = copy_model(states={"T": {"units": "degC", "rate": "(eta*Q*exp(UA) - UA*(T - T_room))/C"}})
    with pytest.raises(ModelError, match=r"argument of exp\(\) must be dimensionless"):
        build(m, PARAMS)


def test_unknown_units(build):
    m = copy_model(inputs={"Q": "watts_per_banana", "T_room": "degC"})
    with pytest.raises(ModelError, match="units 'watts_per_banana' are not understood"):
        build(m, PARAMS)


def test_unknown_key_did_you_mean(build):
    from graybox.errors import ConfigError

    params = dict(PARAMS, UA={"guess": 30, "bound": [1, 500], "units": "W/K"})
    with pytest.raises(ConfigError, match="(?s)unknown key.*did you mean 'bounds'"):
        build(VESSEL, params)


def test_arrhenius_about_a_reference_temperature(build):
    """k = k_ref*exp(-E/R*(1/T - 1/T_ref)): units consistent with T in K."""
    m = {
        "states": {"c": {"units": "mol/m**3", "rate": "F/V*(c_in - c) - k*c", "initial": "steady"},
                   "T": {"units": "K", "rate": "F/V*(T_in - T) + dH*k*c/(rho*cp) - UA/(rho*cp*V)*(T - Tj)",
                         "initial": "steady"}},
        "inputs": {"F": "m**3/s", "c_in": "mol/m**3", "T_in": "K", "Tj": "K"},
        "constants": {"V": {"value": 1.0, "units": "m**3"}, "R": {"value": 8.314, "units": "J/(mol*K)"},
                      "rho": {"value": 1000.0, "units": "kg/m**3"}, "cp": {"value": 4180.0, "units": "J/(kg*K)"},
                      "T_ref": {"value": 350.0, "units": "K"}, "dH": {"value": 5e4, "units": "J/mol"}},
        "derived": {"k": {"expr": "k_ref*exp(-E/R*(1/T - 1/T_ref))", "units": "1/s"}},
        "outputs": {"T_meas": {"expr": "T", "units": "K"}},
    }
    params = {"k_ref": {"guess": 1e-3, "units": "1/s", "bounds": [1e-6, 1]},
              "E": {"guess": 6e4, "units": "J/mol", "bounds": [1e4, 2e5]},
              "UA": {"guess": 5e3, "units": "W/K", "bounds": [1, 1e6]}}
    spec = build(m, params)
    assert [s.initial for s in spec.states] == ["steady", "steady"]
    assert spec.derived[0].name == "k"


def test_static_model_has_no_states(build):
    spec = build({"inputs": {"x": ""}, "outputs": {"y": {"expr": "b1*(1 - exp(-b2*x))"}}},
                 {"b1": {"guess": 500}, "b2": {"guess": 1e-4}})
    assert spec.is_static and spec.output_names == ["y"]

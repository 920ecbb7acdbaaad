"""Unit conversions of tags into model units.

Reference: NIST Special Publication 811 (2008 edition), Appendix B.8/B.9 "Factors for units
listed alphabetically / by kind of quantity", compared to the printed digits (7 significant
figures, the form "6.894 757 E+03").  The factors were transcribed from memory of the printed
table; the exact definitions behind them (1 lb = 0.453 592 37 kg, 1 in = 0.0254 m, 1 US gal =
231 in^3, Btu_IT = 1055.055 852 62 J) are the international agreements SP 811 cites.
"""

import math

import pytest

from graybox.data.units import TagUnits, tag_conversion
from graybox.errors import ConfigError


def sig7(x: float) -> float:
    return float(f"{x:.6e}")


def conv(units, model, **kw):
    return tag_conversion(TagUnits(units=units, **kw), model, tag="X_1", where="cfg.toml [data.tags.X]")


@pytest.mark.reference
@pytest.mark.parametrize("tag_units, model_units, printed", [
    ("psi", "Pa", 6.894757e3),        # SP 811 B.8: pound-force per square inch -> pascal
    ("Btu/h", "W", 2.930711e-1),      # SP 811 B.8: British thermal unit_IT per hour -> watt
    ("USgal", "m**3", 3.785412e-3),   # SP 811 B.8: gallon [U.S.] -> cubic meter
    ("lb", "kg", 4.535924e-1),        # SP 811 B.8: pound (avoirdupois) -> kilogram
])
def test_nist_sp811_factors(tag_units, model_units, printed):
    """Scale factors equal NIST SP 811 Appendix B.8 to the printed digits."""
    c = conv(tag_units, model_units)
    assert c.offset == 0.0
    assert sig7(c.scale) == printed


@pytest.mark.reference
def test_degF_reading_nist_formula():
    """NIST SP 811 B.9: T/K = (t/degF + 459.67)/1.8, so 10 degF reads 260.927 8 K."""
    c = conv("degF", "K", temperature="reading")
    for t_f in (-40.0, 10.0, 32.0, 212.0):
        assert math.isclose(c.apply_scalar(t_f), (t_f + 459.67) / 1.8, rel_tol=1e-14)
    assert round(c.apply_scalar(10.0), 2) == 260.93


@pytest.mark.reference
def test_degF_difference_nist_interval_factor():
    """NIST SP 811 B.8: degree Fahrenheit (temperature interval) -> kelvin 5.555 556 E-01;
    a 10 degF difference is 5.556 K, and it is the same in delta degC."""
    c = conv("degF", "K", temperature="difference")
    assert c.offset == 0.0 and sig7(c.scale) == 5.555556e-1
    assert round(c.apply_scalar(10.0), 3) == 5.556
    c2 = conv("degF", "degC", temperature="difference")
    assert math.isclose(c2.apply_scalar(10.0), 50 / 9, rel_tol=1e-14)


def test_degC_reading_into_kelvin_and_back():
    """Common practice (SI brochure): T/K = t/degC + 273.15."""
    assert conv("degC", "K", temperature="reading").apply_scalar(25.0) == pytest.approx(298.15, abs=1e-12)
    assert conv("K", "degC", temperature="reading").apply_scalar(300.0) == pytest.approx(26.85, abs=1e-12)


def test_temperature_kind_must_be_declared_when_an_offset_scale_is_involved():
    """A degF tag feeding a K symbol is ambiguous unless declared (reading or difference)."""
    with pytest.raises(ConfigError, match="reading or a difference"):
        conv("degF", "K")
    assert conv("degR", "K").scale == pytest.approx(5 / 9)  # both absolute: no ambiguity


@pytest.mark.reference
def test_gauge_pressure_against_declared_atmosphere():
    """0 psig at a standard atmosphere (101 325 Pa, NIST SP 811 B.8: atmosphere, standard ->
    pascal 1.013 25 E+05) is 101 325 Pa; 1 barg at a site atmosphere of 95 kPa is 195 kPa."""
    c = conv("psig", "Pa", atmosphere="101.325 kPa")
    assert c.apply_scalar(0.0) == pytest.approx(101325.0, rel=1e-15)
    assert sig7(c.scale) == 6.894757e3
    c2 = conv("barg", "kPa", atmosphere="95 kPa")
    assert c2.apply_scalar(1.0) == pytest.approx(195.0, rel=1e-15)
    c3 = conv("bar", "Pa", pressure="gauge", atmosphere="1 atm")
    assert c3.apply_scalar(0.5) == pytest.approx(50000 + 101325, rel=1e-15)
    with pytest.raises(ConfigError, match="no atmosphere"):
        conv("psig", "Pa")


@pytest.mark.reference
def test_standard_volumetric_flow_to_molar_and_mass_flow():
    """At 101.325 kPa and 0 degC the molar volume of an ideal gas is 22.413 969 54 L/mol
    (CODATA 2018 recommended value), so 1 Nm3/h is 1/0.022 413 969 54/3600 mol/s."""
    c = conv("Nm3/h", "mol/s", standard_pressure="101.325 kPa", standard_temperature="0 degC")
    assert c.apply_scalar(1.0) == pytest.approx(1 / 0.02241396954 / 3600, rel=1e-9)
    m = conv("m**3/h", "kg/h", flow_basis="standard", standard_pressure="101.325 kPa",
             standard_temperature="0 degC", molar_mass="28.9647 g/mol")
    assert m.apply_scalar(1.0) == pytest.approx(28.9647e-3 / 0.02241396954, rel=1e-9)
    with pytest.raises(ConfigError, match="molar mass"):
        conv("Nm3/h", "kg/s", standard_pressure="101.325 kPa", standard_temperature="0 degC")
    with pytest.raises(ConfigError, match="standard conditions"):
        conv("scfm", "mol/s")


def test_percent_of_span():
    """50 % of a 0..250 degF span reads 125 degF = (125 + 459.67)/1.8 K (NIST SP 811 B.9)."""
    c = conv("%", "K", span=(0.0, 250.0), span_units="degF", temperature="reading")
    assert c.apply_scalar(50.0) == pytest.approx((125 + 459.67) / 1.8, rel=1e-14)
    f = conv("%", "kg/s", span=(0.0, 36.0), span_units="t/h")
    assert f.apply_scalar(100.0) == pytest.approx(10.0, rel=1e-14)
    with pytest.raises(ConfigError, match="not percent"):
        conv("kg/s", "kg/s", span=(0.0, 1.0), span_units="kg/s")


def test_impossible_conversion_names_both_units():
    with pytest.raises(ConfigError) as exc:
        conv("kW", "kg/s")
    text = str(exc.value)
    assert "kW" in text and "kg / s" in text and "cannot be converted" in text and "X_1" in text


def test_unknown_unit_is_a_located_error():
    with pytest.raises(ConfigError) as exc:
        conv("degFF", "K")
    assert "degFF" in str(exc.value) and "cfg.toml [data.tags.X]" in str(exc.value)


def test_identity_when_units_match():
    c = conv("W", "W")
    assert c.identity and c.text.startswith("none")


def test_model_config_and_data_share_one_registry():
    # one registry per process: quantities from the model checks and the data conversions
    # combine (pint refuses quantities of two registries), and it is built once
    from graybox.data.units import registry as data_registry
    from graybox.model.units import registry
    from graybox.unitreg import registry as shared

    assert registry() is data_registry() is shared()
    q = registry().Quantity(2.0, "USgal/min") + data_registry().Quantity(1.0, "m**3/s")
    assert q.to("m**3/s").magnitude == pytest.approx(1.0 + 2 * 3.785412e-3 / 60, rel=1e-6)  # SP 811 B.8 gallon

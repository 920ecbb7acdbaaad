"""Trade unit names on the shared registry (issue 13, section 4: `gpm` was refused).

Reference: NIST Special Publication 811 (2008 edition), Appendix B.8 "Factors for units
listed alphabetically", compared to the printed digits (the form "6.309 020 E-05").  The
factors are from memory of the printed table, not read from it; where SP 811 prints no
entry for a name (gph, MGD, igpm, cfh, bpd, MMBtu) the expected value is built from the
entries it does print (the gallon, the cubic foot, the petroleum barrel, the Btu_IT) and
the exact SI second, minute, hour and day.  The CODATA 2018 molar gas constant
R = 8.314 462 618 J/(mol K) is exact since the 2019 SI.
"""

from __future__ import annotations

import math

import pytest

from graybox.data.units import TagUnits, tag_conversion
from graybox.errors import ConfigError
from graybox.unitreg import AMBIGUOUS_UNITS, TRADE_UNITS, registry

# NIST SP 811 Appendix B.8, from memory of the printed table
GALLON_US_M3 = 3.785412e-3  # gallon [U.S.] (gal) -> cubic meter
GPM_M3_S = 6.309020e-5  # gallon [U.S.] per minute (gpm) -> cubic meter per second
GAL_PER_DAY_M3_S = 4.381264e-8  # gallon [U.S.] per day -> cubic meter per second
GALLON_IMP_M3 = 4.54609e-3  # gallon [Canadian and U.K. (Imperial)] -> cubic meter (exact)
CUBIC_FOOT_M3 = 2.831685e-2  # cubic foot -> cubic meter
CFM_M3_S = 4.719474e-4  # cubic foot per minute -> cubic meter per second
BARREL_OIL_M3 = 1.589873e-1  # barrel [for petroleum, 42 gallons (U.S.)] (bbl) -> cubic meter
BTU_IT_J = 1.055056e3  # British thermal unit_IT -> joule
INCH_M = 2.54e-2  # inch -> meter (exact)
FOOT_M = 3.048e-1  # foot -> meter (exact)
PSI_PA = 6.894757e3  # pound-force per square inch -> pascal
POUND_KG = 4.5359237e-1  # pound (avoirdupois) -> kilogram (exact)
BAR_PA = 1e5  # bar -> pascal (exact)


def printed(x: float, digits: int) -> float:
    """``x`` to ``digits`` significant figures, as SP 811 prints it."""
    return float(f"{x:.{digits - 1}e}")


def conv(units, model, **kw):
    return tag_conversion(TagUnits(units=units, **kw), model, tag="X_1", where="cfg.toml [data.tags.X]")


@pytest.mark.reference
@pytest.mark.parametrize("name, model, expected, digits", [
    ("gpm", "m**3/s", GPM_M3_S, 7),
    ("GPM", "m**3/s", GPM_M3_S, 7),
    ("USgal", "m**3", GALLON_US_M3, 7),
    ("cfm", "m**3/s", CFM_M3_S, 7),
    ("MGD", "m**3/s", 1e6 * GAL_PER_DAY_M3_S, 7),  # million gallons per day
    ("gph", "m**3/s", GALLON_US_M3 / 3600.0, 6),  # built from the gallon entry (7 digits in, 6 out)
    ("igpm", "m**3/s", GALLON_IMP_M3 / 60.0, 6),  # built from the exact imperial gallon
    ("cfh", "m**3/s", CUBIC_FOOT_M3 / 3600.0, 6),
    ("bpd", "m**3/s", BARREL_OIL_M3 / 86400.0, 6),
    ("MMBtu", "J", 1e6 * BTU_IT_J, 7),
    ("in", "m", INCH_M, 3), ("ft", "m", FOOT_M, 4), ("psi", "Pa", PSI_PA, 7), ("lb", "kg", POUND_KG, 8),
])
def test_trade_names_against_nist_sp811(name, model, expected, digits):
    c = conv(name, model)
    assert c.offset == 0.0
    assert printed(c.scale, digits) == printed(expected, digits)


def test_every_trade_name_is_tested_and_defined_once():
    """The list is short and every entry has a check above (or is a spelling of one)."""
    checked = {"gpm", "GPM", "USgal", "cfm", "MGD", "gph", "igpm", "cfh", "bpd", "MMBtu"}
    assert set(TRADE_UNITS) == checked
    ureg = registry()
    for name, (definition, _what) in TRADE_UNITS.items():
        assert ureg.Quantity(1.0, name).to_base_units().magnitude == pytest.approx(
            ureg.Quantity(definition).to_base_units().magnitude, rel=1e-15)


@pytest.mark.reference
def test_gauge_pressures_add_the_declared_atmosphere():
    """absolute = gauge + atmosphere: 10 psig at the standard atmosphere (101 325 Pa,
    SP 811 B.8: atmosphere, standard -> 1.013 25 E+05 Pa) and 2.5 barg at a site's 96 kPa."""
    c = conv("psig", "Pa", atmosphere="101.325 kPa")
    assert printed(c.apply_scalar(10.0), 7) == printed(10.0 * PSI_PA + 101325.0, 7)
    b = conv("barg", "kPa", atmosphere="96 kPa")
    assert b.apply_scalar(2.5) == pytest.approx(2.5 * BAR_PA / 1e3 + 96.0, rel=1e-15)
    with pytest.raises(ConfigError, match="no atmosphere"):
        conv("barg", "Pa")


@pytest.mark.reference
def test_scfm_against_declared_standard_conditions():
    """1 scfm at 60 degF and 14.696 psia (a common U.S. gas-industry basis: common practice,
    no source) is p V / (R T) mol per minute, V = 1 ft^3 (SP 811 B.8), T = (60 + 459.67)/1.8 K
    (SP 811 B.9), p = 14.696 psi (SP 811 B.8 psi factor)."""
    c = conv("scfm", "mol/s", standard_pressure="14.696 psi", standard_temperature="60 degF")
    p = 14.696 * PSI_PA
    t = (60.0 + 459.67) / 1.8
    expected = p * CUBIC_FOOT_M3 / (8.314462618 * t) / 60.0
    assert printed(c.apply_scalar(1.0), 6) == printed(expected, 6)
    m = conv("Nm3/h", "kg/h", standard_pressure="101.325 kPa", standard_temperature="0 degC",
             molar_mass="16.043 g/mol")
    assert m.apply_scalar(1.0) == pytest.approx(101325.0 / (8.314462618 * 273.15) * 16.043e-3, rel=1e-12)


def test_unknown_unit_names_the_trade_aliases():
    with pytest.raises(ConfigError) as exc:
        conv("gpmm", "m**3/s")
    text = str(exc.value)
    assert "'gpmm' are not known to pint" in text and "cfg.toml [data.tags.X]" in text
    for name in ("gpm", "MGD", "psig", "barg", "scfm", "Nm3/h"):
        assert name in exc.value.hint


@pytest.mark.parametrize("text", ["bbl/day", "bbl", "barrel/h"])
def test_a_barrel_is_refused_as_ambiguous(text):
    """pint's barrel is the U.S. liquid barrel, 31.5 gallons (pint's own definition); in the
    trade a barrel of oil is 42 (SP 811 B.8: barrel [for petroleum, 42 gallons (U.S.)]).  The
    ratio 42/31.5 would be a silent factor: refused, with what to write instead."""
    ureg = registry()
    assert ureg.Quantity(1.0, "bbl").to("gallon").magnitude == pytest.approx(31.5, rel=1e-12)
    assert ureg.Quantity(1.0, "oil_barrel").to("gallon").magnitude == pytest.approx(42.0, rel=1e-12)
    with pytest.raises(ConfigError) as exc:
        conv(text, "m**3/s" if "/" in text else "m**3")
    assert "ambiguous" in str(exc.value) and "oil_barrel" in exc.value.hint
    assert set(AMBIGUOUS_UNITS) == {"bbl", "barrel"}


def test_degF_reading_nist_formula_on_a_trade_tag():
    """SP 811 B.9: t/degC = (t/degF - 32)/1.8."""
    c = conv("degF", "degC", temperature="reading")
    for f in (-40.0, 32.0, 98.6, 212.0):
        assert math.isclose(c.apply_scalar(f), (f - 32.0) / 1.8, rel_tol=1e-13, abs_tol=1e-12)

"""The one pint unit registry of graybox.

The model's unit checks, the config's quantity texts and the data layer's conversions all
use it, so quantities from any of them combine, and a process builds it once (building a
registry costs about a quarter of a second: every command and every batch job pays it).
Offset units (degC, degF) are never converted silently: temperatures read on an offset
scale are told apart from differences where they are declared, not guessed.

Trade names that historian exports use and pint does not know are defined here, each from
units pint defines exactly (:data:`TRADE_UNITS`; the tests check each factor against NIST
SP 811, Appendix B).  Names that need a declaration to mean anything are not units at all
and stay out of the registry: gauge pressures (``psig``, ``barg``, ... need the
atmosphere) and standard volumetric flows (``scfm``, ``Nm3/h``, ... need the standard
conditions) are handled by the data layer's conversions (:mod:`graybox.data.units`).
"""

from __future__ import annotations

from functools import lru_cache

import pint

# name -> (definition in pint's units, what it is); multiplicative units only
TRADE_UNITS: dict[str, tuple[str, str]] = {
    "USgal": ("gallon", "U.S. liquid gallon, 231 in^3"),
    "gpm": ("gallon / minute", "U.S. gallon per minute"),
    "GPM": ("gallon / minute", "U.S. gallon per minute"),
    "gph": ("gallon / hour", "U.S. gallon per hour"),
    "MGD": ("1e6 * gallon / day", "million U.S. gallons per day"),
    "igpm": ("imperial_gallon / minute", "imperial (U.K.) gallon per minute"),
    "cfm": ("foot ** 3 / minute", "actual cubic foot per minute (scfm is a standard flow)"),
    "cfh": ("foot ** 3 / hour", "actual cubic foot per hour"),
    "bpd": ("oil_barrel / day", "petroleum barrel (42 U.S. gallons) per day"),
    "MMBtu": ("1e6 * Btu", "million British thermal units"),
}


@lru_cache(maxsize=1)
def registry() -> pint.UnitRegistry:
    """The shared registry, with :data:`TRADE_UNITS` defined on it."""
    ureg = pint.UnitRegistry(autoconvert_offset_to_baseunit=False)
    for name, (definition, _what) in TRADE_UNITS.items():
        ureg.define(f"{name} = {definition}")
    return ureg


# pint's own "bbl" and "barrel" are the U.S. liquid barrel (31.5 U.S. gallons); in the trade
# a barrel of oil is 42.  Either reading would be a silent factor 4/3: the data layer refuses
# these names and asks for oil_barrel or US_liquid_barrel (see graybox.data.units).
AMBIGUOUS_UNITS: dict[str, str] = {
    "bbl": "pint's bbl is the U.S. liquid barrel (31.5 U.S. gal); a petroleum barrel is 42: write oil_barrel "
           "(or bpd for oil_barrel/day), or US_liquid_barrel",
    "barrel": "pint's barrel is the U.S. liquid barrel (31.5 U.S. gal); a petroleum barrel is 42: write oil_barrel, "
              "or US_liquid_barrel",
}

"""Tag units into model units, once, as one affine map per tag.

Every conversion the data layer does is affine, ``model = scale * raw + offset``:

* plain units (``kW`` into ``W``, ``USgal/min`` or ``gpm`` into ``m**3/s``): a scale; the
  trade names the shared registry adds are listed in :data:`graybox.unitreg.TRADE_UNITS`;
* temperature *readings* (``10 degF`` reads ``260.93 K``): scale and offset;
* temperature *differences* (``a 10 degF rise`` is ``5.556 K``): a scale only;
* gauge pressures (``psig``, ``barg``, ``kPag``, ``MPag``, ``mbarg``, or any pressure unit
  with ``pressure = "gauge"``): the declared atmosphere is added;
* standard volumetric flows (``Nm3/h``, ``Sm3/h``, ``scfm``, ``scfh``, ``scfd``, ``MMscfd``
  or any volume flow with ``flow_basis = "standard"``): the ideal-gas amount at the
  declared standard pressure and temperature, then a mass with the tag's molar mass if the
  model wants a mass flow;
* percent of span: ``lo + raw/100 * (hi - lo)`` in the span's units, then as above.

The scale and offset are found by sending 0 and 1 through pint and checked at a third point,
so the factors are pint's (exact definitions where they exist).
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
import pint

from graybox.errors import ConfigError
from graybox.unitreg import AMBIGUOUS_UNITS, TRADE_UNITS, registry

GAUGE_UNITS = {"psig": "psi", "barg": "bar", "kPag": "kPa", "MPag": "MPa", "mbarg": "mbar", "Pag": "Pa"}
STANDARD_FLOW_UNITS = {
    "Nm3/h": "m**3/h", "Nm3/s": "m**3/s", "Nm3/min": "m**3/min", "Nm3/d": "m**3/day",
    "Sm3/h": "m**3/h", "Sm3/s": "m**3/s", "Sm3/d": "m**3/day",
    "scfm": "ft**3/min", "scfh": "ft**3/h", "scfd": "ft**3/day", "MMscfd": "1e6 * ft**3/day",
}
PERCENT_UNITS = ("%", "percent", "pct")
TEMPERATURE_READING = "reading"
TEMPERATURE_DIFFERENCE = "difference"


@dataclass(frozen=True)
class Conversion:
    """``model = scale * raw + offset``; ``text`` says what was done, for the report."""

    scale: float
    offset: float
    text: str

    def apply(self, raw: np.ndarray) -> np.ndarray:
        """``scale * raw + offset`` as a new array (also for the identity)."""
        out = np.multiply(raw, self.scale, dtype=float)
        if self.offset != 0.0:
            out += self.offset
        return out

    def apply_scalar(self, raw: float) -> float:
        """One raw value in tag units converted to model units (``raw * scale + offset``)."""
        return float(raw) * self.scale + self.offset

    @property
    def identity(self) -> bool:
        """Whether the conversion leaves values unchanged (scale 1, offset 0)."""
        return self.scale == 1.0 and self.offset == 0.0


IDENTITY = Conversion(1.0, 0.0, "none (already in model units)")


@dataclass(frozen=True)
class TagUnits:
    """What a tag's configuration says about its units (all texts as written)."""

    units: str
    temperature: str | None = None  # "reading" | "difference" | None
    pressure: str | None = None  # "gauge" | "absolute" | None
    flow_basis: str | None = None  # "standard" | "actual" | None
    span: tuple[float, float] | None = None
    span_units: str | None = None
    molar_mass: str | None = None
    atmosphere: str | None = None
    standard_pressure: str | None = None
    standard_temperature: str | None = None


def quantity(text: str, what: str, where: str) -> pint.Quantity:
    """A pint quantity from text such as '101.325 kPa'; ConfigError when not understood."""
    ureg = registry()
    try:
        q = ureg.Quantity(text)
    except Exception:  # noqa: BLE001 - pint raises many kinds; all mean "not understood"
        raise ConfigError(f"{what} '{text}' is not a quantity pint understands", where=where,
                          hint="write a number with units, e.g. '101.325 kPa' or '15 degC'") from None
    return q


def trade_names_hint() -> str:
    """The trade unit names graybox knows beyond pint's own, for a hint."""
    return (f"trade names known: {', '.join(TRADE_UNITS)}; gauge pressures (with an atmosphere): "
            f"{', '.join(GAUGE_UNITS)}; standard flows (with standard conditions): {', '.join(STANDARD_FLOW_UNITS)}")


def parse_unit(text: str, where: str, whose: str) -> pint.Unit:
    """A units text (blank = dimensionless) as a unit of the shared pint registry; a
    ConfigError located at ``where`` naming ``whose`` units for an ambiguous word, a gauge
    pressure or standard flow (tag units only), or text that is no unit."""
    ureg = registry()
    raw = (text or "").strip() or "dimensionless"
    for word in re.findall(r"[A-Za-z_]+", raw):
        if word in AMBIGUOUS_UNITS:
            raise ConfigError(f"{whose} units '{raw}': '{word}' is ambiguous", where=where, hint=AMBIGUOUS_UNITS[word])
    if raw in GAUGE_UNITS or raw in STANDARD_FLOW_UNITS:
        raise ConfigError(f"{whose} units '{raw}' need a declaration that cannot apply here", where=where,
                          hint="gauge pressures and standard flows are tag units only (with atmosphere or standard "
                               "conditions); write the absolute or actual unit")
    try:
        q = ureg.Quantity(1.0, raw)
    except pint.errors.OffsetUnitCalculusError:
        raise ConfigError(f"{whose} units '{raw}' combine an offset temperature scale with other units", where=where,
                          hint="use K or delta_degC inside compound units") from None
    except Exception:  # noqa: BLE001 - UndefinedUnitError, syntax errors, ...
        close = _close_unit_names(raw)
        hint = (f"did you mean {' or '.join(repr(c) for c in close)}? " if close else "") + \
            "write units pint knows, e.g. 'degC', 'kW', 'kg/h', 'psi', 'USgal/min'; " + trade_names_hint()
        raise ConfigError(f"{whose} units '{raw}' are not known to pint", where=where, hint=hint) from None
    if q.magnitude != 1.0:
        raise ConfigError(f"{whose} units '{raw}' carry a numeric factor", where=where)
    return q.units


def _close_unit_names(raw: str) -> list[str]:
    import difflib

    ureg = registry()
    names = [*TRADE_UNITS, *GAUGE_UNITS, *STANDARD_FLOW_UNITS, "degC", "degF", "K", "psi", "bar", "kPa", "W", "kW", "kg/s",
             "kg/h", "m**3/h", "USgal/min", "lb/h", "Btu/h"]
    names += [n for n in dir(ureg) if len(n) <= 12][:4000]
    return difflib.get_close_matches(raw, names, n=2, cutoff=0.75)


def _is_offset(unit: pint.Unit) -> bool:
    return not registry().Quantity(1.0, unit)._is_multiplicative


def _delta(unit: pint.Unit) -> pint.Unit:
    """The difference form of a unit: delta_degC for degC; other units unchanged."""
    if _is_offset(unit):
        return registry().Unit(f"delta_{unit}")
    return unit


def _dimension_text(unit: pint.Unit) -> str:
    dim = registry().Quantity(1.0, unit).dimensionality
    return str(dim) if str(dim) != "dimensionless" else "dimensionless"


def _affine(fn, label: str, where: str) -> tuple[float, float]:
    """Scale and offset of an affine map given as a function of a float; checked at 3 points."""
    f0, f1 = fn(0.0), fn(1.0)
    scale, offset = f1 - f0, f0
    f7 = fn(7.0)
    if not np.isclose(f7, 7.0 * scale + offset, rtol=1e-12, atol=1e-12 * max(1.0, abs(offset))):
        raise ConfigError(f"the conversion {label} is not affine", where=where)  # pragma: no cover
    return float(scale), float(offset)


@lru_cache(maxsize=4096)
def tag_conversion(spec: TagUnits, model_units: str, *, tag: str, where: str) -> Conversion:
    """The affine map from the tag's raw numbers into model units.

    Raises ConfigError (located at ``where``) for unknown units, a conversion that cannot
    exist (naming both units), and missing declarations (temperature kind, atmosphere,
    standard conditions, molar mass).  Remembered per declaration (pint's arithmetic costs
    about a millisecond a tag; a rerun, a batch or a window scan asks again with the same)."""
    ureg = registry()
    model_u = parse_unit(model_units, where, "model")
    units_text = spec.units.strip()
    steps: list[str] = []

    # 1. percent of span: raw -> engineering value in span units
    pre_scale, pre_offset = 1.0, 0.0
    if spec.span is not None:
        if units_text not in PERCENT_UNITS:
            raise ConfigError(f"tag '{tag}' declares a span but its units are '{units_text}', not percent",
                              where=where, hint="a span is for tags logged in % of range: set units = '%'")
        if not spec.span_units:
            raise ConfigError(f"tag '{tag}' declares a span without span_units", where=where,
                              hint="say what 0 % and 100 % are in, e.g. span_units = 'kg/h'")
        lo, hi = spec.span
        pre_scale, pre_offset = (hi - lo) / 100.0, lo
        units_text = spec.span_units.strip()
        steps.append(f"% of span [{lo:g}, {hi:g}] {units_text}")
    elif units_text in PERCENT_UNITS and spec.span_units:
        raise ConfigError(f"tag '{tag}' has span_units but no span", where=where, hint="add span = [low, high]")

    # 2. gauge pressure
    gauge = spec.pressure == "gauge"
    if units_text in GAUGE_UNITS:
        gauge = True
        units_text = GAUGE_UNITS[units_text]
    # 3. standard volumetric flow
    standard = spec.flow_basis == "standard"
    if units_text in STANDARD_FLOW_UNITS:
        standard = True
        units_text = STANDARD_FLOW_UNITS[units_text]

    tag_u = parse_unit(units_text, where, f"tag '{tag}'")
    tag_q = ureg.Quantity(1.0, tag_u)
    model_q = ureg.Quantity(1.0, model_u)

    if gauge:
        fn, text = _gauge_fn(spec, tag_u, model_u, tag, where)
    elif standard:
        fn, text = _standard_flow_fn(spec, tag_u, model_u, tag, where)
    else:
        is_temp = tag_q.dimensionality == ureg.Quantity(1.0, "K").dimensionality
        if spec.temperature is not None and not is_temp:
            raise ConfigError(f"tag '{tag}' declares temperature = '{spec.temperature}' but its units "
                              f"'{tag_u:~}' are not a temperature", where=where)
        if tag_q.dimensionality != model_q.dimensionality:
            raise ConfigError(
                f"tag '{tag}' in {tag_u:~} cannot be converted into the model's {model_u:~} "
                f"({_dimension_text(tag_u)} vs {_dimension_text(model_u)})", where=where,
                hint="map the symbol to a tag that measures the same quantity, or correct the units")
        if is_temp:
            fn, text = _temperature_fn(spec, tag_u, model_u, tag, where)
        else:
            def fn(x, a=tag_u, b=model_u):
                return float(ureg.Quantity(x, a).to(b).magnitude)
            text = f"{tag_u:~} -> {model_u:~}"
    eng_fn = fn

    def full(x):
        return eng_fn(pre_scale * x + pre_offset)

    scale, offset = _affine(full, text, where)
    if scale == 1.0 and offset == 0.0 and not steps:
        return IDENTITY if tag_u == model_u else Conversion(1.0, 0.0, f"{text} (factor 1)")
    steps.append(text)
    sign = f" + {offset:.7g}" if offset > 0 else (f" - {-offset:.7g}" if offset < 0 else "")
    return Conversion(scale, offset, f"{'; '.join(steps)}: x*{scale:.7g}{sign}")


def _temperature_fn(spec: TagUnits, tag_u, model_u, tag: str, where: str):
    ureg = registry()
    offset_involved = _is_offset(tag_u) or _is_offset(model_u)
    kind = spec.temperature
    if kind is None:
        if offset_involved and tag_u != model_u:
            raise ConfigError(f"tag '{tag}' in {tag_u:~} feeds a model temperature in {model_u:~}: say whether it "
                              "is a reading or a difference", where=where,
                              hint="add temperature = \"reading\" (a thermometer) or \"difference\" (a rise, a span)")
        kind = TEMPERATURE_READING
    if kind == TEMPERATURE_READING:
        def fn(x):
            return float(ureg.Quantity(x, tag_u).to(model_u).magnitude)
        return fn, f"{tag_u:~} reading -> {model_u:~}"
    a, b = _delta(tag_u), _delta(model_u)

    def fn(x):
        return float(ureg.Quantity(x, a).to(b).magnitude)
    return fn, f"{tag_u:~} difference -> {model_u:~}"


def _pressure_dim():
    return registry().Quantity(1.0, "Pa").dimensionality


def _gauge_fn(spec: TagUnits, tag_u, model_u, tag: str, where: str):
    ureg = registry()
    if ureg.Quantity(1.0, tag_u).dimensionality != _pressure_dim():
        raise ConfigError(f"tag '{tag}' is declared a gauge pressure but {tag_u:~} is not a pressure", where=where)
    if ureg.Quantity(1.0, model_u).dimensionality != _pressure_dim():
        raise ConfigError(f"tag '{tag}' is a gauge pressure in {tag_u:~} but the model wants {model_u:~} "
                          f"({_dimension_text(model_u)})", where=where)
    if not spec.atmosphere:
        raise ConfigError(f"tag '{tag}' is a gauge pressure but no atmosphere is declared", where=where,
                          hint="add atmosphere = \"101.325 kPa\" (the standard atmosphere) or the site's value, "
                               "to [data] or to the tag")
    atm = quantity(spec.atmosphere, "atmosphere", where)
    if atm.dimensionality != _pressure_dim():
        raise ConfigError(f"atmosphere '{spec.atmosphere}' is not a pressure", where=where)
    atm_model = float(atm.to(model_u).magnitude)

    def fn(x):
        return float(ureg.Quantity(x, tag_u).to(model_u).magnitude) + atm_model
    return fn, f"{tag_u:~} gauge + atmosphere {spec.atmosphere} -> {model_u:~} absolute"


def _standard_flow_fn(spec: TagUnits, tag_u, model_u, tag: str, where: str):
    ureg = registry()
    vol_flow = ureg.Quantity(1.0, "m**3/s").dimensionality
    if ureg.Quantity(1.0, tag_u).dimensionality != vol_flow:
        raise ConfigError(f"tag '{tag}' is declared a standard volumetric flow but {tag_u:~} is not a volume "
                          "per time", where=where)
    if not (spec.standard_pressure and spec.standard_temperature):
        raise ConfigError(f"tag '{tag}' is a standard volumetric flow but the standard conditions are not declared",
                          where=where, hint="add standard_pressure = \"101.325 kPa\" and standard_temperature = "
                                            "\"0 degC\" (or your contract's conditions) to [data] or to the tag")
    p = quantity(spec.standard_pressure, "standard_pressure", where)
    t_text = spec.standard_temperature.strip()
    t = _temperature_quantity(t_text, where)
    if p.dimensionality != _pressure_dim():
        raise ConfigError(f"standard_pressure '{spec.standard_pressure}' is not a pressure", where=where)
    r = ureg.Quantity(8.314462618, "J/(mol*K)")  # molar gas constant, CODATA 2018 (exact since 2019 SI)
    mol_per_volume = (p / (r * t)).to("mol/m**3")
    model_dim = ureg.Quantity(1.0, model_u).dimensionality
    molar_flow = ureg.Quantity(1.0, "mol/s").dimensionality
    mass_flow = ureg.Quantity(1.0, "kg/s").dimensionality
    cond = f"at {spec.standard_pressure}, {t_text}"
    if model_dim == molar_flow:
        def fn(x):
            return float((ureg.Quantity(x, tag_u) * mol_per_volume).to(model_u).magnitude)
        return fn, f"{tag_u:~} standard {cond} -> {model_u:~} (ideal gas)"
    if model_dim == mass_flow:
        if not spec.molar_mass:
            raise ConfigError(f"tag '{tag}' is a standard volumetric flow and the model wants a mass flow "
                              f"({model_u:~}): the molar mass is needed", where=where,
                              hint="add molar_mass = \"28.96 g/mol\" (or the gas's) to the tag")
        mm = quantity(spec.molar_mass, "molar_mass", where)
        if mm.dimensionality != ureg.Quantity(1.0, "kg/mol").dimensionality:
            raise ConfigError(f"molar_mass '{spec.molar_mass}' is not a mass per amount", where=where)

        def fn(x):
            return float((ureg.Quantity(x, tag_u) * mol_per_volume * mm).to(model_u).magnitude)
        return fn, f"{tag_u:~} standard {cond}, molar mass {spec.molar_mass} -> {model_u:~} (ideal gas)"
    raise ConfigError(f"tag '{tag}' is a standard volumetric flow in {tag_u:~}; the model's {model_u:~} "
                      f"({_dimension_text(model_u)}) cannot be reached from it", where=where,
                      hint="declare the model flow as an amount (mol/s) or a mass (kg/s); an actual volume flow "
                           "would need the line's pressure and temperature")


def _temperature_quantity(text: str, where: str) -> pint.Quantity:
    """An absolute temperature from text like '15 degC', '60 degF' or '288.15 K', in K."""
    ureg = registry()
    parts = text.split(None, 1)
    try:
        value = float(parts[0])
        q = ureg.Quantity(value, parts[1].strip() if len(parts) > 1 else "K").to("K")
    except Exception:  # noqa: BLE001
        raise ConfigError(f"standard_temperature '{text}' is not a temperature", where=where,
                          hint="write e.g. '0 degC', '15 degC', '60 degF'") from None
    return q


def seconds_per_time_unit(text, where: str) -> float:
    """Seconds in one ``text`` (``"min"``, ``"h"``, ``"s"``, ``"day"``...), by the shared pint
    registry; a ConfigError located at ``where`` for text that is no unit or no time."""
    hint = "time_units = \"min\" (or \"s\", \"h\", \"day\")"
    if not isinstance(text, str) or not text.strip():
        raise ConfigError(f"time_units must be a time unit as text, got {text!r}", where=where, hint=hint)
    ureg = registry()
    try:
        unit = ureg.Unit(text.strip())
    except (pint.errors.UndefinedUnitError, pint.errors.DefinitionSyntaxError, ValueError, TypeError,
            AttributeError, AssertionError):
        raise ConfigError(f"'{text}' is not a unit", where=where, hint=hint) from None
    if unit.dimensionality != ureg.second.dimensionality:
        raise ConfigError(f"'{text}' is not a unit of time (its dimension is {unit.dimensionality})", where=where,
                          hint=hint)
    return float(ureg.Quantity(1.0, unit).to(ureg.second).magnitude)

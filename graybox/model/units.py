"""Dimensional analysis of model equations with pint.

Each symbol declares units.  The checker walks an expression tree and infers its units:

* terms of a sum, both sides of a comparison, the arguments of ``min``/``max`` and the two
  branches of a conditional must have the *same* units, not just the same dimension: the
  model is evaluated in the units it declares, so ``kW`` added to ``W`` is reported with
  the factor 1000 instead of being silently wrong;
* arguments of ``exp``, ``log`` and the trigonometric functions must be dimensionless with
  a factor of one; exponents must be dimensionless;
* a bare number in a sum or comparison takes the units of the other side (``T - 273.15``);
  in a product it is dimensionless;
* temperatures on an offset scale (degC, degF) are *readings*: the difference of two
  readings is a temperature difference; a reading plus or minus a difference is a reading;
  a reading used as a factor (``E/(R*T)`` with ``T`` in degC) is an error, because the
  product depends on where the scale's zero sits.  Write such temperatures in K.

A state's rate has the state's units per the model's time unit (``[model] time_units``,
seconds by default); the spec converts rates to per second once, for every engine.
"""

from __future__ import annotations

from dataclasses import dataclass

import pint

from graybox.errors import ModelError
from graybox.model.expr import BinOp, Call, Compare, IfElse, Logic, Neg, Node, Num, Sym, to_text
from graybox.unitreg import registry

_REL_TOL = 1e-12




@dataclass(frozen=True)
class U:
    """Units of an expression: a pint unit (``None`` for a bare number), whether it is a
    reading on an offset temperature scale, and whether it is a truth value."""

    unit: pint.Unit | None
    offset: bool = False
    boolean: bool = False

    def text(self) -> str:
        """The units for a message: pint's short form, or 'a bare number', 'a truth value', '(a reading)'."""
        if self.boolean:
            return "a truth value"
        if self.unit is None:
            return "a bare number"
        base = f"{self.unit:~}" if str(self.unit) != "dimensionless" else "dimensionless"
        return base + (" (a reading)" if self.offset else "")


DIMENSIONLESS = "dimensionless"


def parse_units(text: str, *, where: str = "") -> U:
    """Units from a declaration such as ``"W/K"``, ``"degC"`` or ``""`` (dimensionless)."""
    ureg = registry()
    raw = (text or "").strip() or DIMENSIONLESS
    try:
        q = ureg.Quantity(1.0, raw)
    except (pint.errors.UndefinedUnitError, pint.errors.DefinitionSyntaxError, AttributeError, TypeError,
            ValueError, AssertionError) as exc:
        raise ModelError(f"units '{raw}' are not understood ({exc})", where=where,
                         hint="write units such as 'W/K', 'kg/s', 'degC', 'm**3', '1/s' or '' for none") from None
    except pint.errors.OffsetUnitCalculusError:
        raise ModelError(f"units '{raw}' combine an offset temperature scale with other units", where=where,
                         hint="use K (or delta_degC) inside compound units, e.g. 'W/K'") from None
    if not q._is_multiplicative:  # a bare offset unit: degC or degF
        delta = ureg.Quantity(1.0, f"delta_{q.units}") if not str(q.units).startswith("delta_") else q
        return U(delta.units, offset=True)
    if abs(q.magnitude - 1.0) > _REL_TOL:
        raise ModelError(f"units '{raw}' carry a numeric factor {q.magnitude}", where=where)
    return U(q.units)


def _factor(a: pint.Unit, b: pint.Unit) -> float | None:
    """The number that converts 1 a into b, or None when dimensions differ."""
    ureg = registry()
    try:
        return float(ureg.Quantity(1.0, a).to(b).magnitude)
    except pint.errors.DimensionalityError:
        return None


def same_units(a: U, b: U) -> bool:
    """True when ``a`` and ``b`` are the same units with factor one (within 1e-12); a bare number
    matches anything."""
    if a.unit is None or b.unit is None:
        return True
    f = _factor(a.unit, b.unit)
    return f is not None and abs(f - 1.0) <= _REL_TOL


def _short(node: Node, limit: int = 200) -> str:
    """A term's text for a message, elided past ``limit`` characters."""
    text = to_text(node)
    return text if len(text) <= limit else text[:limit] + "..."


def mismatch_message(left: Node, lu: U, right: Node, ru: U, context: str) -> str:
    """The message for two terms whose units differ: both terms (elided past 200 characters) with
    their units, and the conversion factor when only the scale differs."""
    f = _factor(lu.unit, ru.unit) if lu.unit is not None and ru.unit is not None else None
    base = f"{context}: '{_short(left)}' is in {lu.text()} but '{_short(right)}' is in {ru.text()}"
    if f is not None:
        return base + f" (same dimension, factor {f:.6g}: convert one side)"
    return base + " (different dimensions)"


class UnitChecker:
    """Infers units of trees given each symbol's units; raises ModelError at the first
    inconsistency, naming the offending term."""

    def __init__(self, symbol_units: dict[str, U], where: str = ""):
        self.symbol_units = symbol_units
        self.where = where
        self.ureg = registry()

    def fail(self, message: str, hint: str | None = None):
        """Raise ModelError with ``message`` at this checker's location (never returns)."""
        raise ModelError(message, where=self.where, hint=hint)

    def infer(self, node: Node) -> U:  # noqa: C901 - one case per node kind
        """The units of ``node``; ModelError (located, naming the offending term) at the first
        inconsistency (see the module docstring for the rules)."""
        if isinstance(node, Num):
            return U(None)
        if isinstance(node, Sym):
            if node.name not in self.symbol_units:
                self.fail(f"symbol '{node.name}' has no declared units")
            return self.symbol_units[node.name]
        if isinstance(node, Neg):
            u = self.infer(node.arg)
            if u.offset:
                self.fail(f"'{to_text(node)}' negates a temperature reading on an offset scale",
                          hint="declare the temperature in K")
            return u
        if isinstance(node, BinOp):
            return self._binop(node)
        if isinstance(node, Call):
            return self._call(node)
        if isinstance(node, Compare):
            self._same(node.left, node.right, "comparison")
            return U(None, boolean=True)
        if isinstance(node, Logic):
            for c in node.children():
                if not self.infer(c).boolean:
                    self.fail(f"'{to_text(c)}' is used as a condition but is not a comparison")
            return U(None, boolean=True)
        if isinstance(node, IfElse):
            if not self.infer(node.cond).boolean:
                self.fail(f"the condition '{to_text(node.cond)}' is not a comparison")
            return self._same(node.then, node.other, "the two branches of a conditional")
        raise TypeError(node)

    def _same(self, a: Node, b: Node, context: str) -> U:
        ua, ub = self.infer(a), self.infer(b)
        if ua.boolean or ub.boolean:
            self.fail(f"{context}: a truth value cannot be combined with a quantity here")
        if not same_units(ua, ub):
            self.fail(mismatch_message(a, ua, b, ub, context))
        if ua.unit is None:
            return ub
        if ub.unit is not None and ua.offset != ub.offset and context == "comparison":
            self.fail(f"{context}: '{to_text(a)}' and '{to_text(b)}' compare a reading with a difference")
        return ua

    def _binop(self, node: BinOp) -> U:
        op, a, b = node.op, node.left, node.right
        if op in "+-":
            ua, ub = self.infer(a), self.infer(b)
            if ua.boolean or ub.boolean:
                self.fail(f"'{to_text(node)}' adds a truth value")
            if not same_units(ua, ub):
                self.fail(mismatch_message(a, ua, b, ub, f"in '{_short(node)}'"))
            unit = ua.unit if ua.unit is not None else ub.unit
            if op == "+":
                if ua.offset and ub.offset:
                    self.fail(f"'{to_text(node)}' adds two temperature readings",
                              hint="the sum of two readings on an offset scale has no meaning; use K")
                return U(unit, offset=ua.offset or ub.offset)
            if ua.offset and ub.offset:
                return U(unit, offset=False)  # reading - reading = difference
            if ub.offset and not ua.offset and ua.unit is not None:
                self.fail(f"'{to_text(node)}' subtracts a reading from a difference")
            return U(unit, offset=ua.offset or (ub.offset and ua.unit is None))
        ua, ub = self.infer(a), self.infer(b)
        for side, u in ((a, ua), (b, ub)):
            if u.offset:
                self.fail(f"'{to_text(side)}' is a temperature reading on an offset scale used as a factor in "
                          f"'{to_text(node)}'", hint="declare that temperature in K, or use a difference")
            if u.boolean:
                self.fail(f"'{to_text(side)}' is a truth value used in arithmetic; use 'a if cond else b'")
        la = ua.unit if ua.unit is not None else self.ureg.dimensionless
        lb = ub.unit if ub.unit is not None else self.ureg.dimensionless
        if op == "*":
            out = la * lb
        elif op == "/":
            out = la / lb
        else:  # power
            if not self._dimensionless(ub):
                self.fail(f"the exponent in '{to_text(node)}' must be dimensionless, it is {ub.text()}")
            if isinstance(b, Num):
                out = la ** b.value
            elif self._dimensionless(ua):
                out = self.ureg.dimensionless
            else:
                self.fail(f"'{to_text(node)}' raises a quantity in {ua.text()} to a non-constant power",
                          hint="only dimensionless bases may have a variable exponent")
        both_bare = ua.unit is None and ub.unit is None
        return U(None if both_bare else self._clean(out))

    def _dimensionless(self, u: U) -> bool:
        if u.unit is None:
            return True
        f = _factor(u.unit, self.ureg.dimensionless)
        return f is not None and abs(f - 1.0) <= _REL_TOL

    def _clean(self, unit) -> pint.Unit:
        return self.ureg.Quantity(1.0, unit).units

    def _call(self, node: Call) -> U:
        fn = node.fn
        if fn in ("min", "max"):
            return self._same(node.args[0], node.args[1], f"the arguments of {fn}()")
        (arg,) = node.args
        ua = self.infer(arg)
        if ua.boolean:
            self.fail(f"{fn}() of a truth value")
        if fn == "abs":
            return ua
        if fn == "sqrt":
            if ua.offset:
                self.fail(f"sqrt() of a temperature reading on an offset scale in '{to_text(node)}'")
            return U(None if ua.unit is None else self._clean(ua.unit ** 0.5))
        if not self._dimensionless(ua) or ua.offset:
            self.fail(f"the argument of {fn}() must be dimensionless; '{to_text(arg)}' is in {ua.text()}",
                      hint="divide by a reference value with the same units")
        return U(self.ureg.dimensionless)


def rate_units(state: U, time: U | None = None) -> U:
    """Units a state's time derivative must have: the state's units per the model's time
    unit, seconds unless given (a reading's rate is a difference per time unit)."""
    ureg = registry()
    per = ureg.second if time is None else time.unit
    return U(ureg.Quantity(1.0, state.unit / per).units)


def parse_time_units(text: str, *, where: str = "") -> tuple[U, float]:
    """The model's time unit (``"s"``, ``"min"``, ``"h"``, ...) and the seconds it lasts."""
    u = parse_units(text, where=where)
    seconds = _factor(u.unit, registry().second) if u.unit is not None and not u.offset else None
    if seconds is None or not seconds > 0:
        raise ModelError(f"time_units '{text}' is not a unit of time", where=where,
                         hint="write \"s\", \"min\", \"h\" or \"day\"")
    return u, seconds


def check_equal(actual: U, expected: U, what: str, where: str, hint: str | None = None) -> None:
    """Raise unless ``actual`` equals ``expected`` with factor one (bare numbers pass)."""
    if actual.boolean:
        raise ModelError(f"{what} is a truth value, not a quantity", where=where)
    if actual.unit is None:
        return
    if not same_units(actual, expected):
        f = _factor(actual.unit, expected.unit)
        extra = f" (same dimension, factor {f:.6g})" if f is not None else " (different dimensions)"
        raise ModelError(f"{what} is in {actual.text()} but must be in {expected.text()}{extra}", where=where,
                         hint=hint or "check the units declared for each symbol in the equation")
    if actual.offset != expected.offset:
        raise ModelError(f"{what} is {'a reading' if actual.offset else 'a difference'} on a temperature scale "
                         f"but must be {'a reading' if expected.offset else 'a difference'}", where=where)

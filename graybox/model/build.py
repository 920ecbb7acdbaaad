"""Build a checked :class:`ModelSpec` from the ``[model]`` and ``[parameters]`` tables.

Checks, all before any fit:

* degrees of freedom: every symbol is classified exactly once (state, input, parameter,
  constant or derived quantity); each state has exactly one rate equation; nothing used is
  undefined (close names suggested); derived quantities have no cycles; parameters that no
  equation uses are warned about;
* units: every declared unit is parsed by pint and every equation is dimensionally
  consistent with factor one (see :mod:`graybox.model.units`);
* parameters: guesses are finite and inside their bounds.

Table layout (all names are the user's)::

    [model]
    name = "storage_vessel"
    time_units = "s"          the unit each rate is written per: "s" (default), "min", "h", ...
    [model.states.T]          units = "degC", rate = "...", initial = "measured"
    [model.inputs]            Q = { units = "W" }, T_room = { units = "degC", hold = "linear" }
    [model.constants]         C = { value = 4.2e6, units = "J/K" }
    [model.derived]           k = { expr = "...", units = "1/s" }  or  k = "..."
    [model.outputs]           T_top = { expr = "T + dT_strat", units = "degC" }
    [parameters.UA]           guess = 30, bounds = [1, 500], units = "W/K", fixed = false, scope = "shared"
"""

from __future__ import annotations

import dataclasses
import difflib
import math

import numpy as np

from graybox.configkit import Table
from graybox.errors import ModelError
from graybox.model.expr import (
    BinOp,
    FoldError,
    Num,
    Sym,
    depth_and_size,
    fold_value,
    is_valid_symbol_name,
    parse,
    symbols,
    to_text,
)
from graybox.model.spec import (
    INITIAL_MEASURED,
    INITIAL_MODES,
    INITIAL_STEADY,
    SCOPE_LOCAL,
    SCOPE_SHARED,
    ConstantDef,
    DerivedDef,
    InputDef,
    ModelSpec,
    OutputDef,
    ParameterDef,
    StateDef,
)
from graybox.model.units import U, UnitChecker, check_equal, parse_time_units, parse_units, rate_units

MODEL_KEYS = ("name", "time_units", "states", "inputs", "constants", "derived", "outputs")
STATE_KEYS = ("units", "rate", "initial", "initial_bounds")
INPUT_KEYS = ("units", "hold")
CONSTANT_KEYS = ("value", "units")
DERIVED_KEYS = ("expr", "units")
OUTPUT_KEYS = ("expr", "units")
#: Limits on an equation with its derived quantities substituted (every tree walk after the
#: checks recurses on the depth: derivatives of an equation nest deeper than it does).
MAX_INLINED_DEPTH = 120
MAX_INLINED_SIZE = 100_000

PARAMETER_KEYS = ("guess", "bounds", "lower", "upper", "units", "fixed", "scope", "prior", "log_scale")


def _entry(parent: Table, name: str, shorthand_key: str | None) -> Table:
    """The table of one named entry; ``name = "text"`` is shorthand for ``{shorthand_key = text}``."""
    value = parent.data[name]
    if isinstance(value, str) and shorthand_key:
        return Table({shorthand_key: value}, (*parent.path, name), parent.file)
    if not isinstance(value, dict):
        raise parent.error(name, f"must be a table, got {value!r}")
    return Table(value, (*parent.path, name), parent.file)


def _check_name(parent: Table, name: str) -> None:
    if not is_valid_symbol_name(name):
        raise ModelError(f"'{name}' cannot name a symbol", where=parent.where(name),
                         hint="use letters, digits and underscores, starting with a letter; "
                              "'t', 'pi' and function names are reserved")


def build_spec(model: Table, parameters: Table) -> ModelSpec:
    """Parse and check the model (the module docstring lists the checks) and return the spec,
    with warnings for parameters and inputs no equation uses.  ``model`` and ``parameters``
    are the ``[model]`` and ``[parameters]`` tables; nothing in them is modified.  Raises
    ModelError or ConfigError naming the file, table and key (with a caret under the column
    for an equation) at the first fault."""
    model.check_keys(MODEL_KEYS)
    roles: dict[str, tuple[str, Table]] = {}

    def claim(name: str, role: str, table: Table) -> None:
        _check_name(table, name)
        if name in roles:
            other_role, other = roles[name]
            raise ModelError(f"'{name}' is declared as {other_role} at {other.where(name)} and again as {role}",
                             where=table.where(name), hint="every symbol has exactly one role; rename one of them")
        roles[name] = (role, table)

    states_t, inputs_t = model.sub("states"), model.sub("inputs")
    consts_t, derived_t, outputs_t = model.sub("constants"), model.sub("derived"), model.sub("outputs")
    for name in states_t.keys():
        claim(name, "a state", states_t)
    for name in inputs_t.keys():
        claim(name, "an input", inputs_t)
    for name in consts_t.keys():
        claim(name, "a constant", consts_t)
    for name in derived_t.keys():
        claim(name, "a derived quantity", derived_t)
    for name in parameters.keys():
        claim(name, "a parameter", parameters)

    time_text = model.string("time_units", "s")
    time_unit, time_seconds = parse_time_units(time_text, where=model.where("time_units"))
    units: dict[str, U] = {}
    states_raw = []
    for name in states_t.keys():
        t = _entry(states_t, name, None)
        t.check_keys(STATE_KEYS)
        if "rate" not in t:
            raise ModelError(f"state '{name}' has no rate equation", where=t.where(),
                             hint=f"add rate = \"...\" (its time derivative, in its units per {time_text})")
        units[name] = parse_units(t.string("units", ""), where=t.where("units"))
        states_raw.append((name, t))

    inputs = []
    for name in inputs_t.keys():
        t = _entry(inputs_t, name, "units")
        t.check_keys(INPUT_KEYS)
        units[name] = parse_units(t.string("units", ""), where=t.where("units"))
        inputs.append(InputDef(name, t.string("units", ""), t.string("hold", "previous", ("previous", "linear"))))

    constants = []
    for name in consts_t.keys():
        value = consts_t.data[name]
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            t = Table({"value": value}, (*consts_t.path, name), consts_t.file)
        else:
            t = _entry(consts_t, name, None)
        t.check_keys(CONSTANT_KEYS)
        units[name] = parse_units(t.string("units", ""), where=t.where("units"))
        constants.append(ConstantDef(name, t.number("value"), t.string("units", "")))

    params = [_parameter(parameters, name) for name in parameters.keys()]
    for p in params:
        units[p.name] = parse_units(p.units, where=Table({}, (*parameters.path, p.name), parameters.file).where("units"))

    # Parse every equation; check that each symbol it uses is defined.
    known = set(roles)
    derived_raw = {}
    for name in derived_t.keys():
        t = _entry(derived_t, name, "expr")
        t.check_keys(DERIVED_KEYS)
        text = t.string("expr")
        tree = parse(text, where=t.where("expr"))
        _check_defined(tree, known, t.where("expr"))
        derived_raw[name] = (t, text, tree)
    order = _derived_order({n: symbols(tr) for n, (_, _, tr) in derived_raw.items()}, derived_t)

    state_trees = []
    for name, t in states_raw:
        text = t.string("rate")
        tree = parse(text, where=t.where("rate"))
        _check_defined(tree, known, t.where("rate"))
        state_trees.append((name, t, text, tree))

    output_raw = []
    for name in outputs_t.keys():
        t = _entry(outputs_t, name, "expr")
        t.check_keys(OUTPUT_KEYS)
        if name in roles and roles[name][0] != "a state":
            raise ModelError(f"output '{name}' has the name of {roles[name][0]}", where=t.where(),
                             hint="give the measured output its own name, e.g. the tag's")
        text = t.string("expr", name)
        tree = parse(text, where=t.where("expr"))
        _check_defined(tree, known, t.where("expr"))
        output_raw.append((name, t, text, tree))
    if not output_raw:  # default: every state is measured directly
        output_raw = [(name, t, name, Sym(name)) for name, t in states_raw]
        if not output_raw:
            raise ModelError("the model has no states and no outputs", where=model.where(),
                             hint="add [model.outputs] (a static regression) or [model.states]")

    _check_inlined_size(order, derived_raw, state_trees, output_raw)

    # Units: derived quantities in dependency order, then rates and outputs.
    derived = []
    for name in order:
        t, text, tree = derived_raw[name]
        u = UnitChecker(units, where=t.where("expr")).infer(tree)
        if "units" in t:
            declared = parse_units(t.string("units"), where=t.where("units"))
            check_equal(u, declared, f"derived quantity '{name}'", t.where("expr"))
            u = declared
        if u.boolean:
            raise ModelError(f"derived quantity '{name}' is a truth value", where=t.where("expr"),
                             hint="use 'a if condition else b' to make a quantity")
        units[name] = u if u.unit is not None else parse_units("")
        derived.append(DerivedDef(name, tree, text, _unit_text(units[name])))

    outputs = []
    state_names = {name for name, _ in states_raw}
    for name, t, text, tree in output_raw:
        u = UnitChecker(units, where=t.where("expr")).infer(tree)
        declared_text = t.string("units", "") if "units" in t else _unit_text(u)
        if "units" in t:
            check_equal(u, parse_units(declared_text, where=t.where("units")), f"output '{name}'", t.where("expr"))
        measured_state = tree.name if isinstance(tree, Sym) and tree.name in state_names else None
        outputs.append(OutputDef(name, tree, text, declared_text, measured_state))
    measured = {o.state for o in outputs if o.state}

    states = []
    for name, t, text, tree in state_trees:
        u = UnitChecker(units, where=t.where("rate")).infer(tree)
        check_equal(u, rate_units(units[name], time_unit), f"the rate of state '{name}'", t.where("rate"),
                    hint=f"rates are written per {time_text} ([model] time_units); check the units declared "
                         "for each symbol in the equation")
        initial = _initial(t, name)
        if initial == "default":
            initial = INITIAL_MEASURED if name in measured else INITIAL_STEADY
        elif initial == INITIAL_MEASURED and name not in measured:
            raise ModelError(f"state '{name}' is not measured directly, so its initial value cannot be 'measured'",
                             where=t.where("initial"), hint="use initial = \"steady\", \"estimate\" or a number")
        bounds = t.pair("initial_bounds", (-np.inf, np.inf))
        states.append(StateDef(name, t.string("units", ""), tree, text, initial, bounds))

    spec = ModelSpec(
        name=model.string("name", "model"),
        states=tuple(states),
        inputs=tuple(inputs),
        parameters=tuple(params),
        constants=tuple(constants),
        derived=tuple(derived),
        outputs=tuple(outputs),
        time_units=time_text,
        time_seconds=time_seconds,
    )
    _check_inlined_constants(spec, state_trees, output_raw)
    used = spec.used_symbols()
    warnings = [f"parameter '{p.name}' is not used by any equation" for p in params if p.name not in used]
    warnings += [f"input '{u.name}' is not used by any equation" for u in inputs if u.name not in used]
    return dataclasses.replace(spec, warnings=tuple(warnings))


def _check_inlined_size(order, derived_raw, state_trees, output_raw) -> None:
    """Depth and size of each equation with its derived quantities substituted, measured on
    the parsed trees before anything is inlined."""
    known: dict[str, tuple[int, int]] = {}
    checks = []
    for name in order:
        t, _, tree = derived_raw[name]
        known[name] = depth_and_size(tree, known)
        checks.append((f"derived quantity '{name}'", known[name], t.where("expr")))
    for name, t, _, tree in state_trees:
        checks.append((f"the rate of state '{name}'", depth_and_size(tree, known), t.where("rate")))
    for name, t, _, tree in output_raw:
        checks.append((f"output '{name}'", depth_and_size(tree, known), t.where("expr") if "expr" in t else t.where()))
    for what, (depth, size), where in checks:
        if depth > MAX_INLINED_DEPTH:
            raise ModelError(f"with its derived quantities substituted, {what} nests {depth} levels deep; "
                             f"the limit is {MAX_INLINED_DEPTH}", where=where,
                             hint="shorten the chain of derived quantities it uses, or simplify them")
        if size > MAX_INLINED_SIZE:
            raise ModelError(f"with its derived quantities substituted, {what} has {size:,} parts; "
                             f"the limit is {MAX_INLINED_SIZE:,}", where=where,
                             hint="a derived quantity used many times inside another multiplies its size; "
                                  "simplify the chain")


def _check_inlined_constants(spec: ModelSpec, state_trees, output_raw) -> None:
    """With [model.constants] substituted, no operation between numbers may lack a finite
    value (``1/C`` with C = 0, ``C**-1`` with C = 0, ``C1*C2`` beyond 1.8e308): the simplifier
    leaves such an operation unfolded; nothing else may divide by a constant zero."""
    located = [(f"the rate of state '{n}'", tree, t.where("rate"))
               for (n, t, _, _), tree in zip(state_trees, (spec.inline(s.rate) for s in spec.states))]
    located += [(f"output '{n}'", tree, t.where("expr") if "expr" in t else t.where())
                for (n, t, _, _), tree in zip(output_raw, spec.output_exprs)]
    for what, tree, where in located:
        seen: set[int] = set()
        stack = [tree]
        while stack:
            n = stack.pop()
            if id(n) in seen:
                continue
            seen.add(id(n))
            stack.extend(n.children())
            reason = _constant_fault(n)
            if reason:
                raise ModelError(f"with the constants substituted and simplified, {what} contains "
                                 f"'{to_text(n)[:200]}', which {reason}", where=where,
                                 hint="check the equation and the values under [model.constants]")


def _constant_fault(n) -> str | None:
    if not isinstance(n, BinOp) or not isinstance(n.right, Num):
        return None
    if isinstance(n.left, Num):
        try:
            fold_value(n.op, n.left.value, n.right.value)
        except FoldError as exc:
            return str(exc)
        return None
    if n.op == "/" and n.right.value == 0.0:
        return "divides by zero"
    return None


def _unit_text(u: U) -> str:
    if u.unit is None:
        return ""
    if u.offset:
        return str(u.unit).replace("delta_", "")
    text = f"{u.unit:~}"
    return "" if text in ("", "dimensionless") else text


def _initial(t: Table, name: str) -> str | float:
    value = t.get("initial", "default")
    if isinstance(value, bool):
        raise t.error("initial", f"must be one of {INITIAL_MODES} or a number, got {value!r}")
    if isinstance(value, (int, float)):
        if not math.isfinite(value):
            raise t.error("initial", "must be finite")
        return float(value)
    if value == "default":
        return "default"
    return t.string("initial", choices=INITIAL_MODES)


def _parameter(parameters: Table, name: str) -> ParameterDef:
    t = _entry(parameters, name, None)
    t.check_keys(PARAMETER_KEYS)
    guess = t.number("guess")
    lower, upper = -np.inf, np.inf
    if "bounds" in t:
        if "lower" in t or "upper" in t:
            raise t.error("bounds", "give either bounds = [low, high] or lower/upper, not both")
        lower, upper = t.pair("bounds")
    else:
        lower = t.number("lower", -np.inf, finite=False)
        upper = t.number("upper", np.inf, finite=False)
        if not lower < upper:
            raise t.error("lower", f"lower ({lower}) must be below upper ({upper})")
    fixed = t.boolean("fixed", False)
    if not fixed and not (lower <= guess <= upper):
        raise ModelError(f"the guess {guess} of parameter '{name}' is outside its bounds [{lower}, {upper}]",
                         where=t.where("guess"), hint="move the guess inside the bounds or widen them")
    prior = t.get("prior", None)
    if prior is not None and not isinstance(prior, dict):
        raise t.error("prior", "must be a table, e.g. { kind = \"normal\", mean = 1, sd = 0.2 }")
    log_scale = t.boolean("log_scale", False)
    if log_scale and lower <= 0:
        raise t.error("log_scale", f"a parameter sampled in log space needs a positive lower bound, got {lower}")
    return ParameterDef(
        name=name,
        units=t.string("units", ""),
        guess=guess,
        lower=lower,
        upper=upper,
        fixed=fixed,
        scope=t.string("scope", SCOPE_SHARED, (SCOPE_SHARED, SCOPE_LOCAL)),
        prior=prior,
        log_scale=log_scale,
    )


def _check_defined(tree, known: set[str], where: str) -> None:
    for name in sorted(symbols(tree)):
        if name not in known:
            close = difflib.get_close_matches(name, sorted(known), n=3)
            hint = (f"did you mean {' or '.join(repr(c) for c in close)}? " if close else "") + \
                "declare it as a state, input, constant, derived quantity or parameter"
            raise ModelError(f"'{name}' is not defined", where=where, hint=hint)


def _derived_order(deps: dict[str, set[str]], table: Table) -> list[str]:
    """Derived quantities in dependency order; a cycle is reported with its members."""
    order: list[str] = []
    state: dict[str, int] = {}

    def visit(name: str, path: list[str]) -> None:
        mark = state.get(name, 0)
        if mark == 2:
            return
        if mark == 1:
            cycle = path[path.index(name):] + [name]
            raise ModelError(f"derived quantities depend on each other in a circle: {' -> '.join(cycle)}",
                             where=table.where(name), hint="break the circle: one of them must be a state, input or parameter")
        state[name] = 1
        for dep in sorted(deps[name]):
            if dep in deps:
                visit(dep, path + [name])
        state[name] = 2
        order.append(name)

    for name in deps:
        visit(name, [])
    return order

"""The checked model specification: every symbol's role and units, the equations as trees.

``ModelSpec`` is what the rest of graybox reads.  It is built by
:func:`graybox.model.build.build_spec` from the model and parameter tables of a config
(or by the Python API), after the degrees-of-freedom and units checks have passed.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property
from typing import Callable

import numpy as np

from graybox.model.expr import Node, Num, diff, div, substitute, symbols

INITIAL_MEASURED = "measured"
INITIAL_STEADY = "steady"
INITIAL_ESTIMATE = "estimate"
INITIAL_MODES = (INITIAL_MEASURED, INITIAL_STEADY, INITIAL_ESTIMATE)

SCOPE_SHARED = "shared"
SCOPE_LOCAL = "local"


@dataclass(frozen=True)
class StateDef:
    """A state: its name, units (text as declared), rate equation as a tree (per the model's
    ``time_units``, derived quantities not yet inlined) and as written, its initial mode
    (``measured``, ``steady``, ``estimate``) or given value in the state's units, and the
    bounds of an estimated or steady initial value (used as the steady-state guess)."""

    name: str
    units: str
    rate: Node
    rate_text: str
    initial: str | float  # one of INITIAL_MODES, or a given value in the state's units
    initial_bounds: tuple[float, float] = (-np.inf, np.inf)


@dataclass(frozen=True)
class InputDef:
    """An input: name, units (text as declared) and how it is held between samples
    (``previous``: the last value holds; ``linear``: interpolated)."""

    name: str
    units: str
    hold: str = "previous"


@dataclass(frozen=True)
class ParameterDef:
    """A parameter: name, units, starting guess and bounds (in its units; infinite when open),
    whether it is held fixed, its scope (``shared`` by every experiment or ``local`` to each),
    the prior table as written (read by the posterior layer) and whether it is sampled in log
    space (then its lower bound is positive)."""

    name: str
    units: str
    guess: float
    lower: float = -np.inf
    upper: float = np.inf
    fixed: bool = False
    scope: str = SCOPE_SHARED
    prior: dict | None = field(default=None, compare=False)  # read by the posterior layer
    log_scale: bool = False


@dataclass(frozen=True)
class ConstantDef:
    """A named constant: its value in its declared units (substituted into every equation)."""

    name: str
    value: float
    units: str


@dataclass(frozen=True)
class DerivedDef:
    """A derived quantity: name, defining tree (over symbols declared before it in dependency
    order), the text as written and its units (inferred, or declared and checked)."""

    name: str
    expr: Node
    text: str
    units: str  # inferred (or declared and checked)


@dataclass(frozen=True)
class OutputDef:
    """A measured output: name, defining tree and text, units, and the state it measures when it
    is just that state (then the state may start from its first measurement)."""

    name: str
    expr: Node
    text: str
    units: str
    state: str | None = None  # the state it measures directly, if it is just that state


@dataclass(frozen=True)
class ModelSpec:
    """A checked model.  Equations are trees over states, inputs, parameters, constants and
    derived quantities (derived in dependency order).  Each state's rate equation is written
    per ``time_units`` (``time_seconds`` seconds each); :attr:`rates` and every derivative
    are per second, the time of records and engines."""

    name: str
    states: tuple[StateDef, ...]
    inputs: tuple[InputDef, ...]
    parameters: tuple[ParameterDef, ...]
    constants: tuple[ConstantDef, ...]
    derived: tuple[DerivedDef, ...]
    outputs: tuple[OutputDef, ...]
    warnings: tuple[str, ...] = ()
    python_rhs: Callable | None = field(default=None, compare=False)  # power-user API
    time_units: str = "s"
    time_seconds: float = 1.0

    # -- names -------------------------------------------------------------------------------
    @property
    def state_names(self) -> list[str]:
        """State names in declaration order (the order of ``x``)."""
        return [s.name for s in self.states]

    @property
    def input_names(self) -> list[str]:
        """Input names in declaration order (the order of ``u``)."""
        return [u.name for u in self.inputs]

    @property
    def parameter_names(self) -> list[str]:
        """Parameter names in declaration order (the order of ``theta``), fixed ones included."""
        return [p.name for p in self.parameters]

    @property
    def output_names(self) -> list[str]:
        """Measured output names in declaration order."""
        return [o.name for o in self.outputs]

    def parameter(self, name: str) -> ParameterDef:
        """The parameter called ``name``; KeyError when there is none."""
        for p in self.parameters:
            if p.name == name:
                return p
        raise KeyError(name)

    def state(self, name: str) -> StateDef:
        """The state called ``name``; KeyError when there is none."""
        for s in self.states:
            if s.name == name:
                return s
        raise KeyError(name)

    @property
    def is_static(self) -> bool:
        """A model with no states is a static regression: outputs are functions of inputs."""
        return not self.states

    # -- inlined equations (derived quantities and constants substituted) --------------------
    @cached_property
    def _inline_map(self) -> dict[str, Node]:
        mapping: dict[str, Node] = {c.name: Num(c.value) for c in self.constants}
        for d in self.derived:  # dependency order: each sees the ones before it inlined
            mapping[d.name] = substitute(d.expr, mapping)
        return mapping

    def inline(self, node: Node) -> Node:
        """``node`` with every constant and derived quantity substituted (simplified)."""
        return substitute(node, self._inline_map)

    @cached_property
    def rates(self) -> tuple[Node, ...]:
        """Each state's rate per second, over states, inputs and parameters only: the rate as
        written (per ``time_units``) divided by the seconds of that unit, here and only here."""
        return tuple(self.per_second(self.inline(s.rate)) for s in self.states)

    def per_second(self, rate: Node) -> Node:
        """A rate written per ``time_units``, as a rate per second."""
        return rate if self.time_seconds == 1.0 else div(rate, Num(float(self.time_seconds)))

    @cached_property
    def output_exprs(self) -> tuple[Node, ...]:
        """Each output's tree over states, inputs and parameters only (derived quantities inlined)."""
        return tuple(self.inline(o.expr) for o in self.outputs)

    @cached_property
    def derived_exprs(self) -> dict[str, Node]:
        """Each derived quantity's tree with the constants and earlier derived quantities inlined."""
        return {d.name: self._inline_map[d.name] for d in self.derived}

    # -- symbolic derivatives ------------------------------------------------------------------
    @cached_property
    def jac_states(self) -> tuple[tuple[Node, ...], ...]:
        """d rate_i / d state_j."""
        return tuple(tuple(diff(r, x) for x in self.state_names) for r in self.rates)

    @cached_property
    def jac_params(self) -> tuple[tuple[Node, ...], ...]:
        """d rate_i / d parameter_k."""
        return tuple(tuple(diff(r, p) for p in self.parameter_names) for r in self.rates)

    @cached_property
    def jac_inputs(self) -> tuple[tuple[Node, ...], ...]:
        """d rate_i / d input_m (for linear inputs: the time derivative of the rate)."""
        return tuple(tuple(diff(r, u) for u in self.input_names) for r in self.rates)

    @cached_property
    def out_jac_states(self) -> tuple[tuple[Node, ...], ...]:
        """d output_r / d state_j."""
        return tuple(tuple(diff(h, x) for x in self.state_names) for h in self.output_exprs)

    @cached_property
    def out_jac_params(self) -> tuple[tuple[Node, ...], ...]:
        """d output_r / d parameter_k."""
        return tuple(tuple(diff(h, p) for p in self.parameter_names) for h in self.output_exprs)

    def used_symbols(self) -> set[str]:
        """Every symbol the inlined rates and outputs use (to warn about unused parameters and inputs)."""
        used: set[str] = set()
        for n in (*self.rates, *self.output_exprs):
            used |= symbols(n)
        return used

    def guesses(self) -> np.ndarray:
        """The parameters' guesses in parameter order, shape (n_p,)."""
        return np.array([p.guess for p in self.parameters], dtype=float)

    def describe(self) -> str:
        """A readable summary: sizes, then each rate, derived quantity and output as written, with units."""
        lines = [f"model '{self.name}': {len(self.states)} state(s), {len(self.inputs)} input(s), "
                 f"{len(self.parameters)} parameter(s) ({sum(not p.fixed for p in self.parameters)} free), "
                 f"{len(self.outputs)} output(s)"]
        for s in self.states:
            lines.append(f"  d{s.name}/dt = {s.rate_text}    [{s.units}/{self.time_units}], initial: {s.initial}")
        for d in self.derived:
            lines.append(f"  {d.name} = {d.text}    [{d.units}]")
        for o in self.outputs:
            lines.append(f"  output {o.name} = {o.text}    [{o.units}]")
        return "\n".join(lines)

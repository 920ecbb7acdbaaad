"""Which free values can influence a measured output at all, from the model's equations.

A measured output depends on the symbols of its expression; a state depends on the symbols
of its rate; a state's trajectory therefore depends on every parameter and state reachable
through that chain.  A free parameter (or an estimated initial state) outside the closure
has a Jacobian column that is zero for any data, and a least-squares fit with such a column
loses the covariance of every value (a singular J^T J), so it is refused before any
computation.  Models whose rates are a Python function are not inspected (their rates are
opaque); the fit's zero-column check at the guess still catches them.
"""

from __future__ import annotations

from dataclasses import dataclass

from graybox.model.expr import symbols
from graybox.model.spec import INITIAL_ESTIMATE, ModelSpec


@dataclass(frozen=True)
class UnusedValue:
    """A free value no measured output depends on."""

    kind: str  # "parameter" or "initial"
    name: str  # the parameter's or the state's name


def reachable_symbols(spec: ModelSpec) -> set[str]:
    """Every symbol some measured output depends on, directly or through states' rates
    (derived quantities and constants substituted)."""
    states = {s.name: rate for s, rate in zip(spec.states, spec.rates)}
    seen: set[str] = set()
    todo: list[str] = []
    for expr in spec.output_exprs:
        todo.extend(symbols(expr))
    while todo:
        name = todo.pop()
        if name in seen:
            continue
        seen.add(name)
        if name in states:
            todo.extend(symbols(states[name]))
    return seen


def unused_free_values(spec: ModelSpec) -> list[UnusedValue]:
    """Free parameters and estimated initial states no measured output depends on, in
    declaration order; empty for a model whose rates are a Python function."""
    if spec.python_rhs is not None:
        return []
    reach = reachable_symbols(spec)
    out = [UnusedValue("parameter", p.name) for p in spec.parameters if not p.fixed and p.name not in reach]
    out += [UnusedValue("initial", s.name) for s in spec.states
            if s.initial == INITIAL_ESTIMATE and s.name not in reach]
    return out


def unused_message(value: UnusedValue) -> tuple[str, str]:
    """(message, hint) for a located error about ``value``."""
    if value.kind == "parameter":
        return (f"parameter '{value.name}' is free, but no measured output depends on it (it appears in no "
                "equation that reaches an output), so the data cannot determine it and its zero Jacobian "
                "column would cost every other value its standard error",
                "use it in an equation, set fixed = true, or remove it")
    return (f"the initial value of state '{value.name}' is to be estimated, but no measured output depends on "
            "that state, so the data cannot determine it",
            "give it a number or \"steady\", measure the state, or remove the state")

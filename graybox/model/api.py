"""Python API for power users: a model whose right-hand side is a Python function.

    spec = model_from_function(
        "vessel",
        states={"T": "degC"},
        inputs={"Q": "W", "T_room": "degC"},
        parameters={"UA": {"guess": 30, "bounds": [1, 500], "units": "W/K"}, "C": {"guess": 4e6}},
        rhs=lambda x, u, p: {"T": (u["Q"] - p["UA"] * (x["T"] - u["T_room"])) / p["C"]},
    )

``rhs(x, u, p)`` gets dicts of numpy arrays (one entry per parameter set) and returns the
rates as a dict keyed by state (or a sequence in state order).  Measured outputs are still
text expressions (default: every state measured directly) and are checked as usual; the
right-hand side cannot be checked for units or differentiated symbolically, so such a model
runs on the numpy reference path with finite-difference Jacobians (the note says so).
"""

from __future__ import annotations

from typing import Callable, Mapping

import numpy as np

from graybox.configkit import Table
from graybox.errors import ModelError
from graybox.model.build import build_spec
from graybox.model.spec import ModelSpec, StateDef

PYTHON_NOTE = ("the right-hand side is a Python function: its units are not checked and its Jacobians come "
               "from finite differences (reference path)")


def model_from_function(
    name: str,
    *,
    states: Mapping[str, str],
    inputs: Mapping[str, str],
    parameters: Mapping[str, dict],
    rhs: Callable,
    outputs: Mapping[str, dict | str] | None = None,
    initial: Mapping[str, str | float] | None = None,
    time_units: str = "s",
) -> ModelSpec:
    """A checked spec whose state rates come from ``rhs`` (see the module docstring); the
    rates it returns are per ``time_units`` (seconds by default)."""
    if not callable(rhs):
        raise ModelError("rhs must be a function rhs(x, u, p) returning the state rates")
    initial = dict(initial or {})
    # Rates are placeholders (zero) for the structural checks; the function replaces them.
    model = {
        "name": name,
        "time_units": time_units,
        "states": {s: {"units": u, "rate": "0", **({"initial": initial[s]} if s in initial else {})}
                   for s, u in states.items()},
        "inputs": {k: {"units": v} for k, v in inputs.items()},
    }
    if outputs:
        model["outputs"] = dict(outputs)
    base = build_spec(Table(model, ("model",)), Table(dict(parameters), ("parameters",)))
    wrapped = _wrap(rhs, base)
    states_def = tuple(StateDef(s.name, s.units, s.rate, "<Python function>", s.initial, s.initial_bounds)
                       for s in base.states)
    warnings = tuple(w for w in base.warnings if "not used" not in w) + (PYTHON_NOTE,)
    return ModelSpec(base.name, states_def, base.inputs, base.parameters, base.constants, base.derived,
                     base.outputs, warnings, python_rhs=wrapped, time_units=base.time_units,
                     time_seconds=base.time_seconds)


def _wrap(rhs: Callable, spec: ModelSpec) -> Callable:
    xs, us, ps = spec.state_names, spec.input_names, spec.parameter_names
    seconds = spec.time_seconds  # the function's rates are per time_units; the engines want per second

    def f(x: np.ndarray, u: np.ndarray, p: np.ndarray, out: np.ndarray) -> None:
        xd = {n: x[i] for i, n in enumerate(xs)}
        ud = {n: u[i] for i, n in enumerate(us)}
        pd = {n: p[i] for i, n in enumerate(ps)}
        rates = rhs(xd, ud, pd)
        if isinstance(rates, Mapping):
            missing = [s for s in xs if s not in rates]
            if missing:
                raise ModelError(f"the Python right-hand side returned no rate for {', '.join(missing)}")
            rates = [rates[s] for s in xs]
        if len(rates) != len(xs):
            raise ModelError(f"the Python right-hand side returned {len(rates)} rates for {len(xs)} states")
        for i, r in enumerate(rates):
            out[i] = r if seconds == 1.0 else np.asarray(r) / seconds

    return f

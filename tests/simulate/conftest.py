"""Test models and records for the simulation tests (compiled core, reference, scipy).

Each model is built once per session (module-level caches) so that numba compiles each
generated module once; the compiled machine code is cached on disk as well.
"""

from __future__ import annotations

import copy
from functools import lru_cache

import numpy as np

from graybox.configkit import Table
from graybox.data.record import record_from_arrays
from graybox.model.build import build_spec

LAG = {"states": {"y": {"units": "", "rate": "(K*u - y)/tau", "initial": 0.0}}, "inputs": {"u": ""}}
LAG_P = {"K": {"guess": 2.0}, "tau": {"guess": 5.0, "units": "s"}}

# Torricelli: an open tank drained through an orifice, inflow q_in (level units per second).
TANK = {"states": {"h": {"units": "", "rate": "q_in - c*sqrt(max(h, 0))", "initial": "estimate"}},
        "inputs": {"q_in": "1/s"}}
TANK_P = {"c": {"guess": 0.05, "units": "1/s"}}

# A cooled stirred-tank reactor, first-order reaction with an Arrhenius rate (E/R = Ea in K):
# the reaction time scale (~0.01 s) is far below the 1 s sample period, so the system is stiff.
REACTOR = {
    "states": {
        "C": {"units": "", "rate": "(C_in - C)/tau_r - k0*exp(-Ea/T)*C", "initial": "steady"},
        "T": {"units": "K", "rate": "(T_in - T)/tau_r + beta*k0*exp(-Ea/T)*C - (T - T_c)/tau_c",
              "initial": "steady"},
    },
    "inputs": {"C_in": "", "T_in": "K"},
    "constants": {"T_c": {"value": 330.0, "units": "K"}},
}
REACTOR_P = {"k0": {"guess": 1.6e8, "units": "1/s"}, "Ea": {"guess": 5000.0, "units": "K"},
             "beta": {"guess": 20.0, "units": "K"}, "tau_r": {"guess": 10.0, "units": "s"},
             "tau_c": {"guess": 5.0, "units": "s"}}

# Every construct the parser accepts: each function of graybox.model.expr.FUNCTIONS, every
# comparison, and/or/not, "a if c else b" and where(c, a, b), in a rate and in an output.
CONSTRUCTS_RATE = (
    "a*(exp(-z) + log(1 + z*z) + log10(2 + z*z) + sqrt(1 + z*z) + abs(u - z) + sin(z) + cos(z) + tan(0.2*z)"
    " + tanh(z) + sinh(0.3*z) + cosh(0.3*z) + atan(z) + min(z, u) + max(z, u)"
    " + (1.0 if (u > 0.5 and u < 2) or not (u >= 0.9) else -0.5)"
    " + where(u <= 0.3, 0.25, -0.25) + (0.1 if u == 1.0 else 0.0) + (0.2 if u != 0.2 else -0.2)"
    " + (0.3 if z > 0.4 else 0.0)) - b*z")
CONSTRUCTS = {"states": {"z": {"units": "", "rate": CONSTRUCTS_RATE, "initial": "estimate"}}, "inputs": {"u": ""},
              "outputs": {"zo": {"expr": "z + c*where(u > 1 or z < -5, sqrt(abs(z)), -tanh(z))"}}}
CONSTRUCTS_P = {"a": {"guess": 0.1, "units": "1/s"}, "b": {"guess": 1.0, "units": "1/s"}, "c": {"guess": 0.5}}

# A hot-water store and its steel wall: two states, both rates affine in the states (the
# compiled fast path evaluates them as c0 + C x with the coefficients once per interval).
WALL = {
    "states": {
        "T": {"units": "K", "rate": "(F*cp*(T_in - T) - UA_i*(T - T_w))/(M*cp)", "initial": "estimate"},
        "T_w": {"units": "K", "rate": "(UA_i*(T - T_w) - UA_o*(T_w - T_amb))/C_w", "initial": "steady"},
    },
    "inputs": {"F": "kg/s", "T_in": "K", "T_amb": "K"},
    "outputs": {"T_store": {"expr": "T", "units": "K"}},
    "constants": {"M": {"value": 800.0, "units": "kg"}, "cp": {"value": 4186.0, "units": "J/(kg*K)"}},
}
WALL_P = {"UA_i": {"guess": 900.0, "units": "W/K"}, "UA_o": {"guess": 40.0, "units": "W/K"},
          "C_w": {"guess": 2.0e5, "units": "J/K"}}

STATIC = {"inputs": {"u": ""}, "outputs": {"yv": {"expr": "a*u + b*u**2"}}}
STATIC_P = {"a": {"guess": 1.5}, "b": {"guess": -0.3}}


def build(model: dict, params: dict, **state_changes):
    model = copy.deepcopy(model)
    for state, changes in state_changes.items():
        model["states"][state].update(changes)
    return build_spec(Table(model, ("model",)), Table(params, ("parameters",)))


@lru_cache(maxsize=None)
def lag_spec(initial="0.0"):
    value = initial if initial in ("estimate", "steady", "measured") else float(initial)
    return build(LAG, LAG_P, y={"initial": value})


@lru_cache(maxsize=None)
def tank_spec():
    return build(TANK, TANK_P)


@lru_cache(maxsize=None)
def reactor_spec():
    return build(REACTOR, REACTOR_P)


@lru_cache(maxsize=None)
def constructs_spec():
    return build(CONSTRUCTS, CONSTRUCTS_P)


@lru_cache(maxsize=None)
def wall_spec():
    return build(WALL, WALL_P)


@lru_cache(maxsize=None)
def static_spec():
    return build(STATIC, STATIC_P)


def steps(t: np.ndarray, period: float, low: float = 0.2, high: float = 1.0) -> np.ndarray:
    return np.where((t // period) % 2 == 0, high, low)


def lag_record(dt: float = 1.0, n: int = 101, hold: str = "previous", seed: int = 0):
    t = np.arange(n) * dt
    rng = np.random.default_rng(seed)
    u = steps(t, 20 * dt) + 0.3 * rng.standard_normal(n)
    y = 1.5 * u + 0.05 * rng.standard_normal(n)
    return record_from_arrays("lag", t, {"u": u}, {"y": y}, hold=hold)


def tank_record(n: int = 121, dt: float = 1.0, seed: int = 1):
    t = np.arange(n) * dt
    rng = np.random.default_rng(seed)
    q = np.clip(0.05 * steps(t, 30.0, 0.0, 1.0) + 0.01 * rng.standard_normal(n), 0.0, None)
    return record_from_arrays("tank", t, {"q_in": q}, {"h": 1.0 + 0.01 * rng.standard_normal(n)})


def reactor_record(n: int = 61, dt: float = 1.0):
    t = np.arange(n) * dt
    c_in = steps(t, 15.0, 0.8, 1.0)
    t_in = 340.0 + 5.0 * steps(t, 25.0, 0.0, 1.0)
    return record_from_arrays("cstr", t, {"C_in": c_in, "T_in": t_in}, {"C": np.zeros(n), "T": np.full(n, 340.0)},
                              units={"T_in": "K", "T": "K"})


def constructs_record(n: int = 81, seed: int = 3):
    t = np.arange(n) * 1.0
    rng = np.random.default_rng(seed)
    levels = np.array([0.2, 0.3, 0.6, 1.0, 1.5, 2.5])
    u = levels[rng.integers(0, levels.size, n // 5 + 1)].repeat(5)[:n]
    return record_from_arrays("constructs", t, {"u": u}, {"zo": np.zeros(n)})


def wall_record(n: int = 181, dt: float = 30.0, seed: int = 6):
    t = np.arange(n) * dt
    rng = np.random.default_rng(seed)
    flow = 0.05 * steps(t, 900.0, 0.0, 1.0) + 0.002 * rng.standard_normal(n).clip(-1, 1)
    t_in = 288.0 + 2.0 * np.sin(t / 2000.0)
    t_amb = 278.0 + 4.0 * np.sin(t / 3000.0)
    return record_from_arrays("wall", t, {"F": flow, "T_in": t_in, "T_amb": t_amb}, {"T_store": np.full(n, 330.0)},
                              units={"F": "kg/s", "T_in": "K", "T_amb": "K", "T_store": "K"})


def static_record(n: int = 25):
    t = np.arange(n) * 2.0
    return record_from_arrays("static", t, {"u": np.linspace(-1.0, 2.0, n)}, {"yv": np.sin(t)})


def assert_agree(actual: np.ndarray, desired: np.ndarray, rtol: float, what: str = "") -> None:
    """Same NaN pattern; finite entries within rtol * max|desired| (per sensitivity column
    when the arrays have a trailing column axis of sensitivities)."""
    actual, desired = np.asarray(actual), np.asarray(desired)
    assert actual.shape == desired.shape, what
    assert np.array_equal(np.isnan(actual), np.isnan(desired)), f"{what}: different NaN pattern"
    good = ~np.isnan(desired)
    if not good.any():
        return
    if desired.ndim == 3:
        for c in range(desired.shape[2]):
            d, a = desired[..., c][good[..., c]], actual[..., c][good[..., c]]
            scale = np.max(np.abs(d))
            err = np.max(np.abs(a - d))
            assert err <= rtol * scale, f"{what} column {c}: max error {err:.3g} vs scale {scale:.3g}"
        return
    d, a = desired[good], actual[good]
    scale = np.max(np.abs(d))
    err = np.max(np.abs(a - d))
    assert err <= rtol * scale, f"{what}: max error {err:.3g} vs scale {scale:.3g} (relative {err / scale:.3g})"

"""Property-based fuzz of the expression layer (hypothesis): random expressions of the
allowed grammar, with tiny, huge, negative and zero numbers, go through the model build,
code generation (both dialects) and the reference engine; nothing but graybox's own user
errors (graybox.errors.GrayboxError) may escape, and evaluation gives numbers, inf or NaN.

Reference: the grammar documented in graybox.model.expr and README ("Expressions may use
..."); IEEE 754 semantics for what evaluation may return.  The compiled (numba) kernels
are checked here by running the same scalar-dialect source with numpy float64 scalars,
whose error semantics are those numba is asked for (error_model='numpy'); one model with
the run-time non-finite constructs is compiled for real at the end.
Derandomized and database-free, so CI runs the same examples every time (~10 s).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from graybox.configkit import Table
from graybox.data.record import record_from_arrays
from graybox.errors import GrayboxError
from graybox.model.build import build_spec
from graybox.model.codegen import compile_functions, function_source
from graybox.model.expr import FUNCTIONS, parse
from graybox.simulate import Engine, generate, plan
from graybox.simulate.generate import ARGS, symbol_env, tensor_defs

SPECIAL = [0.0, -0.0, 1.0, -1.0, 0.5, 2.0, 3.0, 10.0, 1e-300, -1e-300, 5e-324, 1e300, -1e300, 1e308, 709.0, 710.0]
NUMBERS = st.one_of(
    st.sampled_from(SPECIAL),
    st.floats(allow_nan=False, allow_infinity=False),
    st.integers(-10 ** 35, 10 ** 35),
).map(lambda v: f"({v!r})" if (v < 0 or repr(v).startswith("-")) else repr(v))
NAMES = st.sampled_from(["x", "u", "k", "pi"])
UNARY = sorted(f for f, n in FUNCTIONS.items() if n == 1)
COMPARE = ["<", "<=", ">", ">=", "==", "!="]


def _extend(children):
    cond = st.tuples(children, st.sampled_from(COMPARE), children).map(lambda t: f"({t[0]} {t[1]} {t[2]})")
    cond = cond | st.tuples(cond, st.sampled_from(["and", "or"]), cond).map(lambda t: f"({t[0]} {t[1]} {t[2]})") \
        | cond.map(lambda c: f"(not {c})")
    return st.one_of(
        st.tuples(children, st.sampled_from(["+", "-", "*", "/", "**"]), children).map(lambda t: f"({t[0]} {t[1]} {t[2]})"),
        children.map(lambda c: f"(-{c})"),
        st.tuples(st.sampled_from(UNARY), children).map(lambda t: f"{t[0]}({t[1]})"),
        st.tuples(st.sampled_from(["min", "max"]), children, children).map(lambda t: f"{t[0]}({t[1]}, {t[2]})"),
        st.tuples(children, cond, children).map(lambda t: f"({t[0]} if {t[1]} else {t[2]})"),
        st.tuples(cond, children, children).map(lambda t: f"where({t[0]}, {t[1]}, {t[2]})"),
    )


REACHED = {"built": 0, "refused": 0}
EXPRESSIONS = st.recursive(NUMBERS | NAMES, _extend, max_leaves=10)

# Points where the generated functions are evaluated: ordinary, zero, tiny, huge, negative.
POINTS = np.array([[0.7, 0.0, -1.0, 1e-300, 1e300, -2.5],     # x
                   [1.3, 0.0, 2.0, -1e-300, -1e300, 0.5],     # u
                   [0.4, 0.0, -0.5, 5e-324, 1e308, 3.0]])     # k


def _model(expr: str, where: str):
    """One state x, one input u, one parameter k; the fuzzed expression in the rate (over a
    time constant tau so that the units are 1/s) or in the output."""
    model = {"states": {"x": {"units": "", "rate": "(x - k*u)/tau", "initial": 0.5}}, "inputs": {"u": ""},
             "constants": {"tau": {"value": 2.0, "units": "s"}},
             "outputs": {"y": {"expr": "x"}}}
    if where == "rate":
        model["states"]["x"]["rate"] = f"({expr})/tau"
    else:
        model["outputs"]["y"]["expr"] = expr
    return build_spec(Table(model, ("model",)), Table({"k": {"guess": 0.4}}, ("parameters",)))


def _scalar_functions(spec):
    """The compiled core's scalar dialect, run as Python on numpy float64 scalars."""
    from graybox.simulate.kernel_emit import KernelEmitter

    env, chunks, names = symbol_env(spec), [], []
    for d in tensor_defs(spec):
        em = KernelEmitter(env)
        for idx, node in sorted(d.entries.items()):
            em.assign(f"out[{', '.join(map(str, idx))}]", node)
        chunks.append(function_source(d.name, ARGS, em.lines))
        names.append((d.name, d.shape))
    fns = compile_functions("import numpy as np\n\n" + "\n".join(chunks), [n for n, _ in names])
    return [(fns[n], shape) for n, shape in names]


def _evaluate_everything(spec) -> None:
    funcs = generate(spec)
    n_sets = POINTS.shape[1]
    with np.errstate(all="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for name, shape in funcs.shapes.items():  # numpy dialect, all sets at once
            out = np.zeros(shape + (n_sets,))
            funcs.fns[name](POINTS[0:1], POINTS[1:2, 0], POINTS[2:3], out)
            assert out.dtype == float
        for fn, shape in _scalar_functions(spec):  # scalar dialect, one set at a time
            for s in range(n_sets):
                out = np.zeros(shape)
                fn(POINTS[0:1, s], POINTS[1:2, s], POINTS[2:3, s], out)
        t = np.arange(4.0)
        rec = record_from_arrays("fuzz", t, {"u": np.array([1.0, 0.0, -1.0, 2.0])}, {"y": np.zeros(4)})
        res = Engine(spec, "reference").simulate(plan(spec, rec), np.array([[0.4], [0.0], [-3.0]]), sens=True)
        assert res.outputs["y"].shape == (3, 4)


@settings(max_examples=1000, deadline=None, derandomize=True, database=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much])
@given(expr=EXPRESSIONS, where=st.sampled_from(["rate", "output"]))
def test_only_graybox_errors_escape(expr, where):
    try:
        spec = _model(expr, where)
    except GrayboxError:
        REACHED["refused"] += 1
        return
    REACHED["built"] += 1
    try:
        _evaluate_everything(spec)
    except GrayboxError:
        pass


@settings(max_examples=300, deadline=None, derandomize=True, database=None)
@given(text=st.text(alphabet="xuk0123456789.e+-*/()<>=! ,_aifnotrdspqlwhm\n\t", max_size=60))
def test_arbitrary_text_gives_only_model_errors(text):
    """Any text over the expression alphabet: a tree or a ModelError, nothing else."""
    try:
        parse(text, where="[model.states.x] rate")
    except GrayboxError:
        pass


@pytest.mark.parametrize("expr", [
    "x*(exp(k*1000)/exp(k*1000))",        # inf/inf at run time
    "x/u + k",                             # division by zero at u = 0
    "x**(-1.5) * k",                       # zero to a negative power at x = 0
    "(-x - 1)**k",                          # negative base to a fractional power
    "0**k + x",                            # derivative with log(0) and 0/0
])
def test_run_time_non_finite_values_are_numbers_not_exceptions(expr):
    """IEEE 754: these evaluate to inf or NaN at some points; the generated code (numpy
    dialect, scalar dialect) and the reference engine return them without raising."""
    _evaluate_everything(_model(expr, "rate"))


def test_the_fuzz_reaches_evaluation():
    """Guard against a fuzz that only exercises refusals: run after the fuzz above (same
    module, file order), most generated models must build and be evaluated."""
    if REACHED["built"] + REACHED["refused"] == 0:
        pytest.skip("the fuzz did not run in this process")
    assert REACHED["built"] >= 500, REACHED


def test_compiled_engine_returns_non_finite_values_without_exceptions():
    """The constructs above in one rate, compiled by numba (error_model='numpy'): every set
    is simulated without a Python exception; sets that meet inf/NaN are flagged not ok."""
    spec = _model("x*(exp(k*1000)/exp(k*1000)) + x/u + x**(-1.5)*k + (-x - 1)**k + 0**k", "rate")
    t = np.arange(4.0)
    rec = record_from_arrays("fuzz", t, {"u": np.array([1.0, 0.0, -1.0, 2.0])}, {"y": np.zeros(4)})
    theta = np.array([[0.4], [0.0], [-3.0], [2.0]])
    tl = plan(spec, rec)
    with np.errstate(all="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore")
        compiled = Engine(spec, "compiled").simulate(tl, theta, sens=True)
        reference = Engine(spec, "reference").simulate(tl, theta, sens=True)
    assert compiled.outputs["y"].shape == reference.outputs["y"].shape == (4, 4)
    assert np.array_equal(compiled.ok, reference.ok)

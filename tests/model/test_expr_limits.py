"""Limits on equations and constants without a finite real value: each is a located
ModelError, raised fast, never a Python RecursionError, MemoryError, OverflowError or
ZeroDivisionError.

References: IEEE 754 double precision (the largest finite double is about 1.798e308, so
1e400 and 10**(10**10) overflow); real analysis (a negative number has no real fractional
power; zero has no negative power); Python's own parser limits (CPython raises
RecursionError on deeply nested input and limits integer literals to 4300 digits).
"""

import math
import time

import numpy as np
import pytest

from graybox.errors import ModelError
from graybox.model.codegen import Emitter, compile_functions, function_source
from graybox.model.build import MAX_INLINED_DEPTH
from graybox.model.expr import MAX_DEPTH, MAX_INT_DIGITS, MAX_LENGTH, diff, parse

WHERE = "[model.states.x] rate"


def evaluate(node, env: dict) -> float:
    """The numpy-dialect generated code of ``node`` at one point."""
    em = Emitter({k: f"v[{i}]" for i, k in enumerate(env)}, "numpy")
    value = em.value(node)
    fn = compile_functions(function_source("fn", ["v"], em.lines + [f"return {value}"]), ["fn"])["fn"]
    return float(fn(np.array(list(env.values()), float)))


def one_state(rate, derived=None, constants=None):
    model = {"states": {"x": {"units": "", "rate": rate, "initial": 1.0}}, "inputs": {"u": ""}}
    if derived:
        model["derived"] = derived
    if constants:
        model["constants"] = constants
    return model, {"k": {"guess": 0.5, "units": "1/s"}}


def refused(text, fragment):
    with pytest.raises(ModelError) as exc:
        parse(text, where=WHERE)
    assert exc.value.where == WHERE
    assert fragment in exc.value.message, exc.value.message
    assert exc.value.hint
    return exc.value


def test_megabyte_sum_is_refused_by_length_before_parsing():
    """A 1 MB balanced sum: refused by its length in well under a second (it used to run
    for more than ten minutes)."""
    def balanced(n):
        return "x" if n == 1 else f"({balanced(n // 2)} + {balanced(n - n // 2)})"
    text = balanced(2 ** 15)
    while len(text) < 1_000_000:
        text = f"({text} + {text})"
    start = time.perf_counter()
    err = refused(text, f"the limit is {MAX_LENGTH:,}")
    assert time.perf_counter() - start < 0.5
    assert "[model.derived]" in err.hint
    assert len(str(err)) < 1000  # the message does not repeat the megabyte


def test_long_chain_of_sums_is_refused():
    refused(" + ".join(["x"] * 400_000), "characters long")


def test_deep_unary_minus_is_refused_without_recursion_error():
    """5,000 nested unary minus make CPython's parser raise RecursionError."""
    refused("-" * 5000 + "x", "nests too deeply")


def test_nesting_depth_limit():
    """Parentheses within CPython's limit but deeper than ours; a chain of 'and' nests one
    level per connective in the tree."""
    ok = "sin(" * (MAX_DEPTH - 2) + "x" + ")" * (MAX_DEPTH - 2)
    parse(ok)
    deep = "sin(" * (MAX_DEPTH + 5) + "x" + ")" * (MAX_DEPTH + 5)
    refused(deep, f"nests deeper than {MAX_DEPTH} levels")
    refused(" and ".join(["x > 1"] * (MAX_DEPTH + 1)), "nests deeper")
    refused(" + ".join(["x"] * (MAX_DEPTH + 1)), "nests deeper")


def test_long_integer_literals():
    """400 digits overflow a double; 5,000 exceed CPython's integer-string limit."""
    refused("1" * 400 + "*x", f"more than {MAX_INT_DIGITS} digits")
    refused("2*" + "9" * 5000, f"more than {MAX_INT_DIGITS} digits")
    parse("6" * MAX_INT_DIGITS + " * x")


@pytest.mark.parametrize("text, fragment", [
    ("10**10**10 * x", "'10**10**10' overflows"),
    ("1e400 * x", "'1e400' overflows"),
    ("x + 1/0", "'1/0' divides by zero"),
    ("x + 1/(2 - 2)", "divides by zero"),
    ("x * 0**(-1)", "raises zero to a negative power"),
    ("x * (-1e-300) ** (-1e-300)", "not a real number"),
    ("x * (-8)**(1/3)", "not a real number"),
    ("x + log(0)", "outside the domain of log()"),
    ("x + sqrt(-1)", "outside the domain of sqrt()"),
    ("x * exp(1000)", "overflows"),
    ("x * (1e200 * 1e200)", "overflows"),
    ("x + (1e308 + 1e308)", "overflows"),
    ("x if x > 0 else 1/0", "divides by zero"),
])
def test_constants_without_a_finite_real_value(text, fragment):
    """Each folds to inf, NaN or a complex number in IEEE/Python arithmetic."""
    err = refused(text, fragment)
    assert "^" in err.message  # the caret points at the constant


@pytest.mark.parametrize("text, value", [
    ("(-2)**2", 4.0), ("(-8)**3", -512.0), ("0**0", 1.0), ("2**-1074", 5e-324), ("1e308 * 1.7", 1.7e308),
])
def test_constants_with_a_value_still_fold(text, value):
    """Integer powers of negative numbers are real; 2**-1074 is the smallest subnormal double."""
    from graybox.model.expr import Num, substitute

    folded = substitute(parse(text), {})
    assert isinstance(folded, Num) and folded.value == value


def test_constant_from_the_constants_table_dividing_by_zero(build):
    model, params = one_state("-k*x*u/C", constants={"C": {"value": 0.0}})
    with pytest.raises(ModelError, match="divides by zero") as exc:
        build(model, params)
    assert "[model.states.x]" in exc.value.where and "constants" in exc.value.hint
    model, params = one_state("-k*x*(C1*C2)", constants={"C1": {"value": 1e200}, "C2": {"value": 1e200}})
    with pytest.raises(ModelError, match="overflows"):
        build(model, params)


def test_inlined_depth_limit(build):
    """A chain of derived quantities, each within the per-expression limit, that nests too
    deep once substituted into the rate."""
    nest = lambda inner: "sin(" * 40 + inner + ")" * 40  # noqa: E731
    derived = {"d0": nest("x"), "d1": nest("d0"), "d2": nest("d1"), "d3": nest("d2")}
    model, params = one_state("-k*d3", derived=derived)
    with pytest.raises(ModelError, match=f"nests .* levels deep; the limit is {MAX_INLINED_DEPTH}") as exc:
        build(model, params)
    assert "derived quantity 'd2'" in exc.value.message or "d3" in exc.value.message


def test_exponentially_shared_derived_quantities_are_fast_or_refused(build):
    """d_j = d_{j-1}*d_{j-1}: each level doubles the unfolded tree.  Hashing, symbols and
    derivatives work on the shared graph (fast), and the unfolded size is refused."""
    derived = {"d0": "x"}
    for j in range(1, 40):
        derived[f"d{j}"] = f"d{j - 1}*d{j - 1}/(1 + d{j - 1})"
    model, params = one_state("-k*d39", derived=derived)
    start = time.perf_counter()
    with pytest.raises(ModelError, match="parts; the limit is"):
        build(model, params)
    assert time.perf_counter() - start < 5.0
    derived = {k: v for k, v in derived.items() if int(k[1:]) < 9}
    model, params = one_state("-k*d8", derived=derived)
    spec = build(model, params)
    assert len(spec.jac_states[0]) == 1


def test_derivatives_of_constant_powers_do_not_raise():
    """d/dy 0**y = 0**y * log(0) (+ 0/0): left unfolded, no ZeroDivisionError; evaluated it
    is NaN or an infinity (IEEE), and so is the value at y < 0."""
    node = parse("0**y + x")
    d = diff(node, "y")
    with np.errstate(all="ignore"):
        value = evaluate(d, {"x": 1.0, "y": 2.0})
    assert not math.isfinite(value) or value == 0.0
    with np.errstate(all="ignore"):
        assert evaluate(node, {"x": 1.0, "y": -1.0}) == math.inf

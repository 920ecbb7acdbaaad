"""Expression parsing, safety and symbolic derivatives.

Derivatives are checked against central finite differences and against sympy (a
general-purpose reference library) on the same expressions.
"""

import math

import numpy as np
import pytest
import sympy

from graybox.errors import ModelError
from graybox.model.codegen import Emitter, compile_functions, function_source
from graybox.model.expr import FUNCTIONS, diff, parse, symbols, to_text


def evaluate(node, env: dict) -> float:
    em = Emitter({k: f"v[{i}]" for i, k in enumerate(env)}, "numpy")
    value = em.value(node)
    src = function_source("fn", ["v"], em.lines + [f"return {value}"])
    fn = compile_functions(src, ["fn"])["fn"]
    return float(fn(np.array(list(env.values()), float)))


EXPRESSIONS = [
    "a*x**2 + b*x + c",
    "k_ref*exp(-E/R*(1/T - 1/T_ref))",
    "sqrt(abs(h))*cv",
    "log(x)/log10(a) + sin(x)*cos(b) - tan(c/10)",
    "tanh(x) + sinh(a/5) + cosh(b/5) + atan(c)",
    "min(x, a) + max(b, c)",
    "x**a",
    "(a if x > b else c*x)",
    "where(x <= a and b < c, x*a, -x/b)",
    "-(x - a)/(b + c)",
]
ENV = {"a": 1.3, "b": 0.7, "c": 2.1, "x": 1.9, "k_ref": 0.02, "E": 5.0e4, "R": 8.314, "T": 350.0,
       "T_ref": 340.0, "h": 0.8, "cv": 0.1}


@pytest.mark.parametrize("text", EXPRESSIONS)
def test_derivatives_match_finite_differences(text):
    """Symbolic derivatives vs central differences (common practice; step ~ eps**(1/3))."""
    node = parse(text)
    for var in sorted(symbols(node)):
        d = evaluate(diff(node, var), ENV)
        h = 1e-6 * max(1.0, abs(ENV[var]))
        up, dn = dict(ENV), dict(ENV)
        up[var] += h
        dn[var] -= h
        fd = (evaluate(node, up) - evaluate(node, dn)) / (2 * h)
        assert d == pytest.approx(fd, rel=1e-6, abs=1e-9), (text, var)


@pytest.mark.parametrize("text", [e for e in EXPRESSIONS if "if" not in e and "where" not in e and "min" not in e])
def test_derivatives_match_sympy(text):
    """Symbolic derivatives vs sympy's (reference library), evaluated at one point."""
    node = parse(text)
    names = sorted(symbols(node))
    syms = {n: sympy.Symbol(n, real=True) for n in names}
    sexpr = sympy.sympify(text.replace("atan", "atan"), locals={**syms, "log10": lambda z: sympy.log(z, 10)})
    for var in names:
        ref = float(sympy.diff(sexpr, syms[var]).subs({syms[n]: ENV[n] for n in names}))
        assert evaluate(diff(node, var), ENV) == pytest.approx(ref, rel=1e-12, abs=1e-14)


def test_every_function_is_parsed_and_evaluated():
    """Each listed function evaluates like Python's math module (reference library)."""
    for fn, nargs in FUNCTIONS.items():
        if fn == "where":
            continue
        text = f"{fn}({', '.join(['x'] * nargs)})"
        ref = {"abs": abs, "min": min, "max": max, "atan": math.atan}.get(fn) or getattr(math, fn)
        assert evaluate(parse(text), {"x": 0.6}) == pytest.approx(ref(*([0.6] * nargs)), rel=1e-15)


@pytest.mark.parametrize("text, fragment", [
    ("__import__('os')", "underscore"),
    ("x.real", "attribute access"),
    ("x[0]", "subscripts"),
    ("(lambda: 1)()", "only the listed math functions"),
    ("lambda y: y", "lambdas"),
    ("open('f')", "unknown function 'open'"),
    ("expp(x)", "did you mean 'exp'"),
    ("x if", "syntax error"),
    ("'text'", "only numbers"),
    ("a < b < c", "chained comparisons"),
    ("[x, y]", "not allowed"),
    ("x @ y", "not allowed"),
    ("exp(x, y)", "takes 1 argument"),
    ("__class__", "underscore"),
])
def test_disallowed_syntax_is_rejected_with_a_caret(text, fragment):
    with pytest.raises(ModelError) as exc:
        parse(text, where="test")
    msg = str(exc.value)
    assert fragment in msg
    assert "^" in msg or "hint" in msg


def test_caret_points_at_the_column():
    with pytest.raises(ModelError) as exc:
        parse("UA*(T - T_amb) + foo(T)")
    lines = str(exc.value).splitlines()
    expr_line = next(i for i, line in enumerate(lines) if "UA*(T" in line)
    caret = lines[expr_line + 1].index("^")
    assert lines[expr_line][caret:caret + 3] == "foo"


def test_to_text_round_trips():
    for text in EXPRESSIONS:
        node = parse(text)
        assert parse(to_text(node)) == node


AFFINE = [  # (text, variables, structurally affine?)
    ("(F*cp*(T_in - T) + Q - UA*(T - T_amb))/(M*cp)", ("T",), True),
    ("(UA*(T - Tw) - UB*(Tw - T_amb))/C", ("T", "Tw"), True),
    ("-(x - a)/(b + c) + 3*x - x/4", ("x",), True),
    ("exp(-E/T_ref)*(x - a) + max(a, b)*x", ("x",), True),
    ("a*x**2 + b*x + c", ("x",), False),
    ("sqrt(abs(h))*cv", ("h",), False),
    ("x*T", ("x", "T"), False),
    ("a/x", ("x",), False),
    ("where(x > a, 1.0, 0.0)", ("x",), False),  # zero derivative, yet a jump: not affine
    ("(a if x > b else c*x)", ("x",), False),
]


@pytest.mark.parametrize("text,variables,expected", AFFINE)
def test_affine_decomposition_matches_sympy(text, variables, expected):
    """is_affine and affine_parts against sympy (reference library): for affine trees,
    c0 + sum(c_j v_j) - expr simplifies to zero and each c_j equals sympy's derivative."""
    from graybox.model.expr import affine_parts, is_affine

    node = parse(text)
    assert is_affine(node, variables) is expected
    if not expected:
        with pytest.raises(ValueError):
            affine_parts(node, variables)
        return
    c0, coefs = affine_parts(node, variables)
    names = sorted(symbols(node))
    syms = {n: sympy.Symbol(n, real=True) for n in names}
    loc = {**syms, "max": sympy.Max}
    ref = sympy.sympify(text, locals=loc)
    ours = sympy.sympify(to_text(c0), locals=loc) + sum(
        sympy.sympify(to_text(c), locals=loc) * syms[v] for c, v in zip(coefs, variables))
    assert sympy.simplify(ours - ref) == 0
    for c, v in zip(coefs, variables):
        assert not (symbols(c) & set(variables))
        assert sympy.simplify(sympy.sympify(to_text(c), locals=loc) - sympy.diff(ref, syms[v])) == 0

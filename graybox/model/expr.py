"""Expression trees for model equations: safe parsing, simplification, symbolic derivatives.

An equation in a config file is text.  It is parsed with :mod:`ast` and converted into the
small immutable tree below, allowing only numbers, names, arithmetic, comparisons, boolean
connectives, a conditional and a fixed list of math functions.  Anything else (attribute
access, subscripts, imports, lambdas, calls of unknown functions, names with a leading
underscore) is rejected with the expression shown and a caret under the offending column.

Nothing a config says is ever run as Python.  Code generated later (``graybox.model.codegen``)
is emitted only from these validated trees.

Trees are hashable and compare structurally, so equal sub-expressions are found by a dict
lookup (used for common-subexpression elimination in code generation).
"""

from __future__ import annotations

import ast
import keyword
import math
from dataclasses import dataclass
from typing import Callable, Iterable, Mapping

from graybox.errors import ModelError

# ---------------------------------------------------------------------------------------------
# Nodes


class Node:
    """Base of all expression nodes (frozen dataclasses below)."""

    __slots__ = ()

    def children(self) -> tuple["Node", ...]:
        return ()


@dataclass(frozen=True, slots=True)
class Num(Node):
    value: float


@dataclass(frozen=True, slots=True)
class Sym(Node):
    name: str


@dataclass(frozen=True, slots=True)
class BinOp(Node):
    op: str  # + - * / **
    left: Node
    right: Node

    def children(self):
        return (self.left, self.right)


@dataclass(frozen=True, slots=True)
class Neg(Node):
    arg: Node

    def children(self):
        return (self.arg,)


@dataclass(frozen=True, slots=True)
class Call(Node):
    fn: str
    args: tuple[Node, ...]

    def children(self):
        return self.args


@dataclass(frozen=True, slots=True)
class Compare(Node):
    op: str  # < <= > >= == !=
    left: Node
    right: Node

    def children(self):
        return (self.left, self.right)


@dataclass(frozen=True, slots=True)
class Logic(Node):
    op: str  # and, or, not (not has right=None)
    left: Node
    right: Node | None = None

    def children(self):
        return (self.left,) if self.right is None else (self.left, self.right)


@dataclass(frozen=True, slots=True)
class IfElse(Node):
    cond: Node
    then: Node
    other: Node

    def children(self):
        return (self.cond, self.then, self.other)


ZERO = Num(0.0)
ONE = Num(1.0)

#: The math functions an equation may call, with their number of arguments.
FUNCTIONS: Mapping[str, int] = {
    "exp": 1, "log": 1, "log10": 1, "sqrt": 1, "abs": 1,
    "sin": 1, "cos": 1, "tan": 1, "tanh": 1, "sinh": 1, "cosh": 1, "atan": 1,
    "min": 2, "max": 2, "where": 3,
}
#: Reserved words that cannot name a symbol.
RESERVED = frozenset(FUNCTIONS) | {"t", "time", "pi", "inf", "nan", "True", "False"}

_BINOPS = {ast.Add: "+", ast.Sub: "-", ast.Mult: "*", ast.Div: "/", ast.Pow: "**"}
_CMPOPS = {ast.Lt: "<", ast.LtE: "<=", ast.Gt: ">", ast.GtE: ">=", ast.Eq: "==", ast.NotEq: "!="}

# ---------------------------------------------------------------------------------------------
# Parsing


def caret_message(text: str, col: int, message: str) -> str:
    """The expression with a caret under column ``col`` (0-based), then the message."""
    col = max(0, min(col, len(text)))
    return f"{message}\n    {text}\n    {' ' * col}^"


def is_valid_symbol_name(name: str) -> bool:
    return (
        isinstance(name, str)
        and name.isidentifier()
        and not name.startswith("_")
        and not keyword.iskeyword(name)
        and name not in RESERVED
    )


def parse(text: str, *, where: str = "") -> Node:
    """Parse one expression into a validated tree; raise ModelError with a caret on misuse."""
    if not isinstance(text, str) or not text.strip():
        raise ModelError("the expression is empty", where=where, hint="write an expression such as 'UA*(T - T_amb)'")
    flat = " ".join(text.split("\n")).strip()
    try:
        tree = ast.parse(flat, mode="eval")
    except SyntaxError as exc:
        col = (exc.offset or 1) - 1
        raise ModelError(caret_message(flat, col, f"syntax error: {exc.msg}"), where=where) from None
    return _convert(tree.body, flat, where)


def _reject(node: ast.AST, text: str, where: str, what: str, hint: str | None = None):
    col = getattr(node, "col_offset", 0)
    raise ModelError(caret_message(text, col, what), where=where, hint=hint)


def _convert(node: ast.AST, text: str, where: str) -> Node:  # noqa: C901 (one dispatch table)
    conv = lambda n: _convert(n, text, where)  # noqa: E731
    if isinstance(node, ast.Constant):
        if isinstance(node.value, bool) or not isinstance(node.value, (int, float)):
            _reject(node, text, where, f"only numbers are allowed as constants, not {node.value!r}")
        return Num(float(node.value))
    if isinstance(node, ast.Name):
        name = node.id
        if name.startswith("_"):
            _reject(node, text, where, f"names starting with an underscore are not allowed: '{name}'")
        if name == "pi":
            return Num(math.pi)
        if name in FUNCTIONS:
            _reject(node, text, where, f"'{name}' is a function; call it with arguments")
        return Sym(name)
    if isinstance(node, ast.BinOp):
        op = _BINOPS.get(type(node.op))
        if op is None:
            _reject(node, text, where, f"operator '{type(node.op).__name__}' is not allowed",
                    hint="use + - * / ** and the listed functions")
        return BinOp(op, conv(node.left), conv(node.right))
    if isinstance(node, ast.UnaryOp):
        if isinstance(node.op, ast.USub):
            return Neg(conv(node.operand))
        if isinstance(node.op, ast.UAdd):
            return conv(node.operand)
        if isinstance(node.op, ast.Not):
            return Logic("not", conv(node.operand))
        _reject(node, text, where, "this unary operator is not allowed")
    if isinstance(node, ast.Compare):
        if len(node.ops) != 1:
            _reject(node, text, where, "chained comparisons are not allowed", hint="write (a < b) and (b < c)")
        op = _CMPOPS.get(type(node.ops[0]))
        if op is None:
            _reject(node, text, where, "only < <= > >= == != comparisons are allowed")
        return Compare(op, conv(node.left), conv(node.comparators[0]))
    if isinstance(node, ast.BoolOp):
        op = "and" if isinstance(node.op, ast.And) else "or"
        out = conv(node.values[0])
        for v in node.values[1:]:
            out = Logic(op, out, conv(v))
        return out
    if isinstance(node, ast.IfExp):
        return IfElse(conv(node.test), conv(node.body), conv(node.orelse))
    if isinstance(node, ast.Call):
        if not isinstance(node.func, ast.Name):
            _reject(node, text, where, "only the listed math functions can be called",
                    hint=f"allowed: {', '.join(FUNCTIONS)}")
        fn = node.func.id
        if fn.startswith("_"):
            _reject(node, text, where, f"names starting with an underscore are not allowed: '{fn}'")
        if fn not in FUNCTIONS:
            import difflib

            close = difflib.get_close_matches(fn, FUNCTIONS, n=1)
            _reject(node, text, where, f"unknown function '{fn}'",
                    hint=(f"did you mean '{close[0]}'? " if close else "") + f"allowed: {', '.join(FUNCTIONS)}")
        if node.keywords:
            _reject(node, text, where, f"'{fn}' takes no keyword arguments")
        if len(node.args) != FUNCTIONS[fn]:
            _reject(node, text, where, f"'{fn}' takes {FUNCTIONS[fn]} argument(s), got {len(node.args)}")
        args = tuple(conv(a) for a in node.args)
        if fn == "where":
            return IfElse(*args)
        return Call(fn, args)
    if isinstance(node, ast.Attribute):
        _reject(node, text, where, "attribute access is not allowed")
    if isinstance(node, ast.Subscript):
        _reject(node, text, where, "subscripts are not allowed")
    if isinstance(node, ast.Lambda):
        _reject(node, text, where, "lambdas are not allowed")
    _reject(node, text, where, f"'{type(node).__name__}' is not allowed in an equation",
            hint="use numbers, names, + - * / **, comparisons, 'a if c else b' and the listed functions")
    raise AssertionError("unreachable")


# ---------------------------------------------------------------------------------------------
# Traversal


def symbols(node: Node) -> set[str]:
    """All symbol names in a tree."""
    out: set[str] = set()
    stack = [node]
    while stack:
        n = stack.pop()
        if isinstance(n, Sym):
            out.add(n.name)
        else:
            stack.extend(n.children())
    return out


def substitute(node: Node, mapping: Mapping[str, Node], _memo: dict | None = None) -> Node:
    """Replace symbols by trees (used to inline derived quantities)."""
    memo = {} if _memo is None else _memo
    if node in memo:
        return memo[node]
    if isinstance(node, Sym):
        out = mapping.get(node.name, node)
    elif isinstance(node, Num):
        out = node
    else:
        kids = [substitute(c, mapping, memo) for c in node.children()]
        out = rebuild(node, kids)
    memo[node] = out
    return out


def rebuild(node: Node, kids: list[Node]) -> Node:
    """The same kind of node over new children, simplified."""
    if isinstance(node, BinOp):
        return binop(node.op, kids[0], kids[1])
    if isinstance(node, Neg):
        return neg(kids[0])
    if isinstance(node, Call):
        return call(node.fn, *kids)
    if isinstance(node, Compare):
        return Compare(node.op, kids[0], kids[1])
    if isinstance(node, Logic):
        return Logic(node.op, kids[0], kids[1] if len(kids) > 1 else None)
    if isinstance(node, IfElse):
        return ifelse(kids[0], kids[1], kids[2])
    raise TypeError(node)


def to_text(node: Node) -> str:
    """Readable text of a tree (for messages and reports), fully parenthesised where needed."""
    if isinstance(node, Num):
        v = node.value
        return repr(int(v)) if v.is_integer() and abs(v) < 1e15 else repr(v)
    if isinstance(node, Sym):
        return node.name
    if isinstance(node, BinOp):
        return f"({to_text(node.left)} {node.op} {to_text(node.right)})"
    if isinstance(node, Neg):
        return f"(-{to_text(node.arg)})"
    if isinstance(node, Call):
        return f"{node.fn}({', '.join(to_text(a) for a in node.args)})"
    if isinstance(node, Compare):
        return f"({to_text(node.left)} {node.op} {to_text(node.right)})"
    if isinstance(node, Logic):
        if node.op == "not":
            return f"(not {to_text(node.left)})"
        return f"({to_text(node.left)} {node.op} {to_text(node.right)})"
    if isinstance(node, IfElse):
        return f"({to_text(node.then)} if {to_text(node.cond)} else {to_text(node.other)})"
    raise TypeError(node)


# ---------------------------------------------------------------------------------------------
# Simplifying constructors


def _is(node: Node, value: float) -> bool:
    return isinstance(node, Num) and node.value == value


def _fold(fn: Callable[[], float]) -> Num | None:
    try:
        v = float(fn())
    except (ArithmeticError, ValueError):
        return None
    return Num(v) if math.isfinite(v) else None


def add(a: Node, b: Node) -> Node:
    if _is(a, 0.0):
        return b
    if _is(b, 0.0):
        return a
    if isinstance(a, Num) and isinstance(b, Num):
        return _fold(lambda: a.value + b.value) or BinOp("+", a, b)
    if isinstance(b, Neg):
        return sub(a, b.arg)
    return BinOp("+", a, b)


def sub(a: Node, b: Node) -> Node:
    if _is(b, 0.0):
        return a
    if _is(a, 0.0):
        return neg(b)
    if a == b:
        return ZERO
    if isinstance(a, Num) and isinstance(b, Num):
        return _fold(lambda: a.value - b.value) or BinOp("-", a, b)
    if isinstance(b, Neg):
        return add(a, b.arg)
    return BinOp("-", a, b)


def mul(a: Node, b: Node) -> Node:
    if _is(a, 0.0) or _is(b, 0.0):
        return ZERO
    if _is(a, 1.0):
        return b
    if _is(b, 1.0):
        return a
    if _is(a, -1.0):
        return neg(b)
    if _is(b, -1.0):
        return neg(a)
    if isinstance(a, Num) and isinstance(b, Num):
        return _fold(lambda: a.value * b.value) or BinOp("*", a, b)
    if isinstance(a, Neg) and isinstance(b, Neg):
        return mul(a.arg, b.arg)
    if isinstance(a, Neg):
        return neg(mul(a.arg, b))
    if isinstance(b, Neg):
        return neg(mul(a, b.arg))
    return BinOp("*", a, b)


def div(a: Node, b: Node) -> Node:
    if _is(a, 0.0) and not _is(b, 0.0):
        return ZERO
    if _is(b, 1.0):
        return a
    if isinstance(a, Num) and isinstance(b, Num):
        return _fold(lambda: a.value / b.value) or BinOp("/", a, b)
    if isinstance(a, Neg):
        return neg(div(a.arg, b))
    if isinstance(b, Neg):
        return neg(div(a, b.arg))
    return BinOp("/", a, b)


def power(a: Node, b: Node) -> Node:
    if _is(b, 0.0):
        return ONE
    if _is(b, 1.0):
        return a
    if isinstance(a, Num) and isinstance(b, Num):
        return _fold(lambda: a.value ** b.value) or BinOp("**", a, b)
    return BinOp("**", a, b)


def neg(a: Node) -> Node:
    if isinstance(a, Num):
        return Num(-a.value) if a.value != 0.0 else ZERO
    if isinstance(a, Neg):
        return a.arg
    return Neg(a)


def call(fn: str, *args: Node) -> Node:
    if all(isinstance(a, Num) for a in args) and fn in _MATH:
        folded = _fold(lambda: _MATH[fn](*(a.value for a in args)))
        if folded is not None:
            return folded
    return Call(fn, tuple(args))


def ifelse(c: Node, a: Node, b: Node) -> Node:
    if a == b:
        return a
    return IfElse(c, a, b)


def binop(op: str, a: Node, b: Node) -> Node:
    return {"+": add, "-": sub, "*": mul, "/": div, "**": power}[op](a, b)


_MATH: Mapping[str, Callable[..., float]] = {
    "exp": math.exp, "log": math.log, "log10": math.log10, "sqrt": math.sqrt, "abs": abs,
    "sin": math.sin, "cos": math.cos, "tan": math.tan, "tanh": math.tanh, "sinh": math.sinh,
    "cosh": math.cosh, "atan": math.atan, "min": min, "max": max,
}

# ---------------------------------------------------------------------------------------------
# Symbolic differentiation


def diff(node: Node, var: str, _memo: dict | None = None) -> Node:
    """d node / d var, simplified.  Comparisons and conditions have zero derivative; the
    derivative of a conditional is the conditional of the derivatives; min, max and abs
    take the derivative of the active branch (a one-sided derivative at the kink)."""
    memo = {} if _memo is None else _memo
    key = node
    if key in memo:
        return memo[key]
    d = lambda n: diff(n, var, memo)  # noqa: E731
    if isinstance(node, Num):
        out: Node = ZERO
    elif isinstance(node, Sym):
        out = ONE if node.name == var else ZERO
    elif var not in symbols(node):
        out = ZERO
    elif isinstance(node, Neg):
        out = neg(d(node.arg))
    elif isinstance(node, BinOp):
        a, b = node.left, node.right
        da, db = d(a), d(b)
        if node.op == "+":
            out = add(da, db)
        elif node.op == "-":
            out = sub(da, db)
        elif node.op == "*":
            out = add(mul(da, b), mul(a, db))
        elif node.op == "/":
            # (da*b - a*db)/b**2 written as da/b - (a/b)*db/b to share a/b with the value
            out = sub(div(da, b), div(mul(div(a, b), db), b))
        else:  # power
            if isinstance(b, Num):
                out = mul(mul(b, power(a, Num(b.value - 1.0))), da)
            else:
                out = mul(node, add(mul(db, call("log", a)), div(mul(b, da), a)))
    elif isinstance(node, Call):
        out = _diff_call(node, d)
    elif isinstance(node, IfElse):
        out = ifelse(node.cond, d(node.then), d(node.other))
    elif isinstance(node, (Compare, Logic)):
        out = ZERO
    else:
        raise TypeError(node)
    memo[key] = out
    return out


def _diff_call(node: Call, d: Callable[[Node], Node]) -> Node:
    fn, args = node.fn, node.args
    if fn == "min":
        a, b = args
        return ifelse(Compare("<=", a, b), d(a), d(b))
    if fn == "max":
        a, b = args
        return ifelse(Compare(">=", a, b), d(a), d(b))
    (u,) = args
    du = d(u)
    if _is(du, 0.0):
        return ZERO
    if fn == "exp":
        inner = node
    elif fn == "log":
        inner = div(ONE, u)
    elif fn == "log10":
        inner = div(ONE, mul(u, Num(math.log(10.0))))
    elif fn == "sqrt":
        inner = div(Num(0.5), node)
    elif fn == "abs":
        return ifelse(Compare(">=", u, ZERO), du, neg(du))
    elif fn == "sin":
        inner = call("cos", u)
    elif fn == "cos":
        inner = neg(call("sin", u))
    elif fn == "tan":
        inner = add(ONE, mul(node, node))
    elif fn == "tanh":
        inner = sub(ONE, mul(node, node))
    elif fn == "sinh":
        inner = call("cosh", u)
    elif fn == "cosh":
        inner = call("sinh", u)
    elif fn == "atan":
        inner = div(ONE, add(ONE, mul(u, u)))
    else:
        raise TypeError(fn)
    return mul(inner, du)


def gradient(node: Node, variables: Iterable[str]) -> list[Node]:
    memo: dict = {}
    out = []
    for v in variables:
        memo.clear()
        out.append(diff(node, v, memo))
    return out


def is_affine(node: Node, variables: Iterable[str]) -> bool:
    """True when ``node`` is structurally affine in ``variables``: built from them by sums,
    differences, negation, products with a factor free of them and quotients by a
    denominator free of them.  Conservative: a variable inside a function, a power, a
    comparison or a conditional makes it not affine (even where the result happens to be)."""
    var = set(variables)

    def free(n: Node) -> bool:
        return not (symbols(n) & var)

    def affine(n: Node) -> bool:
        if free(n) or isinstance(n, Sym):
            return True
        if isinstance(n, Neg):
            return affine(n.arg)
        if isinstance(n, BinOp):
            if n.op in ("+", "-"):
                return affine(n.left) and affine(n.right)
            if n.op == "*":
                return (free(n.left) and affine(n.right)) or (free(n.right) and affine(n.left))
            if n.op == "/":
                return free(n.right) and affine(n.left)
        return False

    return affine(node)


def affine_parts(node: Node, variables: Iterable[str]) -> tuple[Node, list[Node]]:
    """For an affine ``node`` (see :func:`is_affine`): the value at zero and the coefficient
    of each variable, all free of the variables, so ``node == c0 + sum(c_j * v_j)`` exactly
    in real arithmetic."""
    names = list(variables)
    if not is_affine(node, names):
        raise ValueError("not affine in the given variables")
    c0 = substitute(node, {v: ZERO for v in names})
    coefs = gradient(node, names)
    if any(symbols(c) & set(names) for c in [c0, *coefs]):  # pragma: no cover - structural guarantee
        raise AssertionError("affine decomposition left a variable behind")
    return c0, coefs


def walk(node: Node) -> Iterable[Node]:
    """All nodes, parents before children."""
    stack = [node]
    while stack:
        n = stack.pop()
        yield n
        stack.extend(n.children())

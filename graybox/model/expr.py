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
from dataclasses import dataclass, field
from typing import Callable, Iterable, Mapping

from graybox.errors import ModelError

# ---------------------------------------------------------------------------------------------
# Nodes


class Node:
    """Base of all expression nodes (frozen dataclasses below).

    Each node computes its hash once, from its fields (children's hashes are already known),
    so hashing costs O(1) however deep or shared the tree: an expression inlined through a
    chain of derived quantities is a graph whose unfolded size can be exponential, and the
    generated recursive hash would walk all of it.  Pickling rebuilds nodes from their fields
    (a string's hash differs between processes)."""

    __slots__ = ()

    def children(self) -> tuple["Node", ...]:
        """The node's operands, left to right (empty for a leaf)."""
        return ()

    def __post_init__(self) -> None:
        object.__setattr__(self, "_hash", hash((type(self).__name__, *(getattr(self, f) for f in self.__match_args__))))

    def _cached_hash(self) -> int:
        return self._hash

    def __reduce__(self):
        return (type(self), tuple(getattr(self, f) for f in self.__match_args__))


@dataclass(frozen=True, slots=True)
class Num(Node):
    """A number, always finite: parsing refuses and folding never makes an infinite or NaN one."""

    value: float
    _hash: int = field(init=False, repr=False, compare=False)


@dataclass(frozen=True, slots=True)
class Sym(Node):
    """A symbol: a state, input, parameter, constant or derived quantity, by name."""

    name: str
    _hash: int = field(init=False, repr=False, compare=False)


@dataclass(frozen=True, slots=True)
class BinOp(Node):
    """An arithmetic operation ``left op right``, ``op`` one of ``+ - * / **``."""

    op: str  # + - * / **
    left: Node
    right: Node
    _hash: int = field(init=False, repr=False, compare=False)

    def children(self):
        """``(left, right)``."""
        return (self.left, self.right)


@dataclass(frozen=True, slots=True)
class Neg(Node):
    """Negation ``-arg``."""

    arg: Node
    _hash: int = field(init=False, repr=False, compare=False)

    def children(self):
        """``(arg,)``."""
        return (self.arg,)


@dataclass(frozen=True, slots=True)
class Call(Node):
    """A call of a listed math function (:data:`FUNCTIONS`) with its arguments."""

    fn: str
    args: tuple[Node, ...]
    _hash: int = field(init=False, repr=False, compare=False)

    def children(self):
        """The arguments, in order."""
        return self.args


@dataclass(frozen=True, slots=True)
class Compare(Node):
    """A comparison ``left op right`` (``< <= > >= == !=``): a truth value."""

    op: str  # < <= > >= == !=
    left: Node
    right: Node
    _hash: int = field(init=False, repr=False, compare=False)

    def children(self):
        """``(left, right)``."""
        return (self.left, self.right)


@dataclass(frozen=True, slots=True)
class Logic(Node):
    """A boolean connective: ``left and right``, ``left or right``, or ``not left`` (``right`` None)."""

    op: str  # and, or, not (not has right=None)
    left: Node
    right: Node | None = None
    _hash: int = field(init=False, repr=False, compare=False)

    def children(self):
        """``(left,)`` for ``not``, else ``(left, right)``."""
        return (self.left,) if self.right is None else (self.left, self.right)


@dataclass(frozen=True, slots=True)
class IfElse(Node):
    """The conditional ``then if cond else other`` (also written ``where(cond, then, other)``)."""

    cond: Node
    then: Node
    other: Node
    _hash: int = field(init=False, repr=False, compare=False)

    def children(self):
        """``(cond, then, other)``."""
        return (self.cond, self.then, self.other)


for _cls in (Num, Sym, BinOp, Neg, Call, Compare, Logic, IfElse):
    _cls.__hash__ = Node._cached_hash  # type: ignore[method-assign]

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


_SHOWN = 120  # characters of a long expression shown around the caret


def caret_message(text: str, col: int, message: str) -> str:
    """The message, then the expression with a caret under column ``col`` (0-based); of a
    long expression only the part around the column is shown, elided with '...'."""
    col = max(0, min(col, len(text)))
    if len(text) > _SHOWN:
        start = max(0, min(col - _SHOWN // 2, len(text) - _SHOWN))
        head = "..." if start > 0 else ""
        tail = "..." if start + _SHOWN < len(text) else ""
        text, col = head + text[start:start + _SHOWN] + tail, col - start + len(head)
    return f"{message}\n    {text}\n    {' ' * col}^"


def is_valid_symbol_name(name: str) -> bool:
    """True when ``name`` can name a symbol: a Python identifier, not a keyword, not starting with
    an underscore, and not reserved (:data:`RESERVED`: function names, ``t``, ``pi``, ...)."""
    return (
        isinstance(name, str)
        and name.isidentifier()
        and not name.startswith("_")
        and not keyword.iskeyword(name)
        and name not in RESERVED
    )


#: Limits on one expression, checked before it is converted (the parser and every tree walk
#: after it recurse on the nesting depth; the length bounds the work before parsing).
MAX_LENGTH = 20_000
MAX_DEPTH = 100
MAX_NODES = 10_000
MAX_INT_DIGITS = 30
_SPLIT_HINT = "split it into named intermediate quantities under [model.derived]"


def parse(text: str, *, where: str = "") -> Node:
    """Parse one expression into a validated tree; raise ModelError with a caret on misuse.

    Refused with a located error: text longer than :data:`MAX_LENGTH` characters (before
    any parsing), nesting deeper than :data:`MAX_DEPTH`, more than :data:`MAX_NODES` nodes,
    integer literals of more than :data:`MAX_INT_DIGITS` digits, and constant parts that
    fold to no finite real number (``10**10**10``, ``1e400``, ``1/0``, ``(-8)**(1/3)``)."""
    if not isinstance(text, str) or not text.strip():
        raise ModelError("the expression is empty", where=where, hint="write an expression such as 'UA*(T - T_amb)'")
    if len(text) > MAX_LENGTH:
        raise ModelError(f"the expression is {len(text):,} characters long; the limit is {MAX_LENGTH:,}",
                         where=where, hint=_SPLIT_HINT)
    flat = " ".join(text.split("\n")).strip()
    try:
        tree = ast.parse(flat, mode="eval")
    except SyntaxError as exc:
        col = (exc.offset or 1) - 1
        if "integer string conversion" in str(exc.msg):
            raise ModelError(caret_message(flat, col, f"an integer has more than {MAX_INT_DIGITS} digits"),
                             where=where, hint="write it in floating-point notation, e.g. 6.02e23") from None
        raise ModelError(caret_message(flat, col, f"syntax error: {exc.msg}"), where=where) from None
    except (RecursionError, MemoryError):
        raise ModelError(f"the expression nests too deeply to be read (the limit is {MAX_DEPTH} levels)",
                         where=where, hint=_SPLIT_HINT) from None
    except ValueError as exc:  # e.g. a NUL character
        raise ModelError(f"the expression cannot be read: {exc}", where=where,
                         hint="write it with printable characters only") from None
    _check_size(tree.body, flat, where)
    return _Converter(flat, where).convert(tree.body)


def _check_size(root: ast.AST, text: str, where: str) -> None:
    """Depth and node count of the tree the converter would build, without recursion (a
    chain ``a and b and c`` is one ast node but nests one level per connective)."""
    count = 0
    stack: list[tuple[ast.AST, int]] = [(root, 1)]
    while stack:
        node, depth = stack.pop()
        count += 1
        if depth > MAX_DEPTH:
            _reject(node, text, where, f"the expression nests deeper than {MAX_DEPTH} levels", hint=_SPLIT_HINT)
        if count > MAX_NODES:
            raise ModelError(f"the expression has more than {MAX_NODES:,} parts", where=where, hint=_SPLIT_HINT)
        if isinstance(node, ast.BoolOp):
            n = len(node.values)  # converted to a left-nested chain: value i sits n - i deep
            stack.extend((v, depth + (n - 1 if i == 0 else n - i)) for i, v in enumerate(node.values))
        elif isinstance(node, (ast.expr, ast.keyword)):
            stack.extend((c, depth + 1) for c in ast.iter_child_nodes(node)
                         if isinstance(c, (ast.expr, ast.keyword)))


def _reject(node: ast.AST, text: str, where: str, what: str, hint: str | None = None):
    col = getattr(node, "col_offset", 0)
    raise ModelError(caret_message(text, col, what), where=where, hint=hint)


class FoldError(ArithmeticError):
    """A constant that has no finite real value; the message says why."""


def fold_value(op: str, *values: float) -> float:
    """The value of an operator (``+ - * / **``, ``neg``) or listed function on finite real
    numbers, or FoldError saying why there is none (overflow, division by zero, a complex
    or undefined result).  Never any other exception."""
    try:
        if op == "neg":
            out = -values[0]
        elif op == "+":
            out = values[0] + values[1]
        elif op == "-":
            out = values[0] - values[1]
        elif op == "*":
            out = values[0] * values[1]
        elif op == "/":
            if values[1] == 0.0:
                raise FoldError("divides by zero")
            out = values[0] / values[1]
        elif op == "**":
            a, b = values
            if a == 0.0 and b < 0.0:
                raise FoldError("raises zero to a negative power (a division by zero)")
            if a < 0.0 and not float(b).is_integer():
                raise FoldError("is not a real number (a negative base to a fractional power)")
            out = math.pow(a, b)
        else:
            out = _MATH[op](*values)
    except FoldError:
        raise
    except OverflowError:
        raise FoldError("overflows (beyond the largest float, about 1.8e308)") from None
    except (ArithmeticError, ValueError, TypeError):
        raise FoldError(f"is outside the domain of {op}()" if op in _MATH else "has no real value") from None
    if isinstance(out, complex):  # pragma: no cover - excluded above
        raise FoldError("is not a real number")
    out = float(out)
    if math.isinf(out):
        raise FoldError("overflows (beyond the largest float, about 1.8e308)")
    if math.isnan(out):
        raise FoldError("is not a number (NaN)")
    return out


class _Converter:
    """ast -> tree, checking every constant part as it goes (values by node identity)."""

    def __init__(self, text: str, where: str):
        self.text = text
        self.where = where
        self.values: dict[int, float] = {}

    def reject(self, node: ast.AST, what: str, hint: str | None = None):
        _reject(node, self.text, self.where, what, hint)

    def segment(self, node: ast.AST) -> str:
        end = getattr(node, "end_col_offset", None)
        return self.text[node.col_offset:end].strip() if end is not None else ""

    def constant(self, node: ast.AST, out: Node, op: str, kids: tuple[Node, ...]) -> Node:
        """Record the value of ``out`` when all its children are constant; a constant
        without a finite real value is an error located at ``node``."""
        if all(id(k) in self.values for k in kids):
            try:
                self.values[id(out)] = fold_value(op, *(self.values[id(k)] for k in kids))
            except FoldError as exc:
                self.reject(node, f"the constant '{self.segment(node)}' {exc}",
                            hint="check the numbers: a model's constants must be finite real numbers")
        return out

    def number(self, node: ast.Constant) -> Node:
        value = node.value
        if isinstance(value, int):
            digits = len(str(abs(value))) if value.bit_length() < 4 * MAX_INT_DIGITS else MAX_INT_DIGITS + 1
            if digits > MAX_INT_DIGITS:
                self.reject(node, f"the integer '{self.segment(node)[:40]}' has more than {MAX_INT_DIGITS} digits",
                            hint="write it in floating-point notation, e.g. 6.02e23")
        value = float(value)
        if not math.isfinite(value):
            self.reject(node, f"the number '{self.segment(node)}' overflows (beyond the largest float, about 1.8e308)",
                        hint="a model's constants must be finite real numbers")
        out = Num(value)
        self.values[id(out)] = value
        return out

    def convert(self, node: ast.AST) -> Node:  # noqa: C901 (one dispatch table)
        conv = self.convert
        if isinstance(node, ast.Constant):
            if isinstance(node.value, bool) or not isinstance(node.value, (int, float)):
                self.reject(node, f"only numbers are allowed as constants, not {node.value!r}")
            return self.number(node)
        if isinstance(node, ast.Name):
            name = node.id
            if name.startswith("_"):
                self.reject(node, f"names starting with an underscore are not allowed: '{name}'")
            if name == "pi":
                out = Num(math.pi)
                self.values[id(out)] = math.pi
                return out
            if name in FUNCTIONS:
                self.reject(node, f"'{name}' is a function; call it with arguments")
            return Sym(name)
        if isinstance(node, ast.BinOp):
            op = _BINOPS.get(type(node.op))
            if op is None:
                self.reject(node, f"operator '{type(node.op).__name__}' is not allowed",
                            hint="use + - * / ** and the listed functions")
            a, b = conv(node.left), conv(node.right)
            return self.constant(node, BinOp(op, a, b), op, (a, b))
        if isinstance(node, ast.UnaryOp):
            if isinstance(node.op, ast.USub):
                a = conv(node.operand)
                return self.constant(node, Neg(a), "neg", (a,))
            if isinstance(node.op, ast.UAdd):
                return conv(node.operand)
            if isinstance(node.op, ast.Not):
                return Logic("not", conv(node.operand))
            self.reject(node, "this unary operator is not allowed")
        if isinstance(node, ast.Compare):
            if len(node.ops) != 1:
                self.reject(node, "chained comparisons are not allowed", hint="write (a < b) and (b < c)")
            op = _CMPOPS.get(type(node.ops[0]))
            if op is None:
                self.reject(node, "only < <= > >= == != comparisons are allowed")
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
            return self.call(node)
        if isinstance(node, ast.Attribute):
            self.reject(node, "attribute access is not allowed")
        if isinstance(node, ast.Subscript):
            self.reject(node, "subscripts are not allowed")
        if isinstance(node, ast.Lambda):
            self.reject(node, "lambdas are not allowed")
        self.reject(node, f"'{type(node).__name__}' is not allowed in an equation",
                    hint="use numbers, names, + - * / **, comparisons, 'a if c else b' and the listed functions")
        raise AssertionError("unreachable")

    def call(self, node: ast.Call) -> Node:
        if not isinstance(node.func, ast.Name):
            self.reject(node, "only the listed math functions can be called", hint=f"allowed: {', '.join(FUNCTIONS)}")
        fn = node.func.id
        if fn.startswith("_"):
            self.reject(node, f"names starting with an underscore are not allowed: '{fn}'")
        if fn not in FUNCTIONS:
            import difflib

            close = difflib.get_close_matches(fn, FUNCTIONS, n=1)
            self.reject(node, f"unknown function '{fn}'",
                        hint=(f"did you mean '{close[0]}'? " if close else "") + f"allowed: {', '.join(FUNCTIONS)}")
        if node.keywords:
            self.reject(node, f"'{fn}' takes no keyword arguments")
        if len(node.args) != FUNCTIONS[fn]:
            self.reject(node, f"'{fn}' takes {FUNCTIONS[fn]} argument(s), got {len(node.args)}")
        args = tuple(self.convert(a) for a in node.args)
        if fn == "where":
            return IfElse(*args)
        return self.constant(node, Call(fn, args), fn, args)


# ---------------------------------------------------------------------------------------------
# Traversal


def symbols(node: Node) -> set[str]:
    """All symbol names in a tree."""
    out: set[str] = set()
    seen: set[int] = set()
    stack = [node]
    while stack:
        n = stack.pop()
        if id(n) in seen:  # a shared sub-tree is looked at once
            continue
        seen.add(id(n))
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


def _fold(op: str, *args: Num) -> Num | None:
    """The folded constant, or None (left unfolded) when it has no finite real value."""
    try:
        return Num(fold_value(op, *(a.value for a in args)))
    except FoldError:
        return None


def add(a: Node, b: Node) -> Node:
    """``a + b``, simplified (zero terms dropped, numbers folded, ``a + -b`` as ``a - b``)."""
    if _is(a, 0.0):
        return b
    if _is(b, 0.0):
        return a
    if isinstance(a, Num) and isinstance(b, Num):
        return _fold("+", a, b) or BinOp("+", a, b)
    if isinstance(b, Neg):
        return sub(a, b.arg)
    return BinOp("+", a, b)


def sub(a: Node, b: Node) -> Node:
    """``a - b``, simplified (``a - a`` is zero, numbers folded, ``a - -b`` as ``a + b``)."""
    if _is(b, 0.0):
        return a
    if _is(a, 0.0):
        return neg(b)
    if a == b:
        return ZERO
    if isinstance(a, Num) and isinstance(b, Num):
        return _fold("-", a, b) or BinOp("-", a, b)
    if isinstance(b, Neg):
        return add(a, b.arg)
    return BinOp("-", a, b)


def mul(a: Node, b: Node) -> Node:
    """``a * b``, simplified (zero and one factors, signs pulled out, numbers folded)."""
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
        return _fold("*", a, b) or BinOp("*", a, b)
    if isinstance(a, Neg) and isinstance(b, Neg):
        return mul(a.arg, b.arg)
    if isinstance(a, Neg):
        return neg(mul(a.arg, b))
    if isinstance(b, Neg):
        return neg(mul(a, b.arg))
    return BinOp("*", a, b)


def div(a: Node, b: Node) -> Node:
    """``a / b``, simplified (``0 / b`` is zero unless b is the number zero, ``a / 1`` is a, numbers folded)."""
    if _is(a, 0.0) and not _is(b, 0.0):
        return ZERO
    if _is(b, 1.0):
        return a
    if isinstance(a, Num) and isinstance(b, Num):
        return _fold("/", a, b) or BinOp("/", a, b)
    if isinstance(a, Neg):
        return neg(div(a.arg, b))
    if isinstance(b, Neg):
        return neg(div(a, b.arg))
    return BinOp("/", a, b)


def power(a: Node, b: Node) -> Node:
    """``a ** b``, simplified (exponents zero and one, numbers folded)."""
    if _is(b, 0.0):
        return ONE
    if _is(b, 1.0):
        return a
    if isinstance(a, Num) and isinstance(b, Num):
        return _fold("**", a, b) or BinOp("**", a, b)
    return BinOp("**", a, b)


def neg(a: Node) -> Node:
    """``-a``, simplified (a number negated, a double negation removed)."""
    if isinstance(a, Num):
        return Num(-a.value) if a.value != 0.0 else ZERO
    if isinstance(a, Neg):
        return a.arg
    return Neg(a)


def call(fn: str, *args: Node) -> Node:
    """``fn(*args)``, folded to a number when every argument is one and the value is finite."""
    if all(isinstance(a, Num) for a in args) and fn in _MATH:
        folded = _fold(fn, *args)
        if folded is not None:
            return folded
    return Call(fn, tuple(args))


def ifelse(c: Node, a: Node, b: Node) -> Node:
    """``a if c else b``, simplified to ``a`` when both branches are the same tree."""
    if a == b:
        return a
    return IfElse(c, a, b)


def binop(op: str, a: Node, b: Node) -> Node:
    """The simplifying constructor for ``op`` (``+ - * / **``) applied to ``a`` and ``b``."""
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
    """``[d node / d v for v in variables]``, each simplified (see :func:`diff`)."""
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
    free_memo: dict[int, bool] = {}
    affine_memo: dict[int, bool] = {}

    def free(n: Node) -> bool:
        if id(n) not in free_memo:
            free_memo[id(n)] = not (symbols(n) & var)
        return free_memo[id(n)]

    def affine(n: Node) -> bool:  # memoised by identity: a shared sub-tree is judged once
        if id(n) not in affine_memo:
            affine_memo[id(n)] = judge(n)
        return affine_memo[id(n)]

    def judge(n: Node) -> bool:
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


def depth_and_size(node: Node, known: Mapping[str, tuple[int, int]] | None = None) -> tuple[int, int]:
    """Nesting depth and node count of ``node`` unfolded (a shared sub-tree counted at each
    use), without recursion; a symbol listed in ``known`` counts as the (depth, size) given
    (a derived quantity's, so that the inlined measure is found before inlining)."""
    known = known or {}
    memo: dict[int, tuple[int, int]] = {}
    stack: list[tuple[Node, bool]] = [(node, False)]
    while stack:
        n, expanded = stack.pop()
        if id(n) in memo:
            continue
        if isinstance(n, Sym) and n.name in known:
            memo[id(n)] = known[n.name]
        elif not n.children():
            memo[id(n)] = (1, 1)
        elif expanded:
            kids = [memo[id(c)] for c in n.children()]
            memo[id(n)] = (1 + max(k[0] for k in kids), 1 + sum(k[1] for k in kids))
        else:
            stack.append((n, True))
            stack.extend((c, False) for c in n.children() if id(c) not in memo)
    return memo[id(node)]


def walk(node: Node) -> Iterable[Node]:
    """All nodes, parents before children."""
    stack = [node]
    while stack:
        n = stack.pop()
        yield n
        stack.extend(n.children())
